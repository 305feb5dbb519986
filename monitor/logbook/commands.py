"""``spinrig baseline``, ``spinrig runs`` and ``spinrig compare``: I/O around the logbook
(:mod:`monitor.logbook.store`) and the rebuild check (:mod:`monitor.analysis.compare`).

Exit codes of ``compare``: 0 pass, 3 pass with warnings, 1 fail, 2 bad usage or unreadable input.
The other commands: 0 done, 2 bad usage, an unreadable file or logbook.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import dataclass

from .errors import LogbookError

EXIT = {"pass": 0, "warn": 3, "fail": 1}


class UsageError(Exception):
    """Bad input to a command: one line, exit 2."""


def _err(msg: str) -> int:
    print(f"spinrig: {msg}", file=sys.stderr)
    return 2


def _book(args):
    from .store import Logbook

    return Logbook(args.logbook)


def _blades_and_names(args) -> tuple[int | None, list[tuple[float, str]]]:
    if not getattr(args, "profile", None):
        return getattr(args, "blades", None), []
    from ..profile import ProfileError, load_profile

    try:
        prof = load_profile(args.profile)
    except ProfileError as exc:
        raise UsageError(str(exc)) from None
    return args.blades or prof.blades, [(m.freq_hz, m.name) for m in prof.modes]


def _analyse_file(path: str, blades: int | None):
    """(summary, notes) of a capture or CSV; UsageError with one line when it cannot be read."""
    from ..analysis.record import load_record
    from ..analysis.summary import summarise
    from ..analysis.sweep import analyse

    try:
        rec = load_record(path)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:
        raise UsageError(f"{path}: {exc.strerror or exc}") from None
    a = analyse(rec, blades or 2)
    if not blades:
        a.notes.append("props taken as 2-bladed (no --blades or --profile): blade-pass orders may be wrong")
    return summarise(a)


@dataclass
class Side:
    name: str  #: as shown: the file, or "AIRFRAME run N"
    summary: object
    airframe: str | None = None
    run_id: int | None = None


def resolve(text: str, args, blades: int | None, book_holder: list) -> Side:
    """A file (analysed now), ``AIRFRAME@RUN`` or ``AIRFRAME`` (its baseline) from the logbook."""
    if os.path.isfile(text):
        return Side(text, _analyse_file(text, blades))
    airframe, _, run = text.rpartition("@") if "@" in text else (text, "", "")
    run_id = None
    if run:
        if not run.isdigit():
            raise UsageError(f"{text}: no such file, and {run!r} is not a run number (AIRFRAME@RUN)")
        run_id = int(run)
    if not book_holder:
        book_holder.append(_book(args))
    book = book_holder[0]
    try:
        row, summary = book.run(airframe, run_id)
    except LogbookError as exc:
        if os.path.sep in text or text.lower().endswith((".spinrec", ".csv")):
            raise UsageError(f"{text}: no such file") from None
        raise UsageError(f"{text}: no such file, and {exc}") from None
    return Side(f"{airframe} run {row['id']}", summary, airframe, row["id"])


# --- baseline ------------------------------------------------------------------------------

def baseline_run(args) -> int:
    try:
        return {"save": _baseline_save, "list": _baseline_list, "show": _baseline_show,
                "set": _baseline_set}[args.action](args)
    except (LogbookError, UsageError) as exc:
        return _err(str(exc))


def _baseline_save(args) -> int:
    from .store import file_sha256

    blades, _ = _blades_and_names(args)
    if not os.path.isfile(args.file):
        raise UsageError(f"{args.file}: no such file")
    s = _analyse_file(args.file, blades)
    book = _book(args)
    try:
        rid = book.add_run(args.airframe, s, os.path.abspath(args.file), file_sha256(args.file), notes=args.note or "",
                           recorded_at=(s.analysis.get("conditions") or {}).get("started"), baseline=True)
    finally:
        book.close()
    modes = ", ".join(f"{m['freq_hz']:.1f}" for m in s.analysis["modes"]) or "none"
    if args.json:
        print(json.dumps({"airframe": args.airframe, "run": rid, "baseline": True, "modes": s.analysis["modes"]}))
    else:
        print(f"{args.airframe}: run {rid} is the baseline now ({len(s.analysis['modes'])} modes: {modes} Hz) "
              f"in {book.name}")
    return 0


def _baseline_set(args) -> int:
    book = _book(args)
    try:
        book.set_baseline(args.airframe, args.run)
    finally:
        book.close()
    print(f"{args.airframe}: run {args.run} is the baseline now")
    return 0


def _baseline_list(args) -> int:
    book = _book(args)
    try:
        rows = book.airframes()
    finally:
        book.close()
    if args.json:
        print(json.dumps({"logbook": book.name, "airframes": rows}))
        return 0
    print(f"logbook {book.name}: {len(rows)} airframe{'s' if len(rows) != 1 else ''}")
    for r in rows:
        base = f"baseline run {r['run_id']} ({r['set_at']}, {os.path.basename(r['source'])})" if r["run_id"] \
            else "no baseline"
        print(f"  {r['name']}: {r['runs']} run{'s' if r['runs'] != 1 else ''}, {base}")
    return 0


def _baseline_show(args) -> int:
    from ..analyze_command import text_lines

    book = _book(args)
    try:
        row, s = book.run(args.airframe, None)
    finally:
        book.close()
    a = s.analysis
    if args.json:
        print(json.dumps({"airframe": args.airframe, "run": row["id"], "stored_at": row["stored_at"],
                          "bench": row["bench"], "source": row["source"], "notes": row["notes"], "analysis": a}))
        return 0
    print(f"{args.airframe}: baseline run {row['id']}, stored {row['stored_at']} on {row['bench'] or '?'}"
          + (f"; note: {row['notes']}" if row["notes"] else ""))
    print("\n".join(text_lines(a)))
    print("vibration level per band (RMS deg/s, roll / pitch / yaw):")
    for lv in a.get("levels", []):
        span = (f"throttle {100 * lv['low']:.0f}-{100 * lv['high']:.0f} %" if lv["by"] == "throttle"
                else f"{lv['low']:.0f}-{lv['high']:.0f} RPM")
        r = lv["rms_dps"]
        print(f"  {span:>20}: {r['roll']:.3f} / {r['pitch']:.3f} / {r['yaw']:.3f}")
    return 0


def runs_run(args) -> int:
    try:
        book = _book(args)
        try:
            rows = book.runs(args.airframe)
        finally:
            book.close()
    except LogbookError as exc:
        return _err(str(exc))
    if args.json:
        print(json.dumps({"airframe": args.airframe, "runs": rows}))
        return 0
    print(f"{args.airframe}: {len(rows)} run{'s' if len(rows) != 1 else ''}")
    for r in rows:
        mark = "baseline" if r["baseline"] else (r["verdict"] or "-")
        modes = f"{r['modes']} modes" if r["readable"] else "analysis unreadable"
        note = f"  {r['notes']}" if r["notes"] else ""
        print(f"  run {r['id']:>4}  {r['stored_at']}  {mark:8}  {modes:10}  {os.path.basename(r['source'])}  "
              f"({r['bench'] or '?'}){note}")
    return 0


# --- compare -------------------------------------------------------------------------------

def _text(side_b: Side, side_c: Side, c) -> list[str]:
    out = [f"rebuild check: {c.verdict.upper()}  ({side_c.name} against {side_b.name})"]
    for f in c.findings:
        if f.severity != "note":
            out.append(f"  {f.severity:4}  {f.text}")
    if c.verdict == "pass":
        out.append("  no change past a tolerance")
    out.append("modes (baseline -> candidate):")
    for p in c.pairs:
        dz = "" if p["damping_change_pct"] is None else \
            f"  damping {100 * p['baseline_damping']:.1f} -> {100 * p['candidate_damping']:.1f} %"
        out.append(f"  {p['baseline_hz']:7.1f} -> {p['candidate_hz']:7.1f} Hz  {p['shift_pct']:+5.1f} %  "
                   f"{p['axis']:5}{dz}")
    for m in c.missing_modes:
        out.append(f"  {m['freq_hz']:7.1f} ->  missing    {m['axis']}")
    for m in c.new_modes:
        out.append(f"      new -> {m['freq_hz']:7.1f} Hz           {m['axis']}")
    if c.levels:
        worst = max(c.levels, key=lambda r: r["change_db"])
        out.append(f"levels: {len(c.levels)} band-axis pairs compared, largest rise {worst['change_db']:+.1f} dB "
                   f"({worst['axis']})")
    for r in c.imbalance:
        out.append(f"  motor {r['motor']}: 1x {r['baseline']:.4f} -> {r['candidate']:.4f} ({r['growth']:.2f}x)")
    out += [f"note: {f.text}" for f in c.findings if f.severity == "note"]
    out += [f"note: {n}" for n in c.notes]
    return out


def compare_run(args) -> int:
    from ..analysis.compare import compare
    from ..analysis.tolerances import ToleranceError, load_tolerances

    holder: list = []
    try:
        try:
            tol = load_tolerances(args.tolerances)
            blades, names = _blades_and_names(args)
            base = resolve(args.baseline, args, blades, holder)
            cand = resolve(args.candidate, args, blades or base.summary.analysis.get("blades"), holder)
        except (ToleranceError, UsageError, LogbookError) as exc:
            return _err(str(exc))
        if args.save and (base.airframe is None or cand.airframe is not None):
            return _err("--save stores a candidate file as a run of the baseline's airframe: give BASELINE as "
                        "an airframe name and CANDIDATE as a file")
        c = compare(base.summary.analysis, cand.summary.analysis, tol, names)
        where = None
        if args.report:
            from ..analysis.compare_report import write_compare_report

            try:
                where = write_compare_report(c, base.summary, cand.summary, base.name, cand.name, args.report)
            except OSError as exc:
                print(f"spinrig: {args.report}: {exc.strerror or exc}; report not complete", file=sys.stderr)
                return 2
        saved = None
        if args.save:
            from .store import file_sha256

            try:
                saved = holder[0].add_run(base.airframe, cand.summary, os.path.abspath(args.candidate),
                                          file_sha256(args.candidate), notes=args.note or "", verdict=c.verdict)
            except LogbookError as exc:
                return _err(f"{exc}; the verdict was {c.verdict}, not stored")
    finally:
        for b in holder:
            b.close()
    if args.json:
        print(json.dumps({"baseline": base.name, "candidate": cand.name, "saved_run": saved, **c.as_dict()}))
    else:
        print("\n".join(_text(base, cand, c)))
        if saved:
            print(f"stored as run {saved} of {base.airframe}")
    if where:
        print(f"report: {where}", file=sys.stderr if args.json else sys.stdout)
    return EXIT[c.verdict]


# --- the parsers ---------------------------------------------------------------------------

LOGBOOK_HELP = ("the logbook: an SQLite file, or postgresql://user@host/db for a shared one (default: "
                "logbook.sqlite in your data directory, ~/.local/share/spinrig on Linux; or $SPINRIG_LOGBOOK)")


def _logbook_arg(p) -> None:
    p.add_argument("--logbook", metavar="PATH|URL", default=os.environ.get("SPINRIG_LOGBOOK"), help=LOGBOOK_HELP)


def add_parsers(sub, bounded) -> None:
    blades = bounded(int, 1, 8, what="blades")
    p = sub.add_parser(
        "baseline", help="an airframe's known-good run in the logbook: save, set, list, show",
        description="Keep each airframe's known-good sweep (its baseline) in the logbook, with its analysis: "
                    "modes, bands, vibration level per throttle band and imbalance. spinrig compare checks a "
                    "rebuilt airframe against it.",
        epilog="examples:\n  spinrig baseline save 'Brisling 5 #2' stock.spinrec --blades 3\n"
               "  spinrig baseline list\n  spinrig baseline show 'Brisling 5 #2'\n"
               "  spinrig baseline set 'Brisling 5 #2' 7          (run 7 of spinrig runs becomes the baseline)\n"
               "  spinrig baseline list --logbook postgresql://bench@shop-server/spinrig",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    act = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    s = act.add_parser("save", help="analyse FILE and store it as AIRFRAME's baseline (the airframe is created)")
    s.add_argument("airframe", metavar="AIRFRAME")
    s.add_argument("file", metavar="FILE", help="a capture (.spinrec) or CSV of a sweep")
    s.add_argument("--blades", type=blades, help="prop blades (default: the profile's, else 2)")
    s.add_argument("--profile", metavar="FILE", help="frame profile (TOML): its blade count")
    s.add_argument("--note", help="a free note stored with the run")
    s.add_argument("--json", action="store_true")
    _logbook_arg(s)
    s = act.add_parser("set", help="make an earlier run of AIRFRAME its baseline")
    s.add_argument("airframe", metavar="AIRFRAME")
    s.add_argument("run", metavar="RUN", type=bounded(int, 1, 2**31 - 1, what="run number"))
    _logbook_arg(s)
    s = act.add_parser("list", help="every airframe and its baseline")
    s.add_argument("--json", action="store_true")
    _logbook_arg(s)
    s = act.add_parser("show", help="the baseline's modes, bands, levels and imbalance")
    s.add_argument("airframe", metavar="AIRFRAME")
    s.add_argument("--json", action="store_true")
    _logbook_arg(s)
    p.set_defaults(func=baseline_run)

    p = sub.add_parser("runs", help="every stored run of an airframe", description="List AIRFRAME's runs in "
                       "the logbook: number, when stored, baseline or verdict, modes found, file and bench.",
                       epilog="example:\n  spinrig runs 'Brisling 5 #2'",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("airframe", metavar="AIRFRAME")
    p.add_argument("--json", action="store_true")
    _logbook_arg(p)
    p.set_defaults(func=runs_run)

    p = sub.add_parser(
        "compare", help="rebuild check: a candidate sweep against a baseline (pass / warn / fail)",
        description="Check a rebuilt airframe against its known-good baseline before its first flight. Each side "
                    "is a capture or CSV (analysed now), an airframe in the logbook (its baseline) or AIRFRAME@RUN. "
                    "Modes are paired by frequency and axis; each pair's shift (Hz, %%) and damping change, new and "
                    "missing modes, the peak level where an order crosses a mode, the vibration level per throttle "
                    "band and each motor's imbalance are compared and judged by the tolerances (defaults in "
                    "README, 'Rebuild check'). Exit 0 pass, 3 pass with warnings, 1 fail, 2 bad usage or "
                    "unreadable input.",
        epilog="examples:\n  spinrig compare 'Brisling 5 #2' rebuilt.spinrec\n"
               "  spinrig compare 'Brisling 5 #2' rebuilt.spinrec --save --report check-report\n"
               "  spinrig compare stock.spinrec braced.spinrec --blades 3 --json\n"
               "  spinrig compare 'Brisling 5 #2@3' 'Brisling 5 #2@9' --tolerances strict.toml\n\n"
               "A tolerances file (every key optional):\n  [modes]\n  drop_warn_pct = 2.0\n  drop_fail_pct = 3.0\n"
               "  rise_warn_pct = 5.0\n  rise_fail_pct = 0.0      # 0: a rising mode never fails\n"
               "  damping_change_pct = 50.0\n  new_mode_db = 10.0\n  missing_mode_db = 10.0\n  match_pct = 25.0\n"
               "  shift_sigmas = 3.0       # a shift within 3 standard errors of both fits is not judged\n"
               "  [levels]\n  rise_warn_db = 6.0\n  rise_fail_db = 10.0\n  crossing_rise_warn_db = 6.0\n"
               "  crossing_rise_fail_db = 10.0\n  [imbalance]\n  growth_warn = 1.5\n  growth_fail = 2.0",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("baseline", metavar="BASELINE", help="a file, an airframe (its baseline) or AIRFRAME@RUN")
    p.add_argument("candidate", metavar="CANDIDATE", help="a file, an airframe or AIRFRAME@RUN")
    p.add_argument("--tolerances", metavar="FILE.toml", help="tolerances (see below; default: the built-in ones)")
    p.add_argument("--json", action="store_true", help="print one JSON object (verdict, findings, modes, ...)")
    p.add_argument("--report", metavar="DIR", help="write report.html, the plots as PNG and compare.json into DIR")
    p.add_argument("--blades", type=blades, help="prop blades of a file side (default: the profile's, the "
                   "stored baseline's, else 2)")
    p.add_argument("--profile", metavar="FILE", help="frame profile (TOML): blade count and mode names")
    p.add_argument("--save", action="store_true", help="store the candidate file as a run of the baseline's "
                   "airframe, with its verdict")
    p.add_argument("--note", help="a free note stored with a --save run")
    _logbook_arg(p)
    p.set_defaults(func=compare_run)
