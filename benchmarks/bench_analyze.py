"""``analyze`` of a 10-minute 8 kHz capture with 4 motors (the quillback7 airframe, its throttle
script slowed eightfold): wall time of the replay (reading and decoding the capture) and of the
analysis, peak memory of the whole, against a baseline measured in the same run:
``scipy.signal.welch`` of the same samples (one spectrum of the whole file, which any analysis
must at least match)."""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

from scipy import signal

from benchmarks.common import report


def make_capture(path: Path, minutes: float = 10.0) -> None:
    from simulators.device import DeviceOptions
    from simulators.faults import FaultPlan
    from simulators.scenario import load_scenario
    from simulators.stream import SimStream, StreamOptions
    from tests.sim_helpers import record_capture

    sc = load_scenario("quillback7")
    stretch = minutes * 60.0 / sc.script_duration_s
    sc = replace(sc, script=tuple((t * stretch, v) for t, v in sc.script))
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, seed=1, min_internal_hz=16_000.0), FaultPlan(),
                       StreamOptions(realtime=False))
    record_capture(path, stream, sc.script_duration_s, port="sim://quillback7")


def main(quick: bool = False) -> None:
    from monitor.analysis.record import load_record
    from monitor.analysis.sweep import analyse

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "long.spinrec"
        t0 = time.perf_counter()
        make_capture(path, 2.0 if quick else 10.0)
        t_make = time.perf_counter() - t0
        t0 = time.perf_counter()
        rec = load_record(path)
        t_read = time.perf_counter() - t0
        t0 = time.perf_counter()
        a = analyse(rec, 3)
        t_analyse = time.perf_counter() - t0
        t0 = time.perf_counter()
        signal.welch(rec.gyro_dps, rec.fs_hz, nperseg=2048, axis=0)
        t_ref = time.perf_counter() - t0
        # the command's own memory: `spinrig analyze` in a child process, its peak resident size
        t0 = time.perf_counter()
        child = ("import contextlib, io, resource, sys; from monitor.cli import main\n"
                 "with contextlib.redirect_stdout(io.StringIO()): main(['analyze', sys.argv[1], '--json'])\n"
                 "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)")
        out = subprocess.run([sys.executable, "-c", child, str(path)], check=True, capture_output=True, text=True)
        t_cmd = time.perf_counter() - t0
        peak_mb = int(out.stdout.split()[-1]) / 1024  # that process's own peak (kB on Linux)
        size_mb = path.stat().st_size / 1e6
    total = t_read + t_analyse
    title = (f"analyze ({rec.duration_s / 60:.1f} min at {rec.fs_hz:g} Hz, {rec.motors} motors, "
             f"{size_mb:.0f} MB capture)")
    report(title, [
        ("capture made (simulator, not timed below)", f"{t_make:.1f} s"),
        ("replay: read and decode", f"{t_read:.2f} s ({100 * t_read / total:.0f} % of the whole)"),
        ("analysis: map, modes, bands, imbalance", f"{t_analyse:.2f} s"),
        ("whole analyze", f"{total:.2f} s"),
        ("baseline welch of the same samples", f"{t_ref:.2f} s"),
        ("ratio analyze / welch", f"{total / t_ref:.1f}x"),
        ("`spinrig analyze FILE --json` as a command (start-up included)", f"{t_cmd:.2f} s"),
        ("peak memory of that command", f"{peak_mb:.0f} MB"),
        ("modes found", ", ".join(f"{m.freq_hz:.1f}" for m in a.modes) + " Hz"),
    ])
