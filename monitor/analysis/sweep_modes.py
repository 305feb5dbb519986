"""Frame modes a sweep excites, and the RPM bands where each motor order excites them.

(After the peak search below, neighbouring peaks are fitted together by :func:`refine`, which
replaces the interpolated frequency and half-power damping where the fit holds.)

Modes: a resonance stays at one frequency while the motor orders move with speed. In every RPM
bin of the map the spectrum is normalised by its median level (dB), and the bins are combined
with a 25 % trimmed mean (Tukey's trimmed mean; it ignores the few bins where an order line or a
dwell tone sits at a frequency), so the order lines smear out and the fixed resonances add up
(the frame's response to the motors' broadband excitation and to every order that passes). A mode
is a peak of that fixed-frequency spectrum with a prominence of at least 3 dB that also stands
``max(3 dB, 6 sigma)`` over the spectrum's 80 Hz running median (sigma the robust spread,
1.4826 x MAD, of the spectrum about that median: white noise alone never passes), merged
across axes within 3 %; its main axis is the one with the largest mean PSD there; its frequency
is refined by parabolic interpolation of the dB peak (Gaussian interpolation; Gasior and
Gonzalez, CERN AB-Note-2004-021), its damping ratio from the half-power width, zeta = width / (2
f) (half-power method; any vibration textbook, e.g. Rao,
Mechanical Vibrations, section 3.5), given only where the peak stands 6 dB or more over the
running median, is at least 3 frequency bins wide and has no other mode within 12 % (else None).

Bands: order k of a motor excites a mode of frequency f and damping zeta over the predicted RPM
band 60 f (1 -+ zeta) / k. The observed band is where the order cut (the map along k n / 60)
stays within 3 dB of its largest value within 3 % of the mode (and within 5 %); ``peak_db`` is that value in dB re
1 (deg/s)^2/Hz on the mode's main axis.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, signal

from ..stray import half_power_width_hz
from .peak_fit import fit_peaks
from .sweep_map import SweepMap

AXES = ("roll", "pitch", "yaw")
TRIM = 0.25  #: fraction of RPM bins dropped at each end before averaging
MIN_PROMINENCE_DB = 3.0
SIGMA_FACTOR = 6.0
MERGE_FRACTION = 0.03
DAMPING_MIN_DB = 6.0
NEAR_FRACTION = 0.03  #: an order's peak counts for a mode within 3 % of it (a sweep shifts the peak a little)
REACH_FRACTION = 0.05  #: the observed band stops 5 % from the mode (a neighbour's crossing is not this mode's)
GROUP_FRACTION = 0.15  #: modes this close are fitted together
FIT_MARGIN = 0.10
FIT_SHIFT = 0.02  #: a fitted frequency stays within 2 % of the interpolated peak (about a bin)
HIDDEN_COST_RATIO = 0.45  #: one more mode must cut the fit's squared residuals to 45 % or less
HIDDEN_MIN_DB = 15.0  #: and stand this far over the floor  #: the fit spans the group and 10 % either side
PAIR_FRACTION = 0.12  #: modes closer than this overlap: no damping from their half-power width
DEFAULT_ZETA = 0.03  #: for a predicted band when a mode's damping could not be measured (common practice)


@dataclass
class SweepMode:
    freq_hz: float
    damping_ratio: float | None
    axis: str
    prominence_db: float  #: over the fixed-frequency spectrum's running median, on the axis it was found on
    participation: dict = field(default_factory=dict)  #: share of the mean PSD at the mode per axis (sums to 1)

    def as_dict(self) -> dict:
        return {"freq_hz": round(self.freq_hz, 2),
                "damping_ratio": None if self.damping_ratio is None else round(self.damping_ratio, 4),
                "axis": self.axis, "prominence_db": round(self.prominence_db, 1),
                "participation": {k: round(v, 3) for k, v in self.participation.items()}}


@dataclass
class Band:
    mode_hz: float
    order: float
    order_name: str
    rpm_low: float  #: observed (or the predicted band clipped to the sweep when not observed)
    rpm_high: float
    predicted_low: float
    predicted_high: float
    peak_db: float  #: dB re 1 (deg/s)^2/Hz
    over_trend_db: float  #: how far the order rises over its own level away from the mode
    observed: bool
    axis: str
    throttle_low: float | None = None  #: 0..1 where the capture knows throttle
    throttle_high: float | None = None

    def as_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("mode_hz", "order", "order_name", "rpm_low", "rpm_high", "predicted_low",
                                            "predicted_high", "peak_db", "over_trend_db", "observed", "axis",
                                            "throttle_low", "throttle_high")}
        for k in ("rpm_low", "rpm_high", "predicted_low", "predicted_high"):
            d[k] = round(d[k], 0)
        for k in ("peak_db", "over_trend_db"):
            d[k] = round(d[k], 1)
        for k in ("throttle_low", "throttle_high"):
            d[k] = None if d[k] is None else round(d[k], 3)
        d["mode_hz"] = round(d["mode_hz"], 2)
        return d


def fixed_spectrum(m: SweepMap, orders: list[float] | None = None, mask_bins: int = 4) -> np.ndarray:
    """(bins, 3) the trimmed mean over RPM bins of each bin's spectrum in dB over its median. With
    ``orders``, the frequency bins within ``mask_bins`` (plus the motors' spread) of each order
    line of each RPM bin are left out first, so a strong clean order line and its leakage cannot
    add up to a fixed peak."""
    db = 10 * np.log10(np.maximum(m.psd, 1e-30))
    norm = db - np.median(db, axis=1, keepdims=True)
    if orders:
        k = np.arange(m.freqs.size)
        bad = np.zeros((m.rpm.size, m.freqs.size), bool)
        for o in orders:
            centre = o * m.rpm / 60.0 / m.bin_hz
            half = mask_bins + 0.5 * o * np.nan_to_num(m.spread) / 60.0 / m.bin_hz
            bad |= np.abs(k[None, :] - centre[:, None]) <= half[:, None]
        norm = np.where(bad[:, :, None], np.nan, norm)
    lo, hi = np.nanpercentile(norm, [100 * TRIM, 100 * (1 - TRIM)], axis=0, keepdims=True)
    keep = (norm >= lo) & (norm <= hi)
    cnt = keep.sum(axis=0)
    out = np.where(keep, norm, 0.0).sum(axis=0) / np.maximum(cnt, 1)
    return np.where(cnt > 0, out, 0.0)


def _parabolic(y: np.ndarray, k: int) -> float:
    if 0 < k < y.size - 1:
        den = y[k - 1] - 2 * y[k] + y[k + 1]
        if den < 0:
            return float(np.clip(0.5 * (y[k - 1] - y[k + 1]) / den, -0.5, 0.5))
    return 0.0


def find_modes(m: SweepMap, orders: list[float] | None = None, fmin_hz: float = 40.0,
               fmax_hz: float | None = None) -> tuple[list[SweepMode], np.ndarray]:
    """The modes of a sweep map, by frequency, and the fixed-frequency spectrum (bins, 3) dB;
    ``orders`` (multiples of the shaft rate) are masked out of it (:func:`fixed_spectrum`)."""
    if m.rpm.size < 4:
        return [], np.zeros((m.freqs.size, 3))
    s = fixed_spectrum(m, orders)
    f = m.freqs
    bw = m.bin_hz
    fmax = fmax_hz or 0.8 * f[-1]
    band = (f >= fmin_hz) & (f <= fmax)
    win = max(int(80.0 / bw) | 1, 5)
    cands = []
    base = np.empty_like(s)
    for ax in range(3):
        base[:, ax] = ndimage.median_filter(s[:, ax], size=win, mode="nearest")
        r = (s[:, ax] - base[:, ax])[band]
        sigma = 1.4826 * float(np.median(np.abs(r - np.median(r))))
        over = s[:, ax] - base[:, ax]
        pk, props = signal.find_peaks(s[:, ax], prominence=MIN_PROMINENCE_DB)
        for p, prom in zip(pk, props["prominences"], strict=True):
            # prominence alone grows with the span searched (noise has 4-6 dB peaks); the height
            # over the running median must stand clear of the spectrum's own spread as well
            if band[p] and over[p] >= max(MIN_PROMINENCE_DB, SIGMA_FACTOR * sigma):
                cands.append((float(prom), int(p), ax))
    cands.sort(reverse=True)
    modes: list[SweepMode] = []
    for prom, p, ax in cands:
        fk = (p + _parabolic(s[:, ax], p)) * bw
        if any(abs(fk - md.freq_hz) <= max(MERGE_FRACTION * md.freq_hz, 1.5 * bw) for md in modes):
            continue
        over = float(s[p, ax] - base[p, ax])
        zeta = None
        if over >= DAMPING_MIN_DB:
            lin = 10 ** ((s[:, ax] - base[:, ax]) / 10.0)
            width = half_power_width_hz(lin, p, bw)
            z = width / (2 * fk)
            # a width under 3 bins is the window's, not the mode's (Hann main lobe: 4 bins)
            zeta = float(z) if width >= 3 * bw and 0.002 <= z <= 0.2 else None
        # main axis and participation from the absolute response (the normalised spectra hide scale)
        level = m.psd[:, max(p - 1, 0):p + 2].max(axis=1).mean(axis=0)  # (3,) mean over RPM bins
        part = level / level.sum() if level.sum() > 0 else np.full(3, 1 / 3)
        share = {AXES[i]: float(part[i]) for i in range(3)}
        modes.append(SweepMode(fk, zeta, AXES[int(np.argmax(level))], prom, share))
    modes.sort(key=lambda md: md.freq_hz)
    refine(modes, f, s, band)
    modes.sort(key=lambda md: md.freq_hz)
    return modes, s


def refine(modes: list[SweepMode], f: np.ndarray, s: np.ndarray, band: np.ndarray) -> None:
    """Fit each group of neighbouring modes (within 15 % of each other) together on the fixed
    spectrum, all axes at once (:func:`peak_fit.fit_peaks`): overlapping peaks no longer pull each
    other's frequency, and each gets a damping ratio of its own. A fit that fails, or a damping
    ratio at the search's bounds, keeps the interpolated frequency and withholds the damping of a
    mode with a neighbour within 12 % (a merged pair's width is not one mode's damping)."""
    groups: list[list[SweepMode]] = []
    for md in modes:
        if groups and md.freq_hz <= groups[-1][-1].freq_hz * (1 + GROUP_FRACTION):
            groups[-1].append(md)
        else:
            groups.append([md])
    power = 10 ** (s / 10.0)
    for g in groups:
        lo, hi = g[0].freq_hz * (1 - FIT_MARGIN), g[-1].freq_hz * (1 + FIT_MARGIN)
        sel = band & (f >= lo) & (f <= hi)
        fit = None
        if np.count_nonzero(sel) >= 3 * len(g) + 3:
            start = [(md.freq_hz, md.damping_ratio or DEFAULT_ZETA) for md in g]
            fit = fit_peaks(f[sel], power[sel], start, max_shift=FIT_SHIFT)
            if fit is not None and any(abs(fn - f0) >= 0.95 * FIT_SHIFT * f0 for (fn, _, _), (f0, _) in zip(
                    fit, start, strict=True)):
                fit = None  # a frequency driven to its bound: the model does not describe this hump
        for i, md in enumerate(g):
            if fit is not None:
                fn, zeta, _ = fit[i]
                md.freq_hz = fn
                md.damping_ratio = zeta if 0.0025 < zeta < 0.19 else None
            elif len(g) > 1:
                near = [o for o in g if o is not md and abs(o.freq_hz - md.freq_hz) <= PAIR_FRACTION * md.freq_hz]
                if near:
                    md.damping_ratio = None


def order_bands(m: SweepMap, modes: list[SweepMode], orders: list[tuple[float, str]]) -> list[Band]:
    """For each mode and order whose predicted band meets the swept range: the band, strongest first."""
    out: list[Band] = []
    if m.rpm.size < 2:
        return out
    lo_rpm, hi_rpm = float(m.rpm.min()), float(m.rpm.max())
    for md in modes:
        zeta = md.damping_ratio or DEFAULT_ZETA
        ax = AXES.index(md.axis)
        for k, name in orders:
            p_lo, p_hi = 60 * md.freq_hz * (1 - zeta) / k, 60 * md.freq_hz * (1 + zeta) / k
            if p_hi < lo_rpm or p_lo > hi_rpm:
                continue
            f, cut = m.order_cut(k)
            y = cut[:, ax]
            ok = np.isfinite(y) & (y > 0)
            if np.count_nonzero(ok) < 3:
                continue
            db = np.full(y.shape, np.nan)
            db[ok] = 10 * np.log10(y[ok])
            near = ok & (np.abs(f - md.freq_hz) <= NEAR_FRACTION * md.freq_hz)
            reach = ok & (np.abs(f - md.freq_hz) <= REACH_FRACTION * md.freq_hz)
            away = ok & ~(np.abs(f - md.freq_hz) <= max(6 * zeta, 0.10) * md.freq_hz)
            if not np.any(near):
                continue
            i = int(np.flatnonzero(near)[np.argmax(db[near])])
            peak = float(db[i])
            trend = float(np.median(db[away])) if np.any(away) else float(np.nanmedian(db))
            # the observed band: contiguous bins around the peak within 3 dB of it
            j0 = j1 = i
            while j0 > 0 and reach[j0 - 1] and db[j0 - 1] >= peak - 3.0:
                j0 -= 1
            while j1 < y.size - 1 and reach[j1 + 1] and db[j1 + 1] >= peak - 3.0:
                j1 += 1
            half = m.bin_rpm / 2
            observed = peak - trend >= 3.0
            r_lo, r_hi = (m.rpm[j0] - half, m.rpm[j1] + half) if observed else (max(p_lo, lo_rpm), min(p_hi, hi_rpm))
            band = Band(md.freq_hz, k, name, float(r_lo), float(r_hi), p_lo, p_hi, peak, peak - trend, observed,
                        md.axis)
            if np.any(np.isfinite(m.throttle)):
                good = np.isfinite(m.throttle)
                band.throttle_low = float(np.interp(r_lo, m.rpm[good], m.throttle[good]))
                band.throttle_high = float(np.interp(r_hi, m.rpm[good], m.throttle[good]))
            out.append(band)
    out.sort(key=lambda b: -b.peak_db)
    return out
