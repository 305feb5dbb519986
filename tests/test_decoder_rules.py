"""The stream decoder's accounting, exactly: every byte and frame goes to one named counter.

``test_decoder.py`` checks chunking, garbage and resynchronisation over random streams; here each
outcome of SPEC.md section 3.4 is put at its edge (a frame of exactly the encoded limit and one
byte over, an oversize run ending in a later read, a GYRO_BLOCK count that disagrees with its
length, a motor count over 8, a reboot) and the counters are compared with the byte counts the
spec gives. The merged (live-path) output is checked against the per-message decoder.
"""

from __future__ import annotations

import numpy as np
import pytest

import firmware_protocol as fp
from firmware_protocol import stuffing
from firmware_protocol.constants import MAX_ENCODED
from firmware_protocol.decoder import GyroBatch, MotorBatch

UNKNOWN = 0x91  # a type this version does not know


def _gyro(seq, t, n, v=1):
    return fp.GyroBlock(seq, t, (np.arange(n * 3, dtype=np.int16).reshape(n, 3) + v))


def _motor(t, *erpm):
    return fp.MotorState(t, tuple(fp.MotorEntry(e, 100 * i, 1) for i, e in enumerate(erpm)))


def _body(frame: bytes) -> bytearray:
    return bytearray(stuffing.decode(frame[:-1]))


def _reframe(body: bytes) -> bytes:
    """Re-stuff an edited body, with a fresh CRC over its head (so only the payload is wrong)."""
    return fp.encode_raw(body[0], body[1], bytes(body[2:-2]))


# ----------------------------------------------------------------- the encoded-length limit


def test_a_frame_of_exactly_the_encoded_limit_is_read_and_one_byte_more_is_oversize():
    at_limit = fp.encode_raw(UNKNOWN, 0, b"\x01" * 250)  # body 254 bytes, encoded 255
    assert len(at_limit) == MAX_ENCODED + 1
    dec = fp.StreamDecoder()
    dec.feed(at_limit)
    assert (dec.counters.unknown_type, dec.counters.oversize, dec.counters.bytes_skipped) == (1, 0, 0)
    over = b"\x07" * (MAX_ENCODED + 1) + b"\x00"
    dec.feed(over)
    assert (dec.counters.oversize, dec.counters.bytes_skipped) == (1, len(over))


def test_a_partial_frame_of_the_limit_is_held_and_one_byte_more_is_dropped_until_its_end():
    dec = fp.StreamDecoder()
    dec.feed(b"\x07" * MAX_ENCODED)
    assert dec.buffered == MAX_ENCODED and dec.counters.oversize == 0
    dec.feed(b"\x07")  # now over the limit: dropped, and the rest of it too
    assert dec.buffered == 0 and dec.counters.oversize == 1
    assert dec.counters.bytes_skipped == MAX_ENCODED + 1
    dec.feed(b"\x07" * 10)  # still inside the oversize frame
    assert dec.buffered == 0 and dec.counters.bytes_skipped == MAX_ENCODED + 11
    good = fp.encode_frame(fp.LogText(1, "after"), 5)
    items = dec.feed(b"\x07\x07\x07\x00" + good)  # its end, then a good frame
    assert [i.message.text for i in items] == ["after"]
    c = dec.counters
    assert (c.oversize, c.bytes_skipped, c.frames_ok) == (1, MAX_ENCODED + 11 + 4, 1)
    assert c.bytes_in == MAX_ENCODED + 1 + 10 + 4 + len(good)


def test_an_oversize_frame_ending_in_the_next_read_with_nothing_after_it():
    dec = fp.StreamDecoder()
    dec.feed(b"\x07" * (MAX_ENCODED + 5))
    dec.feed(b"\x00")
    assert dec.counters.bytes_skipped == MAX_ENCODED + 6
    items = dec.feed(fp.encode_frame(fp.HostHeartbeat(1), 0))
    assert len(items) == 1 and dec.counters.oversize == 1


# ----------------------------------------------------------------- bad frames, each to its counter


def test_every_bad_frame_is_counted_once_with_all_its_bytes():
    good = fp.encode_frame(fp.LogText(1, "ok"), 0)
    bad_cobs = b"\x05\x01\x02\x00"  # the code byte promises 4 bytes, 2 follow
    short = stuffing.encode(b"\x05\x01\x02") + b"\x00"  # 3-byte body: under type, seq and CRC
    body = _body(good)
    body[3] ^= 0x40
    crc = stuffing.encode(bytes(body)) + b"\x00"
    dec = fp.StreamDecoder()
    dec.feed(bad_cobs + good + short + crc + b"\x00\x00\x00" + good)
    c = dec.counters
    assert (c.malformed, c.crc_errors, c.frames_ok, c.bad_frames) == (2, 1, 2, 3)
    assert c.bytes_skipped == len(bad_cobs) + len(short) + len(crc)  # idle delimiters are not skipped bytes


def test_a_body_of_exactly_four_bytes_is_a_frame():
    # type, seq and CRC only: a valid empty payload (here of a type nobody knows)
    frame = fp.encode_raw(UNKNOWN, 9, b"")
    dec = fp.StreamDecoder()
    dec.feed(frame)
    assert (dec.counters.unknown_type, dec.counters.malformed) == (1, 0)


@pytest.mark.parametrize("count,reason", [(0, "GYRO_BLOCK.count=0 in 9 bytes"), (3, "GYRO_BLOCK.count=3 in 21 bytes")])
def test_a_gyro_block_whose_count_disagrees_with_its_length_is_malformed(count, reason):
    body = _body(fp.encode_frame(_gyro(0, 0, 2), 4))
    body[2 + 8] = count
    if count == 0:
        del body[2 + 9 : -2]
    frame = _reframe(bytes(body))
    dec = fp.StreamDecoder()
    assert dec.feed(frame) == []
    assert (dec.counters.malformed, dec.counters.bytes_skipped, dec.counters.gyro_blocks) == (1, len(frame), 0)
    assert list(dec.rejected_payloads) == [(0x02, 4, reason)]


def test_a_gyro_block_cut_short_before_its_count_is_malformed():
    frame = fp.encode_raw(0x02, 1, b"\x00" * 7)
    dec = fp.StreamDecoder()
    dec.feed(frame)
    assert dec.counters.malformed == 1 and dec.rejected_payloads[0][2].startswith("GYRO_BLOCK.count=0")


@pytest.mark.parametrize("merge", [True, False])
@pytest.mark.parametrize("edit", ["nine motors", "count over length", "cut before count"])
def test_a_motor_state_whose_count_is_wrong_is_malformed(merge, edit):
    body = _body(fp.encode_frame(_motor(10, 7000, 7100), 2))
    if edit == "nine motors":
        body[6] = 9
        body[7:-2] = bytes(7 * 9)
    elif edit == "count over length":
        body[6] = 3
    else:
        del body[6:-2]
    frame = _reframe(bytes(body))
    dec = fp.StreamDecoder(merge=merge)
    assert dec.feed(frame) == []
    assert dec.counters.malformed == 1 and dec.counters.bytes_skipped == len(frame)
    assert dec.rejected_payloads[0][:2] == (0x03, 2)


def test_eight_motors_are_read():
    dec = fp.StreamDecoder(merge=True)
    (mb,) = dec.feed(fp.encode_frame(_motor(10, *range(1000, 9000, 1000)), 0))
    assert isinstance(mb, MotorBatch) and mb.erpm.tolist() == [list(range(1000, 9000, 1000))]


def test_a_type_left_out_of_known_types_is_unknown():
    dec = fp.StreamDecoder(known_types={0x02})
    items = dec.feed(fp.encode_frame(fp.LogText(1, "x"), 0) + fp.encode_frame(_gyro(0, 0, 1), 1))
    assert dec.counters.unknown_type == 1 and [type(i) for i in items] == [GyroBatch]


# ----------------------------------------------------------------- frame sequence


def test_unknown_frames_count_in_the_sequence():
    frames = [fp.encode_frame(fp.HostHeartbeat(0), 1), fp.encode_raw(UNKNOWN, 2, b"z"),
              fp.encode_raw(UNKNOWN, 4, b"z"), fp.encode_frame(fp.HostHeartbeat(0), 5)]
    dec = fp.StreamDecoder()
    dec.feed(b"".join(frames))
    assert dec.counters.frames_lost == 1  # only 3


def test_bad_frames_do_not_advance_the_sequence():
    hb = [fp.encode_frame(fp.HostHeartbeat(0), s) for s in (10, 11, 12)]
    body = _body(hb[1])
    body[2] ^= 1
    dec = fp.StreamDecoder()
    dec.feed(hb[0] + stuffing.encode(bytes(body)) + b"\x00" + hb[2])
    assert (dec.counters.frames_lost, dec.counters.crc_errors) == (1, 1)


def test_the_sequence_is_carried_across_reads_and_forgotten_on_reset():
    dec = fp.StreamDecoder()
    dec.feed(fp.encode_frame(fp.HostHeartbeat(0), 100))
    dec.feed(fp.encode_frame(fp.HostHeartbeat(0), 103))
    assert dec.counters.frames_lost == 2
    dec.reset()
    dec.feed(fp.encode_frame(fp.HostHeartbeat(0), 50))
    assert dec.counters.frames_lost == 2


def test_reset_drops_a_partial_frame():
    dec = fp.StreamDecoder()
    frame = fp.encode_frame(fp.LogText(1, "whole"), 0)
    dec.feed(frame[:5])
    dec.reset()
    assert dec.buffered == 0
    assert [i.message.text for i in dec.feed(frame)] == ["whole"]


@pytest.mark.parametrize("kind", ["info", "status"])
def test_a_new_boot_restarts_the_sequence_without_a_loss_and_the_same_boot_does_not(kind):
    def hello(boot, seq):
        if kind == "info":
            return fp.encode_frame(fp.DeviceInfo(boot_id=boot), seq)
        return fp.encode_frame(fp.DeviceStatus(0, boot, 0, 0, 0, 0, 0, 0, 1), seq)

    dec = fp.StreamDecoder()
    dec.feed(hello(7, 200) + fp.encode_frame(fp.HostHeartbeat(0), 201))
    dec.feed(hello(8, 0) + fp.encode_frame(fp.HostHeartbeat(0), 1))  # rebooted: counts from 0
    assert dec.counters.frames_lost == 0
    dec.feed(hello(8, 5))  # the same boot: 2, 3 and 4 were lost
    assert dec.counters.frames_lost == 3


# ----------------------------------------------------------------- output


def test_gyro_counters_and_the_batch_arrays():
    blocks = [_gyro(0, 0, 4, 1), _gyro(4, 500, 4, 2), _gyro(8, 1000, 2, 3)]
    dec = fp.StreamDecoder()
    (batch,) = dec.feed(b"".join(fp.encode_frame(b, i) for i, b in enumerate(blocks)))
    assert (dec.counters.gyro_blocks, dec.counters.gyro_samples) == (3, 10)
    assert batch.sample_seq.tolist() == [0, 4, 8] and batch.t_us.tolist() == [0, 500, 1000]
    assert batch.counts.tolist() == [4, 4, 2]
    assert np.array_equal(batch.samples, np.concatenate([b.samples for b in blocks]))
    assert batch.blocks() == blocks
    dps = batch.dps(0.5)
    assert dps.dtype == np.float32 and np.array_equal(dps, batch.samples.astype(np.float32) * 0.5)


def test_concatenate_joins_batches_in_order_and_one_is_itself():
    a = fp.StreamDecoder().feed(fp.encode_frame(_gyro(0, 0, 2, 1), 0))[0]
    b = fp.StreamDecoder().feed(fp.encode_frame(_gyro(2, 250, 3, 5), 0))[0]
    assert GyroBatch.concatenate([a]) is a
    ab = GyroBatch.concatenate([a, b])
    assert ab.blocks() == a.blocks() + b.blocks()


def test_merged_output_equals_the_messages_one_by_one():
    # the live path: between two DEVICE_INFO frames, the other messages, then one MotorBatch per
    # motor count, then one GyroBatch; the values equal the per-message decoder's
    msgs = [fp.DeviceInfo(boot_id=1), _gyro(0, 0, 3, 1), _motor(100, 7000, 7100), fp.LogText(1, "a"),
            _gyro(3, 375, 3, 2), _motor(400, 7200, 7300), _motor(500, 7400, 7500, 7600),
            fp.DeviceInfo(boot_id=1), _gyro(6, 750, 2, 3), _motor(800, 9000)]
    stream = b"".join(fp.encode_frame(m, i) for i, m in enumerate(msgs))
    items = fp.StreamDecoder(merge=True).feed(stream)
    kinds = [type(i).__name__ if not isinstance(i, fp.Received) else type(i.message).__name__ for i in items]
    assert kinds == ["DeviceInfo", "LogText", "MotorBatch", "MotorBatch", "GyroBatch",
                     "DeviceInfo", "MotorBatch", "GyroBatch"]
    one_by_one = fp.StreamDecoder().feed(stream)
    states = [i.message for i in one_by_one if isinstance(i, fp.Received) and isinstance(i.message, fp.MotorState)]
    merged = [i for i in items if isinstance(i, MotorBatch)]
    rows = [(int(mb.t_us[r]), tuple(zip(mb.erpm[r].tolist(), mb.throttle[r].tolist(), mb.flags[r].tolist(),
                                          strict=True)))
            for mb in merged for r in range(len(mb))]
    assert rows == [(s.t_us, tuple((m.erpm, m.throttle, m.flags) for m in s.motors)) for s in states]
    gyro = [b for i in items if isinstance(i, GyroBatch) for b in i.blocks()]
    assert gyro == [m for m in msgs if isinstance(m, fp.GyroBlock)]


def test_unmerged_output_keeps_stream_order_with_one_batch_per_run():
    msgs = [_gyro(0, 0, 1), _gyro(1, 125, 1), fp.LogText(1, "x"), _gyro(2, 250, 1), _motor(300, 5000)]
    items = fp.StreamDecoder().feed(b"".join(fp.encode_frame(m, i) for i, m in enumerate(msgs)))
    assert [type(i).__name__ for i in items] == ["GyroBatch", "Received", "GyroBatch", "Received"]
    assert [i.seq for i in items if isinstance(i, fp.Received)] == [2, 4]
