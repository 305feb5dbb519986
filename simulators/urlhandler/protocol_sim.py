"""``sim://SCENARIO?options``: an in-process simulated device opened by ``serial.serial_for_url``.

It goes through exactly the code path of a real port (``serial_for_url`` with pyserial's
``protocol_handler_packages``), so the host cannot tell it from hardware. Options:

- ``seed=N`` (default 0), ``fast=1`` (as fast as the reader reads; default real time),
- ``stream=1`` (stream from boot without STREAM_CONTROL), ``script=0`` (no stand-alone throttle
  script), ``solo=1`` (the script once per motor in turn, for imbalance runs),
  ``clock=US`` (device clock at boot), ``baud=N`` (emulate a UART at N baud),
- ``fault=NAME=VALUE`` (repeatable; ``simulators/faults.py``).

Example: ``serial.serial_for_url("sim://quillback7?seed=1&fault=corrupt=0.01", timeout=0.05)``.
A ``disconnect`` fault makes reads fail and the port refuse to open for its duration; reopening
the same URL afterwards reattaches to the same running device.
"""

from __future__ import annotations

import threading
import time
import urllib.parse

from serial.serialutil import PortNotOpenError, SerialBase, SerialException

from ..device import DeviceOptions
from ..faults import FaultError, FaultPlan
from ..scenario import ScenarioError, load_scenario
from ..stream import SimStream, StreamOptions

_LIVE: dict[str, tuple[SimStream, float, threading.Lock]] = {}
_LIVE_LOCK = threading.Lock()

OPTIONS = ("seed", "fast", "stream", "script", "solo", "clock", "baud", "fault")


def parse_url(url: str) -> tuple[str, dict]:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme != "sim":
        raise SerialException(f"expected sim://SCENARIO[?options], not {url!r}")
    name = (parts.netloc + parts.path).strip("/")
    if not name:
        raise SerialException(f"{url}: no scenario name (sim://quillback7)")
    query = urllib.parse.parse_qs(parts.query, keep_blank_values=True)
    for key in query:
        if key not in OPTIONS:
            raise SerialException(f"{url}: unknown option {key!r} (known: {', '.join(OPTIONS)})")

    def one_int(key, default):
        if key not in query:
            return default
        try:
            return int(query[key][-1])
        except ValueError:
            raise SerialException(f"{url}: option {key}={query[key][-1]!r} is not an integer") from None

    return name, {
        "seed": one_int("seed", 0),
        "fast": bool(one_int("fast", 0)),
        "stream": bool(one_int("stream", 0)),
        "script": bool(one_int("script", 1)),
        "solo": bool(one_int("solo", 0)),
        "clock": one_int("clock", 0),
        "baud": one_int("baud", 0) or None,
        "faults": query.get("fault", []),
    }


def _make_stream(url: str) -> SimStream:
    name, o = parse_url(url)
    try:
        scenario = load_scenario(name)
        faults = FaultPlan.parse(o["faults"])
    except (ScenarioError, FaultError) as exc:
        raise SerialException(f"{url}: {exc}") from None
    device = DeviceOptions(seed=o["seed"], stream_at_boot=o["stream"], script=o["script"],
                           one_at_a_time=o["solo"], clock_start_us=o["clock"])
    return SimStream(scenario, device, faults, StreamOptions(realtime=not o["fast"], baud=o["baud"]))


class Serial(SerialBase):
    """A pyserial port whose far end is a simulated flight controller."""

    def __init__(self, *args, **kwargs):
        self._stream: SimStream | None = None
        self._rx = bytearray()
        self._t0 = 0.0
        self._lock = threading.Lock()
        super().__init__(*args, **kwargs)

    @property
    def sim(self) -> SimStream:
        """The simulated device's stream (tests inspect the device through it)."""
        if self._stream is None:
            raise PortNotOpenError()
        return self._stream

    def open(self) -> None:
        if self.is_open:
            raise SerialException("Port is already open.")
        if self._port is None:
            raise SerialException("Port must be configured before it can be used.")
        url = self._port
        with _LIVE_LOCK:
            live = _LIVE.get(url)
            if live is None:
                stream = _make_stream(url)
                live = (stream, time.monotonic(), threading.Lock())
                _LIVE[url] = live
        self._stream, self._t0, self._lock = live
        if self._stream.options.realtime and self._stream.disconnected(self._now()):
            raise SerialException(f"could not open port {url}: device not present (disconnect fault)")
        self._rx = bytearray()
        self.is_open = True

    def _now(self) -> float:
        return time.monotonic() - self._t0

    def close(self) -> None:
        if self.is_open:
            self.is_open = False
            with _LIVE_LOCK:
                s = self._stream
                if s is not None and not s.faults.disconnects:
                    _LIVE.pop(self._port, None)  # keep devices with a disconnect plan for reattaching
        super().close()

    def _reconfigure_port(self) -> None:
        pass

    def _pull(self) -> None:
        s = self._stream
        with self._lock:
            if s.options.realtime:
                now = self._now()
                if s.disconnected(now):
                    s.produce(now)
                    raise SerialException("read failed: device disconnected (disconnect fault)")
                self._rx += s.produce(now)
            else:
                data = s.produce_chunk()
                if s.disconnected():
                    start, dur = next((a, b) for a, b in s.faults.disconnects if a <= s.time_s < a + b)
                    s.produce(start + dur)  # the link is down for that much simulated time
                    raise SerialException("read failed: device disconnected (disconnect fault)")
                self._rx += data

    @property
    def in_waiting(self) -> int:
        if not self.is_open:
            raise PortNotOpenError()
        self._pull()
        return len(self._rx)

    def read(self, size: int = 1) -> bytes:
        if not self.is_open:
            raise PortNotOpenError()
        # as pyserial's POSIX port does: wait for ``size`` bytes or the timeout, whichever comes
        # first (returning whatever had arrived at once made a reader thread's every read a frame
        # or two, a thousand queue entries a second where a real port gives one per timeout)
        deadline = None if self._timeout is None else time.monotonic() + self._timeout
        while True:
            self._pull()
            if len(self._rx) >= size or size == 0:
                break
            if self._timeout == 0 or (deadline is not None and time.monotonic() >= deadline):
                break
            if self._stream.options.realtime:
                wait = self._stream.next_release_s() - self._now()
                if deadline is not None:
                    wait = min(wait, deadline - time.monotonic())
                time.sleep(min(max(wait, 0.0005), 0.05))
        with self._lock:  # a write from another thread may add to _rx
            out = bytes(self._rx[:size])
            del self._rx[:size]
        return out

    def write(self, data) -> int:
        if not self.is_open:
            raise PortNotOpenError()
        data = bytes(data)
        with self._lock:
            s = self._stream
            if s.options.realtime:
                # the device reaches "now" before it sees the command; what it sent meanwhile waits
                # to be read like everything else (it was once dropped here: every host write lost
                # the frames produced since the last read)
                self._rx += s.produce(self._now())
            s.receive(data)
        return len(data)

    def reset_input_buffer(self) -> None:
        if not self.is_open:
            raise PortNotOpenError()
        with self._lock:
            self._rx.clear()

    def reset_output_buffer(self) -> None:
        if not self.is_open:
            raise PortNotOpenError()

    @property
    def out_waiting(self) -> int:
        return 0

    def _update_break_state(self) -> None:
        pass

    def _update_rts_state(self) -> None:
        pass

    def _update_dtr_state(self) -> None:
        pass

    @property
    def cts(self) -> bool:
        return True

    @property
    def dsr(self) -> bool:
        return True

    @property
    def ri(self) -> bool:
        return False

    @property
    def cd(self) -> bool:
        return True
