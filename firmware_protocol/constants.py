"""Numbers of the spinrig wire protocol, version 1 (normative text: ``SPEC.md``).

Every constant here is quoted in ``SPEC.md``; ``tests/test_spec_document.py`` checks the two agree.
"""

from __future__ import annotations

from enum import IntEnum, IntFlag

PROTOCOL_VERSION = 1

#: Unstuffed frame body: type (1) + seq (1) + payload + CRC (2).
HEADER_BYTES = 2
CRC_BYTES = 2
MAX_PAYLOAD = 250
MAX_BODY = HEADER_BYTES + MAX_PAYLOAD + CRC_BYTES  # 254
#: COBS adds exactly one byte to any body of 1..254 bytes.
MAX_ENCODED = MAX_BODY + 1  # 255
#: Largest frame on the wire, delimiter included.
MAX_WIRE_FRAME = MAX_ENCODED + 1  # 256
MIN_BODY = HEADER_BYTES + CRC_BYTES  # 4
DELIMITER = 0x00

#: CRC-16/IBM-3740 ("CCITT-FALSE"): poly 0x1021, init 0xFFFF, no reflection, xorout 0.
CRC_INIT = 0xFFFF

#: Gyro block: sample_seq u32, t_us u32, count u8, then count x 3 x int16.
GYRO_HEADER_BYTES = 9
GYRO_SAMPLE_BYTES = 6
MAX_GYRO_BATCH = (MAX_PAYLOAD - GYRO_HEADER_BYTES) // GYRO_SAMPLE_BYTES  # 40

MOTOR_STATE_HEADER_BYTES = 5
MOTOR_ENTRY_BYTES = 7
MAX_MOTORS = 8

MAX_BOARD_ID = 32
MAX_LOG_TEXT = 200

#: Throttle is sent in units of 0.01 % (0 .. 10000).
THROTTLE_FULL = 10000

#: Protocol-error burst that stops armed motors: this many bad frames ...
ERROR_BURST_FRAMES = 8
#: ... within this window, milliseconds.
ERROR_BURST_WINDOW_MS = 1000

U32 = 1 << 32


class MessageType(IntEnum):
    """Type codes (first body byte). 0x01-0x3F device to host, 0x40-0x7F host to device."""

    DEVICE_INFO = 0x01
    GYRO_BLOCK = 0x02
    MOTOR_STATE = 0x03
    DEVICE_STATUS = 0x04
    LOG_TEXT = 0x05
    COMMAND_OUTCOME = 0x06

    REQUEST_INFO = 0x41
    STREAM_CONTROL = 0x42
    ARM_BENCH = 0x43
    SET_THROTTLE = 0x44
    STOP_MOTORS = 0x45
    HOST_HEARTBEAT = 0x46

    #: Experimental range 0xF0-0xFE: simulator only, never sent to real firmware.
    SIM_TAP = 0xF0


DEVICE_TO_HOST_RANGE = range(0x01, 0x40)
HOST_TO_DEVICE_RANGE = range(0x40, 0x80)
RESERVED_RANGE = range(0x80, 0xF0)
EXPERIMENTAL_RANGE = range(0xF0, 0xFF)


class AxisConvention(IntEnum):
    """Body axes of the roll/pitch/yaw samples (right-handed, rates positive by the right-hand rule)."""

    FRD = 1  #: x forward, y right, z down: +roll right side down, +pitch nose up, +yaw nose right
    FLU = 2  #: x forward, y left, z up: the host negates pitch and yaw to reach FRD


class FilterFlags(IntFlag):
    """What the device did to the gyro samples before sending them (0 = raw)."""

    NONE = 0
    LOWPASS = 1 << 0
    STATIC_NOTCH = 1 << 1
    RPM_NOTCH = 1 << 2


class BenchState(IntEnum):
    DISARMED = 0
    ARMED = 1  #: armed, all motors at zero throttle
    SPINNING = 2  #: armed, at least one motor commanded above zero


class Fault(IntFlag):
    """Device fault bits (DEVICE_STATUS.faults); latched until the next successful ARM_BENCH."""

    NONE = 0
    HEARTBEAT_LOST = 1 << 0
    STOP_COMMAND = 1 << 1
    PROTOCOL_ERRORS = 1 << 2
    THROTTLE_CAPPED = 1 << 3
    SENSOR_FAULT = 1 << 4
    SUPPLY_LOW = 1 << 5
    OVERCURRENT = 1 << 6
    REBOOTED = 1 << 7
    GYRO_OVERRUN = 1 << 8
    MOTOR_TELEMETRY_LOST = 1 << 9


class Outcome(IntEnum):
    OK = 0
    NOT_ARMED = 1
    BAD_NONCE = 2
    LIMITED = 3  #: applied, but clamped to the throttle limit (detail = limit in 0.01 %)
    MALFORMED = 4
    UNSUPPORTED = 5
    REFUSED_FAULT = 6  #: a fault forbids arming (detail = fault bits)
    BAD_MOTOR_COUNT = 7


class StopReason(IntEnum):
    USER = 0
    HOST_QUIT = 1
    HOST_ERROR = 2
    PLAN_END = 3


class LogLevel(IntEnum):
    DEBUG = 0
    INFO = 1
    WARNING = 2
    ERROR = 3


class MotorFlags(IntFlag):
    NONE = 0
    TELEMETRY_VALID = 1 << 0
