"""The rebuild check: a candidate sweep against its airframe's baseline, and a verdict.

Pure functions over two :class:`monitor.analysis.summary.RunSummary` (their ``analysis`` dicts).

Modes are paired by an assignment (the Hungarian method, Kuhn 1955, as
``scipy.optimize.linear_sum_assignment``) on the cost sqrt|ln(f_c / f_b)| + 0.05 x the L1 distance
of the two modes' axis participations (a roll mode does not turn into a yaw mode), pairs further
apart than ``match_pct`` not allowed. The square root makes the cost concave in the shift: of two
readings that move the same total distance, the one that moves fewer modes further is cheaper (a
crack drops one mode and leaves its neighbour alone: the cracked arm's 178/192 Hz pair becoming
169/178 Hz is one mode dropping 12 %, not two dropping 5 and 7 %). Each pair gives the shift
(Hz, %), judged only when it stands more than ``shift_sigmas`` (3) standard errors of the two
runs' fits (``freq_sd_hz``, in quadrature) clear of zero, the damping change and,
where the same order crosses both, the change of the crossing's peak level (dB). Baseline modes
left unpaired are missing, candidate ones new. Per-axis vibration levels are compared band by
band (dB = 20 log10 of the RMS ratio), and per-motor imbalance figures motor by motor (ratio).

Two runs of one airframe differ: with every motor turning, their 1x lines add with phases that
change from run to run, so a band's level or a crossing's peak moves by up to 5.5 dB between runs
of the same frame on the simulator (one motor at a time: 0.04 dB). A rise past the warning line
therefore warns only when the axis as a whole (the median over its bands), or the 1x crossings as
a whole, rose by half the warning line too; a rise past the failing line fails on its own.
Crossings are judged at 1x only, where the order stands 10 dB over its trend on both sides (the
higher orders' peaks spread by 11 dB between runs). A close pair of modes that one run reads as
one mode is reported, not judged.
Each change is judged by :class:`monitor.analysis.tolerances.Tolerances` and worded as what a
technician checks; the verdict is the worst finding: fail, warn or pass.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linear_sum_assignment

from .tolerances import Tolerances

AXIS_WEIGHT = 0.05  #: cost of a full change of axis participation, against ln of a frequency ratio
PROMINENCE_WEIGHT = 0.01  #: cost per dB of prominence difference (10 dB weighs like a 10 % shift)
PAIR_FRACTION = 0.12  #: two modes this close are a close pair, which a sweep may read as one mode
MERGE_FRACTION = 0.08  #: a mode within 8 % of both of a close pair may be the two read as one
CLEAR_DB = 15.0  #: damping is judged only on modes this prominent on both sides, which moved under 2 %
CROSSING_CLEAR_DB = 10.0  #: a crossing is judged only where the order stands this far over its trend
NAME_FRACTION = 0.05  #: a profile's mode names a found mode within 5 %
SEVERITY = {"fail": 2, "warn": 1, "note": 0}
WHERE = {  # what to look at when a mode of this main axis lost stiffness (common practice)
    "roll": "the arms (cracks, delamination), the arm and standoff screws",
    "pitch": "the arms (cracks, delamination), the arm and standoff screws",
    "yaw": "the arm clamping and the motor mounts (in-plane stiffness)",
}


@dataclass
class Finding:
    severity: str  #: fail, warn or note
    kind: str  #: mode_shift, mode_new, mode_missing, damping, crossing, level, imbalance
    text: str

    def as_dict(self) -> dict:
        return {"severity": self.severity, "kind": self.kind, "text": self.text}


@dataclass
class Comparison:
    verdict: str  #: pass, warn or fail
    findings: list[Finding]
    pairs: list[dict]
    new_modes: list[dict]
    missing_modes: list[dict]
    crossings: list[dict]
    levels: list[dict]
    imbalance: list[dict]
    tolerances: Tolerances
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        return {"verdict": self.verdict, "findings": [f.as_dict() for f in self.findings], "modes": self.pairs,
                "new_modes": self.new_modes, "missing_modes": self.missing_modes, "crossings": self.crossings,
                "levels": self.levels, "imbalance": self.imbalance, "tolerances": self.tolerances.as_dict(),
                "notes": self.notes}


def _participation(m: dict) -> np.ndarray:
    p = m.get("participation") or {}
    v = np.array([float(p.get(a, 0.0)) for a in ("roll", "pitch", "yaw")])
    if v.sum() <= 0:
        v = np.array([float(m.get("axis") == a) for a in ("roll", "pitch", "yaw")])
    return v / max(v.sum(), 1e-12)


def match_modes(base: list[dict], cand: list[dict], match_pct: float) -> list[tuple[int, int]]:
    """Index pairs (baseline, candidate) of the assignment; see the module docstring."""
    if not base or not cand:
        return []
    fb = np.array([m["freq_hz"] for m in base], float)
    fc = np.array([m["freq_hz"] for m in cand], float)
    pb = np.array([_participation(m) for m in base])
    pc = np.array([_participation(m) for m in cand])
    qb = np.array([m.get("prominence_db", 0.0) for m in base], float)
    qc = np.array([m.get("prominence_db", 0.0) for m in cand], float)
    shift = np.sqrt(np.abs(np.log(fc[None, :] / fb[:, None])))  # concave: see the module docstring
    cost = (shift + AXIS_WEIGHT * np.abs(pb[:, None, :] - pc[None, :, :]).sum(2)
            + PROMINENCE_WEIGHT * np.abs(qc[None, :] - qb[:, None]))
    allowed = np.abs(fc[None, :] / fb[:, None] - 1.0) <= match_pct / 100.0
    big = 1e6
    rows, cols = linear_sum_assignment(np.where(allowed, cost, big))
    return [(int(r), int(c)) for r, c in zip(rows, cols, strict=True) if allowed[r, c]]


def _label(f: float, axis: str, names: list[tuple[float, str]]) -> str:
    near = [(abs(nf - f) / nf, n) for nf, n in names if abs(nf - f) <= NAME_FRACTION * nf]
    if near:
        return f"{min(near)[1]} ({axis})"
    return f"the {axis} mode"


def _order_name(order: float) -> str:
    return f"{order:g}x"


def _mode_findings(tol: Tolerances, base: list[dict], cand: list[dict], names) -> tuple[list, list, list, list]:
    out: list[Finding] = []
    pairs_idx = match_modes(base, cand, tol.match_pct)
    pairs = []
    paired_b = {i for i, _ in pairs_idx}
    paired_c = {j for _, j in pairs_idx}
    missing = [dict(m) for i, m in enumerate(base) if i not in paired_b]
    new = [dict(m) for j, m in enumerate(cand) if j not in paired_c]
    for i, j in pairs_idx:
        b, c = base[i], cand[j]
        shift = c["freq_hz"] - b["freq_hz"]
        pct = 100.0 * shift / b["freq_hz"]
        dz = None
        if b.get("damping_ratio") and c.get("damping_ratio"):
            dz = 100.0 * (c["damping_ratio"] - b["damping_ratio"]) / b["damping_ratio"]
        label = _label(b["freq_hz"], b["axis"], names)
        pairs.append({"baseline_hz": b["freq_hz"], "candidate_hz": c["freq_hz"], "shift_hz": round(shift, 2),
                      "shift_pct": round(pct, 2), "axis": b["axis"], "candidate_axis": c["axis"],
                      "baseline_damping": b.get("damping_ratio"), "candidate_damping": c.get("damping_ratio"),
                      "damping_change_pct": None if dz is None else round(dz, 1), "label": label})
        span = f"from {b['freq_hz']:.1f} to {c['freq_hz']:.1f} Hz ({pct:+.1f} %)"
        unsure = _uncertainty_pct(b, c)
        pairs[-1]["uncertainty_pct"] = None if unsure is None else round(unsure, 2)
        if unsure is not None and abs(pct) <= tol.shift_sigmas * unsure:
            pairs[-1]["judged"] = False
            if abs(pct) > tol.drop_warn_pct:
                out.append(Finding("note", "mode_shift", f"{label} reads {span}, within the two runs' measurement "
                                                         f"uncertainty ({tol.shift_sigmas:g} x {unsure:.1f} %, a weak "
                                                         "or heavily damped mode): the shift is not judged"))
            continue
        if _one_side_merged(b, c, missing, new):
            pairs[-1]["judged"] = False
            if abs(pct) > tol.drop_warn_pct:
                out.append(Finding("note", "mode_shift", f"{label} reads {span}, but a close pair reads as one mode "
                                                         "in one of the runs: the shift is not judged"))
            continue
        pairs[-1]["judged"] = True
        if pct < 0 and -pct > tol.drop_warn_pct:
            stiff = 100.0 * (1.0 - (c["freq_hz"] / b["freq_hz"]) ** 2)
            sev = "fail" if -pct > tol.drop_fail_pct else "warn"
            out.append(Finding(sev, "mode_shift", f"{label} dropped {span}, about {stiff:.0f} % of its stiffness "
                                                  f"lost: check {WHERE.get(b['axis'], WHERE['pitch'])}"))
        elif pct > 0 and pct > tol.rise_warn_pct:
            sev = "fail" if tol.rise_fail_pct > 0 and pct > tol.rise_fail_pct else "warn"
            out.append(Finding(sev, "mode_shift", f"{label} rose {span}: the frame is stiffer or lighter there "
                                                  "(braces, a new arm); take the tap test again and update the "
                                                  "profile, since the RPM bands it is excited at moved"))
        clear = (min(b.get("prominence_db", 0.0), c.get("prominence_db", 0.0)) >= CLEAR_DB
                 and abs(pct) <= tol.drop_warn_pct)
        if dz is not None and abs(dz) > tol.damping_change_pct and clear:
            how = ("it rings longer (a crack, a part now clamped harder)" if dz < 0 else
                   "it is damped more (a loose part rubbing, softer mounting)")
            out.append(Finding("warn", "damping", f"{label} at {c['freq_hz']:.1f} Hz: damping ratio "
                                                  f"{100 * b['damping_ratio']:.1f} % -> {100 * c['damping_ratio']:.1f} "
                                                  f"% ({dz:+.0f} %): {how}"))
    out += _unpaired_findings(missing, base, {i: cand[j] for i, j in pairs_idx}, "baseline", tol.missing_mode_db)
    out += _unpaired_findings(new, cand, {j: base[i] for i, j in pairs_idx}, "candidate", tol.new_mode_db)
    return out, pairs, new, missing


def _uncertainty_pct(b: dict, c: dict) -> float | None:
    """The standard error of a pair's shift, % of the baseline frequency, from both runs' fits
    (their ``freq_sd_hz``, added in quadrature); None when either run does not carry one."""
    sb, sc = b.get("freq_sd_hz"), c.get("freq_sd_hz")
    if sb is None or sc is None:
        return None
    return 100.0 * math.hypot(sb, sc) / b["freq_hz"]


def _unpaired_findings(lone: list[dict], side: list[dict], partner: dict, who: str, strong_db: float) -> list:
    """Findings for the modes of one run (``who``: baseline or candidate) the other run has no
    partner for: a close pair read as one there is a note; else a missing (baseline) or new
    (candidate) mode, a warning when it stands ``strong_db`` over the floor."""
    other = "candidate" if who == "baseline" else "baseline"
    kind = "mode_missing" if who == "baseline" else "mode_new"
    out = []
    for m in lone:
        merged = _merged_into(m, side, partner)
        if merged is not None:
            out.append(Finding("note", kind, f"the {who}'s {m['freq_hz']:.1f} Hz {m['axis']} mode and its close "
                                             f"neighbour read as one mode at {merged['freq_hz']:.1f} Hz in the "
                                             f"{other} (a close pair the sweep did not separate)"))
            continue
        prom = m.get("prominence_db", 0.0)
        if who == "baseline":
            text = (f"the baseline's {m['freq_hz']:.1f} Hz {m['axis']} mode ({prom:.1f} dB over the floor) is not in "
                    "the candidate: merged with a neighbour, moved out of the swept range, or damped by the rebuild")
        else:
            text = (f"a new {m['axis']} mode at {m['freq_hz']:.1f} Hz ({prom:.1f} dB over the floor): a part that "
                    "came loose or was added (stack, camera, antenna, battery strap); tap the frame to find it")
        out.append(Finding("warn" if prom >= strong_db else "note", kind, text))
    return out


def _one_side_merged(b: dict, c: dict, lone_b: list[dict], lone_c: list[dict]) -> bool:
    """Whether the pair (b, c) may be a close pair read as one mode on one side: an unpaired mode
    of the other run within 8 % of that one mode and within 12 % of its partner."""
    fb, fc = b["freq_hz"], c["freq_hz"]
    return any(abs(m["freq_hz"] - fb) <= MERGE_FRACTION * fb and abs(m["freq_hz"] - fc) <= PAIR_FRACTION * fc
               for m in lone_c) or \
        any(abs(m["freq_hz"] - fc) <= MERGE_FRACTION * fc and abs(m["freq_hz"] - fb) <= PAIR_FRACTION * fb
            for m in lone_b)


def _merged_into(m: dict, side: list[dict], partner: dict) -> dict | None:
    """The other run's mode that ``m`` (unpaired) and a close neighbour of it on its own ``side``
    (paired, ``partner`` its index -> the other run's mode) both sit within 8 % of: the close pair
    read as one mode there. None when there is no such mode."""
    f = m["freq_hz"]
    for i, o in enumerate(side):
        if o is m or i not in partner or abs(o["freq_hz"] - f) > PAIR_FRACTION * f:
            continue
        other = partner[i]
        if abs(other["freq_hz"] - f) <= MERGE_FRACTION * f and abs(other["freq_hz"] - o["freq_hz"]) <= \
                MERGE_FRACTION * o["freq_hz"]:
            return other
    return None


def _crossing_findings(tol: Tolerances, pairs: list[dict], bb: list[dict], cb: list[dict]) -> tuple[list, list]:
    out, rows = [], []
    for p in pairs:
        for b in bb:
            if abs(b["mode_hz"] - p["baseline_hz"]) > 0.01 or not b.get("observed"):
                continue
            c = next((x for x in cb if abs(x["mode_hz"] - p["candidate_hz"]) <= 0.01 and x["order"] == b["order"]
                      and x.get("observed")), None)
            if c is None:
                continue
            d = c["peak_db"] - b["peak_db"]
            judged = b["order"] == 1.0 and min(b.get("over_trend_db", 0.0), c.get("over_trend_db", 0.0)) >= \
                CROSSING_CLEAR_DB
            rows.append({"baseline_hz": p["baseline_hz"], "candidate_hz": p["candidate_hz"], "order": b["order"],
                         "order_name": b.get("order_name", _order_name(b["order"])),
                         "baseline_rpm": [b["rpm_low"], b["rpm_high"]], "candidate_rpm": [c["rpm_low"], c["rpm_high"]],
                         "baseline_db": b["peak_db"], "candidate_db": c["peak_db"], "change_db": round(d, 1),
                         "judged": judged})
            rows[-1]["label"] = p["label"]
    judged = [r["change_db"] for r in rows if r["judged"]]
    typical = float(np.median(judged)) if judged else 0.0
    for r in rows:
        d = r["change_db"]
        if not r["judged"] or d <= tol.crossing_rise_warn_db:
            continue
        if d <= tol.crossing_rise_fail_db and typical < 0.5 * tol.crossing_rise_warn_db:
            continue  # one crossing up, the rest not: run-to-run spread (see the module docstring)
        sev = "fail" if d > tol.crossing_rise_fail_db else "warn"
        out.append(Finding(sev, "crossing", f"where {r['order_name']} crosses {r['label']} ({r['candidate_rpm'][0]:.0f}"
                                            f"-{r['candidate_rpm'][1]:.0f} RPM) the peak rose {d:.1f} dB "
                                            f"({r['baseline_db']:.1f} -> {r['candidate_db']:.1f} dB re 1 (deg/s)^2/Hz):"
                                            " that speed range now shakes the frame harder"))
    return out, rows


def _level_findings(tol: Tolerances, bl: list[dict], cl: list[dict]) -> tuple[list, list, list[str]]:
    out, rows, notes = [], [], []
    if bl and cl and bl[0]["by"] != cl[0]["by"]:
        return out, rows, ["vibration levels not compared: one run knows throttle, the other only motor speed"]
    cand = {(x["by"], x["low"]): x for x in cl}
    for b in bl:
        c = cand.get((b["by"], b["low"]))
        if c is None:
            continue
        unit = "%" if b["by"] == "throttle" else "RPM"
        scale = 100.0 if b["by"] == "throttle" else 1.0
        span = f"{b['by']} {b['low'] * scale:.0f}-{b['high'] * scale:.0f} {unit}"
        for axis, vb in b["rms_dps"].items():
            vc = c["rms_dps"].get(axis)
            if vc is None or vb <= 0 or vc <= 0:
                continue
            d = 20.0 * math.log10(vc / vb)
            rows.append({"by": b["by"], "low": b["low"], "high": b["high"], "axis": axis, "baseline_rms_dps": vb,
                         "candidate_rms_dps": vc, "change_db": round(d, 2), "span": span})
    for axis in ("roll", "pitch", "yaw"):
        mine = [r for r in rows if r["axis"] == axis]
        typical = float(np.median([r["change_db"] for r in mine])) if mine else 0.0
        for r in mine:
            d = r["change_db"]
            if d <= tol.rise_warn_db or (d <= tol.rise_fail_db and typical < 0.5 * tol.rise_warn_db):
                continue  # one band up and the axis as a whole not: run-to-run spread
            sev = "fail" if d > tol.rise_fail_db else "warn"
            was, now = r["baseline_rms_dps"], r["candidate_rms_dps"]
            out.append(Finding(sev, "level", f"{axis} vibration at {r['span']} rose {d:.1f} dB "
                                             f"({was:.3f} -> {now:.3f} deg/s RMS)"))
    for r in rows:
        del r["span"]
    return out, rows, notes


def _imbalance_findings(tol: Tolerances, bi: dict, ci: dict) -> tuple[list, list, list[str]]:
    out, rows, notes = [], [], []
    bm = {r["motor"]: r for r in bi.get("motors", [])}
    cm = {r["motor"]: r for r in ci.get("motors", [])}
    for r in ci.get("motors", []):
        if r.get("flagged"):
            out.append(Finding("warn", "imbalance", f"motor {r['motor']}'s 1x vibration is {r['ratio']:.1f}x the "
                                                    "median of the motors: balance or replace its prop, check its "
                                                    "bell and shaft"))
    if not bm or not cm:
        which = "baseline" if not bm else "candidate"
        if not bm and not cm:
            which = "either run"
        notes.append(f"imbalance not compared: no per-motor figures in {which} (run the motors one at a time)")
        return out, rows, notes
    for motor in sorted(set(bm) & set(cm)):
        g = cm[motor]["figure"] / bm[motor]["figure"] if bm[motor]["figure"] > 0 else float("inf")
        rows.append({"motor": motor, "baseline": bm[motor]["figure"], "candidate": cm[motor]["figure"],
                     "growth": round(g, 2), "candidate_ratio": cm[motor]["ratio"]})
        if g > tol.growth_warn:
            sev = "fail" if g > tol.growth_fail else "warn"
            out.append(Finding(sev, "imbalance", f"motor {motor}'s 1x vibration grew {g:.1f}x over the baseline: "
                                                 "balance or replace its prop, check its bell and shaft"))
    return out, rows, notes


COVERAGE_SHARE = 0.8  #: the candidate must sweep this share of the baseline's RPM range for a full check


def _coverage_findings(sb, sc) -> list[Finding]:
    """A warning when the candidate swept much less of the baseline's RPM range (a cut file, a
    shorter plan): modes and bands outside it are not compared, whatever else the check says."""
    if not sb or not sc or sb[1] <= sb[0]:
        return []
    share = max(0.0, min(sb[1], sc[1]) - max(sb[0], sc[0])) / (sb[1] - sb[0])
    if share >= COVERAGE_SHARE:
        return []
    return [Finding("warn", "coverage", f"the candidate swept {sc[0]}-{sc[1]} RPM and the baseline {sb[0]}-{sb[1]}: "
                                        f"only {100 * share:.0f} % of the baseline's range was compared; sweep the "
                                        "same range (the same plan) for a full check")]


def compare(base: dict, cand: dict, tol: Tolerances | None = None, names: list[tuple[float, str]] = ()) -> Comparison:
    """Judge ``cand`` against ``base`` (analysis dicts of :func:`monitor.analysis.summary.summarise`).
    ``names`` [(Hz, name)]: a profile's modes, to name the modes found."""
    tol = tol or Tolerances()
    notes = []
    if base.get("rpm_estimated") or cand.get("rpm_estimated"):
        notes.append("motor speed estimated from the spectrum on at least one side: bands and crossings are "
                     "less certain")
    if base.get("blades") != cand.get("blades"):
        notes.append(f"blade counts differ ({base.get('blades')} against {cand.get('blades')}): blade-pass orders "
                     "are not the same lines")
    mf, pairs, new, missing = _mode_findings(tol, base.get("modes", []), cand.get("modes", []), list(names))
    cf, crossings = _crossing_findings(tol, pairs, base.get("bands", []), cand.get("bands", []))
    lf, levels, ln = _level_findings(tol, base.get("levels", []), cand.get("levels", []))
    imf, imb, imn = _imbalance_findings(tol, base.get("imbalance", {}), cand.get("imbalance", {}))
    findings = mf + cf + lf + imf + _coverage_findings(base.get("rpm_swept"), cand.get("rpm_swept"))
    for who, side in (("baseline", base), ("candidate", cand)):
        notes += [f"{who}: {n}" for n in side.get("notes", [])]  # a cut file, lost blocks, estimated speeds
    findings.sort(key=lambda f: -SEVERITY[f.severity])
    worst = max((SEVERITY[f.severity] for f in findings), default=0)
    verdict = {2: "fail", 1: "warn", 0: "pass"}[worst]
    if not base.get("modes"):
        notes.append("the baseline has no modes: only levels and imbalance were compared")
    return Comparison(verdict, findings, pairs, new, missing, crossings, levels, imb, tol, notes + ln + imn)
