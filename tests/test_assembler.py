"""The assembler: units, time base, gaps, reboots, chunking invariance."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import firmware_protocol as fp
from monitor.assembler import Assembler, Gap, MotorUpdate, RpmTrack, Samples


def stream(blocks, info=None, motors=None):
    info = info or fp.DeviceInfo(sens_num=164, sens_den=10, pole_pairs=7, motor_count=2, gyro_rate_mhz=8_000_000)
    frames = [fp.encode_frame(info, 0)]
    for i, (seq, t_us, samples) in enumerate(blocks):
        frames.append(fp.encode_frame(fp.GyroBlock(seq, t_us, samples), i + 1))
        if motors is not None:
            frames.append(fp.encode_frame(motors(t_us), i + 1))
    return b"".join(frames)


def run(data, chunks=(None,)):
    dec = fp.StreamDecoder(merge=True)
    asm = Assembler()
    out = []
    pos = 0
    for c in [*chunks[:-1], len(data)] if chunks[0] is not None else [len(data)]:
        out += asm.feed(dec.feed(data[pos:c]), host_s=0.0)
        pos = c
    return asm, out


def blocks(n, start_seq=0, t0=0, count=16, value=164):
    return [
        (start_seq + k * count, (t0 + k * count * 125) % 2**32, np.full((count, 3), value, np.int16)) for k in range(n)
    ]


def test_counts_to_dps_and_erpm_to_rpm():
    # 16.4 counts per deg/s (a 16-bit output over +-2000 deg/s, 2^15 / 2000 rounded; common practice);
    # eRPM = RPM x pole pairs: p pole pairs make p electrical cycles per turn (electric machines
    # texts; recalled)
    def motors(t):
        return fp.MotorState(t, (fp.MotorEntry(70_000, 5000, 1), fp.MotorEntry(35_000, 2500, 0)))

    asm, out = run(stream(blocks(4), motors=motors))
    s = [o for o in out if isinstance(o, Samples)]
    assert np.allclose(np.concatenate([x.dps for x in s]), 10.0)
    m = [o for o in out if isinstance(o, MotorUpdate)][0]
    assert m.rpm[0].tolist() == [10_000.0, 5_000.0] and m.valid[0].tolist() == [True, False]
    assert m.throttle[0].tolist() == [0.5, 0.25]


def test_flu_axes_are_turned_into_frd():
    info = fp.DeviceInfo(axis_convention=2)
    asm, out = run(stream([(0, 0, np.array([[164, 164, 164]] * 16, np.int16))], info=info))
    dps = [o for o in out if isinstance(o, Samples)][0].dps
    assert dps[0].tolist() == pytest.approx([10.0, -10.0, -10.0])


def test_time_base_unwraps_the_32_bit_clock():
    t0 = 2**32 - 3 * 16 * 125  # wraps after three blocks
    asm, out = run(stream(blocks(8, t0=t0)))
    s = [o for o in out if isinstance(o, Samples)]
    assert len(s) == 1 and s[0].dps.shape[0] == 128 and asm.stats.gaps == 0


def test_a_short_hole_is_filled_in_place_and_counted():
    b = blocks(10)
    del b[3:5]  # two blocks = 32 samples (4 ms) lost: bridged, the series goes on
    asm, out = run(stream(b))
    assert not [o for o in out if isinstance(o, Gap)]
    s = [o for o in out if isinstance(o, Samples)]
    assert len({o.segment for o in s}) == 1
    fill = [o for o in s if o.valid is not None]
    assert len(fill) == 1 and fill[0].dps.shape[0] == 32 and not fill[0].valid.any()
    assert fill[0].start == 48 and np.allclose(fill[0].dps, 10.0)  # linear between equal ends
    assert asm.stats.samples_lost == 32 and asm.stats.holes_bridged == 1 and asm.stats.samples_filled == 32
    assert sum(o.dps.shape[0] for o in s) == 160  # every sample index of the segment is there


def test_a_long_hole_breaks_the_series():
    b = blocks(40)
    del b[3:30]  # 27 blocks = 432 samples = 54 ms at 8 kHz: longer than the 50 ms bridged
    asm, out = run(stream(b))
    gaps = [o for o in out if isinstance(o, Gap)]
    assert len(gaps) == 1 and gaps[0].lost_samples == 432 and gaps[0].reason == "samples lost"
    assert len({o.segment for o in out if isinstance(o, Samples)}) == 2 and asm.stats.samples_lost == 432
    assert asm.stats.holes_bridged == 0


@given(st.integers(1, 60), st.integers(1, 9), st.integers(0, 2**31))
def test_samples_lost_between_reads_are_counted_exactly(lost_blocks, at, seed):
    # the expected sequence number is carried across reads: a loss that falls exactly on a read
    # boundary counts the same as one inside a read
    b = blocks(70)
    del b[at : at + lost_blocks]
    data = stream(b)
    rng = np.random.default_rng(seed)
    cuts = sorted(set(rng.integers(1, len(data), 6).tolist()))
    asm_a, out_a = run(data)
    asm_b, out_b = run(data, chunks=[*cuts, None])
    for asm in (asm_a, asm_b):
        assert asm.stats.samples_lost == 16 * lost_blocks
    assert asm_a.stats == asm_b.stats


def test_a_loss_right_at_a_read_boundary_is_counted():
    b = blocks(10)
    frames = [fp.encode_frame(fp.DeviceInfo(motor_count=2), 0)]
    frames += [fp.encode_frame(fp.GyroBlock(seq, t, x), i + 1) for i, (seq, t, x) in enumerate(b)]
    first = b"".join(frames[:4])  # info and blocks 0..2
    second = b"".join(frames[6:])  # blocks 5.. (3 and 4 lost between the reads)
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    asm.feed(dec.feed(first), host_s=0.0)
    asm.feed(dec.feed(second), host_s=0.1)
    assert asm.stats.samples_lost == 32


def test_reboot_by_boot_id_and_by_counter_going_back():
    a = stream(blocks(5, start_seq=1000))
    b = stream(blocks(5, start_seq=0), info=fp.DeviceInfo(boot_id=99, motor_count=2))
    asm, out = run(a + b)
    assert asm.stats.reboots == 1
    assert [g.reason for g in out if isinstance(g, Gap)] == ["device reboot"]
    t = [o.t0_s for o in out if isinstance(o, Samples)]
    assert t == sorted(t)  # session time keeps going forward over the reboot
    # no DEVICE_INFO after the reboot: the backwards counter is enough
    data = stream(blocks(5, start_seq=5000)) + b"".join(
        fp.encode_frame(fp.GyroBlock(k * 16, k * 2000, np.ones((16, 3), np.int16)), 50 + k) for k in range(3))
    asm, out = run(data)
    assert asm.stats.reboots == 1 and any(isinstance(o, Gap) and o.reason == "device reboot" for o in out)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.integers(0, 20_000), max_size=10))
def test_any_chunking_gives_the_same_samples_and_motor_readings(cuts):
    def motors(t):
        return fp.MotorState(t, (fp.MotorEntry(t % 9000, 0, 1), fp.MotorEntry(1, 1, 1)))

    data = stream(blocks(60), motors=motors)
    cuts = sorted(c % len(data) for c in cuts)

    def collect(out):
        s = np.concatenate([o.dps for o in out if isinstance(o, Samples)])
        m = np.concatenate([o.rpm for o in out if isinstance(o, MotorUpdate)])
        t = np.concatenate([o.t_s for o in out if isinstance(o, MotorUpdate)])
        return s, m, t

    a = collect(run(data)[1])
    b = collect(run(data, chunks=(*cuts, None))[1])
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)


def test_rpm_track_window_means():
    tr = RpmTrack(2, capacity=100)
    t = np.arange(50) / 100.0
    rpm = np.stack([np.arange(50) * 10.0, np.full(50, 7.0)], axis=1)
    tr.add(MotorUpdate(t, rpm, np.zeros((50, 2)), np.ones((50, 2), bool)))
    mean, latest, _, ok = tr.window(np.array([0.1]), np.array([0.19]))
    # [0.10, 0.19): readings 10..18, the one at 0.19 itself is left out
    assert mean[0].tolist() == pytest.approx([140.0, 7.0]) and latest[0].tolist() == [180.0, 7.0] and ok.all()
    mean, _, _, ok = tr.window(np.array([5.0]), np.array([6.0]))
    assert np.isnan(mean).all() and not ok.any()


def test_rpm_track_window_equals_the_definition_across_store_compaction():
    # many small updates push the store past its capacity; every window must still equal the
    # plain mean over the readings with t0 <= t < t1 (held ones: the last keep_s / capacity)
    rng = np.random.default_rng(3)
    tr = RpmTrack(3, capacity=300, keep_s=0.5)
    t_all, r_all, v_all = [], [], []
    t = 0.0
    for _ in range(200):
        k = int(rng.integers(1, 12))
        ts = t + np.arange(1, k + 1) / 500.0
        t = float(ts[-1])
        rpm = rng.uniform(1000, 9000, size=(k, 3))
        valid = rng.random((k, 3)) > 0.05
        tr.add(MotorUpdate(ts, rpm, rng.random((k, 3)), valid))
        t_all.append(ts), r_all.append(rpm), v_all.append(valid)
        ts_cat, r_cat, v_cat = np.concatenate(t_all), np.concatenate(r_all), np.concatenate(v_all)
        t0 = np.array([t - 0.2, t - 0.05])
        t1 = np.array([t - 0.1, t + 0.001])
        mean, latest, _, ok = tr.window(t0, t1)
        for i in range(2):
            sel = (ts_cat >= t0[i]) & (ts_cat < t1[i])
            if not sel.any():
                assert np.isnan(mean[i]).all() and not ok[i].any()
                continue
            np.testing.assert_allclose(mean[i], r_cat[sel].mean(axis=0), rtol=1e-12)
            assert latest[i].tolist() == r_cat[sel][-1].tolist()
            assert ok[i].tolist() == v_cat[sel].all(axis=0).tolist()


def test_the_same_description_twice_is_one_device_change():
    # a device answers REQUEST_INFO and also describes itself at boot: the host hears it twice
    info = fp.DeviceInfo(boot_id=5)
    asm = Assembler()
    out = asm.feed([fp.Received(0, info), fp.Received(1, info)])
    assert [type(o).__name__ for o in out].count("DeviceChange") == 1
    out = asm.feed([fp.Received(2, fp.DeviceInfo(boot_id=5, motor_count=6))])  # a real change
    assert [type(o).__name__ for o in out].count("DeviceChange") == 1


@pytest.mark.parametrize("merge", [True, False])
@pytest.mark.parametrize("pole_pairs", [1, 2, 12])
@pytest.mark.parametrize("motor_count", [1, 3])
def test_rpm_is_erpm_over_the_pole_pairs_for_any_motor_count(merge, pole_pairs, motor_count):
    # eRPM = RPM x pole pairs (electric machines texts; recalled); one pole pair means eRPM is RPM,
    # and a single-motor device is still a device with motors
    info = fp.DeviceInfo(sens_num=164, sens_den=10, pole_pairs=pole_pairs, motor_count=motor_count,
                         gyro_rate_mhz=8_000_000)
    erpm = [12_000 * (k + 1) for k in range(motor_count)]

    def motors(t):
        return fp.MotorState(t, tuple(fp.MotorEntry(e, 3000, 1) for e in erpm))

    dec, asm = fp.StreamDecoder(merge=merge), Assembler()
    out = asm.feed(dec.feed(stream(blocks(3), info=info, motors=motors)), host_s=0.0)
    ups = [o for o in out if isinstance(o, MotorUpdate)]
    rpm = np.concatenate([u.rpm for u in ups])
    assert rpm.shape == (3, motor_count)
    assert (rpm == np.array(erpm, float) / pole_pairs).all()
    assert np.concatenate([u.throttle for u in ups]).tolist() == [[0.3] * motor_count] * 3
