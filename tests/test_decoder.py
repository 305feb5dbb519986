"""The streaming decoder: chunking, garbage, bounded buffer, resynchronisation, counters."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

import firmware_protocol as fp
from firmware_protocol import stuffing
from firmware_protocol.constants import MAX_ENCODED

from .strategies import any_message


def _flatten(items):
    out = []
    for it in items:
        if isinstance(it, fp.GyroBatch):
            out.extend(("gyro", b.sample_seq, b.t_us, b.samples.tobytes()) for b in it.blocks())
        else:
            out.append((it.seq, it.message))
    return out


def _stream(messages):
    return b"".join(fp.encode_frame(m, i & 0xFF) for i, m in enumerate(messages))


@given(st.lists(any_message, min_size=1, max_size=25), st.data())
def test_any_chunking_yields_the_same_messages(messages, data):
    stream = _stream(messages)
    whole = fp.StreamDecoder()
    expected = _flatten(whole.feed(stream))
    cuts = sorted(data.draw(st.lists(st.integers(0, len(stream)), max_size=30)))
    split = fp.StreamDecoder()
    got = []
    prev = 0
    for c in [*cuts, len(stream)]:
        got.extend(_flatten(split.feed(stream[prev:c])))
        prev = c
    assert got == expected
    assert len(expected) == len(messages)
    assert split.counters == whole.counters
    assert whole.counters.frames_ok == len(messages) and whole.counters.bad_frames == 0


def test_one_byte_at_a_time_and_halves():
    msgs = [fp.GyroBlock(16 * i, 2000 * i, np.full((16, 3), i, np.int16)) for i in range(5)]
    msgs.insert(2, fp.LogText(1, "mid-stream"))
    stream = _stream(msgs)
    for step in (1, len(stream) // 2, 7):
        dec = fp.StreamDecoder()
        got = []
        for k in range(0, len(stream), step):
            got.extend(_flatten(dec.feed(stream[k : k + step])))
        assert len(got) == 6 and dec.counters.frames_ok == 6


@given(st.binary(max_size=3000), st.lists(st.integers(1, 600), max_size=20))
def test_garbage_never_raises_and_buffer_stays_bounded(garbage, chunks):
    dec = fp.StreamDecoder()
    pos = 0
    for size in [*chunks, len(garbage)]:
        dec.feed(garbage[pos : pos + size])
        pos += size
        assert dec.buffered <= MAX_ENCODED
    c = dec.counters
    assert c.bytes_in == len(garbage)


@given(st.binary(min_size=1, max_size=2000), any_message)
def test_resynchronises_after_garbage(garbage, msg):
    dec = fp.StreamDecoder()
    dec.feed(garbage)
    items = dec.feed(b"\x00" + fp.encode_frame(msg, 3))
    assert len(_flatten(items)) == 1


def test_oversize_run_is_discarded_not_accumulated():
    dec = fp.StreamDecoder()
    for _ in range(100):
        dec.feed(b"\x55" * 1000)
        assert dec.buffered <= MAX_ENCODED
    assert dec.counters.oversize == 1
    items = dec.feed(b"\x00" + fp.encode_frame(fp.LogText(1, "after"), 0))
    assert items[0].message.text == "after"
    assert dec.counters.bytes_skipped == 100_000 + 1


def test_counters_name_each_outcome():
    good = fp.encode_frame(fp.LogText(1, "ok"), 0)
    body = bytearray(stuffing.decode(good[:-1]))
    body[3] ^= 1
    crc_bad = stuffing.encode(bytes(body)) + b"\x00"
    unknown = fp.encode_raw(0x91, 1, b"abc")
    short = stuffing.encode(b"\x05\x01\x02") + b"\x00"
    bad_payload = fp.encode_raw(0x02, 2, b"\x00" * 9)
    dec = fp.StreamDecoder()
    dec.feed(good + crc_bad + unknown + short + bad_payload + b"\x00\x00" + good)
    c = dec.counters
    assert (c.frames_ok, c.crc_errors, c.unknown_type, c.malformed) == (2, 1, 1, 2)
    assert c.bytes_skipped == len(crc_bad) + len(short) + len(bad_payload)


def test_frame_seq_gaps_are_counted():
    frames = [fp.encode_frame(fp.HostHeartbeat(0), s) for s in (250, 251, 254, 255, 0, 3)]
    dec = fp.StreamDecoder()
    dec.feed(b"".join(frames))
    assert dec.counters.frames_lost == 2 + 2  # 252, 253 and 1, 2


def test_gyro_batch_keeps_stream_order_and_mixed_sizes():
    msgs = [
        fp.GyroBlock(0, 0, np.ones((8, 3), np.int16)),
        fp.GyroBlock(8, 1000, np.full((16, 3), 2, np.int16)),
        fp.MotorState(1500, (fp.MotorEntry(7000, 100, 1),)),
        fp.GyroBlock(24, 3000, np.full((8, 3), 3, np.int16)),
    ]
    items = fp.StreamDecoder().feed(_stream(msgs))
    assert [type(i).__name__ for i in items] == ["GyroBatch", "Received", "GyroBatch"]
    first = items[0]
    assert first.sample_seq.tolist() == [0, 8] and first.counts.tolist() == [8, 16]
    assert first.samples.shape == (24, 3) and first.samples[-1, 0] == 2
