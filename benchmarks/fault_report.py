"""What the host makes of each bench fault, alone and all together, over a long fast run.

Not a speed benchmark: it runs a scenario (default ``pipit3``, 600 s of simulated time) through
the host's own pipeline (session rules on the simulator's clock, assembler, engine with the
airframe's profile; ``tests/sim_helpers.py: SessionHost``) once clean and once per fault, and
prints the share of samples delivered, filled and lost, the spectra against the clean run, the
crossing groups found against the clean run, reboots, gaps, and the drift measured.

    python3 benchmarks/fault_report.py [--scenario NAME] [--seconds S]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from monitor.engine import Engine, EngineConfig  # noqa: E402
from monitor.profile import load_profile  # noqa: E402
from simulators.device import DeviceOptions  # noqa: E402
from simulators.faults import FaultPlan  # noqa: E402
from simulators.scenario import load_scenario  # noqa: E402
from simulators.stream import SimStream, StreamOptions  # noqa: E402
from tests.sim_helpers import SessionHost  # noqa: E402

FAULTS = ["drop=0.00002", "drop=0.00017", "drop=0.00035", "corrupt=0.0005", "corrupt=0.01", "drop=0.001",
          "drop=0.01", "drop=0.02", "garbage=5:40", "stall=100:3", "disconnect=200:2", "reboot=300", "drift=5000"]


def run(scenario: str, faults: list[str], seconds: float) -> tuple[SessionHost, float]:
    stream = SimStream(load_scenario(scenario), DeviceOptions(seed=1), FaultPlan.parse(faults),
                       StreamOptions(realtime=False))
    h = SessionHost(stream, Engine(EngineConfig(), load_profile(scenario)))
    t = time.perf_counter()
    h.run_until(seconds)
    return h, time.perf_counter() - t


def groups(h: SessionHost) -> set:
    return {(e.mode_hz, e.order) for e in h.events if getattr(e, "state", None) == "crossing"}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="pipit3")
    ap.add_argument("--seconds", type=float, default=600.0)
    a = ap.parse_args()
    clean, _ = run(a.scenario, [], a.seconds)
    cg = groups(clean)
    print(f"{a.scenario}, {a.seconds:.0f} s simulated; clean: {clean.engine.frames} spectra, {len(cg)} crossing groups")
    print(f"{'fault':18} {'frames lost %':>13} {'real %':>7} {'filled %':>8} {'lost %':>7} {'spectra':>8} "
          f"{'bridged':>7} {'groups':>7} "
          f"{'gaps':>5} {'reboots':>7} {'drift ppm':>10}")
    every = ["corrupt=0.0005", "drop=0.001", "garbage=5:40", "stall=100:3", "disconnect=200:2", "reboot=300",
             "drift=5000"]
    for faults in [[f] for f in FAULTS] + [every]:
        h, _ = run(a.scenario, faults, a.seconds)
        s = h.assembler.stats
        total = s.samples + s.samples_lost
        drift = "-" if s.drift_ppm is None else f"{s.drift_ppm:.0f}"
        name = faults[0] if len(faults) == 1 else "all (7)"
        c = h.decoder.counters
        frame_loss = c.frames_lost / max(1, c.frames_ok + c.frames_lost)
        print(f"{name:18} {100 * frame_loss:13.2f} {100 * s.samples / total:7.2f} "
              f"{100 * s.samples_filled / total:8.2f} "
              f"{100 * (s.samples_lost - s.samples_filled) / total:7.2f} "
              f"{h.engine.frames / clean.engine.frames:8.1%} {s.holes_bridged:7d} "
              f"{len(groups(h) & cg):3d}/{len(cg):<3d} {s.gaps:5d} {s.reboots:7d} {drift:>10}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
