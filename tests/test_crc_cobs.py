"""CRC-16 and COBS against published values and against reference implementations."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from firmware_protocol import crc16, stuffing
from firmware_protocol.framing import frame_body


def crc16_bitwise(data: bytes, crc: int = 0xFFFF) -> int:
    """CRC-16/IBM-3740 written out from its definition (poly 0x1021, MSB first, no reflection)."""
    for b in data:
        crc ^= b << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) & 0xFFFF if crc & 0x8000 else (crc << 1) & 0xFFFF
    return crc


def test_crc_check_values():
    # RevEng CRC catalogue: CRC-16/IBM-3740 check 0x29B1; same polynomial with init 0 is XMODEM, 0x31C3.
    assert crc16(b"123456789") == 0x29B1
    assert crc16(b"123456789", 0) == 0x31C3
    assert crc16_bitwise(b"123456789") == 0x29B1


@given(st.binary(max_size=300))
def test_crc_matches_definition(data):
    assert crc16(data) == crc16_bitwise(data)


@given(st.integers(0, 255), st.integers(0, 255), st.binary(max_size=250))
def test_crc_residue_of_valid_body_is_zero(t, seq, payload):
    # SPEC 3.3: CRC sent MSB first, so the CRC over the whole body is 0.
    assert crc16(frame_body(t, seq, payload)) == 0


# Cheshire and Baker, IEEE/ACM Trans. Networking 7(2), 1999: worked pairs (delimiter not shown).
COBS_PAIRS = [
    ("00", "0101"),
    ("0000", "010101"),
    ("001100", "01021101"),
    ("11220033", "0311220233"),
    ("11223344", "0511223344"),
    ("11000000", "0211010101"),
    ("", "01"),
    (bytes(range(1, 255)).hex(), "ff" + bytes(range(1, 255)).hex()),
]


@pytest.mark.parametrize(("raw", "enc"), COBS_PAIRS)
@pytest.mark.parametrize("impl", ["c", "reference"])
def test_cobs_published_pairs(raw, enc, impl):
    encode = stuffing.encode if impl == "c" else stuffing.encode_reference
    decode = stuffing.decode if impl == "c" else stuffing.decode_reference
    assert encode(bytes.fromhex(raw)).hex() == enc
    assert decode(bytes.fromhex(enc)).hex() == raw


def test_cobs_accepts_trailing_01_after_full_block():
    # REFERENCES: encoders differ on a final full 254-byte block; SPEC 3.2 fixes the canonical form
    # and requires receivers to accept the other.
    block = bytes(range(1, 255))
    for decode in (stuffing.decode, stuffing.decode_reference):
        assert decode(b"\xff" + block + b"\x01") == block


@given(st.binary(max_size=1200))
def test_cobs_roundtrip_overhead_and_no_zeros(data):
    enc = stuffing.encode(data)
    assert enc == stuffing.encode_reference(data)
    assert b"\x00" not in enc
    # Overhead at most max(1, ceil(n/254)) bytes (Cheshire and Baker 1999).
    assert len(enc) - len(data) <= max(1, math.ceil(len(data) / 254))
    assert stuffing.decode(enc) == data
    assert stuffing.decode_reference(enc) == data


@given(st.binary(max_size=300))
def test_cobs_decoders_agree_on_garbage(data):
    outcomes = []
    for decode in (stuffing.decode, stuffing.decode_reference):
        try:
            outcomes.append(decode(data))
        except stuffing.DecodeError:
            outcomes.append("error")
    assert outcomes[0] == outcomes[1]


# --- one checked frame (framing.unstuff_body, SPEC 3): every verdict, at its exact limit ---

from firmware_protocol.constants import MAX_BODY, MAX_ENCODED, MIN_BODY  # noqa: E402
from firmware_protocol.framing import FrameError, encode_raw, unstuff_body  # noqa: E402


@given(st.integers(0, 255), st.integers(0, 255), st.binary(max_size=250))
def test_a_valid_frame_unstuffs_to_its_body(t, seq, payload):
    wire = encode_raw(t, seq, payload)
    assert wire[-1] == 0 and 0 not in wire[:-1]
    assert unstuff_body(wire[:-1]) == frame_body(t, seq, payload)


def verdict(encoded: bytes) -> tuple[str, str]:
    with pytest.raises(FrameError) as info:
        unstuff_body(encoded)
    return info.value.verdict, str(info.value)


@given(st.integers(0, 255), st.integers(0, 255), st.binary(min_size=0, max_size=250), st.data())
def test_any_single_bit_flip_is_a_crc_error_or_malformed(t, seq, payload, data):
    body = bytearray(frame_body(t, seq, payload))
    bit = data.draw(st.integers(0, 8 * len(body) - 1))
    body[bit // 8] ^= 1 << (bit % 8)
    # CRC-16 detects every single-bit error (Koopman and Chakravarty 2004: Hamming distance >= 2)
    v, text = verdict(stuffing.encode(bytes(body)))
    assert (v, text) == ("crc_error", "crc_error: CRC mismatch")


def test_length_limits_are_exact():
    smallest = frame_body(1, 2, b"")
    assert len(smallest) == MIN_BODY and unstuff_body(stuffing.encode(smallest)) == smallest
    assert verdict(stuffing.encode(smallest[:-1])) == (
        "malformed", f"malformed: body of {MIN_BODY - 1} bytes, need at least {MIN_BODY}")
    largest = frame_body(1, 2, bytes(range(1, 251)))
    assert len(largest) == MAX_BODY and unstuff_body(stuffing.encode(largest)) == largest
    over = largest + b"\x01"  # one byte too many: COBS of 255 non-zero bytes is 257 bytes, over MAX_ENCODED
    enc = stuffing.encode(over)
    assert len(enc) > MAX_ENCODED
    assert verdict(enc) == ("oversize", f"oversize: {len(enc)} encoded bytes, limit {MAX_ENCODED}")
    # COBS adds at least one byte, so no body over MAX_BODY fits in MAX_ENCODED: the encoded
    # length is the one limit (framing has no second, unreachable body check)
    enc = stuffing.encode(bytes(MAX_BODY + 1))
    assert len(enc) == MAX_ENCODED + 1 and verdict(enc)[0] == "oversize"
    enc = stuffing.encode(bytes(MAX_BODY))
    assert len(enc) == MAX_ENCODED
    assert verdict(enc) == ("crc_error", "crc_error: CRC mismatch")  # the right length, a bad CRC


def test_bad_cobs_is_malformed_and_says_so():
    v, text = verdict(b"\x05\x11")  # a code byte pointing past the end
    assert v == "malformed" and text.startswith("malformed: COBS: ")


def test_frame_error_is_a_value_error_with_its_verdict():
    e = FrameError("crc_error", "x")
    assert isinstance(e, ValueError) and e.verdict == "crc_error" and str(e) == "crc_error: x"
