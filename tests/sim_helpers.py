"""Helpers for driving a SimDevice from tests: send commands, collect decoded frames."""

from __future__ import annotations

import firmware_protocol as fp


class Host:
    """A minimal in-process host: encodes commands, decodes everything the device sends."""

    def __init__(self, device):
        self.device = device
        self.decoder = fp.StreamDecoder()
        self.seq = 0
        self.received: list = []
        self.batches: list[fp.GyroBatch] = []

    def send(self, *msgs) -> list[int]:
        seqs = []
        for m in msgs:
            self.device.receive(fp.encode_frame(m, self.seq))
            seqs.append(self.seq)
            self.seq = (self.seq + 1) & 0xFF
        return seqs

    def run(self, seconds: float) -> None:
        end = self.device.time_s + seconds
        while self.device.time_s < end - 1e-9:
            self.feed(b"".join(f for _, f in self.device.step()))

    def feed(self, data: bytes) -> None:
        for item in self.decoder.feed(data):
            if isinstance(item, fp.GyroBatch):
                self.batches.append(item)
            else:
                self.received.append(item)

    def messages(self, cls) -> list:
        return [r.message for r in self.received if isinstance(r.message, cls)]

    def acks(self) -> list[fp.CommandAck]:
        return self.messages(fp.CommandAck)
