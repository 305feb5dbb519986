"""The simulated airframe against single-degree-of-freedom theory and scipy.signal.

Sources: Rao, Mechanical Vibrations, and Inman, Engineering Vibration: displacement
magnification 1/sqrt((1-r^2)^2 + (2 zeta r)^2); logarithmic decrement 2 pi zeta / sqrt(1-zeta^2);
the velocity (mobility) response has half-power bandwidth exactly 2 zeta f_n (REFERENCES.md).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy import signal

from simulators.airframe import ModalFrame
from simulators.physics import BenchPhysics
from simulators.scenario import list_scenarios, load_scenario

FS = 32_000.0
ALL_MODES = [(name, m) for name in list_scenarios() for m in load_scenario(name).modes]
IDS = [f"{name}:{m.freq_hz:g}Hz" for name, m in ALL_MODES]


def single_mode_frame(mode, fs=FS):
    m = replace(mode, axes=(1.0, 0.0, 0.0), coupling=(1.0,), stack_coupling=1.0)
    return ModalFrame((m,), fs)


def magnification(r, zeta):
    return 1.0 / np.sqrt((1 - r**2) ** 2 + (2 * zeta * r) ** 2)


def steady_amplitude(frame, f_hz, fs=FS, blocks=8):
    """Amplitude of the modal rate once the transient has died, fitted by least squares at f_hz."""
    mode = frame.modes[0]
    settle = 12.0 / (mode.damping_ratio * 2 * np.pi * mode.freq_hz)  # 12 time constants
    n = int((settle + 40.0 / f_hz) * fs)
    t = np.arange(n) / fs
    force = np.cos(2 * np.pi * f_hz * t)
    out = np.concatenate([frame.modal_rates(chunk[None, :])[0] for chunk in np.array_split(force, blocks)])
    tail = slice(int(settle * fs), n)
    basis = np.stack([np.cos(2 * np.pi * f_hz * t[tail]), np.sin(2 * np.pi * f_hz * t[tail])], axis=1)
    coef, *_ = np.linalg.lstsq(basis, out[tail], rcond=None)
    return float(np.hypot(*coef))


@pytest.mark.parametrize(("name", "mode"), ALL_MODES, ids=IDS)
def test_steady_state_matches_sdof_magnification(name, mode):
    # Velocity V = F r M(r) / w_n for a unit modal mass, so M(r) = V w_n / (F r); within 1 %.
    wn = 2 * np.pi * mode.freq_hz
    for r in (0.2, 0.5, 0.8, 0.95, 1.0, 1.05, 1.3, 2.0, 3.0):
        frame = single_mode_frame(mode)
        v = steady_amplitude(frame, r * mode.freq_hz)
        measured = v * wn / r
        assert measured == pytest.approx(magnification(r, mode.damping_ratio), rel=0.01), f"r={r}"


@pytest.mark.parametrize(("name", "mode"), ALL_MODES, ids=IDS)
def test_free_decay_logarithmic_decrement(name, mode):
    frame = single_mode_frame(mode)
    n = int(30 / mode.freq_hz * FS)
    impulse = np.zeros((1, n))
    impulse[0, 0] = FS
    x = frame.modal_rates(impulse)[0]
    peaks, _ = signal.find_peaks(x)
    cycles = 10
    delta = np.log(x[peaks[1]] / x[peaks[1 + cycles]]) / cycles
    z = mode.damping_ratio
    assert delta == pytest.approx(2 * np.pi * z / np.sqrt(1 - z * z), rel=0.02)


@pytest.mark.parametrize(("name", "mode"), ALL_MODES, ids=IDS)
def test_half_power_bandwidth(name, mode):
    # Frequency response of the discrete mode filter on a fine grid: f2 - f1 = 2 zeta f_n, f1 f2 = f_n^2.
    (b, a) = single_mode_frame(mode).filters[0]
    fn, z = mode.freq_hz, mode.damping_ratio
    f = np.linspace(fn * (1 - 6 * z), fn * (1 + 6 * z), 40001)
    _, h = signal.freqz(b, a, worN=f, fs=FS)
    mag = np.abs(h)
    above = f[mag >= mag.max() / np.sqrt(2)]
    f1, f2 = above[0], above[-1]
    assert f2 - f1 == pytest.approx(2 * z * fn, rel=0.02)
    assert f1 * f2 == pytest.approx(fn * fn, rel=0.002)
    assert f[np.argmax(mag)] == pytest.approx(fn, rel=1e-3)


def _steady_run(name, throttle, seconds=4.0, seed=3, **spec_overrides):
    sc = load_scenario(name)
    if spec_overrides:
        sc = replace(sc, motors=replace(sc.motors, **spec_overrides))
    ph = BenchPhysics(sc, seed=seed)
    thr = np.full(sc.motors.count, throttle)
    n = int(sc.gyro.rate_hz * 0.02)
    ph.step(int(sc.gyro.rate_hz), thr)  # spin up for 1 s
    counts, rpms = [], []
    for _ in range(int(seconds / 0.02)):
        c, r = ph.step(n, thr)
        counts.append(c)
        rpms.append(r)
    return sc, np.concatenate(counts), np.concatenate(rpms, axis=1)


@pytest.mark.parametrize("name", ["quillback7", "brisling5", "pipit3"])
def test_motor_orders_in_welch(name):
    # Orders at k x RPM / 60 and the blade-pass at blades x RPM / 60 (general vibration practice),
    # found in scipy.signal.welch of the gyro output within one bin.
    sc, counts, rpm = _steady_run(name, 0.45, jitter=0.0)
    fs = sc.gyro.rate_hz
    nper = int(fs)  # 1 Hz bins
    f, p = signal.welch(counts.astype(float), fs=fs, nperseg=nper, axis=0)
    total = p.sum(axis=1)
    floor = np.median(total)
    f1 = rpm.mean() / 60.0
    for k in (1, 2, sc.motors.blades):
        target = k * f1
        i = int(round(target))
        window = total[i - 1 : i + 2]
        peak_bin = i - 1 + int(np.argmax(window))
        assert abs(f[peak_bin] - target) <= f[1] - f[0] + 1e-9
        local = total[max(0, i - 40) : i + 40]
        assert window.max() > 10 * np.median(local) and window.max() > 10 * floor, f"order {k} at {target:.1f} Hz"


def test_gyro_quantised_at_sensitivity_and_clipped_at_full_scale():
    # Counts are integers, so deg/s values are integer multiples of 1/sensitivity; a huge tap
    # drives the output to the declared full scale and no further.
    sc = load_scenario("quillback7")
    sc = replace(sc, gyro=replace(sc.gyro, sens_num=30, sens_den=1, full_scale_dps=1000), taps=())
    ph = BenchPhysics(sc, seed=1)
    ph.tap(0, 65535)
    counts, _ = ph.step(4000, np.zeros(4))
    assert counts.dtype == np.int16
    dps = counts.astype(float) / 30.0
    np.testing.assert_allclose(dps * 30.0, np.round(dps * 30.0), atol=1e-9)
    assert counts.max() == 30000 and counts.min() == -30000  # 1000 deg/s x 30 counts per deg/s


def test_tap_rings_at_the_scenario_modes():
    sc = load_scenario("quillback7")
    sc = replace(sc, taps=(), rigid=replace(sc.rigid, amplitude_dps=0.0))
    ph = BenchPhysics(sc, seed=2)
    ph.step(800, np.zeros(4))
    ph.tap(0, 400)
    counts, _ = ph.step(8000, np.zeros(4))
    # a boxcar periodogram: the decay starts at the record's first sample, where a taper would hide it
    f, p = signal.periodogram(counts.astype(float), fs=8000, window="boxcar", axis=0)
    total = p.sum(axis=1)
    for m in sc.modes:
        i = int(round(m.freq_hz))
        assert total[i - 2 : i + 3].max() > 30 * np.median(total), m.name


def test_deterministic_with_a_seed():
    a = _steady_run("brisling5", 0.3, seconds=0.5, seed=9)[1]
    b = _steady_run("brisling5", 0.3, seconds=0.5, seed=9)[1]
    c = _steady_run("brisling5", 0.3, seconds=0.5, seed=10)[1]
    assert np.array_equal(a, b) and not np.array_equal(a, c)
