"""The assembler's rules at their edges: the bridged hole's limit, session times across gaps and
reboots, orphans, reconnects, the clock-drift estimate and the estimate trend.

References: the speed trend's slope and its standard error are ordinary least squares, checked
against ``scipy.stats.linregress``; the clock drift follows Moon, Skelly and Towsley (IEEE INFOCOM
1999): the slope of the upper envelope of (host time, device - host) offsets.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

import firmware_protocol as fp
from monitor.assembler import Assembler, DeviceChange, EstimateTrend, Gap, MotorUpdate, Samples, _DriftFit

from .conftest import examples

FS = 8000.0
INFO = fp.DeviceInfo(sens_num=164, sens_den=10, pole_pairs=7, motor_count=2, gyro_rate_mhz=8_000_000)


def _frames(blocks, seq0=1):
    """GYRO_BLOCK frames of (sample_seq, t_us, samples)."""
    return [fp.encode_frame(fp.GyroBlock(s, t % 2**32, x), (seq0 + i) & 0xFF) for i, (s, t, x) in enumerate(blocks)]


def _blocks(n, seq0=0, count=16, value=164, t_us0=0):
    us = 1e6 / FS
    return [(seq0 + k * count, int(t_us0 + k * count * us), np.full((count, 3), value, np.int16)) for k in range(n)]


def _run(*reads, info=INFO):
    """Feed reads (bytes, host time s) through a merged decoder and an assembler."""
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    out = []
    for i, (data, host) in enumerate(reads):
        if i == 0 and info is not None:
            data = fp.encode_frame(info, 0) + data
        out += asm.feed(dec.feed(data), host_s=host)
    return asm, out


def _samples(out):
    return [o for o in out if isinstance(o, Samples)]


# ----------------------------------------------------------------- the bridged hole


@pytest.mark.parametrize("lost,bridged", [(400, True), (401, False)])
def test_a_hole_of_up_to_50_ms_is_bridged_and_longer_breaks(lost, bridged):
    # one-sample blocks: 400 samples are 50 ms at 8 kHz
    b = _blocks(10, count=1) + [(10 + lost, int((10 + lost) * 125), np.full((1, 3), 164, np.int16))]
    asm, out = _run((b"".join(_frames(b)), 0.0))
    gaps = [o for o in out if isinstance(o, Gap)]
    assert asm.stats.samples_lost == lost
    assert (asm.stats.holes_bridged, len(gaps)) == ((1, 0) if bridged else (0, 1))
    if not bridged:
        assert (gaps[0].reason, gaps[0].lost_samples) == ("samples lost", lost)


def test_a_bridged_hole_is_a_straight_line_between_its_ends():
    b = _blocks(3, value=164) + [(16 * 3 + 7, 0, np.full((16, 3), 328, np.int16))]  # 7 lost, then 20 deg/s
    asm, out = _run((b"".join(_frames(b)), 0.0))
    fill = [s for s in _samples(out) if s.valid is not None]
    assert len(fill) == 1 and fill[0].start == 48 and fill[0].valid.tolist() == [False] * 7
    expected = 10.0 + 10.0 * np.arange(1, 8) / 8.0
    assert fill[0].dps[:, 0] == pytest.approx(expected, rel=1e-6)
    after = _samples(out)[-1]
    assert after.start == 48 + 7 and after.t0_s == pytest.approx((48 + 7) / FS)


# ----------------------------------------------------------------- session time


def test_after_a_long_hole_the_new_segment_starts_at_its_device_time():
    b = _blocks(40)
    del b[3:30]  # blocks 3..29 lost: 432 samples
    asm, out = _run((b"".join(_frames(b)), 0.0))
    (gap,) = [o for o in out if isinstance(o, Gap)]
    assert gap.t_s == pytest.approx(48 / FS)  # the end of the last sample before it
    s = _samples(out)
    assert [(x.segment, x.start) for x in s] == [(0, 0), (1, 0)]
    assert s[1].t0_s == pytest.approx(30 * 16 / FS)  # device time of block 30
    assert asm.stats.segments == 2 and asm.stats.gaps == 1


def test_session_time_is_carried_over_a_reboot_with_the_host_clock():
    before = b"".join(_frames(_blocks(5, seq0=1000)))
    after = fp.encode_frame(fp.DeviceInfo(boot_id=7, gyro_rate_mhz=8_000_000), 9) + b"".join(
        _frames(_blocks(3, seq0=0, t_us0=123_456_789), seq0=10))
    asm, out = _run((before, 10.0), (after, 12.5))
    assert asm.stats.reboots == 1
    gap = [o for o in out if isinstance(o, Gap)]
    assert [g.reason for g in gap] == ["device reboot"] and gap[0].t_s == pytest.approx(80 / FS)
    (change,) = [o for o in out if isinstance(o, DeviceChange) and o.reboot]
    assert change.info.boot_id == 7
    s = _samples(out)
    assert s[-1].segment == 1 and s[-1].t0_s == pytest.approx(80 / FS + 2.5)  # 2.5 s of host time passed


def test_a_new_boot_in_a_status_is_a_reboot_once():
    status = fp.encode_frame(fp.DeviceStatus(0, 5, 0, 0, 0, 0, 0, 0, 1), 30)
    data = b"".join(_frames(_blocks(5, seq0=1000))) + status + b"".join(_frames(_blocks(3), seq0=31))
    asm, out = _run((data, 0.0))
    assert asm.stats.reboots == 1 and [g.reason for g in out if isinstance(g, Gap)] == ["device reboot"]
    assert asm.stats.samples_lost == 0


def test_a_counter_going_back_without_a_new_boot_id_is_a_reboot():
    data = b"".join(_frames(_blocks(5, seq0=5000))) + b"".join(_frames(_blocks(3, seq0=0), seq0=40))
    asm, out = _run((data, 0.0))
    assert asm.stats.reboots == 1 and asm.stats.samples_lost == 0
    s = _samples(out)
    assert s[-1].segment == 1 and s[-1].t0_s >= s[0].t0_s + 80 / FS - 1e-12


def test_blocks_and_motor_states_before_any_device_info_are_dropped_and_counted():
    ms = fp.encode_frame(fp.MotorState(0, (fp.MotorEntry(7000, 0, 1),)), 20)
    asm, out = _run((b"".join(_frames(_blocks(3))) + ms, 0.0), info=None)
    assert asm.stats.orphan_blocks == 3 and asm.stats.samples == 0
    assert not [o for o in out if isinstance(o, Samples | MotorUpdate)]


def test_a_reconnect_opens_a_segment_and_counts_no_loss_across_it():
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    asm.feed(dec.feed(fp.encode_frame(INFO, 0) + b"".join(_frames(_blocks(4)))), host_s=0.0)
    (gap,) = asm.mark_reconnect()
    assert (gap.reason, gap.t_s) == ("reconnect", pytest.approx(64 / FS))
    dec.reset()
    out = asm.feed(dec.feed(b"".join(_frames(_blocks(2, seq0=640, t_us0=80_000)))), host_s=1.0)
    s = _samples(out)
    assert asm.stats.samples_lost == 0 and [x.segment for x in s] == [1]
    assert s[0].t0_s == pytest.approx(0.08)


def test_motor_updates_share_the_sample_time_base():
    data = b"".join(_frames(_blocks(3))) + fp.encode_frame(
        fp.MotorState(2000, (fp.MotorEntry(70_000, 5000, 1), fp.MotorEntry(7, 0, 0))), 50)
    asm, out = _run((data, 0.0))
    (mu,) = [o for o in out if isinstance(o, MotorUpdate)]
    # the live path hands a read's motor states over before its samples; both are on one clock
    assert mu.t_s[0] - _samples(out)[0].t0_s == pytest.approx(0.002, abs=1e-12)
    assert mu.rpm.tolist() == [[10_000.0, 1.0]] and mu.valid.tolist() == [[True, False]]


# ----------------------------------------------------------------- the clock drift


def _realtime_reads(ppm, seconds, seed, rate_mhz=1_000_000, count=40):
    """Reads of ``count``-sample blocks as a device whose clock runs ``ppm`` fast would deliver them,
    each read at host time = device time / (1 + ppm 1e-6) plus a latency of at least 2 ms."""
    rng = np.random.default_rng(seed)
    fs = rate_mhz / 1000.0
    n = int(seconds * fs / count)
    info = fp.DeviceInfo(gyro_rate_mhz=rate_mhz)
    reads = []
    for k in range(n):
        t_us = int(k * count / fs * 1e6)
        frame = fp.encode_frame(fp.GyroBlock(k * count, t_us, np.zeros((count, 3), np.int16)), (k + 1) & 0xFF)
        host = 100.0 + t_us * 1e-6 / (1 + ppm * 1e-6) + 0.002 + rng.exponential(0.001)
        reads.append((frame, host))
    return info, reads


@pytest.mark.parametrize("ppm", [-150.0, 0.0, 80.0])
def test_the_device_clock_drift_is_measured_after_ten_seconds(ppm):
    info, reads = _realtime_reads(ppm, 14.0, seed=int(ppm) + 1000)
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    asm.feed(dec.feed(fp.encode_frame(info, 0)), host_s=reads[0][1])
    seen_note = False
    for data, host in reads:
        asm.feed(dec.feed(data), host_s=host)
        if asm.stats.drift_ppm is None:
            seen_note |= asm.stats.drift_note.startswith("measuring:")
    assert seen_note
    # the latency comes within 0.1 ms of its least value (2 ms) a few times a second: the
    # envelope's slope over 10 s and more is the drift to about 10 us / 10 s, 1 ppm
    assert asm.stats.drift_ppm == pytest.approx(ppm, abs=2.0) and asm.stats.drift_note == ""


def test_a_stream_faster_than_real_time_has_no_drift_figure():
    info, reads = _realtime_reads(0.0, 14.0, seed=1)
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    asm.feed(dec.feed(fp.encode_frame(info, 0)), host_s=0.0)
    for i, (data, _) in enumerate(reads):
        asm.feed(dec.feed(data), host_s=i * 0.001)  # 14 s of device time in 0.35 s of host time
    assert asm.stats.drift_ppm is None
    # too little host time has passed for a figure at all
    assert asm.stats.drift_note.startswith("measuring:")
    for i in range(12):
        asm.feed([], host_s=1.0 + i)  # host time goes on, the device does not: not real time
    assert asm.stats.drift_ppm is None
    assert asm.stats.drift_note == "the stream is not in real time (a replay or a fast simulation)"


@settings(max_examples=examples(100), deadline=None)
@given(st.floats(-500.0, 500.0), st.floats(-5.0, 5.0), st.integers(0, 2**31),
       st.sampled_from([1000.0, 86_400.0, 1_000_000.0]))
def test_the_drift_is_the_slope_of_the_upper_envelope(ppm, offset, seed, host0):
    # offsets on a line minus any non-negative latency, the least latency (0) reached at least
    # once in every second: the estimate is the line's slope, whatever the latencies above it;
    # host clocks read up to 1e6 s (days of uptime), whose rounding must not keep false corners
    rng = np.random.default_rng(seed)
    fit = _DriftFit()
    for sec in range(30):
        xs = sec + np.sort(rng.uniform(0.0, 1.0, 5))
        lat = rng.exponential(0.01, 5)
        lat[rng.integers(5)] = 0.0
        for x, d in zip(xs, lat, strict=True):
            fit.add(host0 + x, host0 + offset + x * (1 + ppm * 1e-6) - d)
    fit.add(host0 + 31.0, host0 + offset + 31.0 * (1 + ppm * 1e-6))  # closes the last second
    assert fit.ppm() == pytest.approx(ppm, abs=1e-4)  # rounding leaves about 3e-6 ppm at 1e6 s
    assert len(fit.hull) < 10  # a straight envelope keeps a handful of corners


# ----------------------------------------------------------------- the estimate trend


@settings(max_examples=examples(100), deadline=None)
@given(st.lists(st.floats(-0.2, 0.2), min_size=3, max_size=12, unique=True), st.floats(1000.0, 30000.0),
       st.floats(-3000.0, 3000.0), st.integers(0, 2**31))
def test_estimate_trend_is_ordinary_least_squares(offsets, rpm0, slope, seed):
    rng = np.random.default_rng(seed)
    t = np.sort(10.0 + np.array(offsets)) + np.arange(len(offsets)) * 0.03  # within 0.5 s of the last
    t = t[t >= t[-1] - 0.5]
    r = rpm0 + slope * (t - t[0]) + rng.normal(0, 20.0, t.size)
    tr = EstimateTrend()
    for ti, ri in zip(t, r, strict=True):
        got = tr.add(float(ti), float(ri))
    if t.size < 3:
        assert got[0] == r[-1] and np.isnan(got[1])
        return
    ref = scipy.stats.linregress(t, r)
    assert got[1] == pytest.approx(ref.slope, rel=1e-6, abs=1e-6)
    assert got[0] == pytest.approx(max(ref.intercept + ref.slope * t[-1], 0.0), rel=1e-9, abs=1e-6)
    se_exact, rms_exact = _exact_ols_errors(t, r)  # scipy's standard error loses digits near r = 1
    assert got[2] == pytest.approx(se_exact, rel=1e-9, abs=1e-12)
    assert got[3] == pytest.approx(rms_exact, rel=1e-9, abs=1e-12)


def test_estimate_trend_keeps_estimates_up_to_its_span_and_skips_missing_ones():
    tr = EstimateTrend(span_s=0.5)
    tr.add(0.0, 1000.0)
    tr.add(0.25, 1100.0)
    assert np.isnan(tr.add(0.3, np.nan)[0])  # no estimate now: nothing to say
    fit, sl, _, _ = tr.add(0.5, 1200.0)  # the one at 0.0 is exactly 0.5 s old: kept
    assert sl == pytest.approx(400.0) and fit == pytest.approx(1200.0)
    fit, sl, _, _ = tr.add(0.6, 1240.0)  # now it is dropped: three left (0.25, 0.5, 0.6)
    ref = scipy.stats.linregress([0.25, 0.5, 0.6], [1100.0, 1200.0, 1240.0])
    assert sl == pytest.approx(ref.slope)
    tr.clear()
    assert tr.add(1.0, 900.0)[0] == 900.0 and np.isnan(tr.add(1.1, 950.0)[1])


def test_session_time_over_a_reboot_uses_the_host_time_that_passed_or_none():
    before = b"".join(_frames(_blocks(5, seq0=1000)))
    after = fp.encode_frame(fp.DeviceInfo(boot_id=7, gyro_rate_mhz=8_000_000), 9) + b"".join(
        _frames(_blocks(3, seq0=0, t_us0=5_000_000), seq0=10))
    for hosts, gap_s in (((10.0, 10.5), 0.5), ((None, None), 0.0)):
        asm, out = _run((before, hosts[0]), (after, hosts[1]))
        s = _samples(out)
        assert asm.stats.reboots == 1 and s[-1].t0_s == pytest.approx(80 / FS + gap_s)


def test_a_motor_window_with_no_readings_is_unknown_in_every_field():
    from monitor.assembler import RpmTrack

    tr = RpmTrack(2, capacity=100)
    tr.add(MotorUpdate(np.array([1.0, 1.1]), np.array([[100.0, 200.0], [110.0, 210.0]]),
                       np.array([[0.1, 0.2], [0.1, 0.2]]), np.ones((2, 2), bool)))
    mean, latest, thr, ok = tr.window(np.array([0.0, 1.0, 1.0]), np.array([0.5, 1.2, 1.1]))
    assert np.isnan(mean[0]).all() and np.isnan(latest[0]).all() and np.isnan(thr[0]).all() and not ok[0].any()
    assert mean.dtype == latest.dtype == thr.dtype == np.float64 and ok.dtype == bool
    assert mean[1].tolist() == [105.0, 205.0] and latest[1].tolist() == [110.0, 210.0]
    assert thr[1].tolist() == pytest.approx([0.1, 0.2]) and ok[1].all()
    assert latest[2].tolist() == [100.0, 200.0]  # the reading at 1.1 s itself is left out
    empty = RpmTrack(1)
    m, la, th, k = empty.window(np.array([0.0]), np.array([1.0]))
    assert np.isnan(m).all() and np.isnan(la).all() and np.isnan(th).all() and not k.any()


# ----------------------------------------------------------------- the telemetry trend

@settings(max_examples=examples(150), deadline=None)
@given(st.lists(st.integers(0, 60), min_size=0, max_size=25, unique=True),
       st.lists(st.integers(0, 70), min_size=1, max_size=8), st.integers(2, 8),
       st.floats(-40.0, 40.0), st.integers(0, 2**31))
def test_the_telemetry_trend_is_ordinary_least_squares_over_each_window(ticks, ends, span_ticks, slope, seed):
    """Each motor's line over the readings in [t1 - span, t1) is scipy.stats.linregress of those
    readings: the speed the line gives at t1 (never under 0), its slope, the slope's standard
    error and the residual RMS; with one or two readings the newest one and no slope; with none,
    nothing. Times on a 10 ms grid, so that a reading falls exactly on a window's start (kept)
    or its end (left out); speeds near zero, so that the floor at 0 matters."""
    from monitor.assembler import RpmTrack

    dt = 0.01
    t = np.sort(np.array(ticks, dtype=float)) * dt
    rng = np.random.default_rng(seed)
    rpm = np.stack([50.0 + slope * t + rng.normal(0, 5.0, t.size), 3000.0 - 100 * t + rng.normal(0, 1, t.size)],
                   axis=1)
    tr = RpmTrack(2, capacity=100)
    if t.size:
        tr.add(MotorUpdate(t, rpm, np.zeros_like(rpm), np.ones(rpm.shape, bool)))
    t1 = np.array(ends) * dt
    span = span_ticks * dt
    fit, sl, se, rms = tr.trend(list(t1), span_s=span)  # a list, as any sequence of times may be
    for out in (fit, sl, se, rms):
        assert out.shape == (t1.size, 2) and out.dtype == np.float64
    for i in range(len(ends)):
        sel = np.flatnonzero((t >= t1[i] - span) & (t < t1[i]))  # as the times compare in floats
        if sel.size == 0:
            assert np.isnan(fit[i]).all() and np.isnan(sl[i]).all()
            continue
        if sel.size < 3:
            np.testing.assert_array_equal(fit[i], rpm[sel[-1]])
            assert np.isnan(sl[i]).all() and np.isnan(se[i]).all() and np.isnan(rms[i]).all()
            continue
        for mo in range(2):
            ref = scipy.stats.linregress(t[sel], rpm[sel, mo])
            assert sl[i, mo] == pytest.approx(ref.slope, rel=1e-7, abs=1e-7)
            assert fit[i, mo] == pytest.approx(max(ref.intercept + ref.slope * t1[i], 0.0), rel=1e-9, abs=1e-7)
            # scipy's standard error, sqrt((1 - r^2) s_yy / s_xx / (n - 2)), loses digits when r is
            # near 1 (1.5e-6 relative on three readings of a steady line, found by hypothesis), so
            # the standard error and the residual RMS are checked against the textbook formulas in
            # exact rational arithmetic
            se_exact, rms_exact = _exact_ols_errors(t[sel], rpm[sel, mo])
            assert se[i, mo] == pytest.approx(se_exact, rel=1e-9, abs=1e-12)
            assert rms[i, mo] == pytest.approx(rms_exact, rel=1e-9, abs=1e-12)


def _exact_ols_errors(x, y):
    """(standard error of the slope, residual RMS) of ordinary least squares, in exact rational
    arithmetic: s^2 = sum r^2 / (n - 2), se = sqrt(s^2 / sum (x - mean x)^2)."""
    from fractions import Fraction

    xs, ys = [Fraction(float(v)) for v in x], [Fraction(float(v)) for v in y]
    n = len(xs)
    xm, ym = sum(xs) / n, sum(ys) / n
    sxx = sum((a - xm) ** 2 for a in xs)
    b = sum((a - xm) * (c - ym) for a, c in zip(xs, ys, strict=True)) / sxx
    s2 = sum(((c - ym) - b * (a - xm)) ** 2 for a, c in zip(xs, ys, strict=True)) / (n - 2)
    return float(s2 / sxx) ** 0.5, float(s2) ** 0.5


def test_a_trend_over_readings_at_one_instant_is_the_newest_reading_and_warns_nothing():
    import warnings

    from monitor.assembler import RpmTrack

    tr = RpmTrack(1, capacity=10)
    tr.add(MotorUpdate(np.array([1.0, 1.0, 1.0]), np.array([[100.0], [120.0], [90.0]]), np.zeros((3, 1)),
                       np.ones((3, 1), bool)))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit, sl, se, rms = tr.trend(np.array([1.5, 2.0]), span_s=1.0)
    assert fit[:, 0].tolist() == [90.0, 90.0] and np.isnan(sl).all() and np.isnan(se).all() and np.isnan(rms).all()
    assert [a.shape for a in RpmTrack(1).trend(np.array([1.0]))] == [(1, 1)] * 4
    assert [a.shape for a in tr.trend(np.zeros(0))] == [(0, 1)] * 4


@settings(max_examples=examples(100), deadline=None)
@given(st.lists(st.tuples(st.integers(1, 60), st.floats(0.001, 0.05)), min_size=10, max_size=40),
       st.integers(4, 40), st.floats(0.02, 1.0))
def test_the_telemetry_store_holds_the_newest_readings_within_its_limits(blocks, capacity, keep_s):
    """Readings are held as a suffix of everything fed: an update larger than the capacity keeps
    its newest ``capacity`` rows; when the store (capacity + 256 rows) would overflow, the rows
    older than keep_s before the update's newest reading are dropped, and more if needed to stay
    within the capacity. Throttle and validity are kept with each reading."""
    from monitor.assembler import RpmTrack

    tr = RpmTrack(2, capacity=capacity, keep_s=keep_s)
    held: list[tuple] = []
    t = 0.0
    serial = 0
    for k, step in blocks:
        ts = t + step * np.arange(1, k + 1)
        t = float(ts[-1])
        ids = serial + np.arange(k)
        serial += k
        rows = [(float(ts[i]), float(ids[i]), float(ids[i]) * 0.5, bool(ids[i] % 3)) for i in range(k)]
        tr.add(MotorUpdate(ts, np.stack([ids, -ids], axis=1).astype(float),
                           np.stack([ids * 0.5, ids * 0.5], axis=1), np.stack([ids % 3 > 0] * 2, axis=1)))
        rows = rows[-capacity:]
        if len(held) + len(rows) > capacity + 256:
            old = sum(1 for r in held if r[0] < t - keep_s)
            held = held[max(old, len(held) + len(rows) - capacity):]
        held = held + rows
        got = tr._store[: tr._n]
        assert got.shape[0] == len(held)
        np.testing.assert_array_equal(got[:, 0], [r[0] for r in held])
        np.testing.assert_array_equal(got[:, 1], [r[1] for r in held])
        np.testing.assert_array_equal(got[:, 2], [-r[1] for r in held])
        np.testing.assert_array_equal(got[:, 3], [r[2] for r in held])
        np.testing.assert_array_equal(got[:, 5], [0.0 if r[3] else 1.0 for r in held])  # stored as "not valid"


def test_estimate_trend_never_reads_under_zero_and_a_missing_estimate_is_not_kept():
    tr = EstimateTrend(span_s=1.0)
    for ti, r in ((0.0, 3.0), (0.1, 2.0), (0.2, 1.1), (0.3, 0.5)):
        fit, sl, _, _ = tr.add(ti, r)
    ref = scipy.stats.linregress([0.0, 0.1, 0.2, 0.3], [3.0, 2.0, 1.1, 0.5])
    assert fit == pytest.approx(ref.intercept + ref.slope * 0.3) and 0.0 < fit < 1.0  # under 1 RPM, not floored
    fit, _, _, _ = tr.add(0.4, 0.0)
    assert fit == 0.0  # the line runs under zero there
    assert np.isnan(tr.add(0.5, np.nan)[0])
    assert tr.add(0.6, 0.0)[1] == pytest.approx(scipy.stats.linregress([0.0, 0.1, 0.2, 0.3, 0.4, 0.6],
                                                                        [3.0, 2.0, 1.1, 0.5, 0.0, 0.0]).slope)


def test_every_reboot_and_every_break_is_counted_where_it_happened():
    # two announced reboots (new boot ids in a status), then a counter going back unannounced:
    # three reboots, three breaks, each at the time of the last sample before it
    def status(boot, seq):
        return fp.encode_frame(fp.DeviceStatus(0, boot, 0, 0, 0, 0, 0, 0, 1), seq)

    data = (b"".join(_frames(_blocks(5, seq0=1000))) + status(5, 30) + b"".join(_frames(_blocks(3), seq0=31))
            + status(6, 40) + b"".join(_frames(_blocks(4), seq0=41)) + b"".join(_frames(_blocks(2), seq0=50)))
    asm, out = _run((data, 0.0))
    gaps = [g for g in out if isinstance(g, Gap)]
    assert asm.stats.reboots == 3 and [g.reason for g in gaps] == ["device reboot"] * 3
    assert asm.stats.gaps >= 3 and asm.stats.samples_lost == 0
    samples = _samples(out)
    ends = [s.t0_s + (s.dps.shape[0] - 1) / FS for s in samples]
    for g in gaps:  # each break sits at the end of a sample block seen before it
        assert any(abs(g.t_s - e) < 1e-9 or abs(g.t_s - (e + 1 / FS)) < 1e-9 for e in ends), g


# ----------------------------------------------------------------- status, pass-through, edges


def _status(boot, seq):
    return fp.encode_frame(fp.DeviceStatus(0, boot, 0, 0, 0, 0, 0, 0, 1), seq)


def test_a_status_with_a_new_boot_is_a_reboot_even_when_the_counter_runs_on():
    # the counter does not go back, so only the status can tell: a new boot id is a reboot (once),
    # the same boot id again is not, and a third boot id is the next reboot; the session time is
    # carried over with the host time the status was read at
    info = fp.DeviceInfo(boot_id=1, gyro_rate_mhz=8_000_000)
    reads = [(b"".join(_frames(_blocks(5, seq0=0))), 10.0),
             (_status(1, 20), 10.5),                        # the same boot: nothing
             (_status(2, 21), 12.5),                        # a new boot, read alone (no samples yet)
             (b"".join(_frames(_blocks(2, seq0=80), seq0=22)), 12.6),
             (_status(2, 30), 12.7),                        # the same new boot again: nothing
             (_status(3, 31) + b"".join(_frames(_blocks(2, seq0=112), seq0=32)), 13.0)]
    asm, out = _run(*reads, info=info)
    assert asm.stats.reboots == 2 and asm.stats.samples_lost == 0
    assert [(g.reason, g.t_s) for g in out if isinstance(g, Gap)] == [("device reboot", 80 / FS),
                                                                      ("device reboot", pytest.approx(2.0 + 112 / FS))]
    s = _samples(out)
    assert sorted({x.segment for x in s}) == [0, 1, 2] and sum(x.dps.shape[0] for x in s) == 16 * 9
    first = {x.segment: x for x in reversed(s)}  # each segment's first samples
    assert first[1].t0_s == pytest.approx(80 / FS + 2.0)  # the status came 2.0 s of host time after the last read
    # every item the assembler does not consume is passed on, in order
    statuses = [o.message.boot_id for o in out if isinstance(o, fp.Received) and isinstance(o.message, fp.DeviceStatus)]
    assert statuses == [1, 2, 2, 3]


def test_a_status_before_any_device_info_is_no_reboot():
    asm = Assembler()
    out = asm.feed([fp.Received(0, fp.DeviceStatus(0, 9, 0, 0, 0, 0, 0, 0, 1))], host_s=1.0)
    assert asm.stats.reboots == 0 and not any(isinstance(o, Gap) for o in out)
    asm.feed([fp.Received(1, fp.DeviceInfo(boot_id=4))], host_s=1.1)
    out = asm.feed([fp.Received(2, fp.DeviceStatus(0, 4, 0, 0, 0, 0, 0, 0, 1))], host_s=1.2)
    assert asm.stats.reboots == 0 and not any(isinstance(o, Gap) for o in out)


def test_a_break_before_any_sample_is_placed_at_session_time_zero():
    asm = Assembler()
    assert asm.mark_reconnect() == [Gap(0.0, "reconnect")]
    asm.feed([fp.Received(0, fp.DeviceInfo(boot_id=1))], host_s=5.0)
    out = asm.feed([fp.Received(1, fp.DeviceInfo(boot_id=2))], host_s=7.0)
    assert [o for o in out if isinstance(o, Gap)] == [Gap(0.0, "device reboot")]


@pytest.mark.parametrize("merge", [True, False])
def test_motor_readings_before_a_device_info_or_with_no_motors_are_dropped(merge):
    dec, asm = fp.StreamDecoder(merge=merge), Assembler()
    ms = fp.encode_frame(fp.MotorState(0, (fp.MotorEntry(7000, 0, 1),)), 1)
    assert not any(isinstance(o, MotorUpdate) for o in asm.feed(dec.feed(ms)))
    asm.feed(dec.feed(fp.encode_frame(fp.DeviceInfo(motor_count=0), 2)))
    none = fp.encode_frame(fp.MotorState(0, ()), 3)
    assert not any(isinstance(o, MotorUpdate) for o in asm.feed(dec.feed(none)))


@pytest.mark.parametrize("step,reads_as", [(2**31 - 1, "forward"), (2**31, "back")])
def test_a_counter_step_of_exactly_half_the_range_is_backwards(step, reads_as):
    # SPEC 4.3: (new - old) mod 2^32 below 2^31 is forward; 2^31 or more is backwards
    from monitor.assembler import _TimeBase

    tb = _TimeBase()
    t = tb.to_session(np.array([1000, (1000 + step) % 2**32]))
    assert (t[1] - t[0]) == pytest.approx((step if reads_as == "forward" else step - 2**32) * 1e-6)
    assert _TimeBase().to_session(np.zeros(0, np.uint32)).shape == (0,)
    # the same rule for the sample counter: 2^31 ahead is a counter gone back, a reboot
    jump = [((32 + step) % 2**32, 4000, np.ones((16, 3), np.int16))]
    data = b"".join(_frames(_blocks(2, seq0=0))) + b"".join(_frames(jump, seq0=9))
    asm, _ = _run((data, 0.0))
    assert (asm.stats.reboots, asm.stats.samples_lost) == ((0, step) if reads_as == "forward" else (1, 0))



@pytest.mark.parametrize("lost,bridged", [(1, True), (2, False)])
def test_at_a_slow_rate_a_single_lost_sample_is_still_bridged(lost, bridged):
    # at 10 Hz one sample is 100 ms, longer than the 50 ms bridge: a lone lost sample is still
    # filled (the floor of one), two break the series
    info = fp.DeviceInfo(gyro_rate_mhz=10_000)
    b = [(k, k * 100_000, np.full((1, 3), 164, np.int16)) for k in range(5)] + \
        [(5 + lost, (5 + lost) * 100_000, np.full((1, 3), 164, np.int16))]
    asm, out = _run((b"".join(_frames(b)), 0.0), info=info)
    assert (asm.stats.holes_bridged, asm.stats.gaps) == ((1, 0) if bridged else (0, 1))
    assert all(s.dps.dtype == np.float32 for s in _samples(out))  # deg/s as float32, fills included


def _drift_fit(points):
    """A _DriftFit fed one (x, offset) point per second of host time (x in [k, k + 1)), closed."""
    fit = _DriftFit()
    for x, off in points:
        fit.add(1000.0 + x, 1000.0 + x + off)
    fit.add(1000.0 + np.floor(points[-1][0]) + 1.0, -1e9)  # opens the next bin: the last is taken
    return fit


@pytest.mark.parametrize("corner_x,slope", [(4.3, -200.0), (4.6, 100.0)])
def test_the_drift_is_the_envelope_edge_spanning_the_mean_host_time(corner_x, slope):
    # an envelope bent at one corner: 100 ppm up to it, -200 ppm after; the mean host time of the
    # ten bins' maxima picks the edge (Moon, Skelly and Towsley 1999): with a corner at 4.3 the
    # mean (4.53) lies after it, with one at 4.6 (mean 4.56) before it
    xs = [0.0, 1.0, 2.0, 3.0, corner_x, 5.0, 6.0, 7.0, 8.0, 9.0]

    def env(x):
        return 100e-6 * min(x, corner_x) - 200e-6 * max(x - corner_x, 0.0)

    fit = _drift_fit([(x, env(x)) for x in xs])
    assert fit.n == 10 and fit.sx == pytest.approx(sum(xs))  # one point per second of host time
    assert fit.ppm() == pytest.approx(slope, abs=1e-6)


def test_the_drift_needs_three_seconds_of_maxima():
    assert _drift_fit([(0.0, 0.0), (1.0, 1e-4)]).ppm() is None
    assert _drift_fit([(0.0, 0.0), (1.0, 1e-4), (2.0, 2e-4)]).ppm() == pytest.approx(100.0, abs=1e-6)


@pytest.mark.parametrize("height,corners", [(0.5e-9, 2), (1.2e-9, 3), (5e-9, 3)])
def test_a_corner_within_a_nanosecond_of_its_neighbours_chord_is_dropped(height, corners):
    fit = _DriftFit()
    for x, off in ((2.0, 0.0), (7.0, height), (12.0, 0.0)):
        fit._take(x, off)
    assert len(fit.hull) == corners


def test_the_envelope_keeps_its_first_corner_and_the_newest_half_when_it_outgrows_its_bound():
    # a strictly bent envelope makes every point a corner; past MAX_HULL corners the oldest after
    # the first are dropped, leaving the first and the newest MAX_HULL // 2 (bounded memory)
    fit = _DriftFit()
    model: list = []
    for k in range(fit.MAX_HULL + 10):
        p = (float(k), -1e-6 * k * k)
        fit._take(*p)
        model.append(p)
        if len(model) > fit.MAX_HULL:
            model = model[:1] + model[-(fit.MAX_HULL // 2):]
    assert fit.hull == model and len(model) == 1 + fit.MAX_HULL // 2 + 9


def test_a_motor_update_of_another_motor_count_is_ignored_and_one_reading_is_a_window():
    from monitor.assembler import RpmTrack

    tr = RpmTrack(2, capacity=10)
    tr.add(MotorUpdate(np.array([1.0]), np.array([[100.0, 200.0, 300.0]]), np.zeros((1, 3)), np.ones((1, 3), bool)))
    assert tr.window(np.array([0.0]), np.array([2.0]))[0].shape == (1, 2)
    assert np.isnan(tr.window(np.array([0.0]), np.array([2.0]))[0]).all()
    tr.add(MotorUpdate(np.array([1.0]), np.array([[100.0, 200.0]]), np.full((1, 2), 0.5), np.ones((1, 2), bool)))
    mean, latest, thr, ok = tr.window(np.array([0.0]), np.array([2.0]))
    assert mean.tolist() == [[100.0, 200.0]] and latest.tolist() == [[100.0, 200.0]]
    assert thr.tolist() == [[0.5, 0.5]] and ok.tolist() == [[True, True]]


def test_a_trend_ending_under_one_rpm_is_not_floored_above_zero():
    from monitor.assembler import RpmTrack

    tr = RpmTrack(1, capacity=10)
    t = np.array([0.0, 0.1, 0.2, 0.3])
    tr.add(MotorUpdate(t, (2.0 - 5.0 * t)[:, None], np.zeros((4, 1)), np.ones((4, 1), bool)))
    fit, slope, _, _ = tr.trend(np.array([0.31]))
    assert slope[0, 0] == pytest.approx(-5.0) and fit[0, 0] == pytest.approx(2.0 - 5.0 * 0.31)  # 0.45 RPM


def test_only_each_second_s_highest_offset_counts():
    # two reads a second, the earlier one the least delayed: only it is kept (one point a second),
    # so the mean host time is that of the maxima alone
    pts = [(0.0, -5e-3)] + [(k + dx, 1e-4 * (k + dx) - lat) for k in range(10) for dx, lat in ((0.3, 0.0), (0.6, 3e-3))]
    fit = _drift_fit(pts)
    assert fit.n == 10 and fit.sx == pytest.approx(sum(k + 0.3 for k in range(10)))
    assert fit.ppm() == pytest.approx(100.0, abs=1e-6)
