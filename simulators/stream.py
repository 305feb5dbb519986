"""The byte stream a simulated device puts on the cable: device + faults + pacing + UART limits.

:class:`SimStream` turns the device's time-stamped frames into bytes released at their time
(real-time mode: the caller asks for everything up to "now"; fast mode: chunk by chunk as fast as
the consumer takes them), applies the byte faults of a :class:`~simulators.faults.FaultPlan`,
reboots the device when the plan says, and can emulate a baud-limited UART whose transmit FIFO
overflows (bytes dropped) when the offered load exceeds the link. Transports (pty, TCP, the
``sim://`` pyserial handler) only move these bytes.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, replace

from .device import DeviceOptions, SimDevice
from .faults import ByteMangler, FaultPlan
from .scenario import Scenario


@dataclass(frozen=True)
class StreamOptions:
    realtime: bool = True
    baud: int | None = None  #: emulate a UART at this baud (8N1: baud / 10 bytes per second)
    fifo_bytes: int = 1024  #: device transmit FIFO when emulating a UART


class SimStream:
    def __init__(
        self,
        scenario: Scenario,
        device: DeviceOptions | None = None,
        faults: FaultPlan | None = None,
        options: StreamOptions | None = None,
    ):
        self.faults = faults or FaultPlan()
        device = device or DeviceOptions()
        if self.faults.drift_ppm:
            device = replace(device, drift_ppm=self.faults.drift_ppm)
        self.device = SimDevice(scenario, device)
        self.options = options or StreamOptions()
        self.mangler = ByteMangler(self.faults, device.seed)
        self._queue: deque[tuple[float, bytes]] = deque()
        self._reboots = sorted(self.faults.reboots)
        self._released_s = 0.0
        self._fifo = bytearray()
        self._tokens = 0.0
        self.uart_dropped = 0
        self.bytes_out = 0
        self.bytes_discarded = 0  #: produced while the link was down
        self.frames_released = 0  #: frames put on the link (before byte faults)

    @property
    def time_s(self) -> float:
        """Simulated time up to which bytes have been released."""
        return self._released_s

    def disconnected(self, t_s: float | None = None) -> bool:
        return self.faults.disconnected(self._released_s if t_s is None else t_s)

    def _step(self) -> None:
        while self._reboots and self.device.time_s >= self._reboots[0]:
            self._reboots.pop(0)
            self.device.reboot()
        for t, frame in self.device.step():
            if self.faults.stalled(t):
                t = next(s + d for s, d in self.faults.stalls if s <= t < s + d)
            self._queue.append((t, frame))

    def next_release_s(self) -> float:
        """Time of the next frame waiting to be released (computes ahead if needed)."""
        if not self._queue:
            self._step()
        return self._queue[0][0] if self._queue else self.device.time_s

    def produce(self, until_s: float) -> bytes:
        """Bytes of every frame due by simulated time ``until_s``, faults and UART applied."""
        while self.device.time_s <= until_s:
            self._step()
        parts = []
        q = self._queue
        while q and q[0][0] <= until_s:
            t, frame = q.popleft()
            if self.faults.disconnected(t):
                self.bytes_discarded += len(frame)
                continue
            parts.append(frame)
        self.frames_released += len(parts)
        dt = max(0.0, until_s - self._released_s)
        self._released_s = max(self._released_s, until_s)
        data = self.mangler.apply(b"".join(parts), dt)
        if self.options.baud:
            data = self._uart(data, dt)
        self.bytes_out += len(data)
        return data

    def produce_chunk(self) -> bytes:
        """Fast mode: the next chunk of the stream, whatever its simulated time."""
        return self.produce(self.next_release_s() + self.device.control_period_s * self.device.options.chunk_periods)

    def _uart(self, data: bytes, dt: float) -> bytes:
        """A UART sending ``baud / 10`` bytes a second from a FIFO of ``fifo_bytes``: what does not
        fit once the link has drained its share of ``dt`` is dropped, newest bytes first."""
        self._fifo += data
        capacity = dt * self.options.baud / 10.0 + self._tokens
        n = min(len(self._fifo), int(capacity))
        self._tokens = capacity - n if len(self._fifo) > n else 0.0  # an idle line saves nothing up
        out = bytes(self._fifo[:n])
        del self._fifo[:n]
        excess = len(self._fifo) - self.options.fifo_bytes
        if excess > 0:
            self.uart_dropped += excess
            del self._fifo[-excess:]
        return out

    def receive(self, data: bytes) -> None:
        """Bytes from the host (dropped while the link is down)."""
        if data and not self.disconnected():
            self.device.receive(data)
