"""Tap tests: frame modes (frequency, damping ratio, axis) from the free decays after taps.

A tap is an impulse: the gyro's summed rate envelope jumps far above its background and then
decays. Each tap's free decay (from just after the impulse to the next tap, at most
:data:`DECAY_S`) is decimated to about :data:`ANALYSIS_HZ` and handed, all three axes together,
to the matrix pencil (:mod:`.pencil`, Hua and Sarkar 1990). A decay is *usable* unless it is
clipped (a sample within 1 % of the gyro's full scale), too short (under :data:`MIN_DECAY_S`
before the next tap or the end) or a double tap (a second impulse inside it: see
:func:`_second_impulse`). Every identified
mode is cross-checked against the half-power width of the decay's spectrum: for a free decay
much longer than its time constant the power spectrum of one mode is a Lorentzian of full width
2 zeta f_n at half power (Ewins, Modal Testing, 2000, sec. 3.2; Inman, Engineering Vibration).
Taps are combined per mode: mean and spread (sample standard deviation) of frequency and damping
over the taps that found it, and the axis participation (mean share of each axis' amplitude).
The pencil's modes, combined over the taps, are then the start of a least-squares fit of every
tap's decay at the gyro's own rate (:mod:`.decay_fit`: the maximum-likelihood estimate under white
noise, all modes at once, so two overlapping modes no longer pull each other), and the fitted
poles are combined again (:func:`identify_modes`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import signal
from threadpoolctl import threadpool_limits

from ..stray import half_power_width_hz
from .decay_fit import fit_decay_growing
from .pencil import Pole, identify

ANALYSIS_HZ = 2000.0  #: decays are decimated to about this rate (modes of interest lie below 800 Hz)
DECAY_S = 0.6  #: the longest stretch of a decay analysed, s
MIN_DECAY_S = 0.25  #: a shorter decay is not usable
SKIP_S = 0.002  #: the impulse itself is skipped
SHORT_S = 0.08  #: the start of a decay is also analysed alone (modes that die out within it)
TAP_OVER = 50.0  #: a tap's short-time power stands this many times over the record's median power
TAP_WINDOW_S = 0.003  #: ... averaged over this long (at least 8 samples)
TAP_REARM = 5.0  #: the next tap counts only once the power fell under this many times the median
TAP_SPACING_S = 0.5  #: peaks closer than this are one tap (or a double tap)
DOUBLE_SHARE = 0.3  #: a second impulse this large (share of the first) inside a decay spoils it
RISE = 2.5  #: ... when the level also jumps this many times over the 50 ms before it
FIT_MIN_S = 0.1  #: the least-squares fit of a decay covers at least this long, s (and 5 time constants)
TREND_HZ = 12.0  #: slow rigid-body motion under this is fitted as a trend beside the modes (fmin 30 Hz)
AXES = ("roll", "pitch", "yaw")


@dataclass
class TapDecay:
    index: int  #: 1-based
    t_s: float  #: time of the impulse, s (record time)
    usable: bool
    why: str  #: "" or why it is not usable
    poles: list[Pole] = field(default_factory=list)
    half_power_zeta: list[float | None] = field(default_factory=list)  #: per pole, from the spectrum
    decay: np.ndarray | None = field(default=None, repr=False)  #: (n, 3) deg/s at ``rate_hz``
    rate_hz: float = 0.0
    raw: np.ndarray | None = field(default=None, repr=False)  #: (n, 3) deg/s at ``raw_hz``, less the gyro's offset
    raw_hz: float = 0.0  #: the gyro's own rate

    def as_dict(self) -> dict:
        return {"tap": self.index, "t_s": round(self.t_s, 4), "usable": self.usable, "why": self.why,
                "poles": [{"freq_hz": round(p.freq_hz, 3), "damping_ratio": round(p.damping_ratio, 5),
                           "half_power_damping_ratio": None if h is None else round(h, 5)}
                          for p, h in zip(self.poles, self.half_power_zeta, strict=True)]}


@dataclass(frozen=True)
class TapMode:
    freq_hz: float
    freq_sd_hz: float
    damping_ratio: float
    damping_sd: float
    taps: int  #: how many usable taps found it
    axis: str  #: the axis it shows most on
    participation: tuple[float, float, float]  #: share of roll, pitch, yaw (sums to 1)
    half_power_agrees: bool  #: the spectrum's half-power width gives the same damping within 2x

    def as_dict(self) -> dict:
        return {"freq_hz": round(self.freq_hz, 3), "freq_sd_hz": round(self.freq_sd_hz, 3),
                "damping_ratio": round(self.damping_ratio, 5), "damping_sd": round(self.damping_sd, 5),
                "taps": self.taps, "axis": self.axis,
                "participation": {a: round(p, 3) for a, p in zip(AXES, self.participation, strict=True)},
                "half_power_agrees": self.half_power_agrees}


def find_taps(x: np.ndarray, fs: float) -> np.ndarray:
    """Sample indices of the taps in ``x`` (n, 3) deg/s at ``fs`` Hz.

    The short-time power (the squared rate summed over the axes, each axis less its median,
    averaged over the last :data:`TAP_WINDOW_S`) of a tap first stands :data:`TAP_OVER` times
    over the record's median short-time power, at least :data:`TAP_SPACING_S` after the previous
    tap began (a second impulse sooner is a double tap inside the first decay) and after the
    power fell back under :data:`TAP_REARM` times the median (a lightly damped decay that ripples
    about the threshold for a second is one tap); the index is the
    summed rate's peak within one window either side of that onset.

    Why power over a window and not one sample's rate: a light tap, or one on an arm the
    gyro hears poorly, may peak at only 15 to 20 times the background in one sample, where single
    noise samples also reach a few times it; over 24 or more values (8 samples, 3 axes) the
    background's power is a chi-square average that stays within about 3 times its median (the
    0.9999999 quantile of chi-square with 24 degrees of freedom over 24 is under 3.6), so 50
    times its median is a tap and nothing else, while a tap's power stands hundreds of times over.
    """
    x = np.asarray(x, dtype=float)
    if x.shape[0] == 0:
        return np.zeros(0, dtype=np.int64)
    x = x - np.median(x, axis=0)
    e = np.abs(x).sum(axis=1)
    w = max(8, int(round(TAP_WINDOW_S * fs)))
    c = np.concatenate(([0.0], np.cumsum((x * x).sum(axis=1))))
    lo = np.maximum(np.arange(1, x.shape[0] + 1) - w, 0)
    power = (c[1:] - c[lo]) / w  # mean over the last w samples (fewer at the start)
    floor = max(float(np.median(power)), 1e-18)
    above = power > TAP_OVER * floor
    over = np.flatnonzero(above & ~np.concatenate(([False], above[:-1])))  # where it rises over
    quiet = np.concatenate(([0], np.cumsum(power < TAP_REARM * floor)))  # quiet[i]: quiet samples before i
    starts: list[int] = []
    spacing = int(TAP_SPACING_S * fs)
    for i in over.tolist():
        if not starts or (i - starts[-1] >= spacing and quiet[i] > quiet[starts[-1]]):
            starts.append(i)
    return np.array([max(0, i - w) + int(np.argmax(e[max(0, i - w): i + w])) for i in starts], dtype=np.int64)


def _second_impulse(seg: np.ndarray, fs: float) -> bool:
    """A second impulse inside a decay ``seg`` (from the tap's peak on): its 5 ms RMS rises to
    :data:`RISE` times the highest level of the 50 ms before it and to :data:`DOUBLE_SHARE` of the
    tap's own. A free decay (a sum of decaying modes) stays under its starting level; beating
    between close modes can rise, but not by that much that early."""
    w = max(1, int(0.005 * fs))
    m = seg.shape[0] // w
    if m < 12:
        return False
    r = np.sqrt((seg[: m * w] ** 2).sum(axis=1).reshape(m, w).mean(axis=1))
    prev = np.array([r[max(0, k - 10): k].max() for k in range(2, m)])
    rise = r[2:] >= RISE * np.maximum(prev, 1e-12)
    big = r[2:] >= DOUBLE_SHARE * r[:2].max()
    return bool(np.any(rise & big))


def half_power_zeta(decay: np.ndarray, fs: float, f_n: float) -> float | None:
    """Damping ratio from the half-power width of the decay's power spectrum around ``f_n``
    (summed over axes, zero-padded 8x; :func:`monitor.stray.half_power_width_hz`); None when the
    peak is not resolved (it does not fall to half on both sides, or it is narrower than the
    decay's own resolution)."""
    n = decay.shape[0]
    nfft = 1 << int(np.ceil(np.log2(8 * n)))
    p = (np.abs(np.fft.rfft(decay - decay.mean(axis=0), nfft, axis=0)) ** 2).sum(axis=1)
    df = fs / nfft
    k = int(round(f_n / df))
    reach = int(0.03 * f_n / df) + 1
    lo, hi = max(1, k - reach), min(p.size - 1, k + reach + 1)
    k = lo + int(np.argmax(p[lo:hi]))
    below = p <= p[k] / 2
    if not (below[:k].any() and below[k + 1:].any()):
        return None
    width = half_power_width_hz(p, k, df)
    if width < 2 * (fs / n):
        return None
    return float(width / (2 * k * df))


def analyse_taps(x: np.ndarray, fs: float, full_scale_dps: float | None = None,
                 fmin: float = 30.0, fmax: float = 800.0) -> list[TapDecay]:
    """Every tap in ``x`` (n, 3) deg/s at ``fs`` Hz, its decay checked and identified."""
    x = np.asarray(x, float)
    peaks = find_taps(x, fs)
    q = max(1, int(round(fs / ANALYSIS_HZ)))
    rate = fs / q
    out = []
    for i, p in enumerate(peaks):
        start = p + max(1, int(SKIP_S * fs))
        end_limit = peaks[i + 1] - int(0.02 * fs) if i + 1 < len(peaks) else x.shape[0]
        end = min(end_limit, start + int(DECAY_S * fs))
        tap = TapDecay(i + 1, p / fs, True, "", rate_hz=rate)
        out.append(tap)
        if (end - start) / fs < MIN_DECAY_S:
            tap.usable, tap.why = False, f"too short ({(end - start) / fs:.2f} s before the next tap or the end)"
            continue
        if full_scale_dps and np.max(np.abs(x[p:end])) >= 0.99 * full_scale_dps:
            tap.usable, tap.why = False, f"clipped (the gyro reached its full scale, {full_scale_dps:g} deg/s)"
            continue
        if _second_impulse(x[p:end], fs):
            tap.usable, tap.why = False, "double tap (a second impulse inside the decay)"
            continue
        pad = min(p, int(0.05 * fs))
        before = x[max(0, p - int(0.1 * fs)): max(0, p - int(0.01 * fs))]
        bias = np.median(before, axis=0) if before.shape[0] else np.zeros(3)  # the gyro's offset at rest
        ext = x[start - pad: end] - bias
        dec = signal.decimate(ext, q, ftype="fir", axis=0, zero_phase=True) if q > 1 else ext
        dec = dec[int(np.ceil(pad / q)):]
        tap.decay = dec
        tap.raw, tap.raw_hz = x[start:end] - bias, float(fs)
        top = min(fmax, 0.4 * rate)
        poles = identify(dec, 1.0 / rate, fmin=fmin, fmax=top)
        # heavily damped or high modes have died out after a few tens of ms: look at the start alone
        # too, and add what it finds that the whole decay did not
        short = identify(dec[: int(SHORT_S * rate)], 1.0 / rate, fmin=max(fmin, 3.0 / SHORT_S), fmax=top,
                         orders=range(8, 31, 2))
        for q2 in short:
            if all(abs(q2.freq_hz - p2.freq_hz) > 0.02 * q2.freq_hz for p2 in poles):
                poles.append(q2)
        tap.poles = sorted(poles, key=lambda q3: q3.freq_hz)
        tap.half_power_zeta = [half_power_zeta(dec, rate, pl.freq_hz) for pl in tap.poles]
    return out


def combine(taps: list[TapDecay], f_tol: float = 0.01, min_share: float = 0.5) -> list[TapMode]:
    """Modes found in at least ``min_share`` of the usable taps (and two of them, when there are
    two or more): poles of different taps within ``f_tol`` of a mode's running mean are one mode."""
    usable = [t for t in taps if t.usable]
    if not usable:
        return []
    poles = sorted((p.freq_hz, p, t, h) for t in usable for p, h in zip(t.poles, t.half_power_zeta, strict=True))
    clusters: list[list] = []
    for f, p, t, h in poles:
        if clusters and abs(f - np.mean([c[0] for c in clusters[-1]])) <= f_tol * f:
            if all(c[2] is not t for c in clusters[-1]):
                clusters[-1].append((f, p, t, h))
            continue
        clusters.append([(f, p, t, h)])
    need = max(min(2, len(usable)), int(np.ceil(min_share * len(usable))))
    out = []
    for c in clusters:
        if len(c) < need:
            continue
        f = np.array([x[0] for x in c])
        z = np.array([x[1].damping_ratio for x in c])
        amp = np.array([x[1].amplitudes for x in c])
        share = amp / np.maximum(amp.sum(axis=1, keepdims=True), 1e-30)
        part = share.mean(axis=0)
        hp = [x[3] for x in c if x[3] is not None]
        agrees = bool(hp) and 0.5 <= float(np.median(hp)) / float(np.mean(z)) <= 2.0
        out.append(TapMode(float(f.mean()), float(f.std(ddof=1)) if f.size > 1 else 0.0, float(z.mean()),
                           float(z.std(ddof=1)) if z.size > 1 else 0.0, len(c), AXES[int(np.argmax(part))],
                           tuple(float(v) for v in part), agrees))
    return out


def refine_taps(taps: list[TapDecay], modes: list[TapMode], min_snr: float = 3.0, fmin: float = 30.0,
                fmax: float = 800.0) -> list[TapDecay]:
    """Each usable tap again, its poles now the ``modes`` fitted to its decay at the gyro's own
    rate (:func:`.decay_fit.fit_decay`, started from each mode's frequency and damping). A mode
    is kept in a tap when its fit did not stop at the search's reach and it starts at least
    ``min_snr`` times over the RMS of what the fit leaves on some axis (the pencil's own rule)."""
    if not modes:
        return taps
    out = []
    for tap in taps:
        if not tap.usable or tap.raw is None or tap.raw.shape[0] < 8:
            out.append(tap)
            continue
        # past five time constants of the slowest mode a decay holds under 0.3 % of what it
        # tells of that mode (the integral of t^2 e^(-2t/tau) beyond 5 tau): fit no further
        tau = max(1.0 / (2 * np.pi * m.freq_hz * m.damping_ratio) for m in modes)
        n = min(tap.raw.shape[0], max(int(FIT_MIN_S * tap.raw_hz), int(5 * tau * tap.raw_hz)))
        with threadpool_limits(limits=1, user_api="blas"):  # small matrices: threads only cost
            fit, _ = fit_decay_growing(tap.raw[:n], 1.0 / tap.raw_hz, [m.freq_hz for m in modes],
                                       [m.damping_ratio for m in modes], trend_hz=TREND_HZ, fmin=fmin,
                                       fmax=min(fmax, 0.4 * tap.raw_hz), min_snr=min_snr)
        noise = np.maximum(np.array(fit.residual_rms), 1e-30)
        poles = []
        for f in fit.modes:
            if not f.at_bound and np.max(np.array(f.amplitudes) / noise) >= min_snr:
                poles.append(Pole(f.freq_hz, f.damping_ratio, f.amplitudes))
            else:  # the fit could not place it: the pencil's own pole, if this tap had one
                own = [p for p in tap.poles if abs(p.freq_hz - f.freq_hz) <= 0.01 * f.freq_hz]
                poles.extend(own[:1])
        poles.sort(key=lambda p: p.freq_hz)
        out.append(TapDecay(tap.index, tap.t_s, True, "", poles,
                            [half_power_zeta(tap.decay, tap.rate_hz, p.freq_hz) for p in poles],
                            tap.decay, tap.rate_hz, tap.raw, tap.raw_hz))
    return out


def identify_modes(taps: list[TapDecay], f_tol: float = 0.01,
                   min_share: float = 0.5) -> tuple[list[TapDecay], list[TapMode]]:
    """The frame's modes from analysed taps: the pencil's poles combined (:func:`combine`), fitted
    to every tap's decay (:func:`refine_taps`) and combined again. Returns the taps with their
    fitted poles, and the modes."""
    first = combine(taps, f_tol, min_share)
    if not first:
        return taps, first
    refined = refine_taps(taps, first)
    return refined, combine(refined, f_tol, min_share)
