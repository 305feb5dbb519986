"""Scenario files: an invented airframe, its motors, its gyro, its true modes and a throttle script.

A scenario is TOML (``simulators/scenarios/*.toml``); :func:`load_scenario` validates every field
and raises :class:`ScenarioError` with one line naming the file and the field. The true modes in a
scenario are what identification is tested against.

Units: Hz, seconds, RPM (mechanical), N (force), g mm (imbalance), deg/s (rates).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path

SCENARIO_DIR = Path(__file__).resolve().parent / "scenarios"


class ScenarioError(ValueError):
    """A scenario file that cannot be used; the message names the file and field."""


@dataclass(frozen=True)
class ModeSpec:
    """One frame mode: a second-order system in modal coordinates.

    ``axes``: gyro rate (deg/s) on roll, pitch, yaw per unit modal rate. ``coupling``: modal
    acceleration, (deg/s^2) per N of force at each motor. ``stack_coupling``: the same for a tap on
    the stack (frame centre).
    """

    name: str
    freq_hz: float
    damping_ratio: float
    axes: tuple[float, float, float]
    coupling: tuple[float, ...]
    stack_coupling: float = 0.0


@dataclass(frozen=True)
class MotorSpec:
    count: int = 4
    pole_pairs: int = 7
    blades: int = 3
    rpm_min: float = 3000.0  #: mechanical RPM just above zero throttle
    rpm_max: float = 24000.0  #: mechanical RPM at full throttle
    curve_exponent: float = 0.8  #: rpm = rpm_min + (rpm_max - rpm_min) * throttle ** exponent
    lag_s: float = 0.03  #: first-order spin-up time constant, s
    jitter: float = 0.002  #: relative RPM jitter (standard deviation of a slow random walk)
    imbalance_gmm: tuple[float, ...] = (0.3, 0.3, 0.3, 0.3)  #: rotor + prop residual imbalance, g mm
    misalignment: float = 0.15  #: 2x amplitude relative to 1x
    blade_pass_n: float = 1.5  #: blade-pass force at full RPM, N (props on only)
    noise_n: float = 0.4  #: broadband force, N rms at full throttle
    telemetry: bool = True  #: the motors report eRPM


@dataclass(frozen=True)
class GyroSpec:
    rate_hz: float = 8000.0  #: output data rate
    sens_num: int = 164  #: counts per deg/s = sens_num / sens_den (16-bit at +-2000 deg/s: 2^15 / 2000, ~16.4)
    sens_den: int = 10
    full_scale_dps: int = 2000
    antialias_hz: float = 2000.0  #: sensor's own anti-alias low-pass cutoff
    noise_density_dps: float = 0.005  #: deg/s/sqrt(Hz) (a common MEMS gyro figure; recalled, common practice)
    block: int = 16  #: samples per GYRO_BLOCK

    @property
    def counts_per_dps(self) -> float:
        return self.sens_num / self.sens_den


@dataclass(frozen=True)
class DeviceSpec:
    board_id: str = "SIM"
    heartbeat_timeout_ms: int = 500
    throttle_ceiling: int = 8000  #: 0.01 %
    motor_state_rate_hz: int = 500
    status_rate_hz: int = 10
    slew_per_s: float = 20000.0  #: throttle slew limit, 0.01 % per second
    supply_mv: int = 16800
    control_period_s: float = 0.005  #: device main-loop period: commands, watchdog, throttle


@dataclass(frozen=True)
class RigidSpec:
    """Slow rigid-body motion of the restrained airframe, below 20 Hz."""

    amplitude_dps: float = 2.0
    bandwidth_hz: float = 6.0


@dataclass(frozen=True)
class Tap:
    at_s: float
    target: int = 0  #: 0 stack, k = arm tip of motor k
    strength: float = 200.0  #: impulse, 1e-4 N s (200 = 0.02 N s, a firm tap)


@dataclass(frozen=True)
class Scenario:
    name: str
    airframe: str
    description: str
    mounting: str
    props: bool
    modes: tuple[ModeSpec, ...]
    motors: MotorSpec = field(default_factory=MotorSpec)
    gyro: GyroSpec = field(default_factory=GyroSpec)
    device: DeviceSpec = field(default_factory=DeviceSpec)
    rigid: RigidSpec = field(default_factory=RigidSpec)
    script: tuple[tuple[float, float], ...] = ()  #: (time s, throttle 0..1) keyframes, linear between
    script_motors: tuple[float, ...] = ()  #: per-motor multiplier of the script throttle (default all 1)
    taps: tuple[Tap, ...] = ()
    source: str = "<memory>"

    @property
    def script_duration_s(self) -> float:
        return self.script[-1][0] if self.script else 0.0

    def script_throttle(self, t_s: float) -> float:
        """Script throttle (0..1) at time ``t_s``; 0 before the first and after the last keyframe."""
        s = self.script
        if not s or t_s < s[0][0] or t_s > s[-1][0]:
            return 0.0
        for (t0, v0), (t1, v1) in zip(s, s[1:], strict=False):
            if t0 <= t_s <= t1:
                return v0 if t1 == t0 else v0 + (v1 - v0) * (t_s - t0) / (t1 - t0)
        return s[-1][1]

    def with_overrides(self, **kw) -> Scenario:
        return replace(self, **kw)


MOUNTINGS = ("bungee", "foam", "clamp", "hand")


def _err(src: str, where: str, msg: str) -> ScenarioError:
    return ScenarioError(f"{src}: {where}: {msg}")


def _num(src, where, v, lo=None, hi=None, lo_open=False, integer=False):
    if isinstance(v, bool) or not isinstance(v, int | float) or (integer and not isinstance(v, int)):
        raise _err(src, where, f"{v!r} is not {'an integer' if integer else 'a number'}")
    if not math.isfinite(v):
        raise _err(src, where, f"{v!r} is not finite")
    if lo is not None and (v < lo or (lo_open and v == lo)):
        raise _err(src, where, f"{v} must be {'>' if lo_open else '>='} {lo}")
    if hi is not None and v > hi:
        raise _err(src, where, f"{v} must be <= {hi}")
    return v


def _table(src, where, v) -> dict:
    if not isinstance(v, dict):
        raise _err(src, where, "must be a table")
    return v


def _fields(src, where, table: dict, cls, numeric: dict) -> dict:
    known = set(cls.__dataclass_fields__)
    out = {}
    for k, v in table.items():
        if k not in known:
            raise _err(src, f"{where}.{k}", f"unknown field (known: {', '.join(sorted(known))})")
        if k in numeric:
            lo, hi, integer = numeric[k]
            out[k] = _num(src, f"{where}.{k}", v, lo, hi, integer=integer)
        else:
            out[k] = v
    return out


def parse_scenario(data: dict, src: str = "<memory>", name: str = "scenario") -> Scenario:
    """Scenario from parsed TOML; raises ScenarioError naming the field."""
    top = _table(src, "top level", data)
    allowed = {"airframe", "gyro", "motors", "device", "rigid", "modes", "script", "taps"}
    for k in top:
        if k not in allowed:
            raise _err(src, k, f"unknown table (known: {', '.join(sorted(allowed))})")
    air = _table(src, "airframe", top.get("airframe", {}))
    for k in air:
        if k not in ("name", "description", "mounting", "props"):
            raise _err(src, f"airframe.{k}", "unknown field")
    airframe = air.get("name")
    if not isinstance(airframe, str) or not airframe:
        raise _err(src, "airframe.name", "missing or not a string")
    mounting = air.get("mounting", "bungee")
    if mounting not in MOUNTINGS:
        raise _err(src, "airframe.mounting", f"{mounting!r} not one of {', '.join(MOUNTINGS)}")
    props = air.get("props", False)
    if not isinstance(props, bool):
        raise _err(src, "airframe.props", "must be true or false")

    m = _fields(
        src, "motors", _table(src, "motors", top.get("motors", {})), MotorSpec,
        {
            "count": (1, 8, True), "pole_pairs": (1, 255, True), "blades": (1, 8, True),
            "rpm_min": (0, 100_000, False), "rpm_max": (1, 100_000, False), "curve_exponent": (0.1, 5, False),
            "lag_s": (0.001, 2, False), "jitter": (0, 0.1, False), "misalignment": (0, 10, False),
            "blade_pass_n": (0, 1000, False), "noise_n": (0, 1000, False),
        },
    )
    if "imbalance_gmm" in m:
        m["imbalance_gmm"] = _vector(src, "motors.imbalance_gmm", m["imbalance_gmm"], 0, 1000)
    if "telemetry" in m and not isinstance(m["telemetry"], bool):
        raise _err(src, "motors.telemetry", "must be true or false")
    motors = MotorSpec(**m)
    if len(motors.imbalance_gmm) != motors.count:
        raise _err(src, "motors.imbalance_gmm", f"{len(motors.imbalance_gmm)} values for {motors.count} motors")
    if motors.rpm_max <= motors.rpm_min:
        raise _err(src, "motors.rpm_max", f"{motors.rpm_max} must exceed rpm_min {motors.rpm_min}")

    g = _fields(
        src, "gyro", _table(src, "gyro", top.get("gyro", {})), GyroSpec,
        {
            "rate_hz": (100, 32_000, False), "sens_num": (1, 2**32 - 1, True), "sens_den": (1, 2**32 - 1, True),
            "full_scale_dps": (1, 65535, True), "antialias_hz": (1, 16_000, False),
            "noise_density_dps": (0, 10, False), "block": (1, 40, True),
        },
    )
    gyro = GyroSpec(**g)
    if gyro.antialias_hz >= gyro.rate_hz / 2:
        raise _err(src, "gyro.antialias_hz", f"{gyro.antialias_hz} must be below half the rate {gyro.rate_hz}")
    if gyro.rate_hz * 1000 != round(gyro.rate_hz * 1000):
        raise _err(src, "gyro.rate_hz", "must be a whole number of millihertz")

    d = _fields(
        src, "device", _table(src, "device", top.get("device", {})), DeviceSpec,
        {
            "heartbeat_timeout_ms": (10, 65535, True), "throttle_ceiling": (0, 10000, True),
            "motor_state_rate_hz": (1, 4000, True), "status_rate_hz": (5, 100, True),
            "slew_per_s": (1, 1e7, False), "supply_mv": (0, 65535, True), "control_period_s": (0.0005, 0.05, False),
        },
    )
    bid = d.get("board_id", "")
    if not isinstance(bid, str) or len(bid) > 32 or not bid.isascii():
        raise _err(src, "device.board_id", "must be ASCII text of at most 32 characters")
    device = DeviceSpec(**d)

    r = _fields(src, "rigid", _table(src, "rigid", top.get("rigid", {})), RigidSpec,
                {"amplitude_dps": (0, 500, False), "bandwidth_hz": (0.1, 20, False)})
    rigid = RigidSpec(**r)

    raw_modes = top.get("modes", [])
    if not isinstance(raw_modes, list) or not raw_modes:
        raise _err(src, "modes", "need at least one [[modes]] table")
    modes = []
    nyquist = gyro.rate_hz / 2
    for i, rm in enumerate(raw_modes):
        w = f"modes[{i}]"
        rm = _table(src, w, rm)
        for k in rm:
            if k not in ModeSpec.__dataclass_fields__:
                raise _err(src, f"{w}.{k}", "unknown field")
        for k in ("name", "freq_hz", "damping_ratio", "axes", "coupling"):
            if k not in rm:
                raise _err(src, f"{w}.{k}", "missing")
        if not isinstance(rm["name"], str) or not rm["name"]:
            raise _err(src, f"{w}.name", "must be a non-empty string")
        f = _num(src, f"{w}.freq_hz", rm["freq_hz"], 1, nyquist * 0.9)
        z = _num(src, f"{w}.damping_ratio", rm["damping_ratio"], 0, 0.5, lo_open=True)
        axes = _vector(src, f"{w}.axes", rm["axes"], -100, 100)
        if len(axes) != 3:
            raise _err(src, f"{w}.axes", "need 3 values: roll, pitch, yaw")
        coupling = _vector(src, f"{w}.coupling", rm["coupling"], -1e6, 1e6)
        if len(coupling) != motors.count:
            raise _err(src, f"{w}.coupling", f"{len(coupling)} values for {motors.count} motors")
        stack = _num(src, f"{w}.stack_coupling", rm.get("stack_coupling", 0.0), -1e6, 1e6)
        modes.append(ModeSpec(rm["name"], float(f), float(z), axes, coupling, float(stack)))

    script = []
    sc = _table(src, "script", top.get("script", {}))
    for k in sc:
        if k not in ("keyframes", "motors"):
            raise _err(src, f"script.{k}", "unknown field (known: keyframes, motors)")
    raw_script = sc.get("keyframes", [])
    if not isinstance(raw_script, list):
        raise _err(src, "script.keyframes", "must be a list of [time_s, throttle] pairs")
    last_t = -1.0
    for i, pair in enumerate(raw_script):
        if not isinstance(pair, list) or len(pair) != 2:
            raise _err(src, f"script.keyframes[{i}]", "must be [time_s, throttle]")
        t = _num(src, f"script.keyframes[{i}][0]", pair[0], 0, 1e6)
        v = _num(src, f"script.keyframes[{i}][1]", pair[1], 0, 1)
        if t < last_t:
            raise _err(src, f"script.keyframes[{i}][0]", f"time {t} goes backwards")
        last_t = t
        script.append((float(t), float(v)))
    script_motors = _vector(src, "script.motors", sc.get("motors", [1.0] * motors.count), 0, 1)
    if len(script_motors) != motors.count:
        raise _err(src, "script.motors", f"{len(script_motors)} values for {motors.count} motors")

    taps = []
    for i, rt in enumerate(top.get("taps", [])):
        rt = _table(src, f"taps[{i}]", rt)
        for k in rt:
            if k not in Tap.__dataclass_fields__:
                raise _err(src, f"taps[{i}].{k}", "unknown field")
        at = _num(src, f"taps[{i}].at_s", rt.get("at_s"), 0, 1e6)
        target = _num(src, f"taps[{i}].target", rt.get("target", 0), 0, motors.count, integer=True)
        strength = _num(src, f"taps[{i}].strength", rt.get("strength", 200.0), 0, 65535)
        taps.append(Tap(float(at), int(target), float(strength)))

    return Scenario(
        name=name,
        airframe=airframe,
        description=str(air.get("description", "")),
        mounting=mounting,
        props=props,
        modes=tuple(modes),
        motors=motors,
        gyro=gyro,
        device=device,
        rigid=rigid,
        script=tuple(script),
        script_motors=script_motors,
        taps=tuple(sorted(taps, key=lambda t: t.at_s)),
        source=src,
    )


def _vector(src, where, v, lo, hi) -> tuple[float, ...]:
    if not isinstance(v, list):
        raise _err(src, where, "must be a list of numbers")
    return tuple(float(_num(src, f"{where}[{i}]", x, lo, hi)) for i, x in enumerate(v))


def list_scenarios() -> list[str]:
    return sorted(p.stem for p in SCENARIO_DIR.glob("*.toml"))


def load_scenario(name_or_path: str | Path) -> Scenario:
    """A built-in scenario by name (``quillback7``) or a TOML file by path."""
    p = Path(name_or_path)
    if not p.suffix:
        p = SCENARIO_DIR / f"{name_or_path}.toml"
        if not p.exists():
            raise ScenarioError(f"no scenario {str(name_or_path)!r}; built in: {', '.join(list_scenarios())}")
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ScenarioError(f"{p}: cannot read: {exc.strerror or exc}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{p}: not valid TOML: {exc}") from None
    return parse_scenario(data, str(p), p.stem)
