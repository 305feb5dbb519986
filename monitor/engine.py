"""The headless engine: assembled samples and motor speeds in, spectra, orders and events out.

One :class:`Engine` serves the live screen, headless ``watch``, ``replay`` and CSV input: it is
fed the assembler's output in stream order and is deterministic, so a replay of a capture yields
the live run's events exactly. Its cost is set by the sample rate (one STFT frame per hop), not
by how often anyone looks at it; views read :meth:`Engine.snapshot`, an immutable copy.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field, replace
from typing import NamedTuple

import numpy as np

import firmware_protocol as fp

from .assembler import BRIDGE_MAX_S, DeviceChange, EstimateTrend, Gap, MotorUpdate, RpmTrack, Samples
from .crossing import CrossingWatch
from .events import Notice
from .orders import order_amplitudes, order_freqs
from .profile import Profile, profile_warnings
from .ring import RingBuffer
from .rpm_estimate import RpmEstimator
from .spectra import RollingSTFT, SpectrumConfig
from .stray import StrayPeakFinder

GAP_LINE_S = 1.0  #: lost-sample gaps are told at most once a second (the rest counted in the next line)


@dataclass(frozen=True)
class EngineConfig:
    window_s: float = 0.256
    overlap: float = 0.75
    window: str = "hann"
    ema_tau_s: float = 1.0  #: time constant of the averaged spectrum
    waterfall_rows: int = 256
    history_s: float = 30.0  #: samples kept for analysis (bounded)
    stray_peaks: bool = True
    #: detectors (motor windows, orders, crossing watch, stray peaks) run over the frames gathered
    #: since their last run once the oldest has waited this long (stream seconds); the newest
    #: spectrum is available at once, the average, peak hold and waterfall when first read.
    #: Results do not depend on it, only the per-call cost and how soon events appear (0 runs the
    #: detectors on every frame batch).
    detect_every_s: float = 0.1


class _Waiting(NamedTuple):
    """Frames computed but not yet seen by the detectors."""

    t0: np.ndarray  #: (F,) window start, s
    t1: np.ndarray  #: (F,) window end, s
    psd: np.ndarray  #: (F, bins, 3)
    amp_factor: np.ndarray  #: (bins,)
    first: int  #: engine frame index of the first


@dataclass(frozen=True)
class Snapshot:
    """What a view needs, copied at one instant (never changes after creation)."""

    t_s: float
    fs_hz: float
    freqs: np.ndarray  #: (bins,) Hz
    psd: np.ndarray | None  #: (bins, 3) newest frame, (deg/s)^2/Hz
    amp: np.ndarray | None  #: (bins, 3) newest frame, deg/s
    ema: np.ndarray | None  #: (bins, 3) exponentially averaged PSD
    peak: np.ndarray | None  #: (bins, 3) peak hold of the PSD
    rpm: np.ndarray  #: (motors,) mean mechanical RPM over the newest window
    rpm_estimated: bool
    throttle: np.ndarray  #: (motors,) 0..1
    telemetry: np.ndarray  #: (motors,) bool
    order_hz: np.ndarray  #: (motors, 4)
    order_amp: np.ndarray  #: (motors, 4) deg/s
    mode_states: list
    frames: int
    waterfall_total: int  #: rows ever written (a view asks for rows newer than it has)
    filled: float = 0.0  #: share of the newest frame's samples filled over a bridged hole (flag)
    frames_filled: int = 0
    bands: list = field(default_factory=list)


class Engine:
    def __init__(self, config: EngineConfig | None = None, profile: Profile | None = None):
        self.config = config or EngineConfig()
        self.profile = profile or Profile()
        self.info: fp.DeviceInfo | None = None
        self.stft: RollingSTFT | None = None
        self.spec: SpectrumConfig | None = None
        self.frames = 0
        self.events: list = []  # bounded by the consumer (see drain_events)
        self._lock = threading.Lock()
        self._seg = -1
        self._seg_t0 = 0.0
        self._last_t = 0.0
        self._rpm_estimated = False
        self._last_sample_t = 0.0
        self._pending: list[_Waiting] = []  #: frame batches waiting for the detectors
        self._unfolded: list = []  #: frame batches not yet in the average, peak hold and waterfall
        self._carry: list = []  #: events of a flush outside feed(), handed out by the next call
        self.detected = 0  #: frames the detectors have seen
        self.frames_filled = 0  #: frames over a bridged hole (their spectra are flagged)
        self._frames_at_gap = 0
        self._gap_line_t = -1e9
        self._gaps_quiet = 0
        self._gaps_quiet_lost = 0
        self._starved: list[float] = []
        self._starve_said = False
        self.last_filled = 0.0  #: share of the newest frame's samples that were filled
        self.crossing: CrossingWatch | None = None
        self.stray: StrayPeakFinder | None = None
        self.estimator: RpmEstimator | None = None
        self.rpm_track: RpmTrack | None = None
        self._est_trend = EstimateTrend()
        self._reset_views()

    # ---------------------------------------------------------------- set-up

    def _reset_views(self) -> None:
        self.last_psd = self.ema = self.peak = None
        self._amp_factor = None
        self.last_rpm = np.zeros(0)
        self.last_thr = np.zeros(0)
        self.last_valid = np.zeros(0, bool)
        self.last_order_hz = np.zeros((0, 4))
        self.last_order_amp = np.zeros((0, 4))
        self.waterfall: RingBuffer | None = None
        self.waterfall_t: RingBuffer | None = None
        self.history: RingBuffer | None = None

    @property
    def motors(self) -> int:
        """Motors the detectors follow: the device's, or one speed estimated from the spectrum
        for a source that reports no motors (a gyro-only log)."""
        return (self.info.motor_count or 1) if self.info is not None else 0

    def _configure(self, info: fp.DeviceInfo) -> None:
        fs = info.sample_rate_hz
        motors = info.motor_count or 1  # no motors reported: one estimated speed
        same = (self.info is not None and self.info.sample_rate_hz == fs
                and self.info.motor_count == info.motor_count)
        self.info = info
        if same and self.stft is not None:
            return
        self.spec = SpectrumConfig(fs, self.config.window_s, self.config.overlap, self.config.window)
        self.stft = RollingSTFT(self.spec)
        freqs = self.spec.freqs
        hop_s = self.spec.hop / fs
        self.crossing = self._watch(self.profile, motors, freqs, hop_s)
        self.stray = StrayPeakFinder(self.profile, freqs, self.spec.nperseg / fs) if self.config.stray_peaks else None
        self.estimator = RpmEstimator(freqs, self.profile.blades, window=self.config.window)
        rate = max(1.0, float(info.motor_state_rate_hz))
        self.rpm_track = RpmTrack(motors, capacity=max(1000, int(rate * 20)))
        self._ema_alpha = 1.0 - np.exp(-hop_s / self.config.ema_tau_s)
        self._stray_every = max(1, int(round(0.2 / hop_s)))  # the stray search runs at about 5 Hz
        self._reset_views()
        bins = freqs.shape[0]
        self.waterfall = RingBuffer(self.config.waterfall_rows, (bins, 3), dtype=np.float32)
        self.waterfall_t = RingBuffer(self.config.waterfall_rows, (2,))  # (time s, gap-before flag)
        self.history = RingBuffer(int(self.config.history_s * fs), (3,), dtype=np.float32)
        self._gap_pending = True

    def _watch(self, profile: Profile, motors: int, freqs: np.ndarray, hop_s: float) -> CrossingWatch | None:
        """The crossing watch over the modes the gyro can see (below its Nyquist frequency)."""
        nyq = float(freqs[-1])
        seen = tuple(m for m in profile.modes if m.freq_hz * (1 + m.damping_ratio) < nyq)
        if not seen:
            return None
        return CrossingWatch(replace(profile, modes=seen), motors, freqs, hop_s)

    def reconfigure(self, config: EngineConfig) -> None:
        """New window length, overlap or window: spectra restart (the waterfall is cleared)."""
        with self._lock:
            self._detect(self._carry)  # waiting frames belong to the old spectra
            self.config = config
            if self.info is not None:
                info, self.info = self.info, None
                self.stft = None
                self._configure(info)

    def set_profile(self, profile: Profile) -> None:
        with self._lock:
            self._detect(self._carry)  # waiting frames are judged against the profile they arrived under
            self.profile = profile
            if self.info is not None and self.spec is not None:
                hop_s = self.spec.hop / self.spec.fs_hz
                motors = self.motors
                self.crossing = self._watch(profile, motors, self.spec.freqs, hop_s)
                if self.stray is not None:
                    self.stray = StrayPeakFinder(profile, self.spec.freqs, self.spec.nperseg / self.spec.fs_hz)

    # ---------------------------------------------------------------- feeding

    def feed(self, items) -> list:
        """Process assembled items; returns the events they caused (also kept in ``events``).

        Events of frames still waiting for the detectors come from a later call (or from
        :meth:`flush`); every event keeps its stream time, and their order is the stream's.
        """
        with self._lock:
            new: list = self._carry
            self._carry = []
            for it in items:
                if isinstance(it, Samples):
                    self._samples(it, new)
                elif isinstance(it, MotorUpdate):
                    if self.rpm_track is not None:
                        self.rpm_track.add(it)
                elif isinstance(it, Gap):
                    self._detect(new)  # the frames before the gap first: events stay in stream order
                    if self.stft is not None:
                        self.stft.reset()
                    if self.crossing is not None:
                        self.crossing.break_series()
                    self._est_trend.clear()
                    self._gap_pending = True
                    kind = {"device reboot": "reboot", "reconnect": "reconnect"}.get(it.reason, "gap")
                    self._gap_notice(kind, it, new)
                    self._starving(it.t_s, new)
                elif isinstance(it, DeviceChange):
                    self._detect(new)
                    self._configure(it.info)
                    i = it.info
                    filt = "raw" if i.raw else "FILTERED on the device"
                    text = (f"{i.board_id or 'device'}: gyro {i.sample_rate_hz:g} Hz, {float(i.counts_per_dps):g} "
                            f"counts per deg/s, {filt}, "
                            + (f"{i.motor_count} motors, {i.pole_pairs} pole pairs" if i.motor_count else
                               "no motor speeds: one speed estimated from the spectrum"))
                    new.append(Notice("device", self._last_t, text, {"reboot": it.reboot}))
                    for w in profile_warnings(self.profile, i.sample_rate_hz)[0 if self.profile.modes else 1:]:
                        new.append(Notice("profile", self._last_t, w))
            if self._pending and self._last_sample_t - self._pending[0].t1[0] >= self.config.detect_every_s:
                self._detect(new)
            self._keep(new)
        return new

    def _gap_notice(self, kind: str, gap: Gap, new: list) -> None:
        """One line per gap, except that lost-sample gaps closer than GAP_LINE_S to the last line are
        counted and told on the next line (a lossy link must not flood the log)."""
        if kind == "gap" and gap.t_s - self._gap_line_t < GAP_LINE_S:
            self._gaps_quiet += 1
            self._gaps_quiet_lost += gap.lost_samples
            return
        msg = f"{gap.reason}" + (f": {gap.lost_samples} samples" if gap.lost_samples else "")
        data = {"lost_samples": gap.lost_samples}
        if self._gaps_quiet:
            msg += f" (and {self._gaps_quiet} more gaps, {self._gaps_quiet_lost} samples, since the last line)"
            data.update(gaps_since=self._gaps_quiet, lost_since=self._gaps_quiet_lost)
            self._gaps_quiet = self._gaps_quiet_lost = 0
        self._gap_line_t = gap.t_s
        new.append(Notice(kind, gap.t_s, msg, data))

    def _starving(self, t_s: float, new: list) -> None:
        """Gaps that come faster than a window fills leave no spectra: say so once, with the rate."""
        if self.frames > self._frames_at_gap:
            self._starved = []
            self._starve_said = False
        self._frames_at_gap = self.frames
        self._starved.append(t_s)
        del self._starved[:-10]
        if len(self._starved) >= 4 and not self._starve_said and self.spec is not None:
            self._starve_said = True
            every = (self._starved[-1] - self._starved[0]) / (len(self._starved) - 1)
            need_ms = self.spec.nperseg / self.spec.fs_hz * 1000
            new.append(Notice("gap", t_s, f"no spectra: the stream breaks every {every * 1000:.0f} ms on average; a "
                                          f"spectrum needs {need_ms:.0f} ms unbroken (holes up to "
                                          f"{BRIDGE_MAX_S * 1000:.0f} ms are bridged): check the cable, the baud rate "
                                          "and the device's load", {"no_spectra": True}))

    def flush(self) -> list:
        """Run the detectors over every frame still waiting (end of a stream); returns the events."""
        with self._lock:
            new: list = self._carry
            self._carry = []
            self._detect(new)
            self._keep(new)
        return new

    def _keep(self, new: list) -> None:
        self.events.extend(new)
        if len(self.events) > 10_000:
            del self.events[:-10_000]

    def _samples(self, s: Samples, new: list) -> None:
        if self.stft is None:
            return
        if s.segment != self._seg:
            self._seg = s.segment
            self._seg_t0 = s.t0_s - s.start / s.fs_hz
            if self.stft.samples:
                self.stft.reset()
        self.history.append(s.dps)
        self._last_t = self._last_sample_t = s.t0_s + s.dps.shape[0] / s.fs_hz
        fb = self.stft.push(s.dps, s.valid)
        if fb is not None:
            self._frames(fb, new)

    def _frames(self, fb, new: list) -> None:
        """A batch of new frames: the newest spectrum now; averages, peak hold, waterfall and
        detectors over batches (whoever reads them first folds the waiting frames in)."""
        spec = self.spec
        t0 = self._seg_t0 + fb.start * (1.0 / spec.fs_hz)
        t1 = t0 + spec.nperseg / spec.fs_hz
        psd = fb.psd
        self._unfolded.append((psd, t1, self._gap_pending))
        self._gap_pending = False
        self._pending.append(_Waiting(t0, t1, psd, fb.amp_factor, self.frames))
        self.frames += t0.shape[0]
        self.last_psd = psd[-1]
        if fb.filled is not None:
            self.frames_filled += int(np.count_nonzero(fb.filled))
            self.last_filled = float(fb.filled[-1])
        else:
            self.last_filled = 0.0
        self._amp_factor = fb.amp_factor  # amplitude of the newest frame is derived when a view asks
        self._last_t = float(t1[-1])
        if self.config.detect_every_s <= 0:
            self._detect(new)

    def _fold(self) -> None:
        """Averaged spectrum, peak hold and waterfall over the frames not yet folded in, per batch
        of frames since the last gap (the average restarts after a gap, the peak hold does not)."""
        if not self._unfolded:
            return
        batches, self._unfolded = self._unfolded, []
        runs: list[list] = []
        for b in batches:
            if b[2] or not runs:
                runs.append([b])
            else:
                runs[-1].append(b)
        alpha = self._ema_alpha
        for run in runs:
            psd = run[0][0] if len(run) == 1 else np.concatenate([b[0] for b in run])
            t1 = run[0][1] if len(run) == 1 else np.concatenate([b[1] for b in run])
            gap_first = run[0][2]
            if self.ema is None or gap_first:
                self.ema = psd[0].copy()
                psd_rest = psd[1:]
            else:
                psd_rest = psd
            nr = psd_rest.shape[0]
            if nr == 1:
                self.ema += alpha * (psd_rest[0] - self.ema)
            elif nr > 1:  # e_k = (1 - a) e_(k-1) + a p_k unrolled: (1 - a)^F e_0 + sum_j a (1 - a)^(F-1-j) p_j
                w = alpha * (1.0 - alpha) ** np.arange(nr - 1, -1, -1)
                self.ema = (1.0 - alpha) ** nr * self.ema + np.dot(w, psd_rest.reshape(nr, -1)).reshape(self.ema.shape)
            top = psd[0] if psd.shape[0] == 1 else psd.max(axis=0)
            if self.peak is None:
                self.peak = top.copy()
            else:
                np.maximum(self.peak, top, out=self.peak)
            self.waterfall.append(psd)  # stored as float32
            marks = np.zeros((psd.shape[0], 2))
            marks[:, 0] = t1
            marks[0, 1] = 1.0 if gap_first else 0.0
            self.waterfall_t.append(marks)

    def _detect(self, new: list) -> None:
        """The detectors over the waiting frames, in one batch: motor windows, orders, crossings, stray peaks."""
        self._fold()
        if not self._pending:
            return
        pend, self._pending = self._pending, []
        amp_factor, first = pend[0].amp_factor, pend[0].first
        if len(pend) == 1:
            t0, t1, psd = pend[0].t0, pend[0].t1, pend[0].psd
        else:
            t0, t1, psd = (np.concatenate([getattr(p, k) for p in pend]) for k in ("t0", "t1", "psd"))
        spec = self.spec
        fs = spec.fs_hz
        f = t0.shape[0]
        motors = self.motors
        psd_sum = np.add.reduce(psd, axis=2)
        estimated = np.zeros(f, bool)
        if motors:
            # readings strictly before the frame's last sample: all of them arrived before it did
            t_end = t1 - 1.0 / fs
            mean, latest, thr, valid = self.rpm_track.window(t0, t_end)
            fit, slope, se, rms = self.rpm_track.trend(t_end)
            told = valid.any(axis=1)
            if not told.all():  # no telemetry in some frame: estimate the speed from the spectrum
                for i in np.flatnonzero(~told):
                    r = self.estimator.estimate(psd_sum[i])
                    mean[i] = latest[i] = r
                    fit[i], slope[i], se[i], rms[i] = self._est_trend.add(float(t_end[i]), r)
                    estimated[i] = True
        else:
            mean = latest = thr = slope = np.full((f, 0), np.nan)
            valid = np.zeros((f, 0), bool)
        ofreq = order_freqs(mean, self.profile.blades)
        oamp, _ = order_amplitudes(psd, ofreq, spec.bin_hz, amp_factor=amp_factor, with_axis=False)
        if self.crossing is not None and motors:
            new.extend(self.crossing.update(t1, psd_sum, fit, slope, se, estimated, rms))
        if self.stray is not None:
            sel = np.arange((-first) % self._stray_every, f, self._stray_every)  # frame index a multiple
            if sel.size:
                rpm_sel = mean[sel] if motors else np.zeros((sel.size, 0))
                slope_sel = slope[sel] if motors else None
                new.extend(self.stray.update_many(t1[sel], psd[sel], rpm_sel, slope_sel))
        self.detected = first + f
        self.last_rpm = mean[-1]
        self.last_thr = thr[-1]
        self.last_valid = valid[-1]
        self._rpm_estimated = bool(estimated[-1])
        self.last_order_hz = ofreq[-1]
        self.last_order_amp = oamp[-1]

    # ---------------------------------------------------------------- reading

    def clear_peak_hold(self) -> None:
        with self._lock:
            self._fold()
            self.peak = None if self.last_psd is None else self.last_psd.copy()

    def snapshot(self) -> Snapshot:
        with self._lock:
            self._fold()
            def cp(a):
                return None if a is None else a.copy()

            freqs = self.spec.freqs if self.spec is not None else np.zeros(0)
            return Snapshot(
                t_s=self._last_t,
                fs_hz=self.spec.fs_hz if self.spec else 0.0,
                freqs=freqs,
                psd=cp(self.last_psd),
                amp=None if self.last_psd is None else np.sqrt(self.last_psd) * self._amp_factor[:, None],
                ema=cp(self.ema),
                peak=cp(self.peak),
                rpm=self.last_rpm.copy(),
                rpm_estimated=self._rpm_estimated,
                throttle=self.last_thr.copy(),
                telemetry=self.last_valid.copy(),
                order_hz=self.last_order_hz.copy(),
                order_amp=self.last_order_amp.copy(),
                mode_states=self.crossing.mode_states() if self.crossing else [],
                frames=self.frames,
                filled=self.last_filled,
                frames_filled=self.frames_filled,
                waterfall_total=self.waterfall.total if self.waterfall is not None else 0,
                bands=[b.as_dict() for b in self.crossing.all_bands()] if self.crossing else [],
            )

    def waterfall_rows(self, since_total: int) -> tuple[np.ndarray, np.ndarray]:
        """Waterfall rows written after ``since_total`` (at most the ring's capacity): (rows, times)."""
        with self._lock:
            self._fold()
            if self.waterfall is None:
                return np.zeros((0, 0, 3), np.float32), np.zeros((0, 2))
            n = self.waterfall.total - since_total
            return self.waterfall.last(n), self.waterfall_t.last(n)

    def bands(self) -> list:
        with self._lock:
            return self.crossing.all_bands() if self.crossing else []

    def stray_peaks(self) -> list:
        with self._lock:
            return list(self.stray.reported) if self.stray else []
