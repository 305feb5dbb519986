"""``spinrig demo``: what exists of the pipeline, run live on invented data.

Today it streams protocol frames (gyro blocks of a made-up 8 kHz signal, motor state, status)
through a pyserial ``loop://`` port with 0.05 % of bytes corrupted, decodes them live with the
streaming decoder and prints the link counters twice a second. Still to come: the simulated
airframe, live spectra and crossing warnings, and the terminal screen.
"""

from __future__ import annotations

import time

import numpy as np
import serial

import firmware_protocol as fp

RATE_HZ = 8000
BLOCK = 16


def _frames(seconds: float, rng: np.random.Generator) -> list[bytes]:
    """Frames of an invented signal: two tones and noise at 8 kHz, 16-sample blocks."""
    info = fp.DeviceInfo(boot_id=int(rng.integers(1, 2**32)), board_id="DEMO-LOOP")
    n = int(seconds * RATE_HZ) // BLOCK * BLOCK
    t = np.arange(n) / RATE_HZ
    dps = np.stack([40 * np.sin(2 * np.pi * 180 * t), 25 * np.sin(2 * np.pi * 360 * t), np.zeros(n)], axis=1)
    counts = np.clip(np.round((dps + rng.normal(0, 1.0, dps.shape)) * 16.4), -32768, 32767).astype(np.int16)
    frames = [fp.encode_frame(info, 0)]
    seq = 1
    for k in range(0, n, BLOCK):
        frames.append(fp.encode_frame(fp.GyroBlock(k, int(t[k] * 1e6) & 0xFFFFFFFF, counts[k : k + BLOCK]), seq & 0xFF))
        seq += 1
        if k % (RATE_HZ // 500) == 0:
            motors = tuple(fp.MotorEntry(75_600, 4000, 1) for _ in range(4))
            frames.append(fp.encode_frame(fp.MotorState(int(t[k] * 1e6), motors), seq & 0xFF))
            seq += 1
    return frames


def run(args) -> int:
    rng = np.random.default_rng(7)
    seconds = max(0.5, float(args.seconds))
    print("spinrig demo: protocol stage. Frames of an invented 8 kHz gyro stream go through a")
    print("pyserial loop:// port with 0.05 % of bytes corrupted and are decoded live.")
    print("Still to come: the simulated airframe, live spectra, crossing warnings and the screen.\n")
    frames = _frames(seconds, rng)
    port = serial.serial_for_url("loop://", timeout=0.05)
    dec = fp.StreamDecoder()
    samples = 0
    start = time.monotonic()
    next_print = start + 0.5
    chunk = []
    per_tick = max(1, len(frames) // int(seconds * 50))
    for i, frame in enumerate(frames):
        chunk.append(frame)
        if len(chunk) < per_tick and i + 1 < len(frames):
            continue
        data = bytearray(b"".join(chunk))
        chunk.clear()
        hits = rng.random(len(data)) < 0.0005
        for j in np.flatnonzero(hits):
            data[j] ^= 1 << int(rng.integers(0, 8))
        port.write(bytes(data))
        got = port.read(len(data))
        for item in dec.feed(got):
            if isinstance(item, fp.GyroBatch):
                samples += item.samples.shape[0]
        # pace to real time
        target = start + (i + 1) / len(frames) * seconds
        time.sleep(max(0.0, target - time.monotonic()))
        if time.monotonic() >= next_print or i + 1 == len(frames):
            next_print += 0.5
            c = dec.counters
            print(
                f"t={time.monotonic() - start:4.1f} s  bytes={c.bytes_in:8d}  frames ok={c.frames_ok:6d}  "
                f"crc errors={c.crc_errors:4d}  malformed={c.malformed:3d}  lost frames={c.frames_lost:4d}  "
                f"samples={samples:7d}"
            )
    port.close()
    print("\ndemo finished: every corrupted frame was counted and skipped; the stream went on.")
    return 0
