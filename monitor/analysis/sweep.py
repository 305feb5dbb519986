"""A sweep's whole analysis: map, modes, bands, imbalance and guidance from one :class:`Record`.

Pure numpy after the record is loaded. Speeds come from the motor telemetry; a record without it
is followed on one speed estimated from each frame's spectrum (the harmonic-sum estimate of
:mod:`monitor.rpm_estimate`, the live engine's), and every result says so (``estimated``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..orders import order_label, order_multipliers
from ..rpm_estimate import RpmEstimator
from .guidance import guidance
from .imbalance import Imbalance, rank_imbalance
from .record import Record
from .sweep_map import SweepMap, build_map, frame_length, on_grid, psd_frames, speeds_at
from .sweep_modes import Band, SweepMode, find_modes, order_bands

MASKED_ORDERS = [float(k) for k in range(1, 13)]  #: order lines left out of the fixed spectrum (1x..12x)


@dataclass
class SweepAnalysis:
    record: Record
    blades: int
    estimated: bool  #: speeds estimated from the spectrum (no telemetry)
    map: SweepMap
    fixed_db: np.ndarray  #: (bins, 3) the fixed-frequency spectrum the modes come from
    modes: list[SweepMode]
    bands: list[Band]
    imbalance: Imbalance
    advice: list[str]
    frame_t: np.ndarray  #: (F,) frame centre times s
    frame_rpm: np.ndarray  #: (F,) mean speed of each frame (NaN: stopped or unknown)
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        m = self.map
        swept = [round(float(m.rpm.min())), round(float(m.rpm.max()))] if m.rpm.size else None
        return {
            "source": self.record.source,
            "sample_rate_hz": self.record.fs_hz,
            "duration_s": round(self.record.duration_s, 3),
            "motors": self.record.motors,
            "blades": self.blades,
            "rpm_estimated": self.estimated,
            "rpm_swept": swept,
            "frame_s": round(m.frame_s, 4),
            "bin_rpm": round(m.bin_rpm, 1),
            "modes": [md.as_dict() for md in self.modes],
            "bands": [b.as_dict() for b in self.bands],
            "imbalance": self.imbalance.as_dict(),
            "guidance": self.advice,
            "conditions": (self.record.meta or {}).get("conditions", {}),
            "notes": self.notes + self.record.notes,
        }


def orders_followed(blades: int) -> list[tuple[float, str]]:
    """The orders followed (1x, 2x, blade-pass, twice blade-pass), each once (2 blades: 1x, 2x, 4x)."""
    ks = sorted({float(k) for k in order_multipliers(blades)})
    return [(k, order_label(k, blades)) for k in ks]


def analyse(rec: Record, blades: int = 2, estimate_rpm: bool | None = None,
            notches: list[tuple[float, float]] = ()) -> SweepAnalysis:
    """The analysis of ``rec`` with props of ``blades`` blades. ``estimate_rpm`` forces (True) or
    forbids (False) the spectral speed estimate; by default it is used when there is no telemetry.
    ``notches`` [(centre Hz, width Hz)]: filters to judge against the modes found."""
    n = frame_length(rec.fs_hz)
    grid, valid = on_grid(rec.time_s, rec.gyro_dps, rec.fs_hz)  # lost blocks stay holes
    starts, frames = psd_frames(grid, rec.fs_hz, n, n // 2, None if valid.all() else valid)
    freqs = np.fft.rfftfreq(n, 1.0 / rec.fs_hz)
    tc = rec.time_s[0] + (starts + n / 2) / rec.fs_hz if starts.size else np.zeros(0)
    usable = np.all(np.isfinite(frames[:, :1, :]), axis=(1, 2))  # frames under half real: left out
    frames = np.where(usable[:, None, None], frames, 0.0).astype(np.float32)
    have = rec.motors > 0 and rec.rpm_time_s.size >= 2 and np.any(np.nan_to_num(rec.rpm) > 0)
    estimated = (not have) if estimate_rpm is None else bool(estimate_rpm)
    notes = []
    if starts.size and not usable.all():
        notes.append(f"{np.count_nonzero(~usable)} of {starts.size} frames had under half their samples (lost "
                     f"blocks: {100 * (1 - valid.mean()):.0f} % of the session missing) and were left out")
    if estimated:
        est = RpmEstimator(freqs, blades)
        speeds = np.array([[est.estimate(fr.sum(axis=1))] for fr in frames]) if frames.shape[0] else np.zeros((0, 1))
        throttle = None
        notes.append("motor speed estimated from the gyro spectrum (no telemetry): one speed for all motors")
    else:
        speeds = speeds_at(tc, rec.rpm_time_s, rec.rpm)
        throttle = speeds_at(tc, rec.rpm_time_s, rec.throttle) if np.any(np.isfinite(rec.throttle)) else None
    speeds = np.where(usable[:, None], speeds, np.nan)
    m = build_map(frames, freqs, speeds, throttle, frame_s=n / rec.fs_hz)
    modes, fixed = find_modes(m, MASKED_ORDERS)
    bands = order_bands(m, modes, orders_followed(blades))
    imb = rank_imbalance(frames, float(freqs[1]), speeds) if not estimated else \
        Imbalance("not separable", [], "no motor telemetry: imbalance needs each motor's own speed")
    if m.rpm.size == 0:
        notes.append("no frame with every motor turning: nothing swept")
    known = np.all(np.isfinite(speeds), axis=1) if speeds.size else np.zeros(0, bool)
    fr = np.where(known, np.where(known[:, None], speeds, 0.0).mean(axis=1), np.nan) if speeds.size else \
        np.zeros(0)
    advice = guidance(modes, bands, rec.fs_hz, notches)
    return SweepAnalysis(rec, blades, estimated, m, fixed, modes, bands, imb, advice, tc, fr, notes)
