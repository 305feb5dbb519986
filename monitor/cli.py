"""The ``spinrig`` command line: one sub-command per job, each with ``--help`` and examples."""

from __future__ import annotations

import argparse
import sys

from . import __version__

EPILOG = """\
examples:
  spinrig demo                 see the whole idea on a simulated airframe
  spinrig ports                list serial ports
  spinrig sim quillback7       a simulated flight controller on a pty

Bench safety: props off or the frame clamped, eye protection, stay clear of the prop arc,
a current-limited supply and a physical kill switch within reach.
"""


def _add_demo(sub) -> None:
    p = sub.add_parser(
        "demo",
        help="run spinrig on its built-in simulated airframe",
        description="Run spinrig end to end on the built-in simulator: no hardware needed.",
        epilog="example:\n  spinrig demo\n  spinrig demo --seconds 5",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--seconds", type=float, default=4.0, help="length of the demo stream, s (default 4)")
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
