"""Write ``frames.txt``, the shared test vectors read by the Python and C test suites.

Run ``python3 -m firmware_protocol.vectors.make_vectors`` after a protocol change; the test
``tests/test_vectors.py`` fails while the committed file differs from what this writes.
The format is described in ``README.md`` beside this file.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from firmware_protocol import (
    ArmBench,
    CommandOutcome,
    DeviceInfo,
    DeviceStatus,
    GyroBlock,
    HostHeartbeat,
    LogText,
    MotorEntry,
    MotorState,
    RequestInfo,
    SetThrottle,
    SimTap,
    StopMotors,
    StreamControl,
    encode_frame,
    encode_raw,
    frame_body,
    stuffing,
)
from firmware_protocol.messages import TYPE_OF

HERE = Path(__file__).resolve().parent
OUT = HERE / "frames.txt"


def good_vectors() -> list[tuple[str, int, object]]:
    """(name, frame seq, message): one or more of every type, edge values included."""
    ramp = np.arange(-60, 60, dtype=np.int16).reshape(40, 3) * 273
    return [
        ("device_info_quillback", 0, DeviceInfo(
            boot_id=0x1A2B3C4D, gyro_rate_mhz=8_000_000, sens_num=164, sens_den=10, full_scale_dps=2000,
            antialias_hz=2000, motor_count=4, pole_pairs=7, heartbeat_timeout_ms=500, max_batch=16,
            throttle_ceiling=8000, motor_state_rate_hz=500, board_id="QB7-BENCH")),
        ("device_info_filtered_flu", 1, DeviceInfo(
            axis_convention=2, boot_id=7, gyro_rate_mhz=6_400_000, sens_num=32768, sens_den=2000,
            full_scale_dps=2000, filter_flags=0b011, onboard_cutoff_hz=250, onboard_notch_centre_hz=180, motor_count=8,
            pole_pairs=6, heartbeat_timeout_ms=300, max_batch=40, throttle_ceiling=10000,
            motor_state_rate_hz=250, board_id="")),
        ("gyro_block_one", 2, GyroBlock(0, 0, np.array([[1, -1, 0]], dtype=np.int16))),
        ("gyro_block_16", 3, GyroBlock(123456, 987654321, (np.arange(48, dtype=np.int16).reshape(16, 3) - 24) * 1000)),
        ("gyro_block_extremes", 4, GyroBlock(0xFFFFFFF0, 0xFFFFFFFF, np.array(
            [[-32768, 32767, 0], [0, 0, 0], [256, -256, 1]], dtype=np.int16))),
        ("gyro_block_40", 255, GyroBlock(40, 5000, ramp)),
        ("motor_state_4", 5, MotorState(1_000_000, tuple(MotorEntry(70000 + 1000 * i, 4500, 1) for i in range(4)))),
        ("motor_state_none_valid", 6, MotorState(42, (MotorEntry(0, 0, 0), MotorEntry(0xFFFFFFFF, 10000, 0)))),
        ("motor_state_empty", 7, MotorState(9, ())),
        ("device_status_armed", 8, DeviceStatus(2_000_000, 0x1A2B3C4D, 1, 0, 16800, 215, 120, 3, 1)),
        ("device_status_faults", 9, DeviceStatus(0xFFFFFFFF, 7, 0, 0b11_1111_1111, 0, 0, 65535, 65535, 0)),
        ("log_text_info", 10, LogText(1, "gyro calibrated")),
        ("log_text_empty", 11, LogText(3, "")),
        ("command_outcome_ok", 12, CommandOutcome(0x43, 17, 0, 0xCAFEF00D)),
        ("command_outcome_limited", 13, CommandOutcome(0x44, 18, 3, 8000)),
        ("request_info", 0, RequestInfo()),
        ("stream_start", 1, StreamControl(1)),
        ("stream_stop", 2, StreamControl(0)),
        ("arm_bench", 3, ArmBench(0xCAFEF00D)),
        ("set_throttle_4", 4, SetThrottle(0xCAFEF00D, (1000, 1500, 0, 10000))),
        ("set_throttle_1", 5, SetThrottle(1, (0,))),
        ("stop_motors", 6, StopMotors(1)),
        ("host_heartbeat_armed", 7, HostHeartbeat(0xCAFEF00D)),
        ("host_heartbeat_idle", 8, HostHeartbeat(0)),
        ("sim_tap", 9, SimTap(2, 1500)),
    ]


def _fields(msg: object) -> list[tuple[str, str]]:
    if isinstance(msg, GyroBlock):
        return [("sample_seq", str(msg.sample_seq)), ("t_us", str(msg.t_us)),
                ("samples", " ".join(str(int(v)) for v in msg.samples.ravel()))]
    if isinstance(msg, MotorState):
        flat = " ".join(f"{m.erpm} {m.throttle} {m.flags}" for m in msg.motors)
        return [("t_us", str(msg.t_us)), ("motors", flat)]
    if isinstance(msg, SetThrottle):
        return [("nonce", str(msg.nonce)), ("throttles", " ".join(map(str, msg.throttles)))]
    rows = []
    for name in msg.__dataclass_fields__:  # type: ignore[attr-defined]
        rows.append((name, str(int(getattr(msg, name))) if name not in ("board_id", "text") else getattr(msg, name)))
    return rows


def bad_vectors() -> list[tuple[str, bytes, str, str, str]]:
    """(name, wire bytes, verdict, layer, type): frames a receiver must reject, with their counter.

    ``layer`` is ``frame`` when COBS, length or CRC decide, ``payload`` when the frame is sound
    but its payload breaks the layout of ``type``.
    """
    gyro_payload = b"\x01\x00\x00\x00\x02\x00\x00\x00\x01\x05\x00\x06\x00\x07\x00"  # one sample (5, 6, 7)
    body = bytearray(frame_body(0x02, 1, gyro_payload))
    flipped = bytearray(body)
    flipped[5] ^= 0x10
    wrong_count = frame_body(0x02, 1, b"\x01\x00\x00\x00\x02\x00\x00\x00\x02\x05\x00\x06\x00\x07\x00")
    return [
        ("crc_bit_flip", stuffing.encode(bytes(flipped)) + b"\x00", "crc_error", "frame", "GYRO_BLOCK"),
        ("crc_swapped_bytes", stuffing.encode(bytes(body[:-2] + body[-1:] + body[-2:-1])) + b"\x00",
         "crc_error", "frame", "GYRO_BLOCK"),
        ("short_body", stuffing.encode(b"\x02\x01\xab") + b"\x00", "malformed", "frame", "GYRO_BLOCK"),
        ("cobs_overrun", bytes([0x09, 0x02, 0x01]) + b"\x00", "malformed", "frame", "GYRO_BLOCK"),
        ("gyro_count_mismatch", stuffing.encode(wrong_count) + b"\x00", "malformed", "payload", "GYRO_BLOCK"),
        ("gyro_count_zero", encode_raw(0x02, 1, b"\x01\x00\x00\x00\x02\x00\x00\x00\x00"),
         "malformed", "payload", "GYRO_BLOCK"),
        ("throttle_over_full", encode_raw(0x44, 1, b"\x01\x00\x00\x00\x01\x11\x27"),
         "malformed", "payload", "SET_THROTTLE"),
        ("arm_nonce_zero", encode_raw(0x43, 1, b"\x00\x00\x00\x00"), "malformed", "payload", "ARM_BENCH"),
        ("unknown_type_reserved", encode_raw(0x90, 1, b"\x01\x02\x03"), "unknown_type", "frame", "0x90"),
        ("oversize", bytes([0xFF]) + bytes(range(1, 255)) + bytes([0x02, 0x33]) + b"\x00",
         "oversize", "frame", "GYRO_BLOCK"),
    ]


def render() -> str:
    lines = [
        "# spinrig wire protocol v1 test vectors; written by make_vectors.py, format in README.md",
        "",
    ]
    for name, seq, msg in good_vectors():
        lines.append(f"vector {name}")
        lines.append(f"type {TYPE_OF[type(msg)].name}")
        lines.append(f"seq {seq}")
        for key, value in _fields(msg):
            lines.append(f"field {key} {value}".rstrip() if value != "" else f"field {key}")
        lines.append(f"frame {encode_frame(msg, seq).hex()}")
        lines.append("end")
        lines.append("")
    for name, wire, verdict, layer, type_name in bad_vectors():
        lines.append(f"reject {name}")
        lines.append(f"type {type_name}")
        lines.append(f"layer {layer}")
        lines.append(f"frame {wire.hex()}")
        lines.append(f"verdict {verdict}")
        lines.append("end")
        lines.append("")
    return "\n".join(lines)


def main() -> int:
    OUT.write_text(render(), encoding="ascii")
    print(f"wrote {OUT}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
