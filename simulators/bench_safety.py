"""Motor safety of the device side (``firmware_protocol/SPEC.md`` sections 6 and 7).

A Python mirror of ``sr_bench_*`` in ``firmware_protocol/c/spinrig_wire.c``: the same rules, the
same verdicts. Times are device milliseconds (float allowed); throttle in 0.01 % units.
"""

from __future__ import annotations

from collections import deque

from firmware_protocol import (
    ERROR_BURST_FRAMES,
    ERROR_BURST_WINDOW_MS,
    ArmBench,
    BenchState,
    Fault,
    HostHeartbeat,
    Outcome,
    RequestInfo,
    SetThrottle,
    StopMotors,
    StreamControl,
)

BLOCKING_ARM = Fault.SENSOR_FAULT | Fault.SUPPLY_LOW | Fault.OVERCURRENT


class BenchSafety:
    def __init__(self, heartbeat_timeout_ms: int, throttle_ceiling: int, motor_count: int):
        self.heartbeat_timeout_ms = heartbeat_timeout_ms
        self.throttle_ceiling = min(int(throttle_ceiling), 10000)
        self.motor_count = motor_count
        self.armed = False
        self.nonce = 0
        self.last_heartbeat_ms = 0.0
        self.faults = int(Fault.REBOOTED)
        self.throttle = [0] * motor_count  #: what the motors must be driven at now, 0.01 %
        self._bad: deque[float] = deque(maxlen=ERROR_BURST_FRAMES)

    @property
    def state(self) -> int:
        if not self.armed:
            return BenchState.DISARMED
        return BenchState.SPINNING if any(self.throttle) else BenchState.ARMED

    def stop(self, fault_bits: int) -> None:
        self.throttle = [0] * self.motor_count
        self.armed = False
        self.nonce = 0
        self.faults |= int(fault_bits)

    def command(self, msg, now_ms: float) -> tuple[int, int]:
        """Apply one valid host command; returns (Outcome, detail)."""
        if isinstance(msg, ArmBench):
            if self.throttle_ceiling == 0 or self.motor_count == 0:
                return Outcome.UNSUPPORTED, 0  # motors reported (or none) but not driven here
            if self.faults & BLOCKING_ARM:
                return Outcome.REFUSED_FAULT, self.faults
            if self.armed and self.nonce != msg.nonce:
                self.throttle = [0] * self.motor_count  # a new session never inherits spinning motors
            self.armed = True
            self.nonce = msg.nonce
            self.faults = 0
            self.last_heartbeat_ms = now_ms
            return Outcome.OK, msg.nonce
        if isinstance(msg, SetThrottle):
            if not self.armed:
                return Outcome.NOT_ARMED, 0
            if msg.nonce != self.nonce:
                return Outcome.BAD_NONCE, 0
            if len(msg.throttles) != self.motor_count:
                return Outcome.BAD_MOTOR_COUNT, self.motor_count
            limited = any(t > self.throttle_ceiling for t in msg.throttles)
            self.throttle = [min(int(t), self.throttle_ceiling) for t in msg.throttles]
            self.last_heartbeat_ms = now_ms
            if limited:
                self.faults |= Fault.THROTTLE_CAPPED
                return Outcome.LIMITED, self.throttle_ceiling
            return Outcome.OK, 0
        if isinstance(msg, StopMotors):
            self.stop(Fault.STOP_COMMAND)
            return Outcome.OK, 0
        if isinstance(msg, HostHeartbeat):
            if self.armed:
                if msg.nonce != self.nonce:
                    return Outcome.BAD_NONCE, 0
                self.last_heartbeat_ms = now_ms
            return Outcome.OK, 0
        if isinstance(msg, RequestInfo | StreamControl):
            return Outcome.OK, 0
        return Outcome.UNSUPPORTED, 0

    def bad_frame(self, now_ms: float) -> bool:
        """A bad host frame at ``now_ms``; True when it completes an error burst (motors stopped)."""
        self._bad.append(now_ms)
        if len(self._bad) == ERROR_BURST_FRAMES and now_ms - self._bad[0] < ERROR_BURST_WINDOW_MS and self.armed:
            self.stop(Fault.PROTOCOL_ERRORS)
            return True
        return False

    def tick(self, now_ms: float) -> bool:
        """True when the heartbeat timed out just now: motors stopped and the bench disarmed."""
        if self.armed and now_ms - self.last_heartbeat_ms >= self.heartbeat_timeout_ms:
            self.stop(Fault.HEARTBEAT_LOST)
            return True
        return False
