"""Damped sinusoids refined by nonlinear least squares (variable projection).

The matrix pencil (:mod:`.pencil`) finds how many modes a free decay holds and where they are,
but it is not the most accurate estimator: its subspace step spends part of the noise on every
pole, and two overlapping modes (a 410 Hz mode at 5 % and a 505 Hz mode at 3.5 % both die out
within 10 ms) pull each other. Given those estimates as a start, this module fits the decay
itself,

    x_c(t) = sum_i e^(-zeta_i w_i t) (a_ic cos(w_di t) + b_ic sin(w_di t)) + d_c,
    w_di = w_i sqrt(1 - zeta_i^2),

shared poles on every channel c, per-channel amplitudes and offsets, in the least-squares sense.
A frame on its bench mount also wanders slowly (rigid-body motion, a few Hz) while it rings: the
offset d_c can be widened to a slow trend, cosines cos(pi k t / T) of the window T up to a
frequency well under the modes (the discrete cosine basis, as a nuisance regressor; the trend is
fitted, not filtered out, so no filter transient touches the decay's start).
With white Gaussian noise that is the maximum-likelihood estimate, which reaches the
Cramér-Rao bound as the signal-to-noise ratio grows (S. M. Kay, Fundamentals of Statistical
Signal Processing: Estimation Theory, 1993, ch. 3 and 7). The amplitudes enter linearly: for
given poles they are a linear least-squares solution, and only the frequencies and damping
ratios are searched (variable projection: G. H. Golub and V. Pereyra, "The differentiation of
pseudo-inverses and nonlinear least squares problems whose variables separate", SIAM J. Numer.
Anal. 10(2), 1973), with the Jacobian of the projected residual in Kaufman's form (L. Kaufman,
"A variable projection method for solving separable nonlinear least squares problems", BIT 15,
1975). Units: Hz, seconds, damping ratio dimensionless.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

F_REACH = 0.03  #: a refined frequency stays within this share of its start (and short of its neighbours)
Z_REACH = 3.0  #: a refined damping ratio stays within this factor of its start


@dataclass(frozen=True)
class FittedMode:
    freq_hz: float  #: undamped natural frequency
    damping_ratio: float
    amplitudes: tuple[float, ...]  #: initial amplitude sqrt(a^2 + b^2) per channel (units of x)
    at_bound: bool  #: the search stopped at its reach: the start was not near a minimum
    freq_se_hz: float = float("nan")  #: standard error of ``freq_hz`` (see :func:`fit_decay`)
    damping_se: float = float("nan")  #: standard error of ``damping_ratio``


@dataclass(frozen=True)
class DecayFit:
    modes: list[FittedMode]  #: in order of frequency
    residual_rms: tuple[float, ...]  #: per channel, what the fitted modes and offset leave (units of x)


def basis(t: np.ndarray, freq_hz: np.ndarray, zeta: np.ndarray) -> np.ndarray:
    """Columns e^(-zeta w t) cos(w_d t), e^(-zeta w t) sin(w_d t) per mode, then a constant: (N, 2M + 1)."""
    w = 2 * np.pi * np.asarray(freq_hz, float)
    z = np.asarray(zeta, float)
    e = np.exp(-(z * w)[None, :] * t[:, None])
    ph = (w * np.sqrt(1 - z * z))[None, :] * t[:, None]
    cols = np.empty((t.size, 2 * w.size + 1))
    cols[:, 0:-1:2] = e * np.cos(ph)
    cols[:, 1:-1:2] = e * np.sin(ph)
    cols[:, -1] = 1.0
    return cols


def trend(t: np.ndarray, below_hz: float) -> np.ndarray:
    """Slow-trend columns over the window T = N dt: a line and a parabola, then the cosines
    cos(pi k t / T), k = 1 .. floor(2 T below_hz) (the DCT-II basis): (N, K + 2), or (N, 0) when
    ``below_hz`` is 0. The cosines alone describe the window's even extension, whose slope jumps
    at both ends, so a wander that is still moving there converges slowly, with its error at the
    ends, where a decay starts; the line and the parabola take up the ends' slopes."""
    span = (t[-1] - t[0]) * t.size / max(t.size - 1, 1) if t.size > 1 else 0.0
    k = np.arange(1, int(np.floor(2 * span * below_hz)) + 1)
    if k.size == 0:
        return np.zeros((t.size, 0))
    u = 2 * (t - t[0]) / max(span, 1e-30) - 1
    cos = np.cos(np.pi * k[None, :] * (t - t[0])[:, None] / max(span, 1e-30))
    return np.concatenate([u[:, None], (u * u - 1 / 3)[:, None], cos], axis=1)


def fit_decay(x: np.ndarray, dt: float, freq_hz, zeta, trend_hz: float = 0.0) -> DecayFit:
    """Refine the modes (``freq_hz``, ``zeta``: starting estimates) of the free decay ``x``
    ((N,) or (N, C), sampled every ``dt`` s from t = 0) by variable-projection least squares.

    Each frequency is searched within :data:`F_REACH` of its start and short of halfway to
    the next mode's start; each damping ratio within a factor :data:`Z_REACH` (and under 0.5).
    A mode whose search ends at that reach is flagged ``at_bound``. Standard errors are the
    square roots of the diagonal of s^2 (J^T J)^-1, J the Jacobian of the projected residual at
    the solution and s^2 = RSS / (N - p) (the least-squares form of the Cramér-Rao bound for a
    signal in white Gaussian noise: Kay 1993, sec. 3.9 and 7.8). ``trend_hz``: a slow trend
    under this frequency (Hz) is fitted beside the offset (:func:`trend`)."""
    x = np.asarray(x, float).reshape(np.shape(x)[0], -1)
    f0 = np.asarray(freq_hz, float).ravel()
    z0 = np.asarray(zeta, float).ravel()
    m = f0.size
    if m == 0:
        return DecayFit([], tuple(float(v) for v in np.sqrt(np.mean((x - x.mean(axis=0)) ** 2, axis=0))))
    order = np.argsort(f0)
    f0, z0 = f0[order], z0[order]
    t = np.arange(x.shape[0]) * dt
    slow = trend(t, trend_hz)
    gaps = np.diff(f0)
    lo_f = f0 * (1 - F_REACH)
    hi_f = f0 * (1 + F_REACH)
    if m > 1:  # a mode may not reach past halfway to its neighbour's start
        lo_f[1:] = np.maximum(lo_f[1:], f0[1:] - 0.45 * gaps)
        hi_f[:-1] = np.minimum(hi_f[:-1], f0[:-1] + 0.45 * gaps)
    lo_z = z0 / Z_REACH
    hi_z = np.minimum(z0 * Z_REACH, 0.5)
    lo = np.concatenate([lo_f, lo_z])
    hi = np.concatenate([hi_f, hi_z])
    th0 = np.clip(np.concatenate([f0, z0]), lo, hi)
    cache: dict = {}

    def solve(th):
        key = th.tobytes()
        if key not in cache:
            cache.clear()
            b = np.concatenate([basis(t, th[:m], th[m:]), slow], axis=1)
            q, r = np.linalg.qr(b)
            c = np.linalg.lstsq(r, q.T @ x, rcond=None)[0]  # (2M + 1 + K, C)
            cache[key] = (b, q, c, x - b @ c)
        return cache[key]

    def residual(th):
        return solve(th)[3].ravel()

    def jacobian(th):
        # Kaufman: J_k = -(I - Q Q^T) (dB/dth_k) c, where only mode i's two columns depend on th_k
        b, q, c, _ = solve(th)
        f, z = th[:m], th[m:]
        w = 2 * np.pi * f
        sq = np.sqrt(1 - z * z)
        da = np.concatenate([2 * np.pi * z, w])  # d(zeta w)/d(f, zeta)
        dwd = np.concatenate([2 * np.pi * sq, -w * z / sq])  # d(w_d)/d(f, zeta)
        ec, es = b[:, 0:2 * m:2], b[:, 1:2 * m:2]  # (N, M) each mode's e cos and e sin columns
        ca, cb = c[0:2 * m:2], c[1:2 * m:2]  # (M, C) their amplitudes
        # d(e cos)/d(alpha) = -t e cos, d(e cos)/d(w_d) = -t e sin; d(e sin): -t e sin, t e cos;
        # for parameter k of mode i, dB/dth_k c = d(e cos) ca_i + d(e sin) cb_i
        d_alpha = -t[:, None, None] * (ec[:, :, None] * ca[None] + es[:, :, None] * cb[None])  # (N, M, C)
        d_wd = t[:, None, None] * (ec[:, :, None] * cb[None] - es[:, :, None] * ca[None])
        d = np.concatenate([d_alpha * da[None, :m, None] + d_wd * dwd[None, :m, None],
                            d_alpha * da[None, m:, None] + d_wd * dwd[None, m:, None]], axis=1)  # (N, 2M, C)
        d = d.reshape(t.size, -1)
        d -= q @ (q.T @ d)
        jac = -d.reshape(t.size, 2 * m, -1).transpose(0, 2, 1).reshape(x.size, 2 * m)
        return jac

    scale = np.concatenate([np.maximum(f0 * 1e-3, 1e-6), np.maximum(z0 * 0.05, 1e-6)])
    res = optimize.least_squares(residual, th0, jac=jacobian, bounds=(lo, hi), x_scale=scale,
                                 method="trf", xtol=1e-10, ftol=1e-12, gtol=1e-12, max_nfev=200)
    th = res.x
    _, _, c, left = solve(th)
    dof = max(1, x.size - 2 * m - c.size)
    try:
        cov = np.linalg.inv(res.jac.T @ res.jac) * (float(np.sum(left * left)) / dof)
        se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        se = np.full(2 * m, np.nan)
    span = hi - lo
    near = (th - lo <= 1e-4 * span) | (hi - th <= 1e-4 * span)
    out = []
    for i in range(m):
        amp = np.hypot(c[2 * i], c[2 * i + 1])
        out.append(FittedMode(float(th[i]), float(th[m + i]), tuple(float(a) for a in amp),
                              bool(near[i] or near[m + i]), float(se[i]), float(se[m + i])))
    return DecayFit(out, tuple(float(v) for v in np.sqrt(np.mean(left**2, axis=0))))


def _rss(x: np.ndarray, b: np.ndarray) -> tuple[float, np.ndarray]:
    c = np.linalg.lstsq(b, x, rcond=None)[0]
    r = x - b @ c
    return float(np.sum(r * r)), r


def fit_decay_growing(x: np.ndarray, dt: float, freq_hz, zeta, trend_hz: float = 0.0, fmin: float = 30.0,
                      fmax: float = 800.0, max_new: int = 2, min_snr: float = 3.0,
                      new_zeta: float = 0.05, look_s: float = 0.1) -> tuple[DecayFit, int]:
    """:func:`fit_decay`, then modes the start missed added one at a time while each earns its place.

    A candidate is the highest peak, between ``fmin`` and ``fmax`` Hz and more than
    :data:`F_REACH` from every mode already there, of the power spectrum of what the modes *at
    their starting values* leave over the first ``look_s`` seconds (held at their starts, an
    overlapping mode the start lacks cannot be absorbed by its neighbours before it is looked
    for; a heavily damped mode has died out after 0.1 s). The fit with the candidate (started at
    ``new_zeta``) replaces the fit without it when the candidate's search did not end at its
    reach, it starts at least ``min_snr`` times over the residual RMS on some channel, and the
    Bayesian information criterion N ln(RSS / N) + k ln N (Schwarz 1978, N values, k fitted
    parameters) falls. Returns the fit and how many modes were added."""
    x = np.asarray(x, float).reshape(np.shape(x)[0], -1)
    f = [float(v) for v in np.ravel(freq_hz)]
    z = [float(v) for v in np.ravel(zeta)]
    fit = fit_decay(x, dt, f, z, trend_hz)
    n_val = x.size
    t = np.arange(x.shape[0]) * dt
    slow = trend(t, trend_hz)
    added = 0

    def bic(res: DecayFit) -> float:
        rss = float(np.sum(np.square(res.residual_rms)) * x.shape[0])
        k = len(res.modes) * (2 + 2 * x.shape[1]) + x.shape[1] * (1 + slow.shape[1])
        return n_val * np.log(max(rss, 1e-300) / n_val) + k * np.log(n_val)

    for _ in range(max_new):
        _, r = _rss(x, np.concatenate([basis(t, f, z), slow], axis=1))
        m = max(8, min(x.shape[0], int(look_s / dt)))
        nfft = 1 << int(np.ceil(np.log2(16 * m)))
        p = (np.abs(np.fft.rfft(r[:m], nfft, axis=0)) ** 2).sum(axis=1)
        fr = np.fft.rfftfreq(nfft, dt)
        ok = (fr >= fmin) & (fr <= fmax)
        for f0 in f:
            ok &= np.abs(fr - f0) > F_REACH * f0
        if not ok.any():
            break
        cand = float(fr[np.argmax(np.where(ok, p, -1.0))])
        trial = fit_decay(x, dt, f + [cand], z + [new_zeta], trend_hz)
        new = min(trial.modes, key=lambda mm: abs(mm.freq_hz - cand))
        noise = np.maximum(np.array(trial.residual_rms), 1e-30)
        if new.at_bound or np.max(np.array(new.amplitudes) / noise) < min_snr or bic(trial) >= bic(fit):
            break
        fit, added = trial, added + 1
        f, z = [mm.freq_hz for mm in fit.modes], [mm.damping_ratio for mm in fit.modes]
    return fit, added
