"""What a rebuild check keeps of one sweep: the analysis as a dict, the per-axis vibration level
per throttle band, and the arrays the comparison report draws (averaged spectra, fixed-frequency
spectrum, the Campbell map), small enough to store with the run in a logbook.

Level per band: the RMS rate in deg/s over ``LEVEL_FMIN_HZ`` .. the top of the spectrum on each
axis, from the map's PSD averaged over the RPM bins whose median throttle falls in the band,
weighted by their frames: RMS = sqrt(sum(PSD) df) (Parseval's theorem; the PSD is the one-sided
density of :func:`monitor.analysis.sweep_map.psd_frames`, so its integral is the mean square).
Bands are 20 % of throttle wide where the capture knows throttle, else 2500 RPM wide (mean motor
speed). Rigid-body rates below 20 Hz (the bench's slow sway, the person's hand on the clamp)
are left out: frame vibration is what the level is for (common practice).
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np

AXES = ("roll", "pitch", "yaw")
LEVEL_FMIN_HZ = 20.0
THROTTLE_BAND = 0.2  #: throttle band width (0..1)
RPM_BAND = 2500.0  #: RPM band width when throttle is unknown
MIN_BAND_FRAMES = 8  #: a band with fewer frames (2 s at 0.25 s frames, half overlapped) gets no level


@dataclass
class RunSummary:
    """One sweep as the rebuild check sees it. ``analysis`` is :meth:`SweepAnalysis.as_dict` plus
    ``levels``; ``freqs`` (bins,) Hz; ``mean_db`` and ``fixed_db`` (bins, 3) dB re 1 (deg/s)^2/Hz
    and dB over the median; ``map_rpm`` (B,) RPM and ``map_db`` (B, bins, 3) dB re 1 (deg/s)^2/Hz."""

    analysis: dict
    freqs: np.ndarray
    mean_db: np.ndarray
    fixed_db: np.ndarray
    map_rpm: np.ndarray
    map_db: np.ndarray

    @property
    def source(self) -> str:
        return str(self.analysis.get("source", "?"))

    def arrays_blob(self) -> bytes:
        """The arrays as one compressed ``.npz`` (numpy's own format), the map in float16 dB."""
        buf = io.BytesIO()
        np.savez_compressed(buf, freqs=self.freqs.astype(np.float64), mean_db=self.mean_db.astype(np.float32),
                            fixed_db=self.fixed_db.astype(np.float32), map_rpm=self.map_rpm.astype(np.float64),
                            map_db=self.map_db.astype(np.float16))
        return buf.getvalue()

    @classmethod
    def from_parts(cls, analysis: dict, blob: bytes | None) -> RunSummary:
        """From a stored analysis dict and :meth:`arrays_blob` (None: no arrays, empty ones)."""
        if blob:
            with np.load(io.BytesIO(blob), allow_pickle=False) as z:
                return cls(analysis, z["freqs"], z["mean_db"].astype(np.float64), z["fixed_db"].astype(np.float64),
                           z["map_rpm"], z["map_db"].astype(np.float32))
        e = np.zeros(0)
        return cls(analysis, e, np.zeros((0, 3)), np.zeros((0, 3)), e, np.zeros((0, 0, 3)))


def _db(p: np.ndarray) -> np.ndarray:
    return 10.0 * np.log10(np.maximum(p, 1e-20))


def band_levels(freqs: np.ndarray, psd: np.ndarray, frames: np.ndarray, rpm: np.ndarray,
                throttle: np.ndarray) -> list[dict]:
    """Per-axis RMS rate (deg/s) per throttle band (or RPM band) from a map's bins: ``psd`` (B,
    bins, 3) (deg/s)^2/Hz, ``frames`` (B,), ``rpm`` (B,), ``throttle`` (B,) 0..1 or NaN."""
    if rpm.size == 0:
        return []
    df = float(freqs[1] - freqs[0])
    sel = freqs >= LEVEL_FMIN_HZ
    ms = psd[:, sel, :].sum(axis=1) * df  # (B, 3) mean square per RPM bin
    by_throttle = bool(np.all(np.isfinite(throttle)))
    key = throttle if by_throttle else rpm
    width = THROTTLE_BAND if by_throttle else RPM_BAND
    idx = np.floor(key / width + 1e-9).astype(int)
    out = []
    for b in np.unique(idx):
        pick = idx == b
        n = float(frames[pick].sum())
        if n < MIN_BAND_FRAMES:
            continue
        mean_sq = (ms[pick] * frames[pick, None]).sum(axis=0) / n
        out.append({"by": "throttle" if by_throttle else "rpm", "low": round(b * width, 3),
                    "high": round((b + 1) * width, 3), "frames": int(n),
                    "rms_dps": {a: round(float(np.sqrt(v)), 5) for a, v in zip(AXES, mean_sq, strict=True)}})
    return out


def summarise(a) -> RunSummary:
    """The summary of a :class:`monitor.analysis.sweep.SweepAnalysis`."""
    m = a.map
    d = a.as_dict()
    d["levels"] = band_levels(m.freqs, m.psd, m.frames, m.rpm, m.throttle)
    return RunSummary(d, np.asarray(m.freqs, float), _db(m.mean_psd), np.asarray(a.fixed_db, float),
                      np.asarray(m.rpm, float), _db(m.psd).astype(np.float32))
