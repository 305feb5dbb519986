"""The crossing watch: is a motor harmonic passing a frame mode, for every mode and order?

One voice per (mode, order), a *group*: its state is the worst over the motors, and it raises an
event only when that state changes. Inside a group each motor is a *channel*. The states are
spinrig's own words:

- **crossing**: the order of at least one motor is inside the mode's *watch band*, the half-power
  band f_n (1 -+ zeta) widened by what measurement needs: half a frequency bin (df / 2) and the
  RPM reading's uncertainty u f_n (u = 0.5 % with telemetry, 1 % when the speed is estimated from
  the spectrum). Never earlier. An order that steps over the whole band between two frames (a fast
  sweep of a high order) is a crossing too, reported at the speed where it met f_n. The event's
  RPM lies inside the watch band it prints.
- **nearing**: an order is inside the mode's *margin* (the wider of 10 % of f_n and three
  half-bandwidths, 3 zeta f_n) and closing in, or would reach the watch band within
  :data:`LOOKAHEAD_S` at its present closing speed, or is inside the margin while the response at
  the mode stands :data:`NEAR_LEVEL_DB` or more over its floor (the event says which).
- **clear**: no order inside the margin.

Hysteresis is in frequency and in time. A group stays crossing while an order is within the watch
band plus :func:`exit_allowance` or another motor's order of the group is still closing in (so one
passage of four motors a few percent apart is one voice), and stays nearing while an order is
inside 1.15 times the margin; it steps down only after its reason to stay has been gone for
:data:`DWELL_S`. A passage therefore makes at most four events: nearing, crossing, nearing on the
way out, clear.

The speed used is each motor's straight-line fit over the last 0.5 s of readings, evaluated at the
frame's end (:meth:`monitor.assembler.RpmTrack.trend`); "closing" needs the fitted slope to stand
:data:`SLOPE_SIGMAS` standard errors (plus :data:`SLOPE_FLOOR_RPM_S`) clear of zero, so speed
jitter at a steady throttle is not an approach.

The response level at the mode (dB re 1 (deg/s)^2/Hz: the highest bin within half a bin of the
half-power band, smoothed over 0.15 s, against a floor: the mean level in dB over 0.6..1.4 f_n
outside the band, smoothed over 3 s; first-order smoothing with those time constants) is a
severity carried by every event, not a state.
The *predicted band* of a group is 60 f_n (1 -+ zeta) / k RPM; its *observed band* is the RPM range
over which the group was crossing (the speeds of the motors whose order was in the watch band).

Everything that does not depend on the state is computed for all frames of a batch at once; the
state machine steps frame by frame only where some group is not clear or could rise.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np

from .orders import order_label, order_multipliers
from .profile import Profile

CLEAR, NEARING, CROSSING = 0, 1, 2
STATE_NAMES = ("clear", "nearing", "crossing")

MARGIN_FRACTION = 0.10  #: the margin is the wider of this share of f_n ...
MARGIN_HALF_BANDWIDTHS = 3.0  #: ... and this many half-bandwidths zeta f_n
EXIT_MARGIN = 1.15  #: a group stays nearing while an order is inside this times the margin
LOOKAHEAD_S = 0.8  #: nearing when the order would reach the watch band within this time
MAX_STEP_FRACTION = 0.25  #: a speed change between two frames beyond this share is a leap (an estimate
#: jumping between orders), not a sweep: 2000 RPM/s at 64 ms hops moves 1180 RPM by 11 %
DWELL_S = 0.5  #: a group steps down only after its reason to stay has been gone this long (s)
NEAR_LEVEL_DB = 6.0  #: response over its floor that makes an order inside the margin nearing
#: relative uncertainty of a fitted telemetry speed: the line fitted over 0.5 s stays within 0.5 %
#: of the commanded speed in 99.9 % of frames with the simulator's speed jitter (0.2 %, correlated
#: over 50 ms; measured, tests/test_crossing_watch.py). Real telemetry may scatter more or less.
RPM_UNCERTAINTY_TELEMETRY = 0.005
RPM_UNCERTAINTY_ESTIMATE = 0.01  #: relative uncertainty of a speed estimated from the spectrum
SLOPE_SIGMAS = 3.0  #: a speed trend is an approach when its slope stands this many standard errors clear
SLOPE_FLOOR_RPM_S = 5.0  #: ... plus this (RPM/s)
#: a motor whose readings stray from a straight line by more than this share of its speed (RMS over
#: the trend's 0.5 s) is starting, stopping or stepping: it raises nothing until it settles
UNSETTLED_FRACTION = 0.02
FLOOR_TAU_S = 3.0
LEVEL_TAU_S = 0.15  #: the level at a mode is smoothed: one frame's PSD bin has chi-squared (2 dof) scatter
MAX_PASSAGES = 2000  #: observed bands kept per watch (older ones are merged into the totals)


def watch_half_band(f_n, zeta, bin_hz: float, estimated=False):
    """Half-width (Hz) of the watch band around f_n: zeta f_n + df / 2 + u f_n."""
    u = np.where(estimated, RPM_UNCERTAINTY_ESTIMATE, RPM_UNCERTAINTY_TELEMETRY)
    return zeta * f_n + 0.5 * bin_hz + u * f_n


def exit_allowance(f_n, zeta, estimated=False):
    """How far (Hz) past the watch band an order may stray before a crossing group may step down:
    the wider of a quarter half-bandwidth and 1.5 times the RPM uncertainty."""
    u = np.where(estimated, RPM_UNCERTAINTY_ESTIMATE, RPM_UNCERTAINTY_TELEMETRY)
    return np.maximum(0.25 * zeta * f_n, 1.5 * u * f_n)


@dataclass(frozen=True)
class MotorReading:
    motor: int  #: 1-based
    rpm: float
    order_hz: float
    state: str  #: this motor's own condition: crossing (in the watch band), nearing (inside the margin), clear

    def as_dict(self) -> dict:
        return {"motor": self.motor, "rpm": round(self.rpm, 1), "order_hz": round(self.order_hz, 2),
                "state": self.state}


@dataclass(frozen=True)
class CrossingEvent:
    """A (mode, order) group changed state."""

    t_s: float
    state: str
    previous: str
    mode: str
    mode_hz: float
    order: float  #: multiple of the shaft frequency
    order_name: str
    motor: int  #: the motor that set the state (1-based)
    rpm: float  #: its speed (for a crossing: inside ``watch_rpm``)
    order_hz: float
    level_db: float  #: response at the mode, dB re 1 (deg/s)^2/Hz
    floor_db: float
    predicted_rpm: tuple[float, float]  #: 60 f_n (1 -+ zeta) / k
    watch_rpm: tuple[float, float]  #: the watch band in RPM: crossing is declared inside it
    motors: tuple[MotorReading, ...] = ()
    reason: str = ""
    estimated: bool = False  #: the speeds are estimated from the spectrum

    @property
    def over_floor_db(self) -> float:
        return self.level_db - self.floor_db

    def as_dict(self) -> dict:
        return {
            "kind": self.state,
            "previous": self.previous,
            "t_s": round(self.t_s, 4),
            "mode": self.mode,
            "mode_hz": round(self.mode_hz, 2),
            "order": self.order,
            "order_name": self.order_name,
            "motor": self.motor,
            "rpm": round(self.rpm, 1),
            "order_hz": round(self.order_hz, 2),
            "level_db": round(self.level_db, 2),
            "over_floor_db": round(self.over_floor_db, 2),
            "predicted_rpm": [round(self.predicted_rpm[0], 1), round(self.predicted_rpm[1], 1)],
            "watch_rpm": [round(self.watch_rpm[0], 1), round(self.watch_rpm[1], 1)],
            "motors": [m.as_dict() for m in self.motors],
            "reason": self.reason,
            "rpm_estimated": self.estimated,
        }

    def motor_list(self, states=("crossing", "nearing")) -> str:
        """"M1,2" for the motors in the given states (the lead motor alone if none)."""
        ms = [m.motor for m in self.motors if m.state in states] or [self.motor]
        return "M" + ",".join(str(m) for m in ms)

    def text(self) -> str:
        est = " est." if self.estimated else ""
        level = (f"response {self.over_floor_db:+.1f} dB over its floor "
                 f"({self.level_db:.1f} dB re (deg/s)^2/Hz)")
        head = f"{self.t_s:8.2f} s  {self.state.upper():8s} {self.order_name} "
        where = f"{self.mode} {self.mode_hz:.1f} Hz"
        if self.state == "clear":
            return (f"{head}of every motor away from {where} (nearest M{self.motor} at {self.order_hz:.1f} Hz, "
                    f"{self.rpm:.0f} RPM{est}); {level}")
        who = self.motor_list(("crossing",) if self.state == "crossing" else ("crossing", "nearing"))
        reason = "" if self.reason.startswith("inside the margin with the response") else f"; {self.reason}"
        if reason == "; order inside the watch band":
            reason = ""
        return (f"{head}of {who} at {self.order_hz:.1f} Hz ({self.rpm:.0f} RPM{est}) on {where}; watch band "
                f"{self.watch_rpm[0]:.0f}-{self.watch_rpm[1]:.0f} RPM{reason}; {level}")


@dataclass
class ObservedBand:
    """The RPM range over which one (mode, order) group was crossing, on one or more passages."""

    mode: str
    mode_hz: float
    order: float
    order_name: str
    motors: tuple[int, ...]
    rpm_low: float
    rpm_high: float
    peak_db: float  #: highest response at the mode while crossing, dB re 1 (deg/s)^2/Hz
    predicted_rpm: tuple[float, float]
    passages: int = 1
    t_start_s: float = 0.0
    t_end_s: float = 0.0

    def as_dict(self) -> dict:
        return {
            "mode": self.mode,
            "mode_hz": round(self.mode_hz, 2),
            "order": self.order,
            "order_name": self.order_name,
            "motors": list(self.motors),
            "observed_rpm": [round(self.rpm_low, 1), round(self.rpm_high, 1)],
            "predicted_rpm": [round(self.predicted_rpm[0], 1), round(self.predicted_rpm[1], 1)],
            "peak_db": round(self.peak_db, 2),
            "passages": self.passages,
            "t_start_s": round(self.t_start_s, 3),
            "t_end_s": None if np.isnan(self.t_end_s) else round(self.t_end_s, 3),  # None: still crossing
        }


class CrossingWatch:
    """The crossing state of every (mode, order) group of a profile, frame by frame."""

    def __init__(self, profile: Profile, motors: int, freqs: np.ndarray, hop_s: float):
        self.profile = profile
        self.motors = motors
        modes = profile.modes
        self.mult = order_multipliers(profile.blades)
        self._mult60 = self.mult / 60.0
        nm, nk = len(modes), len(self.mult)
        self.f_mode = np.array([m.freq_hz for m in modes], dtype=float)
        self.zeta = np.array([m.damping_ratio for m in modes], dtype=float)
        self.bin_hz = float(freqs[1] - freqs[0])
        self.margin = np.maximum(MARGIN_FRACTION * self.f_mode, MARGIN_HALF_BANDWIDTHS * self.zeta * self.f_mode)
        self._labels = [order_label(float(k), profile.blades) for k in self.mult]
        self._predicted = [[m.rpm_band(float(k)) for k in self.mult] for m in modes]
        self.state = np.zeros((nm, nk), dtype=np.int8)
        self._last_keep = np.zeros((nm, nk))
        self._prev_s = np.full((nm, motors, nk), np.nan)  #: signed offset of each channel in the last frame
        self._prev_rpm = np.full(motors, np.nan)
        self.floor_db = np.full(nm, np.nan)
        self.level_db = np.full(nm, np.nan)
        self.alpha = 1.0 - np.exp(-hop_s / FLOOR_TAU_S)
        self.level_alpha = 1.0 - np.exp(-hop_s / LEVEL_TAU_S)
        self._setup_levels(freqs)
        # the open observed band of every group: RPM low/high, peak level, motors, start
        self._b_lo = np.full((nm, nk), np.inf)
        self._b_hi = np.full((nm, nk), -np.inf)
        self._b_peak = np.full((nm, nk), -np.inf)
        self._b_motors = np.zeros((nm, motors, nk), bool)
        self._b_t0 = np.zeros((nm, nk))
        self.passages: deque[ObservedBand] = deque(maxlen=MAX_PASSAGES)
        self._merged_old: dict[tuple[str, float], ObservedBand] = {}
        # the last frame seen, for views: per channel offset, speed, state
        self._last = None
        self.skip_held = True  #: pass frames in which nothing changes as a block (False: step each; tests)
        self._last_estimated = False

    def _setup_levels(self, freqs: np.ndarray) -> None:
        modes = self.profile.modes
        nb = freqs.shape[0]
        df = self.bin_hz
        band_idx, floor_w = [], np.zeros((nb, len(modes)))
        for j, m in enumerate(modes):
            lo, hi = m.band_hz
            bb = np.flatnonzero((freqs >= lo - df / 2) & (freqs <= hi + df / 2))
            if bb.size == 0:
                bb = np.array([int(np.argmin(np.abs(freqs - m.freq_hz)))])
            fb = np.flatnonzero((freqs >= 0.6 * m.freq_hz) & (freqs <= 1.4 * m.freq_hz) & ((freqs < lo) | (freqs > hi)))
            fb = fb if fb.size else bb
            band_idx.append(bb)
            floor_w[fb, j] = 1.0 / fb.size
        width = max(len(b) for b in band_idx) if band_idx else 1
        padded = [np.pad(b, (0, width - len(b)), mode="edge") for b in band_idx]
        band = np.array(padded, dtype=np.int64).reshape(len(modes), -1)
        #: the bins any mode reads (bands and floors): only these are converted to dB
        self._cols = np.union1d(band.ravel(), np.flatnonzero(floor_w.any(axis=1))).astype(np.int64)
        self._band_idx = np.searchsorted(self._cols, band)
        #: (cols, modes): the floor is the mean level in dB over 0.6..1.4 f_n outside the band
        self._floor_w = floor_w[self._cols]

    # ---------------------------------------------------------------- levels

    def levels(self, psd_sum: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(level, local floor) at each mode in dB for frames' PSD summed over axes (F, bins)."""
        db = 10 * np.log10(np.maximum(psd_sum[:, self._cols], 1e-30))
        level = db[:, self._band_idx].max(axis=2)
        return level, db @ self._floor_w

    def _smoothed(self, levels: np.ndarray, floors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The running level and floor (F, modes) after each frame (first-order smoothing, in dB)."""
        f = levels.shape[0]
        lv = np.empty_like(levels)
        fl = np.empty_like(floors)
        cur_l, cur_f = self.level_db, self.floor_db
        a, al = self.alpha, self.level_alpha
        for i in range(f):
            if np.isnan(cur_f[0]):
                cur_l, cur_f = levels[i].copy(), floors[i].copy()
            else:
                cur_f = cur_f + a * (floors[i] - cur_f)
                cur_l = cur_l + al * (levels[i] - cur_l)
            lv[i], fl[i] = cur_l, cur_f
        self.level_db, self.floor_db = cur_l, cur_f
        return lv, fl

    # ---------------------------------------------------------------- frames

    def break_series(self) -> None:
        """The series broke (a gap): no step over a band is inferred across it."""
        self._prev_s[:] = np.nan
        self._prev_rpm[:] = np.nan

    def update(self, t_s: np.ndarray, psd_sum: np.ndarray, rpm: np.ndarray, slope: np.ndarray | None = None,
               slope_se: np.ndarray | None = None, estimated: np.ndarray | None = None,
               residual_rms: np.ndarray | None = None) -> list[CrossingEvent]:
        """Advance over F frames ending at ``t_s`` (F,) s.

        ``psd_sum`` (F, bins) PSD summed over axes, (deg/s)^2/Hz; ``rpm`` (F, motors) each motor's
        speed at the frame's end, RPM; ``slope`` and ``slope_se`` (F, motors) its rate of change
        and that rate's standard error, RPM/s (None: no trend known, nothing is closing);
        ``estimated`` (F,) speeds estimated from the spectrum; ``residual_rms`` (F, motors) how far
        the readings stray from that line, RPM: a motor whose speed does not follow a line (it
        starts or stops: more than :data:`UNSETTLED_FRACTION` of its speed) raises nothing.
        Returns the events, in time order.
        """
        modes = self.profile.modes
        nf = len(t_s)
        if not modes or nf == 0:
            return []
        lv_seq, fl_seq = self._smoothed(*self.levels(psd_sum))
        if slope is None:
            slope = np.zeros_like(rpm)
            slope_se = np.full_like(rpm, np.inf)
        est = np.zeros(nf, bool) if estimated is None else np.asarray(estimated, bool)
        if residual_rms is None:
            settled = np.ones(rpm.shape, bool)
        else:
            settled = ~(np.nan_to_num(residual_rms, nan=0.0) > UNSETTLED_FRACTION * np.abs(rpm))
        g = self._geometry(rpm, slope, slope_se, est, lv_seq - fl_seq, settled)
        events: list[CrossingEvent] = []
        fin = np.isfinite(rpm).all(axis=1)
        can_rise = (g.rise_x | g.rise_n).reshape(nf, -1).any(axis=1) & fin
        i = 0
        while i < nf:
            if not self.state.any():
                # all clear: frames in which nothing can rise pass as a block
                nxt = np.flatnonzero(can_rise[i:])
                if nxt.size == 0:
                    break
                i += int(nxt[0])
            elif self.skip_held:
                # frames in which every group keeps its reason to stay pass as a block: only their
                # keep times and the open bands move
                j = self._held_until(i, g, fin)
                if j > i:
                    self._hold(i, j, t_s, g, rpm, lv_seq, fin)
                    i = j
                    if i >= nf:
                        break
            if fin[i]:
                self._step(i, float(t_s[i]), g, rpm[i], lv_seq[i], fl_seq[i], bool(est[i]), events)
            i += 1
        # carry the last frame's offsets (for steps over a band) and keep it for views
        last = int(np.flatnonzero(fin)[-1]) if fin.any() else -1
        if last >= 0:
            self._prev_s = g.s[last].copy()
            self._prev_rpm = rpm[last].copy()
            self._last = (g.d[last], rpm[last], g.chan_state[last], g.s[last])
            self._last_estimated = bool(est[last])
        return events

    def _geometry(self, rpm, slope, slope_se, est, over, settled):
        """Conditions of every channel and group in every frame (state-free, vectorised)."""
        f_n = self.f_mode[None, :, None, None]
        zeta = self.zeta[None, :, None, None]
        e4 = est[:, None, None, None]
        fo = rpm[:, None, :, None] * self._mult60  # (F, 1, M, K) order frequencies, Hz
        s = fo - f_n  # (F, N, M, K) signed offset from the mode
        d = np.abs(s)
        w = watch_half_band(f_n, zeta, self.bin_hz, e4)  # (F, N, 1, 1)
        in_band = d <= w
        # a step over the whole band since the previous frame (fast sweeps of high orders)
        prev = np.concatenate([self._prev_s[None], s[:-1]], axis=0)
        with np.errstate(invalid="ignore"):
            jump = (prev * s < 0) & (np.abs(prev) > w) & (d > w)
        prev_rpm = np.concatenate([self._prev_rpm[None], rpm[:-1]], axis=0)
        # a reading that leaps between two frames (an estimate changing its mind, a glitch) did not
        # sweep through what lies between: only a change within MAX_STEP_FRACTION is a step over
        with np.errstate(invalid="ignore"):
            smooth = np.abs(rpm - prev_rpm) <= MAX_STEP_FRACTION * np.maximum(np.abs(rpm), np.abs(prev_rpm))
        jump &= smooth[:, None, :, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(jump, prev / (prev - s), 0.0)
        rpm_b = rpm[:, None, :, None]
        rpm_jump = prev_rpm[:, None, :, None] + (rpm_b - prev_rpm[:, None, :, None]) * frac
        # closing speed of each order toward its mode, Hz/s (> 0 approaching), when the trend is clear
        sig = np.abs(slope) > SLOPE_SIGMAS * np.nan_to_num(slope_se, nan=np.inf, posinf=np.inf) + SLOPE_FLOOR_RPM_S
        v = -np.sign(s) * (np.nan_to_num(slope)[:, None, :, None] * self._mult60)
        closing = sig[:, None, :, None] & (v > 0)
        margin = self.margin[None, :, None, None]
        in_margin = d <= margin
        with np.errstate(divide="ignore", invalid="ignore"):
            ttb = np.where(closing, (d - w) / v, np.inf)
        approach = closing & (in_margin | (ttb <= LOOKAHEAD_S))
        hot = in_margin & (over[:, :, None, None] >= NEAR_LEVEL_DB)
        near = approach | hot
        keep_band = d <= w + exit_allowance(f_n, zeta, e4)
        in_exit = d <= EXIT_MARGIN * margin
        ok = settled[:, None, :, None]
        jump &= ok
        near &= ok
        approach &= ok
        chan_state = np.where(in_band | jump, CROSSING, np.where(near | in_exit, NEARING, CLEAR)).astype(np.int8)
        return _Geometry(
            s=s, d=d, w=w, in_band=in_band, jump=jump, rpm_jump=rpm_jump, v=v, ttb=ttb, approach=approach,
            hot=hot, near=near, chan_state=chan_state,
            rise_x=((in_band & ok) | jump).any(axis=2),
            rise_n=near.any(axis=2),
            keep_x=(keep_band | approach).any(axis=2),
            keep_n=(in_exit | near).any(axis=2),
        )

    def _held_until(self, i: int, g, fin: np.ndarray) -> int:
        """The first frame from ``i`` in which some group could change state with the states held
        (a rise, or a group without its reason to stay, whose dwell then runs); frames of unknown
        speed never change anything."""
        s = self.state[None]
        keep = np.where(s == CROSSING, g.keep_x[i:], (s == NEARING) & g.keep_n[i:])
        rx = g.rise_x[i:]
        move = (rx & (s < CROSSING)) | (g.rise_n[i:] & (s == CLEAR)) | ((s > CLEAR) & ~keep & ~rx)
        cand = move.reshape(move.shape[0], -1).any(axis=1) & fin[i:]
        hit = np.flatnonzero(cand)
        return i + int(hit[0]) if hit.size else len(fin)

    def _hold(self, i: int, j: int, t_s, g, rpm, lv_seq, fin) -> None:
        """Frames i..j-1, in which no group changes: keep times and open bands, as _step would."""
        sel = np.flatnonzero(fin[i:j]) + i
        if sel.size == 0:
            return
        s = self.state[None]
        keep = np.where(s == CROSSING, g.keep_x[sel], (s == NEARING) & g.keep_n[sel]) | g.rise_x[sel]
        seen = keep.any(axis=0)
        last = sel.size - 1 - np.argmax(keep[::-1], axis=0)  # the last frame each group kept its reason
        self._last_keep = np.where(seen, t_s[sel][last], self._last_keep)
        crossing = self.state == CROSSING
        if crossing.any():
            inb, jmp = g.in_band[sel], g.jump[sel]
            r = np.where(inb, rpm[sel][:, None, :, None], np.where(jmp, g.rpm_jump[sel], np.nan))
            hit = inb | jmp
            lo = np.where(hit, r, np.inf).min(axis=(0, 2))
            hi = np.where(hit, r, -np.inf).max(axis=(0, 2))
            np.minimum(self._b_lo, lo, out=self._b_lo, where=crossing)
            np.maximum(self._b_hi, hi, out=self._b_hi, where=crossing)
            np.maximum(self._b_peak, lv_seq[sel].max(axis=0)[:, None], out=self._b_peak, where=crossing)
            self._b_motors |= hit.any(axis=0) & crossing[:, None, :]

    def _step(self, i: int, t: float, g, rpm_i, lv, fl, est: bool, events: list) -> None:
        s = self.state
        rx, rn, kx, kn = g.rise_x[i], g.rise_n[i], g.keep_x[i], g.keep_n[i]
        keep = np.where(s == CROSSING, kx, (s == NEARING) & kn)
        self._last_keep = np.where(keep | rx, t, self._last_keep)
        expired = (t - self._last_keep) >= DWELL_S - 1e-9
        new = np.where(
            rx, CROSSING,
            np.where(s == CROSSING, np.where(expired, np.where(kn, NEARING, CLEAR), CROSSING),
                     np.where(s == NEARING, np.where(expired, CLEAR, NEARING), np.where(rn, NEARING, CLEAR))),
        ).astype(np.int8)
        changed = new != s
        if changed.any():
            self._last_keep = np.where(changed, t, self._last_keep)
            for n, k in zip(*np.nonzero(changed), strict=True):
                events.append(self._event(i, t, int(n), int(k), int(s[n, k]), int(new[n, k]), g, rpm_i, lv, fl, est))
            left = (s == CROSSING) & (new != CROSSING)
            for n, k in zip(*np.nonzero(left), strict=True):
                self._close_band(int(n), int(k), t)
            entered = (s != CROSSING) & (new == CROSSING)
            self._b_t0 = np.where(entered, t, self._b_t0)
            self.state = new
        crossing = self.state == CROSSING
        if crossing.any():
            self._extend(i, g, rpm_i, lv, crossing)

    def _extend(self, i, g, rpm_i, lv, crossing) -> None:
        """Widen the open observed bands by the speeds of the motors whose order is in the watch band."""
        inb, jmp = g.in_band[i], g.jump[i]  # (N, M, K)
        r = np.where(inb, rpm_i[None, :, None], np.where(jmp, g.rpm_jump[i], np.nan))
        hit = inb | jmp
        lo = np.where(hit, r, np.inf).min(axis=1)
        hi = np.where(hit, r, -np.inf).max(axis=1)
        np.minimum(self._b_lo, lo, out=self._b_lo, where=crossing)
        np.maximum(self._b_hi, hi, out=self._b_hi, where=crossing)
        np.maximum(self._b_peak, lv[:, None], out=self._b_peak, where=crossing)
        self._b_motors |= hit & crossing[:, None, :]

    def _close_band(self, n: int, k: int, t: float) -> None:
        if np.isfinite(self._b_lo[n, k]):
            self._push_passage(self._band(n, k, t))
        self._b_lo[n, k], self._b_hi[n, k], self._b_peak[n, k] = np.inf, -np.inf, -np.inf
        self._b_motors[n, :, k] = False

    def _band(self, n: int, k: int, t_end: float) -> ObservedBand:
        mode = self.profile.modes[n]
        motors = tuple(int(m) + 1 for m in np.flatnonzero(self._b_motors[n, :, k]))
        return ObservedBand(mode.name, mode.freq_hz, float(self.mult[k]), self._labels[k], motors,
                            float(self._b_lo[n, k]), float(self._b_hi[n, k]), float(self._b_peak[n, k]),
                            self._predicted[n][k], 1, float(self._b_t0[n, k]), t_end)

    def _push_passage(self, band: ObservedBand) -> None:
        if len(self.passages) == self.passages.maxlen:
            _merge_into(self._merged_old, self.passages[0])
        self.passages.append(band)

    def _event(self, i, t, n, k, old, new, g, rpm_i, lv, fl, est) -> CrossingEvent:
        mode = self.profile.modes[n]
        d = g.d[i, n, :, k]
        cs = g.chan_state[i, n, :, k]
        fo = rpm_i * self._mult60[k]
        if new == CROSSING:
            hit = g.in_band[i, n, :, k] | g.jump[i, n, :, k]
            m = int(np.argmin(np.where(hit, np.where(g.jump[i, n, :, k], 0.0, d), np.inf)))
            if g.jump[i, n, m, k] and not g.in_band[i, n, m, k]:
                rpm, ohz = float(g.rpm_jump[i, n, m, k]), mode.freq_hz
                reason = "stepped over the band since the last frame (met the mode there)"
            else:
                rpm, ohz = float(rpm_i[m]), float(fo[m])
                reason = "order inside the watch band"
        else:
            near = g.near[i, n, :, k]
            if new == NEARING and near.any():
                m = int(np.argmin(np.where(near, d, np.inf)))
                if g.approach[i, n, m, k]:
                    tt = g.ttb[i, n, m, k]
                    reason = f"closing at {g.v[i, n, m, k]:.1f} Hz/s, {max(tt, 0.0):.1f} s to the band"
                else:
                    reason = f"inside the margin with the response {lv[n] - fl[n]:+.1f} dB over its floor"
            else:
                m = int(np.argmin(d))
                reason = ("left the band, still inside the margin" if new == NEARING
                          else "no order inside the margin")
            rpm, ohz = float(rpm_i[m]), float(fo[m])
        lo_w, hi_w = self._watch_rpm(n, k, est)
        readings = tuple(MotorReading(j + 1, float(rpm_i[j]), float(fo[j]), STATE_NAMES[int(cs[j])])
                         for j in range(self.motors))
        return CrossingEvent(t, STATE_NAMES[new], STATE_NAMES[old], mode.name, mode.freq_hz, float(self.mult[k]),
                             self._labels[k], m + 1, rpm, ohz, float(lv[n]), float(fl[n]), self._predicted[n][k],
                             (lo_w, hi_w), readings, reason, est)

    def _watch_rpm(self, n: int, k: int, est: bool) -> tuple[float, float]:
        w = float(watch_half_band(self.f_mode[n], self.zeta[n], self.bin_hz, est))
        c = 60.0 / self.mult[k]
        return float((self.f_mode[n] - w) * c), float((self.f_mode[n] + w) * c)

    # ---------------------------------------------------------------- reading

    def observed_bands(self) -> list[ObservedBand]:
        """Every passage's observed band so far (the open ones up to now), in time order."""
        out = list(self.passages)
        for n, k in zip(*np.nonzero((self.state == CROSSING) & np.isfinite(self._b_lo)), strict=True):
            out.append(self._band(int(n), int(k), float("nan")))
        return out

    def all_bands(self) -> list[ObservedBand]:
        """Observed bands merged per (mode, order) over all passages and motors, by mode frequency."""
        merged = {key: ObservedBand(**vars(b)) for key, b in self._merged_old.items()}
        for b in self.observed_bands():
            _merge_into(merged, b)
        return sorted(merged.values(), key=lambda b: (b.mode_hz, b.order))

    def group_states(self) -> np.ndarray:
        """(modes, orders) state codes (0 clear, 1 nearing, 2 crossing)."""
        return self.state.copy()

    def mode_states(self) -> list[dict]:
        """Per mode: the worst group's state, its order, motors and watch band, or the nearest
        order when all are clear; and the response level (dB re 1 (deg/s)^2/Hz) over its floor."""
        out = []
        for n, mode in enumerate(self.profile.modes):
            row = self.state[n]
            worst = int(row.max()) if row.size else 0
            entry = {"mode": mode.name, "freq_hz": mode.freq_hz, "state": STATE_NAMES[worst],
                     "level_db": float(self.level_db[n]) if np.isfinite(self.level_db[n]) else None,
                     "over_floor_db": (float(self.level_db[n] - self.floor_db[n])
                                       if np.isfinite(self.level_db[n]) and np.isfinite(self.floor_db[n]) else None)}
            if self._last is not None:
                d, rpm, cs, _ = self._last
                cand = np.flatnonzero(row == worst) if worst else np.arange(row.size)
                dn = d[n][:, cand]  # (M, candidates)
                m, c = np.unravel_index(int(np.argmin(dn)), dn.shape)
                k = int(cand[c])
                motors = [int(j) + 1 for j in np.flatnonzero(cs[n, :, k] >= max(worst, 1))] if worst else []
                entry.update({
                    "order": float(self.mult[k]), "order_name": self._labels[k], "motor": int(m) + 1,
                    "motors": motors or [int(m) + 1], "rpm": float(rpm[m]),
                    "order_hz": float(rpm[m] * self._mult60[k]),
                    "watch_rpm": self._watch_rpm(n, k, self._last_estimated),
                    "predicted_rpm": self._predicted[n][k],
                })
            out.append(entry)
        return out


@dataclass(frozen=True)
class _Geometry:
    s: np.ndarray
    d: np.ndarray
    w: np.ndarray
    in_band: np.ndarray
    jump: np.ndarray
    rpm_jump: np.ndarray
    v: np.ndarray
    ttb: np.ndarray
    approach: np.ndarray
    hot: np.ndarray
    near: np.ndarray
    chan_state: np.ndarray
    rise_x: np.ndarray
    rise_n: np.ndarray
    keep_x: np.ndarray
    keep_n: np.ndarray


def split_passages(events: list) -> list[list[CrossingEvent]]:
    """The crossing events of each (mode, order) group cut into passages, in order of their end.

    A passage starts when the group leaves clear, or at a new crossing after the group stepped
    down to nearing on the way out (the order turned back while still inside the margin); it ends
    at clear or at that nearing. Other events are ignored."""
    open_: dict = {}
    out: list[list[CrossingEvent]] = []
    for e in events:
        if not isinstance(e, CrossingEvent):
            continue
        key = (e.mode, e.order)
        cur = open_.get(key)
        if cur and e.state == "crossing" and cur[-1].state == "nearing" and cur[-1].previous == "crossing":
            out.append(open_.pop(key))
        open_.setdefault(key, []).append(e)
        if e.state == "clear":
            out.append(open_.pop(key))
    out.extend(open_.values())
    return out


def _merge_into(merged: dict, b: ObservedBand) -> None:
    key = (b.mode, b.order)
    m = merged.get(key)
    if m is None:
        merged[key] = ObservedBand(b.mode, b.mode_hz, b.order, b.order_name, b.motors, b.rpm_low, b.rpm_high,
                                   b.peak_db, b.predicted_rpm, b.passages, b.t_start_s, b.t_end_s)
        return
    m.motors = tuple(sorted(set(m.motors) | set(b.motors)))
    m.rpm_low = min(m.rpm_low, b.rpm_low)
    m.rpm_high = max(m.rpm_high, b.rpm_high)
    m.peak_db = max(m.peak_db, b.peak_db)
    m.passages += b.passages
    m.t_start_s = min(m.t_start_s, b.t_start_s)
    m.t_end_s = b.t_end_s if np.isnan(b.t_end_s) else max(m.t_end_s, b.t_end_s)
