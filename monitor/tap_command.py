"""`spinrig tap FILE`: frame modes from the taps in a capture or CSV (I/O around
:mod:`monitor.analysis.taps`)."""

from __future__ import annotations

import datetime
import json
import sys
from pathlib import Path

import numpy as np

from .analysis.taps import AXES, analyse_taps, find_taps, identify_modes
from .profile import Mode, Profile, ProfileError, load_profile


def _record(path: str) -> tuple[np.ndarray, float, float | None]:
    """(gyro (n, 3) deg/s, sample rate Hz, full scale deg/s or None) of a capture or CSV."""
    from .analysis.record import load_record

    rec = load_record(path)
    for note in rec.notes:
        print(f"spinrig: note: {note}", file=sys.stderr)
    return rec.gyro_dps, rec.fs_hz, rec.full_scale_dps


def _write_profile(path: Path, modes, source: str, yes: bool) -> str:
    old = None
    if path.exists():
        try:
            old = load_profile(path)
        except ProfileError as exc:
            raise ValueError(f"{exc}; not overwritten") from None
        if not yes:
            if not sys.stdin.isatty():
                raise ValueError(f"{path} exists: add --yes to replace its modes (no terminal to ask)")
            answer = input(f"{path} exists with {len(old.modes)} modes: replace them with {len(modes)}? [y/N] ")
            if answer.strip().lower() not in ("y", "yes"):
                return f"{path} left as it was"
    base = old or Profile(path.stem)
    new = Profile(base.airframe, base.blades, base.mounting,
                  tuple(Mode(f"mode {i + 1} ({m.axis})", round(m.freq_hz, 2), round(m.damping_ratio, 5), m.axis)
                        for i, m in enumerate(modes)))
    new.save(path)
    stamp = datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    text = path.read_text(encoding="utf-8")
    path.write_text(f"# modes from `spinrig tap {source}` on {stamp}\n" + text, encoding="utf-8")
    return f"wrote {len(modes)} modes to {path}"


LIVE_WAIT_S = 30.0  #: how long one prompt waits for its tap (wall clock: a person is tapping)
KEEP_S = 20.0  #: samples kept while waiting (bounded memory)
AFTER_S = 0.75  #: stream time a tap's decay needs after it before it is judged


def live_taps(port: str, baud: int, n: int, out=sys.stdout) -> tuple[list, float]:
    """A guided tap session on a live port: check the motors are still, ask for each tap, judge
    each decay as it is caught. On ``sim://`` ports spinrig taps the simulated frame itself.
    Returns (the usable and unusable taps, in order, the sample rate)."""
    import queue as _queue
    import time

    import firmware_protocol as fp

    from .assembler import Assembler, DeviceChange, MotorUpdate, Samples
    from .link import Link, LinkMessage

    link = Link(port, baud)
    link.start()
    simulated = port.startswith("sim://")
    asm = Assembler()
    chunks: list[np.ndarray] = []
    kept = 0
    fs = 0.0
    fsd = None
    total = 0  #: samples received (the live session's own sample clock)
    moving = None
    found = []
    try:
        def pump(timeout=0.1):
            nonlocal kept, fs, fsd, total, moving
            try:
                entry = link.queue.get(timeout=timeout)
            except _queue.Empty:
                return
            if isinstance(entry, LinkMessage):
                if entry.kind in ("hint", "disconnected", "reconnected", "reboot"):
                    print(f"  link: {entry.text}", file=out)
                return
            now, items = entry
            for o in asm.feed(items, host_s=now):
                if isinstance(o, DeviceChange):
                    fs, fsd = float(o.info.sample_rate_hz), float(o.info.full_scale_dps) or None
                elif isinstance(o, MotorUpdate):
                    top = np.nanmax(o.rpm, axis=1) if o.rpm.size else np.zeros(0)
                    moving = float(top.max()) if top.size else moving
                elif isinstance(o, Samples) and o.valid is None:
                    chunks.append(o.dps.astype(float))
                    kept += o.dps.shape[0]
                    total += o.dps.shape[0]
                    while chunks and fs and kept - chunks[0].shape[0] > KEEP_S * fs:
                        kept -= chunks.pop(0).shape[0]

        start = time.monotonic()
        while (not fs or moving is None or kept < fs) and time.monotonic() - start < 15.0:
            pump()
        if not fs:
            raise RuntimeError(f"{port}: no gyro data within 15 s ({link.hint()})")
        if moving is not None and moving > 100.0:
            raise RuntimeError(f"{port}: a motor turns at {moving:.0f} RPM: stop the motors before a tap test")
        print(f"{port}: gyro {fs:g} Hz, motors still. Tap the frame firmly and once, near an arm tip; "
              f"wait for each answer.", file=out)
        for i in range(1, n + 1):
            motor = (i - 1) % max(1, asm.info.motor_count if asm.info else 4) + 1
            print(f"  tap the frame near the tip of arm {motor}, {i} of {n}", file=out, flush=True)
            if simulated:
                link.send(fp.SimTap(motor, 200))
            asked_at, asked_n = time.monotonic(), total
            caught = None
            while time.monotonic() - asked_at < LIVE_WAIT_S and caught is None:
                pump()
                while not link.queue.empty():  # keep up with the stream before looking
                    pump(0.0)
                if not chunks or total - asked_n < AFTER_S * fs:
                    continue
                x = np.concatenate(chunks)
                first = total - x.shape[0]  # sample number of x[0]
                onsets = [int(i) for i in find_taps(x, fs) if first + i > asked_n - 0.05 * fs]
                if onsets and total - (first + onsets[0]) >= AFTER_S * fs:
                    lo = max(0, onsets[0] - int(0.2 * fs))  # the stillness before it, for the offset
                    judged = analyse_taps(x[lo:], fs, fsd)
                    caught = judged[0] if judged else None
                    if caught is not None:
                        caught.t_s += (first + lo) / fs  # on the session's sample clock
            if caught is None:
                print(f"    no tap seen in {LIVE_WAIT_S:.0f} s", file=out)
                continue
            caught.index = i
            found.append(caught)
            if caught.usable:
                listed = ", ".join(f"{p.freq_hz:.1f} Hz" for p in caught.poles)
                print(f"    caught: {len(caught.poles)} modes ({listed})", file=out, flush=True)
            else:
                print(f"    not usable: {caught.why}", file=out, flush=True)
            # the decay must not be seen again as the next tap: keep only what came after it
            chunks.clear()
            kept = 0
    finally:
        link.close()
    return found, fs


def _is_file(src: str) -> bool:
    return src.lower().endswith((".csv", ".spinrec")) or Path(src).is_file()


def run(args) -> int:
    src = args.source
    if _is_file(src):
        try:
            x, fs, fsd = _record(src)
        except (ValueError, OSError) as exc:
            print(f"spinrig: {exc}", file=sys.stderr)
            return 2
        taps = analyse_taps(x, fs, fsd)
    else:
        import serial

        try:
            taps, fs = live_taps(src, args.baud, args.taps or 5, out=sys.stderr if args.json else sys.stdout)
        except (RuntimeError, serial.SerialException, OSError) as exc:
            print(f"spinrig: {exc}", file=sys.stderr)
            return 1
    taps = list(taps)
    if args.taps:
        taps = taps[: args.taps]
    taps, modes = identify_modes(taps)
    if args.json:
        print(json.dumps({"kind": "tap", "source": src, "taps": [t.as_dict() for t in taps],
                          "modes": [m.as_dict() for m in modes]}, sort_keys=True))
    else:
        print(f"{src}: {len(taps)} taps found, {sum(t.usable for t in taps)} usable")
        for t in taps:
            found = ", ".join(f"{p.freq_hz:.1f} Hz" for p in t.poles)
            print(f"  tap {t.index} at {t.t_s:7.2f} s: " + (f"{len(t.poles)} modes ({found})" if t.usable
                                                           else f"not usable: {t.why}"))
        if modes:
            print("modes (mean over the taps that found each; sd = spread between taps):")
            print("  freq Hz    sd Hz  damping %   sd %  taps  axis   roll/pitch/yaw share  half-power check")
            for m in modes:
                share = "/".join(f"{v:.2f}" for v in m.participation)
                check = "agrees" if m.half_power_agrees else "differs or unresolved"
                print(f"  {m.freq_hz:7.2f}  {m.freq_sd_hz:7.2f}  {100 * m.damping_ratio:9.2f}  "
                      f"{100 * m.damping_sd:5.2f}  {m.taps:4d}  {m.axis:5s}  {share:20s}  {check}")
        else:
            print("no mode found in two or more taps")
    if getattr(args, "report", None):
        from .analysis.tap_report import write_tap_report

        try:
            where = write_tap_report(src, taps, modes, args.report)
            print(f"report: {where}", file=sys.stderr if args.json else sys.stdout)
        except OSError as exc:
            print(f"spinrig: {args.report}: {exc.strerror or exc}; report not complete", file=sys.stderr)
            return 1
    if args.profile and modes:
        try:
            said = _write_profile(Path(args.profile), modes, src, args.yes)
            print(said, file=sys.stderr if args.json else sys.stdout)
        except ValueError as exc:
            print(f"spinrig: {exc}", file=sys.stderr)
            return 2
    return 0 if modes else 1


__all__ = ["run", "AXES"]
