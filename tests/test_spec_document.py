"""SPEC.md agrees with the codec: computed tables are current, and the numbers it quotes match."""

from __future__ import annotations

import re

import firmware_protocol as fp
from firmware_protocol import constants, spec_tables

TEXT = spec_tables.SPEC.read_text(encoding="utf-8")


def test_computed_blocks_are_current():
    assert spec_tables.render_blocks(TEXT) == TEXT, "run python3 -m firmware_protocol.spec_tables"


def test_every_type_code_in_the_catalogue():
    for t in fp.MessageType:
        assert re.search(rf"{t.name}\W+\(?0x{t.value:02X}", TEXT) or f"0x{t.value:02X} | {t.name}" in TEXT, t.name


def test_limits_quoted_match_constants():
    assert f"at most **{constants.MAX_PAYLOAD}** bytes" in TEXT
    assert f"body at most **{constants.MAX_BODY}** bytes" in TEXT
    assert f"at most **{constants.MAX_ENCODED}** bytes" in TEXT
    assert f"**{constants.ERROR_BURST_FRAMES} or more bad host frames**" in TEXT
    assert f"**{constants.ERROR_BURST_WINDOW_MS} ms**" in TEXT
    assert "**0x29B1**" in TEXT


def test_bandwidth_rows_follow_from_frame_sizes():
    # 8 kHz, 16-sample blocks: 500 frames/s of 15 + 96 bytes, plus 500 x 39 + 10 x 26.
    row = next(r for r in spec_tables.bandwidth_rows() if r["rate_hz"] == 8000 and r["block"] == 16)
    assert row["total_bps"] == 500 * 111 + 500 * 39 + 10 * 26
    assert len(fp.encode_frame(fp.MotorState(0, (fp.MotorEntry(1, 1, 1),) * 4), 0)) == 39
    assert len(fp.encode_frame(fp.DeviceStatus(1, 1, 1, 1, 1, 1, 1, 1, 1), 0)) == 26
