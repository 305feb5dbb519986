"""How the crossing watch and the stray-peak search behave on the simulator's scenarios.

Not a speed benchmark: it runs every scenario's throttle script (fast simulated time) through
the engine with the airframe's profile and prints, per scenario, the events per passage (min,
max), the nearing lead before crossing (min, median), the largest distance from the mode at
which crossing was first declared (against zeta), and, with no profile, the stray peaks found
against the scenario's true modes.

    python3 benchmarks/warnings_report.py [SCENARIO ...] [--seconds S]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import firmware_protocol as fp  # noqa: E402
from monitor.assembler import Assembler  # noqa: E402
from monitor.crossing import split_passages as passages  # noqa: E402
from monitor.engine import Engine, EngineConfig  # noqa: E402
from monitor.profile import Mode, Profile  # noqa: E402
from simulators.device import DeviceOptions  # noqa: E402
from simulators.faults import FaultPlan  # noqa: E402
from simulators.scenario import list_scenarios, load_scenario  # noqa: E402
from simulators.stream import SimStream, StreamOptions  # noqa: E402


def true_profile(sc) -> Profile:
    axes = ("roll", "pitch", "yaw")
    modes = tuple(Mode(m.name, m.freq_hz, m.damping_ratio, axes[int(np.argmax(np.abs(m.axes)))]) for m in sc.modes)
    return Profile(sc.airframe, sc.motors.blades, sc.mounting, modes)


def run(sc, profile: Profile, seconds: float, seed: int = 1, overlap: float = 0.75):
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, seed=seed), FaultPlan(), StreamOptions(realtime=False))
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    eng = Engine(EngineConfig(overlap=overlap), profile)
    events = []
    while stream.time_s < seconds:
        events += eng.feed(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
    events += eng.flush()
    return eng, events


def crossing_stats(events: list, profile: Profile) -> dict:
    ps = passages(events)
    zeta = {m.name: m.damping_ratio for m in profile.modes}
    leads, dist = [], []
    for p in ps:
        for a, b in zip(p[:-1], p[1:], strict=False):
            if b.state == "crossing" and a.state == "nearing" and a.previous == "clear":
                leads.append(b.t_s - a.t_s)
        for e in p:
            if e.state == "crossing" and e.previous != "crossing":
                dist.append((abs(e.order_hz - e.mode_hz) / e.mode_hz, zeta[e.mode]))
    n_ev = [len(p) for p in ps]
    with_cross = [p for p in ps if any(e.state == "crossing" for e in p)]
    no_near = sum(1 for p in with_cross if p[0].state == "crossing")
    return {
        "passages": len(ps), "events": sum(n_ev), "per_passage": (min(n_ev, default=0), max(n_ev, default=0)),
        "lead_min": min(leads, default=float("nan")), "lead_median": float(np.median(leads)) if leads else float("nan"),
        "crossings": len(with_cross), "crossing_without_nearing": no_near,
        "worst_distance": max(dist, default=(float("nan"), float("nan")), key=lambda x: x[0] - x[1]),
    }


def hold_changes(events: list, script) -> list[int]:
    """Per hold of the throttle script (equal throttle at two keyframes 2 s or more apart, above
    zero): the largest number of state changes of one (mode, order) group after the hold's first
    second."""
    out = []
    for (t0, a), (t1, b) in zip(script[:-1], script[1:], strict=False):
        if a == b and a > 0 and t1 - t0 >= 2.0:
            per: dict = {}
            for e in events:
                if getattr(e, "state", None) and t0 + 1.0 < e.t_s <= t1:
                    per[(e.mode, e.order)] = per.get((e.mode, e.order), 0) + 1
            out.append(max(per.values(), default=0))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("scenarios", nargs="*")
    ap.add_argument("--seconds", type=float, default=None)
    ap.add_argument("--no-stray", action="store_true")
    a = ap.parse_args(argv)
    names = a.scenarios or list_scenarios()
    for name in names:
        sc = load_scenario(name)
        secs = a.seconds or sc.script_duration_s
        prof = true_profile(sc)
        eng, events = run(sc, prof, secs)
        st = crossing_stats(events, prof)
        d, z = st["worst_distance"]
        print(f"{name}: {st['events']} crossing events in {st['passages']} passages over {secs:.0f} s; per passage "
              f"{st['per_passage'][0]}..{st['per_passage'][1]}; nearing lead min {st['lead_min']:.2f} s, median "
              f"{st['lead_median']:.2f} s; {st['crossings']} passages crossed, "
              f"{st['crossing_without_nearing']} without nearing first; crossing first declared at most "
              f"{d * 100:.2f} % from the mode (zeta {z * 100:.1f} %); changes per group in the "
              f"script's holds: {hold_changes(events, sc.script)}")
        if not a.no_stray:
            eng2, _ = run(sc, Profile(sc.airframe, sc.motors.blades), secs)
            found = [p.freq_hz for p in eng2.stray_peaks()]
            true = [m.freq_hz for m in sc.modes]
            hit = [t for t in true if any(abs(f - t) <= max(0.03 * t, 2 * 3.9) for f in found)]
            false = [f for f in found if not any(abs(f - t) <= max(0.03 * t, 2 * 3.9) for t in true)]
            print(f"   no profile: {len(found)} stray peaks {[round(f, 1) for f in found]}; true modes found "
                  f"{len(hit)}/{len(true)}; not a true mode: {[round(f, 1) for f in false]}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
