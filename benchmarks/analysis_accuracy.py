"""How well `spinrig analyze` finds frame modes: the bundled scenarios and airframes it never saw.

Not a speed benchmark: every bundled scenario's own sweep (seeds 1 and 2) and ``--random N``
invented airframes (``simulators.invented.random_scenario``, seeds 1..N: random size, gyro,
motors and three to six modes) are simulated in fast time and analysed; for each true mode that an
order followed crosses inside the swept range, the nearest mode found and its error, against the
promise (within 1 %, or 3 % for modes damped 5 % or more). A found mode further than that from
every true mode is false. Each true mode is also judged resolvable (its half-power band overlaps
no other's) and visible (it raises the fixed-frequency spectrum by 1 dB or more when the fit
starts from the truth itself); the share found of the modes that are both is printed apart.

    python3 benchmarks/analysis_accuracy.py [--random N] [--first SEED] [--no-bundled]

Seeds 1-40 were the ones looked at while the modal fit was built; 41 and up were not.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402

from monitor.analysis.modal_fit import MIN_LIFT_DB, fit_modes  # noqa: E402
from monitor.analysis.record import load_record  # noqa: E402
from monitor.analysis.sweep import analyse, orders_followed  # noqa: E402
from monitor.analysis.sweep_modes import FIT_MAX_HZ  # noqa: E402
from simulators.device import DeviceOptions  # noqa: E402
from simulators.faults import FaultPlan  # noqa: E402
from simulators.invented import random_scenario  # noqa: E402
from simulators.scenario import list_scenarios, load_scenario  # noqa: E402
from simulators.stream import SimStream, StreamOptions  # noqa: E402
from tests.sim_helpers import record_capture  # noqa: E402


def tolerance(damping_ratio: float) -> float:
    return 0.03 if damping_ratio >= 0.05 else 0.01


def resolvable(sc, tm) -> bool:
    """The mode's half-power band, f (1 -+ zeta), overlaps no other true mode's: modes closer than
    that merge into one hump in any output spectrum (the half-power resolution criterion; common
    practice in modal testing)."""
    return all(abs(o.freq_hz - tm.freq_hz) > o.damping_ratio * o.freq_hz + tm.damping_ratio * tm.freq_hz
               for o in sc.modes if o is not tm)


def lift_with_truth(a, sc) -> dict[float, float]:
    """How far each true mode raises the sweep's fixed-frequency spectrum (dB) when the modal fit
    starts from the true modes themselves (each held within 1 %): an oracle's view of whether the
    data shows the mode at all. A mode under 1 dB (the fit's own bar for adding one) is not
    visible in this sweep, whatever the method."""
    f, bw = a.map.freqs, a.map.bin_hz
    fmax = min(0.8 * f[-1], FIT_MAX_HZ)
    band = (f >= 40.0) & (f <= fmax)
    true = [tm for tm in sc.modes if 40.0 <= tm.freq_hz <= fmax]
    if not true or np.count_nonzero(band) < 16:
        return {}
    fit = fit_modes(f[band], 10 ** (a.fixed_db[band] / 10.0), bw,
                    [(tm.freq_hz, tm.damping_ratio) for tm in true], shift=0.01)
    lift = fit.lift_db().max(axis=1)
    return {tm.freq_hz: float(v) for tm, v in zip(true, lift, strict=True)}


def judge(sc, path: Path) -> dict:
    """Per true mode: crossed (by an order followed, inside the swept range), found within its
    tolerance, the error, resolvable from its neighbours and visible in the data (its lift with
    the truth as the start); and the false modes."""
    a = analyse(load_record(path), sc.motors.blades)
    lo, hi = (float(a.map.rpm.min()), float(a.map.rpm.max())) if a.map.rpm.size else (0.0, 0.0)
    found = [md.freq_hz for md in a.modes]
    lifts = lift_with_truth(a, sc)
    rows = []
    for tm in sc.modes:
        crossed = any(lo <= 60 * tm.freq_hz / k <= hi for k, _ in orders_followed(sc.motors.blades))
        best = min(found, key=lambda f: abs(f - tm.freq_hz)) if found else float("nan")
        err = best / tm.freq_hz - 1
        rows.append(Row(tm.freq_hz, tm.damping_ratio, crossed, abs(err) <= tolerance(tm.damping_ratio), err,
                        resolvable(sc, tm), lifts.get(tm.freq_hz, float("nan"))))
    false = [f for f in found if all(abs(f / t.freq_hz - 1) > tolerance(t.damping_ratio) for t in sc.modes)]
    return {"rows": rows, "false": false, "swept": (lo, hi)}


@dataclass
class Row:
    freq_hz: float
    zeta: float
    crossed: bool
    ok: bool
    err: float
    resolvable: bool
    lift_db: float  #: with the truth as the fit's start

    @property
    def promised(self) -> bool:
        """Inside the promise: crossed, resolvable from its neighbours and visible in the data."""
        return self.crossed and self.resolvable and self.lift_db >= MIN_LIFT_DB


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
    crossed = found = promised = found_promised = false = 0
    why = {"close": 0, "faint": 0}
    with tempfile.TemporaryDirectory() as tmp:
        for sc, seed, label in cases:
            path = Path(tmp) / "sweep.spinrec"
            simulate(sc, path, seed)
            r = judge(sc, path)
            cells = []
            for row in r["rows"]:
                crossed += row.crossed
                found += row.crossed and row.ok
                promised += row.promised
                found_promised += row.promised and row.ok
                if row.crossed and not row.ok:
                    why["close"] += not row.resolvable
                    why["faint"] += row.resolvable and not row.lift_db >= MIN_LIFT_DB
                mark = "ok" if row.ok else "MISSED"
                notes = ("" if row.crossed else " (not crossed)") + ("" if row.resolvable else " (close)") \
                    + (f" (lift {row.lift_db:.1f} dB)" if not row.lift_db >= MIN_LIFT_DB else "")
                cells.append(f"{row.freq_hz:.0f}/{100 * row.zeta:.1f}%{notes} {mark} {100 * row.err:+.2f}%")
            false += len(r["false"])
            print(f"{label:28s} {r['swept'][0]:6.0f}-{r['swept'][1]:6.0f} RPM  " + "; ".join(cells)
                  + (f"; FALSE {', '.join(f'{x:.1f}' for x in r['false'])}" if r["false"] else ""), flush=True)
    print(f"crossed modes found within their tolerance: {found} of {crossed} ({100 * found / max(crossed, 1):.0f} %); "
          f"false modes: {false} in {len(cases)} runs")
    print(f"of those, resolvable from their neighbours and visible in the data: {found_promised} of {promised} "
          f"({100 * found_promised / max(promised, 1):.0f} %); the crossed modes missed were {why['close']} "
          f"inside a neighbour's half-power band, {why['faint']} raising the spectrum under {MIN_LIFT_DB:.0f} dB "
          f"even with the truth as the start, {crossed - found - why['close'] - why['faint']} neither")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
