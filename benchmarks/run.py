"""Run spinrig's benchmarks: ``python3 benchmarks/run.py [NAME ...] [--quick]``.

Each benchmark measures spinrig beside a baseline in the same run and prints ratios and medians.
Names: decode, sim, engine, screen, tap, analyze. Not part of the test suite: no test ever
asserts a wall-clock time.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

BENCHES = {
    "decode": "benchmarks.bench_decode",
    "sim": "benchmarks.bench_sim",
    "engine": "benchmarks.bench_engine",
    "screen": "benchmarks.bench_screen",
    "tap": "benchmarks.bench_tap",
    "analyze": "benchmarks.bench_analyze",
}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("names", nargs="*", help=f"benchmarks to run: {', '.join(BENCHES)} (default all)")
    ap.add_argument("--quick", action="store_true", help="smaller inputs, for a smoke run")
    args = ap.parse_args()
    unknown = [n for n in args.names if n not in BENCHES]
    if unknown:
        ap.error(f"unknown benchmark {unknown[0]!r}; choose from {', '.join(BENCHES)}")
    for name in args.names or list(BENCHES):
        importlib.import_module(BENCHES[name]).main(quick=args.quick)
    return 0


if __name__ == "__main__":
    sys.exit(main())
