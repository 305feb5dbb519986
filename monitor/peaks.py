"""Spectral peaks with interpolated frequency and amplitude.

For a Hann window the frequency offset of a tone from its largest bin k follows exactly from the
ratio of the two largest bins, a = |X[k+1]| / |X[k]|: delta = (2a - 1) / (a + 1) bins (T. Grandke,
"Interpolation algorithms for discrete Fourier transforms of weighted signals", IEEE Trans.
Instrum. Meas. 32(2), 1983). Other windows use a parabola through the log magnitudes of three bins
(the Gaussian fit; J. O. Smith, Spectral Audio Signal Processing, "quadratic interpolation").
"""

from __future__ import annotations

import numpy as np
from scipy import signal


def interpolate_bin(mag: np.ndarray, k: np.ndarray | int, window: str = "hann") -> np.ndarray:
    """Fractional offset (bins, in -0.5..0.5 for a clean tone) of the peak at integer bin(s) ``k``."""
    k = np.asarray(k)
    n = mag.shape[0]
    km = np.clip(k - 1, 0, n - 1)
    kp = np.clip(k + 1, 0, n - 1)
    a0 = mag[k]
    am = mag[km]
    ap = mag[kp]
    if window == "hann":
        right = ap >= am
        side = np.where(right, ap, am)
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha = np.where(a0 > 0, side / a0, 0.0)
            delta = (2 * alpha - 1) / (alpha + 1)
        delta = np.clip(delta, 0.0, 1.0)  # a tone sits between k and the larger neighbour
        delta = np.where(right, delta, -delta)
    else:
        lm, l0, lp = (np.log(np.maximum(v, 1e-300)) for v in (am, a0, ap))
        den = lm - 2 * l0 + lp
        with np.errstate(divide="ignore", invalid="ignore"):
            delta = np.where(den < 0, 0.5 * (lm - lp) / den, 0.0)
        delta = np.clip(delta, -0.5, 0.5)
    edge = (k == 0) | (k == n - 1)
    return np.where(edge, 0.0, delta)


def find_peaks(
    mag: np.ndarray,
    bin_hz: float,
    window: str = "hann",
    min_prominence_db: float = 6.0,
    max_peaks: int = 20,
    fmin_hz: float = 0.0,
) -> list[tuple[float, float, float]]:
    """Peaks of one amplitude spectrum: [(freq Hz, amplitude, prominence dB)], strongest first."""
    db = 20 * np.log10(np.maximum(mag, 1e-12))
    idx, props = signal.find_peaks(db, prominence=min_prominence_db)
    keep = idx * bin_hz >= fmin_hz
    idx, prom = idx[keep], props["prominences"][keep]
    order = np.argsort(mag[idx])[::-1][:max_peaks]
    idx, prom = idx[order], prom[order]
    delta = interpolate_bin(mag, idx, window)
    return [(float((i + d) * bin_hz), float(mag[i]), float(p)) for i, d, p in zip(idx, delta, prom, strict=True)]
