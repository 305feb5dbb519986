"""The live path end to end: captures, replay equality, reconnects, hints, faults, bounded memory."""

from __future__ import annotations

import json
import os
import random
import re
import resource
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

import firmware_protocol as fp
from monitor.assembler import Assembler, Gap, Samples
from monitor.capture import CaptureError, CaptureWriter, read_capture
from monitor.engine import Engine, EngineConfig
from monitor.link import Link
from monitor.profile import load_profile
from monitor.session import Session
from monitor.spectra import RollingSTFT, SpectrumConfig
from simulators.device import DeviceOptions
from simulators.faults import FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions

PROFILE = Path(__file__).resolve().parents[1] / "monitor" / "profiles" / "quillback7.toml"


def spinrig(*args, **kw):
    return subprocess.run([sys.executable, "-m", "monitor", *args], capture_output=True, text=True, timeout=180, **kw)


# ---------------------------------------------------------------- captures


def test_capture_round_trip_and_a_cut_tail(tmp_path):
    f = tmp_path / "c.spinrec"
    clock = iter(np.arange(0, 100, 0.1)).__next__
    w = CaptureWriter(f, {"port": "sim://x", "conditions": {"props": "off"}}, clock=clock)
    for i in range(20):
        w.write_data(bytes([i + 1]) * 100)
    w.write_gap({"reason": "reconnect"})
    w.close({"link": {"bytes": 2000}})
    c = read_capture(f)
    assert c.ended_cleanly and c.meta["port"] == "sim://x" and c.data_bytes == 2000 and c.cut_bytes == 0
    assert [ch.kind for ch in c.chunks].count("G") == 1
    raw = f.read_bytes()
    (tmp_path / "cut.spinrec").write_bytes(raw[:-30])
    cut = read_capture(tmp_path / "cut.spinrec")
    assert cut.cut_bytes > 0 and "incomplete chunk" in cut.cut_message() and cut.data_bytes == 2000
    with pytest.raises(CaptureError, match=r"not a spinrig capture \(bad magic at byte 0\)"):
        (tmp_path / "bad.spinrec").write_bytes(b"hello world")
        read_capture(tmp_path / "bad.spinrec")


def test_capture_flushes_every_half_second(tmp_path):
    now = [0.0]
    w = CaptureWriter(tmp_path / "f.spinrec", {}, clock=lambda: now[0])
    base = (tmp_path / "f.spinrec").stat().st_size
    w.write_data(b"x" * 10, 0.1)
    assert (tmp_path / "f.spinrec").stat().st_size == base  # buffered
    now[0] = 0.6
    w.write_data(b"y" * 10, 0.6)
    assert (tmp_path / "f.spinrec").stat().st_size > base  # flushed after 0.5 s
    w.close()


def test_kill_9_leaves_a_readable_capture(tmp_path):
    f = tmp_path / "k.spinrec"
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "watch", "sim://quillback7?stream=1&seed=3", "--headless",
                             "--capture", str(f), "--duration", "60"], stdout=subprocess.PIPE, text=True)
    try:
        assert "BENCH SAFETY" in proc.stdout.readline()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and (not f.exists() or f.stat().st_size < 200_000):
            time.sleep(0.05)  # waiting for the file to grow, not for synchronisation between threads
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(10)
    c = read_capture(f)
    assert not c.ended_cleanly and c.data_bytes >= 150_000
    dec = fp.StreamDecoder()
    for ch in c.chunks:
        dec.feed(ch.payload)
    assert dec.counters.frames_ok > 1000


def test_a_full_disk_stops_the_capture_cleanly(tmp_path):
    f = tmp_path / "full.spinrec"

    def limit():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (300_000, 300_000))

    proc = subprocess.run([sys.executable, "-m", "monitor", "watch", "sim://quillback7?stream=1&fast=1", "--headless",
                           "--capture", str(f), "--duration", "3"], capture_output=True, text=True, timeout=120,
                          preexec_fn=limit)
    assert proc.returncode == 1, proc.stderr  # the run ends, but it says the capture failed
    assert "write failed" in proc.stderr
    line = next(ln for ln in proc.stdout.splitlines() if "write failed" in ln)
    assert f"capture {f}: write failed after" in line and "the file is readable" in line
    c = read_capture(f)
    assert c.data_bytes > 100_000 and f.stat().st_size <= 300_000


# ---------------------------------------------------------------- live equals replay


def test_replay_gives_the_live_events(tmp_path):
    cap, live, again = tmp_path / "r.spinrec", tmp_path / "live.jsonl", tmp_path / "replay.jsonl"
    url = "sim://quillback7?fast=1&seed=5"
    proc = spinrig("watch", url, "--headless", "--profile", str(PROFILE), "--capture", str(cap), "--events", str(live),
                   "--duration", "4", "--overlap", "0.875")
    assert proc.returncode == 0, proc.stderr
    proc2 = spinrig("replay", str(cap), "--headless", "--profile", str(PROFILE), "--events", str(again),
                    "--overlap", "0.875", "--json")
    assert proc2.returncode == 0, proc2.stderr
    a = live.read_text().splitlines()
    b = again.read_text().splitlines()
    crossings = [x for x in a if '"crossing"' in x]
    # on a mismatch, say where it starts and what each side processed (link health, frames, samples)
    first = next((i for i, (x, y) in enumerate(zip(a, b, strict=False)) if x != y), min(len(a), len(b)))
    why = (f"events differ from #{first} of {len(a)} live / {len(b)} replayed; live summary "
           f"{proc.stdout.splitlines()[-12:]}; replay summary {proc2.stdout.splitlines()[-1][:600]}")
    assert len(crossings) > 10 and a == b, why
    assert json.loads(proc2.stdout.splitlines()[-1])["kind"] == "summary"


def test_export_csv_then_watch_the_csv(tmp_path):
    cap = tmp_path / "e.spinrec"
    proc = spinrig("watch", "sim://quillback7?fast=1&seed=6", "--headless", "--capture", str(cap), "--duration", "2")
    assert proc.returncode == 0, proc.stderr
    assert spinrig("export", str(cap), "--csv").returncode == 0
    csv = cap.with_suffix(".csv")
    head = csv.read_text().splitlines()[0]
    assert head == "time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps,rpm_1,rpm_2,rpm_3,rpm_4"
    out = spinrig("watch", str(csv), "--headless", "--profile", str(PROFILE), "--json")
    assert out.returncode == 0, out.stderr
    rows = len(csv.read_text().splitlines()) - 1
    summary = json.loads(out.stdout.splitlines()[-1])
    # every sample came back: 256 ms frames (2048 samples) every 64 ms (512) over all the rows
    assert summary["kind"] == "summary" and summary["frames"] == (rows - 2048) // 512 + 1
    assert spinrig("export", str(cap), "--npz").returncode == 0
    z = np.load(cap.with_suffix(".npz"))
    assert z["gyro_dps"].shape[1] == 3 and z["rpm"].shape[1] == 4 and z["time_s"].size == z["gyro_dps"].shape[0]


# ---------------------------------------------------------------- link behaviour


def _serve_garbage(stop: threading.Event):
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(1)
    port = srv.getsockname()[1]

    def run():
        conn, _ = srv.accept()
        rng = random.Random(1)
        while not stop.is_set():
            conn.sendall(bytes(rng.randrange(256) for _ in range(512)))
            stop.wait(0.01)
        conn.close()
        srv.close()

    threading.Thread(target=run, daemon=True).start()
    return f"socket://127.0.0.1:{port}"


def _hint(link, seconds=5.0):
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        try:
            item = link.queue.get(timeout=0.1)
        except Exception:  # noqa: BLE001 - queue.Empty
            continue
        if getattr(item, "kind", "") == "hint":
            return item.text
    return None


def test_hint_for_wrong_baud_garbage():
    stop = threading.Event()
    link = Link(_serve_garbage(stop), heartbeat=False)
    link.start()
    try:
        text = _hint(link)
    finally:
        stop.set()
        link.close()
    assert text and "within 1.5 s" in text and "bytes received" in text and "wrong baud rate" in text


def test_hint_when_nothing_arrives():
    master, slave = os.openpty()
    import tty

    tty.setraw(slave)
    link = Link(os.ttyname(slave), heartbeat=False)
    link.start()
    try:
        text = _hint(link)
    finally:
        link.close()
        os.close(master)
        os.close(slave)
    assert text and "0 bytes received" in text and "wrong port" in text


def test_tcp_disconnect_reconnects_within_a_second_of_the_port_returning():
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "sim", "pipit3", "--tcp", "0", "--fault",
                             "disconnect=2:2", "--duration", "30"], stdout=subprocess.PIPE, text=True)
    try:
        proc.stdout.readline()
        url = proc.stdout.readline().split("spinrig watch ", 1)[1].split()[0]
        t0 = time.monotonic()
        eng = Engine(EngineConfig())
        link = Link(url)
        link.start()
        session = Session(eng, link)
        events = []
        back_at = None
        while time.monotonic() - t0 < 12 and back_at is None:
            for e in session.pump(timeout=0.1):
                events.append(e)
                if e.as_dict()["kind"] == "reconnect":
                    back_at = time.monotonic() - t0
        link.close()
    finally:
        proc.kill()
        proc.wait()
    assert back_at is not None and link.health.reconnects == 1
    msgs = [e.as_dict()["message"] for e in events if e.as_dict()["kind"] == "link"]
    gone = [i for i, m in enumerate(msgs) if "port gone" in m]
    back = [i for i, m in enumerate(msgs) if re.search(r"port back after \d+\.\d s \(reconnect 1\)", m)]
    assert gone and back and gone[0] < back[0], msgs  # when it happened is the simulator tests' job


def _pipeline(url_faults, seconds, scenario="quillback7", **dev):
    sc = load_scenario(scenario)
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, **dev), FaultPlan.parse(url_faults),
                       StreamOptions(realtime=False))
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    out = []
    while stream.time_s < seconds:
        out += asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s)
    return stream, dec, asm, out


def test_corrupt_frames_are_counted_and_bridged_holes_never_pass_as_data():
    stream, dec, asm, out = _pipeline(["corrupt=0.0005"], 10.0)
    c = dec.counters
    assert c.crc_errors + c.malformed > 0 and stream.mangler.flipped > 0
    # each lost frame is a short hole: bridged, counted, and masked for the spectra
    assert asm.stats.holes_bridged > 10 and asm.stats.gaps == 0
    filled = sum(int((~o.valid).sum()) for o in out if isinstance(o, Samples) and o.valid is not None)
    assert filled == asm.stats.samples_filled == asm.stats.samples_lost > 0
    cfg = SpectrumConfig(8000.0, 0.064, 0.5)
    stft = RollingSTFT(cfg)
    frames = masked = 0
    for o in out:
        if isinstance(o, Samples):
            fb = stft.push(o.dps, o.valid)
            if fb is not None:
                frames += len(fb)
                masked += int(np.count_nonzero(fb.filled))
    assert frames > 0 and 0 < masked < frames
    # and at 1 % of bytes (most frames hit) nothing crashes and every bad frame is counted
    stream, dec, asm, out = _pipeline(["corrupt=0.01"], 3.0)
    assert dec.counters.crc_errors + dec.counters.malformed + dec.counters.oversize > 1000


def test_device_reboot_resets_the_time_base():
    stream, dec, asm, out = _pipeline(["reboot=2.0"], 4.0)
    assert asm.stats.reboots == 1
    assert [g.reason for g in out if isinstance(g, Gap)] == ["device reboot"]
    t = [o.t0_s for o in out if isinstance(o, Samples)]
    assert np.all(np.diff(t) > 0) and t[-1] == pytest.approx(4.0, abs=0.2)


def _rss_kb() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") // 1024


def test_an_hour_at_8_khz_does_not_grow_memory():
    # The full host pipeline (decoder, assembler, engine, crossing watch, stray search) over one
    # hour of 8 kHz stream in fast mode; the simulator runs one mode at its lowest internal rate
    # to keep the hour cheap. Resident memory after warm-up must grow by under 5 MB.
    sc = load_scenario("quillback7")
    sc = replace(sc, modes=sc.modes[:2])
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, chunk_periods=40, min_internal_hz=8000),
                       FaultPlan(), StreamOptions(realtime=False))
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    eng = Engine(EngineConfig(), load_profile(PROFILE))
    warm = None
    while stream.time_s < 3600.0:
        eng.feed(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
        if warm is None and stream.time_s >= 300.0:
            warm = _rss_kb()
        eng.events.clear()  # a consumer drains events; the engine itself keeps at most 10 000
    grown = _rss_kb() - warm
    assert dec.counters.bad_frames == 0 and asm.stats.samples >= 28_000_000
    assert grown < 5 * 1024, f"resident memory grew by {grown} kB"


def test_detector_batching_and_stream_cuts_never_change_the_events():
    # detectors run over the frames gathered since their last run (EngineConfig.detect_every_s);
    # the events, their order, the bands and the final readings must not depend on that batching
    # nor on how the stream was cut, including across a device reboot and samples dropped on the wire
    _, _, _, items = _pipeline(["reboot=3.0", "drop=0.00005"], 8.0, seed=4)
    profile = load_profile(PROFILE)
    rng = random.Random(9)

    def run(detect_every_s, cut):
        eng = Engine(EngineConfig(window_s=0.128, overlap=0.75, detect_every_s=detect_every_s), profile)
        events, k = [], 0
        while k < len(items):
            n = 1 if not cut else rng.randint(1, cut)
            events += eng.feed(items[k : k + n])
            k += n
        events += eng.flush()
        snap = eng.snapshot()
        return [e.as_dict() for e in events], snap.bands, snap.rpm.tolist(), eng.detected, eng.frames

    every_frame = run(0.0, 0)
    assert len([e for e in every_frame[0] if e["kind"] == "crossing"]) >= 3
    kinds = {e["kind"] for e in every_frame[0]}
    assert {"reboot", "nearing", "clear"} <= kinds  # (the dropped bytes are short holes: bridged)
    assert every_frame[3] == every_frame[4]  # after flush every frame has been seen by the detectors
    for every, cut in [(0.1, 0), (0.1, 7), (0.5, 3), (2.0, 40)]:
        assert run(every, cut) == every_frame, (every, cut)


class _QueueOnly:
    """Just the part of a Link that a Session reads: its queue, filled by the test."""

    def __init__(self):
        import queue

        self.queue = queue.Queue()


def test_an_idle_link_finishes_the_waiting_frames():
    # nothing arrives for a while: the frames still waiting for the detectors are finished
    _, _, _, items = _pipeline([], 2.0)

    link = _QueueOnly()
    eng = Engine(EngineConfig(detect_every_s=10.0), load_profile(PROFILE))
    session = Session(eng, link)
    link.queue.put((0.0, []))
    for it in items:
        eng.feed([it])
    assert eng.detected < eng.frames
    session.pump(timeout=0.0)  # the queued entry
    session.pump(timeout=0.0)  # nothing: idle
    assert eng.detected == eng.frames


def test_drain_after_the_link_stops_processes_every_entry_and_finishes_the_frames():
    # what headless watch does when it stops: nothing queued may be left, no frame left undetected
    _, _, _, items = _pipeline([], 2.0)

    link = _QueueOnly()
    eng = Engine(EngineConfig(detect_every_s=10.0), load_profile(PROFILE))
    session = Session(eng, link)
    eng.feed(items[:1])  # the device description
    for _ in range(300):  # more entries than one pump takes, and none of them causes an event
        link.queue.put((0.0, []))
    session.assembler.feed = lambda raw, host_s: items[1:] if raw == ["last"] else []
    link.queue.put((0.0, ["last"]))
    session.drain()
    assert link.queue.empty() and eng.frames > 0 and eng.detected == eng.frames
