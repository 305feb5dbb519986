"""The simulated flight controller: the whole device side of ``firmware_protocol/SPEC.md``.

:class:`SimDevice` owns the bench physics and speaks the protocol: DEVICE_INFO at boot and on
request, GYRO_BLOCK at the output data rate, MOTOR_STATE and DEVICE_STATUS at their rates, arming
with a nonce, throttle with a slew limit and the throttle limit, the heartbeat watchdog, stop,
acknowledgements, taps and reboots. It works in simulated time: :meth:`step` advances one chunk
(several control periods) and returns the frames produced, each with its true time in seconds.
Pacing, transports and byte faults are the caller's (``simulators/stream.py``).
"""

from __future__ import annotations

import struct
from collections import deque
from dataclasses import dataclass

import numpy as np

import firmware_protocol as fp
from firmware_protocol.constants import HOST_TO_DEVICE_RANGE, U32

from .bench_safety import BenchSafety
from .physics import BenchPhysics
from .scenario import Scenario


@dataclass(frozen=True)
class DeviceOptions:
    seed: int = 0
    stream_at_boot: bool = False  #: start streaming without waiting for STREAM_CONTROL
    script: bool = True  #: spin the scenario's throttle script while no host has armed
    #: play the script once per motor in turn (motor 1 alone, then motor 2 alone, ...), the others still
    one_at_a_time: bool = False
    drift_ppm: float = 0.0  #: device clock runs fast by this many parts per million
    clock_start_us: int = 0  #: device clock at boot (set near 2**32 to test the wrap)
    #: control periods simulated per step: host commands take effect at chunk boundaries (40 ms)
    chunk_periods: int = 8
    #: internal physics rate floor; lower it only for long protocol soak tests (less accurate modes)
    min_internal_hz: float = 32_000.0


HOST_TYPES = set(HOST_TO_DEVICE_RANGE) | {fp.MessageType.SIM_TAP}
_GYRO = int(fp.MessageType.GYRO_BLOCK)
_MOTOR = int(fp.MessageType.MOTOR_STATE)
_GYRO_HEAD = struct.Struct("<IIB")


class SimDevice:
    def __init__(self, scenario: Scenario, options: DeviceOptions | None = None):
        self.scenario = scenario
        self.options = options or DeviceOptions()
        self.rng = np.random.default_rng(self.options.seed + 1_000_003)
        self.physics = BenchPhysics(scenario, seed=self.options.seed, min_internal_hz=self.options.min_internal_hz)
        for tap in scenario.taps:
            self.physics.tap(tap.target, tap.strength, at_s=tap.at_s)
        g = scenario.gyro
        self.odr = g.rate_hz
        d = scenario.device
        self.period_samples = int(round(self.odr * d.control_period_s))
        if self.period_samples < 1 or abs(self.period_samples - self.odr * d.control_period_s) > 1e-9:
            raise ValueError(f"control period {d.control_period_s} s is not a whole number of samples at {self.odr} Hz")
        self.control_period_s = self.period_samples / self.odr
        self.seq = 0
        self.boots = 0
        self.frames_sent = 0
        self.host_commands_seen = 0
        self._motor_k = 0  # index of the next MOTOR_STATE (times are k / rate: no float drift)
        self._status_k = 0
        self._pending: list[np.ndarray] = []
        self._pending_n = 0
        self._applied = np.zeros(scenario.motors.count)  # throttle driven now, 0.01 %
        self._boot()

    # ------------------------------------------------------------------ time and identity

    @property
    def time_s(self) -> float:
        """True (wall-equivalent) time since power-on, seconds."""
        return self.physics.time_s

    def device_us(self, true_s: float) -> int:
        """The device's own microsecond clock at true time ``true_s`` (u32, wraps)."""
        local = (true_s - self.boot_time_s) * (1.0 + self.options.drift_ppm * 1e-6)
        return int(self.options.clock_start_us + round(local * 1e6)) % U32

    def device_ms(self, true_s: float) -> float:
        return (true_s - self.boot_time_s) * (1.0 + self.options.drift_ppm * 1e-6) * 1e3

    def _boot(self) -> None:
        self.boots += 1
        self.boot_time_s = self.time_s
        self.boot_id = int(self.rng.integers(1, U32))
        self.sample_seq = 0
        self.seq = 0
        s = self.scenario
        self.safety = BenchSafety(s.device.heartbeat_timeout_ms, s.device.throttle_ceiling, s.motors.count)
        #: (device ms, what) of each bench event (armed, stopped and why), newest last, for a console
        self.bench_log: deque[tuple[float, str]] = deque(maxlen=100)
        self.bench_events = 0  #: events ever logged (a console prints those it has not yet)
        self.host_control = False  # a host armed in this boot: the script no longer drives the motors
        self.streaming = self.options.stream_at_boot
        self.decoder = fp.StreamDecoder(known_types=HOST_TYPES)
        self._inbox: list[fp.Received] = []
        self._pending = []
        self._pending_n = 0
        self._applied[:] = 0
        self._out: list[tuple[float, object]] = []
        self._emit(fp.DeviceInfo(**self.info_fields()))
        self._emit(fp.LogText(fp.LogLevel.INFO, f"{s.airframe} simulator boot {self.boots}"))

    def reboot(self) -> None:
        """Reset as a real reboot would: new boot id, sample and frame counters and clock from 0."""
        self._boot()

    def info_fields(self) -> dict:
        s = self.scenario
        g = s.gyro
        return dict(
            boot_id=self.boot_id,
            gyro_rate_mhz=int(round(g.rate_hz * 1000)),
            sens_num=g.sens_num,
            sens_den=g.sens_den,
            full_scale_dps=g.full_scale_dps,
            filter_flags=0,
            antialias_hz=int(round(g.antialias_hz)),
            motor_count=s.motors.count,
            pole_pairs=s.motors.pole_pairs,
            heartbeat_timeout_ms=s.device.heartbeat_timeout_ms,
            max_batch=g.block,
            throttle_ceiling=s.device.throttle_ceiling,
            motor_state_rate_hz=s.device.motor_state_rate_hz,
            board_id=s.device.board_id,
        )

    @property
    def info(self) -> fp.DeviceInfo:
        return fp.DeviceInfo(**self.info_fields())

    # ------------------------------------------------------------------ frames

    def _emit(self, msg, at_s: float | None = None) -> None:
        """Queue ``msg`` to go out at true time ``at_s`` (default now); encoded in time order."""
        self._emit_raw(fp.messages.TYPE_OF[type(msg)], fp.encode_payload(msg), at_s)

    def _emit_raw(self, type_code: int, payload: bytes, at_s: float | None = None) -> None:
        self._out.append((self.time_s if at_s is None else at_s, type_code, payload))

    def _encode_queued(self) -> list[tuple[float, bytes]]:
        self._out.sort(key=lambda tm: tm[0])  # stable: same-time messages keep their order
        frames = []
        encode = fp.encode_raw
        for t, type_code, payload in self._out:
            frames.append((t, encode(type_code, self.seq, payload)))
            self.seq = (self.seq + 1) & 0xFF
        self.frames_sent += len(frames)
        self._out = []
        return frames

    # ------------------------------------------------------------------ host side

    def receive(self, data: bytes) -> None:
        """Bytes from the host; commands take effect at the start of the next control period."""
        before = self.decoder.counters.bad_frames
        items = self.decoder.feed(data)
        now_ms = self.device_ms(self.time_s)
        for _ in range(self.decoder.counters.bad_frames - before):
            self.safety.bad_frame(now_ms)
        for t, seq, _reason in self.decoder.rejected_payloads:
            self._emit(fp.CommandOutcome(t, seq, fp.Outcome.MALFORMED, 0))
            self.safety.bad_frame(now_ms)
        self.decoder.rejected_payloads.clear()
        self._inbox.extend(i for i in items if isinstance(i, fp.Received))

    def _bench_event(self, now_ms: float, what: str) -> None:
        self.bench_log.append((now_ms, what))
        self.bench_events += 1

    def _handle(self, item: fp.Received) -> None:
        msg = item.message
        self.host_commands_seen += 1
        now_ms = self.device_ms(self.time_s)
        type_code = fp.messages.TYPE_OF[type(msg)]
        if isinstance(msg, fp.SimTap):
            self.physics.tap(msg.target, msg.strength)
            self._emit(fp.CommandOutcome(type_code, item.seq, fp.Outcome.OK, 0))
            return
        result, detail = self.safety.command(msg, now_ms)
        if isinstance(msg, fp.ArmBench) and result == fp.Outcome.OK:
            self.host_control = True
            self._applied[:] = 0
            self._bench_event(now_ms, "armed")
        if isinstance(msg, fp.StopMotors):
            self._bench_event(now_ms, "stopped: STOP_MOTORS")
        if isinstance(msg, fp.HostHeartbeat) and result == fp.Outcome.OK:
            return  # heartbeats are answered only when refused
        self._emit(fp.CommandOutcome(type_code, item.seq, int(result), int(detail)))
        if isinstance(msg, fp.RequestInfo):
            self._emit(self.info)
        elif isinstance(msg, fp.StreamControl):
            self.streaming = bool(msg.enable)
        elif isinstance(msg, fp.StopMotors):
            self._applied[:] = 0

    # ------------------------------------------------------------------ simulation

    def _target_throttle(self, t_s: float) -> np.ndarray:
        """What the motors should run at now, 0.01 % (host command, or the pilot's script)."""
        s = self.scenario
        if self.host_control or self.safety.armed:
            return np.asarray(self.safety.throttle, dtype=float)
        if not self.options.script or not s.script:
            return np.zeros(s.motors.count)
        if self.options.one_at_a_time:
            period = s.script_duration_s
            turn = int(t_s // period) if period > 0 else 0
            thr = np.zeros(s.motors.count)
            if turn < s.motors.count:
                thr[turn] = s.script_throttle(t_s - turn * period) * s.script_motors[turn] * 10000.0
        else:
            thr = s.script_throttle(t_s) * np.asarray(s.script_motors) * 10000.0
        return np.minimum(thr, s.device.throttle_ceiling)

    def step(self) -> list[tuple[float, bytes]]:
        """Simulate one chunk; returns [(true time s, frame bytes)] in order."""
        for item in self._inbox:
            self._handle(item)
        self._inbox.clear()
        s = self.scenario
        n_per = self.options.chunk_periods
        seg = np.zeros((s.motors.count, n_per))
        step_limit = s.device.slew_per_s * self.control_period_s
        for j in range(n_per):
            t = self.time_s + j * self.control_period_s
            if self.safety.tick(self.device_ms(t)):
                self._bench_event(self.device_ms(t), "stopped: heartbeat lost")
            target = self._target_throttle(t)
            stopping = target == 0
            delta = np.clip(target - self._applied, -step_limit, step_limit)
            self._applied = np.where(stopping, 0.0, self._applied + delta)
            self._applied = np.minimum(self._applied, s.device.throttle_ceiling)
            seg[:, j] = self._applied
        t0 = self.time_s
        n = self.period_samples * n_per
        counts, rpm = self.physics.step(n, seg / 10000.0)
        if self.streaming:
            self._gyro(counts)
            self._motor_states(t0, n, rpm, seg)
        self._status(t0, n, seg)
        self.sample_seq = (self.sample_seq + n) % U32
        return self._encode_queued()

    def _gyro(self, counts: np.ndarray) -> None:
        g = self.scenario.gyro
        self._pending.append(counts)
        self._pending_n += counts.shape[0]
        if self._pending_n < g.block:
            return
        allc = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        first_seq = (self.sample_seq + counts.shape[0] - self._pending_n) % U32
        k = 0
        while self._pending_n - k >= g.block:
            idx = (first_seq + k) % U32
            t_s = self.boot_time_s + self._samples_since_boot(idx) / self.odr
            payload = _GYRO_HEAD.pack(idx, self.device_us(t_s), g.block) + allc[k : k + g.block].astype("<i2").tobytes()
            self._emit_raw(_GYRO, payload, at_s=t_s + (g.block - 1) / self.odr)
            k += g.block
        rest = allc[k:]
        self._pending = [rest] if rest.shape[0] else []
        self._pending_n = rest.shape[0]

    def _samples_since_boot(self, idx: int) -> int:
        return idx  # the sample counter starts at 0 at boot; no wrap within a simulated session

    def _motor_states(self, t0: float, n: int, rpm: np.ndarray, seg: np.ndarray) -> None:
        s = self.scenario
        rate = s.device.motor_state_rate_hz
        t_end = t0 + n / self.odr
        self._motor_k = max(self._motor_k, int(np.ceil(t0 * rate - 1e-9)))
        count = s.motors.count
        entry = struct.Struct("<IB" + "IHB" * count)
        flags = int(fp.MotorFlags.TELEMETRY_VALID) if s.motors.telemetry else 0
        erpm_scale = s.motors.pole_pairs if s.motors.telemetry else 0
        times = []
        while self._motor_k / rate < t_end - 1e-12:
            times.append(self._motor_k / rate)
            self._motor_k += 1
        if not times:
            return
        idx = np.minimum(n - 1, ((np.array(times) - t0) * self.odr).astype(int))
        erpm = np.rint(rpm[:, idx] * erpm_scale).astype(np.int64).T.tolist()
        thr = seg[:, np.minimum(seg.shape[1] - 1, idx // self.period_samples)].astype(np.int64).T.tolist()
        for t, e, th in zip(times, erpm, thr, strict=True):
            fields = [self.device_us(t), count]
            for m in range(count):
                fields += (e[m], th[m], flags)
            self._emit_raw(_MOTOR, entry.pack(*fields), at_s=t)

    def _status(self, t0: float, n: int, seg: np.ndarray) -> None:
        s = self.scenario
        t_end = t0 + n / self.odr
        rate = s.device.status_rate_hz
        self._status_k = max(self._status_k, int(np.ceil(t0 * rate - 1e-9)))
        while self._status_k / rate < t_end - 1e-12:
            t = self._status_k / rate
            self._status_k += 1
            thr = float(np.mean(seg)) / 10000.0
            amps = 0.4 + 45.0 * thr**1.5
            c = self.decoder.counters
            self._emit(
                fp.DeviceStatus(
                    t_us=self.device_us(t),
                    boot_id=self.boot_id,
                    bench_state=int(self.safety.state),
                    faults=int(self.safety.faults),
                    supply_mv=max(0, int(s.device.supply_mv - 40 * amps)),
                    current_10ma=int(amps * 100),
                    host_frames_ok=c.frames_ok & 0xFFFF,
                    host_frames_bad=c.bad_frames & 0xFFFF,
                    streaming=int(self.streaming),
                ),
                at_s=t,
            )

    @property
    def applied_throttle(self) -> np.ndarray:
        """Throttle the motors are driven at now, 0.01 % (for tests)."""
        return self._applied.copy()
