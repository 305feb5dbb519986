"""Typed messages of the spinrig wire protocol and their payload layouts (``SPEC.md`` section 5).

Each message is a frozen dataclass whose field names carry their units. ``encode_payload`` and
``decode_payload`` convert between a message and the payload bytes of one frame (the part between
the two header bytes and the CRC). All multi-byte fields are little-endian.

``decode_payload`` raises :class:`MalformedPayload` (a ``ValueError``) naming the field or byte
offset that is wrong; the streaming decoder catches it and counts the frame as malformed.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from .constants import (
    GYRO_HEADER_BYTES,
    GYRO_SAMPLE_BYTES,
    MAX_BOARD_ID,
    MAX_GYRO_BATCH,
    MAX_LOG_TEXT,
    MAX_MOTORS,
    MAX_PAYLOAD,
    MOTOR_ENTRY_BYTES,
    MOTOR_STATE_HEADER_BYTES,
    PROTOCOL_VERSION,
    THROTTLE_FULL,
    AxisConvention,
    MessageType,
)


class MalformedPayload(ValueError):
    """A payload whose length or field values break ``SPEC.md`` (message names the field)."""


def _check_range(name: str, value: int, lo: int, hi: int) -> None:
    if not lo <= value <= hi:
        raise ValueError(f"{name}={value} outside {lo}..{hi}")


# --------------------------------------------------------------------------- device to host


_DEVICE_INFO = struct.Struct("<BBIIIIHBHHHBBHBHHB")  # 37 bytes, then board_id text


@dataclass(frozen=True, slots=True)
class DeviceInfo:
    """DEVICE_INFO (0x01): what the device and its gyro are; sent at start and on REQUEST_INFO.

    The gyro sensitivity is the exact fraction ``sens_num / sens_den`` counts per deg/s
    (16.4 LSB/(deg/s) at +-2000 deg/s is 164/10; 2**15/2000 is 32768/2000).
    """

    protocol_version: int = PROTOCOL_VERSION
    axis_convention: int = AxisConvention.FRD
    boot_id: int = 0  #: random or counted at each boot; a change means the device rebooted
    gyro_rate_mhz: int = 8_000_000  #: gyro output data rate, millihertz
    sens_num: int = 164  #: gyro sensitivity numerator, counts per deg/s
    sens_den: int = 10  #: gyro sensitivity denominator
    full_scale_dps: int = 2000  #: gyro full scale, deg/s
    filter_flags: int = 0  #: FilterFlags; 0 means raw samples
    onboard_cutoff_hz: int = 0  #: device low-pass cutoff, Hz (0 = none)
    onboard_notch_centre_hz: int = 0  #: static notch centre, Hz (0 = none)
    antialias_hz: int = 0  #: sensor's own anti-alias bandwidth, Hz (0 = unknown)
    motor_count: int = 4
    pole_pairs: int = 7  #: motor pole pairs (magnets / 2)
    heartbeat_timeout_ms: int = 500
    max_batch: int = 16  #: largest sample count the device puts in one GYRO_BLOCK
    throttle_ceiling: int = 8000  #: highest throttle the device accepts, 0.01 %
    motor_state_rate_hz: int = 500
    board_id: str = ""  #: printable ASCII, at most 32 characters

    @property
    def sample_rate_hz(self) -> float:
        """Gyro output data rate in Hz."""
        return self.gyro_rate_mhz / 1000.0

    @property
    def counts_per_dps(self) -> Fraction:
        """Exact gyro sensitivity, counts per deg/s."""
        return Fraction(self.sens_num, self.sens_den)

    @property
    def dps_per_count(self) -> float:
        """Scale from gyro counts to deg/s."""
        return self.sens_den / self.sens_num

    @property
    def raw(self) -> bool:
        """True when the samples left the sensor unfiltered by the device."""
        return self.filter_flags == 0

    def validate(self) -> None:
        _check_range("axis_convention", self.axis_convention, 1, 2)
        _check_range("sens_num", self.sens_num, 1, 0xFFFFFFFF)
        _check_range("sens_den", self.sens_den, 1, 0xFFFFFFFF)
        _check_range("gyro_rate_mhz", self.gyro_rate_mhz, 1, 0xFFFFFFFF)
        _check_range("motor_count", self.motor_count, 0, MAX_MOTORS)
        _check_range("pole_pairs", self.pole_pairs, 1, 255)
        _check_range("max_batch", self.max_batch, 1, MAX_GYRO_BATCH)
        _check_range("throttle_ceiling", self.throttle_ceiling, 0, THROTTLE_FULL)
        text = self.board_id.encode("ascii", "strict")
        if len(text) > MAX_BOARD_ID or any(c < 0x20 or c > 0x7E for c in text):
            raise ValueError(f"board_id={self.board_id!r}: at most {MAX_BOARD_ID} printable ASCII")


@dataclass(frozen=True, slots=True, eq=False)
class GyroBlock:
    """GYRO_BLOCK (0x02): ``count`` consecutive gyro samples.

    ``samples`` is an int16 array of shape (count, 3): roll, pitch, yaw rate in counts
    (divide by the sensitivity of DEVICE_INFO for deg/s).
    """

    sample_seq: int  #: running index of the first sample (u32, wraps)
    t_us: int  #: device time of the first sample, microseconds (u32, wraps)
    samples: np.ndarray = field(repr=False)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, GyroBlock):
            return NotImplemented
        return (
            self.sample_seq == other.sample_seq
            and self.t_us == other.t_us
            and np.array_equal(self.samples, other.samples)
        )

    __hash__ = None  # type: ignore[assignment]


@dataclass(frozen=True, slots=True)
class MotorEntry:
    erpm: int  #: electrical RPM (mechanical RPM x pole pairs)
    throttle: int  #: commanded throttle, 0.01 %
    flags: int = 1  #: MotorFlags; bit 0 set when erpm comes from live telemetry


@dataclass(frozen=True, slots=True)
class MotorState:
    """MOTOR_STATE (0x03): speed and command of every motor at one instant."""

    t_us: int  #: device time, microseconds (u32, wraps)
    motors: tuple[MotorEntry, ...]


_STATUS = struct.Struct("<IIBHHHHHB")  # 20 bytes


@dataclass(frozen=True, slots=True)
class DeviceStatus:
    """DEVICE_STATUS (0x04): bench state, latched faults and the supply; at least 5 Hz."""

    t_us: int  #: device time, microseconds
    boot_id: int
    bench_state: int  #: BenchState
    faults: int  #: Fault bits
    supply_mv: int  #: supply voltage, millivolts (0 = not measured)
    current_10ma: int  #: supply current, units of 10 mA (0 = not measured)
    host_frames_ok: int  #: valid host frames received this boot (u16, wraps)
    host_frames_bad: int  #: bad host frames received this boot (u16, wraps)
    streaming: int  #: 1 while GYRO_BLOCK/MOTOR_STATE are being sent


@dataclass(frozen=True, slots=True)
class LogText:
    """LOG_TEXT (0x05): one human-readable line from the device."""

    level: int  #: LogLevel
    text: str  #: UTF-8, at most 200 bytes


_OUTCOME = struct.Struct("<BBBI")


@dataclass(frozen=True, slots=True)
class CommandOutcome:
    """COMMAND_OUTCOME (0x06): the device's answer to one host command frame."""

    command_type: int  #: type code of the command answered
    command_seq: int  #: frame seq of the command answered
    result: int  #: Outcome
    detail: int = 0  #: result-specific (nonce, limit, fault bits)


# --------------------------------------------------------------------------- host to device


@dataclass(frozen=True, slots=True)
class RequestInfo:
    """REQUEST_INFO (0x41): ask for DEVICE_INFO."""


@dataclass(frozen=True, slots=True)
class StreamControl:
    """STREAM_CONTROL (0x42): start (1) or stop (0) GYRO_BLOCK and MOTOR_STATE."""

    enable: int


@dataclass(frozen=True, slots=True)
class ArmBench:
    """ARM_BENCH (0x43): arm bench mode for the session identified by ``nonce`` (non-zero)."""

    nonce: int


@dataclass(frozen=True, slots=True)
class SetThrottle:
    """SET_THROTTLE (0x44): per-motor throttle, 0.01 % units, under the armed nonce."""

    nonce: int
    throttles: tuple[int, ...]


@dataclass(frozen=True, slots=True)
class StopMotors:
    """STOP_MOTORS (0x45): all motors to zero at once, and disarm."""

    reason: int = 0  #: StopReason


@dataclass(frozen=True, slots=True)
class HostHeartbeat:
    """HOST_HEARTBEAT (0x46): the host's keep-alive; ``nonce`` is the armed nonce or 0."""

    nonce: int = 0


@dataclass(frozen=True, slots=True)
class SimTap:
    """SIM_TAP (0xF0, experimental): ask a simulated device for a tap (impulse) on the frame.

    ``target`` 0 is the stack (frame centre), k = 1..8 the arm tip of motor k.
    ``strength`` is the impulse of the tap in units of 1e-4 N s (0.02 N s, a firm tap with a
    screwdriver handle, is 200).
    """

    target: int = 0
    strength: int = 200


Message = (
    DeviceInfo
    | GyroBlock
    | MotorState
    | DeviceStatus
    | LogText
    | CommandOutcome
    | RequestInfo
    | StreamControl
    | ArmBench
    | SetThrottle
    | StopMotors
    | HostHeartbeat
    | SimTap
)

TYPE_OF: dict[type, MessageType] = {
    DeviceInfo: MessageType.DEVICE_INFO,
    GyroBlock: MessageType.GYRO_BLOCK,
    MotorState: MessageType.MOTOR_STATE,
    DeviceStatus: MessageType.DEVICE_STATUS,
    LogText: MessageType.LOG_TEXT,
    CommandOutcome: MessageType.COMMAND_OUTCOME,
    RequestInfo: MessageType.REQUEST_INFO,
    StreamControl: MessageType.STREAM_CONTROL,
    ArmBench: MessageType.ARM_BENCH,
    SetThrottle: MessageType.SET_THROTTLE,
    StopMotors: MessageType.STOP_MOTORS,
    HostHeartbeat: MessageType.HOST_HEARTBEAT,
    SimTap: MessageType.SIM_TAP,
}


# --------------------------------------------------------------------------- encoding


def encode_payload(msg: Message) -> bytes:
    """Payload bytes of ``msg`` (without type, seq and CRC). Raises ValueError on bad fields."""
    if isinstance(msg, GyroBlock):
        s = np.asarray(msg.samples)
        if s.ndim != 2 or s.shape[1] != 3 or not 1 <= s.shape[0] <= MAX_GYRO_BATCH:
            raise ValueError(f"samples shape {s.shape}: need (1..{MAX_GYRO_BATCH}, 3)")
        return struct.pack("<IIB", msg.sample_seq, msg.t_us, s.shape[0]) + s.astype("<i2").tobytes()
    if isinstance(msg, MotorState):
        if len(msg.motors) > MAX_MOTORS:
            raise ValueError(f"{len(msg.motors)} motors: at most {MAX_MOTORS}")
        parts = [struct.pack("<IB", msg.t_us, len(msg.motors))]
        parts += [struct.pack("<IHB", m.erpm, m.throttle, m.flags) for m in msg.motors]
        return b"".join(parts)
    if isinstance(msg, DeviceInfo):
        msg.validate()
        text = msg.board_id.encode("ascii")
        return (
            _DEVICE_INFO.pack(
                msg.protocol_version,
                msg.axis_convention,
                msg.boot_id,
                msg.gyro_rate_mhz,
                msg.sens_num,
                msg.sens_den,
                msg.full_scale_dps,
                msg.filter_flags,
                msg.onboard_cutoff_hz,
                msg.onboard_notch_centre_hz,
                msg.antialias_hz,
                msg.motor_count,
                msg.pole_pairs,
                msg.heartbeat_timeout_ms,
                msg.max_batch,
                msg.throttle_ceiling,
                msg.motor_state_rate_hz,
                len(text),
            )
            + text
        )
    if isinstance(msg, DeviceStatus):
        return _STATUS.pack(
            msg.t_us,
            msg.boot_id,
            msg.bench_state,
            msg.faults,
            msg.supply_mv,
            msg.current_10ma,
            msg.host_frames_ok,
            msg.host_frames_bad,
            msg.streaming,
        )
    if isinstance(msg, LogText):
        text = msg.text.encode("utf-8")
        if len(text) > MAX_LOG_TEXT:
            raise ValueError(f"log text of {len(text)} bytes: at most {MAX_LOG_TEXT}")
        return bytes([msg.level]) + text
    if isinstance(msg, CommandOutcome):
        return _OUTCOME.pack(msg.command_type, msg.command_seq, msg.result, msg.detail)
    if isinstance(msg, RequestInfo):
        return b""
    if isinstance(msg, StreamControl):
        return struct.pack("<B", msg.enable)
    if isinstance(msg, ArmBench):
        if msg.nonce == 0:
            raise ValueError("nonce=0 is reserved for 'not armed'")
        return struct.pack("<I", msg.nonce)
    if isinstance(msg, SetThrottle):
        if not 1 <= len(msg.throttles) <= MAX_MOTORS:
            raise ValueError(f"{len(msg.throttles)} throttles: need 1..{MAX_MOTORS}")
        for i, t in enumerate(msg.throttles):
            _check_range(f"throttles[{i}]", t, 0, THROTTLE_FULL)
        return struct.pack(f"<IB{len(msg.throttles)}H", msg.nonce, len(msg.throttles), *msg.throttles)
    if isinstance(msg, StopMotors):
        return struct.pack("<B", msg.reason)
    if isinstance(msg, HostHeartbeat):
        return struct.pack("<I", msg.nonce)
    if isinstance(msg, SimTap):
        return struct.pack("<BH", msg.target, msg.strength)
    raise TypeError(f"not a spinrig message: {type(msg).__name__}")


# --------------------------------------------------------------------------- decoding


def _need(payload: bytes, name: str, size: int, exact: bool = False) -> None:
    n = len(payload)
    if n < size or (exact and n != size):
        want = f"exactly {size}" if exact else f"at least {size}"
        raise MalformedPayload(f"{name}: payload of {n} bytes, need {want}")


def _decode_device_info(p: bytes) -> DeviceInfo:
    _need(p, "DEVICE_INFO", _DEVICE_INFO.size)
    v = _DEVICE_INFO.unpack_from(p)
    n_text = v[-1]
    end = _DEVICE_INFO.size + n_text
    if n_text > MAX_BOARD_ID or len(p) < end:
        raise MalformedPayload(f"DEVICE_INFO.board_id_len={n_text} at byte 36 overruns the payload")
    raw = p[_DEVICE_INFO.size : end]
    if any(c < 0x20 or c > 0x7E for c in raw):
        raise MalformedPayload("DEVICE_INFO.board_id: not printable ASCII")
    info = DeviceInfo(*v[:-1], board_id=raw.decode("ascii"))
    if info.protocol_version < 1:
        raise MalformedPayload(f"DEVICE_INFO.protocol_version={info.protocol_version}")
    for name, lo, hi in (
        ("axis_convention", 1, 2),
        ("sens_num", 1, None),
        ("sens_den", 1, None),
        ("gyro_rate_mhz", 1, None),
        ("motor_count", 0, MAX_MOTORS),
        ("pole_pairs", 1, None),
        ("max_batch", 1, MAX_GYRO_BATCH),
        ("throttle_ceiling", 0, THROTTLE_FULL),
    ):
        value = getattr(info, name)
        if value < lo or (hi is not None and value > hi):
            raise MalformedPayload(f"DEVICE_INFO.{name}={value} out of range")
    return info


def _decode_gyro(p: bytes) -> GyroBlock:
    _need(p, "GYRO_BLOCK", GYRO_HEADER_BYTES)
    seq, t_us, count = struct.unpack_from("<IIB", p)
    if not 1 <= count <= MAX_GYRO_BATCH or len(p) != GYRO_HEADER_BYTES + GYRO_SAMPLE_BYTES * count:
        raise MalformedPayload(f"GYRO_BLOCK.count={count} does not match a payload of {len(p)} bytes")
    samples = np.frombuffer(p, dtype="<i2", offset=GYRO_HEADER_BYTES).reshape(count, 3)
    return GyroBlock(seq, t_us, samples)


def _decode_motor_state(p: bytes) -> MotorState:
    _need(p, "MOTOR_STATE", MOTOR_STATE_HEADER_BYTES)
    t_us, count = struct.unpack_from("<IB", p)
    if count > MAX_MOTORS or len(p) != MOTOR_STATE_HEADER_BYTES + MOTOR_ENTRY_BYTES * count:
        raise MalformedPayload(f"MOTOR_STATE.count={count} does not match a payload of {len(p)} bytes")
    motors = tuple(
        MotorEntry(*struct.unpack_from("<IHB", p, MOTOR_STATE_HEADER_BYTES + MOTOR_ENTRY_BYTES * i))
        for i in range(count)
    )
    return MotorState(t_us, motors)


def _decode_status(p: bytes) -> DeviceStatus:
    _need(p, "DEVICE_STATUS", _STATUS.size)
    return DeviceStatus(*_STATUS.unpack_from(p))


def _decode_log(p: bytes) -> LogText:
    _need(p, "LOG_TEXT", 1)
    if len(p) - 1 > MAX_LOG_TEXT:
        raise MalformedPayload(f"LOG_TEXT: text of {len(p) - 1} bytes, at most {MAX_LOG_TEXT}")
    return LogText(p[0], p[1:].decode("utf-8", "replace"))


def _decode_outcome(p: bytes) -> CommandOutcome:
    _need(p, "COMMAND_OUTCOME", _OUTCOME.size)
    return CommandOutcome(*_OUTCOME.unpack_from(p))


def _decode_request_info(p: bytes) -> RequestInfo:
    return RequestInfo()


def _decode_stream(p: bytes) -> StreamControl:
    _need(p, "STREAM_CONTROL", 1)
    if p[0] > 1:
        raise MalformedPayload(f"STREAM_CONTROL.enable={p[0]}: need 0 or 1")
    return StreamControl(p[0])


def _decode_arm(p: bytes) -> ArmBench:
    _need(p, "ARM_BENCH", 4)
    (nonce,) = struct.unpack_from("<I", p)
    if nonce == 0:
        raise MalformedPayload("ARM_BENCH.nonce=0 is reserved")
    return ArmBench(nonce)


def _decode_throttle(p: bytes) -> SetThrottle:
    _need(p, "SET_THROTTLE", 5)
    nonce, count = struct.unpack_from("<IB", p)
    if not 1 <= count <= MAX_MOTORS or len(p) != 5 + 2 * count:
        raise MalformedPayload(f"SET_THROTTLE.count={count} does not match a payload of {len(p)} bytes")
    values = struct.unpack_from(f"<{count}H", p, 5)
    for i, t in enumerate(values):
        if t > THROTTLE_FULL:
            raise MalformedPayload(f"SET_THROTTLE.throttles[{i}]={t} above {THROTTLE_FULL}")
    return SetThrottle(nonce, values)


def _decode_stop(p: bytes) -> StopMotors:
    return StopMotors(p[0] if p else 0)


def _decode_heartbeat(p: bytes) -> HostHeartbeat:
    _need(p, "HOST_HEARTBEAT", 4)
    return HostHeartbeat(*struct.unpack_from("<I", p))


def _decode_tap(p: bytes) -> SimTap:
    _need(p, "SIM_TAP", 3)
    return SimTap(*struct.unpack_from("<BH", p))


DECODERS = {
    MessageType.DEVICE_INFO: _decode_device_info,
    MessageType.GYRO_BLOCK: _decode_gyro,
    MessageType.MOTOR_STATE: _decode_motor_state,
    MessageType.DEVICE_STATUS: _decode_status,
    MessageType.LOG_TEXT: _decode_log,
    MessageType.COMMAND_OUTCOME: _decode_outcome,
    MessageType.REQUEST_INFO: _decode_request_info,
    MessageType.STREAM_CONTROL: _decode_stream,
    MessageType.ARM_BENCH: _decode_arm,
    MessageType.SET_THROTTLE: _decode_throttle,
    MessageType.STOP_MOTORS: _decode_stop,
    MessageType.HOST_HEARTBEAT: _decode_heartbeat,
    MessageType.SIM_TAP: _decode_tap,
}


def decode_payload(type_code: int, payload: bytes) -> Message:
    """Message of type ``type_code`` from its payload. Raises MalformedPayload or KeyError (unknown)."""
    if len(payload) > MAX_PAYLOAD:
        raise MalformedPayload(f"payload of {len(payload)} bytes exceeds {MAX_PAYLOAD}")
    decoder = DECODERS.get(type_code)  # IntEnum keys hash as their int values
    if decoder is None:
        raise KeyError(type_code)
    return decoder(payload)
