"""The device side of SPEC.md as the simulator implements it: commands, outcomes, safety, reboots."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import firmware_protocol as fp
from simulators.device import DeviceOptions, SimDevice
from simulators.faults import FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions

from .sim_helpers import Host

R = fp.Outcome


def make(name="quillback7", **opts) -> tuple[SimDevice, Host]:
    dev = SimDevice(load_scenario(name), DeviceOptions(**{"script": False, **opts}))
    return dev, Host(dev)


def test_boot_sends_device_info_and_waits_for_stream_control():
    dev, host = make()
    host.run(0.2)
    (info,) = host.messages(fp.DeviceInfo)
    assert info.motor_count == 4 and info.pole_pairs == 7 and info.sample_rate_hz == 8000
    assert float(info.counts_per_dps) == pytest.approx(16.4) and info.raw
    assert not host.batches and host.messages(fp.DeviceStatus)
    status = host.messages(fp.DeviceStatus)[0]
    assert status.bench_state == fp.BenchState.DISARMED and status.faults & fp.Fault.REBOOTED
    host.send(fp.StreamControl(1))
    host.run(0.5)
    n = sum(b.samples.shape[0] for b in host.batches)
    # 0.5 s at 8 kHz, starting at the next 40 ms step boundary after the command (SPEC: commands
    # take effect within one step), in whole 5 ms control periods
    assert 4000 <= n <= 4000 + 320 and n % 40 == 0
    assert len(host.messages(fp.MotorState)) == n // 16  # motor state at 500 Hz beside 8 kHz gyro


def test_outcomes_carry_the_right_result_codes():
    dev, host = make()
    s = host.send(
        fp.SetThrottle(5, (1000,) * 4),  # not armed
        fp.ArmBench(5),
        fp.SetThrottle(6, (1000,) * 4),  # wrong nonce
        fp.SetThrottle(5, (1000,) * 3),  # wrong motor count
        fp.SetThrottle(5, (9000, 1000, 1000, 1000)),  # above the 80 % limit
        fp.HostHeartbeat(5),  # fine: no outcome
        fp.HostHeartbeat(7),  # wrong nonce
        fp.RequestInfo(),
        fp.StopMotors(0),
    )
    dev.receive(fp.encode_raw(0x42, 200, b"\x05"))  # STREAM_CONTROL enable=5: malformed payload
    dev.receive(fp.encode_raw(0x4F, 201, b""))  # a host type v1 does not define: skipped, no outcome
    host.run(0.05)
    got = [(a.command_seq, a.result, a.detail) for a in host.outcomes()]
    assert (200, R.MALFORMED, 0) in got
    got = [g for g in got if g[0] != 200]
    assert got == [
        (s[0], R.NOT_ARMED, 0),
        (s[1], R.OK, 5),
        (s[2], R.BAD_NONCE, 0),
        (s[3], R.BAD_MOTOR_COUNT, 4),
        (s[4], R.LIMITED, 8000),
        (s[6], R.BAD_NONCE, 0),
        (s[7], R.OK, 0),
        (s[8], R.OK, 0),
    ]
    assert len(host.messages(fp.DeviceInfo)) == 2  # at boot and on request
    assert dev.safety.faults & fp.Fault.STOP_COMMAND and not dev.safety.armed


def test_throttle_slews_and_respects_the_limit_and_stop_is_immediate():
    dev, host = make(stream_at_boot=True)
    host.send(fp.ArmBench(9), fp.SetThrottle(9, (10000,) * 4))
    slew = dev.scenario.device.slew_per_s * dev.control_period_s
    prev = np.zeros(4)
    for _ in range(40):
        host.send(fp.HostHeartbeat(9))
        host.run(dev.control_period_s * dev.options.chunk_periods)
        now = dev.applied_throttle
        assert np.all(now - prev <= slew * dev.options.chunk_periods + 1e-9)
        assert np.all(now <= 8000)
        prev = now
    assert np.all(prev == 8000)
    host.send(fp.StopMotors(0))
    host.run(0.02)
    assert np.all(dev.applied_throttle == 0)
    states = host.messages(fp.MotorState)
    assert max(m.throttle for s in states for m in s.motors) == 8000


def test_heartbeat_timeout_stops_motors_within_one_control_period():
    dev, host = make()
    timeout = dev.scenario.device.heartbeat_timeout_ms / 1000
    host.send(fp.ArmBench(3), fp.SetThrottle(3, (3000,) * 4))
    host.run(0.3)
    host.send(fp.HostHeartbeat(3))
    last_hb = dev.time_s
    while dev.safety.armed and dev.time_s < last_hb + 2:
        host.run(dev.control_period_s)
    stopped_at = dev.time_s
    assert stopped_at - last_hb <= timeout + dev.control_period_s * dev.options.chunk_periods + 1e-9
    assert stopped_at - last_hb >= timeout - 1e-9
    assert dev.safety.faults & fp.Fault.HEARTBEAT_LOST and np.all(dev.applied_throttle == 0)


def test_protocol_error_burst_stops_motors():
    dev, host = make()
    host.send(fp.ArmBench(4), fp.SetThrottle(4, (2000,) * 4))
    host.run(0.1)
    bad = bytearray(fp.encode_frame(fp.HostHeartbeat(4), 0))
    bad[2] ^= 0x40
    for _ in range(fp.ERROR_BURST_FRAMES):
        dev.receive(bytes(bad))
    host.run(0.02)
    assert not dev.safety.armed and dev.safety.faults & fp.Fault.PROTOCOL_ERRORS


commands = st.one_of(
    st.builds(lambda n: ("arm", n), st.sampled_from([1, 2])),
    st.builds(
        lambda n, t: ("thr", n, t), st.sampled_from([1, 2]), st.lists(st.integers(0, 10000), min_size=4, max_size=4)
    ),
    st.builds(lambda n: ("hb", n), st.sampled_from([0, 1, 2])),
    st.just(("stop",)),
    st.builds(lambda b: ("junk", b), st.binary(min_size=1, max_size=40)),
)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 30), commands), min_size=1, max_size=25))
def test_safety_under_generated_command_sequences(seq):
    # Throttle never above the limit; motors never run past timeout + one control period after
    # the last accepted keep-alive (SPEC 7).
    dev, host = make(chunk_periods=1)
    limit = dev.scenario.device.throttle_ceiling
    timeout = dev.scenario.device.heartbeat_timeout_ms / 1000
    period = dev.control_period_s
    alive_until = -1.0
    for periods, cmd in seq:
        kind = cmd[0]
        if kind == "arm":
            host.send(fp.ArmBench(cmd[1]))
        elif kind == "thr":
            host.send(fp.SetThrottle(cmd[1], tuple(cmd[2])))
        elif kind == "hb":
            host.send(fp.HostHeartbeat(cmd[1]))
        elif kind == "stop":
            host.send(fp.StopMotors(0))
        else:
            dev.receive(cmd[1])
        host.run(period)  # commands take effect at the next step
        if dev.safety.armed:
            alive_until = dev.safety.last_heartbeat_ms / 1000 + dev.boot_time_s + timeout
        for _ in range(periods):
            host.run(period)
            assert np.all(dev.applied_throttle <= limit)
            if dev.time_s > alive_until + period + 1e-9:
                assert np.all(dev.applied_throttle == 0), "motors still driven after the heartbeat timeout"


def test_reboot_resets_sequence_clock_and_arming():
    sc = load_scenario("quillback7")
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, script=False), FaultPlan.parse(["reboot=1.0"]),
                       StreamOptions(realtime=False))
    dec = fp.StreamDecoder()
    stream.receive(fp.encode_frame(fp.ArmBench(11), 0))
    items = []
    while stream.time_s < 2.0:
        items += dec.feed(stream.produce_chunk())
    infos = [i.message for i in items if isinstance(i, fp.Received) and isinstance(i.message, fp.DeviceInfo)]
    assert len(infos) == 2 and infos[0].boot_id != infos[1].boot_id
    seqs = np.concatenate([b.sample_seq for b in items if isinstance(b, fp.GyroBatch)])
    back = np.flatnonzero(np.diff(seqs.astype(np.int64)) < 0)
    assert len(back) == 1 and seqs[back[0] + 1] == 0
    assert stream.device.sample_seq > 0 and not stream.device.safety.armed
    statuses = [i.message for i in items if isinstance(i, fp.Received) and isinstance(i.message, fp.DeviceStatus)]
    assert statuses[-1].faults & fp.Fault.REBOOTED and statuses[-1].boot_id == infos[1].boot_id


def test_clock_drift_shows_in_timestamps():
    dev, host = make(stream_at_boot=True, drift_ppm=150.0)
    host.run(2.0)
    seq = np.concatenate([b.sample_seq for b in host.batches]).astype(float)
    t = np.concatenate([b.t_us for b in host.batches]).astype(float)
    slope = np.polyfit(seq, t, 1)[0]
    assert slope == pytest.approx(125.0 * (1 + 150e-6), rel=2e-6)


def test_stand_alone_script_spins_motors_until_a_host_arms():
    sc = load_scenario("quillback7")
    dev = SimDevice(sc, DeviceOptions(stream_at_boot=True))
    host = Host(dev)
    host.run(7.0)  # the script holds 15 % from 6 s
    erpm = np.array([m.erpm for m in host.messages(fp.MotorState)[-1].motors])
    expect = float(dev.physics.motors.target_rpm(np.array([0.15]))[0]) * sc.motors.pole_pairs
    np.testing.assert_allclose(erpm, expect, rtol=0.03)
    host.send(fp.ArmBench(77))
    host.run(0.5)
    assert np.all(dev.applied_throttle == 0)  # the host took over, and commanded nothing


def test_an_hour_of_stream_decodes_without_error():
    # Fast mode, the device clock set to wrap (2^32 us) during the hour. Physics at its internal
    # floor of 4 kHz and 1 kHz output keep the hour cheap; the protocol path is the real one.
    sc = load_scenario("quillback7")
    sc = replace(sc, gyro=replace(sc.gyro, rate_hz=1000, antialias_hz=300, block=40),
                 modes=sc.modes[:1], device=replace(sc.device, motor_state_rate_hz=50, control_period_s=0.005))
    clock0 = 2**32 - 1_800_000_000  # wraps after 30 min
    opts = DeviceOptions(stream_at_boot=True, chunk_periods=40, min_internal_hz=4000, clock_start_us=clock0)
    stream = SimStream(sc, opts, FaultPlan(), StreamOptions(realtime=False))
    dec = fp.StreamDecoder()
    expect_seq = 0
    last_t = None
    wraps = 0
    while stream.time_s < 3600.0:
        for item in dec.feed(stream.produce_chunk()):
            if isinstance(item, fp.GyroBatch):
                s = item.sample_seq.astype(np.int64)
                assert s[0] == expect_seq and np.all(np.diff(s) == 40)
                expect_seq = int(s[-1]) + 40
                t = item.t_us.astype(np.int64)
                if last_t is not None:
                    steps = np.diff(np.concatenate([[last_t], t])) % 2**32
                    assert np.all(steps == 40_000)
                    wraps += int(np.sum(np.diff(np.concatenate([[last_t], t])) < 0))
                last_t = int(t[-1])
    c = dec.counters
    assert c.bad_frames == 0 and c.frames_lost == 0 and c.unknown_type == 0 and c.bytes_skipped == 0
    assert c.gyro_samples >= 3_600_000 and c.frames_ok == stream.frames_released
    assert wraps == 1
