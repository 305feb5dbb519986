"""Several overlapping resonance peaks fitted at once: frequency and damping ratio of each.

Each mode m contributes A_{m,a} / ((1 - r^2)^2 + (2 zeta_m r)^2), r = f / f_m, to the power on
axis a (the squared magnitude of a single-degree-of-freedom frequency response; Ewins, Modal
Testing, 2nd ed. 2000, ch. 4, multi-mode curve fitting), on a floor c0_a + c1_a (f - f_c). The
amplitudes and floor enter linearly and are solved for every trial of the frequencies and
damping ratios (variable projection; Golub and Pereyra, SIAM J. Numer. Anal. 10(2), 1973), so
the nonlinear search has two parameters per mode. Residuals are relative (model / data - 1),
which weighs the peak and its skirts alike, like a fit in dB.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize


def sdof_power(f: np.ndarray, fn: float, zeta: float) -> np.ndarray:
    r = f / fn
    return 1.0 / ((1 - r * r) ** 2 + (2 * zeta * r) ** 2)


def _linear(f: np.ndarray, y: np.ndarray, theta: np.ndarray, fc: float) -> tuple[np.ndarray, np.ndarray]:
    """(model (bins, axes), coefficients) for the nonlinear parameters ``theta``: the
    non-negative least-squares amplitudes and floor of each axis, weighted by 1 / y."""
    k = theta.size // 2
    cols = [sdof_power(f, theta[2 * i], np.exp(theta[2 * i + 1])) for i in range(k)]
    cols += [np.ones_like(f), (f - fc) / fc]
    basis = np.column_stack(cols)
    model = np.empty_like(y)
    coef = []
    for a in range(y.shape[1]):
        wgt = 1.0 / y[:, a]
        bw = basis * wgt[:, None]
        # amplitudes and the floor level >= 0; the floor's slope may take either sign
        res = optimize.lsq_linear(bw, np.ones_like(f), bounds=(
            np.r_[np.zeros(k + 1), -np.inf], np.full(k + 2, np.inf)), method="bvls")
        coef.append(res.x)
        model[:, a] = basis @ res.x
    return model, np.array(coef)


def fit_peaks(f: np.ndarray, power: np.ndarray, start: list[tuple[float, float]],
              max_shift: float = 0.04) -> list[tuple[float, float, np.ndarray]] | None:
    """Fit ``len(start)`` modes to ``power`` (bins, axes) > 0 over frequencies ``f`` (Hz), from
    ``start`` [(f Hz, zeta)]. Each frequency stays within ``max_shift`` of its start, each damping
    ratio within 0.002..0.2. Returns [(f Hz, zeta, amplitude per axis)] or None when the fit fails."""
    fc = float(np.mean(f))
    theta0 = np.array([v for fn, z in start for v in (fn, np.log(np.clip(z, 0.003, 0.15)))])
    lo = np.array([v for fn, _ in start for v in (fn * (1 - max_shift), np.log(0.002))])
    hi = np.array([v for fn, _ in start for v in (fn * (1 + max_shift), np.log(0.2))])

    def resid(theta):
        model, _ = _linear(f, power, theta, fc)
        return (model / power - 1.0).ravel()

    try:
        sol = optimize.least_squares(resid, theta0, bounds=(lo, hi), x_scale="jac", max_nfev=200)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not sol.success and sol.status <= 0:
        return None
    _, coef = _linear(f, power, sol.x, fc)
    fit_peaks.last_cost = float(2 * sol.cost)  # sum of squared relative residuals of the last fit
    return [(float(sol.x[2 * i]), float(np.exp(sol.x[2 * i + 1])), coef[:, i]) for i in range(len(start))]
