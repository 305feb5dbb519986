"""Engine cost, latency and replay speed, each beside a baseline measured in the same run.

1. Engine plus detectors at 8 kHz, 3 axes, 4 motors, 2048-point windows at 87.5 % overlap
   (31 frames/s), a 6-mode profile: CPU seconds per stream second, against recomputing
   ``scipy.signal.spectrogram`` over the last 2 s at 20 Hz (what a naive screen would do).
   Engine and baseline are measured in interleaved pairs (this machine's speed drifts by up to
   2x over minutes); the ratio printed is the median of the pairs' ratios.
2. Latency from a sample's arrival at the port (the reader's read time) to the first frame that
   contains it, in real time over a pty: one hop (waiting for the frame to fill) plus the
   processing delay measured here (p50, p99); and the same to the detectors' verdict on that
   frame (they run over the frames gathered in the last ``detect_every_s``).
3. Replay of a 10-minute 8 kHz capture: stream seconds per wall second.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import signal

import firmware_protocol as fp
from monitor.assembler import Assembler
from monitor.capture import CaptureWriter
from monitor.engine import Engine, EngineConfig
from monitor.link import Link
from monitor.profile import load_profile
from monitor.session import Session
from simulators.device import DeviceOptions
from simulators.faults import FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions

from .common import report

PROFILE = Path(__file__).resolve().parents[1] / "monitor" / "profiles" / "quillback7.toml"


def _assembled(seconds: float) -> list[list]:
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True, seed=7), FaultPlan(),
                       StreamOptions(realtime=False))
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    out = []
    while stream.time_s < seconds:
        out.append(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
    return out


def engine_cost(items: list[list], seconds: float) -> float:
    eng = Engine(EngineConfig(window_s=2048 / 8000, overlap=0.875), load_profile(PROFILE))
    c0 = time.process_time()
    for chunk in items:
        eng.feed(chunk)
    return (time.process_time() - c0) / seconds


def malloc_state(warm: bool) -> bool:
    """Fix glibc's allocator thresholds, so the baseline's cost does not depend on what ran before.

    The baseline allocates a few MB of temporaries per call. With glibc's defaults (128 KiB mmap
    and trim thresholds, raised dynamically when a large block is freed) a fresh program returns
    them to the kernel and page-faults them back on every call; after some large allocation the
    thresholds have risen and the same calls run about twice as fast from the heap (measured here:
    about 23 % against 11 % of a core). ``warm=False`` pins the defaults, ``warm=True`` pins
    64 MiB thresholds. Returns False where this is not glibc (then nothing is pinned).
    """
    import ctypes
    import ctypes.util

    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    m_trim_threshold, m_mmap_threshold = -1, -3  # <malloc.h>
    size = (64 << 20) if warm else (128 << 10)
    return bool(mallopt(m_mmap_threshold, size)) and bool(mallopt(m_trim_threshold, size))


def recompute_cost(seconds: float = 5.0) -> float:
    rng = np.random.default_rng(0)
    x = rng.normal(size=(16_000, 3))
    c0 = time.process_time()
    for _ in range(int(20 * seconds)):
        signal.spectrogram(x, fs=8000, nperseg=2048, noverlap=1792, axis=0)
    return (time.process_time() - c0) / seconds


def latency(window_s: float = 8.0) -> tuple[float, float, float, float, float]:
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "sim", "quillback7", "--duration", str(window_s + 10)],
                            stdout=subprocess.PIPE, text=True)
    lat, det = [], []
    try:
        proc.stdout.readline()
        path = proc.stdout.readline().split("spinrig watch ", 1)[1].split()[0]
        eng = Engine(EngineConfig(window_s=2048 / 8000, overlap=0.875), load_profile(PROFILE))
        link = Link(path)
        link.start()
        session = Session(eng, link)
        orig = session._entry
        arrived: list[tuple[int, float]] = []  # (frames when the entry arrived, its read time)

        def timed(entry):
            before, seen = eng.frames, eng.detected
            out = orig(entry)
            if isinstance(entry, tuple):
                now = time.monotonic()
                if eng.frames > before:
                    lat.append(now - entry[0])
                    arrived.append((eng.frames, entry[0]))
                while arrived and arrived[0][0] <= eng.detected and eng.detected > seen:
                    det.append(now - arrived.pop(0)[1])
            return out

        session._entry = timed
        t0 = time.monotonic()
        while time.monotonic() - t0 < window_s:
            session.pump(timeout=0.05)
        link.close()
        hop = eng.spec.hop / eng.spec.fs_hz
    finally:
        proc.kill()
        proc.wait()
    lat, det = lat[10:], det[10:]  # after warm-up
    return (hop, float(np.percentile(lat, 50)), float(np.percentile(lat, 99)), float(np.percentile(det, 50)),
            float(np.percentile(det, 99)))


def replay_speed(minutes: float) -> tuple[float, float]:
    seconds = minutes * 60
    stream = SimStream(load_scenario("quillback7"), DeviceOptions(stream_at_boot=True, seed=8), FaultPlan(),
                       StreamOptions(realtime=False))
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "ten.spinrec"
        clock = [0.0]
        w = CaptureWriter(path, {"port": "sim://quillback7"}, clock=lambda: clock[0])
        while stream.time_s < seconds:
            data = stream.produce_chunk()
            for k in range(0, len(data), 4096):  # the reader's 4096-byte reads
                clock[0] = stream.time_s
                w.write_data(data[k : k + 4096], clock[0])
        w.close()
        size = path.stat().st_size
        # in a process of its own, as `spinrig replay` runs (this one's allocator state is pinned)
        code = ("import sys, time; from monitor.engine import Engine, EngineConfig; "
                "from monitor.profile import load_profile; from monitor.session import CaptureReplay; "
                "t0 = time.perf_counter(); "
                "[None for _ in CaptureReplay(sys.argv[1], Engine(EngineConfig(), load_profile(sys.argv[2])))]; "
                "print(time.perf_counter() - t0)")
        walls = []
        for _ in range(3):
            out = subprocess.run([sys.executable, "-c", code, str(path), str(PROFILE)], capture_output=True,
                                 text=True, check=True, cwd=Path(__file__).resolve().parents[1])
            walls.append(float(out.stdout.strip().splitlines()[-1]))
        wall = statistics.median(walls)
    return seconds / wall, size / 1e6


def main(quick: bool = False) -> dict:
    seconds = 20.0 if quick else 60.0
    items = _assembled(seconds)
    eng, base, eng_w, warm = [], [], [], []
    pinned = False
    for _ in range(3 if quick else 5):  # interleaved: all four see the same machine speed
        pinned = malloc_state(warm=False)
        eng.append(engine_cost(items, seconds))
        base.append(recompute_cost(2.0 if quick else 4.0))
        malloc_state(warm=True)
        eng_w.append(engine_cost(items, seconds))
        warm.append(recompute_cost(2.0 if quick else 4.0))
    malloc_state(warm=False)
    e, b, ew, bw = (statistics.median(x) for x in (eng, base, eng_w, warm))
    ratio = statistics.median([y / x for x, y in zip(eng, base, strict=True)])
    ratio_warm = statistics.median([y / x for x, y in zip(eng_w, warm, strict=True)])
    hop, p50, p99, d50, d99 = latency(4.0 if quick else 8.0)
    speed, mb = replay_speed(2.0 if quick else 10.0)
    pairs = ", ".join(f"{y / x:.0f}" for x, y in zip(eng, base, strict=True))
    pairs_warm = ", ".join(f"{y / x:.0f}" for x, y in zip(eng_w, warm, strict=True))
    res = {"engine_core_fraction": e, "recompute_core_fraction": b, "ratio": ratio,
           "engine_warm_core_fraction": ew, "recompute_warm_core_fraction": bw, "ratio_warm": ratio_warm,
           "hop_s": hop,
           "latency_p50_s": p50, "latency_p99_s": p99, "detect_p50_s": d50, "detect_p99_s": d99, "replay_x": speed}
    report(
        "engine: 8 kHz, 3 axes, 4 motors, 2048-point windows, 87.5 % overlap, 6 modes (one core)",
        [
            (f"engine + detectors, CPU s per stream s (median of {len(eng)})", f"{e:.2%} of a core"),
            ("baseline: scipy spectrogram of the last 2 s at 20 Hz", f"{b:.1%} of a core"
             + ("" if pinned else " (allocator not pinned: not glibc)")),
            ("ratio baseline / engine (median of the pairs)", f"{ratio:.0f}x (pairs {pairs})"),
            ("warm allocator (64 MiB thresholds): engine / baseline", f"{ew:.2%} / {bw:.1%} of a core"),
            ("ratio, both warm", f"{ratio_warm:.0f}x (pairs {pairs_warm})"),
            ("latency: one hop", f"{hop * 1000:.0f} ms"),
            ("latency: frame ready after arrival, p50 / p99", f"{p50 * 1000:.1f} / {p99 * 1000:.1f} ms"),
            ("latency: worst sample, hop + p99", f"{(hop + p99) * 1000:.0f} ms (target hop + 20 ms)"),
            ("latency: detectors' verdict after arrival, p50 / p99", f"{d50 * 1000:.0f} / {d99 * 1000:.0f} ms"),
            (f"replay of {2 if quick else 10} min at 8 kHz ({mb:.0f} MB capture), median of 3",
             f"{speed:.0f}x real time"),
        ],
    )
    return res


if __name__ == "__main__":
    main()
