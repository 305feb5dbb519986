"""Sweep plans: what the motors are told to do, validated before anything spins.

A plan is a list of *pieces* run in order, for every motor together or for one motor at a time
(the others held at zero), repeated ``repeats`` times:

- ``ramp``: from one throttle to another over ``seconds``;
- ``hold``: one throttle for ``seconds``;
- ``steps``: each of ``levels`` held for ``dwell_s``.

Throttle is in percent of the device's range (0 to 100). Every plan has limits: ``max_throttle``
(never above the device's own declared ceiling, checked when the device is known),
``max_duration_s`` (the whole schedule, slew included) and ``slew_percent_per_s`` (no set-point
moves faster: a step is taken as a ramp at that rate). The plan compiles to a piecewise-linear
schedule of (time s, throttle % per motor) breakpoints, so the set-point at any instant is one
``np.interp`` per motor, and the whole schedule is checked against the limits at once.

Plan files are TOML (``tomllib``, Python's own reader); every error is one line naming the file
and the field.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

PIECE_KINDS = ("ramp", "hold", "steps")
DEFAULT_SLEW = 25.0  #: % per second: 0 to 50 % in 2 s (spinrig's own default)
DEFAULT_MAX_DURATION_S = 600.0
BETWEEN_MOTORS_S = 2.0  #: one motor at a time: each spins down and rests this long before the next
SETTLE_S = 1.0  #: the schedule starts and ends at zero throttle, held this long


class PlanError(ValueError):
    """A plan that cannot be run: one line naming the file and the field."""


@dataclass(frozen=True)
class Piece:
    kind: str
    seconds: float = 0.0
    start: float = 0.0  #: ramp: from, %
    end: float = 0.0  #: ramp: to, %; hold: the level
    levels: tuple[float, ...] = ()
    dwell_s: float = 0.0

    def breakpoints(self) -> list[tuple[float, float]]:
        """(duration s, level %) corners of this piece, before slew limiting: a level reached
        instantly at the start of a corner list, then held or ramped."""
        if self.kind == "ramp":
            return [(0.0, self.start), (self.seconds, self.end)]
        if self.kind == "hold":
            return [(0.0, self.end), (self.seconds, self.end)]
        out = []
        for lv in self.levels:
            out += [(0.0, lv), (self.dwell_s, lv)]
        return out


@dataclass(frozen=True)
class AbortRules:
    """Conditions that stop a sweep at once (None: not watched)."""

    gyro_rms_dps: float | None = 400.0  #: RMS over one gyro block on any axis, deg/s
    telemetry_lost_s: float | None = 0.5  #: a commanded motor with no live telemetry for this long, s
    link_errors_per_s: float | None = 5.0  #: bad frames (CRC, malformed, oversize) per second over 1 s
    crossing_over_floor_db: float | None = None  #: a crossing whose response stands this far over its floor, dB


@dataclass(frozen=True)
class Plan:
    name: str
    pieces: tuple[Piece, ...]
    max_throttle: float  #: %
    max_duration_s: float = DEFAULT_MAX_DURATION_S
    slew_percent_per_s: float = DEFAULT_SLEW
    one_at_a_time: bool = False
    repeats: int = 1
    motors: tuple[int, ...] | None = None  #: 1-based motors to run (None: all the device has)
    abort: AbortRules = field(default_factory=AbortRules)
    source: str = "<command line>"

    # ---------------------------------------------------------------- the schedule

    def schedule(self, motor_count: int) -> tuple[np.ndarray, np.ndarray]:
        """Breakpoints: times (n,) s and throttle (n, motor_count) %, slew-limited, starting and
        ending at zero. Between breakpoints the set-point moves linearly."""
        chosen = self._motors(motor_count)
        pattern = []  # (duration, level) corners of one pass
        for _ in range(self.repeats):
            for p in self.pieces:
                pattern += p.breakpoints()
        groups = [[m] for m in chosen] if self.one_at_a_time else [chosen]
        t, lv, who = [0.0], [0.0], [np.zeros(motor_count, bool)]
        for gi, group in enumerate(groups):
            mask = np.zeros(motor_count, bool)
            mask[[m - 1 for m in group]] = True
            if gi:
                _append(t, lv, who, BETWEEN_MOTORS_S, 0.0, who[-1], self.slew_percent_per_s)
            _append(t, lv, who, SETTLE_S, 0.0, mask, self.slew_percent_per_s)
            for dur, level in pattern:
                _append(t, lv, who, dur, level, mask, self.slew_percent_per_s)
            _append(t, lv, who, 0.0, 0.0, mask, self.slew_percent_per_s)
        _append(t, lv, who, SETTLE_S, 0.0, who[-1], self.slew_percent_per_s)
        times = np.array(t)
        thr = np.array(lv)[:, None] * np.array(who, float)
        return times, thr

    def _motors(self, motor_count: int) -> list[int]:
        if self.motors is None:
            return list(range(1, motor_count + 1))
        bad = [m for m in self.motors if not 1 <= m <= motor_count]
        if bad:
            raise PlanError(f"{self.source}: plan.motors: motor {bad[0]} is not one of the device's 1..{motor_count}")
        return list(self.motors)

    def duration_s(self, motor_count: int) -> float:
        return float(self.schedule(motor_count)[0][-1])

    def check_device(self, motor_count: int, ceiling_percent: float) -> None:
        """The plan against the device it will run on (raises PlanError naming the field)."""
        if motor_count < 1 or ceiling_percent <= 0:
            raise PlanError(f"{self.source}: the device drives no motors of its own (it declares "
                            f"{motor_count} motors and a throttle ceiling of {ceiling_percent:g} %): nothing to sweep")
        if self.max_throttle > ceiling_percent:
            raise PlanError(f"{self.source}: plan.max_throttle: {self.max_throttle:g} % is above the device's "
                            f"declared ceiling of {ceiling_percent:g} %")
        d = self.duration_s(motor_count)
        if d > self.max_duration_s:
            raise PlanError(f"{self.source}: plan.max_duration_s: the schedule takes {d:.1f} s with its slew "
                            f"and rests, over the limit of {self.max_duration_s:g} s")

    def describe(self, motor_count: int) -> list[str]:
        """The plan in lines a person confirms."""
        who = "one motor at a time" if self.one_at_a_time else "all motors together"
        chosen = self._motors(motor_count)
        lines = [f"plan {self.name!r} ({self.source}): {who}, motors {', '.join(f'M{m}' for m in chosen)}, "
                 f"{self.repeats} pass(es), {self.duration_s(motor_count):.1f} s in all"]
        for p in self.pieces:
            if p.kind == "ramp":
                lines.append(f"  ramp {p.start:g} -> {p.end:g} % over {p.seconds:g} s")
            elif p.kind == "hold":
                lines.append(f"  hold {p.end:g} % for {p.seconds:g} s")
            else:
                lines.append(f"  steps {', '.join(f'{x:g}' for x in p.levels)} % of {p.dwell_s:g} s each")
        a = self.abort
        rules = [f"gyro RMS over {a.gyro_rms_dps:g} deg/s" if a.gyro_rms_dps else None,
                 f"telemetry lost for {a.telemetry_lost_s:g} s" if a.telemetry_lost_s else None,
                 f"over {a.link_errors_per_s:g} bad frames/s" if a.link_errors_per_s else None,
                 f"a crossing {a.crossing_over_floor_db:g} dB over its floor" if a.crossing_over_floor_db else None]
        lines.append(f"  limits: throttle at most {self.max_throttle:g} %, slew {self.slew_percent_per_s:g} %/s, "
                     f"at most {self.max_duration_s:g} s")
        lines.append("  stops at once on: " + ", ".join(r for r in rules if r) + ", Ctrl-C or SIGTERM, "
                     "a lost link, an error, the end of the plan")
        return lines


def _append(t: list, lv: list, who: list, dur: float, level: float, mask: np.ndarray, slew: float) -> None:
    """Add a corner: ``dur`` > 0 moves linearly to ``level`` over ``dur`` s; ``dur`` 0 goes there
    as fast as the slew limit allows (which adds that time). The set of motors driven changes only
    at zero throttle."""
    if not np.array_equal(mask, who[-1]):
        if lv[-1] != 0:
            raise AssertionError("motors change only at zero throttle")
        t.append(t[-1])
        lv.append(0.0)
        who.append(mask)
    if dur > 0:
        t.append(t[-1] + dur)
    else:
        jump = abs(level - lv[-1])
        if jump == 0:
            return
        t.append(t[-1] + jump / slew)
    lv.append(level)
    who.append(mask)


def setpoints(times: np.ndarray, thr: np.ndarray, at_s: np.ndarray | float) -> np.ndarray:
    """Throttle % (…, motors) at ``at_s`` s into the schedule (zero before and after it)."""
    at = np.atleast_1d(np.asarray(at_s, float))
    out = np.empty((at.size, thr.shape[1]))
    for m in range(thr.shape[1]):
        out[:, m] = np.interp(at, times, thr[:, m], left=0.0, right=0.0)
    return out if np.ndim(at_s) else out[0]


# ---------------------------------------------------------------- reading plans


def _num(d: dict, key: str, where: str, lo: float | None = None, hi: float | None = None,
         default: float | None = None, positive: bool = False) -> float:
    if key not in d:
        if default is None:
            raise PlanError(f"{where}.{key}: missing")
        return default
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(float(v)):
        raise PlanError(f"{where}.{key}: {v!r} is not a number")
    v = float(v)
    if positive and v <= 0:
        raise PlanError(f"{where}.{key}: {v:g} must be above 0")
    if lo is not None and v < lo or hi is not None and v > hi:
        raise PlanError(f"{where}.{key}: {v:g} is outside {lo:g}..{hi:g}")
    return v


def _level(d: dict, key: str, where: str, max_throttle: float, default: float | None = None) -> float:
    """A throttle level, %, to the device's resolution (0.01 %)."""
    v = round(_num(d, key, where, 0.0, 100.0, default), 2)
    if v > max_throttle:
        raise PlanError(f"{where}.{key}: {v:g} % is above plan.max_throttle ({max_throttle:g} %)")
    return v


def plan_from_dict(doc: dict, source: str = "<plan>") -> Plan:
    """A plan from its TOML document (see the module docstring); raises PlanError naming the field."""
    known_top = {"plan", "piece", "abort"}
    for k in doc:
        if k not in known_top:
            raise PlanError(f"{source}: {k}: unknown section (known: plan, [[piece]], abort)")
    top = doc.get("plan")
    if not isinstance(top, dict):
        raise PlanError(f"{source}: plan: missing (a [plan] table with max_throttle)")
    w = f"{source}: plan"
    known = {"name", "max_throttle", "max_duration_s", "slew_percent_per_s", "one_at_a_time", "repeats", "motors"}
    for k in top:
        if k not in known:
            raise PlanError(f"{w}.{k}: unknown field (known: {', '.join(sorted(known))})")
    max_thr = _num(top, "max_throttle", w, 0.0, 100.0, positive=True)
    max_dur = _num(top, "max_duration_s", w, default=DEFAULT_MAX_DURATION_S, positive=True)
    slew = _num(top, "slew_percent_per_s", w, default=DEFAULT_SLEW, positive=True)
    repeats = _num(top, "repeats", w, 1, 1000, default=1)
    if repeats != int(repeats):
        raise PlanError(f"{w}.repeats: {repeats:g} is not a whole number")
    one = top.get("one_at_a_time", False)
    if not isinstance(one, bool):
        raise PlanError(f"{w}.one_at_a_time: {one!r} is not true or false")
    motors = top.get("motors")
    if motors is not None:
        if (not isinstance(motors, list) or not motors
                or not all(isinstance(m, int) and not isinstance(m, bool) and 1 <= m <= 8 for m in motors)
                or len(set(motors)) != len(motors)):
            raise PlanError(f"{w}.motors: {motors!r} is not a list of distinct motor numbers 1..8")
        motors = tuple(motors)
    name = str(top.get("name", Path(source).stem if source.endswith(".toml") else "sweep"))
    raw = doc.get("piece")
    if not isinstance(raw, list) or not raw:
        raise PlanError(f"{source}: piece: missing (one or more [[piece]] tables)")
    pieces = []
    for i, p in enumerate(raw, 1):
        pw = f"{source}: piece {i}"
        if not isinstance(p, dict):
            raise PlanError(f"{pw}: not a table")
        kind = p.get("kind")
        if kind not in PIECE_KINDS:
            raise PlanError(f"{pw}.kind: {kind!r} is not one of {', '.join(PIECE_KINDS)}")
        allowed = {"ramp": {"kind", "from", "to", "seconds"}, "hold": {"kind", "level", "seconds"},
                   "steps": {"kind", "levels", "dwell_s"}}[kind]
        for k in p:
            if k not in allowed:
                raise PlanError(f"{pw}.{k}: not a field of a {kind} (fields: {', '.join(sorted(allowed - {'kind'}))})")
        if kind == "ramp":
            ramp = Piece("ramp", _num(p, "seconds", pw, positive=True), _level(p, "from", pw, max_thr),
                         _level(p, "to", pw, max_thr))
            rate = abs(ramp.end - ramp.start) / ramp.seconds
            if rate > slew:
                raise PlanError(f"{pw}.seconds: {ramp.start:g} -> {ramp.end:g} % in {ramp.seconds:g} s is "
                                f"{rate:g} %/s, faster than plan.slew_percent_per_s ({slew:g})")
            pieces.append(ramp)
        elif kind == "hold":
            pieces.append(Piece("hold", _num(p, "seconds", pw, positive=True), end=_level(p, "level", pw, max_thr)))
        else:
            levels = p.get("levels")
            if not isinstance(levels, list) or not levels:
                raise PlanError(f"{pw}.levels: missing or empty (a list of throttle %)")
            lv = tuple(_level({"levels": x}, "levels", pw, max_thr) for x in levels)
            pieces.append(Piece("steps", levels=lv, dwell_s=_num(p, "dwell_s", pw, positive=True)))
    ab = doc.get("abort", {})
    if not isinstance(ab, dict):
        raise PlanError(f"{source}: abort: not a table")
    aw = f"{source}: abort"
    fields = {"gyro_rms_dps", "telemetry_lost_s", "link_errors_per_s", "crossing_over_floor_db"}
    for k in ab:
        if k not in fields:
            raise PlanError(f"{aw}.{k}: unknown field (known: {', '.join(sorted(fields))})")
    d = AbortRules()
    abort = AbortRules(*(  # a value of 0 turns a rule off
        (None if v == 0 else v) for v in (
            _num(ab, k, aw, 0.0, None, default=getattr(d, k) if getattr(d, k) is not None else 0.0)
            for k in ("gyro_rms_dps", "telemetry_lost_s", "link_errors_per_s", "crossing_over_floor_db"))))
    plan = Plan(name, tuple(pieces), max_thr, max_dur, slew, one, int(repeats), motors, abort, source)
    # the duration limit needs the motor count; the largest count the plan may run on bounds it
    return plan


def load_plan(path: str | Path) -> Plan:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise PlanError(f"{p}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise PlanError(f"{p}: not UTF-8 text (byte {exc.start})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PlanError(f"{p}: not valid TOML: {exc}") from None
    return plan_from_dict(doc, str(p))


def ramp_plan(spec: str, max_throttle: float | None = None, one_at_a_time: bool = False,
              slew: float = DEFAULT_SLEW) -> Plan:
    """A plan from ``--ramp FROM:TO:SECONDS`` (throttle %)."""
    parts = spec.split(":")
    if len(parts) != 3:
        raise PlanError(f"--ramp: {spec!r} is not FROM:TO:SECONDS")
    try:
        lo, hi, sec = (float(x) for x in parts)
    except ValueError:
        raise PlanError(f"--ramp: {spec!r} is not FROM:TO:SECONDS (numbers)") from None
    top = max(lo, hi) if max_throttle is None else max_throttle
    doc = {"plan": {"name": f"ramp {spec}", "max_throttle": top, "slew_percent_per_s": slew,
                    "one_at_a_time": one_at_a_time},
           "piece": [{"kind": "ramp", "from": lo, "to": hi, "seconds": sec}]}
    try:
        return plan_from_dict(doc, "--ramp")
    except PlanError as exc:
        raise PlanError(str(exc).replace("--ramp: piece 1", "--ramp").replace("--ramp: plan", "--ramp")) from None
