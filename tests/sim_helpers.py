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

    def outcomes(self) -> list[fp.CommandOutcome]:
        return self.messages(fp.CommandOutcome)


class SessionHost:
    """spinrig's host pipeline (decoder, session rules, assembler, engine) against a SimStream
    in fast simulated time: the session rules run on the simulator's clock, their commands go to
    the device, so a test can say *when* (in simulated seconds) something happened."""

    def __init__(self, stream, engine=None):
        from monitor.assembler import Assembler
        from monitor.session_rules import SessionRules

        self.stream = stream
        self.decoder = fp.StreamDecoder(merge=True)
        self.assembler = Assembler()
        self.engine = engine
        self.rules = SessionRules()
        self.events: list = []
        self.reboot_texts: list[tuple[float, str]] = []
        self.first_block_after: list[tuple[float, int]] = []  #: (sim time, sample_seq) of blocks
        self.blocks: list[tuple[float, int, int]] = []  #: (sim time, first sample_seq, end sample_seq)
        self._seq = 0
        self._send(self.rules.start(stream.time_s))

    def _send(self, msgs) -> None:
        for m in msgs:
            self.stream.receive(fp.encode_frame(m, self._seq))
            self._seq = (self._seq + 1) & 0xFF

    def run_until(self, t_s: float) -> None:
        while self.stream.time_s < t_s:
            data = self.stream.produce_chunk()
            now = self.stream.time_s  # bytes are stamped when they have arrived, as the link does
            items = self.decoder.feed(data)
            for it in items:
                if isinstance(it, fp.GyroBatch):
                    self.first_block_after.append((now, int(it.sample_seq[0])))
                    self.blocks.append((now, int(it.sample_seq[0]), int(it.sample_seq[-1]) + int(it.counts[-1])))
            send, reboots = self.rules.observe(items, now)
            self.reboot_texts += [(now, r) for r in reboots]
            self._send(send)
            out = self.assembler.feed(items, host_s=now)
            if self.engine is not None:
                self.events += self.engine.feed(out)
        if self.engine is not None:
            self.events += self.engine.flush()


def record_capture(path, stream, seconds: float, start_after_s: float = 0.0, port: str = "sim://") -> None:
    """Write ``stream`` (a SimStream in fast mode) to a capture the way the link does: raw bytes as
    they arrive, stamped on arrival, the device description first, the recording starting at
    ``start_after_s`` of simulated time (mid-stream when > 0)."""
    from monitor.capture import CaptureWriter
    from monitor.session_rules import SessionRules

    rules, dec = SessionRules(), fp.StreamDecoder(merge=True)
    rules.start(0.0)
    w = None
    while stream.time_s < seconds:
        data = stream.produce_chunk()
        now = stream.time_s
        rules.observe(dec.feed(data), now)
        if w is None and now >= start_after_s:
            w = CaptureWriter(path, {"port": port, "conditions": {"props": "off"}}, clock=lambda: 0.0)
        if w is not None:
            if rules.last_info is not None and not w.has_device:
                w.write_device(fp.encode_frame(rules.last_info, 0), now)
            w.write_data(data, now)
    w.close({})


def tap_capture(path, scenario: str = "quillback7", taps: int = 5, seed: int = 1, spacing_s: float = 1.2):
    """A capture (as the link writes it) of ``taps`` taps on a scenario's frame, motors stopped:
    taps at 1.0 s and every ``spacing_s`` after, on the arm tips in turn. Returns the scenario."""
    from dataclasses import replace

    from simulators.device import DeviceOptions
    from simulators.faults import FaultPlan
    from simulators.scenario import Tap, load_scenario
    from simulators.stream import SimStream, StreamOptions

    sc = load_scenario(scenario)
    sc = replace(sc, taps=tuple(Tap(at_s=1.0 + spacing_s * k, target=k % sc.motors.count + 1, strength=200.0)
                                for k in range(taps)))
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, script=False, seed=seed), FaultPlan(),
                       StreamOptions(realtime=False))
    record_capture(path, stream, 1.0 + spacing_s * taps + 0.2, port=f"sim://{scenario}")
    return sc


def sweep_capture(path, scenario: str, seed: int = 1, one_at_a_time: bool = False, telemetry: bool = True):
    """A capture (as the link writes it) of a scenario's own throttle script: all motors together,
    or the script once per motor in turn (``one_at_a_time``). Returns the scenario."""
    from dataclasses import replace

    from simulators.device import DeviceOptions
    from simulators.faults import FaultPlan
    from simulators.scenario import load_scenario
    from simulators.stream import SimStream, StreamOptions

    sc = load_scenario(scenario)
    if not telemetry:
        sc = replace(sc, motors=replace(sc.motors, telemetry=False))
    opts = DeviceOptions(stream_at_boot=True, seed=seed, one_at_a_time=one_at_a_time)
    stream = SimStream(sc, opts, FaultPlan(), StreamOptions(realtime=False))
    turns = sc.motors.count if one_at_a_time else 1
    record_capture(path, stream, sc.script_duration_s * turns, port=f"sim://{scenario}")
    return sc
