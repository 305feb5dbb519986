"""The simulator reached the way a host reaches hardware: a pty, TCP, and the sim:// URL handler;
plus its byte faults and UART emulation."""

from __future__ import annotations

import queue
import threading
import time

import numpy as np
import pytest
import serial

import firmware_protocol as fp
import simulators
from simulators.device import DeviceOptions
from simulators.faults import FaultError, FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions
from simulators.transports import serve_pty, serve_tcp

simulators.register()
START = fp.encode_frame(fp.RequestInfo(), 0) + fp.encode_frame(fp.StreamControl(1), 1)


def _serve(kind, stream, duration):
    ready: queue.Queue[str] = queue.Queue()
    stop = threading.Event()
    kw = {"duration": duration, "stop": stop}
    if kind == "pty":
        th = threading.Thread(target=serve_pty, args=(stream, ready.put), kwargs=kw)
    else:
        th = threading.Thread(target=serve_tcp, args=(stream, 0, ready.put), kwargs=kw)
    th.start()
    return ready.get(timeout=10), stop, th


def _read_until(port, dec, samples, deadline_s):
    got = 0
    end = time.monotonic() + deadline_s
    while got < samples and time.monotonic() < end:
        for item in dec.feed(port.read(4096)):
            if isinstance(item, fp.GyroBatch):
                got += item.samples.shape[0]
    return got


@pytest.mark.parametrize("kind", ["pty", "tcp"])
def test_plain_pyserial_reads_decodable_frames(kind):
    stream = SimStream(load_scenario("pipit3"), DeviceOptions(seed=4))
    where, stop, th = _serve(kind, stream, 20.0)
    try:
        if kind == "pty":
            port = serial.Serial(where, 921600, timeout=0.05)  # the real POSIX port class
        else:
            port = serial.serial_for_url(where, timeout=0.05)
        port.write(START)
        dec = fp.StreamDecoder()
        got = _read_until(port, dec, 4000, 10.0)  # one second of 4 kHz samples
        port.close()
    finally:
        stop.set()
        th.join(10)
    assert got >= 4000
    assert dec.counters.bad_frames == 0 and dec.counters.frames_lost == 0
    assert dec.counters.frames_ok > 700  # 500 gyro blocks + 250 motor states a second


def _blocks(port, dec, samples, deadline_s):
    """(device time of each gyro block in s, its first sample_seq) until ``samples`` arrived;
    the deadline only guards against a hang."""
    out, got = [], 0
    end = time.monotonic() + deadline_s
    while got < samples and time.monotonic() < end:
        for item in dec.feed(port.read(4096)):
            if isinstance(item, fp.GyroBatch):
                out += list(zip((item.t_us * 1e-6).tolist(), item.sample_seq.tolist(), strict=True))
                got += item.samples.shape[0]
    return out


def test_tcp_disconnect_and_reconnect():
    # disconnect at 1.0 s for 1.5 s of the simulator's clock: judged on the device's own clock
    faults = FaultPlan.parse(["disconnect=1.0:1.5"])
    stream = SimStream(load_scenario("pipit3"), DeviceOptions(stream_at_boot=True), faults)
    where, stop, th = _serve("tcp", stream, 30.0)
    try:
        port = serial.serial_for_url(where, timeout=0.05)
        dec = fp.StreamDecoder(merge=True)
        before = []
        lost = False
        t0 = time.monotonic()
        while time.monotonic() - t0 < 10 and not lost:  # a guard against a hang, not a measurement
            try:
                before += _blocks(port, dec, 1, 0.1)
            except serial.SerialException:
                lost = True
        assert lost and before
        after = []
        while time.monotonic() - t0 < 20 and not after:
            try:
                port = serial.serial_for_url(where, timeout=0.05)
                port.write(fp.encode_frame(fp.RequestInfo(), 0))
                after = _blocks(port, fp.StreamDecoder(merge=True), 400, 1.0)
            except serial.SerialException:
                pass
        assert after
        last_before, first_after = before[-1][0], after[0][0]
        assert 0.9 <= last_before <= 1.0  # the link went at 1.0 s of device time
        assert 2.5 <= first_after <= 2.6  # and came back at 2.5 s: nothing between was delivered
        odr = stream.device.odr
        assert after[0][1] - before[-1][1] == pytest.approx((first_after - last_before) * odr, abs=1)
        port.close()
    finally:
        stop.set()
        th.join(10)


def test_sim_url_fast_mode_and_options():
    port = serial.serial_for_url("sim://quillback7?seed=2&fast=1", timeout=0.1)
    assert isinstance(port, simulators.urlhandler.protocol_sim.Serial)
    port.write(START)
    dec = fp.StreamDecoder()
    assert _read_until(port, dec, 80_000, 30.0) >= 80_000  # 10 s of stream, far faster than real time
    assert dec.counters.bad_frames == 0
    assert port.sim.device.time_s >= 10.0
    port.close()


@pytest.mark.parametrize(
    ("url", "match"),
    [
        ("sim://quillback7?colour=1", "unknown option 'colour'"),
        ("sim://nowhere", "no scenario 'nowhere'"),
        ("sim://quillback7?seed=x", "seed='x' is not an integer"),
        ("sim://quillback7?fault=melt=1", "fault 'melt=1'"),
        ("sim://?seed=1", "no scenario name"),
    ],
)
def test_sim_url_errors_name_the_problem(url, match):
    with pytest.raises(serial.SerialException, match=match):
        serial.serial_for_url(url)


def test_sim_url_disconnect_in_fast_mode_then_reattach():
    url = "sim://pipit3?fast=1&stream=1&fault=disconnect=2:1"
    port = serial.serial_for_url(url, timeout=0.1)
    with pytest.raises(serial.SerialException, match="disconnected"):
        for _ in range(10_000):
            port.read(4096)
    assert port.sim.time_s >= 3.0  # the link stayed down for 1 s of simulated time
    port.close()
    port = serial.serial_for_url(url, timeout=0.1)  # the same device, reattached
    dec = fp.StreamDecoder()
    assert _read_until(port, dec, 400, 5.0) >= 400 and port.sim.device.boots == 1
    port.close()


def _fast(faults, seconds=2.0, **stream_opts):
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True, script=False),
                       FaultPlan.parse(faults), StreamOptions(realtime=False, **stream_opts))
    dec = fp.StreamDecoder()
    data = bytearray()
    while stream.time_s < seconds:
        chunk = stream.produce_chunk()
        data += chunk
        dec.feed(chunk)
    return stream, dec, bytes(data)


def test_corruption_is_counted_by_the_decoder():
    stream, dec, _ = _fast(["corrupt=0.001"])
    flipped = stream.mangler.flipped
    assert 100 < flipped < 300  # 0.1 % of about 150 kB
    bad = dec.counters.bad_frames + dec.counters.frames_lost
    assert bad >= 0.8 * flipped and dec.counters.frames_ok > 1700  # of about 2020 frames in 2 s


def test_drops_and_garbage():
    stream, dec, data = _fast(["drop=0.01", "garbage=20:50"])
    assert stream.mangler.dropped > 0 and stream.mangler.garbage_bytes >= 20 * 50 // 2
    assert dec.counters.bytes_skipped > stream.mangler.garbage_bytes
    assert dec.counters.frames_ok > 0


def test_stall_holds_bytes_then_releases_the_backlog():
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True, script=False),
                       FaultPlan.parse(["stall=1.0:0.5"]))
    before = len(stream.produce(0.999999))
    during = len(stream.produce(1.2)) + len(stream.produce(1.49))
    after = len(stream.produce(1.51))
    assert before > 60_000 and during == 0 and after > 30_000


def test_uart_emulation_paces_and_drops_when_overloaded():
    stream, dec, data = _fast([], baud=460_800)
    assert len(data) <= 46_080 * 2.05 and stream.uart_dropped > 0 and dec.counters.bad_frames > 0
    stream, dec, data = _fast([], baud=2_000_000)
    assert stream.uart_dropped == 0 and dec.counters.bad_frames == 0


@pytest.mark.parametrize(
    ("spec", "match"),
    [
        ("melt=1", "NAME one of corrupt"),
        ("corrupt=2", "between 0 and 1"),
        ("stall=3", "stall takes A:B"),
        ("drop=abc", "'abc' is not a number"),
        ("disconnect=-1:2", "not negative"),
    ],
)
def test_fault_spec_errors(spec, match):
    with pytest.raises(FaultError, match=match):
        FaultPlan.parse([spec])


def test_realtime_sim_url_paces_by_the_clock():
    """The sim:// port releases what the device has sent by the port's clock (injected here), no
    more: the simulator's clock decides, not how fast the reader reads."""
    port = serial.serial_for_url("sim://pipit3?stream=1&seed=8", timeout=0)
    fake = [0.0]
    port._now = lambda: fake[0]
    dec = fp.StreamDecoder(merge=True)
    odr = port._stream.device.odr
    seen = 0
    for t in (0.25, 0.5, 1.0, 1.5):
        fake[0] = t
        for item in dec.feed(port.read(1 << 20)):
            if isinstance(item, fp.GyroBatch):
                seen = int(item.sample_seq[-1]) + int(item.counts[-1])
        assert t * odr - 0.02 * odr <= seen <= t * odr  # up to the newest block (5 ms) due by then
        assert port.read(1 << 20) == b""  # nothing more until the clock moves
    port.close()


def test_a_host_write_between_reads_loses_nothing():
    """A host command makes the device catch up to "now" before it hears it; what the device sent
    meanwhile must still reach the host (it was once dropped at every write: heartbeats every
    100 ms lost the frames due since the last read, thousands of samples a minute under load)."""
    port = serial.serial_for_url("sim://pipit3?stream=1&seed=8", timeout=0)
    fake = [0.0]
    port._now = lambda: fake[0]
    dec = fp.StreamDecoder(merge=True)
    odr = port._stream.device.odr
    samples = 0
    for k in range(1, 21):
        fake[0] = 0.1 * k - 0.05
        port.write(fp.encode_frame(fp.HostHeartbeat(0), k & 0xFF))  # frames due by now wait unread
        fake[0] = 0.1 * k
        for item in dec.feed(port.read(1 << 20)):
            if isinstance(item, fp.GyroBatch):
                samples += int(item.counts.sum())
    assert dec.counters.frames_lost == 0 and dec.counters.crc_errors == 0
    assert 2.0 * odr - 0.02 * odr <= samples <= 2.0 * odr  # every sample due in 2 s, lost none
    port.close()


def test_a_read_waits_for_its_size_or_the_timeout_as_a_real_port_does():
    """pyserial's POSIX port returns from read(size) with ``size`` bytes or at the timeout, not at
    the first byte; sim:// does the same, so a reader thread reads in blocks, not frame by frame."""
    port = serial.serial_for_url("sim://pipit3?stream=1&seed=8", timeout=5.0)  # the timeout: a hang guard
    clock = iter(np.arange(1, 100000) * 0.001)  # the port's clock moves 1 ms each time it is read
    port._now = lambda: float(next(clock))
    assert len(port.read(4096)) == 4096  # blocks trickle in, 5 ms apart: the read waits for all
    port.timeout = 0
    port._now = lambda: 0.0  # the clock stops: a read with timeout 0 gives what is there, at once
    assert len(port.read(1 << 20)) < 4096
    assert port.read(10) == b""
    port.close()
