"""Decode throughput: the streaming decoder against a straightforward one, in the same run.

Traffic: 16-sample GYRO_BLOCK frames (111 bytes each on the wire). "Whole decode" = split at
delimiters, COBS, CRC, and samples to a float32 array in deg/s. The straightforward decoder uses
pure-Python COBS and per-sample ``struct.unpack``; a middle variant keeps pure-Python COBS but
batches the samples, to show where the time goes.
"""

from __future__ import annotations

import struct
from binascii import crc_hqx

import numpy as np

import firmware_protocol as fp
from firmware_protocol import stuffing

from .common import median_time, report

DPS = 10 / 164


def make_traffic(megabytes: float, seed: int = 1) -> bytes:
    rng = np.random.default_rng(seed)
    n_frames = int(megabytes * 1e6 / 111)
    samples = rng.integers(-20000, 20000, size=(n_frames, 16, 3)).astype(np.int16)
    return b"".join(fp.encode_frame(fp.GyroBlock(16 * i, 2000 * i, samples[i]), i) for i in range(n_frames))


def decode_streaming(data: bytes, chunk: int = 4096) -> np.ndarray:
    dec = fp.StreamDecoder()
    out = []
    for k in range(0, len(data), chunk):
        for item in dec.feed(data[k : k + chunk]):
            if isinstance(item, fp.GyroBatch):
                out.append(item.dps(DPS))
    return np.concatenate(out)


def decode_straightforward(data: bytes, chunk: int = 4096) -> np.ndarray:
    """Per-frame pure-Python COBS, per-sample struct.unpack, a Python list of floats."""
    tail = b""
    values: list[tuple[float, float, float]] = []
    for k in range(0, len(data), chunk):
        parts = (tail + data[k : k + chunk]).split(b"\x00")
        tail = parts.pop()
        for p in parts:
            if not p:
                continue
            try:
                body = stuffing.decode_reference(p)
            except stuffing.DecodeError:
                continue
            if len(body) < 4 or crc_hqx(body, 0xFFFF) != 0 or body[0] != 0x02:
                continue
            count = body[10]
            for i in range(count):
                r, q, y = struct.unpack_from("<hhh", body, 11 + 6 * i)
                values.append((r * DPS, q * DPS, y * DPS))
    return np.array(values, dtype=np.float32)


def decode_python_cobs_batched(data: bytes) -> np.ndarray:
    bodies = []
    for p in data.split(b"\x00")[:-1]:  # the last piece is an unterminated tail (or empty)
        if p:
            body = stuffing.decode_reference(p)
            if crc_hqx(body, 0xFFFF) == 0:
                bodies.append(body)
    from firmware_protocol.decoder import gyro_batch_from_bodies

    return gyro_batch_from_bodies(bodies).dps(DPS)


def main(quick: bool = False) -> dict:
    data = make_traffic(4.0 if quick else 16.0)
    small = data[: len(data) // 8]
    ref = decode_straightforward(small)
    np.testing.assert_allclose(decode_streaming(small), ref, rtol=1e-6)
    np.testing.assert_allclose(decode_python_cobs_batched(small), ref, rtol=1e-6)
    t_fast = median_time(lambda: decode_streaming(data))
    t_mid = median_time(lambda: decode_python_cobs_batched(small)) * 8
    t_slow = median_time(lambda: decode_straightforward(small), repeat=3) * 8
    mb = len(data) / 1e6
    res = {
        "streaming_MBps": mb / t_fast,
        "python_cobs_batched_MBps": mb / t_mid,
        "straightforward_MBps": mb / t_slow,
        "ratio": t_slow / t_fast,
    }
    report(
        "decode: 16-sample GYRO_BLOCK traffic to float32 deg/s (median of runs, one core)",
        [
            ("traffic", f"{mb:.1f} MB, {len(data) // 111} frames"),
            ("streaming decoder (C COBS, batched numpy)", f"{res['streaming_MBps']:.1f} MB/s"),
            ("pure-Python COBS, batched numpy", f"{res['python_cobs_batched_MBps']:.1f} MB/s"),
            ("straightforward (pure-Python COBS, per-sample struct)", f"{res['straightforward_MBps']:.1f} MB/s"),
            ("ratio streaming / straightforward", f"{res['ratio']:.1f}x"),
            ("vs USB full speed (1.216 MB/s)", f"{res['streaming_MBps'] / 1.216:.0f}x"),
            ("vs 921600 baud (0.09216 MB/s)", f"{res['streaming_MBps'] / 0.09216:.0f}x"),
        ],
    )
    return res


if __name__ == "__main__":
    main()
