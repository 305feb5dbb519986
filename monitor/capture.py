"""Captures (``.spinrec``): the raw byte stream of a run, lossless, with host timestamps.

Format, version 2 (all integers little-endian):

- 16-byte magic ``b"spinrig rec v2\n\x00"``;
- then chunks, appended one after another, each: the 2-byte sync ``D5 52``, ``kind`` (1 ASCII
  byte), 1 zero byte, ``length`` u32, ``host_ns`` i64 (host monotonic clock, ns since the capture
  started), ``length`` payload bytes, and a CRC-32 (ISO-HDLC, ``zlib.crc32``) u32 of the 16 bytes
  from the sync on and the payload.

Kinds: ``M`` metadata (UTF-8 JSON object: start time, port, baud, spinrig version, run
conditions, profile; later ``M`` chunks add fields), ``I`` the device's description (a DEVICE_INFO
frame as the protocol encodes it, written by the host from the newest one it received, so a
capture started mid-stream replays on its own), ``D`` bytes as read from the port, ``G`` the link
dropped and came back (JSON), ``E`` a clean end (JSON with the link counters). Unknown kinds are
skipped by readers.

Damage: a reader that meets a chunk that does not check (a bad sync, an impossible length, a
failing CRC) looks for the next sync from the byte after the bad one and takes the first chunk
there whose CRC checks; the bytes between are one *damaged range*, reported with its offsets, and
the replay treats it as a break in the byte stream (the decoder restarts, the sample counter shows
what was lost). A false sync inside a payload is rejected by its CRC (a random chunk passes with
probability 2^-32). Only the damaged chunks are lost.

The writer appends whole chunks, flushes at least every 0.5 s and ``fsync``s every 2 s. After a
crash (even ``kill -9``) the file reads up to its last complete chunk and the reader says how
many bytes it cut. A write error (a full disk) stops the capture with one clear message and
leaves the file readable.
"""

from __future__ import annotations

import json
import os
import struct
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path

MAGIC = b"spinrig rec v2\n\x00"
SYNC = b"\xd5\x52"
HEADER = struct.Struct("<2scxIq")  #: sync, kind, zero, length, host_ns
EXTENSION = ".spinrec"
CRC = struct.Struct("<I")
MAX_CHUNK = 64 * 1024 * 1024
FLUSH_S = 0.5
FLUSH_BYTES = 64 * 1024  #: the buffer is written out when it holds this much, whatever the time
SYNC_S = 2.0


class CaptureError(ValueError):
    """A capture file that cannot be read at all (one line: file and byte offset)."""


class CaptureWriter:
    def __init__(self, path: str | Path, meta: dict, clock=time.monotonic):
        self.path = Path(path)
        self.clock = clock
        self.t0 = clock()
        self.error: str | None = None
        self.bytes_written = 0
        self._buf = bytearray()
        self._last_flush = self.t0
        self._last_sync = self.t0
        self.has_device = False  #: an ``I`` chunk (the device's description) has been written
        self._f = open(self.path, "wb")  # noqa: SIM115 - kept open for the run
        self._raw(MAGIC)
        self.write_meta(meta)
        self.flush(sync=True)

    @property
    def active(self) -> bool:
        return self.error is None and self._f is not None

    def _raw(self, b: bytes) -> None:
        self._buf += b

    def _chunk(self, kind: bytes, payload: bytes, t: float | None) -> None:
        if not self.active:
            return
        t = self.clock() if t is None else t
        head = HEADER.pack(SYNC, kind, len(payload), int((t - self.t0) * 1e9))
        self._buf += head
        self._buf += payload
        self._buf += CRC.pack(zlib.crc32(payload, zlib.crc32(head)))
        if len(self._buf) >= FLUSH_BYTES:  # a fast source: write in pieces, so a full disk loses little
            self.flush(sync=False)
        self.tick(t)

    def write_meta(self, meta: dict, t: float | None = None) -> None:
        self._chunk(b"M", json.dumps(meta, sort_keys=True, default=str).encode(), t)

    def write_device(self, frame: bytes, t: float | None = None) -> None:
        """The device's description: one encoded DEVICE_INFO frame."""
        self._chunk(b"I", bytes(frame), t)
        self.has_device = True

    def write_data(self, data: bytes, t: float | None = None) -> None:
        if data:
            self._chunk(b"D", bytes(data), t)

    def write_gap(self, info: dict, t: float | None = None) -> None:
        self._chunk(b"G", json.dumps(info, sort_keys=True).encode(), t)

    def tick(self, now: float | None = None) -> None:
        """Flush if 0.5 s passed since the last flush; fsync if 2 s passed since the last sync."""
        now = self.clock() if now is None else now
        if now - self._last_flush >= FLUSH_S:
            self.flush(sync=now - self._last_sync >= SYNC_S)

    def flush(self, sync: bool = False) -> None:
        if self._f is None or self.error:
            return
        try:
            if self._buf:
                self._f.write(self._buf)
                self.bytes_written += len(self._buf)
                self._buf.clear()
            self._f.flush()
            self._last_flush = self.clock()
            if sync:
                os.fsync(self._f.fileno())
                self._last_sync = self._last_flush
        except OSError as exc:
            self.error = (f"capture {self.path}: write failed after {self.bytes_written} bytes "
                          f"({exc.strerror or exc}); capture stopped, the file is readable up to there")
            self._buf.clear()
            try:
                self._f.close()
            except OSError:
                pass
            self._f = None

    def close(self, summary: dict | None = None) -> None:
        if self._f is None:
            return
        self._chunk(b"E", json.dumps(summary or {}, sort_keys=True, default=str).encode(), None)
        self.flush(sync=True)
        if self._f is not None:
            self._f.close()
            self._f = None


@dataclass
class Chunk:
    kind: str
    host_s: float
    payload: bytes
    offset: int


@dataclass
class CaptureContents:
    path: Path
    meta: dict = field(default_factory=dict)
    chunks: list[Chunk] = field(default_factory=list)
    cut_bytes: int = 0  #: bytes after the last complete chunk (a crash)
    cut_at: int | None = None
    cut_reason: str = ""
    damaged: list[tuple[int, int, str]] = field(default_factory=list)  #: (start, end, why) skipped
    ended_cleanly: bool = False
    end: dict = field(default_factory=dict)

    @property
    def data_bytes(self) -> int:
        return sum(len(c.payload) for c in self.chunks if c.kind == "D")

    @property
    def damaged_bytes(self) -> int:
        return sum(b - a for a, b, _ in self.damaged)

    def cut_message(self) -> str | None:
        """One line on what could not be read (damaged ranges and a cut tail), or None."""
        parts = []
        if self.damaged:
            first = self.damaged[0]
            more = f" and {len(self.damaged) - 1} more" if len(self.damaged) > 1 else ""
            parts.append(f"{len(self.damaged)} damaged range(s) skipped, {self.damaged_bytes} bytes "
                         f"(bytes {first[0]}-{first[1]}: {first[2]}{more})")
        if self.cut_bytes:
            parts.append(f"{self.cut_reason} at byte {self.cut_at}; {self.cut_bytes} bytes after it were cut")
        return f"{self.path}: " + "; ".join(parts) if parts else None


def _check(data: bytes, pos: int) -> tuple[int, str]:
    """(end of the chunk at ``pos``, "") when it checks, else (0, why); (-1, why) when the data ends
    inside it (a cut tail, not damage)."""
    n = len(data)
    if n - pos < HEADER.size + CRC.size:
        return -1, "incomplete chunk header"
    sync, kind, length, _ = HEADER.unpack_from(data, pos)
    if sync != SYNC:
        return 0, "no chunk sync"
    if length > MAX_CHUNK:
        return 0, "impossible chunk length"
    end = pos + HEADER.size + length + CRC.size
    if end > n:
        return -1, "incomplete chunk"
    (crc,) = CRC.unpack_from(data, end - CRC.size)
    if crc != zlib.crc32(data[pos + HEADER.size : end - CRC.size], zlib.crc32(data[pos : pos + HEADER.size])):
        return 0, "chunk fails its CRC"
    return end, ""


def read_capture(path: str | Path) -> CaptureContents:
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise CaptureError(f"{p}: cannot read: {exc.strerror or exc}") from None
    if data[: len(MAGIC)] != MAGIC:
        raise CaptureError(f"{p}: not a spinrig capture (bad magic at byte 0)")
    out = CaptureContents(p)
    pos = len(MAGIC)
    n = len(data)
    while pos < n:
        end, why = _check(data, pos)
        if end <= 0:
            # look for the next chunk that checks; what lies between is damaged (or a cut tail)
            nxt = data.find(SYNC, pos + 1)
            while nxt >= 0 and _check(data, nxt)[0] <= 0:
                nxt = data.find(SYNC, nxt + 1)
            if nxt < 0:
                if end < 0 or not out.chunks and not out.meta:
                    out.cut_bytes, out.cut_at, out.cut_reason = n - pos, pos, why
                else:
                    out.damaged.append((pos, n, why))
                break
            out.damaged.append((pos, nxt, why))
            out.chunks.append(Chunk("X", out.chunks[-1].host_s if out.chunks else 0.0, b"", pos))
            pos = nxt
            continue
        _, kind, length, host_ns = HEADER.unpack_from(data, pos)
        payload = data[pos + HEADER.size : end - CRC.size]
        k = kind.decode("ascii", "replace")
        if k == "M":
            try:
                out.meta.update(json.loads(payload))
            except ValueError:
                pass
        elif k == "E":
            out.ended_cleanly = True
            try:
                out.end = json.loads(payload)
            except ValueError:
                out.end = {}
        if k in ("D", "G", "I"):
            out.chunks.append(Chunk(k, host_ns * 1e-9, payload, pos))
        pos = end
    return out
