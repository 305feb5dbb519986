"""One recorded run as arrays: the gyro samples, the motor speeds and the throttle, from a capture
(``.spinrec``) or a CSV. The only I/O of the analysis; everything after it is pure numpy."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


class RecordError(ValueError):
    """A file that cannot be analysed (one line naming the file and what is missing)."""


@dataclass
class Record:
    """Samples of one run. Times in seconds of the session, gyro in deg/s, speeds in mechanical
    RPM (telemetry), throttle as a fraction 0..1 of full scale (NaN where the source has none)."""

    source: str
    fs_hz: float
    time_s: np.ndarray  #: (n,) sample times
    gyro_dps: np.ndarray  #: (n, 3) roll, pitch, yaw
    rpm_time_s: np.ndarray  #: (m,) motor reading times
    rpm: np.ndarray  #: (m, motors)
    throttle: np.ndarray  #: (m, motors), NaN when unknown
    meta: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    full_scale_dps: float | None = None  #: the gyro's range where the device declared it (captures)

    @property
    def motors(self) -> int:
        return int(self.rpm.shape[1]) if self.rpm.ndim == 2 else 0

    @property
    def duration_s(self) -> float:
        return float(self.time_s[-1] - self.time_s[0]) if self.time_s.size else 0.0


def load_record(path: str | Path) -> Record:
    """A capture or a CSV as a :class:`Record`; raises RecordError (or the readers' own one-line
    errors, which are ValueErrors)."""
    p = str(path)
    if not Path(p).exists():
        raise RecordError(f"{p}: no such file")
    if p.lower().endswith(".csv"):
        from ..csv_input import read_csv, sample_rate

        t, gyro, rpm = read_csv(p)
        fs, _ = sample_rate(t, p)
        return Record(p, float(fs), t, gyro, t.copy(), rpm, np.full(rpm.shape, np.nan), {})
    from ..export import decode_capture

    d = decode_capture(p)
    info = d["device"]
    if info is None or d["gyro_dps"].shape[0] == 0:
        why = d["cut"] or "no device description and no gyro block"
        raise RecordError(f"{p}: no gyro samples could be decoded ({why})")
    rec = Record(p, float(info.sample_rate_hz), d["time_s"], d["gyro_dps"], d["rpm_time_s"], d["rpm"],
                 d["throttle"].astype(float), d["meta"] or {}, full_scale_dps=float(info.full_scale_dps) or None)
    if d["cut"]:
        rec.notes.append(d["cut"])
    return rec
