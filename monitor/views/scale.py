"""Mapping spectra onto terminal columns and rows, and the colour scale (pure numpy, no textual)."""

from __future__ import annotations

import numpy as np

#: our own heat scale, dark blue through teal and amber to near white (24 levels)
HEAT = [
    "#0b1026", "#101a3a", "#13264f", "#143364", "#134178", "#0f5088", "#0a5f92", "#066e96",
    "#0a7c94", "#16898e", "#259584", "#389f78", "#4ea86a", "#66b05c", "#80b64f", "#9bba45",
    "#b5bc3f", "#cdbb3e", "#e1b645", "#efad55", "#f6a66e", "#f9ab8d", "#fbc0b0", "#fde3d9",
]
AXIS_COLOURS = ("#5fb3ff", "#ffb454", "#b08cff")  # roll, pitch, yaw
MOTOR_COLOURS = ("#ff6f91", "#7ee081", "#ffd166", "#70d6ff", "#f78c6b", "#c3a6ff", "#a0e7e5", "#ffafcc")


def column_bins(freqs: np.ndarray, columns: int, fmax_hz: float) -> np.ndarray:
    """(columns + 1,) bin edges: column c covers bins edges[c] .. edges[c+1] - 1 (at least one)."""
    nb = int(np.searchsorted(freqs, fmax_hz, side="right"))
    edges = np.linspace(1, max(nb, 2), columns + 1).astype(int)
    edges[1:] = np.maximum(edges[1:], edges[:-1] + 1)
    return np.minimum(edges, len(freqs))


def column_levels_db(psd: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Largest PSD in each column, dB re 1 (deg/s)^2/Hz. ``psd`` (bins,) -> (columns,)."""
    db = 10 * np.log10(np.maximum(psd, 1e-30))
    starts = edges[:-1]
    out = np.maximum.reduceat(db, np.minimum(starts, len(db) - 1))
    return out


def column_of(freq_hz: float, freqs: np.ndarray, edges: np.ndarray) -> int | None:
    """The column showing ``freq_hz``, or None if off the plot."""
    if not len(freqs):
        return None
    k = int(round(freq_hz / (freqs[1] - freqs[0])))
    if k < edges[0] or k >= edges[-1]:
        return None
    return int(np.searchsorted(edges, k, side="right") - 1)


def frequency_of(column: int, freqs: np.ndarray, edges: np.ndarray) -> float:
    lo, hi = edges[column], max(edges[column + 1] - 1, edges[column])
    return float((freqs[lo] + freqs[hi]) / 2)


def level_index(db: np.ndarray, top_db: float, span_db: float, levels: int = len(HEAT)) -> np.ndarray:
    x = (db - (top_db - span_db)) / span_db
    return np.clip((x * levels).astype(int), 0, levels - 1)
