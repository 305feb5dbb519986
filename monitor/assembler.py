"""From decoded frames to timed samples: units, time base, gaps, reboots, RPM tracks.

The assembler takes the decoder's items in stream order and produces:

- :class:`Samples`: gyro rates in deg/s (float32, FRD axes), a continuous run of one segment;
- :class:`Gap`: the series broke (samples lost by sequence number, a device reboot, a
  reconnect); the next samples open a new segment;
- :class:`MotorUpdate`: mechanical RPM (electrical RPM / pole pairs: p pole pairs make p
  electrical cycles per turn), throttle and
  telemetry flags of every motor, with times;
- :class:`DeviceChange`: a DEVICE_INFO (at connect, after a reboot).

Time is *session time* in seconds: device time (microseconds, 32-bit, unwrapped by modular
difference, SPEC 4.3) since the first device time seen (a sample's or a motor state's), carried
across reboots and reconnects with the host clock. Nothing here depends on how the byte stream
was cut into reads, so a replay of a capture gives the same output as the live run.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

import firmware_protocol as fp

U32 = 1 << 32
HALF = 1 << 31
#: holes in the sample series up to this long are filled in place (linear between their ends,
#: marked not valid) instead of breaking the series: a hole of 50 ms in a 256 ms Hann window costs a
#: tone about a fifth of its power at worst and raises the floor by the hole's share of the window
#: energy (measured in tests/test_field_faults.py); longer holes restart the spectra
BRIDGE_MAX_S = 0.05
#: the device clock's drift is a least-squares slope of device time against host time (their
#: least-latency envelope, one point a second) over at least this much host time
DRIFT_MIN_SPAN_S = 10.0
#: a drift beyond this is not a clock: the stream is not in real time (a replay, a fast simulation)
DRIFT_MAX_PPM = 20000.0

#: readings a motor's speed trend is fitted over (s): long enough that the simulator's speed jitter
#: (0.2 %, correlated over 50 ms) leaves a slope error near 30 RPM/s at 7000 RPM, short enough to
#: follow a sweep that starts or stops
TREND_SPAN_S = 0.5


@dataclass(frozen=True)
class Samples:
    segment: int
    start: int  #: index of the first sample within its segment
    t0_s: float  #: session time of the first sample
    fs_hz: float
    dps: np.ndarray  #: (n, 3) float32, roll/pitch/yaw in deg/s (FRD)
    valid: np.ndarray | None = None  #: (n,) bool, False where a short hole was filled; None: all real


@dataclass(frozen=True)
class Gap:
    t_s: float  #: session time where the series broke
    reason: str  #: "samples lost", "device reboot", "reconnect", "time jump"
    lost_samples: int = 0  #: by sequence number (0 when unknown)


@dataclass(frozen=True)
class MotorUpdate:
    t_s: np.ndarray  #: (m,) session times
    rpm: np.ndarray  #: (m, motors) mechanical RPM
    throttle: np.ndarray  #: (m, motors) commanded, 0..1
    valid: np.ndarray  #: (m, motors) bool: live telemetry


@dataclass(frozen=True)
class DeviceChange:
    info: fp.DeviceInfo
    reboot: bool


@dataclass
class AssemblerStats:
    samples: int = 0
    samples_lost: int = 0  #: by sequence number
    gaps: int = 0
    reboots: int = 0
    segments: int = 0
    orphan_blocks: int = 0  #: gyro blocks before any DEVICE_INFO (dropped: no sensitivity yet)
    holes_bridged: int = 0  #: short holes filled in place (the series goes on; spectra over them flagged)
    samples_filled: int = 0  #: samples those fills stand in for (also counted in samples_lost)
    drift_ppm: float | None = None  #: device clock against the host clock, once measurable
    drift_note: str = ""  #: why there is no drift figure yet, when there is none


@dataclass
class _TimeBase:
    ref_us: int | None = None  #: device clock (unwrapped) at session time ``ref_s``
    ref_s: float = 0.0
    last_raw: int = 0
    unwrapped: int = 0  #: last unwrapped device time, us

    def to_session(self, raw_us: np.ndarray) -> np.ndarray:
        """Session seconds of raw u32 device times (in stream order), unwrapping as it goes."""
        raw = np.asarray(raw_us, dtype=np.int64)
        if raw.size == 0:
            return np.zeros(0)
        prev = np.concatenate([[self.last_raw], raw[:-1]])
        step = (raw - prev) % U32
        step = np.where(step >= HALF, step - U32, step)  # small backward steps stay backward
        if self.ref_us is None:
            step[0] = 0
            self.unwrapped = int(raw[0])
            self.ref_us = int(raw[0])
        un = self.unwrapped + np.cumsum(step)
        self.unwrapped = int(un[-1])
        self.last_raw = int(raw[-1])
        return self.ref_s + (un - self.ref_us) * 1e-6


class Assembler:
    def __init__(self):
        self.info: fp.DeviceInfo | None = None
        self.stats = AssemblerStats()
        self._tb = _TimeBase()
        self._segment = -1
        self._seg_index = 0  # samples so far in the current segment
        self._seg_t0 = 0.0
        self._expect_seq: int | None = None
        self._boot_id: int | None = None
        self._last_sample_s = 0.0
        self._last_host_s: float | None = None
        self._drift = _DriftFit()
        self._last_dev_s: float | None = None  #: session time of the newest block by the device clock
        self._last_dps = np.zeros(3, np.float32)  #: the newest sample, for filling a short hole
        self._scale = 1.0
        self._signs = np.ones(3, dtype=np.float32)
        self._fs = 0.0
        #: the next block opens a segment (at the start, after a reconnect or a reboot; the Gap, if any,
        #: went out when the break was learnt)
        self._break_pending = True

    # ---------------------------------------------------------------- public

    def mark_reconnect(self, host_s: float | None = None) -> list:
        """The link dropped and came back: the next samples open a new segment."""
        self._break_pending = True
        self._expect_seq = None
        return [Gap(self._last_sample_s, "reconnect")]

    def feed(self, items, host_s: float | None = None) -> list:
        """Assemble decoder items (stream order) read at host time ``host_s`` (monotonic s)."""
        out: list = []
        for item in items:
            if isinstance(item, fp.GyroBatch):
                self._gyro(item, out)
            elif isinstance(item, fp.MotorBatch):
                self._motor_batch(item, out)
            else:
                m = item.message
                if isinstance(m, fp.DeviceInfo):
                    self._device_info(m, out, host_s)
                elif isinstance(m, fp.MotorState):
                    self._motor(m, out)
                elif isinstance(m, fp.DeviceStatus):
                    self._status(m, out, host_s)
                out.append(item)
        if host_s is not None:
            self._track_drift(host_s)
            self._last_host_s = host_s
        return out

    # ---------------------------------------------------------------- pieces

    def _device_info(self, info: fp.DeviceInfo, out: list, host_s: float | None) -> None:
        reboot = self._boot_id is not None and info.boot_id != self._boot_id
        if not reboot and self.info is not None and info == self.info:
            return  # the same description again (an answer to a repeated request): nothing changed
        self.info = info
        self._boot_id = info.boot_id
        self._scale = info.dps_per_count
        self._signs = np.array([1, -1, -1] if info.axis_convention == fp.AxisConvention.FLU else [1, 1, 1], np.float32)
        self._fs = info.sample_rate_hz
        if reboot:
            self._reboot(out, host_s)
        out.append(DeviceChange(info, reboot))

    def _status(self, st: fp.DeviceStatus, out: list, host_s: float | None) -> None:
        if self._boot_id is not None and st.boot_id != self._boot_id:
            self._boot_id = st.boot_id
            self._reboot(out, host_s)

    def _reboot(self, out: list, host_s: float | None) -> None:
        self.stats.reboots += 1
        # carry session time over the reboot with the host clock
        elapsed = 0.0
        if host_s is not None and self._last_host_s is not None:
            elapsed = max(0.0, host_s - self._last_host_s)
        self._tb = _TimeBase(ref_s=self._last_sample_s + elapsed)
        self._expect_seq = None
        self._break_pending = True
        self._drift = _DriftFit()
        self._last_dev_s = None
        out.append(Gap(self._last_sample_s, "device reboot"))

    def _gyro(self, batch: fp.GyroBatch, out: list) -> None:
        if self.info is None:
            self.stats.orphan_blocks += len(batch.counts)
            return
        seq = batch.sample_seq.astype(np.int64)
        counts = batch.counts.astype(np.int64)
        first = seq[0] if self._expect_seq is None else self._expect_seq
        expected = np.concatenate([[first], (seq + counts)[:-1] % U32])
        diff = (seq - expected) % U32
        starts = np.concatenate([[0], np.cumsum(counts)])
        dps = batch.samples.astype(np.float32) * np.float32(self._scale)
        dps *= self._signs
        times = self._tb.to_session(batch.t_us)
        breaks = set(np.flatnonzero(diff != 0).tolist())
        if self._break_pending:
            breaks.add(0)
        bounds = sorted(breaks | {0, len(seq)})
        fill_max = max(1, int(BRIDGE_MAX_S * self._fs))
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):
            block = dps[starts[a] : starts[b]]
            if a in breaks:
                if self._break_pending:
                    self._break_pending = False
                    self._new_segment(float(times[a]))
                elif diff[a] >= HALF:  # the counter went backwards: a reboot nobody announced
                    self.stats.reboots += 1
                    out.append(Gap(self._last_sample_s, "device reboot"))
                    self._tb = _TimeBase(ref_s=self._last_sample_s)
                    self._drift = _DriftFit()
                    times[a:] = self._tb.to_session(batch.t_us[a:])
                    self._new_segment(float(times[a]))
                else:
                    lost = int(diff[a])
                    self.stats.samples_lost += lost
                    if lost <= fill_max and self._segment >= 0:
                        self._fill(lost, block[0], out)  # a block holds 1 or more samples (SPEC)
                    else:
                        out.append(Gap(self._last_sample_s, "samples lost", lost))
                        self._new_segment(float(times[a]))
            t0 = self._seg_t0 + self._seg_index / self._fs
            out.append(Samples(self._segment, self._seg_index, t0, self._fs, block))
            self._seg_index += block.shape[0]
            self.stats.samples += block.shape[0]
            self._last_sample_s = self._seg_t0 + self._seg_index / self._fs
            self._last_dps = block[-1].copy()
        self._expect_seq = int((seq[-1] + counts[-1]) % U32)
        self._last_dev_s = float(times[-1])

    def _fill(self, n: int, after: np.ndarray, out: list) -> None:
        """A short hole of ``n`` samples: filled in place, linear from the last sample before it to
        the first after it, marked not valid, so the series (and its spectra) go on."""
        ramp = (np.arange(1, n + 1) / (n + 1))[:, None]
        filled = self._last_dps[None, :] + (after[None, :] - self._last_dps[None, :]) * ramp
        t0 = self._seg_t0 + self._seg_index / self._fs
        out.append(Samples(self._segment, self._seg_index, t0, self._fs, filled.astype(np.float32),
                           np.zeros(n, bool)))
        self._seg_index += n  # the block after the hole follows at once, and sets _last_sample_s
        self.stats.holes_bridged += 1
        self.stats.samples_filled += n

    def _new_segment(self, t0: float) -> None:
        self._segment += 1
        self.stats.segments += 1
        if self._segment > 0:
            self.stats.gaps += 1
        self._seg_index = 0
        self._seg_t0 = t0

    def _motor_batch(self, mb: fp.MotorBatch, out: list) -> None:
        if self.info is None or mb.erpm.shape[1] == 0:
            return
        t = self._tb.to_session(mb.t_us)
        pp = self.info.pole_pairs  # >= 1: the decoder rejects a DEVICE_INFO with 0
        valid = (mb.flags & int(fp.MotorFlags.TELEMETRY_VALID)) != 0
        out.append(MotorUpdate(t, mb.erpm / pp, mb.throttle / fp.THROTTLE_FULL, valid))

    def _motor(self, ms: fp.MotorState, out: list) -> None:
        if self.info is None or not ms.motors:
            return
        pp = self.info.pole_pairs  # >= 1: the decoder rejects a DEVICE_INFO with 0
        t = self._tb.to_session(np.array([ms.t_us]))
        if self._tb.ref_us is None:
            return
        rpm = np.array([[m.erpm / pp for m in ms.motors]])
        thr = np.array([[m.throttle / fp.THROTTLE_FULL for m in ms.motors]])
        valid = np.array([[bool(m.flags & fp.MotorFlags.TELEMETRY_VALID) for m in ms.motors]])
        out.append(MotorUpdate(t, rpm, thr, valid))

    def _track_drift(self, host_s: float) -> None:
        if self._last_dev_s is None:
            return
        self._drift.add(host_s, self._last_dev_s)
        span = self._drift.span_s
        if span < DRIFT_MIN_SPAN_S:
            self.stats.drift_note = f"measuring: {span:.0f} of {DRIFT_MIN_SPAN_S:.0f} s of device time seen"
            return
        ppm = self._drift.ppm()
        if ppm is None or abs(ppm) > DRIFT_MAX_PPM:
            self.stats.drift_ppm = None
            self.stats.drift_note = "the stream is not in real time (a replay or a fast simulation)"
        else:
            self.stats.drift_ppm = ppm
            self.stats.drift_note = ""


class _DriftFit:
    """The drift of the device clock against the host's, from (host time, device time) pairs.

    A read's device time lags the host's by the transport's latency, which is never below some
    least value but often far above it (a stall delivers a backlog late, a busy link queues). The
    offsets device - host therefore lie *below* a line whose slope is the drift. Following Moon,
    Skelly and Towsley, "Estimation and removal of clock skew from network delay measurements"
    (IEEE INFOCOM 1999), the drift is the slope of the line that lies on or above every offset and
    is closest to them in sum: an edge of their upper convex hull, the one spanning their mean
    host time. Offsets are first reduced to their maximum per second of host time; only the hull's
    corners, the count and the sum of host times are kept (bounded memory over hours), relative
    to the first pair so the numbers stay well conditioned."""

    BIN_S = 1.0
    MAX_HULL = 4096  #: corners kept at most (a straight-line envelope keeps a handful)
    #: a corner this close to the chord of its neighbours is dropped: host times near 1e6 s carry
    #: rounding of about 1e-10 s, device times are whole microseconds, so 1 ns tells rounding from
    #: latency; it moves a slope over an edge of a second or more by 0.001 ppm at most
    ON_CHORD_S = 1e-9

    def __init__(self):
        self.ref: tuple[float, float] | None = None
        self.n = 0
        self.sx = 0.0
        self.last_x = 0.0
        self.hull: list[tuple[float, float]] = []  #: upper hull corners, host time increasing
        self._bin = None  #: (bin index, host time of the max, max offset)

    def add(self, host_s: float, dev_s: float) -> None:
        if self.ref is None:
            self.ref = (host_s, dev_s)
        x = host_s - self.ref[0]
        off = (dev_s - self.ref[1]) - x
        k = int(x // self.BIN_S)
        if self._bin is not None and self._bin[0] != k:
            self._take(self._bin[1], self._bin[2])
            self._bin = None
        if self._bin is None or off > self._bin[2]:
            self._bin = (k, x, off)
        self.last_x = x

    def _take(self, x: float, off: float) -> None:
        self.n += 1
        self.sx += x
        h = self.hull
        if h and x <= h[-1][0]:
            return  # host time must increase (it does: bins are in order)
        # Andrew's monotone chain, upper half: drop corners that are not right turns
        while len(h) >= 2:
            (x1, y1), (x2, y2) = h[-2], h[-1]
            # the middle corner's height over the chord from its left neighbour to the new point
            # is -cross / (x - x1); within ON_CHORD_S it is no corner (rounding, not latency)
            if (x2 - x1) * (off - y1) - (y2 - y1) * (x - x1) >= -self.ON_CHORD_S * (x - x1):
                h.pop()
            else:
                break
        h.append((x, off))
        if len(h) > self.MAX_HULL:
            del h[1:-self.MAX_HULL // 2]

    @property
    def span_s(self) -> float:
        return self.last_x

    def ppm(self) -> float | None:
        h = self.hull
        if self.n < 3 or len(h) < 2:
            return None
        # the edge spanning the mean host time; the last corner is the newest bin, never before
        # the mean, so an edge always does
        xm = self.sx / self.n
        (x1, y1), (x2, y2) = next((a, b) for a, b in zip(h, h[1:], strict=False) if b[0] >= xm)
        return (y2 - y1) / (x2 - x1) * 1e6


class RpmTrack:
    """The recent mechanical RPM of every motor, for frame windows (bounded rows).

    Rows ``[t, rpm x M, throttle x M, not-valid x M]`` in one preallocated array, so a window costs
    two binary searches and a slice. When it fills, rows older than ``keep_s`` before the newest
    (and any beyond ``capacity``) are dropped; memory is fixed at creation.
    """

    def __init__(self, motors: int, capacity: int = 20_000, keep_s: float = 4.0):
        self.motors = motors
        self.capacity = capacity
        self.keep_s = keep_s
        self._store = np.zeros((capacity + 256, 1 + 3 * motors))  # rows [0, _n) are held
        self._n = 0

    def add(self, u: MotorUpdate) -> None:
        if u.rpm.shape[1] != self.motors or u.t_s.size == 0:
            return
        k, m = u.t_s.shape[0], self.motors
        if k > self.capacity:
            u = MotorUpdate(u.t_s[-self.capacity :], u.rpm[-self.capacity :], u.throttle[-self.capacity :],
                            u.valid[-self.capacity :])
            k = self.capacity
        st = self._store
        if self._n + k > st.shape[0]:  # drop the oldest rows: beyond keep_s, or past the capacity
            t_new = float(u.t_s[-1])
            cut = int(np.searchsorted(st[: self._n, 0], t_new - self.keep_s))
            cut = max(cut, self._n + k - self.capacity)
            st[: self._n - cut] = st[cut : self._n]
            self._n -= cut
        n = self._n
        blk = st[n : n + k]
        blk[:, 0] = u.t_s
        blk[:, 1 : 1 + m] = u.rpm
        blk[:, 1 + m : 1 + 2 * m] = u.throttle
        np.logical_not(u.valid, out=blk[:, 1 + 2 * m :], casting="unsafe")
        self._n = n + k

    def window(self, t0: np.ndarray, t1: np.ndarray):
        """Mean RPM (F, motors), latest RPM (F, motors), mean throttle (F, motors) and all-valid (F, motors)
        over each window [t0, t1) (readings at t1 itself are left out: a device sending in time
        order may send them after the samples up to t1); NaN where no reading falls in it."""
        f, m = len(t0), self.motors
        mean = np.full((f, m), np.nan)
        mthr = np.full((f, m), np.nan)
        latest = np.full((f, m), np.nan)
        ok = np.zeros((f, m), bool)
        rows = self._store[: self._n]
        if self._n == 0:
            return mean, latest, mthr, ok
        t = rows[:, 0]
        lo = np.searchsorted(t, t0, side="left").tolist()
        hi = np.searchsorted(t, t1, side="left").tolist()
        for i in range(f):
            a, b = lo[i], hi[i]
            if b > a:
                avg = np.add.reduce(rows[a:b], axis=0) * (1.0 / (b - a))
                mean[i] = avg[1 : 1 + m]
                mthr[i] = avg[1 + m : 1 + 2 * m]
                latest[i] = rows[b - 1, 1 : 1 + m]
                ok[i] = avg[1 + 2 * m :] == 0
        return mean, latest, mthr, ok

    def trend(self, t1: np.ndarray, span_s: float = TREND_SPAN_S):
        """Each motor's speed and its rate of change at each time in ``t1`` (F,), from a straight
        line fitted by least squares to the readings of the last ``span_s`` before it (readings at
        ``t1`` itself left out, as in :meth:`window`).

        Returns (rpm at t1 (F, motors), slope RPM/s (F, motors), standard error of the slope
        RPM/s (F, motors), residual RMS RPM (F, motors)); NaN where fewer than 3 readings (slope)
        fall in the span. The standard error is the textbook one of ordinary least squares,
        sqrt(s^2 / sum (t - mean t)^2) with s^2 the residual variance over n - 2 degrees of freedom;
        the residual RMS is s. A speed that does not follow a line (a motor starting or stopping)
        shows as a residual RMS of many percent of the speed.
        """
        f, m = len(t1), self.motors
        fit = np.full((f, m), np.nan)
        slope = np.full((f, m), np.nan)
        se = np.full((f, m), np.nan)
        rms = np.full((f, m), np.nan)
        if self._n == 0 or f == 0:
            return fit, slope, se, rms
        rows = self._store[: self._n]
        t = rows[:, 0]
        t1 = np.asarray(t1, dtype=float)
        lo = np.searchsorted(t, t1 - span_s, side="left")
        hi = np.searchsorted(t, t1, side="left")
        # every window's rows gathered one after another and centred on their own means (two
        # passes, the textbook-stable form), so a window's result depends on its rows alone,
        # whatever other windows were asked for with it
        cnt = hi - lo
        ok = cnt >= 3
        win = np.flatnonzero(ok)
        last = rows[np.maximum(hi - 1, 0), 1 : 1 + m]
        fit = np.where((cnt > 0)[:, None], last, np.nan)
        if win.size == 0:
            return fit, slope, se, rms
        c = cnt[win]
        starts = np.concatenate([[0], np.cumsum(c)[:-1]])
        idx = np.repeat(lo[win] - starts, c) + np.arange(int(c.sum()))
        tt = rows[idx, 0] - np.repeat(t1[win], c)  # time relative to the window's end
        rr = rows[idx, 1 : 1 + m]
        cf = c.astype(float)
        tm = np.add.reduceat(tt, starts) / cf
        rm = np.add.reduceat(rr, starts, axis=0) / cf[:, None]
        dt = tt - np.repeat(tm, c)
        dr = rr - np.repeat(rm, c, axis=0)
        sxx = np.add.reduceat(dt * dt, starts)
        sxy = np.add.reduceat(dt[:, None] * dr, starts, axis=0)
        good = sxx > 0
        with np.errstate(divide="ignore", invalid="ignore"):
            sl = sxy / sxx[:, None]
            res = dr - np.repeat(sl, c, axis=0) * dt[:, None]
            s2 = np.add.reduceat(res * res, starts, axis=0) / (cf - 2)[:, None]
            fit[win] = np.where(good[:, None], np.maximum(rm - sl * tm[:, None], 0.0), fit[win])
            slope[win] = np.where(good[:, None], sl, np.nan)
            rms[win] = np.where(good[:, None], np.sqrt(s2), np.nan)
            se[win] = np.where(good[:, None], np.sqrt(s2 / sxx[:, None]), np.nan)
        return fit, slope, se, rms


class EstimateTrend:
    """The trend of speeds estimated from the spectrum (one per frame), as :meth:`RpmTrack.trend`
    gives it for telemetry: a least-squares line over the estimates of the last ``span_s``."""

    def __init__(self, span_s: float = TREND_SPAN_S):
        self.span_s = span_s
        self._t: list[float] = []
        self._r: list[float] = []

    def clear(self) -> None:
        self._t.clear()
        self._r.clear()

    def add(self, t_s: float, rpm: float) -> tuple[float, float, float, float]:
        """Add one estimate (NaN: none); returns (speed at t_s, slope RPM/s, its standard error,
        residual RMS RPM) as :meth:`RpmTrack.trend` does."""
        if np.isfinite(rpm):
            self._t.append(t_s)
            self._r.append(rpm)
        while self._t and self._t[0] < t_s - self.span_s:
            del self._t[0], self._r[0]
        n = len(self._t)
        if not np.isfinite(rpm) or n == 0:
            return float("nan"), float("nan"), float("nan"), float("nan")
        if n < 3:
            return rpm, float("nan"), float("nan"), float("nan")
        tt = np.array(self._t) - t_s
        rr = np.array(self._r)
        dt = tt - tt.mean()
        sxx = float(dt @ dt)
        sl = float(dt @ (rr - rr.mean()) / sxx)
        res = rr - rr.mean() - dt * sl
        s2 = float(res @ res / (n - 2))
        return max(float(rr.mean() - sl * tt.mean()), 0.0), sl, float(np.sqrt(s2 / sxx)), float(np.sqrt(s2))
