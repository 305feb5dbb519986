"""Faults a real bench has (reboots, lossy and stalling links, pulled cables, drifting clocks,
damaged captures, full disks, bad options) never end a run silently or lose what could be kept.

Simulated-time tests run the host's own session rules on the simulator's clock
(:class:`tests.sim_helpers.SessionHost`); the few real-time ones only bound durations from below.
"""

from __future__ import annotations

import os
import pty
import re
import resource
import select
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal as sps

import firmware_protocol as fp
from monitor.capture import CaptureError, CaptureWriter, read_capture
from monitor.engine import Engine, EngineConfig
from monitor.export import decode_capture
from monitor.link import Link
from monitor.profile import ProfileError, load_profile, profile_warnings
from monitor.session_rules import ASK_EVERY_S, SessionRules
from monitor.spectra import RollingSTFT, SpectrumConfig
from simulators.device import DeviceOptions
from simulators.faults import FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions
from tests.conftest import examples
from tests.sim_helpers import SessionHost, record_capture

ROOT = Path(__file__).resolve().parents[1]


def spinrig(*args, timeout=180, **kw):
    return subprocess.run([sys.executable, "-m", "monitor", *args], capture_output=True, text=True,
                          timeout=timeout, cwd=ROOT, **kw)


def host_run(faults, seconds, scenario="quillback7", seed=1, engine=True, **dev) -> SessionHost:
    stream = SimStream(load_scenario(scenario), DeviceOptions(seed=seed, **dev), FaultPlan.parse(faults),
                       StreamOptions(realtime=False))
    eng = Engine(EngineConfig(), load_profile(scenario)) if engine else None
    h = SessionHost(stream, eng)
    h.run_until(seconds)
    return h


def groups(h: SessionHost, state: str) -> set:
    return {(e.mode_hz, e.order) for e in h.events if getattr(e, "state", None) == state}


# ---------------------------------------------------------------- reboots


def test_after_a_reboot_streaming_is_back_within_half_a_second():
    # a device that waits for STREAM_CONTROL after boot (SPEC.md 2.3): the host must ask again
    h = host_run(["reboot=4"], 6.0)
    assert h.assembler.stats.reboots == 1 and h.rules.counts.reboots_seen == 1
    (t_seen, text), = h.reboot_texts
    assert "boot id" in text and 3.9 <= t_seen <= 4.1
    back = [(t, seq) for t, seq in h.first_block_after if t > t_seen and seq < 8000 * 0.5]
    assert back, "no gyro data after the reboot"
    t_back, first_seq = back[0]
    assert t_back - 4.0 <= 0.5 and first_seq < 8000 * 0.5  # the new boot's counter, early in it
    assert [e.as_dict()["kind"] for e in h.events].count("reboot") == 1
    assert h.engine.frames > 0.9 * 6.0 / 0.064  # spectra go on after it


# ---------------------------------------------------------------- lossy links


@pytest.fixture(scope="module")
def clean_run():
    return host_run([], 12.0)


@pytest.mark.parametrize("fault", ["drop=0.001", "corrupt=0.0005", "corrupt=0.01"])
def test_lossy_links_keep_spectra_and_every_warning(clean_run, fault):
    h = host_run([fault], 12.0)
    s = h.assembler.stats
    assert s.holes_bridged > 10 and s.samples_filled > 0  # faults happened, holes were bridged
    assert h.engine.frames >= 0.9 * clean_run.engine.frames
    # every passage the clean link warned about is warned about, nearing first
    assert groups(h, "crossing") == groups(clean_run, "crossing") != set()
    for g in groups(h, "crossing"):
        states = [e.state for e in h.events if getattr(e, "state", None) and (e.mode_hz, e.order) == g]
        assert states.index("nearing") < states.index("crossing"), (g, states)


def test_the_description_is_asked_for_until_it_comes():
    # seed 0 at 3 % byte loss loses the first answers (measured: known after 5 requests, 2.2 s)
    h = host_run(["drop=0.03"], 4.0, seed=0, engine=False)
    assert h.rules.device_known and h.rules.counts.info_requests >= 2
    assert h.assembler.stats.samples > 0


def test_session_rules_repeat_at_their_period_and_stop_when_answered():
    rules = SessionRules()
    sent = [(0.0, rules.start(0.0))]
    for t in np.arange(0.05, 2.0, 0.05):
        sent.append((t, rules.tick(float(t))))
    info_at = [t for t, msgs in sent if any(isinstance(m, fp.RequestInfo) for m in msgs)]
    assert np.all(np.diff(info_at) >= ASK_EVERY_S - 1e-9) and len(info_at) == 4  # 0, 0.5, 1.0, 1.5
    info = fp.DeviceInfo(**{**_device_info_fields(), "boot_id": 7})
    send, reboots = rules.observe([fp.Received(0, info)], 2.0)
    assert rules.device_known and not reboots and all(not isinstance(m, fp.RequestInfo) for m in send)
    assert not any(isinstance(m, fp.RequestInfo) for t in np.arange(2.05, 4, 0.05) for m in rules.tick(float(t)))
    send, reboots = rules.observe([fp.Received(1, fp.DeviceStatus(**{**_status_fields(), "boot_id": 8}))], 4.0)
    assert reboots == ["boot id 7 -> 8"] and any(isinstance(m, fp.RequestInfo) for m in send)


def _device_info_fields() -> dict:
    import dataclasses

    return {f.name: f.default for f in dataclasses.fields(fp.DeviceInfo)
            if f.default is not dataclasses.MISSING} | _required(fp.DeviceInfo)


def _status_fields() -> dict:
    return _required(fp.DeviceStatus)


def _required(cls) -> dict:
    """Plausible values for a message's fields (from one the simulator really sends)."""
    stream = SimStream(load_scenario("pipit3"), DeviceOptions(stream_at_boot=True), FaultPlan(),
                       StreamOptions(realtime=False))
    dec = fp.StreamDecoder()
    while True:
        for it in dec.feed(stream.produce_chunk()):
            m = getattr(it, "message", None)
            if isinstance(m, cls):
                import dataclasses

                return {f.name: getattr(m, f.name) for f in dataclasses.fields(m)}


def _wait_for(cond, seconds):
    """Poll a condition the test cannot be told about (another thread's progress), bounded."""
    deadline = time.monotonic() + seconds
    while not cond() and time.monotonic() < deadline:
        time.sleep(0.02)
    return cond()


def test_hint_names_the_missing_description_and_the_requests():
    # loop:// echoes: our own requests come back as frames, plus gyro frames nobody described
    link = Link("loop://", heartbeat=False)
    link.start()
    try:
        samples = np.zeros((32, 3), np.int16)
        link._port.write(b"".join(fp.encode_frame(fp.GyroBlock(32 * i, 4000 * i, samples), i) for i in range(20)))
        assert _wait_for(lambda: link.decoder.counters.frames_ok > 5, 10)
        assert _wait_for(lambda: link.health.info_requests >= 2, 10)
        text = link.hint()
    finally:
        link.close()
    assert "no DEVICE_INFO after" in text and "requests, one every 0.5 s" in text and "lossy link" in text


# ---------------------------------------------------------------- stalls and pulled cables (real time)


def _messages(url, seconds, until):
    link = Link(url, heartbeat=False)
    link.start()
    got = []
    t0 = time.monotonic()
    try:
        while time.monotonic() - t0 < seconds and not until(got):
            try:
                e = link.queue.get(timeout=0.1)
            except Exception:
                continue
            if hasattr(e, "kind"):
                got.append((time.monotonic() - t0, e))
    finally:
        link.close()
    return got, link


def test_a_stall_is_reported_as_silence_with_its_length():
    got, link = _messages("sim://pipit3?stream=1&fault=stall=1:2", 15,
                          lambda g: any(m.kind == "resumed" for _, m in g))
    kinds = [m.kind for _, m in got]
    assert "silent" in kinds and "resumed" in kinds and kinds.index("silent") < kinds.index("resumed")
    text = next(m.text for _, m in got if m.kind == "resumed")
    assert re.fullmatch(r".*: data again after \d+\.\d s of silence", text) and link.health.silences == 1


def test_a_pulled_cable_is_reported_as_port_gone_and_back_after_its_length():
    got, link = _messages("sim://pipit3?stream=1&fault=disconnect=1:2", 20,
                          lambda g: any(m.kind == "reconnected" for _, m in g))
    kinds = [m.kind for _, m in got]
    assert "disconnected" in kinds and "reconnected" in kinds
    gone = next(m.text for _, m in got if m.kind == "disconnected")
    back = next(m.text for _, m in got if m.kind == "reconnected")
    assert "port gone" in gone and "port back after" in back
    assert re.search(r"port back after \d+\.\d s", back) and link.health.reconnects == 1


# ---------------------------------------------------------------- device clock drift


@pytest.mark.parametrize("ppm", [5000.0, -3000.0])
def test_device_clock_drift_is_measured_within_five_percent(ppm):
    h = host_run([f"drift={ppm:g}"], 60.0, engine=False)
    assert h.assembler.stats.drift_ppm == pytest.approx(ppm, rel=0.05)
    assert h.assembler.stats.drift_note == ""


def test_a_short_run_says_why_there_is_no_drift_figure():
    h = host_run([], 4.0, engine=False)
    assert h.assembler.stats.drift_ppm is None and "of 10 s of device time seen" in h.assembler.stats.drift_note


# ---------------------------------------------------------------- captures


def _capture_of_a_stream(path, seconds=3.0, start_after_s=0.0) -> None:
    """A Quillback 7 stream recorded as the link records it (``tests.sim_helpers.record_capture``)."""
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True, seed=2), FaultPlan(),
                       StreamOptions(realtime=False))
    record_capture(path, stream, seconds, start_after_s, port="sim://quillback7")


def test_a_capture_started_mid_stream_replays_on_its_own(tmp_path):
    f = tmp_path / "mid.spinrec"
    _capture_of_a_stream(f, 3.0, start_after_s=1.0)
    c = read_capture(f)
    assert [ch.kind for ch in c.chunks][0] == "I"  # the description before any data
    out = decode_capture(f)
    assert out["gyro_dps"].shape[0] > 8000 * 1.5
    p = spinrig("export", str(f), "--csv")
    assert p.returncode == 0, p.stderr
    assert len(Path(str(f)[: -len(".spinrec")] + ".csv").read_text().splitlines()) > 8000


def test_one_flipped_bit_costs_only_its_chunk(tmp_path):
    f = tmp_path / "flip.spinrec"
    _capture_of_a_stream(f, 3.0)
    whole = read_capture(f)
    raw = bytearray(f.read_bytes())
    at = len(raw) // 10
    raw[at] ^= 0x10
    g = tmp_path / "flipped.spinrec"
    g.write_bytes(bytes(raw))
    c = read_capture(g)
    assert len(c.damaged) == 1 and c.damaged[0][0] <= at < c.damaged[0][1]
    lost = whole.data_bytes - c.data_bytes
    assert 0 < lost <= 64 * 1024 and c.ended_cleanly  # one chunk at most, the rest kept
    p = spinrig("export", str(g), "--csv", "-o", str(tmp_path / "flipped.csv"))
    assert p.returncode == 0 and "damaged range(s) skipped" in p.stderr and f"bytes {c.damaged[0][0]}-" in p.stderr


@pytest.fixture(scope="module")
def capture_bytes(tmp_path_factory):
    f = tmp_path_factory.mktemp("cap") / "base.spinrec"
    _capture_of_a_stream(f, 1.0)
    return f.read_bytes()


@settings(max_examples=examples(40), deadline=None)
@given(data=st.data())
def test_any_damage_keeps_every_good_chunk_and_never_raises_otherwise(capture_bytes, data, tmp_path_factory):
    raw = bytearray(capture_bytes)
    n = len(raw)
    for _ in range(data.draw(st.integers(1, 6))):
        op = data.draw(st.sampled_from(["flip", "garbage", "cut", "zero"]))
        at = data.draw(st.integers(16, len(raw) - 1))
        if op == "flip":
            raw[at] ^= 1 << data.draw(st.integers(0, 7))
        elif op == "garbage":
            raw[at:at] = data.draw(st.binary(min_size=1, max_size=300))
        elif op == "zero":
            raw[at : at + 50] = bytes(min(50, len(raw) - at))
        else:
            del raw[at : at + data.draw(st.integers(1, 2000))]
    f = tmp_path_factory.mktemp("dmg") / "d.spinrec"
    f.write_bytes(bytes(raw))
    try:
        c = read_capture(f)
    except CaptureError as exc:
        assert str(f) in str(exc)
        return
    original = {ch.payload for ch in read_capture_bytes(capture_bytes, tmp_path_factory).chunks if ch.kind == "D"}
    for ch in c.chunks:
        if ch.kind == "D":
            assert ch.payload in original  # a chunk that reads back is one that was written
    assert c.data_bytes <= sum(len(p) for p in original) and n > 0


def read_capture_bytes(b: bytes, factory):
    f = factory.mktemp("orig") / "o.spinrec"
    f.write_bytes(b)
    return read_capture(f)


def test_export_onto_a_full_disk_leaves_no_partial_file(tmp_path):
    f = tmp_path / "big.spinrec"
    _capture_of_a_stream(f, 2.0)
    out = tmp_path / "big.csv"

    def limit():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))

    p = subprocess.run([sys.executable, "-m", "monitor", "export", str(f), "--csv", "-o", str(out)],
                       capture_output=True, text=True, timeout=120, preexec_fn=limit, cwd=ROOT)
    assert p.returncode == 1 and str(out) in p.stderr.strip().splitlines()[-1]  # one line
    assert not out.exists() and not list(tmp_path.glob("*.part"))


def test_an_empty_capture_exports_nothing_and_says_so(tmp_path):
    f = tmp_path / "empty.spinrec"
    CaptureWriter(f, {"port": "x"}).close({})
    p = spinrig("export", str(f), "--csv")
    assert p.returncode == 1 and "no gyro samples" in p.stderr.lower() and not (tmp_path / "empty.csv").exists()


def test_replay_into_a_file_prints_the_events(tmp_path):
    f = tmp_path / "r.spinrec"
    _capture_of_a_stream(f, 3.0)
    with open(tmp_path / "out.txt", "w") as out:
        p = subprocess.run([sys.executable, "-m", "monitor", "replay", str(f), "--profile", "quillback7"],
                           stdout=out, stderr=subprocess.PIPE, text=True, timeout=120, cwd=ROOT)
    assert p.returncode == 0, p.stderr
    text = (tmp_path / "out.txt").read_text()
    assert text.startswith("replaying ") and "CROSSING" in text.upper() and len(text.splitlines()) > 5


# ---------------------------------------------------------------- the screen under a signal


def test_screen_records_at_once_and_sigterm_restores_the_terminal(tmp_path):
    f = tmp_path / "screen.spinrec"
    master, slave = pty.openpty()
    env = {**os.environ, "TERM": "xterm-256color", "COLUMNS": "120", "LINES": "40"}
    env.pop("CI", None)
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "watch", "sim://quillback7?stream=1",
                             "--capture", str(f), "--duration", "60"], stdin=slave, stdout=slave, stderr=slave,
                            env=env, cwd=ROOT, start_new_session=True)
    os.close(slave)
    out = b""

    def read_some():
        nonlocal out
        while select.select([master], [], [], 0)[0]:
            try:
                out += os.read(master, 65536)
            except OSError:
                return

    try:
        grew = _wait_for(lambda: (read_some(), f.exists() and f.stat().st_size > 50_000)[1], 60)
        assert grew, out[-400:]
        proc.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + 20
        while proc.poll() is None and time.monotonic() < deadline:
            read_some()
            time.sleep(0.02)
        read_some()
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(10)
        os.close(master)
    assert proc.returncode == 143
    assert b"\x1b[?1049h" in out and out.rfind(b"\x1b[?1049l") > out.rfind(b"\x1b[?1049h")  # alt screen left
    c = read_capture(f)
    assert c.ended_cleanly and c.data_bytes > 50_000


# ---------------------------------------------------------------- bad options and profiles


@pytest.mark.parametrize("args", [
    ["watch", "sim://pipit3", "--window-s", "0"],
    ["watch", "sim://pipit3", "--window-s", "nan"],
    ["watch", "sim://pipit3", "--overlap", "1.5"],
    ["watch", "sim://pipit3", "--duration", "-1"],
    ["watch", "sim://pipit3", "--baud", "12"],
    ["watch", "sim://pipit3", "--supply-v", "1000"],
    ["replay", "x.spinrec", "--speed", "0"],
    ["demo", "--seconds", "0"],
    ["sim", "pipit3", "--tcp", "99999"],
])
def test_bad_options_are_one_usage_line_and_exit_2(args):
    p = spinrig(*args, timeout=60)
    assert p.returncode == 2 and "Traceback" not in p.stderr
    assert p.stderr.strip().splitlines()[-1].startswith("spinrig") and "error:" in p.stderr


def _modes(*freqs) -> str:
    return '[airframe]\nname = "x"\n' + "".join(f"[[modes]]\nfreq_hz = {f}\ndamping_ratio = 0.03\n" for f in freqs)


@pytest.mark.parametrize("text, match", [
    (_modes(100, 100.2), r"modes\[1\]: 100.2 Hz repeats modes\[0\]"),
    (_modes(*range(100, 750, 10)), "64"),
], ids=["duplicate", "too-many"])
def test_profile_limits_name_the_file(tmp_path, text, match):
    f = tmp_path / "p.toml"
    f.write_text(text)
    with pytest.raises(ProfileError, match=match) as exc:
        load_profile(f)
    assert str(f) in str(exc.value) and "\n" not in str(exc.value)


def test_profile_warnings_and_bundled_names(tmp_path):
    f = tmp_path / "p.toml"
    f.write_text('[airframe]\nname = "x"\n[[modes]]\nfreq_hz = 5000\ndamping_ratio = 0.03\nname = "too high"\n')
    warn = profile_warnings(load_profile(f), sample_rate_hz=8000.0)
    assert len(warn) == 1 and "Nyquist" in warn[0] and "5000" in warn[0]
    assert load_profile("quillback7").airframe == load_profile(ROOT / "monitor/profiles/quillback7.toml").airframe
    with pytest.raises(ProfileError, match="no-such-frame"):
        load_profile("no-such-frame")


# ---------------------------------------------------------------- what SPEC.md answers


def test_frame_counter_restarts_at_a_new_boot():
    h = host_run(["reboot=2"], 3.0, engine=False)
    assert h.decoder.counters.frames_lost == 0  # the new boot's counter is not a loss


def test_sample_counter_continues_across_a_stream_stop_and_start():
    stream = SimStream(load_scenario("pipit3"), DeviceOptions(stream_at_boot=True), FaultPlan(),
                       StreamOptions(realtime=False))
    dec = fp.StreamDecoder(merge=True)
    seqs = []

    def run(t):
        while stream.time_s < t:
            for it in dec.feed(stream.produce_chunk()):
                if isinstance(it, fp.GyroBatch):
                    seqs.append((stream.time_s, int(it.sample_seq[0]), int(it.sample_seq[-1] + it.counts[-1])))

    run(0.5)
    stream.receive(fp.encode_frame(fp.StreamControl(0), 0))
    run(1.0)
    stream.receive(fp.encode_frame(fp.StreamControl(1), 1))
    run(1.5)
    before = [s for s in seqs if s[0] < 0.55]
    after = [s for s in seqs if s[0] > 1.0]
    assert before and after
    gap_samples = after[0][1] - before[-1][2]
    odr = stream.device.odr
    assert 0.4 * odr <= gap_samples <= 0.6 * odr  # the counter ran on while not streaming


def test_device_frames_arrive_in_time_order():
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True), FaultPlan(),
                       StreamOptions(realtime=False))
    dec = fp.StreamDecoder(merge=False)
    stamps = []
    while stream.time_s < 2.0:
        for it in dec.feed(stream.produce_chunk()):
            m = getattr(it, "message", None)
            t = getattr(m, "t_us", None)
            if t is not None:
                stamps.append(t)
    assert len(stamps) > 100 and np.all(np.diff(np.array(stamps, dtype=np.int64)) >= 0)


# ---------------------------------------------------------------- spectra over bridged holes


def test_masked_frames_of_white_noise_are_unbiased_against_welch():
    rng = np.random.default_rng(4)
    fs, n = 8000.0, 8000 * 8
    x = rng.normal(0, 3.0, (n, 3))
    valid = np.ones(n, bool)
    for at in rng.integers(0, n - 400, 40):  # 40 holes of 1 to 40 ms
        valid[at : at + rng.integers(8, 320)] = False
    cfg = SpectrumConfig(fs, 0.256, 0.5)
    fb = RollingSTFT(cfg).push(np.where(valid[:, None], x, 0.0), valid)
    assert fb is not None and np.count_nonzero(fb.filled) > 10
    _, ref = sps.welch(x[:, 0], fs, window="hann", nperseg=cfg.nperseg, noverlap=cfg.nperseg // 2, detrend=False)
    masked = fb.psd[fb.filled > 0][:, :, 0].mean(axis=0)
    # reference: scipy.signal.welch on the unbroken noise; masking rescales by sum(w^2)/sum((w m)^2)
    assert np.median(masked[5:-5] / ref[5:-5]) == pytest.approx(1.0, abs=0.06)


def test_a_tone_across_a_50_ms_hole_keeps_its_frequency_and_most_of_its_level():
    fs, f0 = 8000.0, 312.5
    t = np.arange(int(fs * 0.256)) / fs
    x = np.repeat((10.0 * np.sin(2 * np.pi * f0 * t))[:, None], 3, axis=1)
    valid = np.ones(t.size, bool)
    valid[800:1200] = False  # 50 ms in the middle
    cfg = SpectrumConfig(fs, 0.256, 0.0)
    whole = RollingSTFT(cfg).push(x)
    holed = RollingSTFT(cfg).push(np.where(valid[:, None], x, 0.0), valid)
    k = int(np.argmax(whole.psd[0, :, 0]))
    assert int(np.argmax(holed.psd[0, :, 0])) == k
    loss_db = 10 * np.log10(holed.psd[0, k, 0] / whole.psd[0, k, 0])
    assert -1.5 < loss_db < 0.5


# ---------------------------------------------------------------- every fault, and all at once


FAULTS = ["corrupt=0.0005", "drop=0.001", "garbage=5:40", "stall=5:1", "reboot=7", "drift=2000"]


@pytest.mark.parametrize("faults", [[f] for f in FAULTS] + [FAULTS], ids=[*FAULTS, "all"])
def test_fault_matrix_accounts_for_every_sample(faults):
    h = host_run(faults, 20.0, scenario="pipit3")
    s = h.assembler.stats
    odr = h.stream.device.odr
    # the device's counter per boot (split where it goes back): every sample between the first and
    # the last block that arrived is delivered, or filled, or counted lost -- never both, never neither
    boots, cur = [], [h.blocks[0]]
    for b in h.blocks[1:]:
        if b[1] < cur[-1][1]:
            boots.append(cur)
            cur = []
        cur.append(b)
    boots.append(cur)
    span = sum(bs[-1][2] - bs[0][1] for bs in boots)
    assert s.samples + s.samples_lost == span
    assert 0 <= h.stream.device.sample_seq - boots[-1][-1][2] <= 0.1 * odr  # only the newest blocks in flight
    assert s.reboots == len(boots) - 1 == sum(f.startswith("reboot") for f in faults)
    kinds = Counter(e.as_dict()["kind"] for e in h.events)
    assert kinds["reboot"] == s.reboots and h.engine.frames > 0.8 * 20 / 0.064
    drift = next((float(f.split("=")[1]) for f in faults if f.startswith("drift")), 0.0)
    assert s.drift_ppm == pytest.approx(drift, abs=50)  # latency, stalls and losses do not bias it


def test_drift_from_a_link_with_random_latency_and_stalls():
    """Host stamps = device time / (1 + drift) + latency; latency is 1 ms plus an exponential
    queueing delay, and two 1 s stalls deliver their backlog late."""
    rng = np.random.default_rng(9)
    from monitor.assembler import _DriftFit

    for ppm in (-8000.0, -150.0, 0.0, 40.0, 5000.0):
        fit = _DriftFit()
        dev = np.arange(0, 60, 0.004)
        lat = 0.001 + rng.exponential(0.004, dev.size)
        for t0 in (12.0, 37.0):
            inside = (dev >= t0) & (dev < t0 + 1.0)
            lat[inside] += (t0 + 1.0) - dev[inside]  # released when the stall ends
        host = dev / (1 + ppm * 1e-6) + lat
        order = np.argsort(host)
        for h, d in zip(host[order], dev[order], strict=True):
            fit.add(float(h), float(d))
        assert fit.ppm() == pytest.approx(ppm, abs=15), ppm  # about 1 ms of envelope over 60 s
        assert len(fit.hull) < 64  # bounded: only the envelope's corners are kept


def _rss_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def test_ten_minutes_of_every_fault_at_once_keeps_running_in_bounded_memory():
    faults = ["corrupt=0.0005", "drop=0.001", "garbage=5:40", "stall=100:3", "reboot=300", "drift=2000"]
    stream = SimStream(load_scenario("pipit3"), DeviceOptions(seed=3), FaultPlan.parse(faults),
                       StreamOptions(realtime=False))
    h = SessionHost(stream, Engine(EngineConfig(), load_profile("pipit3")))
    h.run_until(120.0)
    h.events.clear()
    h.blocks.clear()
    h.first_block_after.clear()
    warm = _rss_mb()
    h.run_until(600.0)
    assert _rss_mb() - warm < 15  # the rings are full by 120 s; nothing may grow after
    s = h.assembler.stats
    assert s.reboots == h.rules.counts.reboots_seen == 1
    assert s.drift_ppm == pytest.approx(2000, abs=50)
    assert h.engine.frames > 0.95 * 600 / 0.064


def test_profile_without_modes_warns_and_a_huge_one_is_refused_unread(tmp_path):
    f = tmp_path / "none.toml"
    f.write_text('[airframe]\nname = "x"\n')
    (w,) = profile_warnings(load_profile(f))
    assert str(f) in w and "no modes" in w
    big = tmp_path / "big.toml"
    big.write_text('[airframe]\nname = "x"\n' + "# padding\n" * 200_000)
    with pytest.raises(ProfileError, match=r"big.toml: \d+ bytes; a profile file is at most 1000000 bytes"):
        load_profile(big)
