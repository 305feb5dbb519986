"""Screen cost under a real pseudo-terminal, beside the headless engine alone, in the same run.

A simulated Quillback 7 (8 kHz) streams on its own pty (``spinrig sim``); ``spinrig watch`` opens
it with the screen inside a 160x48 pseudo-terminal made here (``pty.fork`` + TIOCSWINSZ; this
process drains the terminal output like a terminal emulator would), then ``spinrig watch
--headless`` does the same without a screen. Reported: CPU seconds per wall second of each
watch process (from /proc), and their difference, the screen's own cost.
"""

from __future__ import annotations

import fcntl
import os
import pty
import select
import struct
import subprocess
import sys
import termios
import time
from pathlib import Path

from .common import report

PROFILE = Path(__file__).resolve().parents[1] / "monitor" / "profiles" / "quillback7.toml"


def _cpu(pid: int) -> float:
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _sim() -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "sim", "quillback7", "--duration", "600"],
                            stdout=subprocess.PIPE, text=True)
    proc.stdout.readline()
    return proc, proc.stdout.readline().split("spinrig watch ", 1)[1].split()[0]


def _measure(args: list[str], seconds: float, cols: int = 160, rows: int = 48) -> tuple[float, float]:
    """(CPU s per wall s of the process, bytes per s it wrote to its terminal) after a warm-up."""
    pid, fd = pty.fork()
    if pid == 0:  # child: the watch process on the pseudo-terminal
        os.environ["TERM"] = "xterm-256color"
        os.execv(sys.executable, [sys.executable, "-m", "monitor", *args])
    fcntl.ioctl(fd, termios.TIOCSWINSZ, struct.pack("HHHH", rows, cols, 0, 0))
    end_warm = time.monotonic() + 6.0
    c0 = None
    t0 = 0.0
    out = 0
    try:
        while True:
            now = time.monotonic()
            if c0 is None and now >= end_warm:
                c0, t0, out = _cpu(pid), now, 0
            if c0 is not None and now - t0 >= seconds:
                return (_cpu(pid) - c0) / (now - t0), out / (now - t0)
            r, _, _ = select.select([fd], [], [], 0.05)
            if r:
                try:
                    out += len(os.read(fd, 65536))
                except OSError:
                    return float("nan"), float("nan")
    finally:
        os.kill(pid, 9)
        os.waitpid(pid, 0)
        os.close(fd)


def main(quick: bool = False) -> dict:
    seconds = 8.0 if quick else 20.0
    sim, path = _sim()
    try:
        screen, screen_bytes = _measure(["watch", path, "--profile", str(PROFILE), "--overlap", "0.875"], seconds)
        headless, _ = _measure(["watch", path, "--headless", "--profile", str(PROFILE), "--overlap", "0.875"],
                               seconds)
    finally:
        sim.kill()
        sim.wait()
    res = {"screen_core_fraction": screen, "headless_core_fraction": headless, "screen_bytes_per_s": screen_bytes}
    report(
        "screen: spinrig watch on a 160x48 pseudo-terminal, 8 kHz simulated stream, 20 updates/s",
        [
            ("watch with the screen, CPU s per s", f"{screen:.1%} of a core (target: at most 35 %)"),
            ("watch --headless, same stream", f"{headless:.1%} of a core"),
            ("the screen's own cost", f"{screen - headless:.1%} of a core"),
            ("written to the terminal", f"{screen_bytes / 1000:.0f} kB/s"),
        ],
    )
    return res


if __name__ == "__main__":
    main()
