"""Scenario files: the built-ins state their truth; bad files are refused with the field named."""

from __future__ import annotations

import copy
import tomllib

import pytest
from hypothesis import given
from hypothesis import strategies as st

from simulators.scenario import SCENARIO_DIR, ScenarioError, list_scenarios, load_scenario, parse_scenario

BUILT_IN = list_scenarios()


def test_the_required_airframes_and_faults_exist():
    assert {"brisling5", "quillback7", "quillback7_braced", "pipit3", "brisling5_chipped_prop", "brisling5_cracked_arm",
            "brisling5_loose_stack"} <= set(BUILT_IN)


@pytest.mark.parametrize("name", BUILT_IN)
def test_built_in_scenario_loads_with_modes_and_script(name):
    sc = load_scenario(name)
    assert len(sc.modes) >= 5 and sc.script_duration_s >= 40
    assert all(0 < m.damping_ratio < 0.2 for m in sc.modes)
    assert sc.script_throttle(sc.script_duration_s / 2) > 0


def test_braced_build_is_stiffer_with_one_mode_barely_moved():
    stock, braced = load_scenario("quillback7"), load_scenario("quillback7_braced")
    ratios = [b.freq_hz / a.freq_hz for a, b in zip(stock.modes, braced.modes, strict=True)]
    assert sum(1.05 <= r <= 1.25 for r in ratios) >= 3
    assert any(abs(r - 1) < 0.01 for r in ratios)
    assert all(r >= 1.0 for r in ratios)


def test_fault_variants_differ_from_the_good_build_as_stated():
    good = load_scenario("brisling5")
    cracked = load_scenario("brisling5_cracked_arm")
    changed = [(a, b) for a, b in zip(good.modes, cracked.modes, strict=True) if a != b]
    assert len(changed) == 1
    a, b = changed[0]
    assert 0.85 <= b.freq_hz / a.freq_hz <= 0.90 and b.damping_ratio < a.damping_ratio
    loose = load_scenario("brisling5_loose_stack")
    assert len(loose.modes) == len(good.modes) + 1
    extra = loose.modes[-1]
    assert extra.damping_ratio < min(m.damping_ratio for m in good.modes)
    prop = load_scenario("brisling5_chipped_prop")
    ratio = [p / g for p, g in zip(prop.motors.imbalance_gmm, good.motors.imbalance_gmm, strict=True)]
    assert sorted(ratio)[-1] == pytest.approx(3.0) and sorted(ratio)[-2] == pytest.approx(1.0)


def _raw(name="quillback7"):
    return tomllib.loads((SCENARIO_DIR / f"{name}.toml").read_text())


@pytest.mark.parametrize(
    ("mutate", "match"),
    [
        (lambda d: d["modes"][2].update(damping_ratio=1.5), r"f\.toml: modes\[2\]\.damping_ratio: 1.5 must be <= 0.5"),
        (lambda d: d["modes"][0].pop("freq_hz"), r"modes\[0\]\.freq_hz: missing"),
        (lambda d: d["modes"][1].update(coupling=[1, 2]), r"modes\[1\]\.coupling: 2 values for 4 motors"),
        (lambda d: d["motors"].update(count="four"), r"motors\.count: 'four' is not an integer"),
        (lambda d: d["motors"].update(rpm_max=100), r"motors\.rpm_max: 100 must exceed rpm_min"),
        (lambda d: d["gyro"].update(antialias_hz=5000), r"gyro\.antialias_hz: 5000 must be below half the rate"),
        (lambda d: d["airframe"].update(mounting="glue"), r"airframe\.mounting: 'glue' not one of"),
        (lambda d: d["script"]["keyframes"].append([1.0, 0.5]), r"script\.keyframes\[\d+\]\[0\]: time 1.0 goes back"),
        (lambda d: d.update(colour="red"), r"colour: unknown table"),
        (lambda d: d["device"].update(heartbeat_ms=3), r"device\.heartbeat_ms: unknown field"),
    ],
)
def test_bad_fields_are_named(mutate, match):
    d = _raw()
    mutate(d)
    with pytest.raises(ScenarioError, match=match):
        parse_scenario(d, "f.toml")


def test_unreadable_or_invalid_files(tmp_path):
    with pytest.raises(ScenarioError, match="no scenario 'nope'; built in: brisling5, .*pipit3"):
        load_scenario("nope")
    bad = tmp_path / "x.toml"
    bad.write_text("[airframe\nname=")
    with pytest.raises(ScenarioError, match=r"x\.toml: not valid TOML"):
        load_scenario(bad)
    with pytest.raises(ScenarioError, match="cannot read"):
        load_scenario(tmp_path / "missing.toml")


leaf = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True), st.text(max_size=5),
                 st.lists(st.integers(-5, 5), max_size=5))


@given(st.data())
def test_mutated_scenarios_load_or_fail_cleanly(data):
    d = copy.deepcopy(_raw("brisling5"))
    for _ in range(data.draw(st.integers(1, 4))):
        table = data.draw(st.sampled_from(["airframe", "gyro", "motors", "device", "rigid", "modes", "script"]))
        target = d[table][data.draw(st.integers(0, len(d[table]) - 1))] if table == "modes" else d[table]
        key = data.draw(st.sampled_from(sorted(target) + ["extra"]))
        target[key] = data.draw(leaf)
    try:
        sc = parse_scenario(d, "m.toml")
    except ScenarioError as exc:
        assert str(exc).startswith("m.toml: ") and "\n" not in str(exc)
    else:
        assert sc.modes and all(m.freq_hz > 0 and 0 < m.damping_ratio < 1 for m in sc.modes)
