"""Incremental, resynchronising decoder of a spinrig byte stream (``SPEC.md`` section 3.4).

``StreamDecoder.feed(chunk)`` takes bytes split anywhere and returns, in stream order, the decoded
items: a :class:`GyroBatch` for each run of consecutive GYRO_BLOCK frames (numpy arrays, no
per-sample Python work) and a :class:`Received` for every other message. It never raises on bad
input, holds at most one partial frame (``MAX_ENCODED`` bytes), and counts every outcome in
:class:`DecodeCounters`.
"""

from __future__ import annotations

from binascii import crc_hqx
from collections import deque
from dataclasses import asdict, dataclass

import numpy as np

from . import stuffing
from .constants import (
    CRC_INIT,
    GYRO_HEADER_BYTES,
    HEADER_BYTES,
    MAX_ENCODED,
    MIN_BODY,
    MessageType,
)
from .messages import DECODERS, GyroBlock, MalformedPayload, Message

_GYRO = int(MessageType.GYRO_BLOCK)
_MOTOR = int(MessageType.MOTOR_STATE)
_INFO = int(MessageType.DEVICE_INFO)
_STATUS = int(MessageType.DEVICE_STATUS)
_GYRO_FIXED = HEADER_BYTES + GYRO_HEADER_BYTES + 2  # body bytes besides the samples: 13
_COUNT_AT = HEADER_BYTES + 8  # body offset of GYRO_BLOCK.count


@dataclass
class DecodeCounters:
    """Every outcome of decoding, since the decoder was made (all plain ints)."""

    bytes_in: int = 0  #: bytes fed
    frames_ok: int = 0  #: frames that passed COBS, CRC and the payload checks
    crc_errors: int = 0
    malformed: int = 0  #: bad COBS, too short, or a payload that breaks its layout
    oversize: int = 0  #: frames longer than MAX_ENCODED before their delimiter
    unknown_type: int = 0  #: valid frames of a type this decoder does not know (skipped)
    bytes_skipped: int = 0  #: bytes of discarded frames and garbage, delimiters included
    frames_lost: int = 0  #: gaps in the frame seq counter between valid frames
    gyro_blocks: int = 0
    gyro_samples: int = 0

    def as_dict(self) -> dict[str, int]:
        return asdict(self)

    @property
    def bad_frames(self) -> int:
        return self.crc_errors + self.malformed + self.oversize


@dataclass(frozen=True, slots=True)
class Received:
    """One decoded non-gyro message with the frame seq it came in."""

    seq: int
    message: Message


@dataclass(frozen=True, slots=True, eq=False)
class GyroBatch:
    """A run of consecutive GYRO_BLOCK frames, as arrays.

    ``sample_seq``, ``t_us`` and ``counts`` have one entry per block (uint32, uint32, int64);
    ``samples`` is int16 of shape (sum(counts), 3), roll/pitch/yaw in counts.
    """

    sample_seq: np.ndarray
    t_us: np.ndarray
    counts: np.ndarray
    samples: np.ndarray

    def dps(self, dps_per_count: float) -> np.ndarray:
        """Samples in deg/s, float32, shape (n, 3)."""
        return self.samples.astype(np.float32) * np.float32(dps_per_count)

    def blocks(self) -> list[GyroBlock]:
        """The batch as individual GyroBlock messages (for tests and tools, not the hot path)."""
        out = []
        start = 0
        for seq, t, n in zip(self.sample_seq.tolist(), self.t_us.tolist(), self.counts.tolist(), strict=True):
            out.append(GyroBlock(seq, t, self.samples[start : start + n]))
            start += n
        return out

    @staticmethod
    def concatenate(batches: list[GyroBatch]) -> GyroBatch:
        if len(batches) == 1:
            return batches[0]
        return GyroBatch(
            np.concatenate([b.sample_seq for b in batches]),
            np.concatenate([b.t_us for b in batches]),
            np.concatenate([b.counts for b in batches]),
            np.concatenate([b.samples for b in batches]),
        )


@dataclass(frozen=True, slots=True, eq=False)
class MotorBatch:
    """Consecutive MOTOR_STATE frames as arrays (only from a decoder made with ``merge=True``).

    ``t_us`` (m,) uint32 device time; ``erpm`` (m, motors) uint32 electrical RPM; ``throttle``
    (m, motors) uint16 in 0.01 %; ``flags`` (m, motors) uint8 (bit 0: telemetry valid).
    """

    t_us: np.ndarray
    erpm: np.ndarray
    throttle: np.ndarray
    flags: np.ndarray

    def __len__(self) -> int:
        return int(self.t_us.shape[0])


def _motor_run(bodies: list[bytes], length: int) -> MotorBatch:
    k = len(bodies)
    motors = (length - 9) // 7
    arr = np.frombuffer(b"".join(bodies), dtype=np.uint8).reshape(k, length)
    t_us = np.ascontiguousarray(arr[:, 2:6]).view("<u4").reshape(k)
    ent = arr[:, 7 : 7 + 7 * motors].reshape(k, motors, 7)
    erpm = np.ascontiguousarray(ent[:, :, 0:4]).view("<u4").reshape(k, motors)
    thr = np.ascontiguousarray(ent[:, :, 4:6]).view("<u2").reshape(k, motors)
    flags = ent[:, :, 6].copy()
    return MotorBatch(t_us, erpm, thr, flags)


def motor_batches_from_bodies(bodies: list[bytes]) -> list[MotorBatch]:
    """One MotorBatch per run of equal-length MOTOR_STATE bodies (the motor count seldom changes)."""
    out = []
    start = 0
    for i in range(1, len(bodies) + 1):
        if i == len(bodies) or len(bodies[i]) != len(bodies[start]):
            out.append(_motor_run(bodies[start:i], len(bodies[start])))
            start = i
    return out


def _equal_length_run(bodies: list[bytes], length: int) -> GyroBatch:
    k = len(bodies)
    arr = np.frombuffer(b"".join(bodies), dtype=np.uint8).reshape(k, length)
    seq = np.ascontiguousarray(arr[:, 2:6]).view("<u4").reshape(k)
    t_us = np.ascontiguousarray(arr[:, 6:10]).view("<u4").reshape(k)
    counts = np.full(k, (length - _GYRO_FIXED) // 6, dtype=np.int64)
    samples = np.ascontiguousarray(arr[:, _COUNT_AT + 1 : length - 2]).view("<i2").reshape(-1, 3)
    return GyroBatch(seq, t_us, counts, samples)


def gyro_batch_from_bodies(bodies: list[bytes]) -> GyroBatch:
    """Arrays of checked GYRO_BLOCK bodies (type, seq, payload, CRC), in order."""
    lengths = [len(b) for b in bodies]
    first = lengths[0]
    if lengths.count(first) == len(lengths):
        return _equal_length_run(bodies, first)
    runs = []
    start = 0
    for i in range(1, len(bodies) + 1):
        if i == len(bodies) or lengths[i] != lengths[start]:
            runs.append(_equal_length_run(bodies[start:i], lengths[start]))
            start = i
    return GyroBatch.concatenate(runs)


class StreamDecoder:
    """Bytes in, typed messages out; see the module docstring.

    Parameters
    ----------
    known_types:
        Type codes to decode; others count as ``unknown_type``. Defaults to every v1 type.
    """

    def __init__(self, known_types: set[int] | None = None, merge: bool = False):
        #: merge=True (the host's live path): within one feed, every run of frames between two
        #: DEVICE_INFO messages (or a DEVICE_STATUS naming a new boot) comes out as its other
        #: messages (Received), then one MotorBatch per motor count,
        #: then one GyroBatch. A device sends in time order, so every motor state up to a gyro
        #: sample's time is known before that sample is (SPEC 4.3); merging keeps per-frame Python
        #: work off the hot path.
        self.merge = merge
        self.counters = DecodeCounters()
        self._tail = b""
        self._discarding = False
        self._last_seq = -1
        self._boot_id: int | None = None
        self._decoders = {t: f for t, f in DECODERS.items() if known_types is None or t in known_types}
        #: (type, seq, reason) of recent frames with a valid CRC but a bad payload, newest last;
        #: a device answers these with COMMAND_OUTCOME MALFORMED. Bounded; the consumer may clear it.
        self.rejected_payloads: deque[tuple[int, int, str]] = deque(maxlen=64)

    @property
    def buffered(self) -> int:
        """Bytes held waiting for a delimiter (never more than MAX_ENCODED)."""
        return len(self._tail)

    def reset(self) -> None:
        """Forget any partial frame and the frame-seq history (after a reconnect)."""
        self._tail = b""
        self._discarding = False
        self._last_seq = -1

    def feed(self, data: bytes) -> list[GyroBatch | Received]:
        c = self.counters
        c.bytes_in += len(data)
        buf = self._tail + bytes(data) if self._tail else bytes(data)
        parts = buf.split(b"\x00")
        tail = parts.pop()
        if self._discarding:
            if parts:  # the oversize frame ends at the first delimiter of this chunk
                c.bytes_skipped += len(parts[0]) + 1
                parts[0] = b""
                self._discarding = False
            else:
                c.bytes_skipped += len(tail)
                tail = b""
        if len(tail) > MAX_ENCODED:
            c.oversize += 1
            c.bytes_skipped += len(tail)
            tail = b""
            self._discarding = True
        self._tail = tail

        out: list = []
        gyro: list[bytes] = []
        motor: list[bytes] = []
        merge = self.merge
        decode = stuffing.decode
        decode_error = stuffing.DecodeError
        decoders = self._decoders
        last_seq = self._last_seq
        lost = 0
        ok = 0
        for p in parts:
            if not p:
                continue  # idle delimiter
            n = len(p)
            if n > MAX_ENCODED:
                c.oversize += 1
                c.bytes_skipped += n + 1
                continue
            try:
                body = decode(p)
            except decode_error:
                c.malformed += 1
                c.bytes_skipped += n + 1
                continue
            blen = len(body)
            if blen < MIN_BODY:
                c.malformed += 1
                c.bytes_skipped += n + 1
                continue
            if crc_hqx(body, CRC_INIT):
                c.crc_errors += 1
                c.bytes_skipped += n + 1
                continue
            t = body[0]
            if t == _GYRO:
                count = body[_COUNT_AT] if blen >= _GYRO_FIXED else 0  # a count byte, not a CRC byte
                if count == 0 or blen != _GYRO_FIXED + 6 * count:
                    c.malformed += 1
                    c.bytes_skipped += n + 1
                    self.rejected_payloads.append((t, body[1], f"GYRO_BLOCK.count={count} in {blen - 4} bytes"))
                    continue
                gyro.append(body)
            elif merge and t == _MOTOR and _MOTOR in decoders:
                mcount = body[6] if blen >= 9 else 255  # the count byte (payload offset 4), not a CRC byte
                if mcount > 8 or blen != 9 + 7 * mcount:
                    c.malformed += 1
                    c.bytes_skipped += n + 1
                    self.rejected_payloads.append((t, body[1], f"MOTOR_STATE.count={mcount} in {blen - 4} bytes"))
                    continue
                motor.append(body)
            else:
                dec = decoders.get(t)
                if dec is None:
                    c.unknown_type += 1  # a valid frame of a later version: skipped, but counted in seq
                    s = body[1]
                    if last_seq >= 0:
                        lost += (s - last_seq - 1) & 0xFF
                    last_seq = s
                    continue
                try:
                    msg = dec(body[HEADER_BYTES:-2])
                except (MalformedPayload, ValueError, UnicodeError) as exc:
                    c.malformed += 1
                    c.bytes_skipped += n + 1
                    self.rejected_payloads.append((t, body[1], str(exc)))
                    continue
                if merge:
                    # a run ends at DEVICE_INFO and at a DEVICE_STATUS from another boot, so what
                    # the old boot sent is never reordered after the news of the new one
                    if t == _INFO or (t == _STATUS and self._boot_id is not None
                                      and int.from_bytes(body[6:10], "little") != self._boot_id):
                        self._flush_run(out, gyro, motor)
                        gyro, motor = [], []
                    out.append(Received(body[1], msg))
                else:
                    if gyro:
                        out.append(self._flush(gyro))
                        gyro = []
                    out.append(Received(body[1], msg))
            s = body[1]
            if t in (_INFO, _STATUS):  # a new boot restarts the frame counter (SPEC 4.1): no loss across it
                boot = int.from_bytes(body[HEADER_BYTES + (2 if t == _INFO else 4) : HEADER_BYTES + (6 if t == _INFO
                                                                                                   else 8)], "little")
                if self._boot_id is not None and boot != self._boot_id:
                    last_seq = -1
                self._boot_id = boot
            if last_seq >= 0:
                lost += (s - last_seq - 1) & 0xFF
            last_seq = s
            ok += 1
        if merge:
            self._flush_run(out, gyro, motor)
        elif gyro:
            out.append(self._flush(gyro))
        self._last_seq = last_seq
        c.frames_lost += lost
        c.frames_ok += ok
        return out

    def _flush_run(self, out: list, gyro: list[bytes], motor: list[bytes]) -> None:
        if motor:
            out.extend(motor_batches_from_bodies(motor))
        if gyro:
            out.append(self._flush(gyro))

    def _flush(self, bodies: list[bytes]) -> GyroBatch:
        batch = gyro_batch_from_bodies(bodies)
        self.counters.gyro_blocks += len(bodies)
        self.counters.gyro_samples += batch.samples.shape[0]
        return batch
