"""The rebuild check's tolerances: what change of a frame's vibration warns and what fails.

A TOML file overrides any of the defaults below (every key optional, unknown keys refused)::

    [modes]
    drop_warn_pct = 2.0
    drop_fail_pct = 3.0
    rise_warn_pct = 5.0
    rise_fail_pct = 0.0          # 0: a mode that rises never fails
    damping_change_pct = 50.0
    new_mode_db = 10.0
    missing_mode_db = 10.0
    match_pct = 25.0
    shift_sigmas = 3.0           # a shift within this many standard errors is not judged (0: always)

    [levels]
    rise_warn_db = 6.0
    rise_fail_db = 10.0
    crossing_rise_warn_db = 6.0
    crossing_rise_fail_db = 10.0

    [imbalance]
    growth_warn = 1.5
    growth_fail = 2.0

Why these defaults (each one our own choice; the figures measured are the simulator's, in
DEVELOPERS.md "Rebuild check"):

- A mode's frequency goes with the square root of its stiffness over its mass (any vibration
  textbook, e.g. Rao, Mechanical Vibrations, ch. 2), so a drop of 2 % is about 4 % of stiffness
  lost, 3 % about 6 %: a cracked or delaminated arm, a loose arm screw or standoff. The same
  airframe measured twice repeats its strong modes within 0.6 % here, so 2 % is well clear of
  the noise and 3 % is a change no good rebuild makes. A mode that rises (braces, a stiffer arm,
  a lighter part) is not a fault, but its bands moved: it warns at 5 % so the profile is taken
  again, and never fails unless ``rise_fail_pct`` says so.
- Damping ratios read from a sweep spread by 5-20 % between runs; a change beyond 50 % either way
  (a loosened stack damps more, a cracked arm rings longer) warns.
- A new mode standing 10 dB over the spectrum's floor, or a baseline mode that strong gone, is a
  part that came loose or a structure that changed: a warning. Weaker modes come and go between
  runs of the same frame.
- Modes further apart than 25 % are never paired: no rebuild moves a mode that far.
- Each frequency comes with the fit's standard error; a shift within three standard errors of
  the two runs (added in quadrature) is measurement, not the frame: a weak, heavily damped mode
  reads up to 1.5 % apart between runs of the same frame here (its standard error 0.5-0.7 %).
- Levels: 6 dB is twice the RMS rate, 10 dB about three times (common practice for "clearly
  worse" and "do not fly"); the same for the peak where an order crosses a mode.
- Imbalance: a motor's 1x figure (per RPM squared) grown 1.5x warns, 2x fails: a prop or bell that
  shakes twice as hard is the usual reason to balance or replace it (common practice).
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, fields
from pathlib import Path


class ToleranceError(ValueError):
    """A tolerances file that cannot be used: one line naming the file and the key."""


@dataclass(frozen=True)
class Tolerances:
    drop_warn_pct: float = 2.0
    drop_fail_pct: float = 3.0
    rise_warn_pct: float = 5.0
    rise_fail_pct: float = 0.0  #: 0: never fails
    damping_change_pct: float = 50.0
    new_mode_db: float = 10.0
    missing_mode_db: float = 10.0
    match_pct: float = 25.0
    shift_sigmas: float = 3.0
    rise_warn_db: float = 6.0
    rise_fail_db: float = 10.0
    crossing_rise_warn_db: float = 6.0
    crossing_rise_fail_db: float = 10.0
    growth_warn: float = 1.5
    growth_fail: float = 2.0

    def as_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}


SECTIONS = {
    "modes": ("drop_warn_pct", "drop_fail_pct", "rise_warn_pct", "rise_fail_pct", "damping_change_pct",
              "new_mode_db", "missing_mode_db", "match_pct", "shift_sigmas"),
    "levels": ("rise_warn_db", "rise_fail_db", "crossing_rise_warn_db", "crossing_rise_fail_db"),
    "imbalance": ("growth_warn", "growth_fail"),
}
PAIRS = (("drop_warn_pct", "drop_fail_pct"), ("rise_warn_db", "rise_fail_db"),
         ("crossing_rise_warn_db", "crossing_rise_fail_db"), ("growth_warn", "growth_fail"))


def load_tolerances(path: str | Path | None) -> Tolerances:
    """The defaults, overridden by the TOML file at ``path`` (None: the defaults)."""
    if path is None:
        return Tolerances()
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ToleranceError(f"{p}: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise ToleranceError(f"{p}: not UTF-8 text (byte {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ToleranceError(f"{p}: not valid TOML: {exc}") from None
    values = {}
    for section, table in data.items():
        if section not in SECTIONS:
            raise ToleranceError(f"{p}: unknown section [{section}] (known: {', '.join(SECTIONS)})")
        if not isinstance(table, dict):
            raise ToleranceError(f"{p}: {section} must be a table ([{section}])")
        for key, v in table.items():
            if key not in SECTIONS[section]:
                raise ToleranceError(f"{p}: [{section}] unknown key {key!r} (known: {', '.join(SECTIONS[section])})")
            if isinstance(v, bool) or not isinstance(v, int | float) or not v >= 0 or v == float("inf"):
                raise ToleranceError(f"{p}: [{section}] {key} = {v!r}: must be a number, 0 or more")
            values[key] = float(v)
    tol = Tolerances(**values)
    for warn, fail in PAIRS:
        if getattr(tol, fail) < getattr(tol, warn):
            raise ToleranceError(f"{p}: {fail} = {getattr(tol, fail):g} is below {warn} = {getattr(tol, warn):g}")
    if tol.match_pct <= 0:
        raise ToleranceError(f"{p}: [modes] match_pct must be above 0")
    return tol
