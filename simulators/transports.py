"""Transports that carry a :class:`~simulators.stream.SimStream` to a host: a pty and a TCP server.

- pty: ``os.openpty()``; the slave path (``/dev/pts/N``) opens with ``serial.Serial`` like a
  real port. The slave is put in raw mode at once so no byte is echoed or translated.
- TCP: one client at a time on ``socket://HOST:PORT``; a ``disconnect`` fault closes the client
  and the listening socket, so connections are refused for its duration, then listens again.

Both loops block in ``select`` with a short timeout (no busy loop), release bytes by the wall
clock (real time) or as fast as the consumer reads (fast; the device then waits for the host's
first bytes, since a TCP client's pyserial discards what arrives during its connect), and stop
at ``duration`` or when ``stop`` is set.
"""

from __future__ import annotations

import os
import select
import socket
import threading
import time
import tty
from collections.abc import Callable

from .stream import SimStream

POLL_S = 0.004  #: bytes go out at least every 4 ms (a real device's USB CDC frames are 1 ms)
FAST_BACKLOG = 64 * 1024  #: fast mode produces more only below this much unsent data
REALTIME_BACKLOG = 256 * 1024  #: real time with nobody reading: older bytes are dropped past this


class Stats:
    def __init__(self):
        self.bytes_written = 0
        self.bytes_read = 0
        self.bytes_dropped = 0  # nobody was reading (pty with no listener)
        self.connections = 0


def _produce(stream: SimStream, fast: bool, t0: float, pending: bytearray, stats: Stats) -> None:
    """Add the stream's next bytes to ``pending``: in fast mode a chunk once the host has spoken
    (nothing is produced for nobody) and the backlog is short; in real time everything due by now,
    dropping the oldest bytes past REALTIME_BACKLOG when nobody reads."""
    if fast:
        if stats.bytes_read > 0 and len(pending) < FAST_BACKLOG:
            pending += stream.produce_chunk()
        return
    pending += stream.produce(time.monotonic() - t0)
    if len(pending) > REALTIME_BACKLOG:
        cut = len(pending) - REALTIME_BACKLOG
        del pending[:cut]
        stats.bytes_dropped += cut


def serve_pty(
    stream: SimStream,
    on_ready: Callable[[str], None],
    duration: float | None = None,
    stop: threading.Event | None = None,
    on_step: Callable[[], None] | None = None,
) -> Stats:
    """Run the stream on a new pty until ``duration`` s (simulated) or ``stop``; returns counts.
    ``on_step`` is called after each simulated chunk (a console reporting the device's events)."""
    master, slave = os.openpty()
    tty.setraw(slave)
    os.set_blocking(master, False)
    path = os.ttyname(slave)
    stats = Stats()
    fast = not stream.options.realtime
    on_ready(path)
    pending = bytearray()
    t0 = time.monotonic()
    try:
        while not (stop and stop.is_set()) and (duration is None or stream.time_s < duration):
            _produce(stream, fast, t0, pending, stats)
            if on_step is not None:
                on_step()
            r, w, _ = select.select([master], [master] if pending else [], [], POLL_S)
            if r:
                try:
                    data = os.read(master, 4096)
                except OSError:
                    data = b""
                if data:
                    stats.bytes_read += len(data)
                    stream.receive(data)
            if w:
                try:
                    n = os.write(master, pending[:65536])
                except BlockingIOError:
                    n = 0
                except OSError:
                    n = 0
                stats.bytes_written += n
                del pending[:n]
    finally:
        os.close(master)
        os.close(slave)
    return stats


def serve_tcp(
    stream: SimStream,
    port: int,
    on_ready: Callable[[str], None],
    host: str = "127.0.0.1",
    duration: float | None = None,
    stop: threading.Event | None = None,
) -> Stats:
    """Serve the stream to one TCP client at a time at ``host:port`` (0 picks a free port)."""
    def listen(at_port: int) -> socket.socket:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, at_port))
        sock.listen(1)
        sock.setblocking(False)
        return sock

    srv: socket.socket | None = listen(port)
    port = srv.getsockname()[1]
    stats = Stats()
    fast = not stream.options.realtime
    on_ready(f"socket://{host}:{port}")
    client: socket.socket | None = None
    pending = bytearray()
    t0 = time.monotonic()
    try:
        while not (stop and stop.is_set()) and (duration is None or stream.time_s < duration):
            now_s = stream.time_s if fast else time.monotonic() - t0
            down = stream.disconnected(now_s)
            if down:
                # the port is gone: the client is dropped and connections are refused
                if client is not None:
                    client.close()
                    client = None
                    pending.clear()
                if srv is not None:
                    srv.close()
                    srv = None
                stream.produce(now_s + (0.02 if fast else 0.0))  # the device runs on meanwhile
                if not fast:
                    time.sleep(POLL_S * 5)
                continue
            if srv is None:
                srv = listen(port)
            if client is None:
                if not fast:
                    stream.produce(time.monotonic() - t0)  # keep simulated time with the clock
                r, _, _ = select.select([srv], [], [], POLL_S * 5)
                if r:
                    conn, _ = srv.accept()
                    conn.setblocking(False)
                    conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                    client = conn
                    stats.connections += 1
                    pending.clear()
                continue
            _produce(stream, fast, t0, pending, stats)
            r, w, _ = select.select([client], [client] if pending else [], [], POLL_S)
            try:
                if r:
                    data = client.recv(4096)
                    if not data:
                        raise ConnectionResetError
                    stats.bytes_read += len(data)
                    stream.receive(data)
                if w:
                    n = client.send(pending[:65536])
                    stats.bytes_written += n
                    del pending[:n]
            except (BlockingIOError, InterruptedError):
                pass
            except OSError:
                client.close()
                client = None
    finally:
        if client is not None:
            client.close()
        if srv is not None:
            srv.close()
    return stats
