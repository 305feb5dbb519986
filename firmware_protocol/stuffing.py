"""COBS byte stuffing (Cheshire and Baker, IEEE/ACM Trans. Networking 7(2), 1999).

``encode``/``decode`` use the C implementation of the PyPI package ``cobs``. The pure-Python
``encode_reference``/``decode_reference`` spell the algorithm out; tests check the two agree and
the benchmark uses the reference as its baseline.

Canonical form (``SPEC.md`` 3.2): a body ending with a full 254-byte block gets no trailing
``01`` code byte; decoders accept both forms.
"""

from __future__ import annotations

from cobs import cobs as _cobs

DecodeError = _cobs.DecodeError

encode = _cobs.encode
decode = _cobs.decode


def encode_reference(data: bytes) -> bytes:
    """COBS-encode ``data`` (no delimiter); at most max(1, ceil(n/254)) bytes of overhead."""
    out = bytearray([0])  # placeholder for the first code byte
    code_at = 0
    code = 1
    last = len(data) - 1
    for i, b in enumerate(data):
        if b == 0:
            out[code_at] = code
            code_at = len(out)
            out.append(0)
            code = 1
            continue
        out.append(b)
        code += 1
        if code == 0xFF and i < last:  # full block; canonical form opens no block at the very end
            out[code_at] = code
            code_at = len(out)
            out.append(0)
            code = 1
    out[code_at] = code
    return bytes(out)


def decode_reference(data: bytes) -> bytes:
    """Decode one COBS packet (no delimiter). Raises DecodeError on a zero or truncated block."""
    out = bytearray()
    i = 0
    n = len(data)
    while i < n:
        code = data[i]
        if code == 0:
            raise DecodeError("zero byte found in input")
        end = i + code
        if end > n:
            raise DecodeError("not enough input bytes for length code")
        block = data[i + 1 : end]
        if 0 in block:
            raise DecodeError("zero byte found in input")
        out += block
        i = end
        if code < 255 and i < n:
            out.append(0)
    return bytes(out)
