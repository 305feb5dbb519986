"""A serial cable between the host and a device on a pty, that a test can pull or break.

The host opens :attr:`PtyCable.path` (a pty of the cable's own); a thread copies bytes both ways
between it and the device's pty. Two faults a bench sees:

- :meth:`PtyCable.pull`: the cable is pulled. Nothing more reaches the device, and the host's
  side of the port goes away (its reads fail, as when a USB serial adapter vanishes).
- :meth:`PtyCable.mute`: the device's transmit line breaks (or it hangs while its motors run):
  the host's set-points still reach the device, but nothing the device says reaches the host.
- :meth:`PtyCable.garble`: the line to the host turns noisy (a loose connector, a motor lead
  beside it): every Nth byte the device sends arrives inverted.
- :meth:`PtyCable.back_up`: nobody reads what the device sends any more (a host whose reader
  hung, a full USB buffer): the device's output backs up while the host's commands still reach it.

The wall time of each fault (``time.monotonic()``) is kept in :attr:`PtyCable.pulled_at` and
:attr:`PtyCable.muted_at` so a test can time what the device did after it.
"""

from __future__ import annotations

import os
import select
import threading
import time
import tty

import numpy as np


class PtyCable:
    def __init__(self, device_path: str):
        self._dev = os.open(device_path, os.O_RDWR | os.O_NOCTTY)
        tty.setraw(self._dev)
        self._master, self._slave = os.openpty()
        tty.setraw(self._slave)
        self.path = os.ttyname(self._slave)
        self.pulled_at: float | None = None
        self.muted_at: float | None = None
        self.backed_up_at: float | None = None
        self._garble_every = 0
        self._garble_phase = 0
        self.to_device = self.to_host = 0  #: bytes carried each way
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._t = threading.Thread(target=self._run, name="pty-cable", daemon=True)
        self._t.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            with self._lock:
                fds = [f for f in (self._dev, self._master) if f is not None
                       and not (f == self._dev and self.backed_up_at is not None)]
            try:
                ready, _, _ = select.select(fds, [], [], 0.05)
            except (OSError, ValueError):
                return
            for fd in ready:
                try:
                    data = os.read(fd, 4096)
                    with self._lock:
                        if fd == self._dev and self._master is not None and self.muted_at is None:
                            if self._garble_every:
                                data = self._garbled(data)
                            os.write(self._master, data)
                            self.to_host += len(data)
                        elif fd == self._master and self.pulled_at is None:
                            os.write(self._dev, data)
                            self.to_device += len(data)
                except OSError:
                    if fd == self._dev:  # the device went away: so does the host's port, as a pulled cable
                        self.pull()
                        return

    def pull(self) -> float:
        """Pull the cable: the device hears nothing more and the host's port goes away."""
        with self._lock:
            self.pulled_at = time.monotonic()
            if self._master is not None:
                os.close(self._master)
                self._master = None
        return self.pulled_at

    def mute(self) -> float:
        """Break the device's transmit line: the host hears nothing more, the device still hears it."""
        with self._lock:
            self.muted_at = time.monotonic()
        return self.muted_at

    def garble(self, every: int) -> float:
        """From now on invert every ``every``-th byte the device sends (0 ends it)."""
        with self._lock:
            self._garble_every, self._garble_phase = int(every), 0
        return time.monotonic()

    def _garbled(self, data: bytes) -> bytes:
        buf = np.frombuffer(data, np.uint8).copy()
        k = self._garble_every
        first = (k - 1 - self._garble_phase) % k
        buf[first::k] ^= 0xFF
        self._garble_phase = (self._garble_phase + len(buf)) % k
        return buf.tobytes()

    def back_up(self) -> float:
        """Stop reading the device: its output fills the pty and backs up; it still hears the host."""
        with self._lock:
            self.backed_up_at = time.monotonic()
        return self.backed_up_at

    def close(self) -> None:
        self._stop.set()
        self._t.join(2)
        with self._lock:
            for fd in (self._master, self._slave, self._dev):
                if fd is not None:
                    try:
                        os.close(fd)
                    except OSError:
                        pass
            self._master = self._slave = None
