"""`spinrig tap FILE`: frame modes from the taps in a capture or CSV (I/O around
:mod:`monitor.analysis.taps`)."""

from __future__ import annotations

import datetime
import json
import sys
from pathlib import Path

import numpy as np

from .analysis.taps import AXES, analyse_taps, combine
from .profile import Mode, Profile, ProfileError, load_profile


def _record(path: str) -> tuple[np.ndarray, float, float | None]:
    """(gyro (n, 3) deg/s, sample rate Hz, full scale deg/s or None) of a capture or CSV."""
    if path.lower().endswith(".csv"):
        from .csv_input import read_csv, sample_rate

        t, gyro, _ = read_csv(path)
        fs, _ = sample_rate(t, path)
        return gyro, fs, None
    from .export import decode_capture

    d = decode_capture(path)
    info = d["device"]
    if info is None or d["gyro_dps"].shape[0] == 0:
        raise ValueError(f"{path}: no gyro samples (the capture holds no described device data)")
    if d["cut"]:
        print(f"spinrig: note: {d['cut']}", file=sys.stderr)
    return d["gyro_dps"], float(info.sample_rate_hz), float(info.full_scale_dps) or None


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


def run(args) -> int:
    src = args.source
    if not (src.lower().endswith(".csv") or src.lower().endswith(".spinrec") or Path(src).is_file()):
        print(f"spinrig: {src}: tap works on a capture (.spinrec) or a CSV file; record one with "
              f"`spinrig watch PORT --capture taps.spinrec` while you tap the frame (motors stopped)", file=sys.stderr)
        return 2
    try:
        x, fs, fsd = _record(src)
    except (ValueError, OSError) as exc:
        print(f"spinrig: {exc}", file=sys.stderr)
        return 2
    taps = analyse_taps(x, fs, fsd)
    if args.taps:
        taps = taps[: args.taps]
    modes = combine(taps)
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
    if args.profile and modes:
        try:
            said = _write_profile(Path(args.profile), modes, src, args.yes)
            print(said, file=sys.stderr if args.json else sys.stdout)
        except ValueError as exc:
            print(f"spinrig: {exc}", file=sys.stderr)
            return 2
    return 0 if modes else 1


__all__ = ["run", "AXES"]
