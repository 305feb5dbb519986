"""Every message type round-trips; bad fields raise errors that name the field."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import firmware_protocol as fp
from firmware_protocol.messages import TYPE_OF, decode_payload, encode_payload

from .strategies import any_message


@given(any_message)
def test_payload_roundtrip(msg):
    assert decode_payload(TYPE_OF[type(msg)], encode_payload(msg)) == msg


@given(any_message, st.integers(0, 255))
def test_frame_roundtrip_through_stream_decoder(msg, seq):
    items = fp.StreamDecoder().feed(fp.encode_frame(msg, seq))
    assert len(items) == 1
    item = items[0]
    if isinstance(msg, fp.GyroBlock):
        assert item.blocks() == [msg]
    else:
        assert item.seq == seq and item.message == msg


def test_counts_to_dps_at_the_common_sensitivities():
    # A 16-bit output over +-2000 deg/s gives 2^15 / 2000 = 16.384 counts per deg/s, often declared
    # rounded as 16.4 (common practice): 16.4 counts is 1 deg/s and 32767 counts is 1998.0 deg/s.
    info = fp.DeviceInfo(sens_num=164, sens_den=10, full_scale_dps=2000)
    block = fp.GyroBlock(0, 0, np.array([[164, -16400, 32767]], dtype=np.int16))
    batch = fp.StreamDecoder().feed(fp.encode_frame(info, 0) + fp.encode_frame(block, 1))[1]
    dps = batch.dps(info.dps_per_count)
    np.testing.assert_allclose(dps[0], [10.0, -1000.0, 32767 / 16.4], rtol=1e-6)
    assert float(info.counts_per_dps) == pytest.approx(16.4)
    # the exact form: sensitivity 2^15 / full scale = 16.384 counts per deg/s at +-2000 deg/s
    assert float(fp.DeviceInfo(sens_num=2**15, sens_den=2000).counts_per_dps) == pytest.approx(16.384)


@pytest.mark.parametrize(
    ("msg", "match"),
    [
        (fp.DeviceInfo(max_batch=41), "max_batch=41"),
        (fp.DeviceInfo(board_id="x" * 33), "board_id"),
        (fp.DeviceInfo(sens_den=0), "sens_den=0"),
        (fp.SetThrottle(1, (10001,)), r"throttles\[0\]=10001"),
        (fp.SetThrottle(1, ()), "0 throttles"),
        (fp.ArmBench(0), "nonce=0"),
        (fp.LogText(1, "x" * 201), "201 bytes"),
        (fp.GyroBlock(0, 0, np.zeros((41, 3), np.int16)), r"shape \(41, 3\)"),
    ],
)
def test_encode_rejects_bad_fields(msg, match):
    with pytest.raises(ValueError, match=match):
        encode_payload(msg)


@pytest.mark.parametrize(
    ("type_code", "payload", "match"),
    [
        (0x02, b"\x00" * 9, r"GYRO_BLOCK.count=0"),
        (0x02, b"\x00" * 8, "GYRO_BLOCK: payload of 8 bytes"),
        (0x03, b"\x00\x00\x00\x00\x09", "MOTOR_STATE.count=9"),
        (0x01, b"\x01" * 10, "DEVICE_INFO: payload of 10 bytes"),
        (0x44, b"\x01\x00\x00\x00\x01\x11\x27", r"throttles\[0\]=10001"),
        (0x42, b"\x02", "STREAM_CONTROL.enable=2"),
        (0x43, b"\x00\x00\x00\x00", "ARM_BENCH.nonce=0"),
    ],
)
def test_decode_errors_name_the_field(type_code, payload, match):
    with pytest.raises(fp.MalformedPayload, match=match):
        decode_payload(type_code, payload)


def test_longer_fixed_payloads_accepted_for_later_versions():
    # SPEC 8: fixed-layout payloads may grow; receivers ignore the extra bytes.
    status = fp.DeviceStatus(1, 2, 1, 0, 16000, 100, 5, 0, 1)
    assert decode_payload(0x04, encode_payload(status) + b"\xaa\xbb") == status
    info = fp.DeviceInfo(board_id="QB7")
    assert decode_payload(0x01, encode_payload(info) + b"\x01\x02") == info
