"""The rebuild check: mode pairing against a brute-force assignment, level and growth arithmetic,
tolerances files, every simulator check the issue names (same frame twice: pass; cracked arm:
fail naming the mode; braced: moved up; bad prop: the motor named), `spinrig compare`'s exit
codes, `--save` into the logbook, and its report in a real browser."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.analysis.compare import compare, match_modes
from monitor.analysis.record import load_record
from monitor.analysis.summary import band_levels, summarise
from monitor.analysis.sweep import analyse
from monitor.analysis.tolerances import ToleranceError, Tolerances, load_tolerances
from simulators.scenario import load_scenario
from tests.conftest import examples, run_spinrig
from tests.sim_helpers import sweep_capture


def mode(f, axis="pitch", prom=15.0, zeta=0.03):
    return {"freq_hz": f, "damping_ratio": zeta, "axis": axis, "prominence_db": prom,
            "participation": {a: float(a == axis) for a in ("roll", "pitch", "yaw")}}


# --- pairing and arithmetic ------------------------------------------------------------------

@settings(max_examples=examples(60), deadline=None)
@given(st.lists(st.floats(50, 800), min_size=1, max_size=5), st.lists(st.floats(50, 800), min_size=1, max_size=5))
def test_the_pairing_is_the_cheapest_assignment_by_brute_force(fb, fc):
    """Kuhn 1955 (the Hungarian method): no other one-to-one pairing inside the gate costs less."""
    base, cand = [mode(f) for f in fb], [mode(f) for f in fc]
    got = match_modes(base, cand, 25.0)

    def ok(i, j):
        return abs(fc[j] / fb[i] - 1) <= 0.25

    def cost(pairs):  # concave in the shift: fewer modes moved further are cheaper
        return sum(math.sqrt(abs(math.log(fc[j] / fb[i]))) for i, j in pairs)

    assert all(ok(i, j) for i, j in got) and len({i for i, _ in got}) == len(got) == len({j for _, j in got})
    best_n, best_cost = 0, 0.0
    for k in range(min(len(fb), len(fc)), 0, -1):
        for rows in itertools.combinations(range(len(fb)), k):
            for cols in itertools.permutations(range(len(fc)), k):
                pairs = list(zip(rows, cols, strict=True))
                if all(ok(i, j) for i, j in pairs):
                    c = cost(pairs)
                    if k > best_n or (k == best_n and c < best_cost):
                        best_n, best_cost = k, c
        if best_n:
            break
    assert len(got) == best_n
    assert cost(got) == pytest.approx(best_cost, abs=1e-9)


def test_a_roll_mode_does_not_pair_with_a_yaw_mode_when_a_roll_one_is_as_near():
    base = [mode(200.0, "roll")]
    cand = [mode(204.0, "yaw"), mode(196.0, "roll")]
    assert match_modes(base, cand, 25.0) == [(0, 1)]


def test_shifts_and_their_verdicts_at_the_tolerance_lines():
    tol = Tolerances()
    for f, verdict in ((196.5, "pass"), (195.0, "warn"), (193.0, "fail"), (209.0, "pass"), (211.0, "warn")):
        c = compare({"modes": [mode(200.0)]}, {"modes": [mode(f)]}, tol)
        assert c.verdict == verdict, f
        assert c.pairs[0]["shift_pct"] == pytest.approx(100 * (f - 200) / 200, abs=0.01)
    c = compare({"modes": [mode(200.0)]}, {"modes": [mode(230.0)]}, Tolerances(rise_fail_pct=10.0))
    assert c.verdict == "fail"
    named = compare({"modes": [mode(131.0)]}, {"modes": [mode(117.0)]}, tol, [(131.0, "rear arm flap")])
    assert "rear arm flap (pitch) dropped from 131.0 to 117.0 Hz (-10.7 %)" in named.findings[0].text


def test_a_band_level_is_the_rms_of_its_psd_by_parseval():
    # Parseval: white noise of standard deviation s has a one-sided PSD of 2 s^2 / fs over 0..fs/2
    fs, n = 4000.0, 512
    freqs = np.fft.rfftfreq(n, 1 / fs)
    sd = np.array([1.0, 2.0, 0.5])
    psd = np.broadcast_to(2 * sd**2 / fs, (3, freqs.size, 3)).copy()
    lv = band_levels(freqs, psd, np.array([10.0, 10.0, 10.0]), np.array([5000.0, 6000.0, 9000.0]),
                     np.array([0.25, 0.3, 0.5]))
    assert [(x["low"], x["high"], x["frames"]) for x in lv] == [(0.2, 0.4, 20), (0.4, 0.6, 10)]
    inband = (fs / 2 - 20.0 + freqs[1] / 2) / (fs / 2)  # the share of the band from 20 Hz up
    for x in lv:
        got = np.array([x["rms_dps"][a] for a in ("roll", "pitch", "yaw")])
        np.testing.assert_allclose(got, sd * math.sqrt(inband), rtol=2e-3)


def test_level_and_imbalance_changes_are_20_log10_and_ratios():
    lv = [{"by": "throttle", "low": 0.4, "high": 0.6, "frames": 40, "rms_dps": {"roll": 1.0, "pitch": 1.0,
                                                                                "yaw": 1.0}}]
    lv2 = [dict(lv[0], rms_dps={"roll": 3.5, "pitch": 1.0, "yaw": 1.0})]
    imb = {"motors": [{"motor": m, "figure": 0.01, "ratio": 1.0, "flagged": False} for m in (1, 2)]}
    imb2 = {"motors": [{"motor": 1, "figure": 0.01, "ratio": 0.6, "flagged": False},
                       {"motor": 2, "figure": 0.025, "ratio": 1.4, "flagged": False}]}
    c = compare({"levels": lv, "imbalance": imb}, {"levels": lv2, "imbalance": imb2})
    roll = next(r for r in c.levels if r["axis"] == "roll")
    assert roll["change_db"] == pytest.approx(20 * math.log10(3.5), abs=0.01)
    assert c.verdict == "fail"  # +10.9 dB on roll, and motor 2 grew 2.5x
    kinds = {(f.kind, f.severity) for f in c.findings}
    assert ("level", "fail") in kinds and ("imbalance", "fail") in kinds
    assert "motor 2's 1x vibration grew 2.5x" in " ".join(f.text for f in c.findings)


def test_tolerance_files_are_checked_key_by_key(tmp_path):
    p = tmp_path / "t.toml"
    p.write_text("[modes]\ndrop_warn_pct = 1.0\ndrop_fail_pct = 2.0\n[levels]\nrise_warn_db = 3\n")
    t = load_tolerances(p)
    assert (t.drop_warn_pct, t.drop_fail_pct, t.rise_warn_db, t.rise_fail_db) == (1.0, 2.0, 3.0, 10.0)
    for text, msg in (("[modes]\ndrop_warn_pc = 1\n", r"\[modes\] unknown key 'drop_warn_pc'"),
                      ("[mode]\n", r"unknown section \[mode\]"),
                      ("[modes]\ndrop_warn_pct = -1\n", "must be a number, 0 or more"),
                      ("[modes]\ndrop_warn_pct = 'x'\n", "must be a number"),
                      ("[modes]\ndrop_warn_pct = 5\ndrop_fail_pct = 4\n", "drop_fail_pct = 4 is below"),
                      ("[modes\n", "not valid TOML")):
        p.write_text(text)
        with pytest.raises(ToleranceError, match=msg):
            load_tolerances(p)
    with pytest.raises(ToleranceError, match="No such file"):
        load_tolerances(tmp_path / "none.toml")


# --- the simulator's checks --------------------------------------------------------------------

@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("cmp")
    out = {}
    for name, seed, solo in (("brisling5", 1, False), ("brisling5", 2, False), ("brisling5_cracked_arm", 1, False),
                             ("quillback7", 1, False), ("quillback7", 2, False), ("quillback7_braced", 1, False),
                             ("brisling5", 1, True), ("brisling5_chipped_prop", 1, True)):
        path = d / f"{name}_{seed}{'_solo' if solo else ''}.spinrec"
        sc = sweep_capture(path, name, seed=seed, one_at_a_time=solo)
        out[(name, seed, solo)] = (path, summarise(analyse(load_record(path), sc.motors.blades)))
    return out


@pytest.mark.parametrize("name", ["brisling5", "quillback7"])
def test_the_same_airframe_twice_passes(runs, name):
    c = compare(runs[(name, 1, False)][1].analysis, runs[(name, 2, False)][1].analysis)
    assert c.verdict == "pass", [f.text for f in c.findings]
    # every mode within 1 %, or within three standard errors of the two fits (quillback7's weak,
    # 6 % damped 312 Hz mode reads 320.9 and 317.5 Hz: -1.05 %, with 0.8 % uncertainty)
    assert all(abs(p["shift_pct"]) < max(1.0, 3 * p["uncertainty_pct"]) for p in c.pairs)
    assert all(p["uncertainty_pct"] < 1.5 for p in c.pairs)


def test_the_cracked_arm_fails_naming_the_mode_that_dropped(runs):
    c = compare(runs[("brisling5", 1, False)][1].analysis, runs[("brisling5_cracked_arm", 1, False)][1].analysis)
    assert c.verdict == "fail"
    fail = [f for f in c.findings if f.severity == "fail"]
    assert len(fail) == 1 and fail[0].kind == "mode_shift"
    truth = min(m.freq_hz for m in load_scenario("brisling5_cracked_arm").modes)  # the rear arm flap, 169 Hz
    p = next(p for p in c.pairs if p["shift_pct"] < -3.0)  # 192 -> 169 Hz (-12 %): one mode, the right one
    assert p["axis"] == "pitch" and p["candidate_hz"] == pytest.approx(truth, rel=0.01)
    assert p["baseline_hz"] == pytest.approx(192.0, rel=0.01) and p["shift_pct"] == pytest.approx(-12.0, abs=1.0)
    assert all(abs(q["shift_pct"]) < 1.0 for q in c.pairs if q is not p)  # the front flap, 178 Hz, stayed
    assert f"dropped from {p['baseline_hz']:.1f} to {p['candidate_hz']:.1f} Hz" in fail[0].text


def test_the_braced_build_moves_its_modes_up_and_warns(runs):
    c = compare(runs[("quillback7", 1, False)][1].analysis, runs[("quillback7_braced", 1, False)][1].analysis)
    assert c.verdict == "warn"
    judged = [p for p in c.pairs if p["judged"]]  # the weak 312 Hz mode moves within its uncertainty
    assert all(p["shift_pct"] > 0 for p in judged) and len(judged) >= 5
    rose = [f for f in c.findings if f.kind == "mode_shift" and f.severity == "warn"]
    assert len(rose) >= 4 and all(" rose from " in f.text for f in rose)
    # the close pair is two pairs now: 118 -> 139 and 131 -> 152 Hz (truth), each within 1 %
    got = sorted((p["baseline_hz"], p["candidate_hz"]) for p in judged)[:2]
    assert [round(b / 118.0, 2) for b, _ in got] == [1.0, 1.11] and [round(x / 139.0, 2) for _, x in got] == [1.0, 1.1]


def test_the_bad_prop_names_its_motor(runs):
    c = compare(runs[("brisling5", 1, True)][1].analysis, runs[("brisling5_chipped_prop", 1, True)][1].analysis)
    bad = 1 + int(np.argmax(load_scenario("brisling5_chipped_prop").motors.imbalance_gmm))
    assert c.verdict == "fail"
    grew = [f for f in c.findings if f.kind == "imbalance" and f.severity == "fail"]
    assert len(grew) == 1 and f"motor {bad}'s" in grew[0].text
    assert max(c.imbalance, key=lambda r: r["growth"])["motor"] == bad


# --- the command ---------------------------------------------------------------------------------


def test_compare_exit_codes_save_and_json(runs, tmp_path):
    env = {"SPINRIG_LOGBOOK": str(tmp_path / "book.sqlite")}
    stock, seed2 = runs[("brisling5", 1, False)][0], runs[("brisling5", 2, False)][0]
    cracked = runs[("brisling5_cracked_arm", 1, False)][0]
    assert run_spinrig("baseline", "save", "Brisling 5 #2", str(stock), "--blades", "3", env=env).returncode == 0
    p = run_spinrig("compare", "Brisling 5 #2", str(seed2), env=env)
    assert p.returncode == 0 and "rebuild check: PASS" in p.stdout, p.stdout + p.stderr
    p = run_spinrig("compare", "Brisling 5 #2", str(cracked), "--save", "--json", env=env)
    assert p.returncode == 1, p.stderr
    d = json.loads(p.stdout)
    assert d["verdict"] == "fail" and d["saved_run"] == 2 and d["baseline"] == "Brisling 5 #2 run 1"
    runs_out = run_spinrig("runs", "Brisling 5 #2", "--json", env=env)
    assert [(r["id"], r["verdict"]) for r in json.loads(runs_out.stdout)["runs"]] == [(1, None), (2, "fail")]
    p = run_spinrig("compare", "Brisling 5 #2@1", "Brisling 5 #2@2", env=env)  # both stored
    assert p.returncode == 1 and "dropped" in p.stdout
    strict = tmp_path / "strict.toml"
    strict.write_text("[modes]\ndrop_warn_pct = 0.01\ndrop_fail_pct = 50\nshift_sigmas = 0\n")
    p = run_spinrig("compare", str(stock), str(seed2), "--blades", "3", "--tolerances", str(strict), env=env)
    assert p.returncode == 3 and "rebuild check: WARN" in p.stdout
    for args, msg in ((["Nobody", str(seed2)], "Nobody: no such file, and logbook"),
                      (["Brisling 5 #2@x", str(seed2)], "'x' is not a run number"),
                      (["Brisling 5 #2", str(tmp_path / "none.spinrec")], "none.spinrec: no such file"),
                      (["Brisling 5 #2", str(seed2), "--tolerances", str(tmp_path / "no.toml")], "no.toml"),
                      ([str(stock), str(seed2), "--save"], "--save stores a candidate file")):
        p = run_spinrig("compare", *args, env=env)
        assert p.returncode == 2 and p.stderr.count("\n") == 1 and msg in p.stderr, (args, p.stderr)
    garbage = tmp_path / "garbage.spinrec"
    garbage.write_bytes(b"\x00" * 100)
    p = run_spinrig("compare", "Brisling 5 #2", str(garbage), env=env)
    assert p.returncode == 2 and p.stderr.count("\n") == 1 and "garbage.spinrec" in p.stderr


def test_the_compare_report_renders_in_a_browser(runs, tmp_path):
    from tests.test_report_browser import CHROMIUM, page_check

    if CHROMIUM is None:
        pytest.skip("no chromium on this machine (apt-get install chromium)")
    from monitor.analysis.compare_report import write_compare_report

    b, c = runs[("brisling5", 1, False)][1], runs[("brisling5_cracked_arm", 1, False)][1]
    page = write_compare_report(compare(b.analysis, c.analysis), b, c, "stock", "cracked", tmp_path / "out")
    html = page.read_text()
    assert html.index("FAIL") < html.index("Spectra") < html.index("Campbell maps")
    result = page_check(page)
    assert result["images"] == 2 and result["bad"] == 0 and result["over"] == 0 and result["scroll"] <= 1280
    assert json.loads((tmp_path / "out" / "compare.json").read_text())["verdict"] == "fail"


def test_a_candidate_that_swept_less_of_the_range_warns_and_its_notes_are_kept():
    base = {"modes": [mode(200.0)], "rpm_swept": [4000, 24000], "notes": []}
    cand = {"modes": [mode(200.0)], "rpm_swept": [4000, 12000], "notes": ["capture cut at byte 300000"]}
    c = compare(base, cand)
    assert c.verdict == "warn"
    cov = [f for f in c.findings if f.kind == "coverage"]
    assert len(cov) == 1 and "only 40 % of the baseline's range" in cov[0].text
    assert "candidate: capture cut at byte 300000" in c.notes
    assert compare(base, dict(cand, rpm_swept=[4500, 23000])).verdict == "pass"  # 92 %: a full check
