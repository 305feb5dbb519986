"""Which motor or prop is out of balance: each motor's once-per-turn (1x) vibration per RPM^2.

A rotating imbalance of mass-radius m e at shaft rate w gives a force m e w^2 at 1x (any
vibration textbook, e.g. Rao, Mechanical Vibrations, section 3.11, rotating unbalance), so the
1x amplitude divided by (RPM / 1000)^2 is an imbalance figure comparable across speeds, as long
as the motors are compared over the same speeds (the frame's transfer function changes with
frequency). Each motor's figure is the median over its frames; the ranking is by figure and the
ratio to the median of all motors; 2x the median or more is flagged (common practice: a clear
outlier, not the spread between good props).

The 1x amplitude in deg/s of a tone is sqrt(2 x PSD peak x ENBW), ENBW = 1.5 bins for Hann
(Harris 1978), summed as a root-sum-square over the three axes.

Two kinds of run separate the motors: one motor at a time (the others under 300 RPM), or all
motors where their speeds differ by at least four frequency bins at 1x (then each motor's 1x is
its own line). Otherwise the motors' 1x lines sit on each other and no ranking is given.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

FLAG_RATIO = 2.0
STILL_RPM = 300.0
HANN_ENBW_BINS = 1.5


@dataclass
class Imbalance:
    method: str  #: "one at a time", "separated speeds" or "not separable"
    figures: list[dict]  #: per motor: motor, figure (deg/s per (kRPM)^2), ratio, frames, flagged; ranked
    note: str

    def as_dict(self) -> dict:
        rows = [{k: (round(v, 4) if isinstance(v, float) else v) for k, v in d.items()} for d in self.figures]
        return {"method": self.method, "note": self.note, "motors": rows}


def tone_amplitude(psd_peak: np.ndarray, bin_hz: float) -> np.ndarray:
    """Amplitude (deg/s) of a tone from its one-sided Hann PSD peak ((deg/s)^2/Hz)."""
    return np.sqrt(2.0 * np.asarray(psd_peak) * HANN_ENBW_BINS * bin_hz)


def _one_x(frames: np.ndarray, bin_hz: float, rpm: np.ndarray) -> np.ndarray:
    """RSS over axes of the 1x amplitude (deg/s) of each frame (F, bins, 3) at speeds ``rpm`` (F,)."""
    k = np.rint(rpm / 60.0 / bin_hz).astype(int)
    n = frames.shape[1]
    idx = np.clip(k[:, None] + np.arange(-1, 2)[None, :], 0, n - 1)  # +-1 bin
    got = np.take_along_axis(frames, idx[:, :, None], axis=1).max(axis=1)  # (F, 3)
    return np.sqrt(np.sum(tone_amplitude(got, bin_hz) ** 2, axis=1))


def rank_imbalance(frames: np.ndarray, bin_hz: float, speeds: np.ndarray, min_rpm: float = 1500.0) -> Imbalance:
    """Rank the motors from PSD frames (F, bins, 3) and their speeds (F, motors) RPM."""
    motors = speeds.shape[1]
    if motors < 2:
        return Imbalance("not separable", [], "one motor (or one estimated speed): nothing to compare")
    sp = np.nan_to_num(speeds, nan=0.0)
    per: dict[int, list[np.ndarray]] = {m: [] for m in range(motors)}
    solo_frames = 0
    for m in range(motors):
        others = np.delete(sp, m, axis=1)
        solo = (sp[:, m] >= min_rpm) & np.all(others < STILL_RPM, axis=1)
        solo_frames += int(solo.sum())
        if solo.any():
            per[m].append(np.column_stack([sp[solo, m], _one_x(frames[solo], bin_hz, sp[solo, m])]))
    method = "one at a time"
    if solo_frames == 0:
        running = np.all(sp >= min_rpm, axis=1)
        srt = np.sort(sp[running], axis=1)
        gaps = np.diff(srt, axis=1) / 60.0 / bin_hz if srt.size else np.zeros((0, motors - 1))
        sep = running.copy()
        sep[running] = np.all(gaps >= 4.0, axis=1) if gaps.size else False
        if np.count_nonzero(sep) < 10:
            spread = float(np.median(np.ptp(srt, axis=1))) if srt.size else 0.0
            return Imbalance("not separable", [],
                             f"the motors ran together within {spread:.0f} RPM of each other (median), so their 1x "
                             "lines overlap: run them one at a time to rank imbalance")
        method = "separated speeds"
        for m in range(motors):
            per[m].append(np.column_stack([sp[sep, m], _one_x(frames[sep], bin_hz, sp[sep, m])]))
    got = {m: np.vstack(v) for m, v in per.items() if v}
    if len(got) < 2:
        return Imbalance(method, [], "fewer than two motors ran alone: nothing to compare")
    # compare over the speeds every motor covered
    lo = max(float(np.percentile(a[:, 0], 5)) for a in got.values())
    hi = min(float(np.percentile(a[:, 0], 95)) for a in got.values())
    figs = {}
    for m, a in got.items():
        sel = (a[:, 0] >= lo) & (a[:, 0] <= hi) if hi > lo else np.ones(a.shape[0], bool)
        if not np.any(sel):
            sel = np.ones(a.shape[0], bool)
        figs[m] = (float(np.median(a[sel, 1] / (a[sel, 0] / 1000.0) ** 2)), int(sel.sum()))
    med = float(np.median([v[0] for v in figs.values()]))
    rows = []
    for m, (fig, n) in sorted(figs.items(), key=lambda kv: -kv[1][0]):
        ratio = fig / med if med > 0 else float("nan")
        rows.append({"motor": m + 1, "figure": fig, "ratio": ratio, "frames": n, "flagged": bool(ratio >= FLAG_RATIO)})
    missing = sorted(set(range(motors)) - set(got))
    note = f"compared over {lo:.0f} to {hi:.0f} RPM" if hi > lo else "the motors' speed ranges do not overlap"
    if missing:
        note += "; motor " + ", ".join(str(m + 1) for m in missing) + " never ran alone"
    return Imbalance(method, rows, note)
