"""Hypothesis strategies for every message of the wire protocol."""

from __future__ import annotations

import numpy as np
from hypothesis import strategies as st

import firmware_protocol as fp

u8 = st.integers(0, 0xFF)
u16 = st.integers(0, 0xFFFF)
u32 = st.integers(0, 0xFFFFFFFF)
throttle = st.integers(0, fp.THROTTLE_FULL)

board_ids = st.text(alphabet=st.characters(min_codepoint=0x20, max_codepoint=0x7E), max_size=32)

device_info = st.builds(
    fp.DeviceInfo,
    protocol_version=st.integers(1, 255),
    axis_convention=st.sampled_from([1, 2]),
    boot_id=u32,
    gyro_rate_mhz=st.integers(1, 0xFFFFFFFF),
    sens_num=st.integers(1, 0xFFFFFFFF),
    sens_den=st.integers(1, 0xFFFFFFFF),
    full_scale_dps=u16,
    filter_flags=u8,
    onboard_cutoff_hz=u16,
    onboard_notch_centre_hz=u16,
    antialias_hz=u16,
    motor_count=st.integers(0, 8),
    pole_pairs=st.integers(1, 255),
    heartbeat_timeout_ms=u16,
    max_batch=st.integers(1, 40),
    throttle_ceiling=throttle,
    motor_state_rate_hz=u16,
    board_id=board_ids,
)


@st.composite
def gyro_block(draw):
    n = draw(st.integers(1, fp.MAX_GYRO_BATCH))
    values = draw(st.lists(st.integers(-32768, 32767), min_size=3 * n, max_size=3 * n))
    return fp.GyroBlock(draw(u32), draw(u32), np.array(values, dtype=np.int16).reshape(n, 3))


motor_entry = st.builds(fp.MotorEntry, erpm=u32, throttle=u16, flags=u8)
motor_state = st.builds(fp.MotorState, t_us=u32, motors=st.lists(motor_entry, max_size=8).map(tuple))
device_status = st.builds(fp.DeviceStatus, u32, u32, u8, u16, u16, u16, u16, u16, u8)
log_text = st.builds(
    fp.LogText, level=u8, text=st.text(max_size=50).filter(lambda s: len(s.encode("utf-8")) <= 200)
)
command_outcome = st.builds(fp.CommandOutcome, u8, u8, u8, u32)
host_commands = st.one_of(
    st.just(fp.RequestInfo()),
    st.builds(fp.StreamControl, st.integers(0, 1)),
    st.builds(fp.ArmBench, st.integers(1, 0xFFFFFFFF)),
    st.builds(fp.SetThrottle, u32, st.lists(throttle, min_size=1, max_size=8).map(tuple)),
    st.builds(fp.StopMotors, u8),
    st.builds(fp.HostHeartbeat, u32),
    st.builds(fp.SimTap, u8, u16),
)
any_message = st.one_of(device_info, gyro_block(), motor_state, device_status, log_text, command_outcome, host_commands)
