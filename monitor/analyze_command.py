"""``spinrig analyze FILE``: the sweep's modes, bands, imbalance and guidance (I/O around
:mod:`monitor.analysis.sweep`)."""

from __future__ import annotations

import json
import sys

from .profile import ProfileError, load_profile


def _progress(enabled: bool):
    """A rich progress display on stderr for long files (none without a terminal)."""
    from contextlib import nullcontext

    if not enabled:
        return nullcontext(None)
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                    console=Console(stderr=True), transient=True)


def text_lines(d: dict) -> list[str]:
    est = " (estimated from the spectrum)" if d["rpm_estimated"] else ""
    sw = f"{d['rpm_swept'][0]}-{d['rpm_swept'][1]} RPM{est}" if d["rpm_swept"] else "nothing swept"
    out = [f"{d['source']}: {d['duration_s']:.1f} s at {d['sample_rate_hz']:g} Hz, {d['motors']} motors, swept {sw}"]
    out.append(f"modes ({len(d['modes'])}):")
    for m in d["modes"]:
        z = "damping -" if m["damping_ratio"] is None else f"damping {100 * m['damping_ratio']:.1f} %"
        sd = "" if m.get("freq_sd_hz") is None else f" +- {m['freq_sd_hz']:.1f}"
        out.append(f"  {m['freq_hz']:7.1f} Hz{sd:8}  {m['axis']:5}  {z:14}  {m['prominence_db']:.1f} dB prominent")
    out.append("bands, strongest first (RPM seen / predicted, peak dB re 1 (deg/s)^2/Hz):")
    for b in d["bands"][:12]:
        seen = f"{b['rpm_low']:.0f}-{b['rpm_high']:.0f}" if b["observed"] else "not seen"
        thr = ""
        if b["throttle_low"] is not None:
            thr = f"  throttle {100 * b['throttle_low']:.0f}-{100 * b['throttle_high']:.0f} %"
        out.append(f"  {b['mode_hz']:7.1f} Hz {b['order_name']:>18}: {seen:>13} / "
                   f"{b['predicted_low']:.0f}-{b['predicted_high']:.0f}  {b['peak_db']:6.1f} dB{thr}")
    imb = d["imbalance"]
    out.append(f"imbalance ({imb['method']}): {imb['note']}")
    for r in imb["motors"]:
        flag = "  <- out of balance" if r["flagged"] else ""
        out.append(f"  motor {r['motor']}: {r['figure']:.4f} deg/s per kRPM^2, {r['ratio']:.2f}x the median{flag}")
    out.append("guidance:")
    out += [f"  - {g}" for g in d["guidance"]]
    out += [f"note: {n}" for n in d["notes"]]
    return out


def run(args) -> int:
    from .analysis.record import load_record
    from .analysis.sweep import analyse

    blades = args.blades
    if args.profile:
        try:
            prof = load_profile(args.profile)
        except ProfileError as exc:
            print(f"spinrig: {exc}", file=sys.stderr)
            return 2
        blades = blades or prof.blades
    defaulted = not blades
    blades = blades or 2
    import os

    long_file = sys.stderr.isatty() and os.path.exists(args.file) and os.path.getsize(args.file) > 20_000_000
    with _progress(long_file) as prog:
        task = prog.add_task("reading", total=3) if prog else None
        try:
            rec = load_record(args.file)
        except ValueError as exc:  # CaptureError, CsvError, RecordError: one line each
            print(f"spinrig: {exc}", file=sys.stderr)
            return 2
        except OSError as exc:
            print(f"spinrig: {args.file}: {exc.strerror or exc}", file=sys.stderr)
            return 2
        if prog:
            prog.update(task, advance=1, description="spectra, modes, bands")
        a = analyse(rec, blades, estimate_rpm=True if args.estimate_rpm else None, notches=args.notch or [])
        if defaulted:
            a.notes.append("props taken as 2-bladed (no --blades or --profile): blade-pass orders may be wrong")
        if prog:
            prog.update(task, advance=1, description="report")
        where = None
        if args.report:
            from .analysis.report import write_report

            try:
                where = write_report(a, args.report)
            except OSError as exc:
                print(f"spinrig: {args.report}: {exc.strerror or exc}; report not complete", file=sys.stderr)
                return 1
    d = a.as_dict()
    if args.json:
        print(json.dumps(d))
    else:
        print("\n".join(text_lines(d)))
    if where:
        print(f"report: {where}", file=sys.stderr if args.json else sys.stdout)
    return 0
