"""Tap tests: modes from free decays (matrix pencil), tap finding and checks, and `spinrig tap`."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.analysis.pencil import identify
from monitor.analysis.taps import analyse_taps, combine, half_power_zeta, identify_modes
from monitor.profile import load_profile
from tests.conftest import examples
from tests.sim_helpers import tap_capture

ROOT = Path(__file__).resolve().parents[1]


def decay(modes, fs=2000.0, seconds=0.6, channels=3, noise=0.0, seed=0):
    """A sum of damped sinusoids x(t) = A e^(-zeta w t) cos(w_d t + phi), w_d = w sqrt(1 - zeta^2)."""
    t = np.arange(int(seconds * fs)) / fs
    x = np.zeros((t.size, channels))
    for i, (f, z, a) in enumerate(modes):
        w = 2 * np.pi * f
        x[:, i % channels] += a * np.exp(-z * w * t) * np.cos(w * np.sqrt(1 - z * z) * t + 0.4 * i)
    return x + np.random.default_rng(seed).normal(0, noise, x.shape), t


@settings(max_examples=examples(25), deadline=None)
@given(st.lists(st.tuples(st.floats(40, 700), st.floats(0.01, 0.08), st.floats(0.5, 20)), min_size=1, max_size=4)
       .filter(lambda ms: all(abs(a[0] - b[0]) > 0.05 * max(a[0], b[0]) for i, a in enumerate(ms) for b in ms[i + 1:])))
def test_exact_damped_sinusoids_are_recovered_to_their_parameters(modes):
    # Hua and Sarkar 1990: without noise the matrix pencil recovers the poles exactly (to rounding)
    x, _ = decay(modes, seconds=0.4)
    found = identify(x, 1 / 2000.0, fmin=20.0)
    assert len(found) == len(modes), (found, modes)
    for (f, z, a), p in zip(sorted(modes), found, strict=True):
        assert p.freq_hz == pytest.approx(f, rel=1e-6) and p.damping_ratio == pytest.approx(z, rel=1e-4)
        assert max(p.amplitudes) == pytest.approx(a, rel=1e-3)


def test_noise_alone_gives_no_mode():
    x = np.random.default_rng(3).normal(0, 1.0, (1200, 3))
    assert identify(x, 1 / 2000.0) == []


def test_half_power_width_of_a_long_decay_gives_its_damping():
    # a free decay much longer than its time constant has a Lorentzian power spectrum of full
    # width 2 zeta f_n at half power (Ewins, Modal Testing, sec. 3.2); log decrement check beside it
    f, z = 150.0, 0.02
    x, t = decay([(f, z, 5.0)], seconds=2.0)
    assert half_power_zeta(x, 2000.0, f) == pytest.approx(z, rel=0.05)
    # logarithmic decrement over one damped period: delta = 2 pi zeta / sqrt(1 - zeta^2) (Rao; Inman)
    td = 1 / (f * np.sqrt(1 - z * z))
    k = int(round(td * 2000 * 20))
    ratio = np.exp(-z * 2 * np.pi * f * t[0]) / np.exp(-z * 2 * np.pi * f * t[k])
    assert np.log(ratio) / 20 == pytest.approx(2 * np.pi * z / np.sqrt(1 - z * z), rel=0.02)


def _taps_record(gaps=(1.0, 1.2, 1.2), fs=8000.0, double_at=None, clip=None, tail=1.0):
    """Impulse responses of one mode (180 Hz, zeta 0.03) at the given times."""
    n = int((sum(gaps) + tail) * fs)
    x = np.random.default_rng(0).normal(0, 0.02, (n, 3))
    t_taps = np.cumsum(gaps)
    hits = list(t_taps) + ([t_taps[0] + double_at] if double_at else [])
    for t0 in hits:
        i = int(t0 * fs)
        tt = np.arange(n - i) / fs
        x[i:, 1] += 40 * np.exp(-0.03 * 2 * np.pi * 180 * tt) * np.sin(2 * np.pi * 180 * tt)
    if clip:
        x = np.clip(x, -clip, clip)
    return x, fs


def test_taps_are_found_and_each_decay_is_judged():
    x, fs = _taps_record()
    taps = analyse_taps(x, fs, full_scale_dps=2000.0)
    assert [round(t.t_s, 2) for t in taps] == [1.0, 2.2, 3.4] and all(t.usable for t in taps)
    (first,) = combine(taps)  # the pencil's poles, combined
    refined, (m,) = identify_modes(taps)  # ... and fitted to every decay
    assert [len(t.poles) for t in refined] == [1, 1, 1] and abs(first.freq_hz / 180.0 - 1) <= 0.003
    assert m.freq_hz == pytest.approx(180.0, rel=0.003) and m.damping_ratio == pytest.approx(0.03, rel=0.1)
    assert m.taps == 3 and m.axis == "pitch" and m.participation[1] > 0.9 and m.half_power_agrees


def test_a_double_tap_a_clipped_tap_and_a_short_decay_are_not_used():
    x, fs = _taps_record(double_at=0.15)
    assert [t.usable for t in analyse_taps(x, fs)] == [False, True, True]
    assert "double tap" in analyse_taps(x, fs)[0].why
    x, fs = _taps_record(clip=30.0)
    assert all("clipped" in t.why for t in analyse_taps(x, fs, full_scale_dps=30.0))
    x, fs = _taps_record(gaps=(1.0, 1.0), tail=0.2)  # the record ends 0.2 s after the last tap
    short = analyse_taps(x, fs)
    assert [t.usable for t in short] == [True, False] and "too short" in short[1].why


def test_a_light_tap_is_found_and_a_long_decay_is_one_tap():
    # a tap whose largest sample stands only about 15 times over the background's typical summed
    # rate (a light tap, or an arm the gyro hears poorly) is still a tap: its power over a few
    # milliseconds stands far over the background's, whose short-time average is a chi-square mean
    from monitor.analysis.taps import find_taps

    fs = 8000.0
    x = np.random.default_rng(5).normal(0, 0.5, (int(3 * fs), 3))
    t = np.arange(int(1.5 * fs)) / fs
    floor = np.median(np.abs(x).sum(axis=1))
    light = 15 * floor / 2 * np.exp(-0.03 * 2 * np.pi * 180 * t) * np.sin(2 * np.pi * 180 * t)
    x[8000:8000 + t.size, 0] += light
    x[8000:8000 + t.size, 1] += light
    assert np.abs(x).sum(axis=1).max() < 20 * floor  # the single-sample rule of old missed it
    (i,) = find_taps(x, fs)
    assert 8000 <= i <= 8000 + int(0.0015 * fs)  # the peak of the first half-period (1/4 of 5.6 ms)
    # a strong, lightly damped decay (96 Hz, zeta 1.2 %: time constant 138 ms) stays over the
    # threshold for longer than the 0.5 s tap spacing: it is still one tap, not two
    y = np.random.default_rng(6).normal(0, 0.5, (int(3 * fs), 3))
    y[4000:4000 + t.size, 1] += 2000 * np.exp(-0.012 * 2 * np.pi * 96 * t) * np.sin(2 * np.pi * 96 * t)
    (j,) = find_taps(y, fs)
    assert abs(j - (4000 + fs / (4 * 96))) <= 1  # the first crest, a quarter period in
    # background alone, with a gyro offset on each axis: no tap, over many seeds
    for seed in range(20):
        z = np.random.default_rng(seed).normal(0, 0.5, (int(2 * fs), 3)) + [3.0, -2.0, 0.5]
        assert find_taps(z, fs).size == 0


SCENARIOS = ["quillback7", "quillback7_braced", "brisling5", "brisling5_loose_stack", "pipit3"]


@pytest.fixture(scope="module")
def tap_runs(tmp_path_factory):
    out = {}
    for name in SCENARIOS:
        f = tmp_path_factory.mktemp("tap") / f"{name}.spinrec"
        out[name] = (tap_capture(f, name), f)
    return out


@pytest.mark.parametrize("name", SCENARIOS)
def test_tap_modes_of_each_scenario(tap_runs, name):
    # every mode within 0.3 % in frequency and 15 % in damping, and nothing else; the pencil
    # alone placed the Brisling 5's 505 Hz mode 0.4 to 0.7 % low and never found the Pipit 3's
    # weak 7 % mode (gone within ten periods, an eighth of its neighbours). That one is found now,
    # but its five-tap mean scatters by about 0.25 % (11 seeds: -0.53 to +0.33 %, 9 within 0.3 %):
    # it is held to 0.5 % and to three standard errors of its own taps' spread
    from monitor.tap_command import _record

    sc, f = tap_runs[name]
    x, fs, fsd = _record(str(f))
    modes = identify_modes(analyse_taps(x, fs, fsd))[1]
    assert len(modes) == len(sc.modes), (name, [m.freq_hz for m in modes])
    for true in sc.modes:
        best = min(modes, key=lambda m: abs(m.freq_hz - true.freq_hz))
        if true.damping_ratio > 0.06:
            err = abs(best.freq_hz - true.freq_hz)
            assert err <= 0.005 * true.freq_hz and err <= 3 * best.freq_sd_hz / np.sqrt(best.taps), (name, best)
        else:
            assert abs(best.freq_hz / true.freq_hz - 1) <= 0.003, (name, true, best)
        assert abs(best.damping_ratio / true.damping_ratio - 1) <= 0.15, (name, true, best)


def test_spinrig_tap_writes_a_profile_the_watch_uses(tap_runs, tmp_path):
    _, f = tap_runs["quillback7"]
    prof = tmp_path / "frame.toml"
    p = subprocess.run([sys.executable, "-m", "monitor", "tap", str(f), "--json", "--profile", str(prof)],
                       capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert p.returncode == 0, p.stderr
    out = json.loads(p.stdout)
    assert len(out["taps"]) == 5 and len(out["modes"]) == len(load_profile(prof).modes) >= 5
    assert prof.read_text().startswith("# modes from `spinrig tap ")
    # asked before it replaces: without a terminal and without --yes it refuses and keeps the file
    before = prof.read_text()
    p = subprocess.run([sys.executable, "-m", "monitor", "tap", str(f), "--profile", str(prof)],
                       capture_output=True, text=True, timeout=300, cwd=ROOT, stdin=subprocess.DEVNULL)
    assert p.returncode == 2 and "--yes" in p.stderr and prof.read_text() == before
    # the profile closes the loop: the crossing watch takes it
    r = subprocess.run([sys.executable, "-m", "monitor", "replay", str(f), "--headless", "--profile", str(prof)],
                       capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert r.returncode == 0 and "no modes" not in r.stdout + r.stderr, r.stderr


def test_a_live_tap_session_on_a_simulated_frame():
    # sim:// in real time with its script off (motors still): spinrig asks for each tap and, the
    # device being simulated, taps the frame itself; every decay is caught and judged. Five taps
    # (the default: each arm once, then the first again), as a person would be asked for
    p = subprocess.run([sys.executable, "-m", "monitor", "tap", "sim://quillback7?script=0&seed=3", "--json"],
                       capture_output=True, text=True, timeout=240, cwd=ROOT)
    assert p.returncode == 0, p.stderr
    out = json.loads(p.stdout)
    assert [t["tap"] for t in out["taps"]] == [1, 2, 3, 4, 5] and all(t["usable"] for t in out["taps"])
    assert p.stderr.count("tap the frame near the tip of arm") == 5 and p.stderr.count("caught:") == 5
    assert "no tap seen" not in p.stderr
    times = [t["t_s"] for t in out["taps"]]
    assert times == sorted(times) and len(set(times)) == 5
    sc_modes = [118.0, 131.0, 187.0, 244.0, 312.0, 405.0]  # the scenario's true modes
    # where in the stream each tap falls differs from run to run (real time), so the noise under
    # each decay does too; the recorded taps above hold the same 0.5 %, which five taps meet
    # (per tap, the 6 % mode at 312 Hz scatters up to 1.3 %: 40 taps over 8 seeds, measured)
    assert all(min(abs(m["freq_hz"] / f - 1) for f in sc_modes) <= 0.005 for m in out["modes"]), out["modes"]
    assert sorted(min(sc_modes, key=lambda f: abs(m["freq_hz"] - f)) for m in out["modes"]) == sc_modes


def test_the_fitted_curve_of_exact_modes_is_the_decay_itself():
    # the identified poles with least-squares amplitudes rebuild an exact sum of damped sinusoids
    from monitor.analysis.pencil import Pole
    from monitor.analysis.tap_report import fitted_curve

    modes = [(150.0, 0.03, 5.0), (260.0, 0.02, 2.0), (410.0, 0.05, 1.0)]
    x, _ = decay(modes, seconds=0.3)
    poles = [Pole(f, z) for f, z, _ in modes]
    np.testing.assert_allclose(fitted_curve(x, 2000.0, poles), x, atol=1e-9 * np.abs(x).max())
    assert np.all(fitted_curve(x, 2000.0, []) == 0)


def test_tap_report_has_each_decay_and_the_modes(tmp_path):
    path = tmp_path / "taps.spinrec"
    tap_capture(path, "pipit3", taps=3)
    p = subprocess.run([sys.executable, "-m", "monitor", "tap", str(path), "--report", str(tmp_path / "rep")],
                       capture_output=True, text=True, cwd=ROOT)
    assert p.returncode == 0, p.stderr
    names = sorted(q.name for q in (tmp_path / "rep").iterdir())
    assert names == ["report.html", "tap1.png", "tap2.png", "tap3.png", "taps.json"]
    page = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    assert page.count("data:image/png;base64,") == 3 and "<script" not in page
    d = json.loads((tmp_path / "rep" / "taps.json").read_text())
    assert len(d["taps"]) == 3 and d["modes"] and f"report: {tmp_path / 'rep' / 'report.html'}" in p.stdout
