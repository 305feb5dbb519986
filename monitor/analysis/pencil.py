"""Damped sinusoids from a free decay: the matrix pencil method.

Y. Hua and T. K. Sarkar, "Matrix pencil method for estimating parameters of exponentially
damped/undamped sinusoids in noise", IEEE Trans. ASSP 38(5), 1990. For samples
x[n] = sum_i R_i z_i^n (z_i = exp(s_i dt), s_i = -zeta_i w_i +- j w_i sqrt(1 - zeta_i^2)), the
Hankel matrix Y of x (rows x[k .. k+L]) has rank M (the number of complex exponentials); with
Y = U S V^H truncated to the M largest singular values, the poles z_i are the eigenvalues of
pinv(V1) V2, where V1 and V2 are V^H without its last and its first column. Several channels that
share the poles (the three gyro axes after one tap) are stacked row-wise into one Hankel matrix
(the multi-channel form). The pencil parameter L = N/3 lies in the range Hua and Sarkar find least
sensitive to noise (N/3 to N/2).

Poles are kept only when they are *stable across model orders*: found again, within a tolerance
in frequency and damping, at several orders M (the stabilisation idea of modal testing; Ewins,
Modal Testing, ch. 4). Units: Hz, seconds; damping ratio dimensionless.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Pole:
    freq_hz: float  #: undamped natural frequency f_n = |s| / 2 pi
    damping_ratio: float  #: zeta = -Re(s) / |s|
    amplitudes: tuple[float, ...] = ()  #: |residue| per channel (same units as the samples)

    @property
    def damped_hz(self) -> float:
        return self.freq_hz * np.sqrt(max(0.0, 1.0 - self.damping_ratio**2))


def hankel_stack(x: np.ndarray, L: int) -> np.ndarray:
    """Rows x[k : k + L + 1] for k = 0 .. N - L - 1, for every channel of ``x`` (N, C), stacked."""
    x = np.atleast_2d(np.asarray(x, float).T).T if np.ndim(x) == 1 else np.asarray(x, float)
    n = x.shape[0]
    idx = np.arange(n - L)[:, None] + np.arange(L + 1)[None, :]
    return np.concatenate([x[:, c][idx] for c in range(x.shape[1])], axis=0)


def pencil_poles(x: np.ndarray, dt: float, order: int, L: int | None = None, svd=None) -> np.ndarray:
    """Continuous-time poles s (rad/s) of ``order`` complex exponentials in ``x`` ((N,) or (N, C)
    samples every ``dt`` s). ``svd``: a precomputed (U, S, Vh) of the Hankel stack, so that many
    orders cost one decomposition."""
    if svd is None:
        n = x.shape[0]
        L = L or n // 3
        svd = np.linalg.svd(hankel_stack(x, L), full_matrices=False)
    _, _, vh = svd
    v = vh[:order].conj().T  # (L+1, M)
    v1, v2 = v[:-1], v[1:]
    z = np.linalg.eigvals(np.linalg.pinv(v1) @ v2)
    z = z[np.abs(z) > 1e-12]
    return np.log(z) / dt


def residues(x: np.ndarray, dt: float, s: np.ndarray) -> np.ndarray:
    """Least-squares complex amplitudes (len(s), C) of the poles ``s`` in ``x`` (N, C)."""
    x = x.reshape(x.shape[0], -1)
    n = np.arange(x.shape[0])[:, None]
    V = np.exp(n * dt * s[None, :])
    r, *_ = np.linalg.lstsq(V, x.astype(complex), rcond=None)
    return r


def identify(x: np.ndarray, dt: float, orders=range(8, 41, 2), fmin: float = 20.0, fmax: float | None = None,
             f_tol: float = 0.005, z_tol: float = 0.2, min_orders: int = 4, min_snr: float = 3.0) -> list[Pole]:
    """Modes in a free decay ``x`` ((N,) or (N, C), sampled every ``dt`` s): poles with positive
    frequency between ``fmin`` and ``fmax`` Hz and damping between 0 and 0.5 that are found at
    ``min_orders`` or more model orders, each within ``f_tol`` (relative) in frequency and
    ``z_tol`` (relative) in damping ratio of the highest-order pole; that pole is reported, with
    its per-channel initial amplitude, when that amplitude is at least ``min_snr`` times the RMS
    of what the fitted poles leave unexplained on some channel."""
    x = np.asarray(x, float)
    x_raw = x.reshape(x.shape[0], -1)
    x2 = x_raw  # no mean removal: a decay's mean is not its offset (the caller removes a known bias)
    scale = np.maximum(np.sqrt(np.mean(x2**2, axis=0)), 1e-30)
    xn = x2 / scale  # every channel weighs the same in the decomposition
    n = xn.shape[0]
    L = n // 3
    svd = np.linalg.svd(hankel_stack(xn, L), full_matrices=False)
    fmax = fmax if fmax is not None else 0.45 / dt
    per_order = []
    sv = svd[1]
    rank = int(np.count_nonzero(sv > 1e-9 * sv[0]))  # orders past the numerical rank fit rounding
    for m in orders:
        if m >= L:
            break
        m = min(m, rank)
        s = pencil_poles(xn, dt, m, svd=svd)
        w = np.abs(s)
        f = w / (2 * np.pi)
        zeta = -s.real / np.maximum(w, 1e-30)
        keep = (s.imag > 0) & (f >= fmin) & (f <= fmax) & (zeta > 0) & (zeta < 0.5)
        per_order.append(np.stack([f[keep], zeta[keep]], axis=1))
    if not per_order:
        return []
    top = per_order[-1]
    found = []
    for f0, z0 in top:
        hits = sum(
            bool(np.any((np.abs(p[:, 0] - f0) <= f_tol * f0) & (np.abs(p[:, 1] - z0) <= z_tol * z0)))
            for p in per_order if p.size
        )
        if hits >= min_orders:
            found.append((f0, z0))
    found.sort()
    # one pole per mode: the stable poles closer than the frequency tolerance are one
    merged: list[tuple[float, float]] = []
    for f0, z0 in found:
        if merged and abs(f0 - merged[-1][0]) <= f_tol * f0:
            continue
        merged.append((f0, z0))
    if not merged:
        return []
    w = 2 * np.pi * np.array([f for f, _ in merged])
    z = np.array([zz for _, zz in merged])
    s = -z * w + 1j * w * np.sqrt(1 - z**2)
    s_all = np.concatenate([s, s.conj(), [0.0]])  # the poles, their conjugates, and an offset (gyro bias)
    r_all = residues(x_raw, dt, s_all)
    n_i = np.arange(x_raw.shape[0])[:, None]
    fit = (np.exp(n_i * dt * s_all[None, :]) @ r_all).real
    noise = np.maximum(np.sqrt(np.mean((x_raw - fit) ** 2, axis=0)), 1e-30)  # (C,) what no pole explains
    amp = 2 * np.abs(r_all[: len(merged)])  # a real decay: the pole and its conjugate together
    out = []
    for i, (f, zz) in enumerate(merged):
        # a decay that starts well over the noise (not a fit of noise), and not a numerical ghost
        if np.max(amp[i] / noise) >= min_snr and amp[i].max() >= 1e-3 * amp.max():
            out.append(Pole(float(f), float(zz), tuple(float(a) for a in amp[i])))
    return out
