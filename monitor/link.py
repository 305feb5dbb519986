"""The serial link: open a port or any pyserial URL, read in a thread, record, decode, reconnect.

The reader thread blocks on the port with a short read timeout and reads in blocks (never a
``timeout=0`` busy loop; ``socket://`` reports ``in_waiting`` as only 0 or 1, so fixed-size
reads). It writes every block to the capture, decodes it, and hands the decoded items to the
consumer through a bounded queue; if the consumer falls behind past that bound the items are
dropped *and counted* (``overruns``), never silently. It sends a HOST_HEARTBEAT every 100 ms.
When the port errors or disappears it reconnects by itself (backoff from 0.2 s, x1.5, up to 2 s),
resets the decoder and queues a reconnect marker so the series is broken there.

The reader applies the host's session rules (SPEC.md section 2.6, :mod:`monitor.session_rules`)
to every read, because only it sees every frame as it comes: a lost request or a lost answer costs
half a second, not the run, and a rebooted device is asked to stream again. The consumer hears of
silence (no byte for 0.5 s), of its end (with its length), of the port
  going away and of its return (with the time it was gone).
"""

from __future__ import annotations

import queue
import threading
import time
from dataclasses import dataclass

import serial

import firmware_protocol as fp

from .capture import CaptureWriter
from .session_rules import ASK_EVERY_S, SessionRules

HINT_AFTER_S = 1.5
READ_SIZE = 4096
READ_TIMEOUT_S = 0.02
HEARTBEAT_S = 0.1
BACKOFF_MIN_S = 0.2
BACKOFF_MAX_S = 2.0
BACKOFF_GROWTH = 1.5  #: 0.2, 0.3, 0.45, ... s: a port back after 2 s is found within about 0.7 s
SILENT_AFTER_S = 0.5  #: no byte for this long is a silent link


def open_port(port: str, baud: int, timeout: float = READ_TIMEOUT_S) -> serial.SerialBase:
    """A device path or a pyserial URL (``socket://``, ``loop://``, ``rfc2217://``, ``sim://``)."""
    if port.startswith("sim://"):
        import simulators

        simulators.register()
    if "://" in port:
        return serial.serial_for_url(port, baudrate=baud, timeout=timeout, write_timeout=0.5)
    return serial.Serial(port, baudrate=baud, timeout=timeout, write_timeout=0.5)


@dataclass
class LinkHealth:
    bytes: int = 0
    frames_ok: int = 0
    crc_errors: int = 0
    malformed: int = 0
    oversize: int = 0
    unknown_type: int = 0
    frames_lost: int = 0
    reconnects: int = 0
    overruns: int = 0  #: decoded items dropped because the consumer fell behind
    connected: bool = False
    info_requests: int = 0  #: REQUEST_INFO sent (the first, and the repeats while unanswered)
    stream_requests: int = 0  #: STREAM_CONTROL(1) sent
    reboots_seen: int = 0  #: device reboots the link noticed (and answered by asking again)
    silences: int = 0  #: times the link went silent for SILENT_AFTER_S or more
    device_known: bool = False  #: a DEVICE_INFO arrived since the last connect or reboot


@dataclass(frozen=True)
class LinkMessage:
    """Something the reader thread tells the consumer besides decoded items."""

    kind: str  #: "hint", "disconnected", "reconnected", "silent", "resumed", "reboot", "error"
    text: str
    host_s: float


class Link:
    def __init__(self, port: str, baud: int = 921_600, capture: CaptureWriter | None = None,
                 queue_items: int = 4000, reconnect: bool = True, heartbeat: bool = True):
        self.port_name = port
        self.baud = baud
        self.capture = capture
        self.reconnect = reconnect
        self.heartbeat = heartbeat
        self.queue: queue.Queue = queue.Queue(maxsize=queue_items)
        self.decoder = fp.StreamDecoder(merge=True)
        self.health = LinkHealth()
        self._port: serial.SerialBase | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._write_lock = threading.Lock()
        self._seq = 0
        self.nonce = 0  #: the armed nonce (0: never armed by this link)
        self.rules = SessionRules()
        self._last_byte = time.monotonic()
        self._silent = False
        self._gone_at: float | None = None
        #: called in the reader thread with (now, items) for every read and with each LinkMessage,
        #: before the consumer's queue (a bench controller must hear of outcomes and of a lost
        #: link at once, whatever the consumer is doing); they must be quick and never raise
        self.observers: list = []

    # ---------------------------------------------------------------- lifecycle

    def start(self) -> None:
        """Open the port (raises serial.SerialException naming it) and start the reader thread."""
        self._port = open_port(self.port_name, self.baud)
        self.health.connected = True
        self._hello()
        self._thread = threading.Thread(target=self._run, name="spinrig-link", daemon=True)
        self._thread.start()

    def close(self) -> None:
        """Stop the reader; motors this link armed are stopped first."""
        if self.nonce:
            self.send(fp.StopMotors(fp.StopReason.HOST_QUIT))
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
        if self._port is not None:
            try:
                self._port.close()
            except (OSError, serial.SerialException):
                pass
            self._port = None
        self.health.connected = False

    # ---------------------------------------------------------------- writing

    def send(self, msg) -> bool:
        """Encode and write one message; thread-safe. False when the port is down."""
        return self.send_seq(msg) is not None

    def send_seq(self, msg) -> int | None:
        """As :meth:`send`, returning the frame seq it went out with (the device's COMMAND_OUTCOME
        echoes it), or None when the port is down."""
        with self._write_lock:
            port = self._port
            if port is None:
                return None
            seq = self._seq
            frame = fp.encode_frame(msg, seq)
            self._seq = (self._seq + 1) & 0xFF
            try:
                port.write(frame)
                return seq
            except (OSError, serial.SerialException):
                return None

    def _hello(self) -> None:
        self._send_all(self.rules.start(time.monotonic()))

    def _send_all(self, msgs: list) -> None:
        for m in msgs:
            self.send(m)
        c = self.rules.counts
        h = self.health
        h.info_requests, h.stream_requests, h.reboots_seen = c.info_requests, c.stream_requests, c.reboots_seen
        h.device_known = self.rules.device_known

    def _session(self, items: list, now: float) -> None:
        """The session rules (monitor.session_rules) over one read's decoded items."""
        send, reboots = self.rules.observe(items, now)
        for why in reboots:
            self._put(LinkMessage("reboot", f"{self.port_name}: the device rebooted ({why}); asking it to describe "
                                            "itself and stream again", now))
        self._send_all(send)

    # ---------------------------------------------------------------- reading

    def _put(self, item) -> None:
        if isinstance(item, LinkMessage):
            for obs in self.observers:
                obs(item)
        try:
            self.queue.put_nowait(item)
        except queue.Full:
            self.health.overruns += 1

    def _sync_health(self) -> None:
        c = self.decoder.counters
        h = self.health
        h.bytes, h.frames_ok, h.crc_errors, h.malformed = c.bytes_in, c.frames_ok, c.crc_errors, c.malformed
        h.oversize, h.unknown_type, h.frames_lost = c.oversize, c.unknown_type, c.frames_lost

    def _run(self) -> None:
        started = time.monotonic()
        hinted = False
        next_hb = started
        while not self._stop.is_set():
            port = self._port
            if port is None:
                if not self._reconnect():
                    return
                started = time.monotonic()
                hinted = False
                continue
            try:
                data = port.read(READ_SIZE)
            except (OSError, serial.SerialException) as exc:
                now = time.monotonic()
                self._drop_port()
                self._gone_at = now
                self._put(LinkMessage("disconnected", f"{self.port_name}: port gone ({exc})", now))
                if not self.reconnect:
                    return
                continue
            now = time.monotonic()
            if data:
                if self._silent:
                    self._silent = False
                    self._put(LinkMessage("resumed", f"{self.port_name}: data again after "
                                                     f"{now - self._last_byte:.1f} s of silence", now))
                self._last_byte = now
                cap = self.capture
                if cap is not None:
                    if self.rules.last_info is not None and not cap.has_device:
                        cap.write_device(fp.encode_frame(self.rules.last_info, 0), now)
                    cap.write_data(data, now)
                items = self.decoder.feed(data)
                self._sync_health()
                for obs in self.observers:
                    obs((now, items))
                self._session(items, now)
                if items:
                    self._put((now, items))
            else:
                if self.capture is not None:
                    self.capture.tick(now)
                if not self._silent and now - self._last_byte >= SILENT_AFTER_S:
                    self._silent = True
                    self.health.silences += 1
                    self._put(LinkMessage("silent", f"{self.port_name}: no data for {SILENT_AFTER_S:.1f} s", now))
                self._send_all(self.rules.tick(now))
            if not hinted and now - started >= HINT_AFTER_S and not self.health.device_known:
                hinted = True
                self._put(LinkMessage("hint", self.hint(), now))
            if self.heartbeat and now >= next_hb:
                self.send(fp.HostHeartbeat(self.nonce))
                next_hb = now + HEARTBEAT_S

    def hint(self) -> str:
        """What is likely wrong when no valid frame arrived, naming what was seen."""
        c = self.decoder.counters
        seen = (f"{c.bytes_in} bytes received, {c.frames_ok} frames decoded, {c.crc_errors} CRC errors, "
                f"{c.malformed} malformed")
        if c.bytes_in == 0:
            why = "nothing arrives: wrong port, the device is off, or it is not in streaming mode"
        elif c.frames_ok == 0:
            why = "bytes arrive but no frame decodes: wrong baud rate, or another protocol on this port"
        else:
            why = (f"frames decode but the device has not described itself (no DEVICE_INFO after "
                   f"{self.health.info_requests} requests, one every {ASK_EVERY_S} s): gyro samples cannot be "
                   "converted until it does; a lossy link drops the request or the answer")
        return f"no valid spinrig frame from {self.port_name} within {HINT_AFTER_S} s ({seen}): {why}"

    def _drop_port(self) -> None:
        with self._write_lock:
            port, self._port = self._port, None
        self.health.connected = False
        if port is not None:
            try:
                port.close()
            except (OSError, serial.SerialException):
                pass

    def _reconnect(self) -> bool:
        delay = BACKOFF_MIN_S
        while not self._stop.is_set():
            if self._stop.wait(delay):
                return False
            try:
                port = open_port(self.port_name, self.baud)
            except (OSError, serial.SerialException, ValueError):
                delay = min(delay * BACKOFF_GROWTH, BACKOFF_MAX_S)
                continue
            with self._write_lock:
                self._port = port
            self.decoder.reset()
            self.health.reconnects += 1
            self.health.connected = True
            now = time.monotonic()
            if self.capture is not None:
                self.capture.write_gap({"reason": "reconnect", "reconnects": self.health.reconnects}, now)
            gone = f" after {now - self._gone_at:.1f} s" if self._gone_at is not None else ""
            self._put(LinkMessage("reconnected", f"{self.port_name}: port back{gone} (reconnect "
                                                 f"{self.health.reconnects})", now))
            self._last_byte = now
            self._silent = False
            self._hello()
            return True
        return False
