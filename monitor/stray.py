"""Stray peaks: resonances found live that are not in the profile.

A stray peak stays at one frequency while the motor speed changes (so it is not a motor order),
stands at least 8 dB above the spectrum's local floor, and lies outside every profile mode's
half-power band. It is reported once, with its frequency and the axis where it is largest.
Typical causes: a loose part rattling, a cracked arm, a mode the profile has not learnt.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .orders import order_multipliers
from .profile import Profile

AXIS_NAMES = ("roll", "pitch", "yaw")
MIN_OVER_FLOOR_DB = 8.0
MIN_HITS = 3  #: searches (about 5 a second) in which the peak was seen
MIN_SPAN_S = 0.5
MIN_RPM_CHANGE = 0.05  #: relative change of the mean motor speed while the peak held still
FLOOR_BINS = 41


def local_peaks(x: np.ndarray, height: np.ndarray, distance: int = 1) -> np.ndarray:
    """Indices of strict local maxima with ``x >= height`` there, at least ``distance`` apart
    (the higher kept first): ``scipy.signal.find_peaks(x, height=height, distance=distance)``
    for data without flat tops (equal neighbours), in fewer calls (checked against it in tests)."""
    mid = x[1:-1]
    cand = np.flatnonzero((mid > x[:-2]) & (mid > x[2:]) & (mid >= height[1:-1])) + 1
    if distance <= 1 or cand.size < 2 or np.diff(cand).min() >= distance:
        return cand
    blocked = np.zeros(x.shape[0] + 2 * distance, bool)
    keep = []
    for c in cand[np.argsort(-x[cand], kind="stable")].tolist():
        if not blocked[c + distance]:
            keep.append(c)
            blocked[c + 1 : c + 2 * distance] = True  # bins c - distance + 1 .. c + distance - 1
    return np.sort(np.array(keep, dtype=cand.dtype))


@dataclass(frozen=True)
class StrayPeak:
    t_s: float
    freq_hz: float
    axis: str
    over_floor_db: float
    rpm_low: float
    rpm_high: float

    def as_dict(self) -> dict:
        return {"kind": "stray_peak", "t_s": round(self.t_s, 4), "freq_hz": round(self.freq_hz, 2),
                "axis": self.axis, "over_floor_db": round(self.over_floor_db, 1),
                "rpm_low": round(self.rpm_low, 1), "rpm_high": round(self.rpm_high, 1)}

    def text(self) -> str:
        return (f"{self.t_s:8.2f} s  STRAY    peak at {self.freq_hz:6.1f} Hz on {self.axis}, "
                f"{self.over_floor_db:+.1f} dB over the floor, held still from {self.rpm_low:.0f} to "
                f"{self.rpm_high:.0f} RPM: not a motor order and not in the profile")


class StrayPeakFinder:
    def __init__(self, profile: Profile, freqs: np.ndarray, fmin_hz: float = 30.0, fmax_hz: float | None = None):
        self.profile = profile
        self.freqs = freqs
        self.bin_hz = float(freqs[1] - freqs[0])
        self.fmin = fmin_hz
        self.fmax = fmax_hz if fmax_hz is not None else float(freqs[-1]) * 0.9
        self.mult = order_multipliers(profile.blades)
        #: each mode's exclusion zone: its half-power band widened to 2 zeta f_n plus 1.5 bins
        self._mode_hz = np.array([m.freq_hz for m in profile.modes])
        self._mode_tol = np.array([2 * m.damping_ratio * m.freq_hz + 1.5 * self.bin_hz for m in profile.modes])
        self._tracks: dict[int, dict] = {}
        self.reported: list[StrayPeak] = []

    def _excluded(self, f: np.ndarray, rpm: np.ndarray) -> np.ndarray:
        bad = (f < self.fmin) | (f > self.fmax)
        if self._mode_hz.size:
            bad |= (np.abs(f[:, None] - self._mode_hz) <= self._mode_tol).any(axis=1)
        r = rpm[np.isfinite(rpm)]
        if r.size:
            orders = (r[:, None] / 60.0 * self.mult[None, :]).ravel()
            tol = max(3 * self.bin_hz, 0.0)
            bad |= np.any(np.abs(f[:, None] - orders[None, :]) <= tol + 0.03 * orders[None, :], axis=1)
        return bad

    def update_many(self, t_s: np.ndarray, psd: np.ndarray, rpm_mean: np.ndarray) -> list[StrayPeak]:
        """Several frames in time order, as :meth:`update` one after another would see them, with
        the levels in dB of all frames computed in one call.
        ``psd`` (F, bins, 3), ``rpm_mean`` (F, motors)."""
        if t_s.shape[0] == 0:
            return []
        db = 10 * np.log10(np.maximum(psd.sum(axis=2), 1e-30))
        out = []
        for i in range(t_s.shape[0]):
            # row by row: scipy's 1-D median filter is about 17 times faster than its 2-D path
            floor = ndimage.median_filter(db[i], size=FLOOR_BINS, mode="nearest")
            out += self._search(float(t_s[i]), psd[i], db[i], floor, rpm_mean[i])
        return out

    def update(self, t_s: float, psd: np.ndarray, rpm_mean: np.ndarray) -> list[StrayPeak]:
        """One frame: ``psd`` (bins, 3) in (deg/s)^2/Hz, ``rpm_mean`` (motors,). Returns new reports."""
        return self.update_many(np.array([t_s]), psd[None], np.asarray(rpm_mean)[None])

    def _search(self, t_s: float, psd: np.ndarray, db: np.ndarray, floor: np.ndarray,
                rpm_mean: np.ndarray) -> list[StrayPeak]:
        idx = local_peaks(db, floor + MIN_OVER_FLOOR_DB, distance=3)
        known = rpm_mean[np.isfinite(rpm_mean)]
        rpm_level = float(known.mean()) if known.size else np.nan
        out = []
        if idx.size:
            f = self.freqs[idx]
            keep = ~self._excluded(f, rpm_mean)
            for i in idx[keep]:
                key = int(i)
                tr = next((self._tracks[k] for k in (key - 1, key, key + 1) if k in self._tracks), None)
                if tr is None:
                    tr = {"first": t_s, "hits": 0, "rpm_lo": rpm_level, "rpm_hi": rpm_level, "last": t_s,
                          "over": 0.0, "bin": key}
                    self._tracks[key] = tr
                tr["hits"] += 1
                tr["last"] = t_s
                tr["over"] = max(tr["over"], float(db[i] - floor[i]))
                if np.isfinite(rpm_level):
                    tr["rpm_lo"] = np.nanmin([tr["rpm_lo"], rpm_level])
                    tr["rpm_hi"] = np.nanmax([tr["rpm_hi"], rpm_level])
                if not tr.get("reported") and self._qualifies(tr):
                    tr["reported"] = True
                    if not any(abs(r.freq_hz - self.freqs[key]) <= 3 * self.bin_hz for r in self.reported):
                        axis = AXIS_NAMES[int(np.argmax(psd[i]))]
                        from .peaks import interpolate_bin

                        amp = np.sqrt(psd.sum(axis=1))
                        fr = (i + float(interpolate_bin(amp, i))) * self.bin_hz
                        peak = StrayPeak(t_s, fr, axis, tr["over"], float(tr["rpm_lo"]), float(tr["rpm_hi"]))
                        self.reported.append(peak)
                        out.append(peak)
        # forget tracks not seen for 2 s (bounded memory)
        for k in [k for k, tr in self._tracks.items() if t_s - tr["last"] > 2.0 and not tr.get("reported")]:
            del self._tracks[k]
        return out

    @staticmethod
    def _qualifies(tr: dict) -> bool:
        if tr["hits"] < MIN_HITS or tr["last"] - tr["first"] < MIN_SPAN_S:
            return False
        lo, hi = tr["rpm_lo"], tr["rpm_hi"]
        if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= 0:
            return False
        return (hi - lo) / hi >= MIN_RPM_CHANGE
