"""``spinrig ports``: the serial ports this computer has, from pyserial's port listing."""

from __future__ import annotations

from serial.tools import list_ports


def describe_ports() -> list[str]:
    """One line per port: device path, description, and USB VID:PID where known."""
    lines = []
    for p in sorted(list_ports.comports(), key=lambda p: p.device):
        desc = p.description if p.description and p.description != "n/a" else "no description"
        usb = f"  USB {p.vid:04X}:{p.pid:04X}" if p.vid is not None and p.pid is not None else ""
        serial_no = f"  serial {p.serial_number}" if p.serial_number else ""
        lines.append(f"{p.device}  {desc}{usb}{serial_no}")
    return lines


def run(args) -> int:
    lines = describe_ports()
    if not lines:
        print("no serial ports found: plug in the flight controller, or use a simulator port (sim://...)")
        return 0
    print("\n".join(lines))
    return 0
