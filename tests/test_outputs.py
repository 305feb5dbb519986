"""What a person and a script read, field by field: event lines, JSON objects, mode states, the
assembler's outputs on both decoder paths, the window cache, the decoder's and the capture
reader's less travelled paths.

The printed lines and JSON keys are spinrig's own formats (README "What the warnings mean"); they
are written out here in full so that a changed word, key, unit or rounding fails a test.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

import firmware_protocol as fp
from firmware_protocol import stuffing
from monitor import spectra
from monitor.assembler import Assembler, MotorUpdate, Samples
from monitor.capture import read_capture
from monitor.crossing import CrossingEvent, CrossingWatch, MotorReading, ObservedBand
from monitor.profile import Mode, Profile
from monitor.stray import StrayPeak

# ----------------------------------------------------------------- stray peaks


def test_a_stray_peak_as_json_and_as_a_line():
    p = StrayPeak(12.34567, 161.6789, "pitch", 11.26, 9012.34, 11876.56, width_hz=4.567, hits=7)
    assert p.as_dict() == {"kind": "stray_peak", "t_s": 12.3457, "freq_hz": 161.68, "axis": "pitch",
                           "over_floor_db": 11.3, "rpm_low": 9012.3, "rpm_high": 11876.6, "width_hz": 4.57,
                           "hits": 7}
    assert p.text() == ("   12.35 s  STRAY    peak at  161.7 Hz on pitch, +11.3 dB over the floor, held still "
                        "from 9012 to 11877 RPM: not a motor order and not in the profile")


# ----------------------------------------------------------------- crossing events


def _event(state, previous, reason="order inside the watch band", estimated=False, motors=None):
    motors = motors or (MotorReading(1, 11990.04, 199.834, "crossing"), MotorReading(2, 12500.0, 208.33, "nearing"),
                        MotorReading(3, 9000.0, 150.0, "clear"))
    return CrossingEvent(3.14159, state, previous, "front arm flap", 200.004, 1.0, "1x", 1, 11990.04, 199.834,
                         -31.256, -40.004, (11760.0, 12240.0), (11582.81, 12417.19), motors, reason, estimated)


def test_a_crossing_event_as_json():
    e = _event("crossing", "nearing")
    assert e.over_floor_db == pytest.approx(8.748)
    assert e.as_dict() == {
        "kind": "crossing", "previous": "nearing", "t_s": 3.1416, "mode": "front arm flap", "mode_hz": 200.0,
        "order": 1.0, "order_name": "1x", "motor": 1, "rpm": 11990.0, "order_hz": 199.83, "level_db": -31.26,
        "over_floor_db": 8.75, "predicted_rpm": [11760.0, 12240.0], "watch_rpm": [11582.8, 12417.2],
        "motors": [{"motor": 1, "rpm": 11990.0, "order_hz": 199.83, "state": "crossing"},
                   {"motor": 2, "rpm": 12500.0, "order_hz": 208.33, "state": "nearing"},
                   {"motor": 3, "rpm": 9000.0, "order_hz": 150.0, "state": "clear"}],
        "reason": "order inside the watch band", "rpm_estimated": False}


def test_crossing_event_lines_for_each_state():
    level = "response +8.7 dB over its floor (-31.3 dB re (deg/s)^2/Hz)"
    assert _event("crossing", "nearing").text() == (
        "    3.14 s  CROSSING 1x of M1 at 199.8 Hz (11990 RPM) on front arm flap 200.0 Hz; watch band "
        f"11583-12417 RPM; {level}")
    assert _event("crossing", "clear", "stepped over the band since the last frame (met the mode there)",
                  estimated=True).text() == (
        "    3.14 s  CROSSING 1x of M1 at 199.8 Hz (11990 RPM est.) on front arm flap 200.0 Hz; watch band "
        f"11583-12417 RPM; stepped over the band since the last frame (met the mode there); {level}")
    assert _event("nearing", "clear", "closing at 12.5 Hz/s, 0.4 s to the band").text() == (
        "    3.14 s  NEARING  1x of M1,2 at 199.8 Hz (11990 RPM) on front arm flap 200.0 Hz; watch band "
        f"11583-12417 RPM; closing at 12.5 Hz/s, 0.4 s to the band; {level}")
    assert _event("nearing", "clear", "inside the margin with the response +8.7 dB over its floor").text() == (
        "    3.14 s  NEARING  1x of M1,2 at 199.8 Hz (11990 RPM) on front arm flap 200.0 Hz; watch band "
        f"11583-12417 RPM; {level}")
    assert _event("clear", "nearing", "no order inside the margin").text() == (
        "    3.14 s  CLEAR    1x of every motor away from front arm flap 200.0 Hz (nearest M1 at 199.8 Hz, "
        f"11990 RPM); {level}")


def test_the_motor_list_names_the_motors_in_the_states_asked_or_the_lead_one():
    e = _event("crossing", "nearing")
    assert e.motor_list() == "M1,2" and e.motor_list(("crossing",)) == "M1" and e.motor_list(("gone",)) == "M1"


def test_an_observed_band_as_json_open_and_closed():
    b = ObservedBand("arm", 200.004, 2.0, "2x", (1, 3), 5890.04, 6110.06, -30.004, (5880.0, 6120.0), 2, 1.2345,
                     float("nan"))
    d = b.as_dict()
    assert d == {"mode": "arm", "mode_hz": 200.0, "order": 2.0, "order_name": "2x", "motors": [1, 3],
                 "observed_rpm": [5890.0, 6110.1], "predicted_rpm": [5880.0, 6120.0], "peak_db": -30.0,
                 "passages": 2, "t_start_s": 1.234, "t_end_s": None}
    b.t_end_s = 9.87654
    assert b.as_dict()["t_end_s"] == 9.877


# ----------------------------------------------------------------- mode states


BIN = 8000 / 2048
FREQS = np.arange(1025) * BIN


def test_mode_states_before_any_frame_and_while_crossing_and_clear():
    prof = Profile("bench", 3, "clamped", (Mode("arm", 200.0, 0.02, "pitch"), Mode("stack", 450.0, 0.03, "roll")))
    w = CrossingWatch(prof, 2, FREQS, 0.1)
    assert w.mode_states() == [
        {"mode": "arm", "freq_hz": 200.0, "state": "clear", "level_db": None, "over_floor_db": None},
        {"mode": "stack", "freq_hz": 450.0, "state": "clear", "level_db": None, "over_floor_db": None}]
    psd = np.full((1, FREQS.size), 1e-4)
    w.update(np.array([0.0]), psd, np.array([[60 * 202.0, 60 * 300.0]]))
    arm, stack = w.mode_states()
    half = 0.02 * 200 + BIN / 2 + 0.005 * 200
    assert arm == {"mode": "arm", "freq_hz": 200.0, "state": "crossing", "level_db": pytest.approx(-40.0),
                   "over_floor_db": pytest.approx(0.0), "order": 1.0, "order_name": "1x", "motor": 1,
                   "motors": [1], "rpm": 60 * 202.0, "order_hz": pytest.approx(202.0),
                   "watch_rpm": pytest.approx((60 * (200 - half), 60 * (200 + half))),
                   "predicted_rpm": pytest.approx((60 * 196.0, 60 * 204.0))}
    # the stack (450 Hz) is clear: the nearest order is motor 2's 3x... no: motor 1's 2x at 404 Hz,
    # motor 2's 1x at 300 Hz, 2x at 600; the nearest of all is M1 2x (46 Hz away)
    assert stack["state"] == "clear" and stack["motors"] == [1] and stack["motor"] == 1
    assert stack["order"] == 2.0 and stack["order_name"] == "2x" and stack["order_hz"] == pytest.approx(404.0)
    assert stack["rpm"] == 60 * 202.0
    assert stack["predicted_rpm"] == pytest.approx((30 * 450 * 0.97, 30 * 450 * 1.03))


# ----------------------------------------------------------------- the assembler on both decoder paths


def _stream():
    info = fp.DeviceInfo(sens_num=164, sens_den=10, pole_pairs=7, motor_count=2, gyro_rate_mhz=8_000_000)
    frames = [fp.encode_frame(info, 0)]
    for k in range(6):
        frames.append(fp.encode_frame(fp.GyroBlock(16 * k, 2000 * k, np.full((16, 3), 16 * k, np.int16)), 2 * k + 1))
        frames.append(fp.encode_frame(fp.MotorState(2000 * k + 500, (fp.MotorEntry(70_000 + 7 * k, 5000, 1),
                                                                     fp.MotorEntry(35_000, 2500, 0))), 2 * k + 2))
    return b"".join(frames)


def _assemble(merge):
    asm = Assembler()
    out = asm.feed(fp.StreamDecoder(merge=merge).feed(_stream()), host_s=0.0)
    return asm, out


def test_motor_states_one_by_one_give_what_the_merged_batches_give():
    a_one, out_one = _assemble(False)
    a_run, out_run = _assemble(True)

    def motors(out):
        mu = [o for o in out if isinstance(o, MotorUpdate)]
        return (np.concatenate([m.t_s for m in mu]), np.concatenate([m.rpm for m in mu]),
                np.concatenate([m.throttle for m in mu]), np.concatenate([m.valid for m in mu]))

    t1, r1, th1, v1 = motors(out_one)
    t2, r2, th2, v2 = motors(out_run)
    assert r1.shape == (6, 2) and np.array_equal(r1, r2) and np.array_equal(th1, th2) and np.array_equal(v1, v2)
    assert r1[:, 0].tolist() == [10_000.0 + k for k in range(6)] and r1[:, 1].tolist() == [5000.0] * 6
    assert th1[0].tolist() == [0.5, 0.25] and v1[0].tolist() == [True, False]
    s1 = [o for o in out_one if isinstance(o, Samples)]
    # one by one the time base starts at the first sample; the motor times sit 0.5 ms after each block
    assert np.allclose(t1, s1[0].t0_s + 0.0005 + 0.002 * np.arange(6))
    assert np.allclose(np.diff(t2), 0.002)


def test_the_samples_carry_their_rate_index_and_count():
    asm, out = _assemble(True)
    s = [o for o in out if isinstance(o, Samples)]
    assert sum(x.dps.shape[0] for x in s) == asm.stats.samples == 96
    assert all(x.fs_hz == 8000.0 for x in s) and s[0].start == 0 and s[0].segment == 0
    # block 1 holds 16 counts on every axis: 16 / 16.4 deg/s
    assert s[0].dps[16:32].tolist() == [[np.float32(16) * np.float32(10 / 164)] * 3] * 16
    assert asm.stats.segments == 1 and asm.stats.gaps == 0 and asm.stats.samples_lost == 0


def test_two_holes_are_each_counted_and_their_fill_times_follow_the_index():
    info = fp.DeviceInfo(gyro_rate_mhz=8_000_000)
    blocks = [(k * 16, k * 2000) for k in (0, 1, 3, 4, 6)]  # blocks 2 and 5 lost
    data = fp.encode_frame(info, 0) + b"".join(
        fp.encode_frame(fp.GyroBlock(s, t, np.full((16, 3), 164, np.int16)), i + 1) for i, (s, t) in enumerate(blocks))
    asm = Assembler()
    out = asm.feed(fp.StreamDecoder(merge=True).feed(data), host_s=0.0)
    fills = [o for o in out if isinstance(o, Samples) and o.valid is not None]
    assert [(f.start, f.dps.shape[0]) for f in fills] == [(32, 16), (80, 16)]
    assert [f.t0_s for f in fills] == pytest.approx([32 / 8000, 80 / 8000])
    assert all(f.fs_hz == 8000.0 and f.dps.dtype == np.float32 and f.valid.dtype == bool for f in fills)
    assert (asm.stats.holes_bridged, asm.stats.samples_filled, asm.stats.samples_lost) == (2, 32, 32)
    assert asm.stats.samples == 80


def test_blocks_before_the_description_are_all_counted():
    data = b"".join(fp.encode_frame(fp.GyroBlock(16 * k, 2000 * k, np.ones((16, 3), np.int16)), k) for k in range(3))
    asm = Assembler()
    for k in range(3):  # three reads, three batches
        asm.feed(fp.StreamDecoder().feed(data[k * (len(data) // 3): (k + 1) * (len(data) // 3)]), host_s=0.0)
    assert asm.stats.orphan_blocks == 3


# ----------------------------------------------------------------- the window cache


def test_windows_are_scipy_periodic_windows_read_only_and_cached(monkeypatch):
    monkeypatch.setattr(spectra, "_WINDOW_CACHE", {})
    for name in ("hann", "flattop", "blackman"):
        w, s1, s2 = spectra.window(name, 256)
        ref = scipy.signal.get_window(name, 256, fftbins=True)  # periodic (DFT-even) windows
        assert w.dtype == np.float64 and np.array_equal(w, ref)
        assert s1 == pytest.approx(ref.sum(), rel=1e-15) and s2 == pytest.approx((ref * ref).sum(), rel=1e-15)
        assert not w.flags.writeable
        assert spectra.window(name, 256)[0] is w  # the same array again
    assert set(spectra._WINDOW_CACHE) == {("hann", 256), ("flattop", 256), ("blackman", 256)}
    assert spectra.window("hann", 128)[0].shape == (128,)


# ----------------------------------------------------------------- decoder paths


def test_every_counter_adds_over_repeated_outcomes():
    good = fp.encode_frame(fp.LogText(1, "ok"), 0)
    body = bytearray(stuffing.decode(good[:-1]))
    body[3] ^= 1
    crc = stuffing.encode(bytes(body)) + b"\x00"
    bad_cobs = b"\x05\x01\x02\x00"
    short = stuffing.encode(b"\x05\x01\x02") + b"\x00"
    over = b"\x07" * 256 + b"\x00"
    unknown = fp.encode_raw(0x91, 1, b"abc")
    gyro_bad = fp.encode_raw(0x02, 2, b"\x00" * 8 + b"\x03")  # count 3, no samples
    motor_bad = fp.encode_raw(0x03, 3, b"\x00\x00\x00\x00\x03")  # count 3, no entries
    one = crc + bad_cobs + short + over + unknown + gyro_bad + motor_bad + good
    dec = fp.StreamDecoder(merge=True)
    dec.feed(one + one)
    c = dec.counters
    assert (c.crc_errors, c.oversize, c.unknown_type, c.frames_ok) == (2, 2, 2, 2)
    assert c.malformed == 2 * 4  # bad COBS, short, the gyro and the motor count
    assert c.bytes_skipped == 2 * (len(crc) + len(bad_cobs) + len(short) + len(over) + len(gyro_bad) + len(motor_bad))
    reasons = [r for _, _, r in dec.rejected_payloads]
    assert reasons == ["GYRO_BLOCK.count=3 in 9 bytes", "MOTOR_STATE.count=3 in 5 bytes"] * 2


def test_a_motor_state_of_no_motors_is_a_frame():
    dec = fp.StreamDecoder(merge=True)
    items = dec.feed(fp.encode_frame(fp.MotorState(5, ()), 0) + fp.encode_frame(fp.LogText(1, "after"), 1))
    assert dec.counters.frames_ok == 2 and dec.counters.malformed == 0
    assert [i.message.text for i in items if isinstance(i, fp.Received)] == ["after"]


def test_a_loss_after_frame_zero_is_counted_also_when_the_next_is_unknown():
    dec = fp.StreamDecoder()
    dec.feed(fp.encode_frame(fp.HostHeartbeat(0), 0) + fp.encode_raw(0x91, 2, b""))
    assert dec.counters.frames_lost == 1


def test_losses_before_the_first_description_are_counted():
    dec = fp.StreamDecoder()
    dec.feed(fp.encode_frame(fp.HostHeartbeat(0), 5) + fp.encode_frame(fp.DeviceInfo(boot_id=3), 8))
    assert dec.counters.frames_lost == 2


def test_rejected_payloads_keep_the_newest_64_and_a_new_decoder_holds_nothing():
    dec = fp.StreamDecoder()
    assert dec.buffered == 0
    dec.feed(b"".join(fp.encode_raw(0x02, i & 0xFF, b"\x00" * 7) for i in range(70)))
    assert len(dec.rejected_payloads) == 64 and dec.rejected_payloads[-1][1] == 69 and dec.rejected_payloads[0][1] == 6


# ----------------------------------------------------------------- the capture reader


def _chunk(kind: bytes, payload: bytes, host_ns=0) -> bytes:
    import struct
    import zlib

    head = struct.pack("<2scxIq", b"\xd5\x52", kind, len(payload), host_ns)
    return head + payload + struct.pack("<I", zlib.crc32(head + payload))


MAGIC = b"spinrig rec v2\n\x00"


def test_description_and_gap_chunks_are_read_back_and_damage_keeps_the_time(tmp_path):
    f = tmp_path / "c.spinrec"
    chunks = [_chunk(b"M", b'{"a": 1}'), _chunk(b"I", b"\x01info", 100_000_000), _chunk(b"D", b"one", 200_000_000),
              _chunk(b"G", b'{"reason": "reconnect"}', 500_000_000), b"\x33" * 30, _chunk(b"D", b"two", 700_000_000),
              _chunk(b"\xff", b"odd kind", 800_000_000)]
    f.write_bytes(MAGIC + b"".join(chunks))
    c = read_capture(f)
    assert [(ch.kind, ch.payload) for ch in c.chunks] == [
        ("I", b"\x01info"), ("D", b"one"), ("G", b'{"reason": "reconnect"}'), ("X", b""), ("D", b"two")]
    # the damage holds the time of the chunk before it
    assert [ch.host_s for ch in c.chunks] == pytest.approx([0.1, 0.2, 0.5, 0.5, 0.7], abs=1e-12)
    at = len(MAGIC) + sum(len(x) for x in chunks[:4])
    assert c.chunks[3].offset == at and c.damaged == [(at, at + 30, "no chunk sync")]
    assert c.cut_at is None and c.cut_reason == "" and c.cut_bytes == 0 and not c.ended_cleanly


def test_damage_before_any_chunk_holds_time_zero(tmp_path):
    f = tmp_path / "d.spinrec"
    f.write_bytes(MAGIC + _chunk(b"M", b'{"a": 1}') + b"\x44" * 25 + _chunk(b"D", b"x", 3_000_000_000))
    c = read_capture(f)
    assert [(ch.kind, ch.host_s) for ch in c.chunks] == [("X", 0.0), ("D", 3.0)]


def test_a_sync_right_after_the_damage_start_is_found(tmp_path):
    # the damage is one byte; the next chunk's sync starts at the byte after it
    f = tmp_path / "e.spinrec"
    a = _chunk(b"M", b'{"a": 1}')
    f.write_bytes(MAGIC + a + b"\x01" + _chunk(b"D", b"next"))
    c = read_capture(f)
    at = len(MAGIC) + len(a)
    assert c.damaged == [(at, at + 1, "no chunk sync")] and c.chunks[-1].payload == b"next"


# ----------------------------------------------------------------- spectra settings and the STFT's counters


def test_spectrum_settings_at_their_limits():
    from monitor.spectra import RollingSTFT, SpectrumConfig

    SpectrumConfig(fs_hz=100.0, window_s=0.16)  # 16 samples: the least
    SpectrumConfig(fs_hz=0.5, window_s=32.0)  # any positive rate
    SpectrumConfig(fs_hz=8000.0, overlap=0.95)
    with pytest.raises(ValueError, match=r"^window_s=0\.15 gives 15 samples at 100\.0 Hz; need 16$"):
        SpectrumConfig(fs_hz=100.0, window_s=0.15)
    with pytest.raises(ValueError, match=r"^fs_hz=0\.0 must be positive$"):
        SpectrumConfig(fs_hz=0.0)
    with pytest.raises(ValueError, match=r"^overlap=0\.96 must be between 0 and 0\.95$"):
        SpectrumConfig(fs_hz=8000.0, overlap=0.96)
    with pytest.raises(ValueError, match=r"^window='kaiser' not in \('hann', "):
        SpectrumConfig(fs_hz=8000.0, window="kaiser")
    st = RollingSTFT(SpectrumConfig(fs_hz=8000.0))
    assert st.segment == 0
    st.push(np.zeros((1000, 3)))
    st.push(np.zeros((500, 3)))
    assert st.samples == 1500
    st.reset()
    st.reset()
    assert st.segment == 2 and st.samples == 0


def test_the_speed_is_refined_on_the_strongest_weighted_order():
    # 1x at 100 Hz (10 dB) and 6x a bin off its place (602 Hz, 12 dB, weight 0.6): refined on the
    # 1x, 6000 RPM; on the 6x it would be 6020
    from monitor.rpm_estimate import RpmEstimator

    freqs = np.arange(0, 2001.0, 2.0)
    p = np.ones(freqs.size)
    p[50], p[301] = 10.0, 10 ** 1.2
    assert RpmEstimator(freqs, blades=3).estimate(p) == pytest.approx(6000.0, rel=1e-6)
