"""The ``spinrig`` command line: one sub-command per job, each with ``--help`` and examples."""

from __future__ import annotations

import argparse
import sys

from . import __version__

EPILOG = """\
examples:
  spinrig demo                 see the whole idea on a simulated airframe
  spinrig watch PORT --headless --profile FILE    watch a live airframe
  spinrig replay FILE --headless                  a capture through the same pipeline
  spinrig analyze FILE --report DIR               modes, RPM bands, imbalance of a sweep
  spinrig sweep PORT --ramp 10:60:30 --capture F  spin the motors through a throttle ramp
  spinrig baseline save AIRFRAME FILE             keep a known-good sweep in the logbook
  spinrig compare AIRFRAME FILE                   rebuild check: pass, warn or fail
  spinrig ports                list serial ports
  spinrig sim quillback7       a simulated flight controller on a pty

Bench safety: props off or the frame clamped, eye protection, stay clear of the prop arc,
a current-limited supply and a physical kill switch within reach.
"""


def bounded(kind, lo, hi, lo_open=False, what="value"):
    """An argparse type: a number of ``kind`` in [lo, hi] ((lo, hi] with ``lo_open``); anything
    else is a one-line usage error (exit 2) naming the bounds."""

    def parse(text: str):
        try:
            v = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a{'n integer' if kind is int else ' number'}") from None
        if v != v or v < lo or v > hi or (lo_open and v == lo):
            left = "(" if lo_open else "["
            raise argparse.ArgumentTypeError(f"{text} is outside {left}{lo:g}, {hi:g}] ({what})")
        return v

    return parse


WINDOW_S = bounded(float, 0.016, 4.0, what="spectrum window, s")
OVERLAP = bounded(float, 0.0, 0.9, what="overlap fraction")
DURATION_S = bounded(float, 0.0, 1e6, lo_open=True, what="seconds")
BAUD = bounded(int, 300, 12_000_000, what="baud")
SUPPLY_V = bounded(float, 0.0, 100.0, what="volts")
SPEED = bounded(float, 0.0, 1000.0, lo_open=True, what="times real time")


def _add_demo(sub) -> None:
    p = sub.add_parser(
        "demo",
        help="run spinrig on its built-in simulated airframe",
        description="Run spinrig end to end on the built-in simulator: no hardware needed.",
        epilog="example:\n  spinrig demo\n  spinrig demo --seconds 5",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--seconds", type=bounded(float, 0.0, 3600.0, lo_open=True, what="seconds"),
                   help="stop after S seconds, 0 < S <= 3600 (default: the whole 75 s throttle script)")
    p.add_argument("--seed", type=int, default=1, help="simulator seed (default 1)")
    p.add_argument("--headless", action="store_true", help="no screen: print events (the default without a terminal)")
    p.set_defaults(func=lambda a: __import__("monitor.demo", fromlist=["run"]).run(a))


def _add_ports(sub) -> None:
    p = sub.add_parser(
        "ports",
        help="list serial ports",
        description="List the serial ports of this computer, with description and USB VID:PID.",
        epilog="example:\n  spinrig ports",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.set_defaults(func=lambda a: __import__("monitor.ports", fromlist=["run"]).run(a))


def _add_run_options(p) -> None:
    p.add_argument("--profile", metavar="FILE", help="frame profile (TOML) of the airframe's known modes")
    p.add_argument("--json", action="store_true", help="print events and the summary as JSON lines")
    p.add_argument("--events", metavar="FILE.jsonl", help="also append every event to this file as JSON lines")
    p.add_argument("--window-s", type=WINDOW_S, default=0.256,
                   help="spectrum window length, 0.016 to 4 s (default 0.256; at least 16 samples)")
    p.add_argument("--overlap", type=OVERLAP, default=0.75, help="window overlap fraction, 0 to 0.9 (default 0.75)")


def _add_watch(sub) -> None:
    p = sub.add_parser(
        "watch",
        help="watch a live airframe: spectra, motor orders, crossings",
        description="Stream gyro and motor RPM from a flight controller and warn when a motor harmonic "
        "crosses a frame mode. PORT is a device path or a pyserial URL (socket://, rfc2217://, loop://, sim://).",
        epilog="""examples:
  spinrig watch /dev/ttyACM0 --profile quillback7.toml --headless
  spinrig watch socket://127.0.0.1:52817 --headless --capture run1.spinrec --mounting bungee --props on
  spinrig watch sim://quillback7 --profile monitor/profiles/quillback7.toml --headless --duration 30
  spinrig watch run1.csv --headless --json

""" + "Bench safety: props off or the frame clamped, eye protection, clear of the prop arc, a current-limited\n"
        "supply and a physical kill switch within reach.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("port", metavar="PORT", help="device path, pyserial URL, or a .csv file")
    p.add_argument("--baud", type=BAUD, default=921_600,
                   help="baud rate, 300 to 12000000 (default 921600; ignored by USB CDC)")
    p.add_argument("--headless", action="store_true", help="no screen: print events and a summary")
    p.add_argument("--capture", metavar="FILE.spinrec", help="record the raw stream losslessly to FILE")
    p.add_argument("--duration", type=DURATION_S, metavar="S", help="stop after S seconds (S > 0)")
    p.add_argument("--mounting", choices=["bungee", "foam", "clamp", "hand"], help="how the airframe is held")
    p.add_argument("--props", choices=["on", "off"], help="props on or off for this run")
    p.add_argument("--supply-v", type=SUPPLY_V, metavar="V", help="supply voltage, 0 to 100 V")
    p.add_argument("--note", help="a free note stored in the capture")
    _add_run_options(p)
    p.set_defaults(func=_watch)


def _screen_possible() -> bool:
    """The screen needs a terminal on both ends; without one (a pipe, a file, CI) lines are printed."""
    return sys.stdout.isatty() and sys.stdin.isatty()


def _watch(args) -> int:
    from .headless import run_watch

    if not args.headless and _screen_possible():
        return run_screen(args)
    return run_watch(args)


def run_screen(args, replay: bool = False) -> int:
    """The live screen over a port (or a capture, ``replay``); errors are one line, exit 2."""
    import sys

    from .headless import conditions, engine_config, load_profile_arg
    from .live import LiveRun
    from .profile import ProfileError

    try:
        profile = load_profile_arg(args.profile)
    except ProfileError as exc:
        print(f"spinrig: {exc}", file=sys.stderr)
        return 2
    from .headless import warn_profile

    warn_profile(profile, bool(args.profile))
    source = args.file if replay else args.port
    save_to = None if getattr(args, "note", None) == "demo" else args.profile  # the demo never rewrites its profile
    run = LiveRun(source, profile, profile_path=save_to, baud=getattr(args, "baud", 921_600),
                  config=engine_config(args), replay=replay, replay_speed=getattr(args, "speed", None) or 1.0,
                  conditions=conditions(args))
    if not replay:
        try:
            run.start()
        except Exception as exc:  # noqa: BLE001 - a port that does not open: one line
            print(f"spinrig: cannot open {source}: {exc}", file=sys.stderr)
            return 2
    capture = getattr(args, "capture", None)
    if capture and not replay:
        note = run.start_capture(capture)  # recording starts at once, as headless
        if not note.startswith("capturing"):
            run.stop()
            print(f"spinrig: {note}", file=sys.stderr)
            return 1
    from .views.app import SpinrigApp

    app = SpinrigApp(run, capture_path=capture, start=replay, duration=getattr(args, "duration", None))
    import signal

    def on_term(*_):  # SIGTERM: leave the screen (the terminal is restored), close the capture, exit 143
        app.call_later(app.exit, 143)

    old = signal.signal(signal.SIGTERM, on_term)
    code = 0
    try:
        code = app.run() or 0
    except KeyboardInterrupt:
        code = 130
    finally:
        signal.signal(signal.SIGTERM, old)
        run.stop()
    return int(code)


def _add_replay(sub) -> None:
    p = sub.add_parser(
        "replay",
        help="run a capture through the same pipeline as a live run",
        description="Replay a capture (.spinrec) through the live pipeline: the same spectra and events.",
        epilog="examples:\n  spinrig replay run1.spinrec --headless\n"
        "  spinrig replay run1.spinrec --headless --json --speed 4",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("file", metavar="FILE")
    p.add_argument("--headless", action="store_true", help="no screen: print events and a summary")
    p.add_argument("--speed", type=SPEED, help="pace the replay: 1 is real time, up to 1000 (default: as fast as "
                   "possible)")
    _add_run_options(p)
    p.set_defaults(func=_replay)


def _replay(args) -> int:
    if args.headless or not _screen_possible():
        from .headless import run_replay

        return run_replay(args)
    return run_screen(args, replay=True)


def _add_export(sub) -> None:
    p = sub.add_parser(
        "export",
        help="write a capture's samples and motor RPM as CSV or NPZ",
        description="Export the gyro samples (deg/s) and motor RPM of a capture.",
        epilog="examples:\n  spinrig export run1.spinrec --csv\n  spinrig export run1.spinrec --npz -o run1.npz",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("file", metavar="FILE")
    fmt = p.add_mutually_exclusive_group(required=True)
    fmt.add_argument("--csv", action="store_const", const="csv", dest="fmt", help="the CSV layout spinrig reads back")
    fmt.add_argument("--npz", action="store_const", const="npz", dest="fmt", help="numpy arrays and metadata")
    p.add_argument("-o", "--output", help="output file (default: FILE with .csv or .npz)")
    p.set_defaults(func=_export)


def _export(args) -> int:
    import sys

    from .capture import CaptureError
    from .export import NoSamplesError, export

    try:
        out, cut = export(args.file, args.fmt, args.output)
    except CaptureError as exc:
        print(f"spinrig: {exc}", file=sys.stderr)
        return 2
    except NoSamplesError as exc:
        print(f"spinrig: {exc}", file=sys.stderr)
        return 1
    except OSError as exc:
        print(f"spinrig: {args.output or args.file}: {exc.strerror or exc}; nothing written", file=sys.stderr)
        return 1
    if cut:
        print(f"spinrig: note: {cut}", file=sys.stderr)
    print(f"wrote {out}")
    return 0


def _add_sim(sub) -> None:
    from simulators import cli as sim_cli

    p = sub.add_parser(
        "sim",
        help="run a simulated flight controller on a pty or TCP port",
        description="Run a simulated flight controller on a simulated airframe, speaking the spinrig protocol "
        "over a pseudo-terminal or a TCP port, until stopped.",
        epilog=sim_cli.EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sim_cli.add_arguments(p)
    p.set_defaults(func=sim_cli.run)


def _add_tap(sub) -> None:
    p = sub.add_parser(
        "tap",
        help="frame modes (frequency, damping, axis) from taps: live on a port, or in a capture or CSV",
        description="On a live port, ask for each tap and judge each decay as it comes (motors must be still; "
                    "on sim:// ports spinrig taps the simulated frame). In a capture or CSV made with the motors "
                    "stopped, find the taps. Identify the frame's modes in each free decay (matrix pencil, "
                    "then a least-squares fit of each decay with every mode found), combine the taps, and "
                    "optionally write them as a profile for watch --profile.",
        epilog="examples:\n  spinrig tap /dev/ttyACM0 --profile frame.toml   (guided: 5 taps)\n"
               "  spinrig tap 'sim://quillback7?script=0' --taps 3\n"
               "  spinrig tap taps.spinrec\n  spinrig tap taps.spinrec --profile frame.toml\n"
               "  spinrig tap taps.csv --json\n  spinrig tap taps.spinrec --report tap-report",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("source", metavar="SOURCE",
                   help="a capture (.spinrec) or CSV with the taps, or a live port (guided; motors must be still)")
    p.add_argument("--baud", type=BAUD, default=921_600, help="serial baud rate for a live port (default 921600)")
    p.add_argument("--json", action="store_true", help="print one JSON object: taps and modes")
    p.add_argument("--profile", metavar="FILE", help="write the modes to this profile (asks before replacing)")
    p.add_argument("--yes", action="store_true", help="replace an existing profile's modes without asking")
    p.add_argument("--report", metavar="DIR", help="write report.html (each decay with its fitted modes), the "
                   "plots as PNG and taps.json into DIR")
    p.add_argument("--taps", type=bounded(int, 1, 1000, what="taps"), metavar="N",
                   help="live: how many taps to ask for (default 5); files: use the first N taps only")
    p.set_defaults(func=lambda a: __import__("monitor.tap_command", fromlist=["run"]).run(a))


def _notch(text: str) -> tuple[float, float]:
    """``HZ:WIDTH`` as (centre, width), both Hz, 0 < width < 2 centre."""
    try:
        c, w = (float(v) for v in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not HZ:WIDTH (for example 185:30)") from None
    if not (0 < c < 1e5 and 0 < w < 2 * c):
        raise argparse.ArgumentTypeError(f"{text}: need 0 < centre and 0 < width < 2 x centre (Hz)")
    return c, w


def _add_analyze(sub) -> None:
    p = sub.add_parser(
        "analyze",
        help="a sweep's frame modes, the RPM bands that excite them, imbalance and filter guidance",
        description="Analyse a capture or CSV of a throttle sweep: the order-tracked map (PSD averaged in RPM bins), "
                    "the frame modes the sweep excites, for every mode and motor order the RPM band that excites it "
                    "(seen and predicted, with its peak level), a motor imbalance ranking (one-at-a-time runs, or "
                    "motors at clearly different speeds) and filter guidance. Without motor telemetry the speed is "
                    "estimated from the spectrum and flagged.",
        epilog="examples:\n  spinrig analyze sweep.spinrec\n  spinrig analyze sweep.spinrec --json\n"
               "  spinrig analyze sweep.csv --blades 3 --report sweep-report\n"
               "  spinrig analyze one-at-a-time.spinrec --profile frame.toml\n"
               "  spinrig analyze sweep.spinrec --blades 3 --notch 185:30",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("file", metavar="FILE", help="a capture (.spinrec) or CSV of a sweep")
    p.add_argument("--json", action="store_true", help="print one JSON object (modes, bands, imbalance, guidance)")
    p.add_argument("--report", metavar="DIR", help="write report.html (self-contained), the plots as PNG and "
                   "analysis.json into DIR")
    p.add_argument("--blades", type=bounded(int, 1, 8, what="blades"), help="prop blades, 1 to 8 (default: the "
                   "profile's, else 2)")
    p.add_argument("--profile", metavar="FILE", help="frame profile (TOML): its blade count")
    p.add_argument("--notch", type=_notch, action="append", metavar="HZ:WIDTH",
                   help="a notch to judge (centre and -3 dB width, Hz): which modes it covers and its phase cost; "
                        "repeatable")
    p.add_argument("--estimate-rpm", action="store_true",
                   help="estimate the speed from the spectrum even when the file has motor telemetry")
    p.set_defaults(func=lambda a: __import__("monitor.analyze_command", fromlist=["run"]).run(a))


def _add_sweep(sub) -> None:
    p = sub.add_parser(
        "sweep",
        help="spin the motors through a throttle plan and record it (bench only)",
        description="Drive the device's motors through a sweep plan and record the run: a ramp from the "
                    "command line or a TOML plan (ramps, holds, steps; all motors or one at a time; limits on "
                    "throttle, duration and slew; abort rules). The plan is checked against the device's motor "
                    "count and declared throttle ceiling before anything is armed, then shown with the bench "
                    "cautions, and nothing is armed until you confirm (type SPIN at a terminal, or pass "
                    "--yes-spin-the-motors). Set-points go out at 50 Hz. The motors are stopped, and the "
                    "device's acknowledgement checked, at the plan's end, on Ctrl-C, SIGTERM, an abort rule "
                    "(gyro level, lost motor telemetry, link errors, a strong crossing), a lost link, an error "
                    "and at exit; if the host dies, the device's own heartbeat timeout stops them. At the end "
                    "the capture is analysed (modes, bands, imbalance). Exit 0 plan done, 3 stopped early, "
                    "1 stop not acknowledged or the device would not arm, 2 bad usage or plan or no "
                    "confirmation (nothing armed).",
        epilog="""examples:
  spinrig sweep sim://brisling5?script=0 --ramp 10:60:30 --capture ramp.spinrec
  spinrig sweep /dev/ttyACM0 --plan plans/imbalance.toml --capture imb.spinrec --props off
  spinrig sweep /dev/ttyACM0 --ramp 15:45:20 --one-at-a-time --capture solo.spinrec --yes-spin-the-motors

A plan file (throttle in percent of the device's range):
  [plan]
  name = "full sweep"
  max_throttle = 60          # never above the device's own ceiling
  max_duration_s = 120       # the whole schedule, slew and rests included
  slew_percent_per_s = 20    # no set-point moves faster; a step is taken as a ramp
  one_at_a_time = false      # true: each motor alone, the others at zero
  repeats = 1
  [[piece]]
  kind = "ramp"              # or "hold" (level, seconds) or "steps" (levels, dwell_s)
  from = 10
  to = 60
  seconds = 40
  [abort]                    # 0 turns a rule off
  gyro_rms_dps = 400
  telemetry_lost_s = 0.5
  link_errors_per_s = 5
  crossing_over_floor_db = 25

Bench safety: props off or the frame clamped, eye protection, clear of the prop arc, a current-limited
supply and a physical kill switch within reach. Follow local rules and the manufacturer's instructions.""",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("port", metavar="PORT", help="device path or pyserial URL")
    how = p.add_mutually_exclusive_group(required=True)
    how.add_argument("--plan", metavar="FILE.toml", help="a sweep plan (TOML; see below)")
    how.add_argument("--ramp", metavar="FROM:TO:SECONDS", help="one ramp of throttle %%, for example 10:60:30")
    p.add_argument("--capture", metavar="FILE.spinrec", required=True, help="record the run losslessly to FILE")
    p.add_argument("--one-at-a-time", action="store_true", help="run the plan for each motor alone (imbalance)")
    p.add_argument("--max-throttle", type=bounded(float, 0.0, 100.0, lo_open=True, what="throttle %"),
                   metavar="PERCENT", help="a lower throttle limit than the plan's (a ramp's default: its top)")
    p.add_argument("--yes-spin-the-motors", action="store_true",
                   help="confirm without a terminal (headless runs); you have cleared the bench")
    p.add_argument("--headless", action="store_true",
                   help="no screen: progress as lines (the default without a terminal); the sweep screen "
                        "otherwise, with the abort key (a, space or Esc) always shown")
    p.add_argument("--device-timeout", type=DURATION_S, default=5.0, metavar="S",
                   help="wait this long for the device to describe itself (default 5 s)")
    p.add_argument("--baud", type=BAUD, default=921_600, help="baud rate (default 921600; ignored by USB CDC)")
    p.add_argument("--profile", metavar="FILE", help="frame profile (TOML): crossings and the crossing abort rule")
    p.add_argument("--json", action="store_true", help="print events, the stop and the analysis as JSON lines")
    p.add_argument("--mounting", choices=["bungee", "foam", "clamp", "hand"], help="how the airframe is held")
    p.add_argument("--props", choices=["on", "off"], help="props on or off for this run")
    p.add_argument("--note", help="a free note stored in the capture")
    p.set_defaults(func=lambda a: __import__("monitor.bench.command", fromlist=["run"]).run(a))


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="spinrig",
        description="Bench vibration monitor for multirotor airframes.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"spinrig {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    _add_demo(sub)
    _add_watch(sub)
    _add_replay(sub)
    _add_export(sub)
    _add_tap(sub)
    _add_analyze(sub)
    _add_sweep(sub)
    from .logbook.commands import add_parsers

    add_parsers(sub, bounded)
    _add_ports(sub)
    _add_sim(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
