"""One sweep for a screen: link, session, engine and bench controller behind a few calls, with the
consumer in a worker thread. Headless: the sweep screen renders :meth:`SweepRun.view`; tests drive
it without a terminal. ``spinrig sweep`` without a screen uses the same pieces (:func:`open_parts`).
"""

from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import asdict, dataclass

import numpy as np

from .. import __version__
from ..capture import CaptureWriter
from ..engine import Engine, EngineConfig
from ..link import Link
from ..profile import Profile
from ..session import Session
from .controller import BenchController
from .plan import Plan

HISTORY_S = 60.0  #: RPM against time kept for the screen, s


@dataclass
class Parts:
    plan: Plan
    engine: Engine
    capture: CaptureWriter
    link: Link
    session: Session
    controller: BenchController


def open_parts(port: str, plan: Plan, profile: Profile, capture_path: str, baud: int = 921_600,
               config: EngineConfig | None = None, conditions: dict | None = None) -> Parts:
    """Capture, link (started), session and controller for one sweep. Raises OSError (the capture),
    serial.SerialException or ValueError (the port)."""
    engine = Engine(config or EngineConfig(), profile)
    meta = {"format": "spinrec 2", "start_time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "port": port, "baud": baud, "spinrig_version": __version__, "conditions": conditions or {},
            "profile": profile.to_toml() if profile.modes else None, "sweep_plan": plan.name}
    capture = CaptureWriter(capture_path, meta)
    link = Link(port, baud, capture=capture)
    try:
        link.start()
    except BaseException:
        capture.close()
        raise
    session = Session(engine, link)
    return Parts(plan, engine, capture, link, session, BenchController(link, plan))


def close_parts(p: Parts) -> None:
    p.controller.abort("the run was closed")
    p.controller.join(timeout=10.0)
    p.link.close()
    p.session.drain()
    p.capture.close({"link": asdict(p.link.health)})


class SweepRun:
    def __init__(self, parts: Parts):
        self.parts = parts
        self.ctl = parts.controller
        self.messages: deque[str] = deque(maxlen=50)
        self.history: deque[tuple[float, float]] = deque(maxlen=int(HISTORY_S * 10))
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._pump, name="spinrig-sweep", daemon=True)
        self._thread.start()
        self.closed = False

    def _pump(self) -> None:
        last = 0.0
        while not self._stop.is_set():
            events = self.parts.session.pump(timeout=0.05)
            if events:
                self.ctl.observe_events(events)
                for e in events:
                    if hasattr(e, "text"):
                        self.messages.append(e.text())
            now = time.monotonic()
            if now - last >= 0.1 and self.ctl.progress.rpm.size:
                last = now
                self.history.append((now, float(np.mean(self.ctl.progress.rpm))))

    # ---------------------------------------------------------------- actions

    def wait_device(self, timeout_s: float = 5.0):
        return self.ctl.wait_device(timeout_s)

    def plan_lines(self) -> list[str]:
        info = self.ctl.info
        return self.parts.plan.describe(info.motor_count) if info else ["waiting for the device to describe itself"]

    def check(self) -> None:
        """The plan against the device and the device alive (PlanError, BenchError)."""
        self.ctl.check()

    def start(self) -> None:
        """Arm and run (BenchError when the device does not arm)."""
        self.ctl.start()

    def abort(self, why: str) -> None:
        self.ctl.abort(why)

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        close_parts(self.parts)  # stops first when still spinning
        self._stop.set()
        self._thread.join(timeout=2.0)

    # ---------------------------------------------------------------- reading

    def view(self) -> dict:
        p = self.ctl.progress
        return {"state": p.state, "t_s": p.t_s, "duration_s": p.duration_s, "commanded": p.commanded.copy(),
                "rpm": p.rpm.copy(), "max_commanded": p.max_commanded, "history": list(self.history),
                "report": self.ctl.report.text() if self.ctl.report else None,
                "acknowledged": self.ctl.report.acknowledged if self.ctl.report else None,
                "messages": list(self.messages)}
