"""Tap identification: one 5 s record at 8 kHz with one tap (six modes, gyro-like noise),
through tap finding, decimation, the matrix pencil and the least-squares fit of the decay
(:func:`monitor.analysis.taps.identify_modes`), against a baseline measured in the same
run: scipy.signal.welch of the same record (a spectrum everyone would compute anyway)."""

from __future__ import annotations

import numpy as np
from scipy import signal

from benchmarks.common import median_time, report
from monitor.analysis.taps import analyse_taps, identify_modes

MODES = [(118.0, 0.03, 30.0), (131.0, 0.032, 20.0), (187.0, 0.025, 25.0), (244.0, 0.028, 15.0),
         (312.0, 0.06, 10.0), (405.0, 0.035, 8.0)]


def record(fs=8000.0, seconds=5.0, tap_s=1.0):
    n = int(fs * seconds)
    x = np.random.default_rng(1).normal(0, 0.3, (n, 3))
    i = int(tap_s * fs)
    t = np.arange(n - i) / fs
    for k, (f, z, a) in enumerate(MODES):
        w = 2 * np.pi * f
        x[i:, k % 3] += a * np.exp(-z * w * t) * np.sin(w * np.sqrt(1 - z * z) * t)
    return x, fs


def main(quick: bool = False) -> None:
    x, fs = record()
    _, modes = identify_modes(analyse_taps(x, fs, 2000.0))
    t_pencil = median_time(lambda: analyse_taps(x, fs, 2000.0), repeat=3 if quick else 7)
    t_tap = median_time(lambda: identify_modes(analyse_taps(x, fs, 2000.0)), repeat=3 if quick else 7)
    t_ref = median_time(lambda: signal.welch(x, fs, nperseg=2048, axis=0), repeat=3 if quick else 7)
    report("tap identification (5 s at 8 kHz, one tap, six modes)", [
        ("modes found", f"{len(modes)} of {len(MODES)}: " + ", ".join(f"{m.freq_hz:.1f}" for m in modes) + " Hz"),
        ("identification, median", f"{t_tap * 1000:.0f} ms"),
        ("  of which the pencil (finding, decimation, pencil)", f"{t_pencil * 1000:.0f} ms"),
        ("baseline welch, median", f"{t_ref * 1000:.1f} ms"),
        ("ratio identification / welch", f"{t_tap / t_ref:.0f}x"),
    ])


if __name__ == "__main__":
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    main()
