"""Rolling spectra against scipy.signal and published window figures."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from monitor.peaks import interpolate_bin
from monitor.spectra import RollingSTFT, SpectrumConfig, window
from tests.conftest import examples

FS = 8000.0


def _frames(cfg, x, cuts):
    st_ = RollingSTFT(cfg)
    out, amp, starts = [], [], []
    prev = 0
    for c in [*cuts, len(x)]:
        fb = st_.push(x[prev:c])
        prev = c
        if fb is not None:
            out.append(fb.psd)
            amp.append(fb.amp)
            starts.append(fb.start)
    return np.concatenate(out), np.concatenate(amp), np.concatenate(starts)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(0, 12_000), max_size=12), st.sampled_from([(2048, 0.75), (2048, 0.875), (1024, 0.5)]))
def test_frames_equal_short_time_fft_and_welch(cuts, shape):
    # REFERENCES: ShortTimeFFT(scale_to='psd', fft_mode='onesided2X').spectrogram(x, detr='constant')
    # interior slices, and their mean equals welch to ~1e-15.
    nper, ov = shape
    cfg = SpectrumConfig(FS, nper / FS, ov)
    rng = np.random.default_rng(len(cuts))
    x = rng.normal(size=(12_000, 3)) * [1.0, 3.0, 0.5] + [5.0, -2.0, 0.0]
    psd, _, starts = _frames(cfg, x, sorted(cuts))
    sft = signal.ShortTimeFFT.from_window("hann", FS, nper, cfg.noverlap, scale_to="psd", fft_mode="onesided2X")
    ref = sft.spectrogram(x, detr="constant", axis=0)  # (bins, 3, slices)
    # slice p covers samples p*hop - m_num_mid ... + nperseg; keep those wholly inside the signal
    p = np.arange(sft.p_min, sft.p_max(x.shape[0]))
    start = p * sft.hop - sft.m_num_mid
    inside = (start >= 0) & (start + nper <= x.shape[0])
    interior = ref[:, :, (p - sft.p_min)[inside]]
    first = start[inside][0] // cfg.hop
    ours = np.transpose(psd, (1, 2, 0))[:, :, first : first + interior.shape[2]]
    assert interior.shape[2] >= 3
    # the DC bin is ~0 after mean removal (cancellation noise): an absolute floor of 1e-12 of the peak
    np.testing.assert_allclose(ours, interior, rtol=1e-9, atol=1e-12 * interior.max())
    f, w = signal.welch(x, fs=FS, nperseg=nper, noverlap=cfg.noverlap, axis=0)
    np.testing.assert_allclose(psd.mean(axis=0), w, rtol=1e-9, atol=1e-12 * w.max())
    assert np.all(np.diff(starts) == cfg.hop)


@pytest.mark.parametrize(
    ("name", "cg", "enbw"),
    # Hann: F. J. Harris, Proc. IEEE 66(1), 1978, Table 1. Flat-top: scipy.signal.windows.flattop's
    # coefficients (D'Antona and Ferrero 2006), as computed in REFERENCES.md for periodic windows
    [("hann", 0.500, 1.500), ("flattop", 0.216, 3.770)],
)
def test_window_coherent_gain_and_enbw(name, cg, enbw):
    w, s1, s2 = window(name, 4096)
    assert s1 / 4096 == pytest.approx(cg, abs=0.001)
    assert 4096 * s2 / s1**2 == pytest.approx(enbw, abs=0.005)
    assert not w.flags.writeable


@pytest.mark.parametrize("name", ["hann", "flattop"])
def test_tone_amplitude_is_coherent_gain_corrected(name):
    cfg = SpectrumConfig(FS, 2048 / FS, 0.5, name)
    t = np.arange(2048) / FS
    f0 = 50 * cfg.bin_hz  # on a bin centre
    x = np.stack([3.0 * np.sin(2 * np.pi * f0 * t)] * 3, axis=1)
    fb = RollingSTFT(cfg).push(x)
    assert fb.amp[0, 50, 0] == pytest.approx(3.0, rel=1e-9)
    # REFERENCES: welch(scaling='spectrum') peak equals A^2/2 for a tone on a bin centre
    _, spec = signal.welch(x[:, 0], fs=FS, window=name, nperseg=2048, scaling="spectrum")
    assert spec[50] == pytest.approx(9.0 / 2, rel=1e-9)


def test_flattop_reads_amplitude_between_bins():
    # REFERENCES.md (scipy's flat-top coefficients, D'Antona and Ferrero 2006): scalloping loss
    # about 0.01 dB, so a tone half-way between bins reads its amplitude within 0.02 dB
    cfg = SpectrumConfig(FS, 2048 / FS, 0.5, "flattop")
    t = np.arange(2048) / FS
    x = np.stack([2.0 * np.sin(2 * np.pi * 60.5 * cfg.bin_hz * t)] * 3, axis=1)
    a = RollingSTFT(cfg).push(x).amp[0, :, 0].max()
    assert 20 * np.log10(a / 2.0) == pytest.approx(0.0, abs=0.02)


def test_white_noise_density_level():
    # REFERENCES: white noise of variance s^2 has one-sided density 2 s^2 / fs
    rng = np.random.default_rng(1)
    x = rng.normal(0, 2.0, size=(400_000, 3))
    psd, _, _ = _frames(SpectrumConfig(FS, 0.256, 0.5), x, [])
    assert np.median(psd.mean(axis=0)[5:-5]) == pytest.approx(2 * 4.0 / FS, rel=0.02)


@pytest.mark.parametrize("name", ["hann", "flattop"])
@pytest.mark.parametrize("offset", [0.0, 0.13, 0.37, 0.5, 0.71, 0.92])
def test_peak_frequency_within_a_tenth_of_a_bin(name, offset):
    cfg = SpectrumConfig(FS, 2048 / FS, 0.5, name)
    f0 = (73 + offset) * cfg.bin_hz
    t = np.arange(2048) / FS
    x = np.stack([np.sin(2 * np.pi * f0 * t + 0.3)] * 3, axis=1)
    amp = RollingSTFT(cfg).push(x).amp[0, :, 0]
    k = int(np.argmax(amp))
    est = (k + float(interpolate_bin(amp, k, name))) * cfg.bin_hz
    assert abs(est - f0) < 0.1 * cfg.bin_hz


def test_reset_starts_a_new_segment_so_no_frame_spans_a_gap():
    cfg = SpectrumConfig(FS, 0.256, 0.75)
    st_ = RollingSTFT(cfg)
    assert st_.push(np.zeros((2000, 3))) is None  # 2000 < 2048
    st_.reset()
    assert st_.push(np.zeros((100, 3))) is None  # the 2000 before the gap do not count
    fb = st_.push(np.ones((2000, 3)))
    assert fb is not None and fb.segment == 1 and fb.start.tolist() == [0]


def test_config_errors_are_pinned():
    with pytest.raises(ValueError, match=r"window='kaiser' not in"):
        SpectrumConfig(FS, window="kaiser")
    with pytest.raises(ValueError, match="overlap=0.99"):
        SpectrumConfig(FS, overlap=0.99)
    with pytest.raises(ValueError, match="need 16"):
        SpectrumConfig(FS, window_s=0.001)


def test_engine_average_and_peak_hold_match_their_definitions():
    # e_k = e_(k-1) + a (p_k - e_(k-1)), a = 1 - exp(-hop / tau); peak = running maximum
    import firmware_protocol as fp
    from monitor.assembler import DeviceChange, Samples
    from monitor.engine import Engine, EngineConfig

    eng = Engine(EngineConfig(window_s=0.064, overlap=0.5, stray_peaks=False))
    eng.feed([DeviceChange(fp.DeviceInfo(motor_count=0), False)])
    rng = np.random.default_rng(5)
    x = rng.normal(size=(8000, 3)).astype(np.float32)
    eng.feed([Samples(0, 0, 0.0, 8000.0, x[:3000])])  # several frames in one batch
    eng.feed([Samples(0, 3000, 3000 / 8000, 8000.0, x[3000:])])
    cfg = SpectrumConfig(8000.0, 0.064, 0.5)
    psd, _, _ = _frames(cfg, x.astype(np.float64), [])
    a = 1.0 - np.exp(-(cfg.hop / 8000.0) / 1.0)
    e = psd[0].copy()
    for p in psd[1:]:
        e += a * (p - e)
    snap = eng.snapshot()
    np.testing.assert_allclose(snap.ema, e, rtol=1e-9)
    np.testing.assert_allclose(snap.peak, psd.max(axis=0), rtol=1e-12)
    assert snap.frames == psd.shape[0]


@settings(max_examples=examples(30), deadline=None)
@given(st.integers(0, 2**31 - 1), st.lists(st.integers(1, 2000), min_size=1, max_size=6))
def test_a_masked_frame_equals_the_periodogram_of_its_real_samples(seed, cuts):
    """Each frame over filled samples is scipy.signal.periodogram of the real samples (mean of the
    real samples removed, filled ones zeroed; Hann window, density) scaled by sum(w^2)/sum((w m)^2),
    whatever the holes and however the samples were pushed; its filled share is the mask's."""
    rng = np.random.default_rng(seed)
    cfg = SpectrumConfig(FS, 0.064, 0.5)
    n = cfg.nperseg * 6
    x = rng.normal(0, 2.0, (n, 3)) + 0.7
    valid = np.ones(n, bool)
    for at in rng.integers(0, n - 64, 4):
        valid[at: at + rng.integers(1, 64)] = False  # holes of one sample and up
    if rng.random() < 0.5:  # a hole longer than a frame: frames with no real sample at all
        at = int(rng.integers(0, n - cfg.nperseg - 8))
        valid[at: at + cfg.nperseg + 8] = False
    stft = RollingSTFT(cfg)
    got, shares, starts = [], [], []
    edges = sorted({min(c, n) for c in np.cumsum(cuts)} | {n})
    a = 0
    for b in edges:
        # a block with no hole is pushed as the assembler pushes it: without a mask, half the time
        mask = None if valid[a:b].all() and rng.random() < 0.5 else valid[a:b]
        fb = stft.push(np.where(valid[a:b, None], x[a:b], 0.0), mask)
        if fb is not None:
            got.append(fb.psd)
            starts.append(fb.start)
            shares.append(fb.filled if fb.filled is not None else np.zeros(len(fb.start)))
        a = b
    psd, start, share = np.concatenate(got), np.concatenate(starts), np.concatenate(shares)
    assert list(start) == list(range(0, n - cfg.nperseg + 1, cfg.hop))  # every frame, once, in order
    w = signal.get_window("hann", cfg.nperseg)
    for k, s0 in enumerate(start.tolist()):
        m = valid[s0: s0 + cfg.nperseg].astype(float)
        assert share[k] == pytest.approx(1 - m.mean())
        if not m.any():
            np.testing.assert_array_equal(psd[k], 0.0)  # nothing real: no power, not a NaN
            continue
        seg = x[s0: s0 + cfg.nperseg]
        mean = (seg * m[:, None]).sum(axis=0) / m.sum()
        _, ref = signal.periodogram((seg - mean) * m[:, None], FS, window=w, detrend=False, axis=0)
        ref *= (w @ w) / ((w * m) @ (w * m))
        np.testing.assert_allclose(psd[k], ref, rtol=1e-9, atol=1e-12)


def test_a_frame_with_one_real_sample_removes_that_sample_as_its_mean():
    # a 16 ms window can sit almost wholly inside a 50 ms bridged hole: with one real sample left,
    # its mean is that sample, the frame is all zeros after removing it, and so is its PSD
    cfg = SpectrumConfig(FS, 0.016, 0.0)
    n = cfg.nperseg
    x = np.full((n, 3), 5.0)
    valid = np.zeros(n, bool)
    valid[n // 2] = True
    fb = RollingSTFT(cfg).push(np.where(valid[:, None], x, 0.0), valid)
    assert fb.filled[0] == pytest.approx(1 - 1 / n)
    np.testing.assert_allclose(fb.psd[0], 0.0, atol=1e-20)  # the mean over 1 sample, not half of it


def test_a_frame_with_two_real_samples_under_the_window_skirt_keeps_their_power():
    # two real samples where the Hann window is small (sum((w m)^2) well under 1): their PSD is
    # the periodogram of the two, scaled up to the whole window's energy, not zeroed
    cfg = SpectrumConfig(FS, 0.064, 0.0)
    n = cfg.nperseg
    x = np.zeros((n, 3))
    x[10], x[14] = 3.0, -1.0
    valid = np.zeros(n, bool)
    valid[[10, 14]] = True
    w = signal.get_window("hann", n)
    m = valid.astype(float)
    assert 0 < (w * m) @ (w * m) < 0.1
    fb = RollingSTFT(cfg).push(x, valid)
    mean = x[valid].mean(axis=0)
    _, ref = signal.periodogram((x - mean) * m[:, None], FS, window=w, detrend=False, axis=0)
    ref *= (w @ w) / ((w * m) @ (w * m))
    assert ref.max() > 0
    np.testing.assert_allclose(fb.psd[0], ref, rtol=1e-9)


@pytest.mark.parametrize("name", ["flattop", "blackman", "hamming"])
def test_the_ratio_table_is_the_windows_own_transform(name, monkeypatch):
    # the table inverts |W(1 - d)| / |W(d)| (peaks module docstring); W evaluated here by the DFT
    # sum W(v) = sum_n w[n] exp(-2 pi i v n / N) directly, not by the zero-padded FFT the table uses
    import monitor.peaks as peaks

    monkeypatch.setattr(peaks, "_TABLES", {})  # computed afresh, not from an earlier test's cache
    ratios, deltas = peaks._ratio_table(name)
    assert np.all(np.diff(ratios) >= 0) and deltas.min() == 0.0 and deltas.max() == 0.5
    n = 256
    w = signal.get_window(name, n, fftbins=True)

    def mag(v):
        return abs(np.sum(w * np.exp(-2j * np.pi * v * np.arange(n) / n)))

    for d in (0.0, 0.125, 0.25, 0.375, 0.5):
        i = int(np.flatnonzero(np.isclose(deltas, d))[0])
        assert ratios[i] == pytest.approx(mag(1 - d) / mag(d), rel=1e-9)


@pytest.mark.parametrize("name", ["flattop", "blackman"])
@pytest.mark.parametrize("offset", [0.05, 0.21, 0.44, 0.63, 0.88])
def test_a_clean_tone_is_placed_exactly_by_the_ratio_table(name, offset, monkeypatch):
    import monitor.peaks as peaks

    monkeypatch.setattr(peaks, "_TABLES", {})
    n = 2048
    k0 = 300 + offset
    w = signal.get_window(name, n, fftbins=True)
    x = np.cos(2 * np.pi * k0 * np.arange(n) / n) * w
    amp = np.abs(np.fft.rfft(x))
    k = int(np.argmax(amp))
    # the table steps 1/256 bin: linear interpolation between its points is good to 1e-3 bin
    assert k + float(interpolate_bin(amp, k, name)) == pytest.approx(k0, abs=2e-3)


def test_peak_interpolation_at_the_edges_and_on_flat_or_silent_spectra():
    # Grandke's Hann ratio delta = (2a - 1) / (a + 1), a = larger neighbour / peak, clipped to
    # [0, 1] (the tone lies between k and its larger neighbour); bins 0 and n - 1 have one
    # neighbour only and are not moved. Any numpy warning fails the test.
    import warnings

    mag = np.array([4.0, 3.0, 0.5, 1.0, 2.0, 1.0, 0.0, 2.0, 1.0, 5.0])
    n = mag.size
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = interpolate_bin(mag, np.arange(n))
        silent = interpolate_bin(np.zeros(8), np.arange(8))
        flat = interpolate_bin(np.ones(8), np.arange(8), "flattop")
    a = {1: 4 / 3, 2: 6.0, 3: 2.0, 4: 0.5, 5: 2.0, 7: 0.5, 8: 5.0}  # larger neighbour / bin
    sign = {1: -1, 2: -1, 3: 1, 4: 1, 5: -1, 7: 1, 8: 1}  # ties go right
    want = np.zeros(n)
    for k, al in a.items():
        want[k] = sign[k] * np.clip((2 * al - 1) / (al + 1), 0.0, 1.0)
    want[6] = 0.0  # a silent bin: no ratio, no move
    assert got[0] == 0.0 and got[n - 1] == 0.0
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    assert np.all(silent == 0.0) and flat[0] == 0.0 and flat[-1] == 0.0
    assert np.all(np.abs(flat[1:-1]) <= 0.5 + 1e-9)


def test_hann_uses_the_exact_ratio_not_the_table():
    # a clean Hann tone is placed to rounding by Grandke's closed form (the table would be good
    # only to its 1/256-bin step)
    n = 1024
    for k0 in (100.0 + d for d in (0.011, 0.137, 0.293, 0.377, 0.449)):
        w = signal.get_window("hann", n, fftbins=True)
        amp = np.abs(np.fft.rfft(np.cos(2 * np.pi * k0 * np.arange(n) / n) * w))
        k = int(np.argmax(amp))
        assert k + float(interpolate_bin(amp, k, "hann")) == pytest.approx(k0, abs=2e-4)
