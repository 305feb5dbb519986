"""Rolling short-time spectra of gyro rates: PSD in (deg/s)^2/Hz and amplitude in deg/s.

:class:`RollingSTFT` takes sample blocks of any length as they arrive and emits one frame per hop
of new samples, computing every complete frame of a block in one batched ``numpy.fft.rfft``.
Frames start at sample 0, hop, 2 hop, ... of a continuous segment; :meth:`RollingSTFT.reset`
starts a new segment, so no frame ever spans a gap.

Scaling (one-sided, interior bins doubled; DC and an even-length Nyquist bin not):

- PSD density: 2 |X[k]|^2 / (fs sum(w^2)), the scaling of ``scipy.signal.welch(scaling='density')``
  and of ``ShortTimeFFT(..., scale_to='psd', fft_mode='onesided2X')``;
- amplitude: 2 |X[k]| / sum(w) (coherent gain corrected: a tone of amplitude A on a bin centre
  reads A).

Each frame has its mean removed first (``detrend='constant'``, as ``welch`` does by default).

Frames over filled samples (short holes the assembler bridged, ``valid`` False) are computed with
those samples weighted zero: the mean is taken over the real samples, the window is the window
times the mask, and the PSD is scaled by sum(w^2) / sum((w m)^2), so broadband levels read
unbiased; a tone reads low by about the window-weighted share of real samples (in power). Each
frame carries its filled share (``FrameBatch.filled``).
Windows are periodic (``scipy.signal.get_window``): Hann by default, flat-top for amplitude
(F. J. Harris, Proc. IEEE 66(1), 1978).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from scipy import signal

WindowName = Literal["hann", "flattop"]


@dataclass(frozen=True)
class SpectrumConfig:
    """How spectra are computed. ``window_s`` and ``overlap`` are rounded to whole samples."""

    fs_hz: float
    window_s: float = 0.256
    overlap: float = 0.75
    window: WindowName = "hann"

    def __post_init__(self):
        if self.window not in get_args(WindowName):
            raise ValueError(f"window={self.window!r} not in {get_args(WindowName)}")
        if not 0.0 <= self.overlap <= 0.95:
            raise ValueError(f"overlap={self.overlap} must be between 0 and 0.95")
        if not self.fs_hz > 0:
            raise ValueError(f"fs_hz={self.fs_hz} must be positive")
        if self.nperseg < 16:
            raise ValueError(f"window_s={self.window_s} gives {self.nperseg} samples at {self.fs_hz} Hz; need 16")

    @property
    def nperseg(self) -> int:
        return int(round(self.window_s * self.fs_hz))

    @property
    def noverlap(self) -> int:
        return int(round(self.nperseg * self.overlap))

    @property
    def hop(self) -> int:
        return self.nperseg - self.noverlap

    @property
    def bin_hz(self) -> float:
        return self.fs_hz / self.nperseg

    @property
    def freqs(self) -> np.ndarray:
        return np.fft.rfftfreq(self.nperseg, 1.0 / self.fs_hz)


_WINDOW_CACHE: dict[tuple[str, int], tuple[np.ndarray, float, float]] = {}


def window(name: str, n: int) -> tuple[np.ndarray, float, float]:
    """(read-only periodic window, sum(w), sum(w^2)); cached whole for thread safety."""
    key = (name, n)
    hit = _WINDOW_CACHE.get(key)
    if hit is None:
        w = signal.get_window(name, n, fftbins=True).astype(np.float64)
        w.setflags(write=False)
        hit = (w, float(w.sum()), float(np.sum(w * w)))
        _WINDOW_CACHE[key] = hit
    return hit


def one_sided_factor(n: int) -> np.ndarray:
    """2 for interior bins, 1 for DC and (n even) Nyquist."""
    f = np.full(n // 2 + 1, 2.0)
    f[0] = 1.0
    if n % 2 == 0:
        f[-1] = 1.0
    return f


@dataclass(frozen=True)
class FrameBatch:
    """Consecutive frames of one segment.

    ``start`` (F,) sample index of each frame's first sample within the segment;
    ``psd`` (F, bins, C) in (deg/s)^2/Hz; ``amp`` (F, bins, C) in deg/s, computed from the PSD
    when asked (amp = sqrt(psd) x ``amp_factor`` per bin), since most frames need it at few bins.
    """

    segment: int
    start: np.ndarray
    psd: np.ndarray
    amp_factor: np.ndarray  #: (bins,) amplitude per sqrt(PSD)
    filled: np.ndarray | None = None  #: (F,) share of each frame's samples that were filled (None: none)

    @property
    def amp(self) -> np.ndarray:
        return np.sqrt(self.psd) * self.amp_factor[None, :, None]

    def __len__(self) -> int:
        return int(self.start.shape[0])


class RollingSTFT:
    """Streaming STFT of C channels (roll, pitch, yaw); see the module docstring."""

    def __init__(self, config: SpectrumConfig, channels: int = 3):
        self.config = config
        self.channels = channels
        n = config.nperseg
        self.win, s1, s2 = window(config.window, n)
        self._w2 = s2
        factor = one_sided_factor(n)
        self.psd_scale = factor / (config.fs_hz * s2)
        self.amp_scale = factor / s1
        self.amp_factor = self.amp_scale / np.sqrt(self.psd_scale)
        # removing a frame's mean after the FFT: X - mean * W, where W = rfft(window) is non-zero
        # in a few low bins only (two for Hann, five for flat-top)
        wf = np.fft.rfft(self.win)
        nz = np.flatnonzero(np.abs(wf) > 1e-9 * np.abs(wf).max())
        self._detrend_n = int(nz.max()) + 1  # the low bins 0 .. n-1 (two for Hann, five for flat-top)
        self._detrend_w = wf[: self._detrend_n]
        self._mean_w = np.full(config.nperseg, 1.0 / config.nperseg)
        self.segment = -1
        self.reset()

    def reset(self) -> None:
        """Start a new segment (after a gap): buffered samples are dropped."""
        self.segment += 1
        # (C, capacity) contiguous store; samples of the segment from index _buf_start sit in
        # columns [0, _fill); frames are strided views into it (no copy, no per-frame Python)
        if not hasattr(self, "_store"):
            self._store = np.zeros((self.channels, 4 * self.config.nperseg), dtype=np.float64)
            self._mask = np.ones(4 * self.config.nperseg, dtype=np.float64)
        self._fill = 0
        self._buf_start = 0  # segment index of column 0
        self._next = 0  # segment index where the next frame starts
        self.samples = 0  # samples pushed into this segment
        self._holes_at = -1  # segment index just past the last filled sample pushed (-1: none)

    def _append(self, x: np.ndarray, valid: np.ndarray | None = None) -> None:
        """Append (C, n) samples, dropping columns no future frame needs and growing if needed."""
        n = x.shape[1]
        keep_from = self._next - self._buf_start  # columns before this are never read again
        if self._fill + n > self._store.shape[1]:
            if keep_from > 0:
                tail = self._fill - keep_from
                self._store[:, :tail] = self._store[:, keep_from : self._fill]
                self._mask[:tail] = self._mask[keep_from : self._fill]
                self._fill = tail
                self._buf_start = self._next
            if self._fill + n > self._store.shape[1]:
                grown = np.zeros((self.channels, 2 * (self._fill + n)), dtype=np.float64)
                grown[:, : self._fill] = self._store[:, : self._fill]
                self._store = grown
                gm = np.ones(2 * (self._fill + n), dtype=np.float64)
                gm[: self._fill] = self._mask[: self._fill]
                self._mask = gm
        self._store[:, self._fill : self._fill + n] = x
        if valid is None:
            self._mask[self._fill : self._fill + n] = 1.0
        else:
            self._mask[self._fill : self._fill + n] = valid
            self._holes_at = max(self._holes_at, self._buf_start + self._fill + n)
        self._fill += n

    def push(self, samples: np.ndarray, valid: np.ndarray | None = None) -> FrameBatch | None:
        """Add samples (n, C) in deg/s (``valid`` (n,) False where filled); returns every frame
        completed by them, or None."""
        cfg = self.config
        n_per = cfg.nperseg
        hop = cfg.hop
        x = np.asarray(samples).T  # (C, n); cast to float64 as it is copied into the store
        self._append(x, valid)
        self.samples += x.shape[1]
        end = self._buf_start + self._fill
        if end - self._next < n_per:
            return None
        count = (end - n_per - self._next) // hop + 1
        starts = self._next + hop * np.arange(count)
        st = self._store
        s0, s1 = st.strides
        # (C, F, N) view of the frames: frame j starts hop j columns after the first
        frames = np.ndarray((self.channels, count, n_per), dtype=st.dtype, buffer=st,
                            offset=(self._next - self._buf_start) * s1, strides=(s0, hop * s1, s1))
        spec = np.fft.rfft(frames * self.win, axis=2)  # (C, F, bins)
        mean = frames @ self._mean_w  # (C, F)
        spec[:, :, : self._detrend_n] -= mean[:, :, None] * self._detrend_w  # detrend='constant'
        ri = spec.view(np.float64)  # (C, F, 2 bins): real and imaginary parts side by side
        ri *= ri
        mag2 = ri[:, :, 0::2] + ri[:, :, 1::2]
        mag2 *= self.psd_scale
        filled = None
        if self._holes_at > self._next:  # some frame of this batch may hold filled samples
            filled = self._masked(frames, starts, mag2)
        psd = np.transpose(mag2, (1, 2, 0))  # (F, bins, C), a view
        self._next = int(starts[-1] + hop)
        return FrameBatch(self.segment, starts, psd, self.amp_factor, filled)

    def _masked(self, frames: np.ndarray, starts: np.ndarray, mag2: np.ndarray) -> np.ndarray | None:
        """Recompute, in place in ``mag2`` (C, F, bins), the frames that hold filled samples."""
        n_per = self.config.nperseg
        m0 = self._mask
        sm = m0.strides[0]
        masks = np.ndarray((starts.shape[0], n_per), dtype=m0.dtype, buffer=m0,
                           offset=(self._next - self._buf_start) * sm, strides=(self.config.hop * sm, sm))
        miss = n_per - masks.sum(axis=1)
        hit = np.flatnonzero(miss > 0)
        if hit.size == 0:
            return None
        w = self.win
        for j in hit.tolist():
            m = masks[j]
            wm = w * m
            e = float(wm @ wm)
            if e <= 0:
                mag2[:, j, :] = 0.0
                continue
            x = frames[:, j, :]
            mean = (x @ m) / max(float(m.sum()), 1.0)
            spec = np.fft.rfft((x - mean[:, None]) * wm, axis=1)
            mag2[:, j, :] = (spec.real**2 + spec.imag**2) * self.psd_scale * (self._w2 / e)
        return miss / n_per
