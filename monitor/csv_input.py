"""CSV from other rigs, entering the pipeline at the assembler's output.

Layout (ARCHITECTURE): a header row ``time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps`` then
optional ``rpm_1,...,rpm_N`` (mechanical RPM); one row per gyro sample at a constant rate, which is
fitted from all the time stamps (:func:`sample_rate`). A jump in time of more than 1.5 sample
periods is a gap; a change of rate is refused. Errors name the file, line and column.
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


def sample_rate(t: np.ndarray, path: str | Path = "<csv>") -> tuple[float, np.ndarray]:
    """The sample rate (Hz) of a CSV's time column and the indices where its gaps start.

    The rate comes from all the time stamps at once: a least-squares line of time against sample
    index over each run between gaps (the runs share one slope), so stamps rounded to the
    microsecond keep frequencies within 1e-4 relative. A gap is a step of more than 1.5 sample
    periods. A file whose rate changes part way is refused with one line naming the line where it
    changes.
    """
    dt = np.diff(t)
    step = float(np.median(dt[:256]))  # the file's opening rate: a later change is measured against it
    # a run of 8 or more steps in a row that all differ from the usual step by a quarter or more is
    # a change of rate (a gap is one long step, jitter is scattered)
    off = np.abs(dt - step) > 0.25 * step
    if off.any():
        starts = np.flatnonzero(off & ~np.concatenate([[False], off[:-1]]))
        ends = np.flatnonzero(off & ~np.concatenate([off[1:], [False]]))
        long = np.flatnonzero(ends - starts + 1 >= 8)
        if long.size:
            a = int(starts[long[0]])
            local = float(np.median(dt[a : a + 64]))
            raise CsvError(f"{path}: line {a + 3}: the sample rate changes from {1 / step:.6g} Hz to about "
                           f"{1 / local:.6g} Hz; spinrig needs one rate per file (split it there)")
    breaks = np.flatnonzero(dt > 1.5 * step) + 1
    edges = [0, *breaks.tolist(), len(t)]
    # one slope shared by all runs: regress time on the index within each run, runs centred apart
    num = den = 0.0
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        if b - a < 2:
            continue
        i = np.arange(b - a, dtype=float)
        i -= i.mean()
        num += float(i @ (t[a:b] - t[a:b].mean()))
        den += float(i @ i)
    period = num / den if den > 0 else step
    # stamps that stray from the common line by more than half a period (a clock that drifts, or
    # a rate change too gradual for the step test) are refused too
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        if b - a < 3:
            continue
        i = np.arange(b - a, dtype=float)
        res = t[a:b] - t[a:b].mean() - (i - i.mean()) * period
        worst = int(np.argmax(np.abs(res)))
        if abs(res[worst]) > 0.5 * period:
            raise CsvError(f"{path}: line {a + worst + 2}: time_s strays {abs(res[worst]) / period:.1f} sample "
                           f"periods from a constant rate of {1 / period:.6g} Hz; spinrig needs one rate per file")
    return 1.0 / period, breaks


def read_csv_items(path: str | Path) -> list[list]:
    """Assembler-level items of a CSV file, in chunks of about 4096 samples."""
    t, gyro, rpm = read_csv(path)
    fs, breaks = sample_rate(t, path)
    motors = rpm.shape[1]
    info = fp.DeviceInfo(gyro_rate_mhz=max(1, int(round(fs * 1000))), motor_count=motors, pole_pairs=1,
                         motor_state_rate_hz=min(65535, int(round(fs))), board_id="CSV")
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
            chunk.append(Samples(seg, s0 - a, float(t[a]) + (s0 - a) / fs, fs, gyro[s0:s1]))
            out.append(chunk)
    return out
