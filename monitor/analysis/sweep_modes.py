"""Frame modes a sweep excites, and the RPM bands where each motor order excites them.

Modes: a resonance stays at one frequency while the motor orders move with speed. In every RPM
bin of the map the spectrum is normalised by its median level (dB), and the bins are combined
with a 25 % trimmed mean (Tukey's trimmed mean; it ignores the few bins where an order line or a
dwell tone sits at a frequency), with the order lines 1x..12x masked out first, so the fixed
resonances add up (the frame's response to the motors' broadband excitation). The peaks of that
fixed-frequency spectrum with a prominence of at least 3 dB that also stand ``max(3 dB, 6
sigma)`` over its 80 Hz running median (sigma the robust spread, 1.4826 x MAD, about that median:
white noise alone never passes), merged across axes within 3 %, start a fit of the modal model of
output spectra (:mod:`.modal_fit`), which places each mode, finds the modes no peak shows (a
neighbour in a stronger mode's skirt, a weak mode on another's flank) and gives each a damping
ratio: withheld (None) for the two modes of a close pair (within 10 %), whose widths trade
against each other, for a mode whose half-power band spans under 1.5 bins, and for a mode that
raises the spectrum by under 3 dB (its width is unsure). ``freq_sd_hz`` is the fit's standard
error of the frequency (a percent or two is the honest spread of a weak, heavily damped mode
that sits on a stronger one's flank: see DEVELOPERS, "Sweep analysis"). The main axis is
the one with the largest mean PSD at the mode; ``prominence_db`` how far the mode raises the
fitted spectrum at its frequency.

Bands: order k of a motor excites a mode of frequency f and damping zeta over the predicted RPM
band 60 f (1 -+ zeta) / k. The observed band is where the order cut (the map along k n / 60)
stays within 3 dB of its largest value within 3 % of the mode (and within 5 %); ``peak_db`` is that value in dB re
1 (deg/s)^2/Hz on the mode's main axis.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, signal

from .modal_fit import select_modes
from .sweep_map import SweepMap

AXES = ("roll", "pitch", "yaw")
TRIM = 0.25  #: fraction of RPM bins dropped at each end before averaging
MIN_PROMINENCE_DB = 3.0
SIGMA_FACTOR = 6.0
MERGE_FRACTION = 0.03
FIT_MAX_HZ = 1200.0  #: modes are sought up to this (or 0.8 Nyquist): frame modes lie under 600 Hz (common practice)
RESOLVED_BINS = 1.5  #: a damping ratio is given when the half-power band spans this many bins
DAMPING_MIN_LIFT_DB = 3.0  #: ... and the mode raises the spectrum this much (a weak hump's width is unsure)
NEAR_FRACTION = 0.03  #: an order's peak counts for a mode within 3 % of it (a sweep shifts the peak a little)
REACH_FRACTION = 0.05  #: the observed band stops 5 % from the mode (a neighbour's crossing is not this mode's)
PAIR_FRACTION = 0.10  #: modes closer than this are a close pair: no damping is given for either
DEFAULT_ZETA = 0.03  #: for a predicted band when a mode's damping could not be measured (common practice)


@dataclass
class SweepMode:
    freq_hz: float
    damping_ratio: float | None
    axis: str
    prominence_db: float  #: how far the mode raises the fitted fixed-frequency spectrum at its frequency, dB
    participation: dict = field(default_factory=dict)  #: share of the mean PSD at the mode per axis (sums to 1)
    freq_sd_hz: float | None = None  #: standard error of the frequency from the fit, Hz

    def as_dict(self) -> dict:
        return {"freq_hz": round(self.freq_hz, 2),
                "damping_ratio": None if self.damping_ratio is None else round(self.damping_ratio, 4),
                "axis": self.axis, "prominence_db": round(self.prominence_db, 1),
                "freq_sd_hz": None if self.freq_sd_hz is None else round(self.freq_sd_hz, 2),
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
    ``orders`` (multiples of the shaft rate) are masked out of it (:func:`fixed_spectrum`).

    The peaks found start the modal fit (:func:`monitor.analysis.modal_fit.select_modes`), which
    places them, adds the modes a peak search cannot see (a neighbour in a stronger mode's skirt,
    a weak mode on another's flank) and gives their damping."""
    if m.rpm.size < 4:
        return [], np.zeros((m.freqs.size, 3))
    s = fixed_spectrum(m, orders)
    f = m.freqs
    bw = m.bin_hz
    fmax = min(fmax_hz or 0.8 * f[-1], FIT_MAX_HZ)
    band = (f >= fmin_hz) & (f <= fmax)
    start = _peaks(s, f, bw, band)
    if np.count_nonzero(band) < 16:
        return [], s
    fb = f[band]
    fit = select_modes(fb, 10 ** (s[band] / 10.0), bw, start)
    lift = fit.lift_db()
    modes: list[SweepMode] = []
    for i, (fn, zeta) in enumerate(zip(fit.freqs_hz, fit.zetas, strict=True)):
        fn = float(fn)
        if not fmin_hz <= fn <= fmax:
            continue
        others = [o for j, o in enumerate(fit.freqs_hz) if j != i]
        # a close pair's widths trade against each other in the fit: no damping is claimed for either
        alone = all(abs(o - fn) > PAIR_FRACTION * fn for o in others)
        resolved = 2 * zeta * fn >= RESOLVED_BINS * bw and lift[i].max() >= DAMPING_MIN_LIFT_DB
        # main axis and participation from the absolute response (the normalised spectra hide scale)
        p = int(round(fn / bw))
        level = m.psd[:, max(p - 1, 0):p + 2].max(axis=1).mean(axis=0)  # (3,) mean over RPM bins
        part = level / level.sum() if level.sum() > 0 else np.full(3, 1 / 3)
        share = {AXES[i2]: float(part[i2]) for i2 in range(3)}
        sd = fit.freq_sd_hz[i] if fit.freq_sd_hz is not None else np.nan
        modes.append(SweepMode(fn, float(zeta) if alone and resolved else None, AXES[int(np.argmax(level))],
                               float(lift[i].max()), share, float(sd) if np.isfinite(sd) else None))
    modes.sort(key=lambda md: md.freq_hz)
    return modes, s


def _peaks(s: np.ndarray, f: np.ndarray, bw: float, band: np.ndarray) -> list[tuple[float, float]]:
    """[(f Hz, zeta 0.03)] the peaks of the fixed spectrum that stand clear of its spread, merged
    across axes within 3 %: where the modal fit starts."""
    win = max(int(80.0 / bw) | 1, 5)
    cands = []
    for ax in range(3):
        base = ndimage.median_filter(s[:, ax], size=win, mode="nearest")
        r = (s[:, ax] - base)[band]
        sigma = 1.4826 * float(np.median(np.abs(r - np.median(r)))) if r.size else 0.0
        over = s[:, ax] - base
        pk, props = signal.find_peaks(s[:, ax], prominence=MIN_PROMINENCE_DB)
        for p, prom in zip(pk, props["prominences"], strict=True):
            # prominence alone grows with the span searched (noise has 4-6 dB peaks); the height
            # over the running median must stand clear of the spectrum's own spread as well
            if band[p] and over[p] >= max(MIN_PROMINENCE_DB, SIGMA_FACTOR * sigma):
                cands.append((float(prom), int(p), ax))
    cands.sort(reverse=True)
    out: list[tuple[float, float]] = []
    for _, p, ax in cands:
        fk = (p + _parabolic(s[:, ax], p)) * bw
        if any(abs(fk - o) <= max(MERGE_FRACTION * o, 1.5 * bw) for o, _ in out):
            continue
        out.append((fk, DEFAULT_ZETA))
    return sorted(out)


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
