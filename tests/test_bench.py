"""Spin tests: sweep plans, and every stop path against both devices we ship.

The devices are real implementations of the protocol: the Python simulator (``sim://``, in this
process) and the C reference built as a bench device (``firmware_protocol/c/examples``, its own
process on a pseudo-terminal). Where a test asserts *that* something stopped, it waits on the
condition with a timeout that only guards against a hang; no test asserts how fast (the latencies
are printed by ``benchmarks/stop_latency.py``).
"""

from __future__ import annotations

import contextlib
import os
import select
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import firmware_protocol as fp
from monitor.bench import controller as bench_controller
from monitor.bench.controller import BenchController, BenchError
from monitor.bench.plan import Plan, PlanError, load_plan, plan_from_dict, ramp_plan, setpoints
from monitor.link import Link
from simulators.cable import PtyCable

from .conftest import examples

ROOT = Path(__file__).resolve().parents[1]
C_DIR = ROOT / "firmware_protocol" / "c"


def _wait(cond, timeout=10.0, what="condition"):
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.01)


# ----------------------------------------------------------------- plans


def _doc(**plan):
    return {"plan": {"max_throttle": 50, **plan}, "piece": [{"kind": "ramp", "from": 10, "to": 40, "seconds": 4}]}


@pytest.mark.parametrize("doc,match", [
    ({"piece": []}, r"plan: missing"),
    (_doc(max_throttle=120), r"plan\.max_throttle: 120 is outside 0\.\.100"),
    (_doc(max_throttle="fast"), r"plan\.max_throttle: 'fast' is not a number"),
    (_doc(slew_percent_per_s=0), r"plan\.slew_percent_per_s: 0 must be above 0"),
    (_doc(repeats=1.5), r"plan\.repeats: 1\.5 is not a whole number"),
    (_doc(one_at_a_time="yes"), r"plan\.one_at_a_time: 'yes' is not true or false"),
    (_doc(motors=[1, 1]), r"plan\.motors: \[1, 1\] is not a list of distinct motor numbers"),
    (_doc(speed=3), r"plan\.speed: unknown field"),
    ({"plan": {"max_throttle": 50}}, r"piece: missing"),
    ({"plan": {"max_throttle": 50}, "piece": [{"kind": "spin"}]}, r"piece 1\.kind: 'spin' is not one of"),
    ({"plan": {"max_throttle": 50}, "piece": [{"kind": "hold", "level": 60, "seconds": 1}]},
     r"piece 1\.level: 60 % is above plan\.max_throttle \(50 %\)"),
    ({"plan": {"max_throttle": 50}, "piece": [{"kind": "ramp", "from": 0, "to": 50, "seconds": 1}]},
     r"piece 1\.seconds: 0 -> 50 % in 1 s is 50 %/s, faster than plan\.slew_percent_per_s \(25\)"),
    ({"plan": {"max_throttle": 50}, "piece": [{"kind": "steps", "levels": [], "dwell_s": 1}]},
     r"piece 1\.levels: missing or empty"),
    ({"plan": {"max_throttle": 50}, "piece": [{"kind": "hold", "level": 20, "seconds": 1, "from": 3}]},
     r"piece 1\.from: not a field of a hold"),
    ({**_doc(), "abort": {"gyro": 3}}, r"abort\.gyro: unknown field"),
    ({**_doc(), "extra": {}}, r"extra: unknown section"),
])
def test_a_bad_plan_is_one_line_naming_the_field(doc, match):
    with pytest.raises(PlanError, match=match) as exc:
        plan_from_dict(doc, "p.toml")
    assert "\n" not in str(exc.value) and str(exc.value).startswith("p.toml: ")


def test_a_plan_file_that_is_not_toml_or_not_there_names_the_file(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text("[plan\nmax_throttle = 3")
    with pytest.raises(PlanError, match=r"bad\.toml: not valid TOML"):
        load_plan(f)
    with pytest.raises(PlanError, match=r"none\.toml: cannot read"):
        load_plan(tmp_path / "none.toml")


def test_ramp_spec_errors_name_the_option():
    with pytest.raises(PlanError, match=r"^--ramp: '10:20' is not FROM:TO:SECONDS$"):
        ramp_plan("10:20")
    with pytest.raises(PlanError, match=r"^--ramp\.seconds: 0 -> 90 % in 1 s is 90 %/s"):
        ramp_plan("0:90:1")


def test_the_plan_is_checked_against_the_device():
    p = plan_from_dict(_doc(max_throttle=90, max_duration_s=5), "p.toml")
    with pytest.raises(PlanError, match=r"plan\.max_throttle: 90 % is above the device's declared ceiling of 80 %"):
        p.check_device(4, 80.0)
    with pytest.raises(PlanError, match=r"drives no motors of its own"):
        p.check_device(4, 0.0)
    # 1 s at rest, up to 10 % at 25 %/s (0.4 s), the 4 s ramp, down from 40 % (1.6 s), 1 s at rest
    with pytest.raises(PlanError, match=r"plan\.max_duration_s: the schedule takes 8\.0 s"):
        p.check_device(4, 100.0)
    q = plan_from_dict(_doc(motors=[5]), "p.toml")
    with pytest.raises(PlanError, match=r"plan\.motors: motor 5 is not one of the device's 1\.\.4"):
        q.check_device(4, 100.0)


pieces = st.one_of(
    st.builds(lambda a, b, s: {"kind": "ramp", "from": a, "to": b, "seconds": s},
              st.floats(0, 60), st.floats(0, 60), st.floats(3.0, 30.0)),
    st.builds(lambda a, s: {"kind": "hold", "level": a, "seconds": s}, st.floats(0, 60), st.floats(0.1, 10.0)),
    st.builds(lambda lv, d: {"kind": "steps", "levels": lv, "dwell_s": d},
              st.lists(st.floats(0, 60), min_size=1, max_size=5), st.floats(0.1, 5.0)),
)


@settings(max_examples=examples(200), deadline=None)
@given(st.lists(pieces, min_size=1, max_size=4), st.floats(60.0, 100.0), st.floats(20.0, 100.0), st.booleans(),
       st.integers(1, 3), st.integers(1, 8), st.lists(st.floats(-1.0, 1.0), min_size=20, max_size=20))
def test_the_schedule_never_exceeds_its_limits(raw, max_thr, slew, solo, repeats, motors, probes):
    plan = plan_from_dict({"plan": {"max_throttle": max_thr, "slew_percent_per_s": slew, "one_at_a_time": solo,
                                    "repeats": repeats, "max_duration_s": 1e6}, "piece": raw}, "h.toml")
    t, thr = plan.schedule(motors)
    assert t[0] == 0.0 and np.all(np.diff(t) >= 0)
    assert np.all(thr >= 0) and thr.max() <= max_thr + 1e-9
    assert np.all(thr[0] == 0) and np.all(thr[-1] == 0)  # starts and ends stopped
    dt, dv = np.diff(t), np.abs(np.diff(thr, axis=0)).max(axis=1)
    moving = dt > 0
    assert np.all(dv[moving] <= slew * dt[moving] * (1 + 1e-9) + 1e-9)  # no set-point moves faster than the slew
    assert np.all(dv[~moving] == 0)  # and none jumps
    if solo:
        assert np.all((thr > 0).sum(axis=1) <= 1)  # one motor at a time
    at = np.concatenate([np.linspace(-1, t[-1] + 1, 200), (np.asarray(probes) + 1) / 2 * t[-1]])
    sp = setpoints(t, thr, at)
    assert sp.max() <= max_thr + 1e-9 and sp.min() >= 0


short_pieces = st.one_of(  # levels as fractions of the plan's max_throttle
    st.builds(lambda a, b, s: {"kind": "ramp", "from": a, "to": b, "seconds": s},
              st.floats(0, 1), st.floats(0, 1), st.floats(3.0, 8.0)),
    st.builds(lambda a, s: {"kind": "hold", "level": a, "seconds": s}, st.floats(0, 1), st.floats(0.1, 3.0)),
    st.builds(lambda lv, d: {"kind": "steps", "levels": lv, "dwell_s": d},
              st.lists(st.floats(0, 1), min_size=1, max_size=4), st.floats(0.1, 1.0)),
)


def _scaled(piece: dict, top: float) -> dict:
    out = dict(piece)
    for key in ("from", "to", "level"):
        if key in out:
            out[key] = np.floor(out[key] * top * 100.0) / 100.0
    if "levels" in out:
        out["levels"] = [np.floor(v * top * 100.0) / 100.0 for v in out["levels"]]
    return out


@pytest.fixture(scope="module")
def c_devices(c_device):
    """Two C devices for the timing property: the default 80 % ceiling and a 35 % one."""
    devs = {80.0: CDevice(c_device, "--seconds", "900"), 35.0: CDevice(c_device, "--seconds", "900", "--ceiling", "35")}
    yield devs
    for d in devs.values():
        d.close()


SPEED = 8.0  # the host's clock runs 8 times as fast as the wall: plans of tens of seconds in a few


@settings(max_examples=examples(6), deadline=None)
@given(st.sampled_from([80.0, 35.0]), st.data(), st.lists(short_pieces, min_size=1, max_size=2),
       st.floats(5.0, 100.0), st.booleans(),
       st.dictionaries(st.integers(0, 400), st.tuples(st.floats(0.0, 2.0), st.floats(0.0, 0.15)), max_size=12))
def test_what_the_host_sends_never_exceeds_a_limit_whatever_the_timing(c_devices, ceiling, data, raw, slew, solo,
                                                                        hiccups):
    # the driver's clock jumps ahead (a host that woke late or froze: up to 2 s of plan time at
    # once) and some set-points leave up to 150 ms late (a slow write); whatever the timing, no
    # set-point sent is above the plan's or the device's limit, none moves faster than the slew
    # allows over the time that passed, the device never had to clamp one, and the stop is
    # acknowledged
    max_thr = round(data.draw(st.floats(20.0, ceiling), label="max_throttle"), 2)
    pieces_ = [_scaled(p, max_thr) for p in raw]
    # a ramp faster than the slew is refused when the plan is read: raise the slew to the fastest
    slew = max([slew] + [abs(p["to"] - p["from"]) / p["seconds"] * 1.001 for p in pieces_ if p["kind"] == "ramp"])
    plan = plan_from_dict({"plan": {"max_throttle": max_thr, "slew_percent_per_s": slew, "one_at_a_time": solo,
                                    "max_duration_s": 1e6}, "piece": pieces_}, "h.toml")
    dev = c_devices[ceiling]
    calls = {"clock": 0, "jump": 0.0}

    def clock():
        calls["clock"] += 1
        jump, _ = hiccups.get(calls["clock"], (0.0, 0.0))
        calls["jump"] += jump
        return time.monotonic() * SPEED + calls["jump"]

    link = Link(dev.path)
    link.start()
    sent: list[tuple[float, tuple]] = []
    try:
        ctl = BenchController(link, plan, clock=clock, rate_hz=bench_controller.RATE_HZ * SPEED)
        ctl.wait_device(10.0)
        real_send = link.send

        def send(msg):
            if isinstance(msg, fp.SetThrottle):
                late = hiccups.get(calls["clock"], (0.0, 0.0))[1]
                if late:
                    time.sleep(late)  # the simulated slow write itself, not a synchronisation
                sent.append((ctl.progress.t_s, msg.throttles))
            return real_send(msg)

        link.send = send
        ctl.start()
        report = ctl.join(timeout=60)
        assert report is not None and report.acknowledged, report and report.text()
        assert ctl.progress.limited == 0  # the device never had to clamp a set-point
    finally:
        link.close()
    assert sent, "no set-point was sent"
    t = np.array([s[0] for s in sent])
    units = np.array([s[1] for s in sent], float)
    assert units.max() <= np.floor(min(max_thr, ceiling) * 100.0 + 1e-6)
    dt, dv = np.diff(t), np.abs(np.diff(units, axis=0)).max(axis=1)
    # one unit of rounding (set-points go out floored to 0.01 %) on top of the slew over the time passed
    assert np.all(dv <= slew * 100.0 * np.maximum(dt, 0.0) * (1 + 1e-9) + 1.0)
    if solo:
        assert np.all((units > 0).sum(axis=1) <= 1)


def test_one_at_a_time_runs_each_motor_alone_with_a_rest_between():
    plan = plan_from_dict(_doc(one_at_a_time=True, motors=[2, 3]), "p.toml")
    t, thr = plan.schedule(4)
    on = [np.flatnonzero(thr[:, m] > 0) for m in range(4)]
    assert on[0].size == 0 and on[3].size == 0
    assert t[on[1][-1]] < t[on[2][0]]  # motor 2 is done before motor 3 starts
    assert setpoints(t, thr, t[on[1][0]] + 1.0)[1] > 0


# ----------------------------------------------------------------- devices


@pytest.fixture(scope="session")
def c_device(tmp_path_factory):
    build = tmp_path_factory.mktemp("cdev")
    p = subprocess.run(["make", "-C", str(C_DIR), "device", f"BUILD={build}"], capture_output=True, text=True,
                       timeout=240)
    assert p.returncode == 0, p.stdout + p.stderr
    return build / "bench_device"


class CDevice:
    """The C bench device on its own pty; its stderr lines collected with the wall time they came."""

    def __init__(self, exe, *args):
        self.proc = subprocess.Popen([str(exe), "--pty", "--seconds", "120", *args], stderr=subprocess.PIPE,
                                     stdout=subprocess.DEVNULL, stdin=subprocess.DEVNULL)
        self.lines: list[tuple[float, str]] = []
        first = self.proc.stderr.readline().decode()
        assert first.startswith("spinrig bench device on "), first
        self.path = first.split()[-1]
        self._t = threading.Thread(target=self._read, daemon=True)
        self._t.start()

    def _read(self):
        for raw in self.proc.stderr:
            self.lines.append((time.monotonic(), raw.decode().strip()))

    def seen(self, text):
        """Wall times of the lines whose message (after ``t_ms=N``) starts with ``text``."""
        return [t for t, ln in self.lines if ln.partition(" ")[2].startswith(text)]

    def close(self):
        self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:  # seen once under load: still alive 10 s after SIGTERM
            self.proc.kill()
            self.proc.wait(timeout=10)
            raise AssertionError("the C bench device did not exit within 10 s of SIGTERM") from None


@pytest.fixture
def cdev(c_device):
    d = CDevice(c_device)
    yield d
    d.close()


_SIM_N = iter(range(1000, 100000))


def _sim_url():
    # a fresh device per test: the seed is part of the URL that names it
    return f"sim://brisling5?script=0&seed={next(_SIM_N)}"


def _sim_device(url):
    """The simulated device behind an open ``sim://`` port (the URL handler keeps it by URL)."""
    from simulators.urlhandler import protocol_sim

    return protocol_sim._LIVE[url][0].device


def _controller(port, plan):
    link = Link(port)
    link.start()
    ctl = BenchController(link, plan)
    ctl.wait_device(10.0)
    return link, ctl


SHORT = "10:30:1"  # 10 to 30 % in 1 s: about 3.4 s in all with the rests


@pytest.fixture(params=["sim", "c"])
def device_port(request, c_device):
    if request.param == "sim":
        yield request.param, _sim_url(), None
    else:
        d = CDevice(c_device)
        yield request.param, d.path, d
        d.close()


def test_end_of_plan_stops_the_motors_and_the_device_acknowledges(device_port):
    kind, port, dev = device_port
    link, ctl = _controller(port, ramp_plan(SHORT))
    try:
        ctl.start()
        report = ctl.join(timeout=30)
        assert report.acknowledged and report.why == "end of the plan"
        # set-points every 20 ms on a 20 %/s ramp: the top is met to within 0.4 %, never passed
        assert 29.6 <= ctl.progress.max_commanded <= 30.0 and ctl.progress.sent > 100
        _wait(lambda: ctl.status is not None and ctl.status.bench_state == fp.BenchState.DISARMED,
              what="a status saying disarmed")
        assert ctl.status.faults & fp.Fault.STOP_COMMAND
        if dev is not None:
            _wait(lambda: dev.seen("stopped: STOP_MOTORS"), what="the device's stop line")
    finally:
        link.close()


def test_the_abort_key_stops_at_once(device_port):
    kind, port, dev = device_port
    link, ctl = _controller(port, ramp_plan("10:40:10"))
    try:
        ctl.start()
        _wait(lambda: ctl.progress.max_commanded > 12.0, what="the motors commanded")
        ctl.abort("the abort key")
        report = ctl.join(timeout=10)
        assert report.acknowledged and report.why == "the abort key" and ctl.progress.t_s < 8.0
    finally:
        link.close()


def test_an_exception_in_the_driver_stops_the_motors(device_port, monkeypatch):
    kind, port, dev = device_port
    calls = {"n": 0}
    real = bench_controller.setpoints

    def failing(*a):
        calls["n"] += 1
        if calls["n"] > 60:
            raise FloatingPointError("a set-point could not be computed")
        return real(*a)

    monkeypatch.setattr(bench_controller, "setpoints", failing)
    link, ctl = _controller(port, ramp_plan("10:40:10"))
    try:
        ctl.start()
        report = ctl.join(timeout=10)
        assert report.acknowledged and report.why.startswith("host error: FloatingPointError")
    finally:
        link.close()


def test_a_lost_link_aborts_and_the_device_stops_on_its_heartbeat_timeout():
    # the simulator's port goes away for 3 s mid-sweep: the host cannot send a stop (and says so);
    # the device, hearing nothing, stops its motors by its own heartbeat timeout
    url = _sim_url() + "&fault=disconnect=2.5:3"
    link, ctl = _controller(url, ramp_plan("10:40:10"))
    try:
        ctl.start()
        report = ctl.join(timeout=20)
        assert report.why.startswith("link lost") and not report.acknowledged
        assert "never acknowledged" in report.text() and "kill switch" in report.text()
        dev = _sim_device(url)
        _wait(lambda: not dev.safety.armed and not dev.applied_throttle.any(), timeout=5,
              what="the simulated device disarmed")
        assert dev.safety.faults & fp.Fault.HEARTBEAT_LOST
    finally:
        link.close()


@contextlib.contextmanager
def _sweep_through_cable(cdev):
    """A 10-40 % sweep of the C device through a :class:`PtyCable`, once the motors are commanded:
    (cable, controller); the link and the cable are closed on the way out."""
    cable = PtyCable(cdev.path)
    link, ctl = _controller(cable.path, ramp_plan("10:40:10"))
    try:
        ctl.start()
        _wait(lambda: ctl.progress.max_commanded > 12.0, what="the motors commanded")
        yield cable, ctl
    finally:
        link.close()
        cable.close()


def test_a_pulled_cable_leaves_the_c_device_to_its_heartbeat_timeout(cdev):
    # the cable between host and C device is pulled mid-sweep: the host's port goes away (it says
    # the stop was never acknowledged); the device, hearing nothing, stops on its heartbeat timeout
    with _sweep_through_cable(cdev) as (cable, ctl):
        pulled = cable.pull()
        report = ctl.join(timeout=10)
        assert report.why.startswith("link lost") and not report.acknowledged
        assert "never acknowledged" in report.text()
        _wait(lambda: cdev.seen("stopped: heartbeat lost"), timeout=5, what="the device's heartbeat stop")
        assert cdev.seen("stopped: heartbeat lost")[0] >= pulled
        assert not cdev.seen("stopped: STOP_MOTORS")  # no stop could reach it


@pytest.mark.parametrize("fault", ["mute", "back_up"])
def test_a_device_gone_silent_mid_sweep_is_stopped(cdev, fault):
    # its transmit line breaks, or nobody reads it and its output backs up: the host hears no
    # status, so the abort rules are blind; it stops the sweep, its stop still reaches the device
    # (which must keep hearing the host however full its output is), and the missing answer is
    # reported loudly
    with _sweep_through_cable(cdev) as (cable, ctl):
        muted = getattr(cable, fault)()
        sent_before = cable.to_device
        report = ctl.join(timeout=10)
        assert report.why.startswith("the device went silent: no frame for 1.")
        assert not report.acknowledged and "never acknowledged" in report.text()
        _wait(lambda: cdev.seen("stopped: STOP_MOTORS"), timeout=5, what="the device's stop line")
        heard = ctl._heard_at  # the last frame that came through, before the line broke
        assert cdev.seen("stopped: STOP_MOTORS")[0] >= max(heard + bench_controller.SILENT_S, muted)
        assert not cdev.seen("stopped: heartbeat lost")  # it heard the host to the end
        if fault == "back_up":
            # its output still full, the device's loop keeps running: SIGTERM ends it (the 10 s
            # wait inside close() only guards against a hang)
            _wait(lambda: cable.to_device > sent_before, what="the host's next frame carried to the device")
            cdev.close()
            _wait(lambda: cdev.seen("exit on a signal, motors stopped"), timeout=5, what="the device's exit line")
            assert cdev.proc.returncode == 0


def test_a_simulated_device_that_stalls_mid_sweep_is_stopped():
    # the simulator sends nothing for 3 s (then its backlog): the sweep stops on the silence and
    # the device, which still hears the host, stops on the host's STOP_MOTORS
    url = _sim_url() + "&fault=stall=2.5:3"
    link, ctl = _controller(url, ramp_plan("10:40:10"))
    try:
        ctl.start()
        report = ctl.join(timeout=20)
        assert report.why.startswith("the device went silent") and ctl.progress.t_s < 5.0
        dev = _sim_device(url)
        _wait(lambda: not dev.safety.armed, timeout=5, what="the simulated device disarmed")
        assert dev.safety.faults & fp.Fault.STOP_COMMAND and not dev.safety.faults & fp.Fault.HEARTBEAT_LOST
    finally:
        link.close()


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_sigint_and_sigterm_stop_the_sweep_command(cdev, tmp_path, sig):
    cap = tmp_path / "s.spinrec"
    p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", cdev.path, "--ramp", "10:40:10", "--capture",
                          str(cap), "--yes-spin-the-motors"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True, cwd=ROOT)
    _wait(lambda: cdev.seen("armed"), timeout=20, what="the device armed")
    time.sleep(0.5)  # let it spin up: the sweep is under way (not a synchronisation)
    p.send_signal(sig)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 3, out + err
    assert f"motors stopped ({signal.Signals(sig).name}); the device acknowledged" in out
    assert cdev.seen("stopped: STOP_MOTORS")


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGSTOP])
def test_a_host_killed_or_frozen_leaves_the_device_to_its_heartbeat_timeout(cdev, tmp_path, sig):
    # SIGKILL closes the port; SIGSTOP freezes the host with its port open and unread, so the
    # device's output backs up: its watchdog must run all the same
    p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", cdev.path, "--ramp", "10:40:10", "--capture",
                          str(tmp_path / "k.spinrec"), "--yes-spin-the-motors"], stdout=subprocess.DEVNULL,
                         stderr=subprocess.DEVNULL, cwd=ROOT)
    try:
        _wait(lambda: cdev.seen("armed"), timeout=20, what="the device armed")
        time.sleep(0.5)  # let it spin up: the sweep is under way (not a synchronisation)
        os.kill(p.pid, sig)
        killed = time.monotonic()
        _wait(lambda: cdev.seen("stopped: heartbeat lost"), timeout=5, what="the device's heartbeat stop")
        assert cdev.seen("stopped: heartbeat lost")[0] >= killed - 0.05
        assert not cdev.seen("stopped: STOP_MOTORS")  # nobody sent one: the device did it alone
    finally:
        p.kill()
        p.wait(timeout=10)


# ----------------------------------------------------------------- nothing spins


class QuietDevice:
    """A device on a pty that describes itself (and, if asked, reports its status) but answers no
    command: a stale or a deaf device."""

    def __init__(self, status: bool):
        self.master, slave = os.openpty()
        import tty

        tty.setraw(slave)
        self.slave = slave
        self.path = os.ttyname(slave)
        self.status = status
        self.stop = threading.Event()
        self.t = threading.Thread(target=self._run, daemon=True)
        self.t.start()

    def _run(self):
        seq = 0
        info = fp.DeviceInfo(motor_count=4, throttle_ceiling=8000, board_id="quiet")
        while not self.stop.is_set():
            frames = fp.encode_frame(info, seq)
            if self.status:
                frames += fp.encode_frame(fp.DeviceStatus(0, 0, 0, 0, 0, 0, 0, 0, 0), seq + 1)
            os.write(self.master, frames)
            seq = (seq + 2) & 0xFF
            r, _, _ = select.select([self.master], [], [], 0.1)
            if r:
                os.read(self.master, 4096)  # heard, ignored

    def close(self):
        self.stop.set()
        self.t.join(2)
        os.close(self.master)
        os.close(self.slave)


@pytest.mark.parametrize("status,match", [(False, "never sent a DEVICE_STATUS.*stale, nothing armed"),
                                          (True, r"no answer to ARM_BENCH within 1 s \(3 tries\): nothing armed")])
def test_a_stale_or_deaf_device_is_reported_plainly_and_nothing_is_armed(status, match):
    dev = QuietDevice(status)
    link = Link(dev.path)
    link.start()
    try:
        ctl = BenchController(link, ramp_plan(SHORT))
        ctl.wait_device(5.0)
        with pytest.raises(BenchError, match=match):
            ctl.start()
        assert not ctl.running and link.nonce == 0 and ctl.progress.sent == 0
    finally:
        link.close()
        dev.close()


def test_a_refused_arm_is_reported_and_nothing_spins(c_device):
    # the C device with a zero ceiling drives nothing: the plan is refused before arming; with a
    # 20 % ceiling a 30 % plan is refused naming the field
    for ceiling, match in (("0", "drives no motors of its own"), ("20", r"max_throttle: 30 % is above the "
                                                                         r"device's declared ceiling of 20 %")):
        d = CDevice(c_device, "--ceiling", ceiling)
        link = Link(d.path)
        link.start()
        try:
            ctl = BenchController(link, ramp_plan(SHORT))
            ctl.wait_device(5.0)
            with pytest.raises(PlanError, match=match):
                ctl.start()
            assert not d.seen("armed") and ctl.progress.sent == 0
        finally:
            link.close()
            d.close()


def test_without_confirmation_nothing_is_armed(cdev, tmp_path):
    p = subprocess.run([sys.executable, "-m", "monitor", "sweep", cdev.path, "--ramp", SHORT, "--capture",
                        str(tmp_path / "n.spinrec")], capture_output=True, text=True, timeout=60, cwd=ROOT,
                       stdin=subprocess.DEVNULL)
    assert p.returncode == 2 and "not confirmed" in p.stderr and "nothing armed" in p.stderr
    assert "BENCH SAFETY" in p.stdout and "plan 'ramp 10:30:1'" in p.stdout  # shown before asking
    assert not cdev.seen("armed")


# ----------------------------------------------------------------- the command on both devices


@pytest.mark.parametrize("solo", [False, True])
def test_sweep_command_runs_all_motor_and_one_at_a_time_plans(device_port, tmp_path, solo):
    kind, port, dev = device_port
    cap = tmp_path / "run.spinrec"
    args = [sys.executable, "-m", "monitor", "sweep", port, "--ramp", "10:30:1", "--capture", str(cap),
            "--yes-spin-the-motors"] + (["--one-at-a-time"] if solo else [])
    p = subprocess.run(args, capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert p.returncode == 0, p.stdout + p.stderr
    assert "motors stopped (end of the plan); the device acknowledged" in p.stdout
    assert "one motor at a time" in p.stdout if solo else "all motors together" in p.stdout
    assert "(limit 30 %)" in p.stdout
    assert "modes (" in p.stdout and "imbalance (" in p.stdout  # the capture was analysed
    from monitor.analysis.record import load_record

    rec = load_record(cap)  # the device's own report of what it drove, from the capture
    assert rec.throttle.size and np.nanmax(rec.throttle) <= 0.30 + 1e-9
    assert np.nanmax(rec.throttle) >= 0.29  # and the plan did reach its top
    if solo:
        assert np.all((rec.throttle > 0).sum(axis=1) <= 1)


def test_the_plan_limits_hold_against_the_device_ceiling_too():
    # a plan above the device's ceiling never runs; a plan at it never exceeds it
    plan = ramp_plan("10:80:3", max_throttle=80)
    link, ctl = _controller(_sim_url(), plan)
    try:
        ctl.start()
        ctl.join(timeout=30)
        assert ctl.progress.max_commanded <= 80.0 + 1e-9 and ctl.progress.limited == 0
    finally:
        link.close()
    assert isinstance(plan, Plan)


# ----------------------------------------------------------------- the sweep screen


def _screen_run(tmp_path, spec="10:40:10"):
    from monitor.bench.run import SweepRun, open_parts
    from monitor.profile import Profile

    parts = open_parts(_sim_url(), ramp_plan(spec), Profile(), str(tmp_path / "screen.spinrec"))
    run = SweepRun(parts)
    run.wait_device(10.0)
    return run


async def _until(pilot, cond, timeout=20.0):
    """Let the app run until ``cond()`` holds (a guard against a hang, not a synchronisation)."""
    end = time.monotonic() + timeout
    while not cond():
        assert time.monotonic() < end, "timed out"
        await pilot.pause(0.05)


@pytest.mark.parametrize("key", ["a", "space", "escape"])
def test_the_sweep_screen_arms_only_on_the_typed_word_and_its_abort_key_stops(tmp_path, key):
    import asyncio

    from monitor.views.sweep_app import ABORT_LINE, SweepApp

    run = _screen_run(tmp_path)

    async def go():
        app = SweepApp(run)
        async with app.run_test(size=(100, 34)) as pilot:
            assert ABORT_LINE in app.text_of("#abort") and "CAUTION" in app.text_of("#caution")
            assert "plan 'ramp 10:40:10'" in app.text_of("#plan")
            await pilot.click("#confirm")
            await pilot.press(*"spin", "enter")  # not the word: nothing armed
            assert run.ctl.progress.state == "idle" and "not confirmed" in app.text_of("#log")
            await pilot.press(*"SPIN", "enter")
            await _until(pilot, lambda: run.ctl.progress.max_commanded > 12.0)
            app.tick()
            assert "running:" in app.text_of("#where") and "set-point" in app.text_of("#motors")
            await pilot.press(key)
            await _until(pilot, lambda: run.ctl.report is not None)
            app.tick()
            assert run.ctl.report.acknowledged and run.ctl.report.why == "the abort key"
            assert "motors stopped (the abort key)" in app.text_of("#log")
            assert ABORT_LINE in app.text_of("#abort")  # still shown
            await pilot.press("q")
        assert app.return_code == 0

    try:
        asyncio.run(go())
    finally:
        run.close()


def test_quitting_the_sweep_screen_mid_run_stops_the_motors(tmp_path):
    import asyncio

    from monitor.views.sweep_app import SweepApp

    run = _screen_run(tmp_path)

    async def go():
        app = SweepApp(run)
        async with app.run_test(size=(80, 24)) as pilot:
            await pilot.click("#confirm")
            await pilot.press(*"SPIN", "enter")
            await _until(pilot, lambda: run.ctl.progress.max_commanded > 12.0)
            await pilot.press("q")
        return app.return_code

    try:
        code = asyncio.run(go())
    finally:
        run.close()
    assert code == 0 and run.ctl.report.acknowledged and run.ctl.report.why == "the run was closed"


# ----------------------------------------------------------------- the command line


def test_sweep_help_says_what_exists():
    p = subprocess.run([sys.executable, "-m", "monitor", "sweep", "--help"], capture_output=True, text=True,
                       timeout=60, cwd=ROOT)
    assert p.returncode == 0
    text = " ".join(p.stdout.split())
    for words in ("type SPIN", "--yes-spin-the-motors", "[[piece]]", "max_throttle", "slew_percent_per_s",
                  "heartbeat timeout stops them", "Exit 0 plan done, 3 stopped early", "kill switch"):
        assert words in text, words


@pytest.mark.parametrize("args,match", [
    (["--ramp", "10:30:5"], "the following arguments are required: --capture"),
    (["--ramp", "10:30:5", "--plan", "x.toml", "--capture", "c.spinrec"], "not allowed with argument"),
    (["--ramp", "10:90:1", "--capture", "c.spinrec"], "--ramp.seconds: 10 -> 90 % in 1 s is 80 %/s"),
])
def test_bad_sweep_options_are_one_line_and_nothing_is_opened(tmp_path, args, match):
    p = subprocess.run([sys.executable, "-m", "monitor", "sweep", "sim://brisling5?script=0", *args],
                       capture_output=True, text=True, timeout=60, cwd=tmp_path)
    assert p.returncode == 2 and match in p.stderr
    assert not (tmp_path / "c.spinrec").exists()  # refused before the capture or the port was opened


def test_a_bad_plan_file_is_refused_before_the_port_is_opened(tmp_path):
    plan = tmp_path / "p.toml"
    plan.write_text('[plan]\nmax_throttle = 40\n[[piece]]\nkind = "hold"\nlevel = 55\nseconds = 3\n')
    p = subprocess.run([sys.executable, "-m", "monitor", "sweep", "/dev/nonexistent-port", "--plan", str(plan),
                        "--capture", str(tmp_path / "c.spinrec")], capture_output=True, text=True, timeout=60)
    assert p.returncode == 2
    assert p.stderr.strip() == f"spinrig: {plan}: piece 1.level: 55 % is above plan.max_throttle (40 %)"


# ----------------------------------------------------------------- abort rules


def _plan_with(abort: dict, spec="10:40:10"):
    lo, hi, sec = spec.split(":")
    return plan_from_dict({"plan": {"max_throttle": float(hi)},
                           "piece": [{"kind": "ramp", "from": float(lo), "to": float(hi), "seconds": float(sec)}],
                           "abort": abort}, "abort.toml")


def test_a_gyro_level_over_its_limit_aborts():
    link, ctl = _controller(_sim_url(), _plan_with({"gyro_rms_dps": 0.5}))
    try:
        ctl.start()
        report = ctl.join(timeout=20)
        assert report.acknowledged and report.why.startswith("gyro ") and "over the limit of 0.5 deg/s" in report.why
    finally:
        link.close()


def test_motor_telemetry_lost_while_commanded_aborts(c_device):
    d = CDevice(c_device, "--no-telemetry")
    link, ctl = _controller(d.path, _plan_with({"telemetry_lost_s": 0.5}))
    try:
        ctl.start()
        report = ctl.join(timeout=20)
        assert report.acknowledged and report.why == "motor M1 sent no live telemetry for 0.5 s while commanded"
        assert ctl.progress.t_s < 3.0  # within the first second of spinning
    finally:
        link.close()
        d.close()


def test_a_link_with_many_bad_frames_arms_nothing():
    # corrupt from boot: the link is judged before arming, and nothing spins on it
    link, ctl = _controller(_sim_url() + "&fault=corrupt=0.0005", _plan_with({"link_errors_per_s": 5}))
    try:
        _wait(lambda: link.decoder.counters.bad_frames > 10, what="bad frames counted")
        with pytest.raises(BenchError, match=r"bad frames a second on the link, over the plan's limit of 5 "
                                             r"\(abort\.link_errors_per_s\): check the cable; nothing armed"):
            ctl.start()
        assert link.nonce == 0 and ctl.progress.sent == 0 and not ctl.running
    finally:
        link.close()


def test_a_link_turning_noisy_mid_sweep_aborts(cdev):
    # the C device through a cable that goes bad once the motors turn: every 40th byte inverted
    # spoils most frames; the abort rule stops the sweep, and the stop is acknowledged through it
    cable = PtyCable(cdev.path)
    link, ctl = _controller(cable.path, _plan_with({"link_errors_per_s": 5}))
    try:
        ctl.start()
        _wait(lambda: ctl.progress.max_commanded > 11.0 or ctl.report is not None, what="the motors commanded")
        assert ctl.report is None, f"stopped before the cable went bad: {ctl.report.why}"
        cable.garble(40)
        report = ctl.join(timeout=20)
        assert "bad frames a second on the link, over the limit of 5" in report.why
        _wait(lambda: cdev.seen("stopped: STOP_MOTORS"), timeout=5, what="the device's stop line")
    finally:
        link.close()
        cable.close()


def test_a_crossing_stronger_than_its_limit_aborts_and_a_weaker_one_does_not():
    from monitor.crossing import CrossingEvent

    def ev(over):
        return CrossingEvent(1.0, "crossing", "nearing", "arm", 200.0, 1.0, "1x", 1, 12000.0, 200.0, -40.0 + over,
                             -40.0, (1, 2), (1, 2))

    link, ctl = _controller(_sim_url(), _plan_with({"crossing_over_floor_db": 25}))
    try:
        ctl.start()
        _wait(lambda: ctl.progress.max_commanded > 11.0, what="spinning")
        ctl.observe_events([ev(24.9)])
        assert ctl.running
        ctl.observe_events([ev(25.0)])
        report = ctl.join(timeout=10)
        assert report.acknowledged and report.why.startswith("1x crossing arm with the response +25.0 dB")
    finally:
        link.close()


def test_the_device_itself_refuses_to_arm_when_it_drives_nothing(c_device):
    # past the host's own check (which refuses first): the device answers UNSUPPORTED
    d = CDevice(c_device, "--ceiling", "0")
    link, ctl = _controller(d.path, ramp_plan(SHORT))
    try:
        with pytest.raises(BenchError, match="the device refused to arm: UNSUPPORTED; nothing spins"):
            ctl.arm()
        assert link.nonce == 0 and not d.seen("armed")
    finally:
        link.close()
        d.close()


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_sigint_and_sigterm_stop_the_sweep_command_on_the_simulator(tmp_path, sig):
    # the simulator lives in the host's process: the stop is acknowledged before the host exits
    p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", _sim_url(), "--ramp", "10:40:10", "--capture",
                          str(tmp_path / "s.spinrec"), "--yes-spin-the-motors", "--headless"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    lines = []
    for line in p.stdout:  # the progress lines: wait until the motors are commanded
        lines.append(line)
        if " / " in line and "%" in line and float(line.split("M1")[1].split("%")[0]) > 11.0:
            break
    p.send_signal(sig)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 3, "".join(lines) + out + err
    assert f"motors stopped ({signal.Signals(sig).name}); the device acknowledged" in out


# ----------------------------------------------------------------- spinrig sim as its own process


class SimProcess:
    """``spinrig sim SCENARIO --no-script`` on its own pty: the host drives its motors."""

    def __init__(self, scenario="brisling5", seed=0):
        self.proc = subprocess.Popen([sys.executable, "-m", "monitor", "sim", scenario, "--no-script", "--seed",
                                      str(seed)], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                     stdin=subprocess.DEVNULL, text=True, cwd=ROOT)
        first = self.proc.stdout.readline()
        assert " on /dev/" in first, first
        self.path = first.split(" on ")[1].split()[0]

    def close(self):
        self.proc.terminate()
        self.proc.wait(timeout=10)


@pytest.mark.parametrize("solo", [False, True])
def test_sweep_command_drives_spinrig_sim_in_its_own_process(tmp_path, solo):
    sim = SimProcess(seed=3 + solo)
    try:
        cap = tmp_path / "sim.spinrec"
        p = subprocess.run([sys.executable, "-m", "monitor", "sweep", sim.path, "--ramp", "10:30:1", "--capture",
                            str(cap), "--yes-spin-the-motors"] + (["--one-at-a-time"] if solo else []),
                           capture_output=True, text=True, timeout=120, cwd=ROOT)
        assert p.returncode == 0, p.stdout + p.stderr
        assert "motors stopped (end of the plan); the device acknowledged" in p.stdout
        from monitor.analysis.record import load_record

        rec = load_record(cap)
        assert 0.29 <= np.nanmax(rec.throttle) <= 0.30 + 1e-9
        if solo:
            assert np.all((rec.throttle > 0).sum(axis=1) <= 1)
    finally:
        sim.close()


def test_a_host_killed_with_sigkill_leaves_spinrig_sim_to_its_heartbeat_timeout(tmp_path):
    sim = SimProcess(seed=7)
    try:
        p = subprocess.Popen([sys.executable, "-m", "monitor", "sweep", sim.path, "--ramp", "10:40:10", "--capture",
                              str(tmp_path / "k.spinrec"), "--yes-spin-the-motors", "--headless"],
                             stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=ROOT)
        for line in p.stdout:  # progress lines: wait until the motors are commanded
            if " / " in line and "%" in line and float(line.split("M1")[1].split("%")[0]) > 11.0:
                break
        os.kill(p.pid, signal.SIGKILL)
        p.wait(timeout=10)
        # a second host looks: the device disarmed itself, with the heartbeat fault latched
        link = Link(sim.path)
        link.start()
        ctl = BenchController(link, ramp_plan(SHORT))
        try:
            _wait(lambda: ctl.status is not None and ctl.status.faults & fp.Fault.HEARTBEAT_LOST, timeout=10,
                  what="a status with the heartbeat fault")
            assert ctl.status.bench_state == fp.BenchState.DISARMED
            _wait(lambda: ctl.progress.rpm.size and ctl.progress.rpm.max() < 100.0, timeout=10,
                  what="the motors spun down")
        finally:
            link.close()
    finally:
        sim.close()


def test_a_host_that_exits_mid_sweep_stops_the_motors_on_its_way_out(tmp_path):
    # the program ends (sys.exit from the main thread) while the driver is running: the atexit
    # handler stops the motors and the device latches STOP_COMMAND, not HEARTBEAT_LOST
    sim = SimProcess(seed=11)
    script = tmp_path / "leave.py"
    script.write_text(
        "import sys, time\n"
        "from monitor.link import Link\n"
        "from monitor.bench.controller import BenchController\n"
        "from monitor.bench.plan import ramp_plan\n"
        f"link = Link({sim.path!r}); link.start()\n"
        "ctl = BenchController(link, ramp_plan('10:40:10'))\n"
        "ctl.wait_device(10); ctl.start()\n"
        "while ctl.progress.max_commanded < 12.0: time.sleep(0.01)\n"
        "print('leaving', flush=True)\n"
        "sys.exit(0)\n")
    try:
        p = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=60, cwd=ROOT)
        assert p.returncode == 0 and "leaving" in p.stdout, p.stderr
        link = Link(sim.path)
        link.start()
        ctl = BenchController(link, ramp_plan(SHORT))
        try:
            _wait(lambda: ctl.status is not None, timeout=10, what="a status")
            assert ctl.status.bench_state == fp.BenchState.DISARMED
            assert ctl.status.faults & fp.Fault.STOP_COMMAND and not ctl.status.faults & fp.Fault.HEARTBEAT_LOST
        finally:
            link.close()
    finally:
        sim.close()


def test_a_device_that_reboots_mid_sweep_ends_the_sweep_early():
    # a reboot disarms the device (SPEC 7); its answers to the next set-points say so
    link, ctl = _controller(_sim_url() + "&fault=reboot=3", ramp_plan("10:40:10"))
    try:
        ctl.start()
        report = ctl.join(timeout=20)
        assert report.why.startswith("the device is no longer armed (it answered NOT_ARMED")
        assert report.acknowledged and ctl.progress.t_s < 6.0
    finally:
        link.close()
