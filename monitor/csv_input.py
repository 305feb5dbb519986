"""CSV from other rigs, entering the pipeline at the assembler's output.

Layout (ARCHITECTURE): a header row ``time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps`` then
optional ``rpm_1,...,rpm_N`` (mechanical RPM); one row per gyro sample at a constant rate. A jump
in time of more than 1.5 sample periods is a gap. Errors name the file, line and column.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

import firmware_protocol as fp

from .assembler import DeviceChange, Gap, MotorUpdate, Samples

REQUIRED = ("time_s", "gyro_roll_dps", "gyro_pitch_dps", "gyro_yaw_dps")
BLOCK = 4096


class CsvError(ValueError):
    """A CSV file that cannot be used (one line: file, line, column)."""


def read_csv(path: str | Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time_s (n,), gyro_dps (n, 3), rpm (n, motors)) from a CSV file; raises CsvError."""
    p = Path(path)
    try:
        f = open(p, newline="", encoding="utf-8")  # noqa: SIM115
    except OSError as exc:
        raise CsvError(f"{p}: cannot read: {exc.strerror or exc}") from None
    with f:
        reader = csv.reader(f)
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise CsvError(f"{p}: empty file (need a header row {','.join(REQUIRED)})") from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise CsvError(f"{p}: line 1: {exc}") from None
        if tuple(header[:4]) != REQUIRED:
            raise CsvError(f"{p}: line 1: header must start {','.join(REQUIRED)}, not {','.join(header[:4])}")
        motors = header[4:]
        for j, name in enumerate(motors):
            if name != f"rpm_{j + 1}":
                raise CsvError(f"{p}: line 1, column {j + 5}: expected rpm_{j + 1}, not {name!r}")
        width = len(header)
        rows = []
        try:
            for line_no, row in enumerate(reader, start=2):
                if not row or all(not c.strip() for c in row):
                    continue
                if len(row) != width:
                    raise CsvError(f"{p}: line {line_no}: {len(row)} columns, the header has {width}")
                vals = []
                for col, cell in enumerate(row):
                    try:
                        v = float(cell)
                    except ValueError:
                        where = f"{p}: line {line_no}, column {col + 1} ({header[col]})"
                        raise CsvError(f"{where}: {cell!r} is not a number") from None
                    if not math.isfinite(v):
                        where = f"{p}: line {line_no}, column {col + 1} ({header[col]})"
                        raise CsvError(f"{where}: {cell!r} is not finite")
                    vals.append(v)
                rows.append(vals)
        except (csv.Error, UnicodeDecodeError) as exc:
            raise CsvError(f"{p}: line {reader.line_num}: {exc}") from None
    if len(rows) < 16:
        raise CsvError(f"{p}: {len(rows)} data rows; need at least 16")
    a = np.array(rows)
    t = a[:, 0]
    dt = np.diff(t)
    if np.any(dt <= 0):
        bad = int(np.flatnonzero(dt <= 0)[0]) + 3
        raise CsvError(f"{p}: line {bad}: time_s does not increase")
    return t, a[:, 1:4].astype(np.float32), a[:, 4:]


def read_csv_items(path: str | Path) -> list[list]:
    """Assembler-level items of a CSV file, in chunks of about 4096 samples."""
    t, gyro, rpm = read_csv(path)
    dt = float(np.median(np.diff(t)))
    fs = 1.0 / dt
    motors = rpm.shape[1]
    info = fp.DeviceInfo(gyro_rate_mhz=max(1, int(round(fs * 1000))), motor_count=motors, pole_pairs=1,
                         motor_state_rate_hz=min(65535, int(round(fs))), board_id="CSV")
    breaks = np.flatnonzero(np.diff(t) > 1.5 * dt) + 1
    out: list[list] = [[DeviceChange(info, False)]]
    seg_edges = [0, *breaks.tolist(), len(t)]
    for seg, (a, b) in enumerate(zip(seg_edges[:-1], seg_edges[1:], strict=True)):
        if seg:
            out.append([Gap(float(t[a - 1]), "time jump")])
        for s0 in range(a, b, BLOCK):
            s1 = min(b, s0 + BLOCK)
            chunk = []
            if motors:
                chunk.append(MotorUpdate(t[s0:s1], rpm[s0:s1], np.zeros((s1 - s0, motors)),
                                         np.ones((s1 - s0, motors), bool)))
            chunk.append(Samples(seg, s0 - a, float(t[s0]), fs, gyro[s0:s1]))
            out.append(chunk)
    return out
