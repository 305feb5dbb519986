"""Profiles: the known frame modes of one airframe, as TOML.

```toml
[airframe]
name = "Quillback 7"
blades = 3                      # prop blades, for the blade-pass orders
mounting = "bungee"             # how the modes were measured (bungee, foam, clamp, hand)

[[modes]]
name = "arm flap, front pair"
freq_hz = 118.0
damping_ratio = 0.03            # or: half_power_bw_hz = 7.08
axis = "pitch"                  # roll, pitch or yaw: where it shows most
```

The damping ratio and the half-power bandwidth of a mode are the same fact: for the velocity
(mobility) response the bandwidth is exactly 2 zeta f_n (Rao, Mechanical Vibrations; REFERENCES).
:func:`load_profile` refuses a bad file with one line naming the file and the field.
"""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

AXES = ("roll", "pitch", "yaw")
MAX_MODES = 64  #: a profile lists at most this many modes (a real airframe has a handful)
MAX_BYTES = 1_000_000  #: profile files larger than this are refused unread
SAME_MODE_FRACTION = 0.005  #: two modes closer than this (relative) are one mode written twice
BUNDLED = Path(__file__).resolve().parent / "profiles"
MOUNTINGS = ("bungee", "foam", "clamp", "hand", "unknown")


class ProfileError(ValueError):
    """A profile that cannot be used; one line naming the file and field."""


@dataclass(frozen=True)
class Mode:
    name: str
    freq_hz: float
    damping_ratio: float
    axis: str = "roll"

    @property
    def half_power_bw_hz(self) -> float:
        return 2.0 * self.damping_ratio * self.freq_hz

    @property
    def band_hz(self) -> tuple[float, float]:
        """Half-power band f_n (1 -+ zeta), Hz."""
        return self.freq_hz * (1 - self.damping_ratio), self.freq_hz * (1 + self.damping_ratio)

    def rpm_band(self, order: float) -> tuple[float, float]:
        """Mechanical RPM at which ``order`` sits in the half-power band: 60 f (1 -+ zeta) / k."""
        lo, hi = self.band_hz
        return 60.0 * lo / order, 60.0 * hi / order


@dataclass(frozen=True)
class Profile:
    airframe: str = "unnamed airframe"
    blades: int = 2
    mounting: str = "unknown"
    modes: tuple[Mode, ...] = ()
    source: str = field(default="<memory>", compare=False)

    def with_mode(self, mode: Mode) -> Profile:
        modes = tuple(sorted((*self.modes, mode), key=lambda m: m.freq_hz))
        return Profile(self.airframe, self.blades, self.mounting, modes, self.source)

    def to_toml(self) -> str:
        lines = [
            "# spinrig profile: the known frame modes of one airframe",
            "[airframe]",
            f"name = {json.dumps(self.airframe)}",
            f"blades = {self.blades}",
            f"mounting = {json.dumps(self.mounting)}",
        ]
        for m in self.modes:
            lines += [
                "",
                "[[modes]]",
                f"name = {json.dumps(m.name)}",
                f"freq_hz = {m.freq_hz:.3f}",
                f"damping_ratio = {m.damping_ratio:.5f}",
                f"axis = {json.dumps(m.axis)}",
            ]
        return "\n".join(lines) + "\n"

    def save(self, path: str | Path) -> None:
        """Write atomically (a temporary file renamed over the old one)."""
        p = Path(path)
        tmp = p.with_name(p.name + ".tmp")
        tmp.write_text(self.to_toml(), encoding="utf-8")
        tmp.replace(p)


def _e(src: str, where: str, msg: str) -> ProfileError:
    return ProfileError(f"{src}: {where}: {msg}")


def _number(src, where, v, lo, hi, open_lo=False):
    if isinstance(v, bool) or not isinstance(v, int | float):
        raise _e(src, where, f"{v!r} is not a number")
    if not math.isfinite(v) or v < lo or (open_lo and v == lo) or v > hi:
        raise _e(src, where, f"{v} is outside {'(' if open_lo else '['}{lo}, {hi}]")
    return float(v)


def parse_profile(data: object, src: str = "<memory>") -> Profile:
    if not isinstance(data, dict):
        raise _e(src, "top level", "must be a table")
    for k in data:
        if k not in ("airframe", "modes"):
            raise _e(src, k, "unknown table (known: airframe, modes)")
    air = data.get("airframe", {})
    if not isinstance(air, dict):
        raise _e(src, "airframe", "must be a table")
    for k in air:
        if k not in ("name", "blades", "mounting"):
            raise _e(src, f"airframe.{k}", "unknown field (known: name, blades, mounting)")
    name = air.get("name", "unnamed airframe")
    if not isinstance(name, str):
        raise _e(src, "airframe.name", "must be a string")
    blades = air.get("blades", 2)
    if isinstance(blades, bool) or not isinstance(blades, int) or not 1 <= blades <= 8:
        raise _e(src, "airframe.blades", f"{blades!r} must be an integer 1..8")
    mounting = air.get("mounting", "unknown")
    if mounting not in MOUNTINGS:
        raise _e(src, "airframe.mounting", f"{mounting!r} not one of {', '.join(MOUNTINGS)}")
    raw_modes = data.get("modes", [])
    if not isinstance(raw_modes, list):
        raise _e(src, "modes", "must be an array of [[modes]] tables")
    if len(raw_modes) > MAX_MODES:
        raise _e(src, "modes", f"{len(raw_modes)} modes; a profile holds at most {MAX_MODES}")
    modes = []
    for i, m in enumerate(raw_modes):
        w = f"modes[{i}]"
        if not isinstance(m, dict):
            raise _e(src, w, "must be a table")
        for k in m:
            if k not in ("name", "freq_hz", "damping_ratio", "half_power_bw_hz", "axis"):
                raise _e(src, f"{w}.{k}", "unknown field (known: name, freq_hz, damping_ratio, half_power_bw_hz, axis)")
        if "freq_hz" not in m:
            raise _e(src, f"{w}.freq_hz", "missing")
        f = _number(src, f"{w}.freq_hz", m["freq_hz"], 0.0, 100_000.0, open_lo=True)
        if "damping_ratio" in m and "half_power_bw_hz" in m:
            raise _e(src, w, "give damping_ratio or half_power_bw_hz, not both")
        if "damping_ratio" in m:
            z = _number(src, f"{w}.damping_ratio", m["damping_ratio"], 0.0, 0.5, open_lo=True)
        elif "half_power_bw_hz" in m:
            bw = _number(src, f"{w}.half_power_bw_hz", m["half_power_bw_hz"], 0.0, f, open_lo=True)
            z = bw / (2.0 * f)
        else:
            raise _e(src, f"{w}.damping_ratio", "missing (or give half_power_bw_hz)")
        axis = m.get("axis", "roll")
        if axis not in AXES:
            raise _e(src, f"{w}.axis", f"{axis!r} not one of roll, pitch, yaw")
        mname = m.get("name", f"mode {i + 1}")
        if not isinstance(mname, str) or not mname:
            raise _e(src, f"{w}.name", "must be a non-empty string")
        modes.append(Mode(mname, f, z, axis))
    order = sorted(range(len(modes)), key=lambda k: modes[k].freq_hz)
    for a, b in zip(order[:-1], order[1:], strict=True):
        fa, fb = modes[a].freq_hz, modes[b].freq_hz
        if fb - fa <= SAME_MODE_FRACTION * fb:
            raise _e(src, f"modes[{b}]", f"{fb:g} Hz repeats modes[{a}] ({fa:g} Hz): two modes closer than "
                                         f"{SAME_MODE_FRACTION * 100:g} % are one mode written twice")
    return Profile(name, blades, mounting, tuple(modes[k] for k in order), src)


def profile_warnings(profile: Profile, sample_rate_hz: float | None = None) -> list[str]:
    """What a usable profile may still get wrong, one line each: no modes; modes a gyro at
    ``sample_rate_hz`` cannot see (at or above its Nyquist frequency)."""
    out = []
    if not profile.modes:
        out.append(f"{profile.source}: no modes: crossings cannot be watched, only stray peaks looked for")
    if sample_rate_hz:
        nyq = sample_rate_hz / 2
        for m in profile.modes:
            if m.freq_hz * (1 + m.damping_ratio) >= nyq:
                out.append(f"{profile.source}: mode {m.name!r} ({m.freq_hz:g} Hz) is at or above the gyro's Nyquist "
                           f"frequency ({nyq:g} Hz): it cannot be seen and is not watched")
    return out


def find_profile(name_or_path: str | Path) -> Path:
    """A profile file by path, or a bundled one by its airframe name (``quillback7``,
    ``"Quillback 7"``)."""
    p = Path(name_or_path)
    if p.exists() or p.suffix == ".toml" and p.parent != Path("."):
        return p
    key = str(name_or_path).lower().replace(" ", "").replace("-", "").replace("_", "")
    for cand in sorted(BUNDLED.glob("*.toml")):
        if cand.stem.replace("_", "") == key:
            return cand
    return p


def load_profile(path: str | Path) -> Profile:
    """A profile by path or bundled airframe name; one-line :class:`ProfileError` otherwise."""
    p = find_profile(path)
    try:
        size = p.stat().st_size
    except OSError as exc:
        known = ", ".join(c.stem for c in sorted(BUNDLED.glob("*.toml")))
        raise ProfileError(f"{p}: cannot read: {exc.strerror or exc} (bundled profiles: {known})") from None
    if size > MAX_BYTES:
        raise ProfileError(f"{p}: {size} bytes; a profile file is at most {MAX_BYTES} bytes")
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ProfileError(f"{p}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise ProfileError(f"{p}: not UTF-8 text (byte {exc.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{p}: not valid TOML: {exc}") from None
    return parse_profile(data, str(p))
