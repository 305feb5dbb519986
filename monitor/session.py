"""A run of the pipeline from a source to events: live (a Link), a capture replay, or a CSV file.

:class:`Session` owns the assembler and the engine and is driven by whoever owns the loop
(headless ``watch`` in the main thread, the screen in a worker thread) through :meth:`pump`.
The reader thread of a live link never waits for it.
"""

from __future__ import annotations

import queue
import time
from collections.abc import Iterator
from dataclasses import dataclass

from .assembler import Assembler
from .capture import read_capture
from .engine import Engine
from .events import Notice
from .link import Link, LinkMessage


@dataclass
class SessionCounters:
    pumps: int = 0
    items: int = 0


class Session:
    def __init__(self, engine: Engine, link: Link | None = None):
        self.engine = engine
        self.link = link
        self.assembler = Assembler()
        self.counters = SessionCounters()
        self.notices: list = []

    # ---------------------------------------------------------------- live

    def pump(self, timeout: float = 0.1, budget: int = 200) -> list:
        """Process what the link delivered (waiting up to ``timeout`` for the first item).

        When nothing came, frames still waiting for the detectors are finished (the stream is idle).
        """
        if self.link is None:
            return []
        events = []
        try:
            first = self.link.queue.get(timeout=timeout)
        except queue.Empty:
            return self.engine.flush()
        batch = [first]
        for _ in range(budget):
            try:
                batch.append(self.link.queue.get_nowait())
            except queue.Empty:
                break
        for entry in batch:
            events.extend(self._entry(entry))
        self.counters.pumps += 1
        return events

    def drain(self) -> list:
        """After the link stopped: process every entry still queued, then finish the waiting frames."""
        events = []
        if self.link is not None:
            while not self.link.queue.empty():
                events.extend(self.pump(timeout=0.0))
        events.extend(self.engine.flush())
        return events

    def _entry(self, entry) -> list:
        if isinstance(entry, LinkMessage):
            t = self.assembler._last_sample_s
            if entry.kind == "reconnected":
                return self.engine.feed(self.assembler.mark_reconnect(entry.host_s)) + [
                    Notice("link", t, entry.text)
                ]
            return [Notice("link", t, entry.text)]
        host_s, items = entry
        self.counters.items += len(items)
        return self.engine.feed(self.assembler.feed(items, host_s))

    # ---------------------------------------------------------------- offline

    def feed_bytes(self, decoder, data: bytes, host_s: float) -> list:
        return self.engine.feed(self.assembler.feed(decoder.feed(data), host_s))


def device_items(frame: bytes, assembler: Assembler) -> list:
    """The decoded DEVICE_INFO of a capture's ``I`` chunk, when the assembler does not have that
    device yet (a capture started mid-stream); nothing when it already does."""
    import firmware_protocol as fp

    items = [it for it in fp.StreamDecoder().feed(frame) if isinstance(getattr(it, "message", None), fp.DeviceInfo)]
    known = assembler.info
    if not items or (known is not None and known.boot_id == items[0].message.boot_id):
        return []
    return items[:1]


class CaptureReplay:
    """Feed a capture through the live pipeline; iterating yields each chunk's events.

    ``speed`` paces it (1.0 real time, 2.0 twice as fast, None as fast as possible).
    """

    def __init__(self, path, engine: Engine, speed: float | None = None):
        self.contents = read_capture(path)
        self.engine = engine
        self.session = Session(engine)
        self.speed = speed

    #: decoded chunks are pooled until about this much stream (bytes at 8 kHz: ~2 s) before the
    #: assembler and engine see them; results do not depend on it (nothing downstream depends on
    #: how the stream was cut), only the per-call overhead does
    POOL_BYTES = 160_000

    def __iter__(self) -> Iterator[list]:
        import firmware_protocol as fp

        dec = fp.StreamDecoder(merge=True)
        start_wall = time.monotonic()
        chunks = self.contents.chunks
        first_host = chunks[0].host_s if chunks else 0.0
        pool: list[bytes] = []
        pooled = 0
        pool_host = 0.0

        def flush():
            nonlocal pool, pooled
            if not pool:
                return []
            data = b"".join(pool)
            pool, pooled = [], 0
            return self.session.feed_bytes(dec, data, pool_host)

        for ch in chunks:
            if self.speed:
                delay = start_wall + (ch.host_s - first_host) / self.speed - time.monotonic()
                if delay > 0:
                    yield flush()
                    time.sleep(delay)
            if ch.kind == "D":
                if not pool:
                    pool_host = ch.host_s
                pool.append(ch.payload)
                pooled += len(ch.payload)
                if pooled >= self.POOL_BYTES:
                    yield flush()
            elif ch.kind == "G":
                yield flush()
                dec.reset()
                yield self.engine.feed(self.session.assembler.mark_reconnect(ch.host_s))
            elif ch.kind == "X":  # a damaged range: the byte stream breaks here
                yield flush()
                dec.reset()
            elif ch.kind == "I":
                yield flush()
                yield self.engine.feed(self.session.assembler.feed(device_items(ch.payload, self.session.assembler),
                                                                   ch.host_s))
        yield flush()
        yield self.engine.flush()
        self.decoder = dec
