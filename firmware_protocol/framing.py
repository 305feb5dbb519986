"""One frame: ``COBS(type | seq | payload | CRC-16) 0x00`` (``SPEC.md`` section 3).

The CRC is CRC-16/IBM-3740 ("CCITT-FALSE": poly 0x1021, init 0xFFFF, no reflection, xorout 0)
over type, seq and payload, sent most-significant byte first so that the CRC of a whole valid
body is 0 (the residue check). ``binascii.crc_hqx`` computes it in C.
"""

from __future__ import annotations

from binascii import crc_hqx

from . import stuffing
from .constants import CRC_INIT, MAX_ENCODED, MAX_PAYLOAD, MIN_BODY
from .messages import TYPE_OF, Message, encode_payload


def crc16(data: bytes, value: int = CRC_INIT) -> int:
    """CRC-16/IBM-3740 of ``data`` (check value of b"123456789" is 0x29B1, RevEng catalogue)."""
    return crc_hqx(data, value)


def frame_body(type_code: int, seq: int, payload: bytes) -> bytes:
    """Unstuffed body: type, seq, payload and the CRC (big-endian)."""
    if len(payload) > MAX_PAYLOAD:
        raise ValueError(f"payload of {len(payload)} bytes exceeds {MAX_PAYLOAD}")
    head = bytes((type_code & 0xFF, seq & 0xFF)) + payload
    return head + crc_hqx(head, CRC_INIT).to_bytes(2, "big")


def encode_raw(type_code: int, seq: int, payload: bytes) -> bytes:
    """Wire bytes of one frame, delimiter included."""
    return stuffing.encode(frame_body(type_code, seq, payload)) + b"\x00"


def encode_frame(msg: Message, seq: int) -> bytes:
    """Wire bytes of ``msg`` as frame number ``seq`` (0..255, wraps), delimiter included."""
    return encode_raw(TYPE_OF[type(msg)], seq, encode_payload(msg))


class FrameError(ValueError):
    """One frame that fails COBS, length or CRC checks; ``verdict`` names the counter it goes to."""

    def __init__(self, verdict: str, detail: str):
        super().__init__(f"{verdict}: {detail}")
        self.verdict = verdict


def unstuff_body(encoded: bytes) -> bytes:
    """Checked body of one encoded frame (no delimiter). Raises FrameError. COBS adds at least one
    byte, so the encoded limit (MAX_ENCODED) also bounds the body to MAX_BODY."""
    if len(encoded) > MAX_ENCODED:
        raise FrameError("oversize", f"{len(encoded)} encoded bytes, limit {MAX_ENCODED}")
    try:
        body = stuffing.decode(encoded)
    except stuffing.DecodeError as exc:
        raise FrameError("malformed", f"COBS: {exc}") from None
    if len(body) < MIN_BODY:
        raise FrameError("malformed", f"body of {len(body)} bytes, need at least {MIN_BODY}")
    if crc_hqx(body, CRC_INIT) != 0:
        raise FrameError("crc_error", "CRC mismatch")
    return body
