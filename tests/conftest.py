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


_SIM_CACHE: dict = {}


def sim_items(scenario: str, seed: int = 1, seconds: float | None = None, telemetry: bool = True) -> list:
    """Assembled items of a simulated scenario run in fast simulated time (its own throttle
    script), one list per produced chunk; cached for the test session, since the simulation costs
    more than the engine that judges it."""
    from dataclasses import replace

    import firmware_protocol as fp
    from monitor.assembler import Assembler
    from simulators.device import DeviceOptions
    from simulators.faults import FaultPlan
    from simulators.scenario import load_scenario
    from simulators.stream import SimStream, StreamOptions

    key = (scenario, seed, seconds, telemetry)
    if key not in _SIM_CACHE:
        sc = load_scenario(scenario)
        if not telemetry:
            sc = replace(sc, motors=replace(sc.motors, telemetry=False))
        end = seconds if seconds is not None else sc.script_duration_s
        opts = DeviceOptions(stream_at_boot=True, seed=seed)
        stream = SimStream(sc, opts, FaultPlan(), StreamOptions(realtime=False))
        dec, asm = fp.StreamDecoder(merge=True), Assembler()
        out = []
        while stream.time_s < end:
            out.append(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
        _SIM_CACHE[key] = out
        if len(_SIM_CACHE) > 24:  # bounded: the oldest run goes
            del _SIM_CACHE[next(iter(_SIM_CACHE))]
    return _SIM_CACHE[key]


def true_profile(scenario: str):
    """The profile of a scenario's true modes (what a perfect identification would give)."""
    import numpy as np

    from monitor.profile import Mode, Profile
    from simulators.scenario import load_scenario

    sc = load_scenario(scenario)
    axes = ("roll", "pitch", "yaw")
    modes = tuple(Mode(m.name, m.freq_hz, m.damping_ratio, axes[int(np.argmax(np.abs(m.axes)))]) for m in sc.modes)
    return Profile(sc.airframe, sc.motors.blades, sc.mounting, modes)


def judge_items(items: list, profile, **config):
    """An engine with ``profile`` fed ``items`` (from :func:`sim_items`); returns (engine, events)."""
    from monitor.engine import Engine, EngineConfig

    eng = Engine(EngineConfig(**config), profile)
    events = []
    for chunk in items:
        events += eng.feed(chunk)
    events += eng.flush()
    return eng, events


def run_spinrig(*args: str, env: dict | None = None, timeout: float = 300):
    """``spinrig ARGS`` in a child process (``python -m monitor``), output captured as text;
    ``env`` adds to (or, with None values, removes from) this process's environment."""
    import subprocess
    import sys

    full = {**os.environ, **(env or {})}
    full = {k: v for k, v in full.items() if v is not None}
    return subprocess.run([sys.executable, "-m", "monitor", *args], capture_output=True, text=True, env=full,
                          timeout=timeout)
