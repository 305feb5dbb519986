"""The host's side of the session rules (SPEC.md 2.6), as a pure state machine.

Given the decoded items of each read and the time, :class:`SessionRules` says which commands the
host must send: REQUEST_INFO and STREAM_CONTROL(1) every :data:`ASK_EVERY_S` until a DEVICE_INFO
arrives; the same after a reboot (a new ``boot_id`` in DEVICE_INFO or DEVICE_STATUS, or
``sample_seq`` going backwards); STREAM_CONTROL(1) again while the device is described but sends
no gyro data (or says it is not streaming). It also reports the reboots it saw. The live
:class:`~monitor.link.Link` runs it on the host clock; tests run it on the simulator's clock.
"""

from __future__ import annotations

from dataclasses import dataclass

import firmware_protocol as fp

ASK_EVERY_S = 0.5  #: REQUEST_INFO / STREAM_CONTROL repeated this often until answered
U32 = 1 << 32


@dataclass
class RuleCounts:
    info_requests: int = 0  #: REQUEST_INFO sent (the first, and the repeats while unanswered)
    stream_requests: int = 0  #: STREAM_CONTROL(1) sent
    reboots_seen: int = 0  #: device reboots noticed (and answered by asking again)


class SessionRules:
    def __init__(self):
        self.counts = RuleCounts()
        self.device_known = False  #: a DEVICE_INFO arrived since the last start or reboot
        self.boot_id: int | None = None
        self.last_info: fp.DeviceInfo | None = None
        self._expect_seq: int | None = None
        self._last_ask = -1e18
        self._last_gyro = -1e18
        self._not_streaming = False

    def start(self, now: float) -> list:
        """A new connection: nothing is known; ask at once."""
        self.device_known = False
        self._expect_seq = None
        return self._ask(now)

    def _ask(self, now: float, info: bool = True) -> list:
        out = []
        if info:
            out.append(fp.RequestInfo())
            self.counts.info_requests += 1
        out.append(fp.StreamControl(1))
        self.counts.stream_requests += 1
        self._last_ask = now
        return out

    def observe(self, items: list, now: float) -> tuple[list, list[str]]:
        """One read's decoded items at ``now`` (s): (commands to send, reboots seen as text)."""
        send: list = []
        reboots: list[str] = []
        for it in items:
            if isinstance(it, fp.GyroBatch):
                first = int(it.sample_seq[0])
                if self._expect_seq is not None and ((first - self._expect_seq) % U32) >= (U32 >> 1):
                    reboots.append("the sample counter went back")
                    self._reboot()
                    send += self._ask(now)
                self._expect_seq = int((int(it.sample_seq[-1]) + int(it.counts[-1])) % U32)
                self._last_gyro = now
                self._not_streaming = False
                continue
            m = getattr(it, "message", None)
            if isinstance(m, fp.DeviceInfo):
                if self.boot_id is not None and m.boot_id != self.boot_id:
                    reboots.append(f"boot id {self.boot_id} -> {m.boot_id}")
                    self._reboot()
                self.boot_id = m.boot_id
                self.last_info = m
                if not self.device_known:
                    self.device_known = True
                    if now - self._last_gyro > ASK_EVERY_S:  # described, not streaming yet: ask to stream
                        send += self._ask(now, info=False)
            elif isinstance(m, fp.DeviceStatus):
                if self.boot_id is not None and m.boot_id != self.boot_id:
                    reboots.append(f"boot id {self.boot_id} -> {m.boot_id}")
                    self._reboot()
                    self.boot_id = m.boot_id
                    send += self._ask(now)
                self._not_streaming = not m.streaming
        send += self.tick(now) if not send else []
        return send, reboots

    def tick(self, now: float) -> list:
        """Commands due at ``now`` when nothing else happened: the repeats."""
        if now - self._last_ask < ASK_EVERY_S:
            return []
        if not self.device_known:
            return self._ask(now)
        if self._not_streaming or now - self._last_gyro > ASK_EVERY_S:
            return self._ask(now, info=False)
        return []

    def _reboot(self) -> None:
        self.counts.reboots_seen += 1
        self.device_known = False
        self._expect_seq = None
