"""Headless ``watch``, ``replay`` and ``demo``: events printed as they happen, a summary at the end."""

from __future__ import annotations

import json
import signal
import sys
import threading
import time
from dataclasses import asdict
from pathlib import Path

import serial

from . import __version__
from .capture import CaptureError, CaptureWriter, read_capture
from .crossing import CrossingEvent
from .engine import Engine, EngineConfig
from .events import Notice, to_json_line
from .link import Link
from .profile import Profile, ProfileError, load_profile, profile_warnings
from .session import CaptureReplay, Session

SAFETY = ("BENCH SAFETY: props off or the frame clamped; eye protection; stay clear of the prop arc; "
          "current-limited supply; a physical kill switch within reach.")


class EventPrinter:
    """Prints events as readable lines or JSON lines, and counts them by kind."""

    def __init__(self, out=sys.stdout, as_json: bool = False, events_file: Path | None = None):
        self.out = out
        self.as_json = as_json
        self.events_file = open(events_file, "a", encoding="utf-8") if events_file else None  # noqa: SIM115
        self.counts: dict[str, int] = {}

    def __call__(self, events: list) -> None:
        for e in events:
            kind = e.state if isinstance(e, CrossingEvent) else e.as_dict()["kind"]
            self.counts[kind] = self.counts.get(kind, 0) + 1
            if self.events_file is not None:
                self.events_file.write(to_json_line(e) + "\n")
            self.out.write((to_json_line(e) if self.as_json else e.text()) + "\n")
        self.out.flush()
        if self.events_file is not None:
            self.events_file.flush()

    def close(self) -> None:
        if self.events_file is not None:
            self.events_file.close()


def summary(engine: Engine, health: dict, printer: EventPrinter, assembler_stats: dict,
            extra: dict | None = None) -> dict:
    return {
        "kind": "summary",
        "link": health,
        "stream": assembler_stats,
        "events": dict(sorted(printer.counts.items())),
        "stray_peaks": [p.as_dict() for p in engine.stray_peaks()],
        "bands": [b.as_dict() for b in engine.bands()],
        "frames": engine.frames,
        "frames_filled": engine.frames_filled,
        **(extra or {}),
    }


def bands_table(bands: list[dict]) -> list[str]:
    """The observed and predicted bands as aligned text lines, headed and footnoted."""
    if not bands:
        return ["observed bands: none"]
    out = ["observed bands (RPM where an order was crossing a mode) and the predicted bands:"]
    rows = [(f"{b['mode']} {b['mode_hz']:.1f} Hz", b["order_name"],
             f"{b['observed_rpm'][0]:.0f}-{b['observed_rpm'][1]:.0f}",
             f"{b['predicted_rpm'][0]:.0f}-{b['predicted_rpm'][1]:.0f}", f"{b['peak_db']:.1f}",
             "M" + ",".join(str(m) for m in b["motors"])) for b in bands]
    head = ("mode", "order", "observed RPM", "predicted RPM", "peak dB*", "motors")
    widths = [max(len(r[c]) for r in [head, *rows]) for c in range(len(head))]
    for r in [head, *rows]:
        out.append("  " + "  ".join(v.ljust(w) if c < 2 or c == 5 else v.rjust(w)
                                    for c, (v, w) in enumerate(zip(r, widths, strict=True))).rstrip())
    out.append("  * highest response at the mode while crossing, dB re 1 (deg/s)^2/Hz")
    return out


def print_summary(s: dict, out, as_json: bool) -> None:
    if as_json:
        out.write(json.dumps(s, sort_keys=True, default=str) + "\n")
        return
    link = s["link"]
    st = s["stream"]
    out.write("\n== summary\n")
    if link:
        out.write(
            f"link: {link.get('bytes', 0)} bytes, {link.get('frames_ok', 0)} frames ok, "
            f"{link.get('crc_errors', 0)} CRC errors, {link.get('malformed', 0)} malformed, "
            f"{link.get('reconnects', 0)} reconnects, {link.get('overruns', 0)} overruns"
            + (f", {link['silences']} silences" if link.get("silences") else "")
            + (f", {link['reboots_seen']} reboots answered" if link.get("reboots_seen") else "")
            + (f", {link['info_requests']} description requests" if link.get("info_requests", 0) > 1 else "")
            + "\n"
        )
    if st:
        clock = (f"device clock {st['drift_ppm']:+.0f} ppm against the host" if st.get("drift_ppm") is not None
                 else f"device clock drift not known ({st['drift_note']})" if st.get("drift_note") else "")
        out.write(
            f"stream: {st.get('samples', 0)} samples; {st.get('samples_lost', 0)} lost by sequence number, "
            f"{st.get('samples_filled', 0)} of them in {st.get('holes_bridged', 0)} short holes bridged, the rest "
            f"in {st.get('gaps', 0)} gaps; {st.get('reboots', 0)} device reboots" + (f"; {clock}" if clock else "")
            + "\n"
        )
        if s.get("frames_filled"):
            out.write(f"spectra over bridged holes (flagged): {s['frames_filled']} of {s['frames']}\n")
    ev = s["events"]
    out.write(f"crossings: {ev.get('crossing', 0)} crossing, {ev.get('nearing', 0)} nearing events, "
              f"{s['frames']} spectra\n")
    for line in bands_table(s["bands"]):
        out.write(line + "\n")
    if s["stray_peaks"]:
        out.write("stray peaks (not in the profile):\n")
        for p in s["stray_peaks"]:
            out.write(f"  {p['freq_hz']:.1f} Hz on {p['axis']}, {p['over_floor_db']:+.1f} dB over the floor\n")
    for line in s.get("notes", []):
        out.write(line + "\n")
    out.flush()


def load_profile_arg(path: str | None) -> Profile:
    """The ``--profile`` of a run (a file, or a bundled airframe name); none: an empty profile."""
    if not path:
        return Profile()
    return load_profile(path)


def warn_profile(profile: Profile, given: bool) -> None:
    """One line on stderr for a profile given but without modes."""
    if given and not profile.modes:
        print(f"spinrig: warning: {profile_warnings(profile)[0]}", file=sys.stderr)


def engine_config(args) -> EngineConfig:
    return EngineConfig(window_s=getattr(args, "window_s", 0.256), overlap=getattr(args, "overlap", 0.75))


def conditions(args) -> dict:
    return {
        "mounting": getattr(args, "mounting", None) or "unknown",
        "props": getattr(args, "props", None) or "unknown",
        "supply_v": getattr(args, "supply_v", None),
        "note": getattr(args, "note", None) or "",
    }


def _err(msg: str) -> int:
    print(f"spinrig: {msg}", file=sys.stderr)
    return 2


def run_watch(args) -> int:
    """``spinrig watch PORT --headless``. Exit 0 after --duration or Ctrl-C; 1 on a fatal link error."""
    try:
        profile = load_profile_arg(args.profile)
    except ProfileError as exc:
        return _err(str(exc))
    warn_profile(profile, bool(args.profile))
    if str(args.port).lower().endswith(".csv"):
        return run_csv(args, profile)
    engine = Engine(engine_config(args), profile)
    capture = None
    if args.capture:
        meta = {
            "format": "spinrec 2",
            "start_time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "port": args.port,
            "baud": args.baud,
            "spinrig_version": __version__,
            "conditions": conditions(args),
            "profile": profile.to_toml() if profile.modes else None,
        }
        try:
            capture = CaptureWriter(args.capture, meta)
        except OSError as exc:
            return _err(f"capture {args.capture}: cannot create: {exc.strerror or exc}")
    link = Link(args.port, args.baud, capture=capture)
    try:
        link.start()
    except (serial.SerialException, OSError, ValueError) as exc:
        if capture:
            capture.close()
        return _err(f"cannot open {args.port}: {exc}")
    printer = EventPrinter(as_json=args.json, events_file=Path(args.events) if args.events else None)
    if not args.json:
        print(SAFETY)
        print(f"watching {args.port} at {args.baud} baud" + (f", profile {profile.airframe}" if profile.modes else
              ", no profile (stray peaks only)") + (f", capture {args.capture}" if capture else ""), flush=True)
    session = Session(engine, link)
    stop = threading.Event()
    old = signal.signal(signal.SIGTERM, lambda *a: stop.set())
    end = time.monotonic() + args.duration if args.duration else None
    device_seen = False
    capture_failed = None
    try:
        while not stop.is_set() and (end is None or time.monotonic() < end):
            events = session.pump(timeout=0.1)
            if events:
                printer(events)
            if capture is not None and capture.error:
                printer([Notice("capture", session.assembler._last_sample_s, capture.error)])
                capture_failed = capture.error
                capture = None
            if not device_seen and engine.info is not None:
                device_seen = True
                if capture is not None:
                    capture.write_meta({"device": asdict(engine.info)})
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, old)
        link.close()
        printer(session.drain())
        printer.close()
        health = asdict(link.health)
        if link.capture is not None:
            link.capture.close({"link": health})
    if link.capture is not None and link.capture.error:
        capture_failed = link.capture.error
    s = summary(engine, health, printer, asdict(session.assembler.stats),
                {"notes": [f"capture failed: {capture_failed}"]} if capture_failed else None)
    print_summary(s, sys.stdout, args.json)
    if capture_failed:
        print(f"spinrig: {capture_failed}", file=sys.stderr)
        return 1
    return 0


def run_replay(args) -> int:
    try:
        profile = load_profile_arg(args.profile)
    except ProfileError as exc:
        return _err(str(exc))
    warn_profile(profile, bool(args.profile))
    try:
        contents = read_capture(args.file)
    except CaptureError as exc:
        return _err(str(exc))
    if profile.modes == () and contents.meta.get("profile"):
        import tomllib

        from .profile import parse_profile

        try:
            profile = parse_profile(tomllib.loads(contents.meta["profile"]), f"{args.file} (profile inside)")
        except (ProfileError, tomllib.TOMLDecodeError):
            profile = Profile()
    engine = Engine(engine_config(args), profile)
    printer = EventPrinter(as_json=args.json, events_file=Path(args.events) if args.events else None)
    if not args.json:
        cond = contents.meta.get("conditions", {})
        print(f"replaying {args.file}: recorded {contents.meta.get('start_time', '?')} from "
              f"{contents.meta.get('port', '?')}; mounting {cond.get('mounting', '?')}, props {cond.get('props', '?')}")
    cut = contents.cut_message()
    notes = [f"note: {cut}"] if cut else []
    if cut and not args.json:
        print(cut)
    replay = CaptureReplay(args.file, engine, speed=args.speed)
    for events in replay:
        printer(events)
    printer.close()
    link = dict(contents.end.get("link", {}))
    if not link:
        c = replay.decoder.counters
        link = {"bytes": c.bytes_in, "frames_ok": c.frames_ok, "crc_errors": c.crc_errors, "malformed": c.malformed}
    s = summary(engine, link, printer, asdict(replay.session.assembler.stats), {"notes": notes})
    print_summary(s, sys.stdout, args.json)
    return 0


def run_csv(args, profile: Profile) -> int:
    from .csv_input import CsvError, read_csv_items

    try:
        items = read_csv_items(args.port)
    except CsvError as exc:
        return _err(str(exc))
    engine = Engine(engine_config(args), profile)
    printer = EventPrinter(as_json=args.json, events_file=Path(args.events) if args.events else None)
    for chunk in items:
        printer(engine.feed(chunk))
    printer(engine.flush())
    printer.close()
    s = summary(engine, {}, printer, {})
    print_summary(s, sys.stdout, args.json)
    return 0
