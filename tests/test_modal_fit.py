"""The modal model of output spectra (monitor/analysis/modal_fit.py), checked against its sources."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from monitor.analysis import modal_fit as mf
from tests.conftest import examples


@pytest.mark.parametrize(("fn", "zeta"), [(118.0, 0.01), (265.0, 0.025), (505.0, 0.07)])
def test_the_mobility_is_a_rate_resonance_with_its_exact_half_power_band(fn, zeta):
    # the mobility of a single-degree-of-freedom system, s / (s^2 + 2 zeta w s + w^2), from
    # scipy.signal.freqs, has the shape of mf.mobility (scaled to 1 at f_n)
    w = 2 * np.pi * fn
    f = np.linspace(0.3 * fn, 3 * fn, 2001)
    _, h = signal.freqs([2 * zeta * w, 0.0], [1.0, 2 * zeta * w, w * w], worN=2 * np.pi * f)
    np.testing.assert_allclose(mf.mobility(f, fn, zeta), h, rtol=1e-9, atol=1e-12)
    # its half-power band is exactly 2 zeta f_n wide with f1 f2 = f_n^2 (velocity response; Rao,
    # Mechanical Vibrations, sec. 3.5; the shared references)
    f1 = fn * (np.sqrt(1 + zeta**2) - zeta)
    f2 = fn * (np.sqrt(1 + zeta**2) + zeta)
    assert abs(mf.mobility(np.array([f1, f2]), fn, zeta)) ** 2 == pytest.approx([0.5, 0.5], rel=1e-12)
    assert f2 - f1 == pytest.approx(2 * zeta * fn, rel=1e-12) and f1 * f2 == pytest.approx(fn * fn, rel=1e-12)


def test_the_window_kernel_is_the_hann_power_response():
    # F. J. Harris, Proc. IEEE 66(1), 1978, Table 1: Hann equivalent noise bandwidth 1.5 bins,
    # scalloping loss 1.42 dB (power at half a bin off against the centre)
    k = mf.window_kernel(steps=8, half=3)
    centre = k.size // 2
    assert k.sum() == pytest.approx(1.0)
    assert k.sum() / k[centre] / 8 == pytest.approx(1.5, rel=0.005)  # truncated at 3 bins: sidelobes < 0.3 %
    assert 10 * np.log10(k[centre] / k[centre + 4]) == pytest.approx(1.42, abs=0.01)
    assert k[centre + 16] < 1e-12 * k[centre]  # the first zero, two bins out
    np.testing.assert_allclose(k, k[::-1])


def _model_spectrum(f, bin_hz, modes, q, bg_coef):
    """The model itself: resonance and cross terms (theta, Q per axis), plus a background."""
    theta = np.ravel([(fn, np.log(z)) for fn, z in modes])
    A, _, pairs = mf._columns(f, bin_hz, theta, coherent=True)
    k = len(modes)
    coef = np.zeros((A.shape[1], 3))
    for a in range(3):
        coef[:k, a] = q[a]
        for c, (i, j) in enumerate(pairs):
            coef[k + c, a] = 0.6 * np.sqrt(q[a][i] * q[a][j]) * (1 if (i + j + a) % 2 else -1)
        coef[k + len(pairs):, a] = bg_coef
    return A @ coef


@settings(max_examples=examples(15), deadline=None)
@given(st.lists(st.tuples(st.floats(80, 600), st.floats(0.01, 0.07)), min_size=1, max_size=3)
       .filter(lambda ms: all(abs(a[0] - b[0]) > 0.06 * max(a[0], b[0]) for i, a in enumerate(ms) for b in ms[i + 1:])),
       st.floats(2.0, 200.0), st.integers(0, 2**31))
def test_an_exact_modal_spectrum_is_fitted_to_its_parameters(modes, strength, seed):
    # variable projection (Golub and Pereyra 1973) on an exact sample of the model, cross terms
    # included: it must return the generating frequencies and damping ratios
    rng = np.random.default_rng(seed)
    bin_hz = 3.125
    f = np.arange(40.0, 900.0, bin_hz)
    q = [list(strength * rng.uniform(0.2, 1.0, len(modes))) for _ in range(3)]
    bg = rng.uniform(0.5, 1.5, mf.background_basis(f).shape[1])
    y = _model_spectrum(f, bin_hz, modes, q, bg)
    start = [(fn * 1.01, z * 1.3) for fn, z in modes]
    fit = mf.fit_modes(f, y, bin_hz, start)
    for j in range(len(modes)):  # the fit keeps the order of its start
        assert fit.freqs_hz[j] == pytest.approx(modes[j][0], rel=1e-4)
        assert fit.zetas[j] == pytest.approx(modes[j][1], rel=1e-2)
    assert fit.rss < 1e-6


def test_a_neighbour_hidden_in_a_stronger_modes_skirt_is_added_and_noise_adds_nothing():
    # two modes 5 % apart, the weaker one without a peak of its own, on a noisy spectrum: the
    # search starts from the one peak and adds the other (a Bayesian information criterion;
    # Schwarz 1978); the same spectrum without it gains no mode
    bin_hz = 3.125
    f = np.arange(40.0, 900.0, bin_hz)
    bg = np.ones(mf.background_basis(f).shape[1])
    noise = np.exp(np.random.default_rng(4).normal(0, 0.08, (f.size, 3)))
    both = _model_spectrum(f, bin_hz, [(178.0, 0.03), (169.0, 0.021)], [[60.0, 25.0]] * 3, bg) * noise
    fit = mf.select_modes(f, both, bin_hz, [(176.0, 0.03)])
    assert sorted(np.round(fit.freqs_hz, 0)) == [169.0, 178.0]
    one = _model_spectrum(f, bin_hz, [(178.0, 0.03)], [[60.0]] * 3, bg) * noise
    fit = mf.select_modes(f, one, bin_hz, [(176.0, 0.03)])
    assert fit.freqs_hz.size == 1 and fit.freqs_hz[0] == pytest.approx(178.0, rel=0.003)
    flat = _model_spectrum(f, bin_hz, [], [[]] * 3, bg) * noise
    assert mf.select_modes(f, flat, bin_hz, []).freqs_hz.size == 0


def test_the_standard_errors_cover_the_scatter_of_repeated_fits():
    # the frequency's standard error from the Jacobian (cov = s^2 (J^T J)^-1) against the spread
    # of the same fit over 30 noise draws: the same size within a factor of two
    bin_hz = 3.125
    f = np.arange(40.0, 900.0, bin_hz)
    bg = np.ones(mf.background_basis(f).shape[1])
    clean = _model_spectrum(f, bin_hz, [(410.0, 0.05)], [[2.0], [1.5], [0.5]], bg)
    got, sds = [], []
    for seed in range(30):
        noisy = clean * np.exp(np.random.default_rng(seed).normal(0, 0.1, clean.shape))
        fit = mf.fit_modes(f, noisy, bin_hz, [(405.0, 0.03)])
        got.append(fit.freqs_hz[0])
        sds.append(fit.freq_sd_hz[0])
    spread = float(np.std(got, ddof=1))
    assert 0.5 < float(np.median(sds)) / spread < 2.0, (np.median(sds), spread)
