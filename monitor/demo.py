"""``spinrig demo``: the whole idea in a minute, on the built-in simulated 7-inch airframe.

A simulated Quillback 7 runs its stand-alone throttle script (idle, a hold, a slow sweep to 75 %
and back, two holds) on a pty inside this process; spinrig opens that pty exactly like a real
port, with the airframe's profile, and prints crossings and stray peaks as they happen, then a
summary of the bands to avoid. It ends by itself after the script.
"""

from __future__ import annotations

import queue
import sys
import threading
from pathlib import Path
from types import SimpleNamespace

from simulators.device import DeviceOptions
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions
from simulators.transports import serve_pty

PROFILE = Path(__file__).resolve().parent / "profiles" / "quillback7.toml"


def run(args) -> int:
    from .headless import run_watch

    scenario = load_scenario("quillback7")
    seconds = float(args.seconds) if args.seconds else scenario.script_duration_s
    stream = SimStream(scenario, DeviceOptions(seed=args.seed), options=StreamOptions(realtime=True))
    ready: queue.Queue[str] = queue.Queue()
    stop = threading.Event()
    sim = threading.Thread(target=serve_pty, args=(stream, ready.put), kwargs={"stop": stop}, daemon=True)
    sim.start()
    path = ready.get(timeout=10)
    print(f"spinrig demo: a simulated {scenario.airframe} ({scenario.description}) on {path}; its throttle "
          f"script runs {seconds:.0f} s: idle, a hold, a slow sweep to 75 % and back, two holds.")
    watch_args = SimpleNamespace(port=path, baud=921_600, profile=str(PROFILE), capture=None, events=None,
                                 duration=seconds, json=False, window_s=0.256, overlap=0.75,
                                 mounting=scenario.mounting, props="on", supply_v=None, note="demo")
    try:
        if sys.stdout.isatty() and not getattr(args, "headless", False):
            from .cli import run_screen

            watch_args.port = path
            return run_screen(watch_args)
        return run_watch(watch_args)
    finally:
        stop.set()
        sim.join(timeout=5)
