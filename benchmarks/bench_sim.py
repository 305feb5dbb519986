"""Simulator cost: fast mode as a multiple of real time, and real-time mode CPU per stream second.

Scenario quillback7: 8 kHz gyro, 3 axes, 4 motors, 6 modes, props on, internal physics 32 kHz.
Fast mode: the device stepped as fast as it goes on this core (CPU s per stream s, median of
runs). Real-time mode: ``spinrig sim --stream`` on a pty in its own process, drained by this one;
its CPU is read from /proc between its "ready" line and the end of the window.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import time

import serial

from simulators.device import DeviceOptions, SimDevice
from simulators.scenario import load_scenario

from .common import report


def fast_ratio(seconds: float) -> float:
    dev = SimDevice(load_scenario("quillback7"), DeviceOptions(seed=1, stream_at_boot=True))
    dev.step()
    c0 = time.process_time()
    while dev.time_s < seconds:
        dev.step()
    return dev.time_s / (time.process_time() - c0)


def _cpu_s(pid: int) -> float:
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def realtime_cpu(window_s: float) -> tuple[float, int]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor", "sim", "quillback7", "--stream", "--duration", str(window_s + 5)],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        proc.stdout.readline()
        path = proc.stdout.readline().split("spinrig watch ", 1)[1].split()[0]
        port = serial.Serial(path, timeout=0.05)
        c0, t0 = _cpu_s(proc.pid), time.monotonic()
        got = 0
        while time.monotonic() - t0 < window_s:
            got += len(port.read(8192))
        cpu = _cpu_s(proc.pid) - c0
        wall = time.monotonic() - t0
        port.close()
    finally:
        proc.kill()
        proc.wait()
    return cpu / wall, got


def main(quick: bool = False) -> dict:
    fast = [fast_ratio(10.0 if quick else 30.0) for _ in range(3)]
    rt = [realtime_cpu(4.0 if quick else 10.0) for _ in range(1 if quick else 3)]
    res = {"fast_x_realtime": statistics.median(fast), "realtime_cpu_fraction": statistics.median(r[0] for r in rt)}
    report(
        "simulator: quillback7, 8 kHz, 3 axes, 4 motors, 6 modes (one core)",
        [
            ("fast mode, stream seconds per CPU second (median)", f"{res['fast_x_realtime']:.1f}x real time"),
            ("fast mode runs", ", ".join(f"{x:.1f}x" for x in fast)),
            ("real-time mode, CPU seconds per stream second (median)", f"{res['realtime_cpu_fraction']:.1%} of a core"),
            ("real-time bytes read per run", ", ".join(f"{r[1]:,}" for r in rt)),
        ],
    )
    return res


if __name__ == "__main__":
    main()
