"""Sweep analysis: the order-tracked map against scipy.signal.welch, order lines, Hann amplitude,
modes and bands on synthetic sweeps and on every simulator scenario, imbalance ranking, guidance,
`spinrig analyze` and its report."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from monitor.analysis.guidance import notch_groups, phase_lag_deg
from monitor.analysis.imbalance import rank_imbalance, tone_amplitude
from monitor.analysis.record import Record, load_record
from monitor.analysis.sweep import analyse, orders_followed
from monitor.analysis.sweep_map import build_map, psd_frames, speeds_at
from monitor.analysis.sweep_modes import SweepMode
from simulators.scenario import list_scenarios, load_scenario
from tests.conftest import examples
from tests.sim_helpers import sweep_capture

ROOT = Path(__file__).resolve().parents[1]


# --- the map against the reference library --------------------------------------------------

@settings(max_examples=examples(20), deadline=None)
@given(st.integers(0, 2**31 - 1), st.sampled_from([256, 512, 1024]), st.floats(500.0, 8000.0))
def test_frames_equal_scipy_welch_of_each_segment(seed, n, fs):
    x = np.random.default_rng(seed).normal(0, 3.0, (4 * n, 3)).astype(np.float32)
    starts, frames = psd_frames(x, fs, n, n // 2)
    assert list(starts) == list(range(0, 3 * n + 1, n // 2))
    for i in (0, len(starts) - 1):
        s = starts[i]
        _, ref = signal.welch(x[s:s + n].astype(np.float64), fs, window="hann", nperseg=n, axis=0)
        np.testing.assert_allclose(frames[i], ref, rtol=2e-4, atol=1e-9 * ref.max())


@settings(max_examples=examples(15), deadline=None)
@given(st.integers(0, 2**31 - 1), st.floats(2000.0, 20000.0))
def test_a_steady_bin_of_the_map_equals_scipy_welch_over_its_samples(seed, rpm):
    # Welch 1967: the average of the 50 %-overlapped Hann periodograms is scipy.signal.welch
    fs, n = 4000.0, 512
    x = np.random.default_rng(seed).normal(0, 1.0, (40 * n, 3)).astype(np.float32)
    starts, frames = psd_frames(x, fs, n, n // 2)
    speeds = np.full((starts.size, 4), rpm)
    m = build_map(frames, np.fft.rfftfreq(n, 1 / fs), speeds)
    assert m.rpm.size == 1 and m.frames[0] == starts.size and m.rpm[0] == pytest.approx(rpm)
    _, ref = signal.welch(x.astype(np.float64), fs, window="hann", nperseg=n, noverlap=n // 2, axis=0)
    np.testing.assert_allclose(m.psd[0], ref, rtol=1e-4)


def test_frames_in_different_speed_bins_stay_apart_and_stopped_frames_are_left_out():
    fs, n = 4000.0, 256
    x = np.random.default_rng(3).normal(0, 1.0, (30 * n, 3))
    starts, frames = psd_frames(x, fs, n, n // 2)
    sp = np.zeros((starts.size, 2))
    sp[:20] = 5000.0
    sp[20:40] = 9000.0  # the rest: stopped
    m = build_map(frames, np.fft.rfftfreq(n, 1 / fs), sp, bin_rpm=100.0)
    assert list(m.frames) == [20, 20] and list(np.round(m.rpm)) == [5000, 9000]
    np.testing.assert_allclose(m.psd[0], frames[:20].mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(m.psd[1], frames[20:40].mean(axis=0), rtol=1e-6)


def test_speeds_between_readings_are_linear_and_unknown_outside_them():
    got = speeds_at(np.array([-1.0, 0.0, 0.5, 1.0, 2.0]), np.array([0.0, 1.0]), np.array([[1000.0], [3000.0]]))
    assert np.isnan(got[0, 0]) and np.isnan(got[4, 0])
    assert list(got[1:4, 0]) == [1000.0, 2000.0, 3000.0]


@pytest.mark.parametrize("amp", [0.3, 2.0, 17.0])
def test_hann_tone_amplitude_uses_coherent_gain_and_noise_bandwidth(amp):
    # Harris 1978: Hann coherent gain 0.5 and noise bandwidth 1.5 bins, so a bin-centred tone of
    # amplitude A has a one-sided density peak A^2 / 2 / (1.5 bin)
    fs, n = 4096.0, 1024
    t = np.arange(4 * n) / fs
    f0 = 100 * fs / n
    x = np.column_stack([amp * np.sin(2 * np.pi * f0 * t), np.zeros_like(t), np.zeros_like(t)])
    _, frames = psd_frames(x, fs, n, n)
    assert tone_amplitude(frames[:, 100, 0], fs / n) == pytest.approx(np.full(4, amp), rel=1e-4)


def test_order_cut_follows_k_times_rpm_over_60():
    # Campbell order lines: order k of a shaft at n RPM sits at k n / 60 Hz
    fs, n = 4000.0, 1024
    dur = 40.0
    t = np.arange(int(dur * fs)) / fs
    rpm = 3000 + 9000 * t / dur
    phase = 2 * np.pi * np.cumsum(rpm / 60.0) / fs
    x = np.zeros((t.size, 3))
    x[:, 0] = 4.0 * np.sin(3 * phase) + np.random.default_rng(1).normal(0, 0.05, t.size)
    starts, frames = psd_frames(x, fs, n, n // 2)
    sp = np.interp(t[starts + n // 2], t, rpm)[:, None]
    m = build_map(frames, np.fft.rfftfreq(n, 1 / fs), sp)
    f3, c3 = m.order_cut(3.0)
    f2, c2 = m.order_cut(2.0)
    assert np.allclose(f3, 3 * m.rpm / 60)
    assert np.all(np.nansum(c3, axis=1) > 300 * np.nansum(c2, axis=1))  # the energy is on order 3 only


# --- modes and bands on a synthetic sweep ------------------------------------------------------

def resonant_sweep(f0=180.0, zeta=0.03, fs=4000.0, dur=60.0, seed=0, rpm=(3000.0, 18000.0)):
    """Gyro of a frame with one mode (a digital resonator from the bilinear transform of
    1 / (s^2 + 2 zeta w s + w^2)) driven by broadband noise and by a motor's 1x and 2x."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(dur * fs)) / fs
    speed = rpm[0] + (rpm[1] - rpm[0]) * t / dur
    phase = 2 * np.pi * np.cumsum(speed / 60.0) / fs
    force = rng.normal(0, 1.0, t.size) + (speed / 10000) ** 2 * (3 * np.sin(phase) + 1.5 * np.sin(2 * phase + 1))
    w = 2 * fs * np.tan(np.pi * f0 / fs)  # prewarped, so the digital resonance sits at f0
    b, a = signal.bilinear([w * w], [1, 2 * zeta * w, w * w], fs)
    y = signal.lfilter(b, a, force)
    x = np.column_stack([0.3 * y, y, 0.1 * y]) + rng.normal(0, 0.02, (t.size, 3))
    return Record("<synthetic>", fs, t, x.astype(np.float32), t[::40], speed[::40, None].repeat(4, axis=1),
                  np.full((t[::40].size, 4), np.nan))


@pytest.mark.parametrize(("f0", "zeta"), [(120.0, 0.02), (180.0, 0.03), (280.0, 0.05)])
def test_one_mode_is_found_at_its_frequency_with_its_band(f0, zeta):
    a = analyse(resonant_sweep(f0, zeta), blades=2)
    assert len(a.modes) == 1, [m.freq_hz for m in a.modes]  # order lines are not modes
    md = a.modes[0]
    assert md.freq_hz == pytest.approx(f0, rel=0.01) and md.axis == "pitch"
    assert md.damping_ratio is None or md.damping_ratio == pytest.approx(zeta, rel=0.5)
    one = [b for b in a.bands if b.order == 1.0]
    assert len(one) == 1 and one[0].observed
    true_lo, true_hi = 60 * f0 * (1 - zeta), 60 * f0 * (1 + zeta)
    assert one[0].rpm_low < true_hi and one[0].rpm_high > true_lo  # the band overlaps the true band
    assert one[0].predicted_low == pytest.approx(60 * md.freq_hz * (1 - (md.damping_ratio or 0.03)))


def test_a_sweep_of_pure_order_lines_has_no_modes():
    fs, dur = 4000.0, 40.0
    t = np.arange(int(dur * fs)) / fs
    speed = 3000 + 12000 * t / dur
    phase = 2 * np.pi * np.cumsum(speed / 60.0) / fs
    x = np.column_stack([np.sin(phase), 0.5 * np.sin(2 * phase), 0.2 * np.sin(3 * phase)])
    x = x + np.random.default_rng(2).normal(0, 0.05, x.shape)
    rec = Record("<lines>", fs, t, x.astype(np.float32), t[::40], speed[::40, None], np.full((t[::40].size, 1), np.nan))
    a = analyse(rec, blades=3)
    assert a.modes == []


# --- every simulator scenario ------------------------------------------------------------------

SCENARIOS = sorted(list_scenarios())


@pytest.fixture(scope="module")
def sweeps(tmp_path_factory):
    out = {}
    for name in SCENARIOS:
        path = tmp_path_factory.mktemp("sweep") / f"{name}.spinrec"
        sc = sweep_capture(path, name, seed=1)
        out[name] = (sc, analyse(load_record(path), sc.motors.blades))
    return out


def _tolerance(true_mode) -> float:
    """The promise: within 1 %; a heavily damped mode (zeta 5 % or more: a broad hump, usually weak
    and on a stronger mode's flank, where the interference of the two moves it most) within 3 %."""
    return 0.03 if true_mode.damping_ratio >= 0.05 else 0.01


@pytest.mark.parametrize("name", SCENARIOS)
def test_every_mode_found_is_a_true_mode_within_its_tolerance(sweeps, name):
    # no false modes: each found lies within its tolerance of a true one (seed 1; seeds 1-2 of every
    # scenario measured in DEVELOPERS, worst +2.8 % on quillback7's 312 Hz, 6 % damped)
    sc, a = sweeps[name]
    assert a.modes
    for md in a.modes:
        tm = min(sc.modes, key=lambda m: abs(m.freq_hz - md.freq_hz))
        assert abs(md.freq_hz / tm.freq_hz - 1) <= _tolerance(tm), (md.freq_hz, tm.freq_hz)
        assert md.freq_sd_hz is not None and 0 < md.freq_sd_hz < 0.02 * md.freq_hz


@pytest.mark.parametrize("name", SCENARIOS)
def test_every_mode_an_order_crosses_is_found(sweeps, name):
    # every true mode that an order the analysis follows (1x, 2x, blade-pass, twice blade-pass)
    # crosses inside the swept range is found within its tolerance; close pairs (the cracked arm's
    # 169/178 Hz, the braced frame's 139/152 Hz) are two modes. The one mode not found: the Pipit
    # 3's 472 Hz at 7 % damping, a shoulder between 388 and 575 Hz (its time constant is 4.8 ms)
    sc, a = sweeps[name]
    lo, hi = float(a.map.rpm.min()), float(a.map.rpm.max())
    found = [md.freq_hz for md in a.modes]
    for tm in sc.modes:
        crossed = [k for k, _ in orders_followed(sc.motors.blades) if lo <= 60 * tm.freq_hz / k <= hi]
        if not crossed or tm.damping_ratio > 0.065:
            continue
        best = min(found, key=lambda f: abs(f - tm.freq_hz))
        assert abs(best / tm.freq_hz - 1) <= _tolerance(tm), (tm.freq_hz, best, found)
        assert sum(abs(f / tm.freq_hz - 1) <= _tolerance(tm) for f in found) == 1  # and once


@pytest.mark.parametrize("name", SCENARIOS)
def test_damping_ratios_where_the_spectrum_resolves_them(sweeps, name):
    # where the true half-power width 2 zeta f spans 3 bins or more and a damping is given (not for
    # a close pair, nor a mode raising the spectrum under 3 dB): within 25 % (measured -10..+15 %)
    sc, a = sweeps[name]
    checked = 0
    for md in a.modes:
        tm = min(sc.modes, key=lambda m: abs(m.freq_hz - md.freq_hz))
        if md.damping_ratio is None or 2 * tm.damping_ratio * tm.freq_hz < 3 * a.map.bin_hz:
            continue
        assert md.damping_ratio == pytest.approx(tm.damping_ratio, rel=0.25), (md.freq_hz, tm.damping_ratio)
        checked += 1
    assert checked >= 1
    for md in a.modes:  # a close pair gives no damping for either
        if any(o is not md and abs(o.freq_hz / md.freq_hz - 1) <= 0.10 for o in a.modes):
            assert md.damping_ratio is None


@pytest.mark.parametrize("name", SCENARIOS)
def test_every_strong_isolated_mode_is_found_within_one_percent(sweeps, name):
    # strong (15 dB prominent) and alone (no other true mode within 12 %): within 1 %
    sc, a = sweeps[name]
    true = [m.freq_hz for m in sc.modes]
    strong = [md for md in a.modes if md.prominence_db >= 15.0]
    assert strong
    for md in strong:
        f = min(true, key=lambda x: abs(x - md.freq_hz))
        alone = all(abs(o - f) > 0.12 * f for o in true if o != f)
        if alone:
            assert md.freq_hz == pytest.approx(f, rel=0.01)


@pytest.mark.parametrize("name", SCENARIOS)
def test_order_one_bands_overlap_the_true_bands(sweeps, name):
    sc, a = sweeps[name]
    # modes with no other true mode within 12 % (a close pair's weaker crossing hides in the
    # stronger one's: its band is not asserted)
    seen = [b for b in a.bands if b.order == 1.0 and b.observed and b.over_trend_db >= 6.0]
    assert seen
    for b in seen:
        tm = min(sc.modes, key=lambda m: abs(m.freq_hz - b.mode_hz))
        if any(o is not tm and abs(o.freq_hz - tm.freq_hz) <= 0.12 * tm.freq_hz for o in sc.modes):
            continue
        lo, hi = 60 * tm.freq_hz * (1 - tm.damping_ratio), 60 * tm.freq_hz * (1 + tm.damping_ratio)
        assert b.rpm_low < hi and b.rpm_high > lo, (b.mode_hz, b.rpm_low, b.rpm_high, lo, hi)
        assert b.throttle_low is not None and 0 < b.throttle_low <= b.throttle_high <= 1


def test_the_cracked_arm_mode_is_lower_than_the_stock_one(sweeps):
    stock = min(m.freq_hz for m in sweeps["brisling5"][1].modes)
    cracked = min(m.freq_hz for m in sweeps["brisling5_cracked_arm"][1].modes)
    truth = min(m.freq_hz for m in load_scenario("brisling5_cracked_arm").modes)
    assert cracked < 0.97 * stock and cracked == pytest.approx(truth, rel=0.02)


# --- imbalance -------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def solo_runs(tmp_path_factory):
    out = {}
    for name in ("brisling5", "brisling5_chipped_prop"):
        path = tmp_path_factory.mktemp("solo") / f"{name}.spinrec"
        sweep_capture(path, name, seed=2, one_at_a_time=True)
        out[name] = path
    return out


def test_the_chipped_prop_ranks_first_and_is_flagged(solo_runs):
    a = analyse(load_record(solo_runs["brisling5_chipped_prop"]), 3)
    rows = a.imbalance.figures
    assert a.imbalance.method == "one at a time"
    assert rows[0]["motor"] == 2 and rows[0]["flagged"] and not any(r["flagged"] for r in rows[1:])
    # the scenario's imbalances are 0.25, 0.66, 0.24, 0.23 g mm: about 2.7x the median
    assert 2.0 <= rows[0]["ratio"] <= 3.5


def test_good_props_are_not_flagged(solo_runs):
    a = analyse(load_record(solo_runs["brisling5"]), 3)
    assert len(a.imbalance.figures) == 4 and not any(r["flagged"] for r in a.imbalance.figures)


def test_motors_running_together_at_one_speed_are_not_ranked(sweeps):
    imb = sweeps["brisling5_chipped_prop"][1].imbalance
    assert imb.method == "not separable" and imb.figures == [] and "one at a time" in imb.note


def test_motors_at_separate_speeds_are_ranked_from_one_run():
    fs, n = 4000.0, 1024
    t = np.arange(int(30 * fs)) / fs
    speeds = np.array([6000.0, 7000.0, 8000.0, 9000.0])  # 1x lines 16 Hz apart: 4 bins and more
    unbalance = np.array([1.0, 1.0, 3.0, 1.0])
    x = np.zeros((t.size, 3))
    for s, u in zip(speeds, unbalance, strict=True):
        x[:, 0] += u * (s / 1000) ** 2 * 0.01 * np.sin(2 * np.pi * s / 60 * t)
    x += np.random.default_rng(0).normal(0, 0.001, x.shape)
    starts, frames = psd_frames(x, fs, n, n // 2)
    imb = rank_imbalance(frames, fs / n, np.tile(speeds, (starts.size, 1)))
    assert imb.method == "separated speeds"
    assert [r["motor"] for r in imb.figures][0] == 3 and imb.figures[0]["flagged"]
    assert imb.figures[0]["ratio"] == pytest.approx(3.0, rel=0.05)


# --- guidance ----------------------------------------------------------------------------------

def test_phase_costs_are_those_of_the_reference_filters():
    b, a = signal.butter(2, 100.0, fs=4000.0)
    # a second-order Butterworth lags 90 degrees at its cutoff
    assert phase_lag_deg(b, a, 4000.0, 100.0) == pytest.approx(90.0, abs=0.5)
    b, a = signal.iirnotch(300.0, 10.0, fs=4000.0)
    assert 0 < phase_lag_deg(b, a, 4000.0, 50.0) < 5.0


def test_close_modes_share_one_notch():
    modes = [SweepMode(178.0, 0.03, "pitch", 20), SweepMode(192.0, 0.03, "pitch", 8),
             SweepMode(265.0, 0.025, "roll", 19)]
    groups = notch_groups(modes)
    assert [len(g) for _, _, g in groups] == [2, 1]
    centre, width, _ = groups[0]
    assert centre - width / 2 <= 178 * 0.97 and centre + width / 2 >= 192 * 1.03


# --- the command and its report ------------------------------------------------------------------

def spinrig(*args):
    return subprocess.run([sys.executable, "-m", "monitor", *args], capture_output=True, text=True, cwd=ROOT)


def test_analyze_json_has_the_promised_fields(tmp_path):
    path = tmp_path / "q.spinrec"
    sc = sweep_capture(path, "quillback7", seed=3)
    p = spinrig("analyze", str(path), "--json", "--blades", str(sc.motors.blades))
    assert p.returncode == 0, p.stderr
    d = json.loads(p.stdout)
    assert d["modes"] and d["bands"]
    for m in d["modes"]:
        assert set(m) >= {"freq_hz", "damping_ratio", "axis"} and m["axis"] in ("roll", "pitch", "yaw")
    for b in d["bands"]:
        assert set(b) >= {"mode_hz", "order", "rpm_low", "rpm_high", "peak_db"} and b["rpm_low"] <= b["rpm_high"]
    assert d["rpm_estimated"] is False and d["guidance"]


def test_analyze_without_telemetry_estimates_and_says_so(tmp_path):
    path = tmp_path / "g.spinrec"
    sc = sweep_capture(path, "brisling5", seed=1, telemetry=False)
    p = spinrig("analyze", str(path), "--json", "--blades", "3")
    assert p.returncode == 0, p.stderr
    d = json.loads(p.stdout)
    assert d["rpm_estimated"] is True and any("estimated" in n for n in d["notes"])
    true = np.array([m.freq_hz for m in sc.modes])
    assert d["modes"]
    # measured: 265.6 and 338.0 Hz within 0.3 %; the 178/192 Hz pair merges into one mode at 187 Hz
    # on the estimated speeds (the estimate is noisier than telemetry): within 3 % of 192 Hz
    errors = sorted(float(np.min(np.abs(true - m["freq_hz"]) / true)) for m in d["modes"])
    assert errors[-1] <= 0.03 and all(e <= 0.01 for e in errors[:-1])


@pytest.mark.parametrize(("content", "needle"), [(b"", "capture"), (b"not a capture at all\n" * 4, "byte 0")])
def test_a_bad_file_is_one_line_and_exit_2(tmp_path, content, needle):
    bad = tmp_path / "bad.spinrec"
    bad.write_bytes(content)
    p = spinrig("analyze", str(bad))
    assert p.returncode == 2 and p.stdout == ""
    assert p.stderr.count("\n") == 1 and str(bad) in p.stderr and needle in p.stderr


def test_a_missing_file_is_one_line_and_exit_2(tmp_path):
    p = spinrig("analyze", str(tmp_path / "nope.csv"))
    assert p.returncode == 2 and p.stderr.count("\n") == 1 and "no such file" in p.stderr


def test_report_folder_has_the_page_the_plots_and_the_json(tmp_path, sweeps):
    from monitor.analysis.report import write_report

    a = sweeps["brisling5"][1]
    page = write_report(a, tmp_path / "rep")
    names = sorted(p.name for p in (tmp_path / "rep").iterdir())
    assert names == ["analysis.json", "campbell.png", "orders.png", "report.html", "spectra.png"]
    html = page.read_text(encoding="utf-8")
    assert html.count("data:image/png;base64,") == 3
    assert "<script" not in html and 'src="http' not in html and "<link" not in html  # nothing fetched
    assert json.loads((tmp_path / "rep" / "analysis.json").read_text())["modes"] == a.as_dict()["modes"]
    for png in ("campbell.png", "orders.png", "spectra.png"):
        assert (tmp_path / "rep" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("name", ["brisling5", "pipit3", "quillback7"])
def test_estimated_speeds_are_within_one_percent_of_telemetry(tmp_path, name):
    # the same simulated run (same seed) with and without motor telemetry, frame by frame
    sc = sweep_capture(tmp_path / "t.spinrec", name, seed=1)
    sweep_capture(tmp_path / "g.spinrec", name, seed=1, telemetry=False)
    told = analyse(load_record(tmp_path / "t.spinrec"), sc.motors.blades)
    guess = analyse(load_record(tmp_path / "g.spinrec"), sc.motors.blades)
    assert guess.estimated and not told.estimated
    n = min(told.frame_rpm.size, guess.frame_rpm.size)
    t, e = told.frame_rpm[:n], guess.frame_rpm[:n]
    spinning = np.isfinite(t) & (t > 1500)
    both = spinning & np.isfinite(e)
    assert np.count_nonzero(both) >= 0.9 * np.count_nonzero(spinning)
    assert np.median(np.abs(e[both] - t[both]) / t[both]) <= 0.01  # measured 0.07 to 0.10 %


def test_a_cut_capture_is_analysed_up_to_the_cut_and_says_so(tmp_path):
    path = tmp_path / "b.spinrec"
    sweep_capture(path, "brisling5", seed=1)
    data = path.read_bytes()
    cut = tmp_path / "cut.spinrec"
    cut.write_bytes(data[: int(len(data) * 0.6) + 7])  # mid-chunk, as a pulled cable leaves it
    p = spinrig("analyze", str(cut), "--json", "--blades", "3")
    assert p.returncode == 0, p.stderr
    d = json.loads(p.stdout)
    assert d["notes"] and any("byte" in n or "cut" in n or "end" in n for n in d["notes"])
    assert 0.5 * 64 < d["duration_s"] < 0.7 * 64


def test_the_csv_export_of_a_capture_gives_the_same_modes(tmp_path):
    path = tmp_path / "q.spinrec"
    sweep_capture(path, "quillback7", seed=1)
    assert spinrig("export", str(path), "--csv").returncode == 0
    a = [m["freq_hz"] for m in json.loads(spinrig("analyze", str(path), "--json", "--blades", "3").stdout)["modes"]]
    b = [m["freq_hz"] for m in json.loads(spinrig("analyze", str(path.with_suffix(".csv")), "--json",
                                                   "--blades", "3").stdout)["modes"]]
    assert len(a) == len(b) and np.allclose(a, b, rtol=2e-3)


def test_a_given_notch_says_what_it_covers_and_leaves():
    from monitor.analysis.guidance import notch_check, notch_covers

    a, b = SweepMode(180.0, 0.03, "pitch", 20), SweepMode(265.0, 0.025, "roll", 19)
    assert notch_covers(180.0, 2 * 0.03 * 180.0, a) and not notch_covers(180.0, 2 * 0.029 * 180.0, a)
    said = notch_check(180.0, 30.0, [a, b], 4000.0)
    assert "covers the mode(s) at 180 Hz" in said and "leaves the strong mode(s) at 265 Hz" in said
    bq, aq = signal.iirnotch(180.0, 6.0, fs=4000.0)
    assert f"{phase_lag_deg(bq, aq, 4000.0):.1f} degrees" in said


@pytest.mark.parametrize("bad", ["185", "185:0", "185:400", "a:b", "-3:1"])
def test_a_bad_notch_is_a_usage_error(bad, tmp_path):
    p = spinrig("analyze", str(tmp_path / "x.csv"), "--notch", bad)
    assert p.returncode == 2 and "--notch" in p.stderr


def test_frames_never_join_samples_across_a_lost_block():
    # a tone with a block missing: on the grid the frame is the periodogram of its real samples
    # (the live engine's masked frames), not a spectrum of two pieces glued together
    from monitor.analysis.sweep_map import on_grid

    fs, n = 4000.0, 1024
    t = np.arange(4 * n) / fs
    x = np.column_stack([np.sin(2 * np.pi * 250.0 * t)] * 3).astype(np.float32)
    keep = np.ones(t.size, bool)
    keep[1500:1540] = False  # one lost block inside the second frame
    grid, valid = on_grid(t[keep], x[keep], fs)
    assert grid.shape[0] == t.size and not valid[1500:1540].any() and valid.sum() == keep.sum()
    _, clean = psd_frames(x, fs, n, n // 2)
    _, holed = psd_frames(grid, fs, n, n // 2, valid)
    k = int(round(250.0 / (fs / n)))
    assert holed[2, k, 0] == pytest.approx(clean[2, k, 0], rel=0.1)  # the tone kept (measured -5 %)
    w = signal.get_window("hann", n) * valid[n:2 * n]
    seg = grid[n:2 * n, 0] - grid[n:2 * n, 0][valid[n:2 * n]].mean()
    ref = np.abs(np.fft.rfft(seg * w)) ** 2 * 2 / (fs * np.sum(w ** 2))
    np.testing.assert_allclose(holed[2, 1:-1, 0], ref[1:-1], rtol=1e-3, atol=1e-9 * ref.max())
    _, sparse = psd_frames(grid, fs, n, n // 2, np.arange(t.size) % 3 == 0)
    assert np.all(np.isnan(sparse))  # under half real: no frame


# --- airframes the analysis was never tuned on -------------------------------------------------

@pytest.fixture(scope="module")
def invented_runs(tmp_path_factory):
    from simulators.device import DeviceOptions
    from simulators.faults import FaultPlan
    from simulators.invented import random_scenario
    from simulators.stream import SimStream, StreamOptions
    from tests.sim_helpers import record_capture

    out = []
    for seed in (1001, 1002, 1003, 1004):
        sc = random_scenario(seed)
        path = tmp_path_factory.mktemp("invented") / f"{seed}.spinrec"
        stream = SimStream(sc, DeviceOptions(stream_at_boot=True, seed=1), FaultPlan(), StreamOptions(realtime=False))
        record_capture(path, stream, sc.script_duration_s, port=f"sim://{sc.name}")
        out.append((sc, analyse(load_record(path), sc.motors.blades)))
    return out


def test_airframes_never_seen_keep_the_promises(invented_runs):
    # four random airframes (simulators.invented; seeds not used while the analysis was developed):
    # the crossed modes found within their tolerance, and few modes more than 3 % from every true
    # one. Measured on 100 such airframes (benchmarks/analysis_accuracy.py): 96 % found on the 40
    # the analysis was tuned on, 88 % on the 60 it never saw (most misses inside clusters of modes
    # closer than their half-power bands, which read as fewer modes); these four: 19 of 21, and
    # two modes off (one of a 70/75/95 Hz cluster read 5 % high, one no mode at all)
    crossed = found = false = 0
    for sc, a in invented_runs:
        lo, hi = float(a.map.rpm.min()), float(a.map.rpm.max())
        got = [md.freq_hz for md in a.modes]
        for tm in sc.modes:
            if any(lo <= 60 * tm.freq_hz / k <= hi for k, _ in orders_followed(sc.motors.blades)):
                crossed += 1
                found += any(abs(f / tm.freq_hz - 1) <= _tolerance(tm) for f in got)
        false += sum(all(abs(f / t.freq_hz - 1) > 0.03 for t in sc.modes) for f in got)
    assert crossed >= 15 and found >= 0.85 * crossed, (found, crossed)
    assert false <= 2
