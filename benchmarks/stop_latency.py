"""Stop latency of every stop path, on the simulator and on the C bench device.

    python3 benchmarks/stop_latency.py [--repeats N]

For each device, the baseline is a command's round trip measured in the same run (REQUEST_INFO
sent to its COMMAND_OUTCOME received); each stop path prints its median latency and its ratio to
that baseline:

- end of plan, abort key, an exception in the driver: from the moment the stop was decided to the
  device's acknowledgement (host clock);
- SIGTERM and SIGINT to ``spinrig sweep``: on the C device from the signal to the device's own
  "stopped" line (wall clock); on ``spinrig sim`` (its own process) as the host reports it, from
  the stop decided to the acknowledgement;
- ``kill -9`` of the host: from the kill to the device's own "heartbeat lost" line (the C device,
  and ``spinrig sim`` in its own process);
- a lost link (simulator): from the last host frame the device heard to its heartbeat stop, on
  the simulated device's own clock (it is stepped when its port is read, so during an outage its
  clock waits for the port to come back);
- the C device through a cable (``simulators/cable.py``) that is pulled (to the device's own
  "heartbeat lost" line) or whose device-to-host line is muted (the host stops the sweep after
  ``SILENT_S`` with no frame; to the device's "stopped: STOP_MOTORS" line) or backed up (nobody
  reads the device any more: the same), wall clock.

Not a test: latencies depend on the machine; the tests check that every path stops.
"""

from __future__ import annotations

import argparse
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import firmware_protocol as fp  # noqa: E402
from monitor.bench import controller as bc  # noqa: E402
from monitor.bench.plan import ramp_plan  # noqa: E402
from monitor.link import Link  # noqa: E402

_N = iter(range(5000, 10**6))


def build_c() -> Path:
    out = Path(tempfile.mkdtemp(prefix="spinrig-bench-"))
    subprocess.run(["make", "-C", str(ROOT / "firmware_protocol" / "c"), "device", f"BUILD={out}"], check=True,
                   capture_output=True)
    return out / "bench_device"


class CDevice:
    def __init__(self, exe: Path):
        self.proc = subprocess.Popen([str(exe), "--pty", "--seconds", "300"], stderr=subprocess.PIPE,
                                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL)
        self.path = self.proc.stderr.readline().decode().split()[-1]
        self.lines: list[tuple[float, str]] = []
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for raw in self.proc.stderr:
            self.lines.append((time.monotonic(), raw.decode().strip()))

    def first(self, text: str, after: float) -> float | None:
        for t, ln in list(self.lines):
            if t >= after and ln.partition(" ")[2].startswith(text):
                return t
        return None

    def close(self):
        self.proc.terminate()
        self.proc.wait(10)


def wait(cond, timeout=15.0):
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise TimeoutError
        time.sleep(0.002)


def round_trip(port: str) -> float:
    link = Link(port)
    link.start()
    ctl = bc.BenchController(link, ramp_plan("10:20:1"))
    ctl.wait_device(10)
    out = []
    for _ in range(20):
        sent = time.monotonic()
        seq = link.send_seq(fp.RequestInfo())
        if ctl._answer(seq, sent) is not None:
            out.append(ctl._outcomes[seq][0] - sent)
    link.close()
    return statistics.median(out)


def in_process(port: str, path: str) -> float:
    link = Link(port)
    link.start()
    ctl = bc.BenchController(link, ramp_plan("10:40:10" if path != "end of plan" else "10:30:1"))
    ctl.wait_device(10)
    real = bc.setpoints
    if path == "exception":
        calls = {"n": 0}

        def failing(*a):
            calls["n"] += 1
            if calls["n"] > 50:
                raise RuntimeError("benchmark")
            return real(*a)

        bc.setpoints = failing
    try:
        ctl.start()
        if path == "abort key":
            time.sleep(1.0)
            ctl.abort("the abort key")
        report = ctl.join(30)
    finally:
        bc.setpoints = real
        link.close()
    assert report.acknowledged, report.text()
    return report.latency_s


def subprocess_stop(dev: CDevice, how: int) -> float:
    with tempfile.TemporaryDirectory() as d:
        p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", dev.path, "--ramp", "10:40:10", "--capture",
                              str(Path(d) / "s.spinrec"), "--yes-spin-the-motors"], stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL, cwd=ROOT)
        start = time.monotonic()
        wait(lambda: dev.first("armed", start) is not None, 30)
        time.sleep(1.0)
        os.kill(p.pid, how)
        t = time.monotonic()
        want = "stopped: heartbeat lost" if how == signal.SIGKILL else "stopped: STOP_MOTORS"
        wait(lambda: dev.first(want, t) is not None)
        p.wait(30)
        return dev.first(want, t) - t


def _sim_sweep(stderr=subprocess.DEVNULL):
    """``spinrig sim`` in its own process and ``spinrig sweep`` driving it, returned once the motors
    are commanded: (sim process, sweep process, temporary folder to clean up)."""
    sim = subprocess.Popen([sys.executable, "-m", "monitor", "sim", "brisling5", "--no-script", "--seed",
                            str(next(_N))], stdout=subprocess.PIPE, stderr=stderr, text=True, cwd=ROOT)
    path = sim.stdout.readline().split(" on ")[1].split()[0]
    d = tempfile.TemporaryDirectory()
    p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", path, "--ramp", "10:40:10", "--capture",
                          str(Path(d.name) / "s.spinrec"), "--yes-spin-the-motors", "--headless"],
                         stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=ROOT)
    return sim, p, d


def _spinning(p) -> None:
    for line in p.stdout:  # progress lines: until motor 1 is commanded above 11 %
        if " / " in line and "%" in line and float(line.split("M1")[1].split("%")[0]) > 11.0:
            return


def sim_signal(how: int) -> float:
    """SIGTERM or SIGINT to ``spinrig sweep`` driving ``spinrig sim`` in its own process: the stop's
    latency as the host reports it (stop decided to the device's acknowledgement)."""
    sim, p, d = _sim_sweep()
    try:
        _spinning(p)
        os.kill(p.pid, how)
        out = p.communicate(timeout=30)[0]
        return float(out.split("the device acknowledged in ")[1].split(" ms")[0]) / 1000.0
    finally:
        d.cleanup()
        sim.terminate()
        sim.wait(10)


def sim_kill() -> float:
    """``kill -9`` of the host driving ``spinrig sim`` in its own process: from the kill to the
    simulator's own "stopped: heartbeat lost" line (wall clock; the pty server steps the device in
    real time whether or not anybody reads)."""
    sim, p, d = _sim_sweep(stderr=subprocess.PIPE)
    lines: list[tuple[float, str]] = []
    threading.Thread(target=lambda: [lines.append((time.monotonic(), ln)) for ln in sim.stderr], daemon=True).start()
    try:
        _spinning(p)
        os.kill(p.pid, signal.SIGKILL)
        t = time.monotonic()
        p.wait(10)
        wait(lambda: any(ts >= t and "heartbeat lost" in ln for ts, ln in lines))
        return next(ts for ts, ln in lines if ts >= t and "heartbeat lost" in ln) - t
    finally:
        d.cleanup()
        sim.terminate()
        sim.wait(10)


def lost_link() -> float:
    """The simulator steps its device when the port is read, so during the outage its clock waits
    and catches up when the port is back: the latency is measured on the device's own clock (from
    the last host frame it heard to the heartbeat stop), not on the wall."""
    from simulators.urlhandler import protocol_sim

    url = f"sim://brisling5?script=0&seed={next(_N)}&fault=disconnect=2.5:3"
    link = Link(url)
    link.start()
    ctl = bc.BenchController(link, ramp_plan("10:40:10"))
    ctl.wait_device(10)
    safety = protocol_sim._LIVE[url][0].device.safety
    seen = {}
    real_tick = safety.tick

    def tick(now_ms):
        was, heard = safety.armed, safety.last_heartbeat_ms
        out = real_tick(now_ms)
        if was and not safety.armed:
            seen["latency_ms"] = now_ms - heard
        return out

    safety.tick = tick
    ctl.start()
    ctl.join(30)
    wait(lambda: "latency_ms" in seen)
    link.close()
    return seen["latency_ms"] / 1000.0


def cable_fault(exe: Path, how: str) -> float:
    """A sweep of a fresh C device through a PtyCable; ``how`` is "pull" or "mute": from the fault
    to the device's own stop line (wall clock)."""
    from simulators.cable import PtyCable

    dev = CDevice(exe)
    cable = PtyCable(dev.path)
    link = Link(cable.path)
    link.start()
    try:
        ctl = bc.BenchController(link, ramp_plan("10:40:10"))
        ctl.wait_device(10)
        ctl.start()
        wait(lambda: ctl.progress.max_commanded > 12.0)
        at = getattr(cable, how)()
        want = "stopped: heartbeat lost" if how == "pull" else "stopped: STOP_MOTORS"
        wait(lambda: dev.first(want, at) is not None)
        ctl.join(10)
        return dev.first(want, at) - at
    finally:
        link.close()
        cable.close()
        dev.close()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    n = ap.parse_args().repeats
    exe = build_c()
    rows = []
    sim = lambda: f"sim://brisling5?script=0&seed={next(_N)}"  # noqa: E731
    base_sim = round_trip(sim())
    dev = CDevice(exe)
    try:
        base_c = round_trip(dev.path)
        for path in ("end of plan", "abort key", "exception"):
            rows.append(("simulator", path, [in_process(sim(), path) for _ in range(n)], base_sim))
            rows.append(("C device", path, [in_process(dev.path, path) for _ in range(n)], base_c))
        for name, sig in (("SIGTERM", signal.SIGTERM), ("SIGINT", signal.SIGINT), ("kill -9", signal.SIGKILL)):
            rows.append(("C device", name, [subprocess_stop(dev, sig) for _ in range(n)], base_c))
    finally:
        dev.close()
    for name, sig in (("SIGTERM", signal.SIGTERM), ("SIGINT", signal.SIGINT)):
        rows.append(("simulator", name, [sim_signal(sig) for _ in range(n)], base_sim))
    rows.append(("simulator", "kill -9", [sim_kill() for _ in range(n)], base_sim))
    rows.append(("simulator", "lost link", [lost_link() for _ in range(n)], base_sim))
    rows.append(("C device", "cable pulled", [cable_fault(exe, "pull") for _ in range(n)], base_c))
    rows.append(("C device", "silent", [cable_fault(exe, "mute") for _ in range(n)], base_c))
    rows.append(("C device", "backed up", [cable_fault(exe, "back_up") for _ in range(n)], base_c))
    print(f"baseline round trip (REQUEST_INFO -> COMMAND_OUTCOME): simulator {base_sim * 1e3:.1f} ms, "
          f"C device {base_c * 1e3:.1f} ms")
    print(f"{'device':10} {'stop path':12} {'median ms':>9} {'x round trip':>12}  all (ms)")
    for devname, path, vals, base in rows:
        med = statistics.median(vals)
        print(f"{devname:10} {path:12} {med * 1e3:9.1f} {med / base:12.1f}  "
              + ", ".join(f"{v * 1e3:.0f}" for v in vals))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
