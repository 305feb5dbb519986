"""The stray-peak search's rules, one at a time, at their thresholds, on exact synthetic spectra.

Every frame is a flat floor of 1 (deg/s)^2/Hz summed over the axes (0 dB; its 41-bin running median
is 0 dB exactly while fewer than 21 of the 41 bins are raised) with one peak whose level over the
floor is set to the hundredth of a dB. Each test puts a value just inside and just outside the
documented threshold (module docstring of ``monitor.stray``), so a changed constant, comparison or
term fails one of them. The numbers are spinrig's own rules, not published values.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.profile import Mode, Profile
from monitor.stray import StrayPeak, StrayPeakFinder, half_power_width_hz, local_peaks

from .conftest import examples

BIN = 4.0
FREQS = np.arange(1001) * BIN  # Nyquist 4000 Hz: fs 8000 Hz
HOP = 0.2


def _frame(peaks=(), axis=1):
    """One frame (bins, 3): floor 1/3 on each axis, and ``(bin, dB over the floor)`` peaks, each
    three bins wide (the neighbours 6 dB under the centre) on ``axis``."""
    psd = np.full((FREQS.size, 3), 1.0 / 3.0)
    for k, over_db in peaks:
        top = 10 ** (over_db / 10) - 1.0
        psd[k, axis] += top
        psd[k - 1, axis] += top / 4
        psd[k + 1, axis] += top / 4
    return psd


def _run(finder, n, peaks, rpm0=30000.0, rpm_step=600.0, t0=0.0, axis=1):
    t = t0 + np.arange(n) * HOP
    psd = np.stack([_frame(peaks, axis)] * n)
    rpm = np.stack([rpm0 + rpm_step * np.arange(n)] * 2, axis=1)
    return finder.update_many(t, psd, rpm)


# bin 75 = 300 Hz lies under order 1 of every speed used here (30000 RPM and up: orders at
# multiples of 500 Hz and more, folded ones included), so no order rule touches it
STILL = 75


def test_a_still_peak_just_over_the_threshold_is_reported_once_at_its_bin():
    out = _run(StrayPeakFinder(Profile(), FREQS), 10, [(STILL, 8.05)])
    assert len(out) == 1
    p = out[0]
    # the fourth search (t = 0.6 s) is the first with 4 hits over at least 0.5 s
    assert p.t_s == pytest.approx(0.6)
    assert p.hits == 4
    assert p.axis == "pitch"
    assert p.freq_hz == pytest.approx(STILL * BIN, abs=1e-9)  # symmetric peak: no offset
    assert p.over_floor_db == pytest.approx(8.05, abs=1e-9)
    assert (p.rpm_low, p.rpm_high) == (30000.0, 31800.0)


def test_a_still_peak_just_under_the_threshold_is_not():
    assert _run(StrayPeakFinder(Profile(), FREQS), 20, [(STILL, 7.95)]) == []


@pytest.mark.parametrize("axis,name", [(0, "roll"), (1, "pitch"), (2, "yaw")])
def test_the_report_names_the_axis_where_the_peak_is(axis, name):
    (p,) = _run(StrayPeakFinder(Profile(), FREQS), 6, [(STILL, 12.0)], axis=axis)
    assert p.axis == name


def test_three_hits_are_not_enough_four_are():
    # hits at 0, 0.3, 0.6 s (span 0.6 s): three; a fourth at 0.9 s reports
    f = StrayPeakFinder(Profile(), FREQS)
    # (the speed changes by 7 % by the third, so only the count holds the report back)
    outs = [f.update(0.3 * i, _frame([(STILL, 12.0)]), np.full(2, 30000.0 + 1200 * i)) for i in range(4)]
    assert [len(o) for o in outs] == [0, 0, 0, 1]
    assert outs[3][0].hits == 4


def test_the_hits_must_span_half_a_second():
    # hits 0.1 s apart: the fourth (0.3 s) is too early; the sixth (span exactly 0.5 s) reports
    f = StrayPeakFinder(Profile(), FREQS)
    outs = [f.update(0.1 * i, _frame([(STILL, 12.0)]), np.full(2, 30000.0 + 600 * i)) for i in range(8)]
    assert [len(o) for o in outs] == [0, 0, 0, 0, 0, 1, 0, 0]


@pytest.mark.parametrize("change,reports", [(0.049, 0), (0.052, 1)])
def test_the_speed_must_change_by_five_percent(change, reports):
    # at 300 Hz three bins are 4 %: the 5 % rule is the one that counts
    hi = 30000.0
    lo = hi * (1 - change)
    rpm_step = (hi - lo) / 9
    out = _run(StrayPeakFinder(Profile(), FREQS), 10, [(STILL, 12.0)], rpm0=lo, rpm_step=rpm_step)
    assert len(out) == reports


@pytest.mark.parametrize("change,reports", [(0.115, 0), (0.125, 1)])
def test_at_low_frequency_the_speed_must_move_an_order_by_three_bins(change, reports):
    # bin 25 = 100 Hz: three bins are 12 % of it (more than the 5 % rule); the orders of 26000 to
    # 30000 RPM are far above it
    hi = 30000.0
    lo = hi * (1 - change)
    out = _run(StrayPeakFinder(Profile(), FREQS), 10, [(25, 12.0)], rpm0=lo, rpm_step=(hi - lo) / 9)
    assert len(out) == reports


def test_a_track_a_search_finds_unseen_for_over_two_seconds_is_forgotten():
    # one hit at 0 s, a search without it at 2.05 s, then hits from 2.1 s on: the track restarts,
    # so the report waits for four new hits (2.7 s); had the first hit been kept, the third
    # (2.5 s) would report
    f = StrayPeakFinder(Profile(), FREQS)
    assert f.update(0.0, _frame([(STILL, 12.0)]), np.full(2, 29000.0)) == []
    assert f.update(2.05, _frame(), np.full(2, 29500.0)) == []
    times = 2.1 + np.arange(6) * HOP
    outs = [f.update(float(t), _frame([(STILL, 12.0)]), np.full(2, 30000.0 + 600 * i)) for i, t in enumerate(times)]
    assert [len(o) for o in outs] == [0, 0, 0, 1, 0, 0]
    assert outs[3][0].rpm_low == 30000.0  # the forgotten hit's 29000 RPM is not in the report


def test_a_track_unseen_for_exactly_two_seconds_is_kept():
    f = StrayPeakFinder(Profile(), FREQS)
    f.update(0.0, _frame([(STILL, 12.0)]), np.full(2, 29000.0))
    f.update(2.0, _frame(), np.full(2, 29500.0))
    times = 2.1 + np.arange(3) * HOP
    outs = [f.update(float(t), _frame([(STILL, 12.0)]), np.full(2, 30000.0 + 600 * i)) for i, t in enumerate(times)]
    assert [len(o) for o in outs] == [0, 0, 1]
    assert outs[2][0].rpm_low == 29000.0


def test_a_reported_track_is_kept_and_never_reported_again():
    f = StrayPeakFinder(Profile(), FREQS)
    assert len(_run(f, 6, [(STILL, 12.0)])) == 1
    assert _run(f, 6, [(STILL, 12.0)], t0=10.0) == []
    assert len(f.reported) == 1
    assert f.reported[0].hits == 4  # the report is the one made at 0.6 s, not folded again


def test_a_peak_wandering_one_bin_is_one_track_two_bins_is_not():
    def hits(shift):
        f = StrayPeakFinder(Profile(), FREQS)
        out = []
        for i in range(4):
            k = STILL + (shift if i % 2 else 0)
            out += f.update(i * HOP * 2, _frame([(k, 12.0)]), np.full(2, 30000.0 + 1200 * i))
        return out

    assert len(hits(1)) == 1
    assert hits(2) == []


def test_the_reported_frequency_is_the_gaussian_interpolated_centre():
    # a Gaussian line in power is a parabola in log power: three bins give its centre exactly
    # (Gaussian interpolation; Gasior and Gonzalez 2004)
    centre, sigma = STILL + 0.3, 1.1
    k = np.arange(FREQS.size)
    line = 30.0 * np.exp(-0.5 * ((k - centre) / sigma) ** 2)
    psd = np.full((FREQS.size, 3), 1e-6)
    psd[:, 1] += line
    f = StrayPeakFinder(Profile(), FREQS)
    # a floor far under the line: its sum is the line's own shape
    t = np.arange(8) * HOP
    out = f.update_many(t, np.stack([psd] * 8), np.stack([30000.0 + 600 * np.arange(8)] * 2, axis=1))
    assert len(out) == 1
    # the floor under the line shifts the centre by about 1e-7 of a bin
    assert out[0].freq_hz == pytest.approx(centre * BIN, abs=1e-4 * BIN)
    # the half-power width is where straight lines between the sampled bins cross half the top
    # (np.interp on each flank of the sum) ...
    acc = 8 * psd.sum(axis=1)
    top = int(np.argmax(acc))
    half = acc[top] / 2
    left = np.interp(half, acc[top - 6 : top + 1], k[top - 6 : top + 1])
    right = np.interp(half, acc[top : top + 7][::-1], k[top : top + 7][::-1])
    assert out[0].width_hz == pytest.approx((right - left) * BIN, rel=1e-9)
    # ... which is a Gaussian's FWHM, 2 sqrt(2 ln 2) sigma, to within the chords' error (0.1 bin here)
    assert out[0].width_hz == pytest.approx(2 * np.sqrt(2 * np.log(2)) * sigma * BIN, abs=0.15 * BIN)


def test_a_second_peak_within_three_percent_on_the_same_axis_updates_the_first():
    f = StrayPeakFinder(Profile(), FREQS)
    first = _run(f, 6, [(STILL, 12.0)])
    assert len(first) == 1
    # 2 bins up (2.3 %): another track, the same resonance: no new report, more hits
    again = _run(f, 6, [(STILL + 2, 14.0)], t0=10.0)
    assert again == []
    assert len(f.reported) == 1
    r = f.reported[0]
    assert r.hits == 8
    assert r.over_floor_db == pytest.approx(14.0, abs=1e-9)
    # refined on the summed evidence: the stronger peak dominates the sum
    assert abs(r.freq_hz - (STILL + 2) * BIN) < BIN


def test_a_peak_five_percent_away_is_another_report():
    f = StrayPeakFinder(Profile(), FREQS)
    _run(f, 6, [(STILL, 12.0)])
    assert len(_run(f, 6, [(STILL + 4, 12.0)], t0=10.0)) == 1  # 5.3 % away
    assert len(f.reported) == 2


def test_one_resonance_is_one_report_when_a_peak_is_as_wide_as_the_gap():
    a = StrayPeak(0.0, 300.0, "roll", 10.0, 1.0, 2.0, width_hz=20.0)
    b = StrayPeak(0.0, 318.0, "roll", 10.0, 1.0, 2.0, width_hz=19.0)
    assert StrayPeakFinder._same(a, b)  # 18 Hz apart, 6 %: inside the narrower width (19 Hz)
    assert not StrayPeakFinder._same(a, StrayPeak(0.0, 320.0, "roll", 10.0, 1.0, 2.0, width_hz=19.0))
    assert not StrayPeakFinder._same(a, StrayPeak(0.0, 300.0, "yaw", 10.0, 1.0, 2.0, width_hz=20.0))
    # 3 % of the first is the floor of the tolerance: 9 Hz
    thin = StrayPeak(0.0, 300.0, "roll", 10.0, 1.0, 2.0)
    assert StrayPeakFinder._same(thin, replace_freq(thin, 308.9))
    assert not StrayPeakFinder._same(thin, replace_freq(thin, 309.1))


def replace_freq(p, f):
    from dataclasses import replace

    return replace(p, freq_hz=f)


# ----------------------------------------------------------------- exclusions


def _excluded(finder, f, rpm, slope=None):
    return finder._excluded(np.asarray(f, float), np.asarray(rpm, float), slope)


def test_an_order_excludes_three_bins_plus_three_percent_around_it():
    # 30000 RPM: order 1 at 500 Hz, the others at multiples of 500 Hz (folded ones too: fs 8000)
    f = StrayPeakFinder(Profile(), FREQS)
    tol = 3 * BIN + 0.03 * 500.0  # 27 Hz
    got = _excluded(f, [500 - tol - 0.1, 500 - tol + 0.1, 500 + tol - 0.1, 500 + tol + 0.1], [30000.0])
    assert got.tolist() == [False, True, True, False]


def test_every_order_up_to_twelve_is_excluded_and_the_thirteenth_is_not():
    f = StrayPeakFinder(Profile(), FREQS)
    rpm = 3000.0  # 50 Hz shaft: orders at 50 Hz steps
    orders = 50.0 * np.arange(1, 14)
    assert _excluded(f, orders, [rpm]).tolist() == [True] * 12 + [False]


def test_the_profile_blade_orders_are_excluded_above_twelve():
    # 7 blades: blade pass 7x and its second harmonic 14x join orders 1..12
    f = StrayPeakFinder(Profile("t", 7, "x", ()), FREQS)
    assert _excluded(f, [14 * 50.0, 13 * 50.0], [3000.0]).tolist() == [True, False]


def test_the_order_tolerance_widens_by_how_far_the_order_moves_in_half_a_window():
    f = StrayPeakFinder(Profile(), FREQS, window_s=0.256)
    tol = 3 * BIN + 0.03 * 500.0
    moved = 6000.0 * 0.128 / 60.0  # 6000 RPM/s over half a 0.256 s window at order 1: 12.8 Hz
    probe = [500 + tol + moved - 0.1, 500 + tol + moved + 0.1]
    assert _excluded(f, probe, [30000.0], np.array([-6000.0])).tolist() == [True, False]
    assert _excluded(f, probe, [30000.0]).tolist() == [False, False]


def test_an_order_above_nyquist_is_excluded_where_it_folds_back():
    f = StrayPeakFinder(Profile(), FREQS)
    # 31200 RPM (520 Hz): order 9 at 4680 Hz folds to 3320 Hz (fs 8000), where no unfolded order
    # is (orders 6 and 7 at 3120 and 3640 Hz exclude up to 3225.6 and from 3518.8 Hz)
    tol = 3 * BIN + 0.03 * 3320.0
    got = _excluded(f, [3320.0, 3320.0 + tol - 0.5, 3320.0 + tol + 0.5], [31200.0])
    assert got.tolist() == [True, True, False]


def test_an_unknown_speed_excludes_no_order():
    f = StrayPeakFinder(Profile(), FREQS)
    assert _excluded(f, [500.0], [np.nan]).tolist() == [False]
    assert _excluded(f, [500.0], [np.nan, 30000.0]).tolist() == [True]


@pytest.mark.parametrize("zeta,half", [(0.02, 0.06), (0.004, 0.03)])
def test_a_mode_excludes_the_wider_of_three_half_bandwidths_and_three_percent(zeta, half):
    prof = Profile("t", 2, "x", (Mode("arm", 1000.0, zeta, "roll"),))
    f = StrayPeakFinder(prof, FREQS)
    tol = half * 1000.0 + 1.5 * BIN
    got = _excluded(f, [1000 - tol - 0.1, 1000 - tol + 0.1, 1000 + tol - 0.1, 1000 + tol + 0.1], [np.nan])
    assert got.tolist() == [False, True, True, False]


def test_the_search_range_is_30_hz_to_nine_tenths_of_nyquist():
    f = StrayPeakFinder(Profile(), FREQS)
    got = _excluded(f, [29.9, 30.1, 3599.9, 3600.1], [np.nan])
    assert got.tolist() == [True, False, False, True]
    g = StrayPeakFinder(Profile(), FREQS, fmin_hz=50.0, fmax_hz=1000.0)
    assert _excluded(g, [49.0, 51.0, 999.0, 1001.0], [np.nan]).tolist() == [True, False, False, True]


# ----------------------------------------------------------------- helpers against references


@pytest.mark.parametrize("distance", [1, 3, 7])
def test_local_peaks_equals_scipy_find_peaks(distance):
    @settings(max_examples=examples(200), deadline=None)
    @given(st.integers(0, 2**32 - 1), st.integers(3, 300), st.floats(-1.0, 1.0))
    def check(seed, n, h):
        x = np.random.default_rng(seed).standard_normal(n)  # no flat tops (continuous values)
        height = np.full(n, h)
        ref, _ = scipy.signal.find_peaks(x, height=h, distance=distance)
        assert local_peaks(x, height, distance).tolist() == ref.tolist()

    check()


def test_half_power_width_interpolates_linearly_between_bins():
    # half of 8 is 4: crossed at 1.5 bins left of the top (between 6 and 2) and 0.75 right (8 -> 0)
    p = np.array([0.0, 2.0, 6.0, 8.0, 0.0, 0.0])
    # left: lo = 2 (6 > 4), 2 - (6 - 4) / (6 - 2) = 1.5; right: hi = 3, 3 + (8 - 4) / 8 = 3.5
    assert half_power_width_hz(p, 3, 2.0) == pytest.approx((3.5 - 1.5) * 2.0)
    # a peak at the edge of the spectrum stops there
    assert half_power_width_hz(np.array([8.0, 6.0, 1.0]), 0, 1.0) == pytest.approx(1.0 + 2.0 / 5.0)
    assert half_power_width_hz(np.array([1.0, 6.0, 8.0]), 2, 1.0) == pytest.approx(1.0 + 2.0 / 5.0)


# ----------------------------------------------------------------- tracks, their evidence and refinement


def test_a_track_is_found_from_the_bin_above_too():
    # the first hit one bin up, the next ones at the bin itself: one track
    f = StrayPeakFinder(Profile(), FREQS)
    out = []
    for i in range(4):
        k = STILL + 1 if i == 0 else STILL
        out += f.update(i * HOP * 2, _frame([(k, 12.0)]), np.full(2, 30000.0 + 1200 * i))
    assert len(out) == 1 and out[0].hits == 4


def test_two_peaks_three_bins_apart_in_one_frame_are_both_searched_two_apart_only_the_higher():
    f = StrayPeakFinder(Profile(), FREQS)
    out = _run(f, 6, [(STILL, 12.0), (STILL + 3, 14.0)])
    assert len(out) == 2 and len(f.reported) == 2  # 300 and 312 Hz: 4 % apart, two resonances
    g = StrayPeakFinder(Profile(), FREQS)
    psd = _frame([(STILL, 12.0)]) + _frame([(STILL + 2, 14.0)]) - 1.0 / 3.0  # two peaks, one floor
    t = np.arange(6) * HOP
    got = g.update_many(t, np.stack([psd] * 6), np.stack([30000.0 + 600 * np.arange(6)] * 2, axis=1))
    assert len(got) == 1 and got[0].hits == 4  # the lower one, 2 bins away, was never a candidate


def test_over_the_floor_is_measured_from_the_floor_not_from_zero():
    f = StrayPeakFinder(Profile(), FREQS)
    t = np.arange(6) * HOP
    psd = np.stack([_frame([(STILL, 9.5)]) * 10.0] * 6)  # the floor at +10 dB
    (p,) = f.update_many(t, psd, np.stack([30000.0 + 600 * np.arange(6)] * 2, axis=1))
    assert p.over_floor_db == pytest.approx(9.5, abs=1e-9)


def test_the_axis_and_the_frequency_come_from_all_the_hits_not_the_last():
    # three hits on pitch with the line centred 0.4 bin up, the fourth on roll, weaker, centred:
    # the sum says pitch, and its Gaussian centre is that of the summed spectrum
    k = np.arange(FREQS.size)

    def line(centre, amp, axis):
        psd = np.full((FREQS.size, 3), 1e-6)
        psd[:, axis] += amp * np.exp(-0.5 * ((k - centre) / 1.1) ** 2)
        return psd

    frames = [line(STILL + 0.4, 30.0, 1)] * 3 + [line(STILL, 10.0, 0)]
    f = StrayPeakFinder(Profile(), FREQS)
    t = np.arange(4) * 0.2
    (p,) = f.update_many(t, np.stack(frames), np.stack([30000.0 + 900 * np.arange(4)] * 2, axis=1))
    assert p.axis == "pitch"
    acc = np.sum([fr.sum(axis=1) for fr in frames], axis=0)
    j = int(np.argmax(acc))
    a, b, d = np.log(acc[j - 1 : j + 2])
    assert p.freq_hz == pytest.approx((j + 0.5 * (a - d) / (a - 2 * b + d)) * BIN, abs=1e-9)


def test_the_speed_range_is_the_lowest_and_highest_mean_speed_seen():
    f = StrayPeakFinder(Profile(), FREQS)
    (p,) = _run(f, 4, [(STILL, 12.0)], rpm0=33000.0, rpm_step=-900.0)
    assert (p.rpm_low, p.rpm_high) == (30300.0, 33000.0)


def test_a_reported_track_outlives_a_long_silence():
    f = StrayPeakFinder(Profile(), FREQS)
    assert len(_run(f, 4, [(STILL, 12.0)])) == 1
    assert f.update(5.0, _frame(), np.full(2, 30000.0)) == []  # a search without it, 4 s later
    assert _run(f, 6, [(STILL, 12.0)], t0=10.0) == []
    assert f.reported[0].hits == 4  # the same track: nothing folded in again


def test_a_given_speed_trend_widens_the_exclusion_in_the_search():
    # order 1 from 26 to 42 Hz under the peak: outside 3 bins + 3 % of it; with a trend of
    # 30000 RPM/s (as given: the finder takes the trend it is told) the order moves 64 Hz in half
    # a window, and the peak is inside its reach in every frame
    rpm = np.linspace(60.0 * (STILL * BIN - 26.0), 60.0 * (STILL * BIN - 26.0) * 0.94, 10)
    t = np.arange(10) * HOP
    psd = np.stack([_frame([(STILL, 12.0)])] * 10)
    plain = StrayPeakFinder(Profile(), FREQS).update_many(t, psd, np.stack([rpm] * 2, axis=1))
    trend = StrayPeakFinder(Profile(), FREQS).update_many(t, psd, np.stack([rpm] * 2, axis=1),
                                                          np.full((10, 2), -30000.0))
    assert len(plain) == 1 and trend == []


def test_a_refined_report_that_lands_on_another_report_takes_it_in():
    # A at 300 Hz and B at 316 Hz (5.3 % apart): two reports. C at 308 Hz, strong, is the same
    # resonance as A; A's estimate moves up to C, now within 3 % of B: A takes B in
    f = StrayPeakFinder(Profile(), FREQS)
    assert len(_run(f, 4, [(STILL, 12.0)])) == 1
    assert len(_run(f, 4, [(STILL + 4, 12.0)], t0=10.0)) == 1
    assert _run(f, 4, [(STILL + 2, 20.0)], t0=20.0) == []
    assert len(f.reported) == 1
    r = f.reported[0]
    assert r.hits == 12 and abs(r.freq_hz - (STILL + 2) * BIN) < BIN
