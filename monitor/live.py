"""The live run behind the screen: link, session and engine in a worker thread, with the actions a
person at the bench takes (freeze, window length, capture, mark a mode, tap). Headless: the screen
calls these and renders :meth:`LiveRun.snapshot`; tests drive it without a terminal.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import firmware_protocol as fp

from . import __version__
from .capture import CaptureWriter
from .engine import Engine, EngineConfig, Snapshot
from .link import Link
from .profile import AXES, Mode, Profile
from .session import CaptureReplay, Session

WINDOWS_S = (0.064, 0.128, 0.256, 0.512, 1.024)
OVERLAPS = (0.5, 0.75, 0.875)


@dataclass
class LiveStatus:
    source: str
    rate_hz: float = 0.0
    frames_per_s: float = 0.0
    bytes: int = 0
    crc_errors: int = 0
    malformed: int = 0
    gaps: int = 0
    samples_lost: int = 0
    reconnects: int = 0
    overruns: int = 0
    capture: str | None = None
    capture_bytes: int = 0
    frozen: bool = False
    connected: bool = True


class LiveRun:
    """One run for the screen: a live port (``source`` a device path or URL) or a capture replay."""

    def __init__(self, source: str, profile: Profile, profile_path: str | None = None, baud: int = 921_600,
                 config: EngineConfig | None = None, replay: bool = False, replay_speed: float | None = 1.0,
                 conditions: dict | None = None):
        self.source = source
        self.profile = profile
        self.profile_path = profile_path
        self.baud = baud
        self.engine = Engine(config or EngineConfig(), profile)
        self.replay = replay
        self.replay_speed = replay_speed
        self.conditions = conditions or {}
        self.events: deque = deque(maxlen=500)
        self.link: Link | None = None
        self.session: Session | None = None
        self.frozen_snapshot: Snapshot | None = None
        self.error: str | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._frames_mark = (time.monotonic(), 0)
        self._fps = 0.0
        self.finished = False

    # ---------------------------------------------------------------- running

    def start(self) -> None:
        if self.replay:
            self._thread = threading.Thread(target=self._run_replay, name="spinrig-replay", daemon=True)
        else:
            self.link = Link(self.source, self.baud)
            self.link.start()
            self.session = Session(self.engine, self.link)
            self._thread = threading.Thread(target=self._run_live, name="spinrig-engine", daemon=True)
        self._thread.start()

    def _run_live(self) -> None:
        while not self._stop.is_set():
            for e in self.session.pump(timeout=0.05):
                self.events.append(e)

    def _run_replay(self) -> None:
        try:
            for events in CaptureReplay(self.source, self.engine, speed=self.replay_speed):
                self.events.extend(events)
                if self._stop.is_set():
                    return
        except Exception as exc:  # noqa: BLE001 - shown on the screen, not a crash
            self.error = str(exc)
        self.finished = True

    def stop(self) -> None:
        """Stop everything; motors this run armed are stopped by the link."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
        self.stop_capture()
        if self.link is not None:
            self.link.close()

    # ---------------------------------------------------------------- reading

    def snapshot(self) -> Snapshot:
        return self.frozen_snapshot or self.engine.snapshot()

    def status(self) -> LiveStatus:
        now = time.monotonic()
        t0, f0 = self._frames_mark
        if now - t0 >= 1.0:
            self._fps = (self.engine.frames - f0) / (now - t0)
            self._frames_mark = (now, self.engine.frames)
        st = LiveStatus(self.source, rate_hz=self.engine.spec.fs_hz if self.engine.spec else 0.0,
                        frames_per_s=self._fps, frozen=self.frozen_snapshot is not None)
        if self.link is not None:
            h = self.link.health
            st.bytes, st.crc_errors, st.malformed = h.bytes, h.crc_errors, h.malformed
            st.reconnects, st.overruns, st.connected = h.reconnects, h.overruns, h.connected
            cap = self.link.capture
            if cap is not None:
                st.capture, st.capture_bytes = str(cap.path), cap.bytes_written
        if self.session is not None:
            a = self.session.assembler.stats
            st.gaps, st.samples_lost = a.gaps, a.samples_lost
        return st

    # ---------------------------------------------------------------- actions

    def toggle_freeze(self) -> bool:
        self.frozen_snapshot = None if self.frozen_snapshot is not None else self.engine.snapshot()
        return self.frozen_snapshot is not None

    def toggle_peak_hold(self) -> None:
        self.engine.clear_peak_hold()

    def step_window(self, step: int) -> float:
        cfg = self.engine.config
        i = min(range(len(WINDOWS_S)), key=lambda k: abs(WINDOWS_S[k] - cfg.window_s))
        new = WINDOWS_S[max(0, min(len(WINDOWS_S) - 1, i + step))]
        self.engine.reconfigure(replace(cfg, window_s=new))
        return new

    def cycle_overlap(self) -> float:
        cfg = self.engine.config
        i = min(range(len(OVERLAPS)), key=lambda k: abs(OVERLAPS[k] - cfg.overlap))
        new = OVERLAPS[(i + 1) % len(OVERLAPS)]
        self.engine.reconfigure(replace(cfg, overlap=new))
        return new

    def start_capture(self, path: str | Path) -> str:
        if self.link is None:
            return "captures record a live port, not a replay"
        if self.link.capture is not None:
            return f"already capturing to {self.link.capture.path}"
        meta = {"format": "spinrec 2", "start_time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "port": self.source, "baud": self.baud, "spinrig_version": __version__,
                "conditions": self.conditions, "profile": self.profile.to_toml() if self.profile.modes else None}
        if self.engine.info is not None:
            meta["device"] = asdict(self.engine.info)
        try:
            self.link.capture = CaptureWriter(path, meta)
        except OSError as exc:
            return f"capture {path}: cannot create: {exc.strerror or exc}"
        return f"capturing to {path}"

    def stop_capture(self) -> str | None:
        if self.link is None or self.link.capture is None:
            return None
        cap, self.link.capture = self.link.capture, None
        cap.close({"link": asdict(self.link.health)})
        return f"capture {cap.path} closed: {cap.bytes_written} bytes"

    def mark_mode(self, freq_hz: float, axis: int, damping_ratio: float = 0.03) -> str:
        """Add a mode at ``freq_hz`` to the profile and save it to the profile file."""
        name = f"mode at {freq_hz:.0f} Hz (marked)"
        self.profile = self.profile.with_mode(Mode(name, float(freq_hz), damping_ratio, AXES[axis]))
        self.engine.set_profile(self.profile)
        if not self.profile_path:
            return f"marked {freq_hz:.1f} Hz (no profile file given: not saved; use --profile FILE)"
        try:
            self.profile.save(self.profile_path)
        except OSError as exc:
            return f"profile {self.profile_path}: cannot save: {exc.strerror or exc}"
        return f"marked {freq_hz:.1f} Hz on {AXES[axis]}, saved to {self.profile_path}"

    def tap(self, target: int = 0) -> str:
        if self.link is None or not self.link.send(fp.SimTap(target, 200)):
            return "tap: no link"
        return "tap sent (simulated devices only)"
