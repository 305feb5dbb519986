"""Motor orders: where each motor's harmonics sit and how strong they are in each frame.

Order k of a motor at mechanical speed n (RPM) sits at k n / 60 Hz; the blade-pass frequency is
blades x n / 60 (general vibration-analysis practice; Campbell diagram order lines f = k n / 60).
spinrig follows four orders per motor: 1x (imbalance), 2x (misalignment), blade-pass and twice
blade-pass.
"""

from __future__ import annotations

import numpy as np

ORDER_NAMES = ("1x", "2x", "blade-pass", "2x blade-pass")


def order_multipliers(blades: int) -> np.ndarray:
    """Multiples of the shaft frequency followed: 1, 2, blades, 2 x blades."""
    return np.array([1.0, 2.0, float(blades), 2.0 * blades])


def order_label(k: float, blades: int) -> str:
    mult = order_multipliers(blades)
    for name, m in zip(ORDER_NAMES, mult, strict=True):
        if m == k:
            return name if name in ("1x", "2x") else f"{name} ({m:g}x)"
    return f"{k:g}x"


def order_freqs(rpm: np.ndarray, blades: int) -> np.ndarray:
    """Order frequencies (..., motors, 4) in Hz for mechanical ``rpm`` (..., motors)."""
    return np.asarray(rpm, dtype=float)[..., None] / 60.0 * order_multipliers(blades)


def order_amplitudes(amp: np.ndarray, freqs: np.ndarray, bin_hz: float, search_bins: int = 1,
                     amp_factor: np.ndarray | None = None, with_axis: bool = True):
    """Amplitude at each order frequency.

    ``amp`` (F, bins, C) amplitude spectra in deg/s, or PSD when ``amp_factor`` (bins,) is given
    (amplitude = sqrt(PSD) x factor, evaluated only at the bins needed); ``freqs`` (F, motors,
    orders) in Hz (NaN where unknown). Returns (rss (F, motors, orders) deg/s, axis (F, motors,
    orders) of the largest channel): the largest bin within +-``search_bins`` of each order,
    root-sum-square over axes.
    """
    f, nbins, c = amp.shape
    k = np.rint(np.where(np.isfinite(freqs), freqs, -1.0) * (1.0 / bin_hz)).astype(np.int64)  # (F, M, K)
    # the largest bin within +-search_bins: gather those bins only (a few per order), then max
    offsets = np.arange(-search_bins, search_bins + 1)
    near = np.clip(k[..., None] + offsets, 0, nbins - 1)  # (F, M, K, S)
    flat = (near + (np.arange(f) * nbins)[:, None, None, None])[..., None] * c + np.arange(c)  # (F, M, K, S, C)
    got = np.take(amp.reshape(-1), flat)
    if amp_factor is not None:  # amplitude^2 = PSD x factor^2: the max is taken on squares, one sqrt at the end
        fac = amp_factor[near]
        got = got * (fac * fac)[..., None]
    else:
        got = got * got
    per_axis2 = got.max(axis=3)  # (F, M, K, C) squared amplitude per axis
    rss = np.sqrt(np.add.reduce(per_axis2, axis=-1))
    bad = (k < 1) | (k >= nbins)
    if not with_axis:
        return np.where(bad, np.nan, rss), None
    return np.where(bad, np.nan, rss), np.where(bad, -1, np.argmax(per_axis2, axis=-1))
