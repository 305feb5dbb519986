"""Tables of ``SPEC.md`` computed from the codec itself: the bandwidth table and the worked hex
examples. ``python3 -m firmware_protocol.spec_tables`` rewrites them in place between their
``<!-- BEGIN name -->`` / ``<!-- END name -->`` markers; ``tests/test_spec_document.py`` fails
while the committed text differs from what this computes.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

import numpy as np

from . import stuffing
from .constants import GYRO_HEADER_BYTES, GYRO_SAMPLE_BYTES, HEADER_BYTES
from .framing import encode_frame, frame_body
from .messages import (
    TYPE_OF,
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
    encode_payload,
)

SPEC = Path(__file__).resolve().parent / "SPEC.md"

#: Link capacities in payload bytes per second.
#: UART 8N1 carries 10 bits per byte. USB 2.0 full-speed bulk: at most 19 transactions of
#: 64 bytes per 1 ms frame (USB 2.0 specification, from memory), 1,216,000 B/s.
LINKS = (("921600 baud", 92_160), ("2 Mbaud", 200_000), ("USB FS", 1_216_000))
MOTOR_RATE_HZ = 500
MOTORS = 4
STATUS_RATE_HZ = 10


def wire_bytes(body_len: int) -> int:
    """Bytes on the wire of a frame whose body is ``body_len`` bytes (COBS adds 1, delimiter 1)."""
    return body_len + 2


def gyro_wire_bytes(count: int) -> int:
    return wire_bytes(HEADER_BYTES + GYRO_HEADER_BYTES + GYRO_SAMPLE_BYTES * count + 2)


def motor_state_wire_bytes(motors: int = MOTORS) -> int:
    return wire_bytes(HEADER_BYTES + 5 + 7 * motors + 2)


def status_wire_bytes() -> int:
    return wire_bytes(HEADER_BYTES + 20 + 2)


def bandwidth_rows() -> list[dict]:
    rows = []
    background = MOTOR_RATE_HZ * motor_state_wire_bytes() + STATUS_RATE_HZ * status_wire_bytes()
    for rate in (1000, 2000, 4000, 8000):
        for block in (8, 16, 32):
            gyro = rate * gyro_wire_bytes(block) / block
            total = gyro + background
            raw = rate * GYRO_SAMPLE_BYTES
            rows.append(
                {
                    "rate_hz": rate,
                    "block": block,
                    "gyro_bps": gyro,
                    "total_bps": total,
                    "efficiency": raw / total,
                    "load": [total / cap for _, cap in LINKS],
                }
            )
    return rows


def bandwidth_table() -> str:
    head = "| gyro rate | block | gyro B/s | total B/s | efficiency | " + " | ".join(
        f"{name} load" for name, _ in LINKS
    )
    lines = [head + " |", "|" + " --- |" * (5 + len(LINKS))]
    for r in bandwidth_rows():
        loads = " | ".join(f"{x:.1%}" + (" (too much)" if x > 1 else "") for x in r["load"])
        lines.append(
            f"| {r['rate_hz']} Hz | {r['block']} | {r['gyro_bps']:,.0f} | {r['total_bps']:,.0f} | "
            f"{r['efficiency']:.1%} | {loads} |"
        )
    return "\n".join(lines)


def examples() -> list[tuple[str, int, object]]:
    return [
        ("DEVICE_INFO", 0, DeviceInfo(boot_id=0x1A2B3C4D, antialias_hz=2000, board_id="QB7")),
        ("GYRO_BLOCK", 1, GyroBlock(1000, 125_000, np.array([[164, -328, 0], [82, 0, -16400]], dtype=np.int16))),
        ("MOTOR_STATE", 2, MotorState(125_500, (MotorEntry(84_000, 3500, 1), MotorEntry(83_650, 3500, 1)))),
        ("DEVICE_STATUS", 3, DeviceStatus(126_000, 0x1A2B3C4D, 2, 0, 16_800, 1_250, 42, 0, 1)),
        ("LOG_TEXT", 4, LogText(1, "armed")),
        ("COMMAND_OUTCOME", 5, CommandOutcome(0x43, 7, 0, 0x5EED1234)),
        ("REQUEST_INFO", 6, RequestInfo()),
        ("STREAM_CONTROL", 7, StreamControl(1)),
        ("ARM_BENCH", 7, ArmBench(0x5EED1234)),
        ("SET_THROTTLE", 8, SetThrottle(0x5EED1234, (2500, 2500, 2500, 2500))),
        ("STOP_MOTORS", 9, StopMotors(0)),
        ("HOST_HEARTBEAT", 10, HostHeartbeat(0x5EED1234)),
        ("SIM_TAP", 11, SimTap(1, 1000)),
    ]


def describe(msg: object) -> str:
    """``name=value`` list of a message's fields, integers plain."""
    parts = []
    for name in msg.__dataclass_fields__:  # type: ignore[attr-defined]
        v = getattr(msg, name)
        if isinstance(v, np.ndarray):
            v = v.tolist()
        elif isinstance(v, tuple):
            v = [tuple(int(getattr(e, f)) for f in e.__dataclass_fields__) if hasattr(e, "__dataclass_fields__")
                 else int(e) for e in v]
        elif isinstance(v, int):
            v = int(v)
        parts.append(f"{name}={v!r}")
    return ", ".join(parts) or "no fields"


def _spaced(b: bytes) -> str:
    return " ".join(f"{x:02x}" for x in b)


def worked_examples() -> str:
    out = []
    for name, seq, msg in examples():
        payload = encode_payload(msg)
        body = frame_body(TYPE_OF[type(msg)], seq, payload)
        wire = stuffing.encode(body) + b"\x00"
        assert wire == encode_frame(msg, seq)
        out.append(f"**{name}** (seq {seq}): {describe(msg)}")
        out.append("")
        out.append("```")
        out.append(f"payload {_spaced(payload) or '(empty)'}")
        out.append(f"body    {_spaced(body)}")
        out.append(f"crc     {body[-2:].hex()}")
        out.append(f"wire    {_spaced(wire)}")
        out.append("```")
        out.append("")
    return "\n".join(out).rstrip() + "\n"


BLOCKS = {"bandwidth": bandwidth_table, "examples": worked_examples}


def render_blocks(text: str) -> str:
    for name, fn in BLOCKS.items():
        pattern = re.compile(rf"(<!-- BEGIN {name} -->\n).*?(<!-- END {name} -->)", re.S)
        if not pattern.search(text):
            raise ValueError(f"SPEC.md has no '<!-- BEGIN {name} -->' block")
        body = fn().rstrip("\n") + "\n"
        text = pattern.sub(lambda m, body=body: m.group(1) + body + m.group(2), text)
    return text


def main() -> int:
    SPEC.write_text(render_blocks(SPEC.read_text(encoding="utf-8")), encoding="utf-8")
    print(f"rewrote the tables of {SPEC}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
