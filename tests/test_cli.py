"""The command line: help, ports listing, demo."""

from __future__ import annotations

import subprocess
import sys
from types import SimpleNamespace

import pytest

from monitor import cli, ports


def test_help_lists_commands_and_safety(capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for word in ("demo", "ports", "kill switch", "prop arc"):
        assert word in out


def test_no_command_prints_help_and_exits_2(capsys):
    assert cli.main([]) == 2
    assert "usage: spinrig" in capsys.readouterr().out


def _port(device, description, vid=None, pid=None, serial_number=None):
    return SimpleNamespace(device=device, description=description, vid=vid, pid=pid, serial_number=serial_number)


def test_ports_lists_description_and_vid_pid(monkeypatch, capsys):
    fake = [_port("/dev/ttyACM0", "Bench FC", 0x0483, 0x5740, "A1B2"), _port("/dev/ttyS0", "n/a")]
    monkeypatch.setattr(ports.list_ports, "comports", lambda: fake)
    assert cli.main(["ports"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines == ["/dev/ttyACM0  Bench FC  USB 0483:5740  serial A1B2", "/dev/ttyS0  no description"]


def test_ports_says_plainly_when_none(monkeypatch, capsys):
    monkeypatch.setattr(ports.list_ports, "comports", lambda: [])
    assert cli.main(["ports"]) == 0
    assert capsys.readouterr().out.startswith("no serial ports found")


def test_demo_runs_and_exits_0():
    proc = subprocess.run(
        [sys.executable, "-m", "monitor", "demo", "--seconds", "4"], capture_output=True, text=True, timeout=120
    )
    assert proc.returncode == 0, proc.stderr
    assert "BENCH SAFETY" in proc.stdout and "== summary" in proc.stdout and "Traceback" not in proc.stderr
    assert " 0 CRC errors" in proc.stdout


def _spawn_sim(*args):
    return subprocess.Popen(
        [sys.executable, "-m", "monitor", "sim", *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )


SCENARIOS = __import__("simulators.scenario", fromlist=["list_scenarios"]).list_scenarios()


@pytest.mark.parametrize("name", SCENARIOS)
@pytest.mark.parametrize("where", ["pty", "tcp"])
def test_spinrig_sim_serves_each_scenario(name, where):
    import serial

    import firmware_protocol as fp

    extra = ["--tcp", "0"] if where == "tcp" else ["--pty"]
    proc = _spawn_sim(name, "--fast", "--duration", "60", *extra)
    try:
        assert "spinrig sim:" in proc.stdout.readline()
        url = proc.stdout.readline().split("spinrig watch ", 1)[1].split()[0]
        port = serial.Serial(url, timeout=0.2) if where == "pty" else serial.serial_for_url(url, timeout=0.2)
        port.write(fp.encode_frame(fp.RequestInfo(), 0) + fp.encode_frame(fp.StreamControl(1), 1))
        dec = fp.StreamDecoder()
        for _ in range(500):  # bounded: about 5 s of stream are read within a few hundred reads
            dec.feed(port.read(4096))
            if dec.counters.gyro_samples >= 20_000:
                break
        port.close()
        assert proc.poll() is None  # still serving: we stop it
    finally:
        proc.kill()
        proc.wait()
    assert dec.counters.gyro_samples >= 20_000 and dec.counters.bad_frames == 0 and dec.counters.frames_lost == 0


def test_spinrig_sim_rejects_a_bad_fault_in_one_line():
    proc = _spawn_sim("quillback7", "--fault", "melt=1")
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 2
    assert err.strip().count("\n") == 0 and "fault 'melt=1'" in err and "Traceback" not in err
