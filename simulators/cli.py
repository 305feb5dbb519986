"""``spinrig sim``: run a simulated flight controller on a pty or a TCP port until stopped."""

from __future__ import annotations

import sys
import threading
from dataclasses import replace

from .device import DeviceOptions
from .faults import FaultError, FaultPlan
from .scenario import ScenarioError, Tap, list_scenarios, load_scenario
from .stream import SimStream, StreamOptions
from .transports import serve_pty, serve_tcp

EXAMPLES = """\
examples:
  spinrig sim quillback7                      a pty; connect with: spinrig watch /dev/pts/N
  spinrig sim quillback7 --tcp 52817           connect with: spinrig watch socket://127.0.0.1:52817
  spinrig sim pipit3 --fast --duration 60     as fast as the reader takes it, for 60 s of stream
  spinrig sim quillback7 --fault corrupt=0.01 --fault disconnect=10:2 --tcp 52817
  spinrig sim quillback7 --tap 2 --tap 4:1    tap the stack at 2 s, arm 1 at 4 s
  spinrig sim --list                          the built-in scenarios

faults (repeat --fault): corrupt=RATE drop=RATE garbage=PER_S:BYTES stall=AT:SECONDS
  disconnect=AT:SECONDS reboot=AT drift=PPM

The simulator is what spins here, but a real airframe on a real bench needs: props off or the
frame clamped, eye protection, clear of the prop arc, a current-limited supply, a kill switch.
"""


def _bounded(kind, lo, hi, what, lo_open=False):
    import argparse

    def parse(text: str):
        try:
            v = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a{'n integer' if kind is int else ' number'}") from None
        if v != v or v < lo or v > hi or (lo_open and v == lo):
            raise argparse.ArgumentTypeError(f"{text} is outside {'(' if lo_open else '['}{lo:g}, {hi:g}] ({what})")
        return v

    return parse


def add_arguments(p) -> None:
    p.add_argument("scenario", nargs="?", help="built-in scenario name or a scenario .toml file")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--pty", action="store_true", help="serve on a new pseudo-terminal (the default)")
    where.add_argument("--tcp", type=_bounded(int, 0, 65535, "TCP port"), metavar="PORT",
                       help="serve on TCP PORT, 0 to 65535; 0 picks a free one (socket://HOST:PORT)")
    p.add_argument("--host", default="127.0.0.1", help="TCP address to listen on (default 127.0.0.1)")
    p.add_argument("--fast", action="store_true", help="as fast as the reader reads, not real time")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--fault", action="append", default=[], metavar="NAME=VALUE", help="inject a fault (repeatable)")
    p.add_argument("--duration", type=_bounded(float, 0.0, 1e6, "seconds", lo_open=True), metavar="S",
                   help="stop after S seconds of simulated stream (S > 0)")
    p.add_argument("--baud", type=_bounded(int, 300, 12_000_000, "baud"),
                   help="emulate a UART at this baud (300 to 12000000): paced, FIFO overflow drops bytes")
    p.add_argument("--stream", action="store_true", help="stream from boot without waiting for the host")
    p.add_argument("--no-script", action="store_true", help="do not run the scenario's stand-alone throttle script")
    p.add_argument("--one-at-a-time", action="store_true",
                   help="play the throttle script once per motor in turn, the others still (imbalance runs)")
    p.add_argument("--tap", action="append", default=[], metavar="AT[:TARGET[:STRENGTH]]",
                   help="tap the frame at AT s; TARGET 0 stack, k arm k; STRENGTH in 1e-4 N s (repeatable)")
    p.add_argument("--list", action="store_true", help="list the built-in scenarios and exit")


def _taps(specs: list[str]) -> list[Tap]:
    taps = []
    for spec in specs:
        parts = spec.split(":")
        try:
            at = float(parts[0])
            target = int(parts[1]) if len(parts) > 1 else 0
            strength = float(parts[2]) if len(parts) > 2 else 200.0
        except (ValueError, IndexError):
            raise ValueError(f"--tap {spec!r}: expected AT[:TARGET[:STRENGTH]]") from None
        taps.append(Tap(at, target, strength))
    return taps


def _bundled_profile(name: str) -> bool:
    from pathlib import Path

    return (Path(__file__).resolve().parents[1] / "monitor" / "profiles" / f"{name}.toml").exists()


def run(args) -> int:
    if args.list or not args.scenario:
        for name in list_scenarios():
            sc = load_scenario(name)
            print(f"{name:18s} {sc.airframe}: {sc.description}")
        return 0 if args.list else 2
    try:
        scenario = load_scenario(args.scenario)
        faults = FaultPlan.parse(args.fault)
        taps = _taps(args.tap)
    except (ScenarioError, FaultError, ValueError) as exc:
        print(f"spinrig sim: {exc}", file=sys.stderr)
        return 2
    if taps:
        scenario = replace(scenario, taps=tuple(sorted((*scenario.taps, *taps), key=lambda t: t.at_s)))
    stream = SimStream(
        scenario,
        DeviceOptions(seed=args.seed, stream_at_boot=args.stream, script=not args.no_script,
                      one_at_a_time=args.one_at_a_time),
        faults,
        StreamOptions(realtime=not args.fast, baud=args.baud),
    )

    def ready(where: str) -> None:
        url = where if "://" in where or where.startswith("/") else where
        profile = f" --profile {scenario.name}" if _bundled_profile(scenario.name) else ""
        print(f"spinrig sim: {scenario.airframe} ({scenario.name}) on {where}", flush=True)
        print(f"connect with: spinrig watch {url}{profile}", flush=True)

    stop = threading.Event()
    seen = [0]

    def bench_events() -> None:
        """One stderr line per bench event of the device (armed, stopped and why), on its clock."""
        dev = stream.device
        new = min(dev.bench_events - seen[0], len(dev.bench_log))
        if new > 0:
            for ms, what in list(dev.bench_log)[-new:]:
                print(f"t_ms={ms:.0f} {what}", file=sys.stderr, flush=True)
        seen[0] = dev.bench_events

    try:
        if args.tcp is not None:
            stats = serve_tcp(stream, args.tcp, ready, host=args.host, duration=args.duration, stop=stop)
        else:
            stats = serve_pty(stream, ready, duration=args.duration, stop=stop, on_step=bench_events)
    except KeyboardInterrupt:
        stop.set()
        print("spinrig sim: stopped", file=sys.stderr)
        return 0
    except OSError as exc:
        print(f"spinrig sim: {exc.strerror or exc}", file=sys.stderr)
        return 1
    print(
        f"spinrig sim: done after {stream.time_s:.1f} s of stream: {stats.bytes_written} bytes sent, "
        f"{stats.bytes_read} received, {stats.bytes_dropped} dropped with nobody reading, "
        f"{stream.uart_dropped} dropped by the UART FIFO",
        file=sys.stderr,
    )
    return 0
