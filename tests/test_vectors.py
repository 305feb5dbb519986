"""The shared vectors: up to date with the codec, decoded right, rejected with the right verdict,
and every 1-, 2- and 3-bit error in each vector body detected by the CRC."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import firmware_protocol as fp
from firmware_protocol import stuffing
from firmware_protocol.vectors import make_vectors

VECTORS = Path(fp.__file__).resolve().parent / "vectors" / "frames.txt"


def test_committed_vectors_match_the_codec():
    assert VECTORS.read_text(encoding="ascii") == make_vectors.render(), (
        "frames.txt is stale: run python3 -m firmware_protocol.vectors.make_vectors"
    )


def parse(text):
    vectors, cur = [], None
    for line in text.splitlines():
        if line.startswith(("vector ", "reject ")):
            cur = {"kind": line.split()[0], "name": line.split()[1], "fields": {}}
        elif line.startswith("field "):
            parts = line.split(" ", 2)
            cur["fields"][parts[1]] = parts[2] if len(parts) > 2 else ""
        elif line == "end":
            vectors.append(cur)
        elif cur is not None and line:
            key, _, value = line.partition(" ")
            cur[key] = value
    return vectors


ALL = parse(VECTORS.read_text(encoding="ascii"))
GOOD = [v for v in ALL if v["kind"] == "vector"]
BAD = [v for v in ALL if v["kind"] == "reject"]


def test_vector_file_covers_every_message_type():
    assert {v["type"] for v in GOOD} == {t.name for t in fp.MessageType}
    assert {v["verdict"] for v in BAD} == {"crc_error", "malformed", "oversize", "unknown_type"}


@pytest.mark.parametrize("vec", GOOD, ids=[v["name"] for v in GOOD])
def test_good_vector_decodes_to_its_fields(vec):
    items = fp.StreamDecoder().feed(bytes.fromhex(vec["frame"]))
    assert len(items) == 1
    item = items[0]
    if vec["type"] == "GYRO_BLOCK":
        (block,) = item.blocks()
        f = vec["fields"]
        assert block.sample_seq == int(f["sample_seq"]) and block.t_us == int(f["t_us"])
        np.testing.assert_array_equal(block.samples.ravel(), [int(x) for x in f["samples"].split()])
        return
    assert item.seq == int(vec["seq"])
    msg = item.message
    for key, value in vec["fields"].items():
        got = getattr(msg, key)
        if key == "motors":
            flat = [x for m in got for x in (m.erpm, m.throttle, m.flags)]
            assert flat == [int(x) for x in value.split()]
        elif key == "throttles":
            assert list(got) == [int(x) for x in value.split()]
        elif isinstance(got, str):
            assert got == value
        else:
            assert int(got) == int(value), key


@pytest.mark.parametrize("vec", BAD, ids=[v["name"] for v in BAD])
def test_reject_vector_gets_its_verdict(vec):
    dec = fp.StreamDecoder()
    assert dec.feed(bytes.fromhex(vec["frame"])) == []
    assert getattr(dec.counters, vec["verdict"] + ("" if vec["verdict"] != "crc_error" else "s"), None) == 1
    # and the stream goes on
    assert len(dec.feed(fp.encode_frame(fp.RequestInfo(), 0))) == 1


def _syndromes(nbits: int) -> np.ndarray:
    """CRC (init 0) of each single-bit error pattern of an ``nbits`` body. The CRC is affine, so
    an error e is undetected exactly when crc(e, init=0) == 0."""
    nbytes = nbits // 8
    out = np.empty(nbits, dtype=np.int64)
    for i in range(nbits):
        e = bytearray(nbytes)
        e[i // 8] = 0x80 >> (i % 8)
        out[i] = fp.crc16(bytes(e), 0)
    return out


@pytest.mark.parametrize("vec", GOOD, ids=[v["name"] for v in GOOD])
def test_every_1_2_3_bit_error_is_detected(vec):
    # Exhaustive over all C(n,1) + C(n,2) + C(n,3) patterns via syndromes; CRC-16/CCITT has
    # Hamming distance 4 at these lengths (Koopman's CRC polynomial tables).
    body = stuffing.decode(bytes.fromhex(vec["frame"])[:-1])
    s = _syndromes(8 * len(body))
    assert np.all(s != 0), "a 1-bit error escapes"
    assert len(np.unique(s)) == len(s), "a 2-bit error escapes"
    present = np.zeros(1 << 16, dtype=bool)
    present[s] = True
    for i in range(len(s) - 1):
        pair = s[i] ^ s[i + 1 :]
        # s_i ^ s_j == s_k with k distinct from i, j (k == i or j would need a zero syndrome)
        assert not present[pair].any(), f"a 3-bit error with bit {i} escapes"
    # and through the real decoder, a sample of 3-bit errors
    rng = np.random.default_rng(len(body))
    for _ in range(200):
        bits = rng.choice(8 * len(body), size=3, replace=False)
        bad = bytearray(body)
        for b in bits:
            bad[b // 8] ^= 0x80 >> (b % 8)
        dec = fp.StreamDecoder()
        assert dec.feed(stuffing.encode(bytes(bad)) + b"\x00") == []
        assert dec.counters.crc_errors == 1
