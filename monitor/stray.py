"""Stray peaks: resonances found live that are not in the profile.

A resonance stays at one frequency while the motor speed changes; a motor order moves with it.
Each search (about 5 a second) takes one frame's PSD summed over axes; a local peak of it is a
stray-peak candidate when

- it stands :data:`MIN_OVER_FLOOR_DB` over the local floor (a 41-bin running median, in dB);
- no order of any motor is near it in that frame: orders 1 to :data:`MAX_ORDER` (which covers the
  blade-pass orders of 2- to 6-blade props and their second harmonics, whatever the profile says)
  and the profile's own, within 3 bins + 3 % plus the distance the order moved during the frame's
  window (its speed trend times half the window);
- it is outside every profile mode's exclusion zone (its half-power band widened to
  max(3 zeta f_n, 3 % f_n) + 1.5 bins each side).

A candidate seen in :data:`MIN_HITS` searches over :data:`MIN_SPAN_S` at one frequency (within a
bin) while the mean motor speed changed by :data:`MIN_RPM_CHANGE`, and by enough to move an order
at that frequency by three bins, is a stray peak (a track that a search finds unseen for over :data:`FORGET_S` starts
again): an order cannot stand still while the speed changes, a resonance does (every order
that passes it lights it up again). It is reported once, at the Gaussian-interpolated centre of
the sum of its frames' spectra, with the axis where it is largest. One resonance is one report: a
later peak on the same axis within the wider of 3 % and the narrower half-power width of an
earlier report updates that report instead of raising a new one.
Typical causes: a loose part rattling, a cracked arm, a mode the profile has not learnt.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage

from .profile import Profile

AXIS_NAMES = ("roll", "pitch", "yaw")
MIN_OVER_FLOOR_DB = 8.0
MIN_HITS = 4  #: searches (about 5 a second) in which the peak was seen
MIN_SPAN_S = 0.5
MIN_RPM_CHANGE = 0.05  #: relative change of the mean motor speed while the peak held still
FLOOR_BINS = 41
MAX_ORDER = 12  #: orders 1..MAX_ORDER of every motor are never stray peaks (covers 2 x 6 blades)
SAME_PEAK_FRACTION = 0.03  #: a later peak this close (or within the half-power width) is the same one
ORDER_TOL_BINS = 3.0
ORDER_TOL_FRACTION = 0.03
FORGET_S = 2.0  #: an unreported track not seen for longer than this starts again


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


def half_power_width_hz(power: np.ndarray, k: int, bin_hz: float) -> float:
    """Width (Hz) of the peak at bin ``k`` of a power spectrum where it stays above half its
    height, linearly interpolated between bins (the half-power bandwidth of a resonance)."""
    half = power[k] / 2.0
    n = power.shape[0]
    lo = k
    while lo > 0 and power[lo - 1] > half:
        lo -= 1
    hi = k
    while hi < n - 1 and power[hi + 1] > half:
        hi += 1
    left = lo - (power[lo] - half) / (power[lo] - power[lo - 1]) if lo > 0 and power[lo] != power[lo - 1] else lo
    right = hi + (power[hi] - half) / (power[hi] - power[hi + 1]) if hi < n - 1 and power[hi] != power[hi + 1] else hi
    return float((right - left) * bin_hz)


@dataclass(frozen=True)
class StrayPeak:
    t_s: float
    freq_hz: float
    axis: str
    over_floor_db: float
    rpm_low: float
    rpm_high: float
    width_hz: float = 0.0  #: half-power width of the peak in the sum of its frames' spectra
    hits: int = 0  #: searches in which it was seen

    def as_dict(self) -> dict:
        return {"kind": "stray_peak", "t_s": round(self.t_s, 4), "freq_hz": round(self.freq_hz, 2),
                "axis": self.axis, "over_floor_db": round(self.over_floor_db, 1),
                "rpm_low": round(self.rpm_low, 1), "rpm_high": round(self.rpm_high, 1),
                "width_hz": round(self.width_hz, 2), "hits": self.hits}

    def text(self) -> str:
        return (f"{self.t_s:8.2f} s  STRAY    peak at {self.freq_hz:6.1f} Hz on {self.axis}, "
                f"{self.over_floor_db:+.1f} dB over the floor, held still from {self.rpm_low:.0f} to "
                f"{self.rpm_high:.0f} RPM: not a motor order and not in the profile")


class StrayPeakFinder:
    def __init__(self, profile: Profile, freqs: np.ndarray, window_s: float = 0.256, fmin_hz: float = 30.0,
                 fmax_hz: float | None = None):
        self.profile = profile
        self.freqs = freqs
        self.bin_hz = float(freqs[1] - freqs[0])
        self.half_window_s = window_s / 2.0
        self.fs = 2.0 * float(freqs[-1])  #: sample rate (the last bin is the Nyquist frequency)
        self.fmin = fmin_hz
        self.fmax = fmax_hz if fmax_hz is not None else float(freqs[-1]) * 0.9
        self.mult = np.union1d(np.arange(1.0, MAX_ORDER + 1.0),
                               [1.0, 2.0, float(profile.blades), 2.0 * profile.blades])
        self._mode_hz = np.array([m.freq_hz for m in profile.modes])
        self._mode_tol = np.array([max(3 * m.damping_ratio, 0.03) * m.freq_hz + 1.5 * self.bin_hz
                                   for m in profile.modes])
        self._tracks: dict[int, dict] = {}
        self.reported: list[StrayPeak] = []
        self._acc: list[np.ndarray] = []  #: each report's accumulated spectrum
        self._anchor: list[int] = []  #: the bin where each report was first made

    def _excluded(self, f: np.ndarray, rpm: np.ndarray, slope: np.ndarray | None = None) -> np.ndarray:
        """Candidates (Hz) too near an order of a motor (RPM, RPM/s) or a profile mode, or out of range."""
        bad = (f < self.fmin) | (f > self.fmax)
        if self._mode_hz.size:
            bad |= (np.abs(f[:, None] - self._mode_hz) <= self._mode_tol).any(axis=1)
        ok = np.isfinite(rpm)
        r = rpm[ok]
        if r.size:
            sl = np.zeros_like(r) if slope is None else np.nan_to_num(np.asarray(slope)[ok])
            orders = (r[:, None] / 60.0 * self.mult[None, :]).ravel()
            moved = (np.abs(sl)[:, None] * self.half_window_s / 60.0 * self.mult[None, :]).ravel()
            # an order above the Nyquist frequency shows folded back (aliased): f -> |f - m fs|
            orders = np.abs(np.mod(orders + self.fs / 2, self.fs) - self.fs / 2)
            tol = ORDER_TOL_BINS * self.bin_hz + ORDER_TOL_FRACTION * orders + moved
            bad |= np.any(np.abs(f[:, None] - orders[None, :]) <= tol[None, :], axis=1)
        return bad

    def update_many(self, t_s: np.ndarray, psd: np.ndarray, rpm_mean: np.ndarray,
                    rpm_slope: np.ndarray | None = None) -> list[StrayPeak]:
        """Several frames in time order, as :meth:`update` one after another would see them, with
        the levels in dB of all frames computed in one call. ``psd`` (F, bins, 3) in
        (deg/s)^2/Hz, ``rpm_mean`` and ``rpm_slope`` (F, motors) RPM and RPM/s."""
        if t_s.shape[0] == 0:
            return []
        total = psd.sum(axis=2)
        db = 10 * np.log10(np.maximum(total, 1e-30))
        out = []
        for i in range(t_s.shape[0]):
            # row by row: scipy's 1-D median filter is about 17 times faster than its 2-D path
            floor = ndimage.median_filter(db[i], size=FLOOR_BINS, mode="nearest")
            sl = None if rpm_slope is None else rpm_slope[i]
            out += self._search(float(t_s[i]), total[i], db[i], floor, psd[i], rpm_mean[i], sl)
        return out

    def update(self, t_s: float, psd: np.ndarray, rpm_mean: np.ndarray, rpm_slope=None) -> list[StrayPeak]:
        """One frame: ``psd`` (bins, 3) in (deg/s)^2/Hz, ``rpm_mean`` (motors,). Returns new reports."""
        sl = None if rpm_slope is None else np.asarray(rpm_slope)[None]
        return self.update_many(np.array([t_s]), psd[None], np.asarray(rpm_mean)[None], sl)

    def _search(self, t_s: float, total: np.ndarray, db: np.ndarray, floor: np.ndarray, per_axis: np.ndarray,
                rpm_mean: np.ndarray, rpm_slope: np.ndarray | None) -> list[StrayPeak]:
        idx = local_peaks(db, floor + MIN_OVER_FLOOR_DB, distance=3)
        known = rpm_mean[np.isfinite(rpm_mean)]
        rpm_level = float(known.mean()) if known.size else np.nan
        out = []
        if idx.size:
            keep = ~self._excluded(self.freqs[idx], rpm_mean, rpm_slope)
            for i in idx[keep].tolist():
                tr = next((self._tracks[k] for k in (i - 1, i, i + 1) if k in self._tracks), None)
                if tr is None:
                    tr = {"first": t_s, "hits": 0, "rpm_lo": rpm_level, "rpm_hi": rpm_level, "last": t_s,
                          "over": 0.0, "bin": i, "sum": np.zeros(total.shape[0]), "axes": np.zeros(3)}
                    self._tracks[i] = tr
                tr["hits"] += 1
                tr["last"] = t_s
                tr["over"] = max(tr["over"], float(db[i] - floor[i]))
                tr["sum"] += total
                tr["axes"] += per_axis[i]
                if np.isfinite(rpm_level):
                    tr["rpm_lo"] = np.nanmin([tr["rpm_lo"], rpm_level])
                    tr["rpm_hi"] = np.nanmax([tr["rpm_hi"], rpm_level])
                if not tr.get("reported") and self._qualifies(tr):
                    tr["reported"] = True
                    new = self._report(t_s, tr)
                    if new is not None:
                        out.append(new)
        # forget unreported tracks a search did not see for over FORGET_S (bounded memory)
        for k in [k for k, tr in self._tracks.items() if t_s - tr["last"] > FORGET_S and not tr.get("reported")]:
            del self._tracks[k]
        return out

    def _peak(self, acc: np.ndarray, anchor: int) -> tuple[float, float, int]:
        """(frequency Hz, half-power width Hz, bin) of the peak of an accumulated spectrum within
        two bins of ``anchor``: Gaussian interpolation, a parabola through the log power of three
        bins (the scatter of single frames averages out in the sum)."""
        n = acc.shape[0]
        lo, hi = max(1, anchor - 2), min(n - 1, anchor + 3)
        j = lo + int(np.argmax(acc[lo:hi]))
        j = min(max(j, 1), n - 2)
        a, b, d = np.log(np.maximum(acc[j - 1 : j + 2], 1e-300))
        den = a - 2 * b + d
        delta = 0.5 * (a - d) / den if den < 0 else 0.0
        fr = float((j + float(np.clip(delta, -0.5, 0.5))) * self.bin_hz)
        return fr, half_power_width_hz(acc, j, self.bin_hz), j

    @staticmethod
    def _same(a: StrayPeak, b: StrayPeak) -> bool:
        """One resonance: the same axis, within the wider of 3 % and the narrower half-power width."""
        return a.axis == b.axis and abs(a.freq_hz - b.freq_hz) <= max(SAME_PEAK_FRACTION * a.freq_hz,
                                                                      min(a.width_hz, b.width_hz))

    def _report(self, t_s: float, tr: dict) -> StrayPeak | None:
        """Report a qualifying track, or fold it into an earlier report of the same resonance."""
        fr, width, j = self._peak(tr["sum"], tr["bin"])
        axis = AXIS_NAMES[int(np.argmax(tr["axes"]))]
        peak = StrayPeak(t_s, fr, axis, tr["over"], float(tr["rpm_lo"]), float(tr["rpm_hi"]), width, tr["hits"])
        k = next((k for k, r in enumerate(self.reported) if self._same(r, peak)), None)
        if k is None:
            self.reported.append(peak)
            self._acc.append(tr["sum"].copy())
            self._anchor.append(j)
            return peak
        self._fold(k, peak, tr["sum"])
        # a refined estimate may now sit on another report of the same resonance: fold it in too
        while True:
            pair = next(((a, b) for a in range(len(self.reported)) for b in range(a + 1, len(self.reported))
                         if self._same(self.reported[a], self.reported[b])), None)
            if pair is None:
                return None
            a, b = pair
            other, acc = self.reported.pop(b), self._acc.pop(b)
            self._anchor.pop(b)
            self._fold(a, other, acc)

    def _fold(self, k: int, peak: StrayPeak, acc: np.ndarray) -> None:
        """The evidence of ``peak`` (its accumulated spectrum ``acc``) adds to report ``k``, whose
        estimate is refined around the bin where it was first reported; no new event is raised."""
        r = self.reported[k]
        self._acc[k] += acc
        f2, w2, _ = self._peak(self._acc[k], self._anchor[k])
        self.reported[k] = replace(r, freq_hz=f2, width_hz=w2, rpm_low=min(r.rpm_low, peak.rpm_low),
                                   rpm_high=max(r.rpm_high, peak.rpm_high), hits=r.hits + peak.hits,
                                   over_floor_db=max(r.over_floor_db, peak.over_floor_db))

    def _qualifies(self, tr: dict) -> bool:
        if tr["hits"] < MIN_HITS or tr["last"] - tr["first"] < MIN_SPAN_S:
            return False
        lo, hi = tr["rpm_lo"], tr["rpm_hi"]
        if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= 0:
            return False
        # an order at this frequency would have moved by (hi - lo) / hi of it: at least 3 bins
        f = tr["bin"] * self.bin_hz
        need = max(MIN_RPM_CHANGE, 3.0 * self.bin_hz / max(f, self.bin_hz))
        return (hi - lo) / hi >= need
