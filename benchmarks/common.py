"""Timing helpers shared by the benchmarks: medians of repeated runs, CPU time, ratio printing."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable


def median_time(fn: Callable[[], object], repeat: int = 5, clock=time.perf_counter) -> float:
    """Median seconds of ``repeat`` calls of ``fn`` (after one warm-up call)."""
    fn()
    times = []
    for _ in range(repeat):
        t0 = clock()
        fn()
        times.append(clock() - t0)
    return statistics.median(times)


def report(title: str, rows: list[tuple[str, str]]) -> None:
    print(f"\n== {title}")
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"  {k:<{width}}  {v}")
