"""Shared fixtures and hypothesis profiles.

- ``ci`` (CI=true): derandomised, so CI runs are repeatable;
- ``dev`` (default): random seeds;
- ``deep`` (SPINRIG_HYPOTHESIS=deep, used by the mutation command): random seeds and
  :data:`DEEP_SCALE` times the examples, so both a fixed and a fresh search are exercised.

Tests that set their own ``max_examples`` take it through :func:`examples` so the deep profile
scales them too.
"""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

DEEP_SCALE = 5
DEEP = os.environ.get("SPINRIG_HYPOTHESIS") == "deep"

settings.register_profile("ci", derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("dev", deadline=None)
settings.register_profile("deep", deadline=None, max_examples=100 * DEEP_SCALE,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile("deep" if DEEP else "ci" if os.environ.get("CI") else "dev")


def examples(n: int) -> int:
    """``n`` examples, or DEEP_SCALE times as many under the deep profile."""
    return n * DEEP_SCALE if DEEP else n
