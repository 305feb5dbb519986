"""The spinrig wire protocol, version 1: constants, typed messages, framing and a streaming decoder.

The normative text is ``SPEC.md`` beside this file; the C reference for firmware is in ``c/``.
This package imports nothing from ``monitor`` or ``simulators``.
"""

from .constants import (
    ERROR_BURST_FRAMES,
    ERROR_BURST_WINDOW_MS,
    MAX_ENCODED,
    MAX_GYRO_BATCH,
    MAX_MOTORS,
    MAX_PAYLOAD,
    PROTOCOL_VERSION,
    THROTTLE_FULL,
    AxisConvention,
    BenchState,
    Fault,
    FilterFlags,
    LogLevel,
    MessageType,
    MotorFlags,
    Outcome,
    StopReason,
)
from .decoder import DecodeCounters, GyroBatch, MotorBatch, Received, StreamDecoder
from .framing import FrameError, crc16, encode_frame, encode_raw, frame_body, unstuff_body
from .messages import (
    ArmBench,
    CommandOutcome,
    DeviceInfo,
    DeviceStatus,
    GyroBlock,
    HostHeartbeat,
    LogText,
    MalformedPayload,
    Message,
    MotorEntry,
    MotorState,
    RequestInfo,
    SetThrottle,
    SimTap,
    StopMotors,
    StreamControl,
    decode_payload,
    encode_payload,
)

__all__ = [
    "ERROR_BURST_FRAMES", "ERROR_BURST_WINDOW_MS",
    "MAX_ENCODED", "MAX_GYRO_BATCH", "MAX_MOTORS", "MAX_PAYLOAD", "PROTOCOL_VERSION", "THROTTLE_FULL",
    "Outcome", "AxisConvention", "BenchState", "Fault", "FilterFlags", "LogLevel", "MessageType",
    "MotorFlags", "StopReason", "DecodeCounters", "GyroBatch", "MotorBatch", "Received", "StreamDecoder", "FrameError",
    "crc16", "encode_frame", "encode_raw", "frame_body", "unstuff_body", "ArmBench", "CommandOutcome",
    "DeviceInfo", "DeviceStatus", "GyroBlock", "HostHeartbeat", "LogText", "MalformedPayload", "Message",
    "MotorEntry", "MotorState", "RequestInfo", "SetThrottle", "SimTap", "StopMotors", "StreamControl",
    "decode_payload", "encode_payload",
]
