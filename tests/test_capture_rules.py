"""The capture format and its writer and reader, byte by byte (module docstring of
``monitor.capture``; README "Captures").

The file is parsed here from the documented layout alone (``struct`` and ``zlib.crc32``), so the
writer cannot drift from the format with the reader following it. CRC-32/ISO-HDLC is checked by
its published check value (0xCBF43926 for ``b"123456789"``: the CRC RevEng catalogue). The
writer's timing runs on an injected clock; a full disk is a real file-size limit on a child
process, not a stand-in.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import pytest

from monitor import capture
from monitor.capture import CaptureError, CaptureWriter, read_capture

ROOT = Path(__file__).resolve().parents[1]
MAGIC = b"spinrig rec v2\n\x00"


class Clock:
    def __init__(self, t=100.0):
        self.t = t

    def __call__(self):
        return self.t


def _parse(raw: bytes):
    """Chunks (kind, length, host_ns, payload, crc ok) of a capture, from the documented layout."""
    assert raw[:16] == MAGIC
    pos, out = 16, []
    while pos < len(raw):
        sync, kind, zero, length, host_ns = struct.unpack_from("<2scBIq", raw, pos)
        assert sync == b"\xd5\x52" and zero == 0
        payload = raw[pos + 16 : pos + 16 + length]
        (crc,) = struct.unpack_from("<I", raw, pos + 16 + length)
        out.append((kind.decode(), length, host_ns, payload, crc == zlib.crc32(raw[pos : pos + 16 + length])))
        pos += 16 + length + 4
    return out


def test_crc32_is_iso_hdlc_by_its_check_value():
    assert zlib.crc32(b"123456789") == 0xCBF43926


def test_the_file_is_the_documented_layout(tmp_path):
    clk = Clock()
    f = tmp_path / "a.spinrec"
    w = CaptureWriter(f, {"port": "/dev/ttyX", "baud": 921600}, clock=clk)
    clk.t = 100.25
    w.write_device(b"\x01\x02\x03")
    clk.t = 100.5
    w.write_data(b"\x00\xffdata")
    w.write_data(b"")  # nothing to write: no chunk
    clk.t = 101.0
    w.write_gap({"lost_s": 0.5})
    clk.t = 101.75
    w.close({"frames_ok": 3})
    chunks = _parse(f.read_bytes())
    assert [(k, n, t) for k, n, t, _, _ in chunks] == [
        ("M", len(json.dumps({"baud": 921600, "port": "/dev/ttyX"})), 0),
        ("I", 3, 250_000_000), ("D", 6, 500_000_000), ("G", len(b'{"lost_s": 0.5}'), 1_000_000_000),
        ("E", len(b'{"frames_ok": 3}'), 1_750_000_000),
    ]
    assert all(ok for *_, ok in chunks)
    assert chunks[2][3] == b"\x00\xffdata" and json.loads(chunks[0][3]) == {"port": "/dev/ttyX", "baud": 921600}
    assert w.bytes_written == f.stat().st_size


def test_the_reader_gives_back_what_was_written(tmp_path):
    clk = Clock()
    f = tmp_path / "r.spinrec"
    w = CaptureWriter(f, {"a": 1}, clock=clk)
    w.write_meta({"b": 2, "a": 3})  # later metadata adds and overrides fields
    clk.t = 100.5
    w.write_data(b"xyz")
    w.close({"n": 1})
    c = read_capture(f)
    assert c.meta == {"a": 3, "b": 2} and c.ended_cleanly and c.end == {"n": 1}
    assert [(ch.kind, ch.host_s, ch.payload) for ch in c.chunks] == [("D", 0.5, b"xyz")]
    assert c.data_bytes == 3 and c.cut_bytes == 0 and c.damaged == [] and c.cut_message() is None
    assert c.chunks[0].offset == len(MAGIC) + 16 + len(json.dumps({"a": 1})) + 4 + 16 + len(b'{"a": 3, "b": 2}') + 4


def _chunk(kind: bytes, payload: bytes, host_ns=0) -> bytes:
    head = struct.pack("<2scxIq", b"\xd5\x52", kind, len(payload), host_ns)
    return head + payload + struct.pack("<I", zlib.crc32(head + payload))


def _file(tmp_path, *chunks, name="c.spinrec"):
    f = tmp_path / name
    f.write_bytes(MAGIC + b"".join(chunks))
    return f


def test_unknown_kinds_are_skipped_and_bad_metadata_json_is_ignored(tmp_path):
    f = _file(tmp_path, _chunk(b"M", b'{"a": 1}'), _chunk(b"Q", b"later"), _chunk(b"M", b"{not json"),
              _chunk(b"D", b"d"), _chunk(b"E", b"[broken"))
    c = read_capture(f)
    assert c.meta == {"a": 1} and [ch.kind for ch in c.chunks] == ["D"] and c.ended_cleanly and c.end == {}
    assert c.damaged == []


def test_a_damaged_chunk_is_one_range_from_its_start_to_the_next_chunk_that_checks(tmp_path):
    a, b, d = _chunk(b"M", b"{}"), _chunk(b"D", b"one" * 10), _chunk(b"D", b"two")
    bad = bytearray(b)
    bad[20] ^= 1  # inside the payload
    f = _file(tmp_path, a, bytes(bad), d)
    c = read_capture(f)
    start = 16 + len(a)
    assert c.damaged == [(start, start + len(b), "chunk fails its CRC")]
    assert [(ch.kind, ch.payload) for ch in c.chunks] == [("X", b""), ("D", b"two")]
    assert c.chunks[0].offset == start  # the break in the byte stream, where the damage was
    msg = c.cut_message()
    span = f"bytes {start}-{start + len(b)}"
    assert msg == f"{f}: 1 damaged range(s) skipped, {len(b)} bytes ({span}: chunk fails its CRC)"


def test_a_false_sync_inside_the_damage_is_passed_over_by_its_crc(tmp_path):
    a, d = _chunk(b"M", b"{}"), _chunk(b"D", b"kept")
    junk = b"\x11" * 7 + b"\xd5\x52" + b"D\x00" + b"\x05\x00\x00\x00" + b"\x00" * 8 + b"hello" + b"\x00" * 4
    f = _file(tmp_path, a, junk, d)
    c = read_capture(f)
    start = 16 + len(a)
    assert c.damaged == [(start, start + len(junk), "no chunk sync")]
    assert [ch.payload for ch in c.chunks if ch.kind == "D"] == [b"kept"]


def test_an_impossible_length_is_damage(tmp_path):
    a, d = _chunk(b"M", b"{}"), _chunk(b"D", b"ok")
    huge = struct.pack("<2scxIq", b"\xd5\x52", b"D", 64 * 1024 * 1024 + 1, 0)
    c = read_capture(_file(tmp_path, a, huge, d))
    assert c.damaged[0][2] == "impossible chunk length" and c.chunks[-1].payload == b"ok"
    # exactly the limit is a possible length: the data just ends inside it (a cut tail)
    at_limit = struct.pack("<2scxIq", b"\xd5\x52", b"D", 64 * 1024 * 1024, 0)
    c = read_capture(_file(tmp_path, a, at_limit + b"1234", name="l.spinrec"))
    assert c.cut_reason == "incomplete chunk" and c.damaged == []


@pytest.mark.parametrize("keep", [1, 15, 16, 20, -1])
def test_a_file_cut_inside_its_last_chunk_reads_up_to_it_and_says_how_much_was_cut(tmp_path, keep):
    a, b, last = _chunk(b"M", b"{}"), _chunk(b"D", b"whole"), _chunk(b"D", b"cut short")
    piece = last[:keep]
    f = _file(tmp_path, a, b, piece)
    c = read_capture(f)
    at = 16 + len(a) + len(b)
    assert (c.cut_at, c.cut_bytes) == (at, len(piece))
    assert c.cut_reason == ("incomplete chunk header" if len(piece) < 20 else "incomplete chunk")
    assert [ch.payload for ch in c.chunks] == [b"whole"] and c.damaged == []
    assert c.cut_message() == f"{f}: {c.cut_reason} at byte {at}; {len(piece)} bytes after it were cut"


def test_damage_at_the_end_after_good_chunks_is_a_damaged_range(tmp_path):
    a = _chunk(b"M", b'{"a": 1}')
    tail = b"\x00" * 40  # complete enough to judge, and no chunk after it
    c = read_capture(_file(tmp_path, a, tail))
    assert c.damaged == [(16 + len(a), 16 + len(a) + 40, "no chunk sync")] and c.cut_bytes == 0


def test_several_damaged_ranges_are_summed_in_one_line(tmp_path):
    a, d = _chunk(b"M", b"{}"), _chunk(b"D", b"x")
    c = read_capture(_file(tmp_path, a, b"\x01" * 30, d, b"\x02" * 25, d))
    assert c.damaged_bytes == 55 and len(c.damaged) == 2
    assert "2 damaged range(s) skipped, 55 bytes" in c.cut_message() and "and 1 more" in c.cut_message()


def test_a_file_that_is_not_a_capture_or_cannot_be_read_is_one_line_naming_it(tmp_path):
    f = tmp_path / "x.spinrec"
    f.write_bytes(b"spinrig rec v1\n\x00")
    with pytest.raises(CaptureError, match=r"x\.spinrec: not a spinrig capture \(bad magic at byte 0\)"):
        read_capture(f)
    with pytest.raises(CaptureError, match=r"missing\.spinrec: cannot read"):
        read_capture(tmp_path / "missing.spinrec")


# ----------------------------------------------------------------- the writer's timing


def test_the_writer_flushes_every_half_second_and_syncs_every_two(tmp_path, monkeypatch):
    synced = []
    real_fsync = os.fsync
    monkeypatch.setattr(capture.os, "fsync", lambda fd: (synced.append(clk.t), real_fsync(fd)))
    clk = Clock(1000.0)
    f = tmp_path / "t.spinrec"
    w = CaptureWriter(f, {}, clock=clk)
    assert synced == [1000.0]  # the header is on disk at once
    size0 = f.stat().st_size
    for t in (1000.1, 1000.49):
        clk.t = t
        w.write_data(b"a" * 10)
    assert f.stat().st_size == size0  # held in the buffer
    clk.t = 1000.5
    w.write_data(b"b" * 10)
    assert f.stat().st_size == size0 + 3 * (16 + 10 + 4) and synced == [1000.0]
    for t in (1001.0, 1001.5, 1001.99):
        clk.t = t
        w.write_data(b"c")
    assert synced == [1000.0]
    clk.t = 1002.0
    w.tick()  # a flush 2 s after the last sync also syncs
    assert synced == [1000.0, 1002.0]
    clk.t = 1002.2
    w.close({})
    assert synced == [1000.0, 1002.0, 1002.2]  # a clean end is synced


def test_a_fast_source_is_written_in_64_kib_pieces(tmp_path):
    clk = Clock(0.0)
    f = tmp_path / "fast.spinrec"
    w = CaptureWriter(f, {}, clock=clk)
    size0 = f.stat().st_size
    w.write_data(b"z" * (64 * 1024 - 20 - 1))  # one byte under the limit with its 20 bytes of framing
    assert f.stat().st_size == size0
    w.write_data(b"z")
    assert f.stat().st_size == size0 + 64 * 1024 - 1 + 21  # written with no time passing


def test_a_full_disk_stops_the_capture_with_one_line_and_leaves_it_readable(tmp_path):
    f = tmp_path / "full.spinrec"
    code = (
        "import sys; from monitor.capture import CaptureWriter\n"
        "w = CaptureWriter(sys.argv[1], {'port': 'x'})\n"
        "for i in range(10000):\n"
        "    w.write_data(bytes(1000)); w.flush()\n"
        "    if not w.active: break\n"
        "w.write_data(b'more'); w.close({})\n"
        "print(w.error); print(w.bytes_written)\n"
    )

    def limit():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))

    p = subprocess.run([sys.executable, "-c", code, str(f)], capture_output=True, text=True, timeout=60,
                       preexec_fn=limit, cwd=ROOT)
    assert p.returncode == 0, p.stderr
    error, written = p.stdout.strip().splitlines()
    assert error.startswith(f"capture {f}: write failed after {written} bytes (File too large); capture stopped")
    c = read_capture(f)
    assert c.meta == {"port": "x"} and not c.ended_cleanly
    assert c.data_bytes == 1000 * sum(1 for ch in c.chunks if ch.kind == "D") > 0
    assert f.stat().st_size <= 200_000 and c.damaged == []


# ----------------------------------------------------------------- the writer's edges


def test_chunks_carry_the_time_they_are_given_and_a_given_time_drives_the_flush(tmp_path):
    clk = Clock(100.0)
    f = tmp_path / "given.spinrec"
    w = CaptureWriter(f, {}, clock=clk)
    assert w.has_device is False
    w.write_meta({"later": 1}, t=100.1)
    w.write_device(b"\x01", t=100.2)
    assert w.has_device is True
    w.write_gap({"why": "x"}, t=100.3)
    size = f.stat().st_size
    w.write_data(b"d", t=101.0)  # the clock still reads 100.0: the given time is what counts
    assert f.stat().st_size > size
    w.close({})
    times = [t for _, _, t, _, _ in _parse(f.read_bytes())]
    # whole nanoseconds, truncated: 100.1 - 100.0 is 0.0999999... s in binary floating point
    assert [round(t / 1e6) for t in times[1:5]] == [100, 200, 300, 1000]


def test_json_chunks_are_sorted_and_take_any_value_as_text(tmp_path):
    f = tmp_path / "j.spinrec"
    w = CaptureWriter(f, {"b": 1, "a": Path("/x")}, clock=Clock())
    w.write_gap({"z": 1, "y": 2})
    w.close({"n": 2, "m": Path("/y")})
    chunks = _parse(f.read_bytes())
    assert [p for _, _, _, p, _ in chunks] == [b'{"a": "/x", "b": 1}', b'{"y": 2, "z": 1}', b'{"m": "/y", "n": 2}']


def test_a_buffer_of_exactly_64_kib_is_written_without_a_sync(tmp_path, monkeypatch):
    synced = []
    monkeypatch.setattr(capture.os, "fsync", lambda fd: synced.append(fd))
    f = tmp_path / "exact.spinrec"
    w = CaptureWriter(f, {}, clock=Clock())
    size0, n_sync = f.stat().st_size, len(synced)
    w.write_data(b"z" * (64 * 1024 - 20))  # 16 bytes of header and 4 of CRC: exactly 64 KiB
    assert f.stat().st_size == size0 + 64 * 1024 and len(synced) == n_sync


def test_a_closed_writer_is_inactive_and_flushing_it_again_is_harmless(tmp_path):
    w = CaptureWriter(tmp_path / "closed.spinrec", {}, clock=Clock())
    assert w.active
    w.close({})
    assert not w.active
    w.flush()
    w.flush(sync=True)
    w.write_data(b"after")  # ignored
    w.close({})
    assert read_capture(tmp_path / "closed.spinrec").data_bytes == 0


def test_an_unreadable_file_names_the_reason(tmp_path):
    with pytest.raises(CaptureError) as exc:
        read_capture(tmp_path / "gone.spinrec")
    assert str(exc.value) == f"{tmp_path / 'gone.spinrec'}: cannot read: No such file or directory"


# ----------------------------------------------------------------- the reader's edges


def test_nothing_but_damage_after_the_magic_is_a_cut_tail(tmp_path):
    c = read_capture(_file(tmp_path, b"\x00" * 40))
    assert (c.cut_bytes, c.cut_at, c.cut_reason) == (40, 16, "no chunk sync") and c.damaged == []


def test_damage_and_a_cut_tail_are_one_line(tmp_path):
    a, d = _chunk(b"M", b'{"a": 1}'), _chunk(b"D", b"x")
    f = _file(tmp_path, a, b"\x01" * 30, d, d[:10])
    msg = read_capture(f).cut_message()
    assert msg.startswith(f"{f}: 1 damaged range(s) skipped, 30 bytes") and "; incomplete chunk header at byte" in msg


def test_after_a_false_sync_the_first_good_chunk_is_taken_not_a_later_one(tmp_path):
    a, d1, d2 = _chunk(b"M", b'{"a": 1}'), _chunk(b"D", b"first"), _chunk(b"D", b"second")
    junk = b"\x11" * 7 + b"\xd5\x52" + b"D\x00" + b"\x05\x00\x00\x00" + b"\x00" * 8 + b"hello" + b"\x00" * 4
    c = read_capture(_file(tmp_path, a, junk, d1, d2))
    assert [ch.payload for ch in c.chunks if ch.kind == "D"] == [b"first", b"second"]
