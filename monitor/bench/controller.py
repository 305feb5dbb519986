"""The bench controller: drives a device through a sweep plan, and stops its motors on every path.

It listens to the link in the reader thread (:attr:`monitor.link.Link.observers`: the device's
description, its answers to commands, its status, gyro and motor telemetry, a lost port), so a
stop never waits for the consumer. Running a plan:

1. the device must have described itself; the plan is checked against it (motor count, its
   declared throttle ceiling) before anything is armed;
2. the device must be alive (a DEVICE_STATUS within :data:`STALE_S`); ARM_BENCH with a fresh
   random nonce; the answer must be OK and echo the nonce (a refusal,
   another answer or none within :data:`ANSWER_S` arms nothing, and says so);
3. a driver thread sends SET_THROTTLE at :data:`RATE_HZ` (every set-point from the plan's
   slew-limited schedule, clamped again to the plan's and the device's limits), which also keeps
   the device's heartbeat timer running; the link's own heartbeats carry the nonce too;
4. it stops all motors (STOP_MOTORS) at the plan's end, on :meth:`abort` (the abort key, SIGINT,
   SIGTERM, an abort rule, a lost link, a device silent for :data:`SILENT_S`), on an exception
   in the driver, and from :func:`atexit`; and waits for the device to acknowledge (its
   COMMAND_OUTCOME for that frame, or a DEVICE_STATUS saying it is disarmed), sending the stop
   again up to :data:`STOP_TRIES` times. A stop that is never acknowledged is reported loudly:
   the device's own heartbeat timeout is then what stops the motors.

A host that dies without any of this (``kill -9``) leaves the device to its heartbeat timeout
(SPEC.md section 7), which no host code can replace.
"""

from __future__ import annotations

import atexit
import secrets
import threading
import time
import weakref
from collections import deque
from dataclasses import dataclass, field

import numpy as np

import firmware_protocol as fp

from ..link import Link, LinkMessage
from .plan import Plan, setpoints

RATE_HZ = 50.0  #: set-points a second (SET_THROTTLE), well inside a 500 ms heartbeat timeout
ANSWER_S = 1.0  #: how long a command's answer may take
STOP_TRIES = 3
ARM_TRIES = 3
ERROR_WINDOW_S = 1.0
STALE_S = 1.0  #: a device with no DEVICE_STATUS for this long (5 a second are due) is not armed
SILENT_S = 1.0  #: a running sweep whose device sends no frame at all for this long is stopped


class BenchError(RuntimeError):
    """A sweep that cannot start or went wrong: one line, nothing left spinning."""


@dataclass
class StopReport:
    why: str  #: what stopped the sweep
    acknowledged: bool
    latency_s: float | None  #: from the first STOP_MOTORS sent to its acknowledgement (host clock)
    tries: int
    how: str = ""  #: "outcome" or "status": what acknowledged it

    def text(self) -> str:
        if self.acknowledged:
            return (f"motors stopped ({self.why}); the device acknowledged in {self.latency_s * 1000:.0f} ms "
                    f"({self.how})")
        return (f"WARNING: motors told to stop ({self.why}) {self.tries} times and the device never "
                f"acknowledged: cut the power with the kill switch now; the device's heartbeat timeout "
                f"should stop them on its own")


@dataclass
class Progress:
    state: str = "idle"  #: idle, arming, running, stopping, stopped
    t_s: float = 0.0  #: time into the schedule
    duration_s: float = 0.0
    commanded: np.ndarray = field(default_factory=lambda: np.zeros(0))  #: % per motor, the last set-point
    rpm: np.ndarray = field(default_factory=lambda: np.zeros(0))  #: the device's latest telemetry
    max_commanded: float = 0.0  #: highest set-point sent, %
    limited: int = 0  #: SET_THROTTLE answered LIMITED (the device clamped it)
    sent: int = 0  #: SET_THROTTLE frames sent


_LIVE: weakref.WeakSet = weakref.WeakSet()


@atexit.register
def _stop_all_at_exit() -> None:
    for c in list(_LIVE):
        c.abort("the program exited")
        c.join(timeout=2.0)


class BenchController:
    def __init__(self, link: Link, plan: Plan, clock=time.monotonic, rate_hz: float = RATE_HZ):
        self.link = link
        self.plan = plan
        self.clock = clock
        self.period = 1.0 / rate_hz
        self.info: fp.DeviceInfo | None = None
        self.status: fp.DeviceStatus | None = None
        self.progress = Progress()
        self.report: StopReport | None = None
        self.log: deque[str] = deque(maxlen=200)
        self._cond = threading.Condition()
        self._outcomes: dict[int, tuple[float, fp.CommandOutcome]] = {}
        self._abort = threading.Event()
        self._why = ""
        self._thread: threading.Thread | None = None
        self._nonce = 0
        self._disarmed_at: float | None = None  #: host time a status last said disarmed
        self._status_at: float | None = None  #: host time of the last DEVICE_STATUS
        self._heard_at = 0.0  #: host time of the last frame of any kind
        self._valid_at = np.zeros(0)  #: host time each motor last had live telemetry
        self._errors: deque[tuple[float, int]] = deque(maxlen=256)
        self._times = self._thr = None
        link.observers.append(self._observe)

    # ---------------------------------------------------------------- what the link says

    def _observe(self, entry) -> None:
        if isinstance(entry, LinkMessage):
            if entry.kind == "disconnected" and self.progress.state in ("arming", "running"):
                self.abort(f"link lost: {entry.text}")
            return
        now, items = entry
        if any(isinstance(it, (fp.Received, fp.GyroBatch, fp.MotorBatch)) for it in items):
            self._heard_at = now
        with self._cond:
            for it in items:
                if isinstance(it, fp.Received):
                    m = it.message
                    if isinstance(m, fp.CommandOutcome):
                        self._outcomes[m.command_seq] = (now, m)
                        if len(self._outcomes) > 256:
                            self._outcomes.pop(next(iter(self._outcomes)))
                        if m.command_type == fp.MessageType.SET_THROTTLE and m.result == fp.Outcome.LIMITED:
                            self.progress.limited += 1
                        elif (m.command_type == fp.MessageType.SET_THROTTLE and self.progress.state == "running"
                              and m.result in (fp.Outcome.NOT_ARMED, fp.Outcome.BAD_NONCE)):
                            # it disarmed on its own (a reboot, its watchdog, a fault): the sweep is over
                            self.abort(f"the device is no longer armed (it answered {fp.Outcome(m.result).name}: "
                                       "it rebooted or stopped on its own)")
                    elif isinstance(m, fp.DeviceInfo):
                        self.info = m
                        if self._valid_at.size != m.motor_count:
                            self._valid_at = np.full(m.motor_count, now)
                    elif isinstance(m, fp.DeviceStatus):
                        self.status = m
                        self._status_at = now
                        if m.bench_state == fp.BenchState.DISARMED:
                            self._disarmed_at = now
                    elif isinstance(m, fp.MotorState) and m.motors:
                        self._motors(now, np.array([[e.erpm for e in m.motors]], float),
                                     np.array([[bool(e.flags & 1) for e in m.motors]]))
                elif isinstance(it, fp.MotorBatch) and len(it):
                    self._motors(now, it.erpm.astype(float), (it.flags & 1) != 0)
                elif isinstance(it, fp.GyroBatch) and self.info is not None:
                    self._gyro(it)
            self._link_errors(now)
            self._cond.notify_all()

    def _motors(self, now: float, erpm: np.ndarray, valid: np.ndarray) -> None:
        pp = max(1, self.info.pole_pairs) if self.info else 1
        self.progress.rpm = erpm[-1] / pp
        if self._valid_at.size != erpm.shape[1]:
            self._valid_at = np.full(erpm.shape[1], now)
        self._valid_at = np.where(valid.any(axis=0), now, self._valid_at)
        lost_s = self.plan.abort.telemetry_lost_s
        if lost_s and self.progress.state == "running" and self.progress.commanded.size == self._valid_at.size:
            stale = (self.progress.commanded > 0) & (now - self._valid_at > lost_s)
            if stale.any():
                m = int(np.flatnonzero(stale)[0]) + 1
                self.abort(f"motor M{m} sent no live telemetry for {lost_s:g} s while commanded")

    def _gyro(self, batch: fp.GyroBatch) -> None:
        limit = self.plan.abort.gyro_rms_dps
        if not limit or self.progress.state != "running" or batch.samples.shape[0] == 0:
            return
        rms = np.sqrt(np.mean(np.square(batch.samples.astype(np.float64)), axis=0)) * self.info.dps_per_count
        if rms.max() > limit:
            ax = ("roll", "pitch", "yaw")[int(np.argmax(rms))]
            self.abort(f"gyro {ax} RMS {rms.max():.0f} deg/s over the limit of {limit:g} deg/s")

    def _link_errors(self, now: float) -> None:
        bad = self.link.decoder.counters.bad_frames
        self._errors.append((now, bad))
        while self._errors and now - self._errors[0][0] > ERROR_WINDOW_S:
            self._errors.popleft()
        limit = self.plan.abort.link_errors_per_s
        if limit and self.progress.state == "running":
            rate = self._error_rate()
            if rate > limit:
                self.abort(f"{rate:.0f} bad frames a second on the link, over the limit of {limit:g}")

    def _error_rate(self) -> float:
        """Bad frames a second over the last :data:`ERROR_WINDOW_S` (at least a quarter of it)."""
        if len(self._errors) < 2:
            return 0.0
        (t0, b0), (t1, b1) = self._errors[0], self._errors[-1]
        return (b1 - b0) / max(t1 - t0, ERROR_WINDOW_S / 4)

    def observe_events(self, events: list) -> None:
        """Events of the engine (the consumer's thread): a crossing too strong aborts."""
        limit = self.plan.abort.crossing_over_floor_db
        if not limit or self.progress.state != "running":
            return
        for e in events:
            if getattr(e, "state", None) == "crossing" and getattr(e, "over_floor_db", 0.0) >= limit:
                self.abort(f"{e.order_name} crossing {e.mode} with the response {e.over_floor_db:+.1f} dB over "
                           f"its floor (limit {limit:g} dB)")

    # ---------------------------------------------------------------- before anything spins

    def wait_device(self, timeout_s: float = 5.0) -> fp.DeviceInfo:
        end = time.monotonic() + timeout_s
        with self._cond:
            while self.info is None:
                left = end - time.monotonic()
                if left <= 0:
                    raise BenchError(f"{self.link.port_name}: the device did not describe itself within "
                                     f"{timeout_s:g} s (no DEVICE_INFO): nothing armed")
                self._cond.wait(left)
            return self.info

    def check(self) -> None:
        """The plan against the device (raises PlanError naming the field), the device alive (a
        DEVICE_STATUS within :data:`STALE_S`) and its link no worse than the plan's error limit
        (raises BenchError)."""
        info = self.info
        self.plan.check_device(info.motor_count, info.throttle_ceiling / 100.0)
        end = time.monotonic() + STALE_S
        with self._cond:
            while self._status_at is None or time.monotonic() - self._status_at > STALE_S:
                left = end - time.monotonic()
                if left <= 0:
                    seen = ("never sent a DEVICE_STATUS" if self._status_at is None else
                            f"sent no DEVICE_STATUS for {time.monotonic() - self._status_at:.1f} s")
                    raise BenchError(f"{self.link.port_name}: the device {seen} (at least 5 a second are due): "
                                     "stale, nothing armed")
                self._cond.wait(left)
            rate, limit = self._error_rate(), self.plan.abort.link_errors_per_s
        if limit and rate > limit:
            raise BenchError(f"{self.link.port_name}: {rate:.0f} bad frames a second on the link, over the plan's "
                             f"limit of {limit:g} (abort.link_errors_per_s): check the cable; nothing armed")

    def _answer(self, seq: int | None, after: float, timeout_s: float = ANSWER_S) -> fp.CommandOutcome | None:
        if seq is None:
            return None
        end = time.monotonic() + timeout_s
        with self._cond:
            while True:
                got = self._outcomes.get(seq)
                if got is not None and got[0] >= after:
                    return got[1]
                left = end - time.monotonic()
                if left <= 0:
                    return None
                self._cond.wait(left)

    def arm(self) -> int:
        """ARM_BENCH with a fresh nonce; returns it. Raises BenchError when the device does not arm."""
        self.progress.state = "arming"
        nonce = 0
        while nonce == 0:
            nonce = secrets.randbits(32)
        ans = None
        for _ in range(ARM_TRIES):  # the same nonce again is harmless (SPEC 6): a lossy link may drop one
            sent = time.monotonic()
            seq = self.link.send_seq(fp.ArmBench(nonce))
            ans = self._answer(seq, sent, ANSWER_S / ARM_TRIES)
            if ans is not None:
                break
        if ans is None:
            self.progress.state = "stopped"
            self.link.send(fp.StopMotors(int(fp.StopReason.HOST_ERROR)))  # in case it armed unheard
            raise BenchError(f"{self.link.port_name}: no answer to ARM_BENCH within {ANSWER_S:g} s "
                             f"({ARM_TRIES} tries): nothing armed")
        if ans.result != fp.Outcome.OK or ans.detail != nonce:
            self.progress.state = "stopped"
            why = fp.Outcome(ans.result).name if ans.result in fp.Outcome._value2member_map_ else str(ans.result)
            extra = f" (faults 0x{ans.detail:04x})" if ans.result == fp.Outcome.REFUSED_FAULT else ""
            raise BenchError(f"{self.link.port_name}: the device refused to arm: {why}{extra}; nothing spins")
        self._nonce = nonce
        self.link.nonce = nonce
        self.log.append(f"armed (nonce {nonce:08x})")
        return nonce

    # ---------------------------------------------------------------- running

    def start(self) -> None:
        """Arm and run the plan in a driver thread (:meth:`join` waits for its stop)."""
        info = self.info or self.wait_device()
        self.check()
        self._times, self._thr = self.plan.schedule(info.motor_count)
        self.progress.duration_s = float(self._times[-1])
        self.progress.commanded = np.zeros(info.motor_count)
        self.arm()
        _LIVE.add(self)
        self.progress.state = "running"
        self._thread = threading.Thread(target=self._drive, name="spinrig-bench", daemon=True)
        self._thread.start()

    def abort(self, why: str) -> None:
        """Stop at once (any thread; repeated calls keep the first reason)."""
        if not self._abort.is_set():
            self._why = why
            self._abort.set()
            if self._thread is None and self._nonce and threading.current_thread().name != "spinrig-link":
                # armed but not driving (and not on the reader thread, which delivers the answer)
                self._stop_motors(fp.StopReason.USER, why)

    def join(self, timeout: float | None = None) -> StopReport | None:
        if self._thread is not None:
            self._thread.join(timeout)
        return self.report

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def _drive(self) -> None:
        reason, why = fp.StopReason.PLAN_END, "end of the plan"
        info = self.info
        cap = min(self.plan.max_throttle, info.throttle_ceiling / 100.0)
        t0 = self.clock()
        k = 0
        try:
            while True:
                silent = time.monotonic() - self._heard_at
                if silent > SILENT_S and not self._abort.is_set():
                    # its transmit line broke or its firmware hung: the abort rules are blind
                    self.abort(f"the device went silent: no frame for {silent:.1f} s (a DEVICE_STATUS at "
                               "least 5 times a second is due)")
                if self._abort.is_set():
                    reason, why = fp.StopReason.USER, self._why
                    break
                t = self.clock() - t0
                if t >= self.progress.duration_s:
                    break
                sp = np.clip(setpoints(self._times, self._thr, t), 0.0, cap)
                units = tuple(int(x) for x in np.floor(sp * 100.0 + 1e-9))
                self.progress.commanded = sp
                self.progress.t_s = t
                self.progress.max_commanded = max(self.progress.max_commanded, float(sp.max(initial=0.0)))
                if self.link.send(fp.SetThrottle(self._nonce, units)):
                    self.progress.sent += 1
                k += 1
                wait = t0 + k * self.period - self.clock()
                if wait > 0:
                    self._abort.wait(wait)
        except Exception as exc:  # noqa: BLE001 - any failure in the driver stops the motors
            reason, why = fp.StopReason.HOST_ERROR, f"host error: {type(exc).__name__}: {exc}"
        finally:
            self._stop_motors(reason, why)

    def _stop_motors(self, reason: int, why: str) -> StopReport:
        self.progress.state = "stopping"
        self.progress.commanded = np.zeros_like(self.progress.commanded)
        first = time.monotonic()
        report = StopReport(why, False, None, 0)
        for tries in range(1, STOP_TRIES + 1):
            sent = time.monotonic()
            seq = self.link.send_seq(fp.StopMotors(int(reason)))
            report.tries = tries
            ans = self._answer(seq, sent, ANSWER_S / 2)
            if ans is not None and ans.result == fp.Outcome.OK:
                report.acknowledged, report.how = True, "COMMAND_OUTCOME OK"
                report.latency_s = self._outcomes[seq][0] - first
                break
            if self._disarmed_at is not None and self._disarmed_at >= sent:
                report.acknowledged, report.how = True, "DEVICE_STATUS disarmed"
                report.latency_s = self._disarmed_at - first
                break
        if report.acknowledged:
            self.link.nonce = 0
        self._nonce = 0
        self.report = report
        self.progress.state = "stopped"
        self.log.append(report.text())
        _LIVE.discard(self)
        return report
