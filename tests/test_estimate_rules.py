"""The speed estimate's rules at their thresholds, and the order names.

The harmonic sum (Noll 1969) scores a candidate shaft frequency f0 by the whitened log spectrum at
its orders 1, 2, blades and 2 x blades (weights 1, 1, 0.8, 0.6, spinrig's own); an estimate needs
a score of 12 dB and two orders 6 dB or more over the floor. Spectra here are a flat floor of
1 with single-bin lines set in dB, so the scores are exact. The refinement is checked on a real
Hann periodogram (``scipy.signal.periodogram``) of two tones.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from monitor.orders import order_amplitudes, order_freqs, order_label, order_multipliers
from monitor.rpm_estimate import RpmEstimator

BIN = 2.0
FREQS = np.arange(0, 2001.0, BIN)  # Nyquist 2000 Hz


def _spectrum(lines):
    p = np.ones(FREQS.size)
    for f_hz, db in lines:
        p[int(round(f_hz / BIN))] = 10 ** (db / 10)
    return p


@pytest.mark.parametrize("db,found", [(7.4, False), (7.6, True)])
def test_an_estimate_needs_twelve_db_of_harmonic_evidence(db, found):
    # 1x and 2x blade-pass of 6000 RPM (100 and 600 Hz), weights 1 and 0.6: the score is 1.6 x db
    # (11.84 or 12.16); both lines stand over 6 dB, so only the score decides
    got = RpmEstimator(FREQS, blades=3).estimate(_spectrum([(100.0, db), (600.0, db)]))
    assert (got == pytest.approx(6000.0, rel=0.01)) if found else np.isnan(got)


@pytest.mark.parametrize("db,found", [(5.9, False), (6.1, True)])
def test_an_estimate_needs_a_second_order_six_db_over_the_floor(db, found):
    # a strong 1x (20 dB) scores enough alone; the 2x decides whether it is a motor's series
    got = RpmEstimator(FREQS, blades=3).estimate(_spectrum([(100.0, 20.0), (200.0, db)]))
    assert (got == pytest.approx(6000.0, rel=0.01)) if found else np.isnan(got)


def test_the_weights_make_the_blade_orders_count_less():
    # 3x and 6x (weights 0.8 and 0.6) of 6000 RPM at 10 dB score 14 there; the same lines read as
    # 1x and 2x of 18000 RPM score 20: the reading with the lines as low orders wins
    got = RpmEstimator(FREQS, blades=3).estimate(_spectrum([(300.0, 10.0), (600.0, 10.0)]))
    assert got == pytest.approx(18000.0, rel=0.01)


@pytest.mark.parametrize("rpm_max,found", [(45000.0, False), (60000.0, True)])
def test_candidates_stop_at_the_top_speed(rpm_max, found):
    # a motor at 50040 RPM (834 Hz; its 2x at 1668 Hz below Nyquist). Under a 45000 RPM top the
    # lines are read as the blade orders (3x, 6x) of 16680 RPM instead: never above the top
    got = RpmEstimator(FREQS, blades=3, rpm_max=rpm_max).estimate(_spectrum([(834.0, 20.0), (1668.0, 20.0)]))
    assert got == pytest.approx(50040.0 if found else 16680.0, rel=0.01)


def test_candidates_need_their_second_order_below_nyquist():
    # 1x at 1100 Hz: its 2x (2200 Hz) is above Nyquist, so no candidate reaches it
    est = RpmEstimator(FREQS, blades=3, rpm_max=90000.0)
    assert est.f0[-1] <= 1000.0 < est.f0[-1] + est.bin_hz / 4 + 1e-9
    assert est.f0[0] == pytest.approx(1500.0 / 60.0) and est.f0[1] - est.f0[0] == pytest.approx(BIN / 4)


def test_a_line_at_the_last_bin_scores_nothing():
    # orders at Nyquist or beyond score nothing, so a 1x whose 2x sits at the last bin is one line
    est = RpmEstimator(FREQS, blades=3, rpm_max=90000.0)
    assert np.isnan(est.estimate(_spectrum([(1000.0, 20.0), (2000.0, 20.0)])))


def test_the_floor_is_a_running_median_so_a_sloping_floor_does_not_count():
    # a floor rising 30 dB over the band, with no lines: whitened, nothing stands out
    slope = 10 ** (np.linspace(0.0, 3.0, FREQS.size))
    assert np.isnan(RpmEstimator(FREQS, blades=3).estimate(slope))
    lines = slope * _spectrum([(150.0, 15.0), (300.0, 15.0)])
    assert RpmEstimator(FREQS, blades=3).estimate(lines) == pytest.approx(9000.0, rel=0.01)


@pytest.mark.parametrize("f0", [101.3, 137.77, 212.5])
def test_the_estimate_is_refined_to_a_fraction_of_a_bin_on_a_hann_periodogram(f0):
    # two tones (1x and 2x) in white noise, one Hann periodogram of 2048 samples at 8 kHz
    # (3.9 Hz bins): the refined speed is within a tenth of a bin of the truth
    fs, n = 8000.0, 2048
    rng = np.random.default_rng(int(f0 * 100))
    t = np.arange(n) / fs
    x = 3.0 * np.sin(2 * np.pi * f0 * t + 0.3) + 2.0 * np.sin(2 * np.pi * 2 * f0 * t + 1.1)
    x = x + rng.normal(0, 0.05, n)
    freqs, p = scipy.signal.periodogram(x, fs, window="hann")
    got = RpmEstimator(freqs, blades=2).estimate(p)
    bin_hz = fs / n
    assert abs(got / 60.0 - f0) < 0.1 * bin_hz


@pytest.mark.parametrize("f0", [101.3, 137.77, 180.6])
def test_under_a_flat_top_window_the_refinement_uses_that_window(f0):
    # the same tones under scipy's flat-top window, as the engine may use: the estimator told
    # the window refines within a tenth of a bin (measured 0.006 to 0.013); read with Hann's
    # formula the same peaks are 0.22 to 0.41 bins off
    fs, n = 8000.0, 2048
    t = np.arange(n) / fs
    x = 3.0 * np.sin(2 * np.pi * f0 * t + 0.3) + 2.0 * np.sin(2 * np.pi * 2 * f0 * t + 1.1)
    x = x + np.random.default_rng(int(f0 * 100)).normal(0, 0.05, n)
    freqs, p = scipy.signal.periodogram(x, fs, window="flattop")
    got = RpmEstimator(freqs, blades=2, window="flattop").estimate(p)
    assert abs(got / 60.0 - f0) < 0.1 * fs / n


# ----------------------------------------------------------------- orders


def test_order_names():
    assert [order_label(k, 3) for k in (1.0, 2.0, 3.0, 6.0, 5.0)] == [
        "1x", "2x", "blade-pass (3x)", "2x blade-pass (6x)", "5x"]
    assert [order_label(k, 2) for k in (2.0, 4.0)] == ["2x", "2x blade-pass (4x)"]  # 2 blades: 2x first
    assert order_multipliers(5).tolist() == [1.0, 2.0, 5.0, 10.0]


def test_order_frequencies_of_unknown_speeds_are_unknown_and_read_as_nothing():
    f = order_freqs(np.array([[np.nan, 6000.0]]), 3)
    assert np.isnan(f[0, 0]).all() and f[0, 1].tolist() == [100.0, 200.0, 300.0, 600.0]
    amp = np.ones((1, 1025, 3))
    rss, axis = order_amplitudes(amp, f, 3.90625)
    assert np.isnan(rss[0, 0]).all() and (axis[0, 0] == -1).all()
    assert rss[0, 1] == pytest.approx(np.sqrt(3.0))  # root-sum-square of three axes of 1


def test_orders_outside_the_spectrum_read_as_nothing():
    bins = np.arange(257) * 4.0  # up to 1024 Hz
    amp = np.ones((1, 257, 3))
    # 1x at 1.5 Hz (bin 0: the DC bin is no order), 2x at 3 Hz (bin 1), 6x at 9 Hz; and 6x at 1200 Hz
    freqs = np.array([[[1.5, 3.0, 4.5, 9.0], [200.0, 400.0, 600.0, 1200.0]]])
    rss, axis = order_amplitudes(amp, freqs, bins[1], with_axis=True)
    assert np.isnan(rss[0, 0, 0]) and np.isfinite(rss[0, 0, 1:]).all()
    assert np.isfinite(rss[0, 1, :3]).all() and np.isnan(rss[0, 1, 3]) and axis[0, 1, 3] == -1
    rss2, none = order_amplitudes(amp, freqs, bins[1], with_axis=False)
    assert none is None and np.array_equal(np.isnan(rss2), np.isnan(rss))
