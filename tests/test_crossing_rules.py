"""The crossing watch's rules, one at a time, at their thresholds, on exact speeds and spectra.

The random passages of ``test_crossing_watch.py`` check the promises over realistic speed jitter;
here each rule of the module docstring of ``monitor.crossing`` (and the README's "What the
warnings mean") is put just inside and just outside its threshold with speeds, slopes and spectra
given exactly, so that a changed constant, comparison or term fails a named test. The thresholds
are spinrig's own rules, written out here as numbers (not read from the module), so the yardstick
does not move with the code. The relations used: an order k of a motor at n RPM sits at
k n / 60 Hz (Campbell diagram order lines); the half-power band of a mode is f_n (1 -+ zeta)
(Rao, Mechanical Vibrations; REFERENCES.md).
"""

from __future__ import annotations

import numpy as np
import pytest

from monitor import crossing
from monitor.crossing import CrossingWatch
from monitor.profile import Mode, Profile

BIN = 8000 / 2048
FREQS = np.arange(1025) * BIN
HOP = 0.1
FN = 200.0
ZETA = 0.02
W = ZETA * FN + BIN / 2 + 0.005 * FN  #: watch half band with telemetry: 6.953 Hz
W_EST = ZETA * FN + BIN / 2 + 0.01 * FN  #: ... with an estimated speed: 7.953 Hz
MARGIN = 0.10 * FN  #: the wider of 10 % of f_n and 3 zeta f_n (12 Hz): 20 Hz
ALLOW = 1.5 * 0.005 * FN  #: exit allowance, the wider of zeta f_n / 4 (1 Hz) and 1.5 u f_n: 1.5 Hz


def _profile(f_n=FN, zeta=ZETA):
    # 3 blades: orders 1x, 2x, 3x and 6x; only order 1 comes near the mode in these tests
    return Profile("bench", 3, "clamped", (Mode("arm", f_n, zeta, "pitch"),))


def _rpm(offset_hz, f_n=FN):
    """The speed (RPM) that puts order 1 ``offset_hz`` from the mode."""
    return 60.0 * (f_n + offset_hz)


def _feed(watch, rpm, slope=None, se=None, est=None, rms=None, t0=0.0, psd=None):
    """Frames every HOP s from ``t0``: ``rpm`` (F,) for one motor or (F, motors); slopes in RPM/s."""
    rpm = np.asarray(rpm, float)
    rpm = rpm[:, None] if rpm.ndim == 1 else rpm
    n = rpm.shape[0]

    def arr(x):
        if x is None:
            return None
        a = np.asarray(x, float)
        return np.broadcast_to(a[:, None] if a.ndim == 1 else a, rpm.shape).copy()

    t = t0 + np.arange(n) * HOP
    p = np.full((n, FREQS.size), 1e-4) if psd is None else psd
    e = None if est is None else np.full(n, est)
    return watch.update(t, p, rpm, arr(slope), arr(se), e, arr(rms))


def _states(events):
    return [(e.state, round(e.t_s, 6)) for e in events]


def _watch(motors=1, **kw):
    return CrossingWatch(_profile(**kw), motors, FREQS, HOP)


# ----------------------------------------------------------------- the watch band


@pytest.mark.parametrize("side", [-1, 1])
def test_crossing_is_declared_inside_the_watch_band_and_not_outside(side):
    assert _states(_feed(_watch(), [_rpm(side * (W - 0.01))])) == [("crossing", 0.0)]
    assert _feed(_watch(), [_rpm(side * (W + 0.01))]) == []


def test_an_estimated_speed_widens_the_band_by_half_a_percent_of_f_n():
    inside_est = _rpm(W_EST - 0.01)
    assert _states(_feed(_watch(), [inside_est], est=True)) == [("crossing", 0.0)]
    assert _feed(_watch(), [inside_est], est=False) == []
    assert _feed(_watch(), [_rpm(W_EST + 0.01)], est=True) == []


def test_the_crossing_event_carries_the_watch_band_predicted_band_and_the_motor():
    (e,) = _feed(_watch(), [_rpm(3.0)])
    assert e.watch_rpm == pytest.approx((60 * (FN - W), 60 * (FN + W)), rel=1e-12)
    assert e.predicted_rpm == pytest.approx((60 * FN * (1 - ZETA), 60 * FN * (1 + ZETA)), rel=1e-12)
    assert e.rpm == _rpm(3.0) and e.order_hz == pytest.approx(FN + 3.0) and e.order == 1.0
    assert e.motor == 1 and e.previous == "clear" and e.reason == "order inside the watch band"
    assert e.watch_rpm[0] <= e.rpm <= e.watch_rpm[1]


def test_the_second_order_crosses_at_half_the_speed():
    (e,) = _feed(_watch(), [30.0 * (FN + 3.0)])
    assert e.order == 2.0 and e.order_hz == pytest.approx(FN + 3.0)
    assert e.watch_rpm == pytest.approx((30 * (FN - W), 30 * (FN + W)), rel=1e-12)


def test_a_frame_of_unknown_speed_changes_nothing():
    w = _watch()
    assert _feed(w, [np.nan, np.nan]) == []
    assert w.group_states().max() == 0


# ----------------------------------------------------------------- nearing


@pytest.mark.parametrize("slope,raised", [(-35.01, True), (-34.99, False), (35.01, False)])
def test_a_trend_is_an_approach_when_it_stands_three_standard_errors_plus_5_rpm_s_clear(slope, raised):
    # 15 Hz above the mode, inside the 20 Hz margin: closing needs the speed to fall by more than
    # 3 x 10 + 5 RPM/s
    events = _feed(_watch(), [_rpm(15.0)], slope=[slope], se=[10.0])
    assert _states(events) == ([("nearing", 0.0)] if raised else [])
    if raised:
        assert events[0].reason.startswith("closing at 0.6 Hz/s")


@pytest.mark.parametrize("zeta,margin", [(ZETA, MARGIN), (0.05, 3 * 0.05 * FN)])
def test_the_margin_is_the_wider_of_ten_percent_and_three_half_bandwidths(zeta, margin):
    # closing at 0.1 Hz/s (6 RPM/s, exact slope): it would take minutes to reach the band, so only
    # the margin counts
    def raised(offset):
        return _feed(_watch(zeta=zeta), [_rpm(offset)], slope=[-6.0], se=[0.0])

    assert _states(raised(margin - 0.01)) == [("nearing", 0.0)]
    assert raised(margin + 0.01) == []


@pytest.mark.parametrize("seconds,raised", [(0.79, True), (0.81, False)])
def test_an_order_that_would_reach_the_band_within_0_8_s_is_nearing(seconds, raised):
    d = 50.0  # outside the margin
    v = (d - W) / seconds  # Hz/s of order 1
    events = _feed(_watch(), [_rpm(d)], slope=[-60.0 * v], se=[0.0])
    assert _states(events) == ([("nearing", 0.0)] if raised else [])


def _hot_psd(over_db, n=1):
    """A flat spectrum with the bins inside the mode's half-power band (199.2 and 203.1 Hz)
    ``over_db`` above it: the level at the mode stands that far over its floor."""
    p = np.full((n, FREQS.size), 1e-4)
    inside = (FREQS >= FN * (1 - ZETA)) & (FREQS <= FN * (1 + ZETA))
    assert inside.sum() == 2
    p[:, inside] *= 10 ** (over_db / 10)
    return p


@pytest.mark.parametrize("over,raised", [(6.01, True), (5.99, False)])
def test_a_steady_order_inside_the_margin_is_nearing_when_the_response_stands_6_db_over(over, raised):
    events = _feed(_watch(), [_rpm(15.0)], psd=_hot_psd(over))
    assert _states(events) == ([("nearing", 0.0)] if raised else [])
    if raised:
        assert events[0].reason == "inside the margin with the response +6.0 dB over its floor"
        assert events[0].over_floor_db == pytest.approx(6.01, abs=1e-9)


def test_a_strong_response_with_no_order_inside_the_margin_is_not_nearing():
    assert _feed(_watch(), [_rpm(MARGIN + 0.01)], psd=_hot_psd(20.0)) == []


# ----------------------------------------------------------------- stepping down: hysteresis and dwell


@pytest.mark.parametrize("skip_held", [True, False])
@pytest.mark.parametrize("past,events", [
    (ALLOW - 0.01, [("crossing", 0.0)]),  # within the exit allowance: stays crossing
    (ALLOW + 0.01, [("crossing", 0.0), ("nearing", 0.5)]),  # past it: nearing after the dwell
])
def test_a_crossing_steps_down_past_the_exit_allowance_after_half_a_second(skip_held, past, events):
    w = _watch()
    w.skip_held = skip_held
    got = _feed(w, [_rpm(0.0)] + [_rpm(W + past)] * 30)
    assert _states(got) == events
    if len(got) == 2:
        assert got[1].reason == "left the band, still inside the margin"


@pytest.mark.parametrize("offset,events", [
    (1.15 * MARGIN - 0.01, [("crossing", 0.0), ("nearing", 0.5)]),  # inside 1.15 x the margin: stays nearing
    (1.15 * MARGIN + 0.01, [("crossing", 0.0), ("clear", 0.5)]),
])
def test_nearing_holds_inside_1_15_times_the_margin(offset, events):
    assert _states(_feed(_watch(), [_rpm(0.0)] + [_rpm(offset)] * 30)) == events


def test_nearing_without_its_reason_clears_after_the_dwell():
    # nearing by closing at frame 0; then far away and steady
    got = _feed(_watch(), [_rpm(15.0)] + [_rpm(40.0)] * 10, slope=[-100.0] + [0.0] * 10, se=[0.0] * 11)
    assert _states(got) == [("nearing", 0.0), ("clear", 0.5)]
    assert got[1].reason == "no order inside the margin"


def test_the_dwell_counts_from_the_last_frame_with_a_reason_to_stay():
    # in band at 0 and at 0.3 s, out from 0.4 s: the step down comes 0.5 s after 0.3 s
    seq = [_rpm(0.0), _rpm(W + 2), _rpm(W + 2), _rpm(0.0)] + [_rpm(W + 2)] * 10
    assert _states(_feed(_watch(), seq)) == [("crossing", 0.0), ("nearing", 0.8)]


def test_another_motor_still_closing_in_keeps_the_group_crossing():
    # motor 1 crosses at 0 s and leaves far behind; motor 2 sits 15 Hz off the mode: closing in
    # (its speed falls at 100 RPM/s) it holds the group; steady, the group steps down
    rpm = np.array([[_rpm(0.0), _rpm(15.0)]] + [[_rpm(40.0), _rpm(15.0)]] * 10)
    closing = np.array([[0.0, -100.0]] * 11)
    assert _states(_feed(_watch(2), rpm, slope=closing, se=np.zeros((11, 2)))) == [("crossing", 0.0)]
    got = _feed(_watch(2), rpm, slope=np.zeros((11, 2)), se=np.zeros((11, 2)))
    assert _states(got) == [("crossing", 0.0), ("nearing", 0.5)]
    assert [(m.motor, m.state) for m in got[0].motors] == [(1, "crossing"), (2, "nearing")]


# ----------------------------------------------------------------- steps over the band between frames


def test_a_step_over_the_whole_band_is_a_crossing_at_the_speed_that_met_the_mode():
    # 10 Hz under the mode, then 15 Hz over it: order 1 met f_n 40 % of the way, at 12000 RPM
    (e,) = _feed(_watch(), [_rpm(-10.0), _rpm(15.0)])
    assert (e.state, e.t_s) == ("crossing", HOP)
    assert e.rpm == pytest.approx(60 * FN, rel=1e-12) and e.order_hz == FN
    assert e.reason.startswith("stepped over the band")
    assert e.watch_rpm[0] <= e.rpm <= e.watch_rpm[1]


def test_a_step_over_is_seen_across_two_updates_but_not_across_a_break():
    w = _watch()
    assert _feed(w, [_rpm(-10.0)]) == []
    assert _states(_feed(w, [_rpm(15.0)], t0=HOP)) == [("crossing", HOP)]
    w = _watch()
    _feed(w, [_rpm(-10.0)])
    w.break_series()
    assert _feed(w, [_rpm(15.0)], t0=HOP) == []


@pytest.mark.parametrize("after,crossed", [(11999.0, True), (12001.0, False)])
def test_a_leap_of_more_than_a_quarter_of_the_speed_is_not_a_sweep(after, crossed):
    # a mode at 175 Hz; 9000 RPM (150 Hz) to 12000 RPM (200 Hz) is a change of 25 % of the larger
    got = _feed(_watch(f_n=175.0), [9000.0, after])
    assert (len(got) == 1) == crossed


def test_a_step_that_stays_on_one_side_or_lands_in_the_band_is_no_step_over():
    assert _feed(_watch(), [_rpm(-30.0), _rpm(-10.0)]) == []
    got = _feed(_watch(), [_rpm(-10.0), _rpm(3.0)])
    assert [e.reason for e in got] == ["order inside the watch band"]


# ----------------------------------------------------------------- motors that are not settled


@pytest.mark.parametrize("share,crossed", [(0.0199, True), (0.0201, False)])
def test_a_motor_straying_from_its_line_by_over_two_percent_raises_nothing(share, crossed):
    r = _rpm(0.0)
    assert (len(_feed(_watch(), [r], rms=[share * r])) == 1) == crossed
    # nor a step over the band
    assert (len(_feed(_watch(), [_rpm(-10.0), _rpm(15.0)], rms=[0.0, share * _rpm(15.0)])) == 1) == crossed


# ----------------------------------------------------------------- observed bands


def _sweep(watch, lo_hz, hi_hz, step_hz, t0=0.0):
    fo = np.arange(lo_hz, hi_hz + step_hz / 2, step_hz)  # up or down (a negative step)
    rpm = 60.0 * fo
    return rpm, _feed(watch, rpm, t0=t0)


def test_the_observed_band_is_the_speed_range_over_which_the_order_was_in_the_watch_band():
    w = _watch()
    rpm, events = _sweep(w, FN - 30.0, FN + 30.0, 0.7)
    assert [e.state for e in events] == ["crossing", "nearing", "clear"]
    inside = rpm[np.abs(rpm / 60.0 - FN) <= W]
    (b,) = w.observed_bands()
    assert (b.rpm_low, b.rpm_high) == (inside.min(), inside.max())
    assert b.motors == (1,) and b.order == 1.0 and b.passages == 1
    assert b.predicted_rpm == pytest.approx((60 * FN * (1 - ZETA), 60 * FN * (1 + ZETA)))
    assert b.t_start_s == pytest.approx(events[0].t_s) and b.t_end_s == pytest.approx(events[1].t_s)
    assert b.peak_db == pytest.approx(-40.0)  # the flat 1e-4 (deg/s)^2/Hz


def test_an_open_band_is_listed_with_no_end_yet():
    w = _watch()
    _feed(w, [_rpm(-3.0), _rpm(2.0)])
    (b,) = w.observed_bands()
    assert (b.rpm_low, b.rpm_high) == (_rpm(-3.0), _rpm(2.0)) and np.isnan(b.t_end_s)


def test_passages_of_one_group_merge_into_one_band_over_them_all(monkeypatch):
    # three passages with at most one kept apart: the older ones are merged, nothing is lost
    monkeypatch.setattr(crossing, "MAX_PASSAGES", 1)
    w = _watch()
    r1, ev1 = _sweep(w, FN - 30.0, FN + 30.0, 0.7)
    r2, _ = _sweep(w, FN + 30.0, FN - 30.0, -0.9, t0=100.0)
    r3, _ = _sweep(w, FN - 30.0, FN + 30.0, 1.1, t0=200.0)
    assert len(w.passages) == 1
    allr = np.concatenate([r1, r2, r3])
    inside = allr[np.abs(allr / 60.0 - FN) <= W]
    (b,) = w.all_bands()
    assert b.passages == 3
    assert (b.rpm_low, b.rpm_high) == (inside.min(), inside.max())
    assert b.t_start_s == ev1[0].t_s and b.t_end_s > 200.0


def test_the_peak_level_of_a_band_is_the_highest_smoothed_level_while_crossing():
    # the response at the mode rises by 10 dB at once in the third crossing frame; the level is
    # smoothed with a 0.15 s time constant: after n frames it has come 1 - exp(-n hop / 0.15) of the way
    n_in = 5
    rpm = [_rpm(0.0)] * n_in + [_rpm(40.0)] * 10
    psd = np.concatenate([_hot_psd(0.0, 2), _hot_psd(10.0, len(rpm) - 2)])
    w = _watch()
    _feed(w, rpm, psd=psd)
    (b,) = w.observed_bands()
    a = 1 - np.exp(-HOP / 0.15)
    expected = -40.0 + 10.0 * (1 - (1 - a) ** (n_in - 2))  # frames 2..4 smoothed toward -30 dB
    # the band closes at the step down (0.9 s, 0.5 s after the last frame in band), not when the
    # order leaves: frames 2..8 count
    later = -40.0 + 10.0 * (1 - (1 - a) ** 7)
    assert b.peak_db == pytest.approx(later, abs=1e-9)
    assert b.peak_db > expected


# ----------------------------------------------------------------- levels


def test_level_is_the_highest_bin_in_the_band_and_floor_the_mean_db_around_it():
    rng = np.random.default_rng(4)
    psd = rng.exponential(1e-4, (3, FREQS.size))
    w = _watch()
    level, floor = w.levels(psd)
    db = 10 * np.log10(psd)
    lo, hi = FN * (1 - ZETA), FN * (1 + ZETA)
    band = (FREQS >= lo - BIN / 2) & (FREQS <= hi + BIN / 2)
    around = (FREQS >= 0.6 * FN) & (FREQS <= 1.4 * FN) & ((FREQS < lo) | (FREQS > hi))
    assert level[:, 0] == pytest.approx(db[:, band].max(axis=1), abs=1e-9)
    assert floor[:, 0] == pytest.approx(db[:, around].mean(axis=1), abs=1e-9)


def test_level_and_floor_are_smoothed_with_0_15_s_and_3_s_time_constants():
    w = _watch()
    _feed(w, [np.nan], psd=_hot_psd(0.0))  # the first frame starts both at -40 dB
    states = []
    for i in range(1, 6):
        p = np.full((1, FREQS.size), 1e-3)  # everything 10 dB up
        _feed(w, [np.nan], psd=p, t0=i * HOP)
        states.append(w.mode_states()[0])
    n = np.arange(1, 6)
    lv = -40.0 + 10 * (1 - np.exp(-HOP / 0.15) ** n)
    fl = -40.0 + 10 * (1 - np.exp(-HOP / 3.0) ** n)
    assert [s["level_db"] for s in states] == pytest.approx(lv.tolist(), abs=1e-9)
    assert [s["over_floor_db"] for s in states] == pytest.approx((lv - fl).tolist(), abs=1e-9)


def test_mode_states_name_the_worst_group_and_its_motors():
    w = _watch(2)
    _feed(w, np.array([[_rpm(40.0), _rpm(2.0)]]))
    (s,) = w.mode_states()
    assert s["state"] == "crossing" and s["motors"] == [2] and s["order"] == 1.0
    assert s["rpm"] == _rpm(2.0) and s["watch_rpm"] == pytest.approx((60 * (FN - W), 60 * (FN + W)))
    w = _watch(2)
    _feed(w, np.array([[_rpm(40.0), _rpm(-35.0)]]))
    (s,) = w.mode_states()
    assert s["state"] == "clear" and s["motors"] == [2] and s["motor"] == 2  # the nearest order


def test_the_json_of_events_bands_and_readings_keeps_its_stated_precision():
    # the JSON lines are what a person files and a script reads: each figure rounded to the places
    # the field promises (Hz to 0.01, RPM to 0.1, dB to 0.01, seconds to 0.1 ms / 1 ms), no coarser
    from monitor.crossing import CrossingEvent, MotorReading, ObservedBand

    m = MotorReading(2, 12345.678, 205.7777, "crossing")
    assert m.as_dict() == {"motor": 2, "rpm": 12345.7, "order_hz": 205.78, "state": "crossing"}
    e = CrossingEvent(1.234567, "crossing", "nearing", "arm flap", 178.1234, 1.0, "1x", 2, 10687.456, 178.1243,
                      -3.14159, -20.0, (10366.66, 11007.77), (10500.04, 10870.06), (m,), "why", True)
    d = e.as_dict()
    assert (d["t_s"], d["mode_hz"], d["rpm"], d["order_hz"], d["level_db"], d["over_floor_db"]) == \
        (1.2346, 178.12, 10687.5, 178.12, -3.14, 16.86)
    assert d["predicted_rpm"] == [10366.7, 11007.8] and d["watch_rpm"] == [10500.0, 10870.1]
    assert d["motors"] == [m.as_dict()] and d["rpm_estimated"] is True and d["previous"] == "nearing"
    b = ObservedBand("arm flap", 178.1234, 1.0, "1x", (1, 2), 10400.44, 10990.06, -2.3456, (10366.66, 11007.77),
                     3, 1.23456, float("nan"))
    bd = b.as_dict()
    assert (bd["mode_hz"], bd["observed_rpm"], bd["predicted_rpm"], bd["peak_db"], bd["t_start_s"], bd["t_end_s"]) \
        == (178.12, [10400.4, 10990.1], [10366.7, 11007.8], -2.35, 1.235, None)


# ----------------------------------------------------------------- several groups and motors at once
# (the rules above on one group; here two groups crossing together, motors that differ, and what
# each event, band and mode state says about them)

SKIP = pytest.mark.parametrize("skip_held", [True, False])


def _two_modes(motors=2, f_b=600.0, skip_held=True):
    """Mode A (200 Hz, crossed by 1x) and mode B (``f_b``): at 600 Hz the 3x of the same speed
    crosses it, with a narrower band in speed (16.953 Hz of 3x is 5.651 Hz of 1x)."""
    w = CrossingWatch(Profile("bench", 3, "clamped", (Mode("arm", FN, ZETA, "pitch"),
                                                       Mode("plate", f_b, ZETA, "roll"))), motors, FREQS, HOP)
    w.skip_held = skip_held
    return w


@SKIP
def test_two_groups_crossing_together_keep_their_own_bands_starts_and_motors(skip_held):
    w = _two_modes(skip_held=skip_held)
    f1 = np.arange(FN - 30.0, FN + 30.0 + 0.1, 0.5)  # motor 1 sweeps through both
    rpm = np.column_stack([60.0 * f1, np.full(f1.size, 5000.0)])  # motor 2 far from both
    events = _feed(w, rpm)
    w_b = ZETA * 600.0 + BIN / 2 + 0.005 * 600.0
    in_a = rpm[np.abs(f1 - FN) <= W, 0]
    in_b = rpm[np.abs(3 * f1 - 600.0) <= w_b, 0]
    assert in_b.min() > in_a.min() and in_b.max() < in_a.max()  # B enters later, leaves sooner
    bands = {b.mode: b for b in w.observed_bands()}
    assert set(bands) == {"arm", "plate"}
    a, b = bands["arm"], bands["plate"]
    assert (a.rpm_low, a.rpm_high) == (in_a.min(), in_a.max()) and (b.rpm_low, b.rpm_high) == (in_b.min(), in_b.max())
    assert (a.order_name, b.order_name) == ("1x", "blade-pass (3x)") and a.motors == b.motors == (1,)
    assert a.passages == b.passages == 1
    first = {e.mode: e.t_s for e in events if e.state == "crossing"}
    assert (a.t_start_s, b.t_start_s) == (first["arm"], first["plate"])
    assert [(e.mode, e.order_name) for e in events if e.state == "crossing"] == [("arm", "1x"),
                                                                                 ("plate", "blade-pass (3x)")]


@SKIP
@pytest.mark.parametrize("unsettled_hz,settled_hz", [(-4.0, 3.0), (4.0, -3.0)])
def test_a_band_grows_only_by_motors_settled_in_it(skip_held, unsettled_hz, settled_hz):
    # mode B at 330 Hz, crossed by motor 2's 2x; motor 2 sits unsettled (straying 5 % from its
    # line) on one side of B while motor 1 holds A crossing, then settles on the other side: B's
    # observed band is the settled speed only, whichever side the unsettled one was
    w = _two_modes(f_b=330.0, skip_held=skip_held)
    n1, n2 = 10, 10
    m1 = np.full(n1 + n2, _rpm(3.0))
    m2 = np.r_[np.full(n1, 30.0 * (330.0 + unsettled_hz)), np.full(n2, 30.0 * (330.0 + settled_hz))]
    rms = np.column_stack([np.zeros(n1 + n2), np.r_[np.full(n1, 0.05), np.zeros(n2)] * m2])
    events = _feed(w, np.column_stack([m1, m2]), rms=rms)
    assert [(e.mode, e.state, e.motor) for e in events] == [("arm", "crossing", 1), ("plate", "crossing", 2)]
    bands = {b.mode: b for b in w.observed_bands()}
    settled = 30.0 * (330.0 + settled_hz)
    assert (bands["plate"].rpm_low, bands["plate"].rpm_high) == (settled, settled)
    assert bands["plate"].motors == (2,) and bands["arm"].motors == (1,)
    assert (bands["arm"].rpm_low, bands["arm"].rpm_high) == (_rpm(3.0), _rpm(3.0))


@SKIP
def test_a_motor_stepping_over_a_band_already_crossing_widens_it_to_where_it_met_the_mode(skip_held):
    # motor 1 holds the group crossing 3 Hz over the mode; motor 2 steps from 10 Hz under to 15 Hz
    # over it between two frames: the band reaches down to 60 f_n, where motor 2 met the mode
    w = _watch(2)
    w.skip_held = skip_held
    m2 = np.r_[np.full(6, _rpm(-10.0)), np.full(6, _rpm(15.0))]
    _feed(w, np.column_stack([np.full(12, _rpm(3.0)), m2]))
    (b,) = w.observed_bands()
    assert b.rpm_low == pytest.approx(60 * FN, rel=1e-12) and b.rpm_high == _rpm(3.0)
    assert b.motors == (1, 2)


def test_each_passage_of_a_group_keeps_its_own_motors_and_peak():
    # motor 1 crosses, the group clears; then motor 2 crosses alone
    w = _watch(2)
    far = _rpm(60.0)
    rpm = np.array([[_rpm(0.0), far]] + [[far, far]] * 10 + [[far, _rpm(1.0)]] + [[far, far]] * 10)
    events = _feed(w, rpm)
    assert [e.state for e in events] == ["crossing", "clear", "crossing", "clear"]
    first, second = w.observed_bands()
    assert (first.motors, second.motors) == ((1,), (2,))
    assert (second.rpm_low, second.rpm_high) == (_rpm(1.0), _rpm(1.0))
    assert first.peak_db == second.peak_db == pytest.approx(-40.0)  # the flat 1e-4 (deg/s)^2/Hz
    assert second.t_start_s == events[2].t_s


def test_merged_bands_join_the_motors_of_every_passage_and_stay_open_while_one_is():
    w = _watch(2)
    far = _rpm(60.0)
    rpm = np.array([[_rpm(0.0), far]] + [[far, far]] * 10 + [[far, _rpm(1.0)]] * 3)
    _feed(w, rpm)  # motor 1's passage closed, motor 2's still crossing at the end
    (b,) = w.all_bands()
    assert b.motors == (1, 2) and b.passages == 2 and np.isnan(b.t_end_s)
    assert (b.rpm_low, b.rpm_high) == (_rpm(0.0), _rpm(1.0))


def test_the_band_helpers_default_to_telemetry_speeds():
    assert crossing.watch_half_band(FN, ZETA, BIN) == pytest.approx(W, rel=1e-12)
    assert crossing.watch_half_band(FN, ZETA, BIN, True) == pytest.approx(W_EST, rel=1e-12)
    assert crossing.exit_allowance(FN, ZETA) == pytest.approx(ALLOW, rel=1e-12)
    assert crossing.exit_allowance(FN, ZETA, True) == pytest.approx(1.5 * 0.01 * FN, rel=1e-12)


def test_merged_bands_keep_the_mode_the_order_and_when_they_ended():
    w = _watch()
    _, events = _sweep(w, FN - 30.0, FN + 30.0, 0.7)
    (b,) = w.all_bands()
    assert (b.mode, b.mode_hz, b.order, b.order_name, b.motors) == ("arm", FN, 1.0, "1x", (1,))
    assert (b.t_start_s, b.t_end_s, b.passages) == (events[0].t_s, events[1].t_s, 1)


def test_events_name_the_mode_and_the_order_and_say_whether_speeds_were_estimated():
    (e,) = _feed(_watch(), [_rpm(3.0)])
    assert (e.mode, e.order_name, e.estimated) == ("arm", "1x", False)
    (e,) = _feed(_watch(), [_rpm(3.0)], est=True)
    assert e.estimated is True and e.watch_rpm == pytest.approx((60 * (FN - W_EST), 60 * (FN + W_EST)), rel=1e-12)
    w = _watch()
    _feed(w, [_rpm(3.0)], est=True)
    (s,) = w.mode_states()
    assert s["watch_rpm"] == pytest.approx((60 * (FN - W_EST), 60 * (FN + W_EST)), rel=1e-12)
    assert w.observed_bands()[0].mode == "arm"


def test_the_crossing_event_names_the_motor_that_stepped_over_before_one_inside_the_band():
    # motor 1 steps over the band between two frames, motor 2 arrives 0.5 Hz from the mode: the
    # group's crossing is reported at the speed where motor 1 met the mode
    rpm = np.array([[_rpm(-10.0), _rpm(40.0)], [_rpm(15.0), _rpm(0.5)]])
    (e,) = _feed(_watch(2), rpm)
    assert (e.motor, e.rpm, e.order_hz) == (1, pytest.approx(60 * FN, rel=1e-12), FN)
    assert e.reason.startswith("stepped over the band")
    assert [(m.motor, m.state) for m in e.motors] == [(1, "crossing"), (2, "crossing")]
    assert "of M1,2 at" in e.text()  # every motor whose order is in the band


def test_nearing_and_clear_events_name_the_motor_that_set_them():
    # motor 1 steady 30 Hz off; motor 2 closes in from 15 Hz at 600 RPM/s (10 Hz/s of 1x): nearing
    # for motor 2, 0.8 s from the band. Then both settle outside the margin, motor 2 the nearer
    # (25 Hz, motor 1 60 Hz): the group clears, naming motor 2
    rpm = np.array([[_rpm(30.0), _rpm(15.0)]] + [[_rpm(60.0), _rpm(25.0)]] * 10)
    slope = np.array([[0.0, -600.0]] + [[0.0, 0.0]] * 10)
    got = _feed(_watch(2), rpm, slope=slope, se=np.zeros_like(slope))
    assert [(e.state, e.motor) for e in got] == [("nearing", 2), ("clear", 2)]
    assert got[0].reason == f"closing at 10.0 Hz/s, {(15.0 - W) / 10.0:.1f} s to the band"


def test_nearing_raised_by_an_approach_that_stops_holds_for_the_dwell_from_when_it_rose():
    # the dwell counts from the change, even when the change came with no reason to stay (the
    # approach stopped at once): late in a session as at its start
    for t0 in (0.0, 5.0):
        got = _feed(_watch(), [_rpm(40.0)] * 11, slope=[-6000.0] + [0.0] * 10, se=[0.0] * 11, t0=t0)
        assert _states(got) == [("nearing", t0), ("clear", round(t0 + 0.5, 6))]


def test_mode_states_list_every_motor_in_the_worst_groups_state():
    w = _watch(2)
    _feed(w, np.array([[_rpm(-2.0), _rpm(2.0)]]))  # both crossing
    (s,) = w.mode_states()
    assert s["state"] == "crossing" and s["motors"] == [1, 2]
    w = _watch(2)
    _feed(w, np.array([[_rpm(14.0), _rpm(15.0)]]), slope=np.array([[-600.0, -600.0]]), se=np.zeros((1, 2)))
    (s,) = w.mode_states()
    assert s["state"] == "nearing" and s["motors"] == [1, 2]
    # clear, with both motors inside the margin but neither closing in nor hot: the nearest alone
    w = _watch(2)
    _feed(w, np.array([[_rpm(15.0), _rpm(-10.0)]]))
    (s,) = w.mode_states()
    assert s["state"] == "clear" and s["motors"] == [2] and s["motor"] == 2


def test_mode_states_name_the_order_of_the_worst_group_not_the_nearest_order():
    # order 1 of motor 1 sits steady 10 Hz off (inside the margin, not closing: its group clear);
    # order 2 of motor 2 closes in from 15 Hz: that group is nearing, and the mode's state names it
    rpm = np.array([[_rpm(10.0), 30.0 * (FN + 15.0)]])
    w = _watch(2)
    _feed(w, rpm, slope=np.array([[0.0, -600.0]]), se=np.zeros((1, 2)))
    (s,) = w.mode_states()
    assert (s["state"], s["order"], s["motor"], s["motors"]) == ("nearing", 2.0, 2, [2])


@pytest.mark.parametrize(("zeta", "est", "past", "stays"), [
    (0.05, False, 2.0, True),  # the exit allowance is zeta f_n / 4 = 2.5 Hz here, not 1.5 u f_n
    (0.05, False, 3.0, False),
    (ZETA, True, 2.0, True),  # estimated: 1.5 x 1 % of f_n = 3 Hz
    (ZETA, True, 3.5, False),
])
def test_the_exit_allowance_follows_the_damping_and_the_speed_source(zeta, est, past, stays):
    w_half = zeta * FN + BIN / 2 + (0.01 if est else 0.005) * FN
    got = _feed(_watch(zeta=zeta), [_rpm(0.0)] + [_rpm(w_half + past)] * 10, est=est)
    assert [e.state for e in got] == (["crossing"] if stays else ["crossing", "nearing"])


def test_an_order_that_stays_on_one_side_of_a_narrow_band_is_no_step_over():
    # half-hertz bins and a lightly damped 50 Hz mode: the watch band is +-0.6 Hz; 0.7 then 0.8 Hz
    # over it is no crossing, nor is anything else short of passing the mode
    freqs = np.arange(4097) * 0.5
    w = CrossingWatch(Profile("bench", 3, "clamped", (Mode("m", 50.0, 0.002, "pitch"),)), 1, freqs, HOP)
    p = np.full((2, freqs.size), 1e-4)
    assert w.update(np.array([0.0, HOP]), p, np.array([[60 * 50.7], [60 * 50.8]])) == []
    got = w.update(np.array([2 * HOP, 3 * HOP]), p, np.array([[60 * 49.3], [60 * 49.2]]))
    assert [e.state for e in got] == ["crossing"] and got[0].reason.startswith("stepped over")


def test_a_slope_of_unknown_standard_error_is_no_approach():
    assert _feed(_watch(), [_rpm(15.0)], slope=[-1000.0], se=[np.nan]) == []
    assert _states(_feed(_watch(), [_rpm(15.0)], slope=[-1000.0], se=[0.0])) == [("nearing", 0.0)]


def test_the_watch_computes_without_floating_point_warnings():
    # unknown speeds, zero slopes (no closing speed: a division by zero kept out of the result),
    # an order that does not move between frames, a reading that leaps: none raises when numpy is
    # told to raise on every floating-point error
    w = _watch(2)
    rpm = np.array([[np.nan, _rpm(40.0)], [_rpm(0.0), _rpm(40.0)], [_rpm(0.0), np.nan], [_rpm(-10.0), 0.0],
                    [_rpm(15.0), _rpm(-50.0)], [_rpm(15.0), _rpm(-50.0)]])
    slope = np.array([[np.nan, 0.0], [0.0, 0.0], [0.0, np.nan], [0.0, 0.0], [-100.0, 0.0], [0.0, 0.0]])
    with np.errstate(all="raise"):
        got = _feed(w, rpm, slope=slope, se=np.zeros_like(slope), rms=np.zeros_like(slope))
        w.mode_states()
        w.all_bands()
    assert got and got[0].state == "crossing"


def test_the_level_reads_the_half_power_band_widened_by_half_a_bin_and_the_floor_around_it():
    # 2 Hz bins; mode a at 120 Hz, zeta 0.125: band 105..135 Hz, read 104..136 Hz (bins 52..68);
    # mode b at 120 Hz, zeta 0.1: band 108..132 Hz, read 107..133 Hz (bins 54..66); floors over
    # 72..168 Hz (bins 36..84) outside each band. Every edge falls on a bin (exact binary numbers),
    # so each comparison is tested at its boundary. The spectrum's dB is the bin number (rising or
    # falling), so the level is the band's top or bottom bin and the floor the mean bin number
    freqs = np.arange(1025) * 2.0
    w = CrossingWatch(Profile("bench", 3, "clamped", (Mode("a", 120.0, 0.125, "pitch"),
                                                       Mode("b", 120.0, 0.1, "roll"))), 1, freqs, HOP)
    k = np.arange(freqs.size, dtype=float)
    up, down = 10 ** (k / 10), 10 ** (-k / 10)
    level, floor = w.levels(np.stack([up, down]))
    assert level[0] == pytest.approx([68.0, 66.0]) and level[1] == pytest.approx([-52.0, -54.0])
    fa = np.r_[36:53, 68:85]  # 72..104 and 136..168 Hz: outside 105..135
    fb = np.r_[36:54, 67:85]  # 72..106 and 134..168 Hz: outside 108..132
    assert floor[0] == pytest.approx([fa.mean(), fb.mean()]) and floor[1] == pytest.approx([-fa.mean(), -fb.mean()])
    # the lowest bin read (72 Hz, a floor bin) very strong: neither band's level sees it
    spike = np.full(freqs.size, 1e-4)
    spike[36] = 1e6
    level, _ = w.levels(spike[None])
    assert level[0] == pytest.approx([-40.0, -40.0])


def test_a_mode_above_the_spectrum_reads_its_top_bin_for_level_and_floor():
    freqs = np.arange(1025) * 2.0  # up to 2048 Hz
    w = CrossingWatch(Profile("bench", 3, "clamped", (Mode("high", 4000.0, 0.02, "yaw"),)), 1, freqs, HOP)
    psd = np.full((1, freqs.size), 1e-4)
    psd[0, -1] = 1e-2
    level, floor = w.levels(psd)
    assert level[0, 0] == pytest.approx(-20.0) and floor[0, 0] == pytest.approx(-20.0)


def test_passages_are_cut_at_clear_and_where_a_group_turns_back_inside_its_margin():
    from monitor.crossing import CrossingEvent, split_passages

    def ev(t, state, previous, mode="arm", order=1.0):
        return CrossingEvent(t, state, previous, mode, 200.0, order, "1x", 1, 12000.0, 200.0, -40.0, -40.0,
                             (11760.0, 12240.0), (11600.0, 12400.0))

    a = [ev(0, "nearing", "clear"), ev(1, "crossing", "nearing"), ev(2, "nearing", "crossing"),
         ev(3, "crossing", "nearing"), ev(4, "nearing", "crossing"), ev(5, "clear", "nearing")]
    b = [ev(0.5, "crossing", "clear", order=2.0), ev(2.5, "clear", "crossing", order=2.0)]
    c = [ev(1.5, "nearing", "clear", mode="plate")]
    merged = sorted(a + b + c, key=lambda e: e.t_s)
    got = split_passages(["a link message, not an event", *merged, "another"])
    assert [[(e.mode, e.order, e.t_s) for e in p] for p in got] == [  # in the order they ended
        [("arm", 2.0, 0.5), ("arm", 2.0, 2.5)],
        [("arm", 1.0, 0), ("arm", 1.0, 1), ("arm", 1.0, 2)],  # turned back at 3 s: a new passage
        [("arm", 1.0, 3), ("arm", 1.0, 4), ("arm", 1.0, 5)],
        [("plate", 1.0, 1.5)],  # still open at the end
    ]
