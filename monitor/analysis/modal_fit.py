"""Frame modes from a sweep's fixed-frequency spectrum: a modal model of output spectra, fitted.

The gyro measures angular *rate*, so each mode m contributes through its mobility (velocity
response) H_m(f) = 2j zeta r / (1 - r^2 + 2j zeta r), r = f / f_m, normalised to 1 at f_m (its
half-power band is exactly f_m (1 -+ zeta) to first order; Rao, Mechanical Vibrations, sec. 3.5).
Several independent broadband forces (the motors) drive every mode, so the power spectrum on axis
a is not a sum of |H_m|^2 but

    S_a(f) = sum_m sum_m' Q_a[m, m'] Re(H_m(f) conj(H_m'(f)))  +  background_a(f)

with Q_a real, symmetric (real modes under uncorrelated white inputs: the output spectral density
as a modal sum; Brincker and Ventura, Introduction to Operational Modal Analysis, Wiley 2015,
ch. 6). The cross terms matter: a weak mode on the skirt of a stronger one interferes with it, and
its hump moves by a percent or two from f_m (measured on the simulator's airframes: a 405 Hz mode
peaks at 411 Hz); fitted with them, it is found within a few tenths of a percent. Cross terms are
kept between modes within a factor :data:`PAIR_RATIO` of each other; farther apart they change
nothing measurable. The background is a cubic B-spline in log frequency with knots every half
octave (smooth enough that it cannot take the shape of a resonance), non-negative.

For given (f_m, zeta_m) the model is linear in Q and the background, which are solved for
(non-negative diagonal and background, free cross terms); the nonlinear search has two parameters
per mode (variable projection; Golub and Pereyra, SIAM J. Numer. Anal. 10(2), 1973). Residuals
are log ratios (a fit in dB). A mode narrower than a frequency bin takes the shape of the window's
main lobe, so every resonance term is smeared by the Hann window's power kernel before it is
compared (:func:`window_kernel`).

How many modes: starting from the peaks found, the largest remaining hump of the residual is
tried as one more mode, and kept when the Bayesian information criterion falls (Schwarz, Annals
of Statistics 6(2), 1978; with half the bins counted as independent, since Hann-windowed bins
overlap), its damping ratio lies within :data:`ZETA_RANGE`, it stands 1 % or more from the
others, raises the fitted spectrum by :data:`MIN_LIFT_DB` at its frequency and its frequency's
standard error is under :data:`MAX_FREQ_SD` (on 40 invented airframes the modes added that were
not true modes raised the spectrum 0.1 to 2 dB with a standard error of 2 to 9 %, or under 1.1 dB;
the weakest true ones 1.4 dB and 1 %; a broad mode may be placed to 0.4 zeta instead).

Damping ratios come from the same fit: within -10..+15 % of the truth on the simulator's isolated
modes; the two modes of a close pair trade width against their cross term (+20 to +57 %
measured), which is why :mod:`.sweep_modes` gives no damping for them. The fit's standard errors
(cov = s^2 (J^T J)^-1 at the solution) come with each frequency and damping ratio.

A white force on a rate sensor gives each mode its mobility's shape; a coloured force or another
kind of sensor tilts every resonance term by a common factor (f / f_c)^(2 tilt), which is fitted
once, and kept, only when it cuts the squared residuals by :data:`TILT_GAIN` (a displacement-like
response is tilt -1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize
from scipy.interpolate import BSpline
from threadpoolctl import threadpool_limits

PAIR_RATIO = 1.6  #: modes closer than this frequency ratio get a cross term
KNOT_RATIO = 2 ** 0.5  #: background spline knots every half octave
ZETA_RANGE = (0.004, 0.12)  #: damping ratios a new mode may take
MIN_SEPARATION = 0.01  #: a new mode stands this far (relative) from every other
SHIFT = 0.04  #: a frequency moves at most this much (relative) from where its search began
MAX_ADDED = 6  #: modes added to the peaks found, at most
MIN_LIFT_DB = 1.0  #: a mode added must raise the fitted spectrum this much at its frequency ...
MAX_FREQ_SD = 0.015  #: ... and the fit must place it to this (standard error, relative) ...
MAX_FREQ_SD_ZETA = 0.4  #: ... or to this share of its damping ratio (a broad mode is placed less sharply)
TILT_LIMIT = 1.5  #: the excitation's tilt stays within +- this (0: white force on a rate sensor)
TILT_GAIN = 1.5  #: a tilt is used only when it cuts the squared residuals by this factor
KERNEL_HALF_BINS = 3  #: the window's power kernel, +- this many bins
KERNEL_STEPS = 4  #: ... sampled at this many points per bin


def mobility(f: np.ndarray, fn: float, zeta: float) -> np.ndarray:
    """Normalised mobility of one mode at ``f`` Hz: 2j zeta r / (1 - r^2 + 2j zeta r), 1 at ``fn``."""
    r = f / fn
    return 2j * zeta * r / (1.0 - r * r + 2j * zeta * r)


def window_kernel(steps: int = KERNEL_STEPS, half: int = KERNEL_HALF_BINS) -> np.ndarray:
    """The periodic Hann window's power response |W|^2 at offsets -half..half bins in ``steps``
    per bin, summing to 1 (from the window's own zero-padded DFT; Harris 1978)."""
    n = 256
    w = np.hanning(n + 1)[:-1]
    spec = np.abs(np.fft.fft(w, n * steps)) ** 2
    idx = np.arange(-half * steps, half * steps + 1) % (n * steps)
    k = spec[idx]
    return k / k.sum()


_KERNEL = window_kernel()
_BASIS: dict = {}


def background_basis(f: np.ndarray) -> np.ndarray:
    """(bins, B) cubic B-splines in log frequency, knots every :data:`KNOT_RATIO`."""
    key = (float(f[0]), float(f[-1]), f.size)
    got = _BASIS.get(key)
    if got is not None:
        return got
    lf = np.log(f)
    step = np.log(KNOT_RATIO)
    inner = np.arange(lf[0], lf[-1] + step, step)
    t = np.r_[[inner[0]] * 3, inner, [inner[-1]] * 3]
    nb = len(t) - 4
    basis = np.nan_to_num(np.column_stack([BSpline(t, np.eye(nb)[i], 3, extrapolate=False)(lf) for i in range(nb)]))
    basis = basis[:, basis.any(axis=0)]
    if len(_BASIS) > 16:
        _BASIS.clear()
    _BASIS[key] = basis
    return basis


@dataclass
class ModalFit:
    f_hz: np.ndarray  #: (bins,) where it was fitted
    freqs_hz: np.ndarray  #: (k,) natural frequencies
    zetas: np.ndarray  #: (k,) damping ratios (of this fit)
    diag: np.ndarray  #: (k, axes) Q_a[m, m]: each mode's own power on each axis (model units)
    model: np.ndarray  #: (bins, axes) the fitted spectrum
    without: np.ndarray  #: (k, axes) the model at each f_m without that mode's own terms
    rss: float  #: sum of squared log residuals
    n_params: int
    tilt: float = 0.0  #: the excitation's spectral tilt: resonance terms weighted by (f / f_c)^(2 tilt)
    freq_sd_hz: np.ndarray | None = None  #: (k,) standard error of each frequency, Hz
    zeta_rel_sd: np.ndarray | None = None  #: (k,) standard error of each damping ratio, relative

    def lift_db(self) -> np.ndarray:
        """(k, axes) how far each mode raises the model at its own frequency, dB."""
        at = np.array([[np.interp(fm, self.f_hz, self.model[:, a]) for a in range(self.model.shape[1])]
                       for fm in self.freqs_hz]) if self.freqs_hz.size else np.zeros((0, self.model.shape[1]))
        return 10 * np.log10(np.maximum(at, 1e-30) / np.maximum(self.without, 1e-30))


def _smeared(f: np.ndarray, bin_hz: float, fn: float, zeta: float) -> np.ndarray:
    """H_m on a grid KERNEL_STEPS times finer than the bins, covering f +- the kernel's reach."""
    step = bin_hz / KERNEL_STEPS
    pad = KERNEL_HALF_BINS * KERNEL_STEPS
    fine = f[0] - pad * step + step * np.arange((f.size - 1) * KERNEL_STEPS + 1 + 2 * pad)
    return mobility(np.maximum(fine, 1e-6), fn, zeta)


def _columns(f, bin_hz, theta, coherent, tilt=0.0):
    """(columns (bins, C), lower bounds (C,), pairs) of the linear model for ``theta`` (f_m, log
    zeta_m pairs), the resonance terms weighted by (f / f_c)^(2 tilt)."""
    k = theta.size // 2
    fn = theta[0::2]
    zt = np.exp(theta[1::2])
    H = [_smeared(f, bin_hz, fn[i], zt[i]) for i in range(k)]

    weight = (f / np.sqrt(f[0] * f[-1])) ** (2.0 * tilt)

    def smear(x):  # convolve with the window's power kernel, take the bin centres, tilt
        return np.convolve(x, _KERNEL, mode="valid")[::KERNEL_STEPS] * weight

    cols = [smear(np.abs(h) ** 2) for h in H]
    lower = [0.0] * k
    pairs = []
    if coherent:
        for i in range(k):
            for j in range(i + 1, k):
                if max(fn[i], fn[j]) / min(fn[i], fn[j]) <= PAIR_RATIO:
                    cols.append(smear(2 * np.real(H[i] * np.conj(H[j]))))
                    lower.append(-np.inf)
                    pairs.append((i, j))
    bg = background_basis(f)
    cols += list(bg.T)
    lower += [0.0] * bg.shape[1]
    return np.column_stack(cols), np.array(lower), pairs


def _solve(A: np.ndarray, lower: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Coefficients >= ``lower`` (0 or -inf) minimising sum((A x / y - 1)^2): free ones split
    into two non-negative parts so that one NNLS (Lawson and Hanson 1974) solves it."""
    free = ~np.isfinite(lower)
    Aw = A / y[:, None]
    big = np.hstack([Aw, -Aw[:, free]]) if free.any() else Aw
    x, _ = optimize.nnls(big, np.ones_like(y), maxiter=50 * big.shape[1])
    out = x[: A.shape[1]].copy()
    out[free] -= x[A.shape[1]:]
    return out


def _model(f, y, bin_hz, theta, coherent, tilt=0.0):
    A, lower, pairs = _columns(f, bin_hz, theta, coherent, tilt)
    coef = np.column_stack([_solve(A, lower, y[:, a]) for a in range(y.shape[1])])  # (C, axes)
    return A @ coef, coef, A, pairs


def fit_modes(f: np.ndarray, y: np.ndarray, bin_hz: float, start: list[tuple[float, float]],
              shift: float = SHIFT, coherent: bool = True, tilt: float = 0.0, fit_tilt: bool = False) -> ModalFit:
    """The modal model fitted to ``y`` (bins, axes) > 0 at ``f`` Hz, from ``start`` [(f Hz, zeta)]
    with the excitation's ``tilt`` (fitted too with ``fit_tilt``, within +-:data:`TILT_LIMIT`).
    Frequencies stay within ``shift`` of their start, damping ratios within 0.002..0.2."""
    k = len(start)
    f0 = np.array([s[0] for s in start], float)
    z0 = np.log(np.clip([s[1] for s in start], 0.003, 0.15))
    t0 = float(np.clip(tilt, -TILT_LIMIT, TILT_LIMIT))

    def theta_of(p):
        return p[:2 * k], (p[-1] if fit_tilt else t0)

    p0 = np.ravel(np.column_stack([f0, z0]))
    lo = np.ravel(np.column_stack([f0 * (1 - shift), np.full(k, np.log(0.002))]))
    hi = np.ravel(np.column_stack([f0 * (1 + shift), np.full(k, np.log(0.2))]))
    if fit_tilt:
        p0, lo, hi = np.r_[p0, t0], np.r_[lo, -TILT_LIMIT], np.r_[hi, TILT_LIMIT]
    logy = np.log(y)

    def resid(p):
        th, tl = theta_of(p)
        m, *_ = _model(f, y, bin_hz, th, coherent, tl)
        return (np.log(np.maximum(m, 1e-30)) - logy).ravel()

    sd = np.full((k, 2), np.nan)
    if k:
        sol = optimize.least_squares(resid, p0, bounds=(lo, hi), x_scale="jac", max_nfev=60 * (k + 2))
        p = sol.x
        sd = _standard_errors(sol, y.size, k)
    else:
        p = p0
    theta, tilt = theta_of(p)
    model, coef, A, pairs = _model(f, y, bin_hz, theta, coherent, tilt)
    without = np.zeros((k, y.shape[1]))
    for i in range(k):
        own = [i] + [k + c for c, (a, b) in enumerate(pairs) if i in (a, b)]
        part = model - A[:, own] @ coef[own]
        without[i] = [np.interp(theta[2 * i], f, part[:, a]) for a in range(y.shape[1])]
    rss = float(np.sum((np.log(np.maximum(model, 1e-30)) - logy) ** 2))
    return ModalFit(f, theta[0::2].copy(), np.exp(theta[1::2]), coef[:k].T.copy(), model, without, rss,
                    2 * k + int(fit_tilt) + y.shape[1] * (k + len(pairs)), float(tilt),
                    sd[:, 0], sd[:, 1])


def _standard_errors(sol, n: int, k: int) -> np.ndarray:
    """(k, 2) standard errors of each f_m (Hz) and of log zeta_m (so, relative) from the
    Jacobian at the solution: cov = s^2 (J^T J)^-1, s^2 the residual variance with half the
    values counted as independent (overlapping Hann bins); NaN where J^T J is singular."""
    J = np.asarray(sol.jac, float)
    dof = max(n / 2.0 - J.shape[1], 1.0)
    s2 = float(np.sum(sol.fun ** 2)) / dof
    try:
        cov = np.linalg.inv(J.T @ J) * s2
    except np.linalg.LinAlgError:
        return np.full((k, 2), np.nan)
    var = np.sqrt(np.maximum(np.diag(cov), 0.0))
    return np.column_stack([var[0:2 * k:2], var[1:2 * k:2]])


def _bic(fit: ModalFit, n: int) -> float:
    """Schwarz's criterion with half the values counted as independent (overlapping Hann bins)."""
    neff = n / 2.0
    return neff * np.log(max(fit.rss, 1e-300) / n) + fit.n_params * np.log(neff)


def select_modes(f: np.ndarray, y: np.ndarray, bin_hz: float, start: list[tuple[float, float]],
                 max_added: int = MAX_ADDED) -> ModalFit:
    """The peaks ``start`` [(f Hz, zeta)] fitted, then more modes tried one at a time where the
    residual humps most, each kept only when it pays its way (see the module docstring). One BLAS
    thread: the solver's matrices are small, and threads spread over busy cores only wait."""
    with threadpool_limits(limits=1, user_api="blas"):
        return _select(f, y, bin_hz, start, max_added)


def _select(f, y, bin_hz, start, max_added) -> ModalFit:
    fit = fit_modes(f, y, bin_hz, start)
    if start:
        # a rate gyro under white force sees each mode through its mobility (tilt 0); where that
        # shape is grossly wrong for these humps (another sensor, coloured excitation), the tilt
        # is fitted once and then held
        tilted = fit_modes(f, y, bin_hz, start, fit_tilt=True)
        if tilted.rss * TILT_GAIN < fit.rss:
            fit = tilted
    best = _bic(fit, y.size)
    for _ in range(max_added):
        r = np.log(y / np.maximum(fit.model, 1e-30))
        sig = 1.4826 * np.median(np.abs(r - np.median(r, axis=0)), axis=0)
        z = (r / np.maximum(sig, 1e-9)).sum(axis=1)
        reach = np.maximum(0.01 * f, 1.5 * bin_hz)
        # the residual averaged over about a mode's width around each bin (cumulative sums)
        c = np.concatenate(([0.0], np.cumsum(z)))
        lo = np.searchsorted(f, f - reach)
        hi = np.searchsorted(f, f + reach, side="right")
        hump = (c[hi] - c[lo]) / np.maximum(hi - lo, 1)
        for fm in fit.freqs_hz:
            hump[np.abs(f - fm) <= max(MIN_SEPARATION * fm, 1.5 * bin_hz)] = -np.inf
        j = int(np.argmax(hump))
        if not np.isfinite(hump[j]) or hump[j] <= 0:
            break
        start_more = [*zip(fit.freqs_hz, fit.zetas, strict=True), (float(f[j]), 0.03)]
        trial = fit_modes(f, y, bin_hz, start_more, tilt=fit.tilt)
        fn, zt = trial.freqs_hz[-1], trial.zetas[-1]
        near = np.min(np.abs(trial.freqs_hz[:-1] / fn - 1)) if trial.freqs_hz.size > 1 else 1.0
        score = _bic(trial, y.size)
        lift = float(trial.lift_db()[-1].max())
        sd = trial.freq_sd_hz[-1] / fn if trial.freq_sd_hz is not None else np.inf
        if score >= best or not (ZETA_RANGE[0] < zt < ZETA_RANGE[1]) or near < MIN_SEPARATION \
                or lift < MIN_LIFT_DB or not sd <= max(MAX_FREQ_SD, MAX_FREQ_SD_ZETA * zt):
            break
        fit, best = trial, score
    return fit
