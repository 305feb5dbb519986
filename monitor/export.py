"""``spinrig export``: a capture's samples and motor speeds as CSV (the import layout) or NPZ."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

import firmware_protocol as fp

from .assembler import Assembler, MotorUpdate, Samples
from .capture import read_capture
from .session import device_items


def decode_capture(path) -> dict:
    """Every sample (session time, deg/s) and motor reading of a capture."""
    contents = read_capture(path)
    dec = fp.StreamDecoder(merge=True)
    asm = Assembler()
    t_parts, g_parts, mt, mr, mthr = [], [], [], [], []
    for ch in contents.chunks:
        if ch.kind == "G":
            items = asm.mark_reconnect()
            dec.reset()
        elif ch.kind == "X":
            dec.reset()
            continue
        elif ch.kind == "I":
            items = asm.feed(device_items(ch.payload, asm), ch.host_s)
        else:
            items = asm.feed(dec.feed(ch.payload), ch.host_s)
        for it in items:
            if isinstance(it, Samples):
                if it.valid is not None:  # a filled hole: the export keeps real samples only
                    continue
                n = it.dps.shape[0]
                t_parts.append(it.t0_s + np.arange(n) / it.fs_hz)
                g_parts.append(it.dps)
            elif isinstance(it, MotorUpdate):
                mt.append(it.t_s)
                mr.append(it.rpm)
                mthr.append(it.throttle)
    motors = asm.info.motor_count if asm.info else 0
    return {
        "time_s": np.concatenate(t_parts) if t_parts else np.zeros(0),
        "gyro_dps": np.concatenate(g_parts) if g_parts else np.zeros((0, 3), np.float32),
        "rpm_time_s": np.concatenate(mt) if mt else np.zeros(0),
        "rpm": np.concatenate(mr) if mr else np.zeros((0, motors)),
        "throttle": np.concatenate(mthr) if mthr else np.zeros((0, motors)),
        "meta": contents.meta,
        "device": asm.info,
        "cut": contents.cut_message(),
    }


class NoSamplesError(ValueError):
    """A capture that holds no gyro sample that can be decoded (nothing is written)."""


def rpm_at(sample_t: np.ndarray, rpm_t: np.ndarray, rpm: np.ndarray) -> np.ndarray:
    """The latest motor reading at each sample time (the first reading before it arrives)."""
    if rpm_t.size == 0:
        return np.full((sample_t.size, rpm.shape[1] if rpm.ndim == 2 else 0), np.nan)
    order = np.argsort(rpm_t, kind="stable")
    rt, rv = rpm_t[order], rpm[order]
    idx = np.searchsorted(rt, sample_t, side="right") - 1
    # before the first reading, hold the first reading (the CSV layout has no empty cells)
    return rv[np.clip(idx, 0, len(rt) - 1)]


def export(path, fmt: str, out_path: str | None = None) -> tuple[Path, str | None]:
    """Write the export atomically (a temporary file beside the target, renamed over it when
    complete: a full disk leaves no partial file). Returns (target, what the capture could not
    give, or None)."""
    d = decode_capture(path)
    if d["time_s"].size == 0:
        why = d["cut"] or "no DEVICE_INFO and no gyro block in it"
        raise NoSamplesError(f"{path}: no gyro samples could be decoded ({why}); nothing written")
    src = Path(path)
    target = Path(out_path) if out_path else src.with_suffix(".csv" if fmt == "csv" else ".npz")
    tmp = target.with_name(target.name + ".part")
    try:
        if fmt == "npz":
            with open(tmp, "wb") as f:
                np.savez_compressed(f, time_s=d["time_s"], gyro_dps=d["gyro_dps"], rpm_time_s=d["rpm_time_s"],
                                    rpm=d["rpm"], throttle=d["throttle"], meta=json.dumps(d["meta"], default=str))
                f.flush()
                os.fsync(f.fileno())
        else:
            rpm = rpm_at(d["time_s"], d["rpm_time_s"], d["rpm"])
            motors = rpm.shape[1]
            header = "time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps" + "".join(
                f",rpm_{k + 1}" for k in range(motors))
            if d["time_s"].size:
                table = np.column_stack([d["time_s"], d["gyro_dps"].astype(np.float64), rpm])
            else:
                table = np.zeros((0, 4 + motors))
            fmt_cols = ["%.6f", "%.4f", "%.4f", "%.4f"] + ["%.1f"] * motors
            with open(tmp, "w", encoding="utf-8") as f:
                f.write(header + "\n")
                np.savetxt(f, table, fmt=fmt_cols, delimiter=",")
                f.flush()
                os.fsync(f.fileno())
        tmp.replace(target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target, d["cut"]
