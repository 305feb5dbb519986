"""``spinrig sweep PORT (--plan FILE | --ramp FROM:TO:SECONDS) --capture FILE``: a spin test.

The plan is read and checked, the device must describe itself and the plan is checked against it,
the plan, its limits and the bench cautions are printed, and a person confirms (typing ``SPIN`` at
a terminal, or ``--yes-spin-the-motors`` for a headless run). Only then is the device armed. The
run is recorded to the capture; at its end the motors are stopped and the stop's acknowledgement
reported, and the capture is analysed (modes, bands, imbalance).

Exit codes: 0 the plan ran to its end; 3 it was stopped early (abort key, Ctrl-C, SIGTERM, an
abort rule, a lost link, a device silent for 1 s) and the device acknowledged the stop; 1 the
device never acknowledged a stop, or the device would not arm; 2 bad usage, a bad plan, or no
confirmation (nothing armed).
"""

from __future__ import annotations

import json
import signal
import sys
import time
from dataclasses import asdict

import serial

from ..headless import SAFETY, EventPrinter, conditions, engine_config, load_profile_arg
from ..profile import ProfileError
from .controller import BenchError
from .plan import PlanError, load_plan, ramp_plan
from .run import SweepRun, open_parts

CONFIRM_WORD = "SPIN"


def _err(msg: str, code: int) -> int:
    print(f"spinrig: {msg}", file=sys.stderr)
    return code


def build_plan(args):
    if args.plan:
        plan = load_plan(args.plan)
    else:
        plan = ramp_plan(args.ramp, args.max_throttle, args.one_at_a_time)
    if args.one_at_a_time and args.plan:
        from dataclasses import replace

        plan = replace(plan, one_at_a_time=True)
    if args.max_throttle is not None and args.max_throttle < plan.max_throttle:
        from dataclasses import replace

        plan = replace(plan, max_throttle=args.max_throttle)  # the command line may only lower it
    return plan


def confirmed(args, ask=input) -> bool:
    if args.yes_spin_the_motors:
        return True
    if not sys.stdin.isatty():
        return False
    try:
        return ask(f"type {CONFIRM_WORD} to arm the device and start (anything else cancels): ").strip() == CONFIRM_WORD
    except EOFError:
        return False


def _open(args, plan, profile):
    """The sweep's parts, or the exit code after a one-line error (the capture 2, the port 1)."""
    try:
        return open_parts(args.port, plan, profile, args.capture, args.baud, engine_config(args), conditions(args))
    except OSError as exc:
        return _err(f"capture {args.capture}: cannot create: {exc.strerror or exc}", 2)
    except (serial.SerialException, ValueError) as exc:
        return _err(f"cannot open {args.port}: {exc}", 1)


def run(args) -> int:
    try:
        plan = build_plan(args)
        profile = load_profile_arg(args.profile)
    except (PlanError, ProfileError) as exc:
        return _err(str(exc), 2)
    if not args.headless and sys.stdin.isatty() and sys.stdout.isatty():
        return run_screen(args, plan, profile)
    parts = _open(args, plan, profile)
    if isinstance(parts, int):
        return parts
    capture, link, session, ctl = parts.capture, parts.link, parts.session, parts.controller
    printer = EventPrinter(as_json=args.json)
    old = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    code = 0
    try:
        end = time.monotonic() + args.device_timeout
        while ctl.info is None and time.monotonic() < end:
            session.pump(timeout=0.1)
        if ctl.info is None:
            return _err(f"{args.port}: the device did not describe itself within {args.device_timeout:g} s "
                        "(no DEVICE_INFO): nothing armed", 1)
        try:
            ctl.check()
        except PlanError as exc:
            return _err(f"{exc}; nothing armed", 2)
        except BenchError as exc:
            return _err(str(exc), 1)
        info = ctl.info
        print(SAFETY)
        print(f"device on {args.port}: {info.board_id or 'unnamed'}, {info.motor_count} motors, throttle ceiling "
              f"{info.throttle_ceiling / 100:g} %, heartbeat timeout {info.heartbeat_timeout_ms} ms")
        print("\n".join(plan.describe(info.motor_count)), flush=True)
        if not confirmed(args):
            return _err(f"not confirmed (type {CONFIRM_WORD} at a terminal, or pass --yes-spin-the-motors "
                        "for a headless run): nothing armed", 2)

        def on_signal(sig, _frame):
            ctl.abort(signal.Signals(sig).name)

        for s in old:
            signal.signal(s, on_signal)
        try:
            ctl.start()
        except BenchError as exc:
            return _err(str(exc), 1)
        capture.write_meta({"device": asdict(info),
                            "sweep": {"plan": plan.name, "schedule_s": ctl.progress.duration_s}})
        last_print = 0.0
        while ctl.running:
            events = session.pump(timeout=0.05)
            if events:
                printer(events)
                ctl.observe_events(events)
            now = time.monotonic()
            if not args.json and now - last_print >= 1.0:
                last_print = now
                p = ctl.progress
                motors = "  ".join(f"M{i + 1} {c:4.1f} % {r:6.0f} RPM"
                                   for i, (c, r) in enumerate(zip(p.commanded, p.rpm, strict=False)))
                print(f"{p.t_s:6.1f} / {p.duration_s:.1f} s  {motors}", flush=True)
    except BaseException as exc:  # an exception (or a second Ctrl-C) in this loop: stop first
        ctl.abort(f"host error: {type(exc).__name__}: {exc}" if not isinstance(exc, KeyboardInterrupt)
                  else "SIGINT")
        raise
    finally:
        report = ctl.join(timeout=10.0) if ctl.progress.state != "idle" else None
        for s, h in old.items():
            signal.signal(s, h)
        link.close()
        printer(session.drain())
        printer.close()
        capture.close({"link": asdict(link.health)})
    if report is None:
        return code
    p = ctl.progress
    result = {"kind": "sweep", "plan": plan.name, "stop": asdict(report), "sent": p.sent, "limited": p.limited,
              "max_commanded_percent": round(p.max_commanded, 2), "capture": str(args.capture)}
    if args.json:
        print(json.dumps(result))
    else:
        print(report.text())
        print(f"{p.sent} set-points sent, highest {p.max_commanded:.1f} % (limit {plan.max_throttle:g} %); "
              f"capture {args.capture}")
    if not report.acknowledged:
        print(f"spinrig: {report.text()}", file=sys.stderr)
        return 1
    _analyse(args, profile)
    return 0 if report.why == "end of the plan" else 3


def _analyse(args, profile) -> None:
    """The capture's modes, bands and imbalance, as ``spinrig analyze`` prints them."""
    from ..analysis.record import load_record
    from ..analysis.sweep import analyse
    from ..analyze_command import text_lines

    try:
        a = analyse(load_record(args.capture), profile.blades)
    except (ValueError, OSError) as exc:
        print(f"analysis of {args.capture} not possible: {exc}")
        return
    d = a.as_dict()
    print(json.dumps({"kind": "analysis", **d}) if args.json else "\n".join(text_lines(d)))


def run_screen(args, plan, profile) -> int:
    """The sweep screen (monitor.views.sweep_app): the same checks, the confirmation typed on it."""
    parts = _open(args, plan, profile)
    if isinstance(parts, int):
        return parts
    run = SweepRun(parts)
    try:
        run.wait_device(args.device_timeout)
        run.check()
    except (BenchError, PlanError) as exc:
        run.close()
        return _err(f"{exc}; nothing armed" if isinstance(exc, PlanError) else str(exc), 2 if isinstance(
            exc, PlanError) else 1)
    from ..views.sweep_app import SweepApp

    app = SweepApp(run)
    try:
        app.run()
    finally:
        run.close()
    report = parts.controller.report
    if report is None:
        print("spinrig: nothing was armed")
        return 2
    print(report.text())
    if not report.acknowledged:
        return 1
    _analyse(args, profile)
    return 0 if report.why == "end of the plan" else 3
