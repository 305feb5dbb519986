"""The order-tracked map of a sweep: PSD frames, each with its motor speeds, averaged in RPM bins.

Frames: Hann-windowed, mean-removed segments, one-sided PSD in (deg/s)^2/Hz scaled as
``scipy.signal.welch`` (density scaling: |X|^2 / (fs sum w^2), doubled except at DC and Nyquist;
Welch 1967). The map of RPM bin b is the mean of the frames whose mean motor speed falls in b, so
a bin holding consecutive frames of one steady speed equals ``scipy.signal.welch`` over them
(tested). Order k of a motor at n RPM sits at k n / 60 Hz (Campbell diagram order lines, general
vibration practice). Memory: frames are float32 (a 10-minute 8 kHz file: about 60 MB) and are
reduced into the bins chunk by chunk.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

CHUNK_FRAMES = 256  #: frames transformed at once (bounded memory on long files)


def frame_length(fs_hz: float, seconds: float = 0.25) -> int:
    """A power of two near ``seconds`` of samples (at 6.4 kHz: 2048, 0.32 s, 3.1 Hz bins)."""
    return int(2 ** np.clip(np.round(np.log2(max(fs_hz * seconds, 16.0))), 4, 16))


def on_grid(time_s: np.ndarray, x: np.ndarray, fs_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """``x`` (n, C) placed on a uniform sample grid from its times: (samples, real-sample mask),
    holes (lost blocks, reconnects) zero and False, so frames never join samples across a gap."""
    if time_s.size == 0:
        return np.zeros((0, x.shape[1]), np.float32), np.zeros(0, bool)
    idx = np.rint((time_s - time_s[0]) * fs_hz).astype(np.int64)
    out = np.zeros((int(idx[-1]) + 1, x.shape[1]), np.float32)
    valid = np.zeros(out.shape[0], bool)
    out[idx] = x
    valid[idx] = True
    return out, valid


def psd_frames(x: np.ndarray, fs_hz: float, nperseg: int, hop: int,
               valid: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(starts (F,), PSD (F, nperseg // 2 + 1, C) float32) of the frames of ``x`` (n, C) that fit.
    With ``valid`` (n,) a frame holding missing samples is the periodogram of its real ones: mean
    of the real samples removed, window times mask, power scaled by sum w^2 / sum (w m)^2 (the
    live engine's masked frames, :meth:`monitor.spectra.RollingSTFT._masked`); a frame with
    fewer than half its samples real is NaN."""
    x = np.asarray(x, dtype=np.float32)
    n = x.shape[0]
    if n < nperseg:
        return np.zeros(0, np.int64), np.zeros((0, nperseg // 2 + 1, x.shape[1]), np.float32)
    starts = np.arange(0, n - nperseg + 1, hop)
    w = np.hanning(nperseg + 1)[:-1].astype(np.float32)  # periodic Hann, as scipy.signal.get_window("hann")
    w2 = float(np.sum(w.astype(np.float64) ** 2))
    scale = np.full(nperseg // 2 + 1, 2.0 / (fs_hz * w2), np.float32)
    scale[0] /= 2
    if nperseg % 2 == 0:
        scale[-1] /= 2
    out = np.empty((starts.size, nperseg // 2 + 1, x.shape[1]), np.float32)
    view = np.lib.stride_tricks.sliding_window_view(x, nperseg, axis=0)[::hop]  # (F, C, nperseg)
    mview = None if valid is None else np.lib.stride_tricks.sliding_window_view(valid, nperseg)[::hop]
    for a in range(0, starts.size, CHUNK_FRAMES):
        seg = view[a:a + CHUNK_FRAMES].astype(np.float32)
        if mview is None:
            seg = seg - seg.mean(axis=-1, keepdims=True)
            spec = np.fft.rfft(seg * w, axis=-1)
            out[a:a + CHUNK_FRAMES] = np.moveaxis((spec.real ** 2 + spec.imag ** 2) * scale, -1, 1)
            continue
        m = mview[a:a + CHUNK_FRAMES].astype(np.float32)[:, None, :]  # (f, 1, nperseg)
        real = m.sum(axis=-1, keepdims=True)
        seg = (seg - (seg * m).sum(axis=-1, keepdims=True) / np.maximum(real, 1.0)) * m
        wm2 = ((w * m) ** 2).sum(axis=-1)  # (f, 1)
        spec = np.fft.rfft(seg * w, axis=-1)
        power = (spec.real ** 2 + spec.imag ** 2) * scale * (w2 / np.maximum(wm2, 1e-30))[..., None]
        power[real[:, 0, 0] < nperseg / 2] = np.nan
        out[a:a + CHUNK_FRAMES] = np.moveaxis(power, -1, 1)
    return starts, out


def speeds_at(t: np.ndarray, rpm_t: np.ndarray, rpm: np.ndarray) -> np.ndarray:
    """Motor speeds (len(t), motors) at times ``t``, linear between readings (NaN outside them)."""
    out = np.full((t.size, rpm.shape[1]), np.nan)
    if rpm_t.size < 2:
        return out
    order = np.argsort(rpm_t, kind="stable")
    rt, rv = rpm_t[order], rpm[order]
    for m in range(rpm.shape[1]):
        ok = np.isfinite(rv[:, m])
        if np.count_nonzero(ok) >= 2:
            out[:, m] = np.interp(t, rt[ok], rv[ok, m], left=np.nan, right=np.nan)
    return out


@dataclass
class SweepMap:
    """PSD averaged in RPM bins: ``psd`` (B, bins, 3) (deg/s)^2/Hz, ``rpm`` (B,) bin centres
    (mean motor speed, RPM), ``frames`` (B,) frames in each bin, ``throttle`` (B,) median throttle
    (0..1, NaN unknown), ``spread`` (B,) mean difference between the fastest and slowest motor
    (RPM), ``freqs`` (bins,) Hz; ``mean_psd`` (bins, 3) the mean of every spinning frame."""

    freqs: np.ndarray
    rpm: np.ndarray
    psd: np.ndarray
    frames: np.ndarray
    throttle: np.ndarray
    spread: np.ndarray
    mean_psd: np.ndarray
    frame_s: float
    bin_rpm: float

    @property
    def bin_hz(self) -> float:
        return float(self.freqs[1] - self.freqs[0])

    def order_cut(self, k: float) -> tuple[np.ndarray, np.ndarray]:
        """(frequency k n / 60 (B,), PSD there (B, 3)) of order ``k`` in each RPM bin: the largest
        of the bins that the motors' order k spans (their spread), +-1 bin."""
        f = k * self.rpm / 60.0
        half = 0.5 * k * self.spread / 60.0
        lo = np.clip(np.floor((f - half) / self.bin_hz).astype(int) - 1, 0, self.freqs.size - 1)
        hi = np.clip(np.ceil((f + half) / self.bin_hz).astype(int) + 1, 0, self.freqs.size - 1)
        out = np.full((self.rpm.size, self.psd.shape[2]), np.nan)
        for b in range(self.rpm.size):
            if f[b] < self.freqs[-1] and hi[b] > lo[b]:
                out[b] = self.psd[b, lo[b]:hi[b] + 1].max(axis=0)
        return f, out


def build_map(frames: np.ndarray, freqs: np.ndarray, speeds: np.ndarray, throttle: np.ndarray | None = None,
              frame_s: float = 0.0, bin_rpm: float | None = None, min_rpm: float = 600.0) -> SweepMap:
    """The map of PSD ``frames`` (F, bins, 3) from :func:`psd_frames`. ``speeds`` (F, motors) is
    the speed of each frame (from :func:`speeds_at` at the frame centres, or estimated); a frame's
    speed is the mean of the motors turning at ``min_rpm`` or more (all of them in an all-motor
    sweep, one in a one-at-a-time run); frames with none turning are left out (stopped, idle). ``bin_rpm``
    defaults to 1/150 of the swept range, at least 40 RPM (fine enough that an order-1 crossing
    of a 2 % damped mode spans several bins; common practice)."""
    speeds = np.asarray(speeds, dtype=float)
    run = np.nan_to_num(speeds, nan=0.0) >= min_rpm  # motors turning in each frame
    ok = run.any(axis=1) & np.all(np.isfinite(speeds) | ~run, axis=1) if speeds.shape[1] else \
        np.zeros(speeds.shape[0], bool)
    n_run = np.maximum(run.sum(axis=1), 1)
    filled = np.where(run, speeds, 0.0)
    mean_rpm = np.where(ok, filled.sum(axis=1) / n_run, np.nan)
    top = np.where(run, speeds, -np.inf).max(axis=1) if speeds.shape[1] else np.zeros(0)
    bottom = np.where(run, speeds, np.inf).min(axis=1) if speeds.shape[1] else np.zeros(0)
    spread = np.where(ok, top - bottom, np.nan)
    everything = frames.mean(axis=0) if frames.shape[0] else np.zeros((freqs.size, 3))
    if not np.any(ok):
        empty = np.zeros(0)
        return SweepMap(freqs, empty, np.zeros((0, freqs.size, 3)), empty, empty, empty, everything, frame_s, 0.0)
    lo, hi = float(np.nanmin(mean_rpm)), float(np.nanmax(mean_rpm))
    width = bin_rpm or max(40.0, (hi - lo) / 150.0)
    idx = np.where(ok, np.floor((np.nan_to_num(mean_rpm) - lo) / width).astype(int), -1)
    nb = int(idx.max()) + 1
    sums = np.zeros((nb, freqs.size, frames.shape[2]))
    for a in range(0, frames.shape[0], CHUNK_FRAMES):  # chunk by chunk: no float64 copy of every frame
        sel = ok[a:a + CHUNK_FRAMES]
        np.add.at(sums, idx[a:a + CHUNK_FRAMES][sel], frames[a:a + CHUNK_FRAMES][sel].astype(np.float64))
    count = np.bincount(idx[ok], minlength=nb).astype(float)
    rsum = np.bincount(idx[ok], weights=mean_rpm[ok], minlength=nb)
    ssum = np.bincount(idx[ok], weights=spread[ok], minlength=nb)
    keep = count > 0
    thr = np.full(nb, np.nan)
    if throttle is not None and np.size(throttle):
        tf = np.asarray(throttle, float)
        if tf.ndim == 2 and tf.shape == run.shape:  # the throttle of the motors that turn
            pick = run & np.isfinite(tf)
            tf = np.where(pick.any(axis=1), np.where(pick, tf, 0.0).sum(axis=1) / np.maximum(pick.sum(axis=1), 1),
                          np.nan)
        else:
            tf = np.full(ok.size, np.nan)
        for b in np.flatnonzero(keep):
            vals = tf[ok & (idx == b)]
            vals = vals[np.isfinite(vals)]
            thr[b] = float(np.median(vals)) if vals.size else np.nan
    c = count[keep]
    return SweepMap(freqs, rsum[keep] / c, sums[keep] / c[:, None, None], c, thr[keep], ssum[keep] / c,
                    everything, frame_s, width)
