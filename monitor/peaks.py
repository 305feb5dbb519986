"""Spectral peak interpolation: the fractional bin of a tone from its largest bin and neighbours.

For a Hann window the frequency offset of a tone from its largest bin k follows exactly from the
ratio of the two largest bins, a = |X[k+1]| / |X[k]|: delta = (2a - 1) / (a + 1) bins (T. Grandke,
"Interpolation algorithms for discrete Fourier transforms of weighted signals", IEEE Trans.
Instrum. Meas. 32(2), 1983). Other windows use the same ratio idea with the window's own
transform: the ratio |W(1 - delta)| / |W(delta)| is tabulated once (zero-padded FFT of the window)
and inverted, which is exact for a clean tone whatever the window.
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
        ratios, deltas = _ratio_table(window)
        right = ap >= am
        side = np.where(right, ap, am)
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha = np.where(a0 > 0, side / a0, 0.0)
        delta = np.interp(alpha, ratios, deltas)
        delta = np.where(right, delta, -delta)
    edge = (k == 0) | (k == n - 1)
    return np.where(edge, 0.0, delta)


_TABLES: dict[str, tuple[np.ndarray, np.ndarray]] = {}


def _ratio_table(window: str) -> tuple[np.ndarray, np.ndarray]:
    """(|W(1-d)|/|W(d)|, d) for d in 0..0.5 bins, increasing in the ratio."""
    hit = _TABLES.get(window)
    if hit is None:
        n, pad = 256, 256
        w = signal.get_window(window, n, fftbins=True)
        mag = np.abs(np.fft.rfft(w, n * pad))  # |W| every 1/pad bin
        d = np.arange(0, pad // 2 + 1) / pad
        ratio = mag[pad - np.arange(0, pad // 2 + 1)] / mag[np.arange(0, pad // 2 + 1)]
        order = np.argsort(ratio)
        hit = (ratio[order], d[order])
        _TABLES[window] = hit
    return hit
