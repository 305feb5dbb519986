"""Mutation testing of the core modules: one command, not part of CI (tens of minutes on 2 cores).

Runs mutmut (configured in pyproject.toml, ``[tool.mutmut]``: the modules, the test files that
may kill their mutants) with hypothesis on its ``deep`` profile (fresh random seeds and five times
the examples, so the mutation run also searches where CI's derandomised run does not), then prints
the score per module: killed (or timed out) over all mutants that were run. A mutant nobody's test
reaches counts as surviving. Survivors judged equivalent are listed in DEVELOPERS.md.

    python3 benchmarks/mutation.py [--children N] [--survivors]
    python3 benchmarks/mutation.py --report-only      # scores of the last run
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from collections import Counter, defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
KILLED = {"killed", "timeout", "segfault"}
NOT_RUN = {"skipped", "not checked"}


def results() -> dict[str, Counter]:
    p = subprocess.run([sys.executable, "-m", "mutmut", "results", "--all", "true"], cwd=ROOT,
                       capture_output=True, text=True)
    per: dict[str, Counter] = defaultdict(Counter)
    survivors: dict[str, list[str]] = defaultdict(list)
    for line in p.stdout.splitlines():
        name, sep, status = line.strip().rpartition(": ")
        if not sep or "__mutmut_" not in name:
            continue
        module = name.split(".x")[0] if ".x" in name else name.rsplit(".", 1)[0]
        per[module][status] += 1
        if status not in KILLED | NOT_RUN:
            survivors[module].append(name)
    return per, survivors


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--children", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--report-only", action="store_true")
    ap.add_argument("--survivors", action="store_true", help="list every surviving mutant")
    a = ap.parse_args()
    if not a.report_only:
        env = {**os.environ, "SPINRIG_HYPOTHESIS": "deep"}
        env.pop("CI", None)
        subprocess.run([sys.executable, "-m", "mutmut", "run", "--max-children", str(a.children)], cwd=ROOT, env=env)
    per, survivors = results()
    print(f"{'module':34} {'mutants':>7} {'killed':>6} {'survived':>8} {'score':>6}")
    worst = 1.0
    for module in sorted(per):
        c = per[module]
        run = sum(v for k, v in c.items() if k not in NOT_RUN)
        killed = sum(c[k] for k in KILLED)
        score = killed / run if run else float("nan")
        worst = min(worst, score) if run else worst
        print(f"{module:34} {run:7d} {killed:6d} {run - killed:8d} {score:6.1%}")
        if a.survivors:
            for s in survivors[module]:
                print(f"    {s}")
    return 0 if worst >= 0.85 else 1


if __name__ == "__main__":
    raise SystemExit(main())
