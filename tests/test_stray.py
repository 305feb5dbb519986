"""Stray peaks on the simulator's builds and on synthetic spectra.

Against the simulator's truth: the scenario files' modes (invented airframes). Frequencies of a
resonance peak in a PSD: the peak of |H|^2 of a lightly damped mode is within zeta^2 f_n of f_n
(Rao, Mechanical Vibrations), far below the tolerances used here.
"""

from __future__ import annotations

import numpy as np
import pytest

from monitor.profile import Mode, Profile, load_profile
from monitor.stray import StrayPeakFinder, half_power_width_hz
from simulators.scenario import load_scenario

from .conftest import judge_items, sim_items, true_profile

PROFILES = __import__("pathlib").Path(__file__).resolve().parents[1] / "monitor" / "profiles"
GOOD_BUILDS = ["quillback7", "quillback7_braced", "brisling5", "pipit3", "brisling5_chipped_prop"]


@pytest.mark.parametrize("scenario", GOOD_BUILDS)
@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_no_stray_peak_on_a_good_build_with_its_profile(scenario, seed):
    # every true mode is in the profile: nothing else on the frame resonates, so nothing is stray
    # (the chipped prop is a good frame with one heavy prop: an order, not a resonance)
    eng, _ = judge_items(sim_items(scenario, seed), true_profile(scenario))
    assert [p.as_dict() for p in eng.stray_peaks()] == []


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_loose_stack_is_one_stray_peak_at_its_frequency(seed):
    # the loose-stack build has one extra mode at 96.0 Hz (zeta 0.012) that the good build's
    # profile does not know: exactly one report, within 1.5 % of it
    eng, events = judge_items(sim_items("brisling5_loose_stack", seed), load_profile(PROFILES / "brisling5.toml"))
    strays = eng.stray_peaks()
    assert len(strays) == 1, [p.as_dict() for p in strays]
    assert abs(strays[0].freq_hz - 96.0) / 96.0 < 0.015
    assert len([e for e in events if getattr(e, "freq_hz", None) is not None]) == 1


@pytest.mark.parametrize("scenario", ["quillback7", "brisling5", "pipit3", "brisling5_loose_stack"])
def test_without_a_profile_every_report_is_a_true_resonance_and_none_twice(scenario):
    # no profile: the stray search is all there is. No report may be an order line (or an order
    # folded back from above the Nyquist frequency): each lies near a true mode; no resonance is
    # reported twice on one axis; the strongly excited modes are found (measured per scenario:
    # see DEVELOPERS.md; weakly excited ones, seen only while an order sits on them, are not)
    sc = load_scenario(scenario)
    eng, _ = judge_items(sim_items(scenario, 1), Profile(sc.airframe, sc.motors.blades))
    true = np.array([m.freq_hz for m in sc.modes])
    found = eng.stray_peaks()
    for p in found:
        assert np.min(np.abs(true - p.freq_hz) / true) < 0.08, (p.freq_hz, true)
    for i, a in enumerate(found):
        for b in found[i + 1 :]:
            assert not (a.axis == b.axis and abs(a.freq_hz - b.freq_hz) <= 0.03 * a.freq_hz), (a, b)
    near = {float(t) for t in true for p in found if abs(p.freq_hz - t) / t < 0.05}
    assert len(near) >= 3


def _frames(n, bins=1025, seed=0):
    rng = np.random.default_rng(seed)
    return rng.exponential(1e-4, (n, bins, 3))


FREQS = np.arange(1025) * 3.90625


def test_synthetic_still_peak_while_the_speed_changes_is_reported_once():
    psd = _frames(60)
    psd[:, 100, 1] += 0.05  # 390.6 Hz on pitch, still
    t = np.arange(60) * 0.2
    rpm = np.stack([6000.0 + 100.0 * t] * 2, axis=1)
    f = StrayPeakFinder(Profile(), FREQS)
    out = f.update_many(t, psd, rpm)
    assert len(out) == 1 and out[0].axis == "pitch" and abs(out[0].freq_hz - 390.6) < 0.5 * 3.9


def test_synthetic_peak_that_follows_the_speed_is_an_order_not_a_stray():
    # a line at 2.5 x the shaft frequency is no order spinrig tracks (1..12): it moves with the
    # speed, so it never holds still for the track; and at 5 x it is excluded outright
    for mult in (2.5, 5.0):
        psd = _frames(60, seed=1)
        t = np.arange(60) * 0.2
        rpm = 3000.0 + 200.0 * t
        for i in range(60):
            k = int(round(rpm[i] / 60 * mult / 3.90625))
            psd[i, k, 0] += 0.05
        f = StrayPeakFinder(Profile(), FREQS)
        assert f.update_many(t, psd, np.stack([rpm, rpm], axis=1)) == []


def test_synthetic_peak_inside_a_profiled_band_is_not_stray():
    psd = _frames(60, seed=2)
    psd[:, 100, 1] += 0.05
    t = np.arange(60) * 0.2
    rpm = np.stack([6000.0 + 100.0 * t] * 2, axis=1)
    prof = Profile("t", 2, "bungee", (Mode("plate", 392.0, 0.03, "pitch"),))
    assert StrayPeakFinder(prof, FREQS).update_many(t, psd, rpm) == []


def test_synthetic_peak_under_the_threshold_is_not_stray():
    # 8 dB over the floor is the threshold; a peak 5 dB over it is not a stray. The floor of an
    # exponential (chi-squared, 2 dof) PSD in dB sits 1.6 dB under its mean (median of ln(X))
    psd = _frames(60, seed=3)
    psd[:, 100, 1] += 3 * 1.0e-4 * 10 ** (5 / 10) / 3
    t = np.arange(60) * 0.2
    rpm = np.stack([6000.0 + 100.0 * t] * 2, axis=1)
    assert StrayPeakFinder(Profile(), FREQS).update_many(t, psd, rpm) == []


def test_synthetic_peak_with_the_speed_held_is_not_stray():
    # 351.6 Hz sits halfway between orders 3 and 4 of 6000 RPM (300 and 400 Hz), clear of both:
    # only the rule "the speed must change while the peak holds still" keeps it out; the same peak
    # under a 12 % speed ramp (the control; orders 3 and 4 stay clear of it) is reported
    t = np.arange(60) * 0.2
    for rpm, reports in ((np.full((60, 2), 6000.0), 0), (np.stack([6000.0 + 60.0 * t] * 2, axis=1), 1)):
        psd = _frames(60, seed=4)
        psd[:, 90, 1] += 0.05
        out = StrayPeakFinder(Profile(), FREQS).update_many(t, psd, rpm)
        assert len(out) == reports, (rpm[-1, 0], out)


def test_an_aliased_order_is_not_stray():
    # fs = 8000 Hz: order 12 of 38000 RPM sits at 7600 Hz and folds back to 400 Hz; it moves with
    # the speed (the other way), and is excluded as an order
    psd = _frames(60, seed=5)
    t = np.arange(60) * 0.2
    rpm = 36000.0 + 50.0 * t
    for i in range(60):
        fa = 8000.0 - 12 * rpm[i] / 60
        psd[i, int(round(fa / 3.90625)), 2] += 0.05
    assert StrayPeakFinder(Profile(), FREQS).update_many(t, psd, np.stack([rpm, rpm], axis=1)) == []


def test_half_power_width_of_a_resonance_is_2_zeta_fn():
    # velocity (mobility) response |H|^2 of one mode: half-power bandwidth exactly 2 zeta f_n
    # (Rao; Inman), read on a fine grid
    fn, z = 200.0, 0.03
    f = np.arange(0, 400, 0.05)
    r = f / fn
    h2 = r**2 / ((1 - r**2) ** 2 + (2 * z * r) ** 2)
    k = int(np.argmax(h2))
    assert half_power_width_hz(h2, k, 0.05) == pytest.approx(2 * z * fn, rel=2e-3)
