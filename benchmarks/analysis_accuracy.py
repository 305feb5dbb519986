"""How well `spinrig analyze` finds frame modes: the bundled scenarios and airframes it never saw.

Not a speed benchmark: every bundled scenario's own sweep (seeds 1 and 2) and ``--random N``
invented airframes (``simulators.invented.random_scenario``, seeds 1..N: random size, gyro,
motors and three to six modes) are simulated in fast time and analysed; for each true mode that an
order followed crosses inside the swept range, the nearest mode found and its error, against the
promise (within 1 %, or 3 % for modes damped 5 % or more). A found mode further than that from
every true mode is false.

    python3 benchmarks/analysis_accuracy.py [--random N] [--first SEED] [--no-bundled]

Seeds 1-40 were the ones looked at while the modal fit was built; 41 and up were not.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from monitor.analysis.record import load_record  # noqa: E402
from monitor.analysis.sweep import analyse, orders_followed  # noqa: E402
from simulators.device import DeviceOptions  # noqa: E402
from simulators.faults import FaultPlan  # noqa: E402
from simulators.invented import random_scenario  # noqa: E402
from simulators.scenario import list_scenarios, load_scenario  # noqa: E402
from simulators.stream import SimStream, StreamOptions  # noqa: E402
from tests.sim_helpers import record_capture  # noqa: E402


def tolerance(damping_ratio: float) -> float:
    return 0.03 if damping_ratio >= 0.05 else 0.01


def judge(sc, path: Path) -> dict:
    """Per true mode: crossed (by an order followed, inside the swept range), found within its
    tolerance, the error; and the false modes."""
    a = analyse(load_record(path), sc.motors.blades)
    lo, hi = (float(a.map.rpm.min()), float(a.map.rpm.max())) if a.map.rpm.size else (0.0, 0.0)
    found = [md.freq_hz for md in a.modes]
    rows = []
    for tm in sc.modes:
        crossed = any(lo <= 60 * tm.freq_hz / k <= hi for k, _ in orders_followed(sc.motors.blades))
        best = min(found, key=lambda f: abs(f - tm.freq_hz)) if found else float("nan")
        err = best / tm.freq_hz - 1
        rows.append((tm.freq_hz, tm.damping_ratio, crossed, abs(err) <= tolerance(tm.damping_ratio), err))
    false = [f for f in found if all(abs(f / t.freq_hz - 1) > tolerance(t.damping_ratio) for t in sc.modes)]
    return {"rows": rows, "false": false, "swept": (lo, hi)}


def simulate(sc, path: Path, seed: int) -> None:
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, seed=seed), FaultPlan(), StreamOptions(realtime=False))
    record_capture(path, stream, sc.script_duration_s, port=f"sim://{sc.name}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--random", type=int, default=20, help="invented airframes (seeds FIRST..FIRST+N-1)")
    ap.add_argument("--first", type=int, default=1, help="the first invented airframe's seed (default 1)")
    ap.add_argument("--no-bundled", action="store_true")
    a = ap.parse_args()
    cases = []
    if not a.no_bundled:
        cases += [(load_scenario(n), seed, f"{n} s{seed}") for n in list_scenarios() for seed in (1, 2)]
    cases += [(random_scenario(s), 1, f"invented {s}") for s in range(a.first, a.first + a.random)]
    crossed = found = false = 0
    with tempfile.TemporaryDirectory() as tmp:
        for sc, seed, label in cases:
            path = Path(tmp) / "sweep.spinrec"
            simulate(sc, path, seed)
            r = judge(sc, path)
            cells = []
            for f, z, cr, ok, err in r["rows"]:
                crossed += cr
                found += cr and ok
                mark = "ok" if ok else "MISSED"
                cells.append(f"{f:.0f}/{100 * z:.1f}%{'' if cr else ' (not crossed)'} {mark} {100 * err:+.2f}%")
            false += len(r["false"])
            print(f"{label:28s} {r['swept'][0]:6.0f}-{r['swept'][1]:6.0f} RPM  " + "; ".join(cells)
                  + (f"; FALSE {', '.join(f'{x:.1f}' for x in r['false'])}" if r["false"] else ""), flush=True)
    print(f"crossed modes found within their tolerance: {found} of {crossed} ({100 * found / max(crossed, 1):.0f} %); "
          f"false modes: {false} in {len(cases)} runs")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
