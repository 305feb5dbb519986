"""The live screen: spectra, waterfall, motors, modes, events and status, over a LiveRun.

Layout and key map are spinrig's own. Keys: space freeze, p peak hold, [ ] window length,
o overlap, left/right (shift: x10) cursor, m mark the cursor peak as a mode, c capture on/off,
r/t/y toggle roll/pitch/yaw, k tap (simulated devices), ? help, q quit.
"""

from __future__ import annotations

import time

import numpy as np
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Static

from ..crossing import CrossingEvent
from ..live import LiveRun
from ..orders import ORDER_NAMES
from .widgets import (
    AXES,
    BASE,
    CAUTION_STYLE,
    STATE_STYLES,
    STATUS_STYLE,
    STRAY_STYLE,
    TITLE_STYLE,
    EventLog,
    SpectrumView,
    TextPanel,
    WaterfallView,
)

CAUTION = ("CAUTION  props off or frame clamped | eye protection | clear of the prop arc | "
           "current-limited supply | kill switch in reach")
#: the same cautions for a narrow terminal (80 columns)
CAUTION_SHORT = "CAUTION props off/clamped | eyes | clear of arc | current limit | kill switch"
#: the waterfall repaints at 4 Hz (the spectra at the screen rate): a 160x48 heat map costs the
#: terminal far more escape codes than the spectra do
WATERFALL_PERIOD_S = 0.25
#: text panels (motors, modes, status) are rewritten at most 5 times a second: they are read by a
#: person, and every rewrite re-lays the side column out
PANEL_PERIOD_S = 0.2
ORDER_SHORT = ("1x", "2x", "bp", "2bp")
STATE_MARK = {"clear": "  ok ", "nearing": ">> near", "crossing": "!! CROSS"}

HELP = """spinrig live screen keys

  space    freeze / resume the display (data keeps flowing)
  p        peak hold on / off
  [ ]      shorter / longer spectrum window
  o        next overlap (50, 75, 87.5 %)
  < >      move the frequency cursor (shift: ten columns)
  m        mark the cursor peak as a mode and save it to the profile
  c        start / stop a capture (live ports)
  r t y    show / hide roll, pitch, yaw
  k        tap the frame (simulated devices only)
  ?        this help          q  quit (motors are stopped)

press any key to close"""


def _short_order(name: str) -> str:
    return "2bp" if name.startswith("2x blade") else "bp" if name.startswith("blade") else name


def _event_line(e: CrossingEvent) -> str:
    """One (mode, order) group's change as one line in the side column's width: what, which mode,
    which motors and order, where, and how strong (dB over the mode's floor)."""
    word = {"crossing": "CROSS", "nearing": "NEAR", "clear": "clear"}[e.state]
    who = e.motor_list(("crossing",) if e.state == "crossing" else ("crossing", "nearing"))
    return (f"{e.t_s:6.1f} {word:5s} {e.mode} {who} {_short_order(e.order_name)} {e.order_hz:.0f} Hz "
            f"({e.mode_hz:.0f}) {e.rpm:.0f} rpm {e.over_floor_db:+.0f} dB")


class HelpScreen(ModalScreen):
    DEFAULT_CSS = """
    HelpScreen { align: center middle; }
    #help { width: 64; height: auto; border: round #5fb3ff; padding: 1 2; background: #0d1117; }
    """

    def compose(self) -> ComposeResult:
        yield Static(HELP, id="help")

    def on_key(self, event) -> None:
        event.stop()
        self.app.pop_screen()


class SpinrigApp(App):
    CSS = """
    Screen { background: #0d1117; }
    #caution { height: 1; background: #5a3a00; }
    #main { height: 1fr; }
    #left { width: 2fr; }
    #right { width: 1fr; min-width: 28; }
    #spec_title, #wf_title { height: 1; }
    #spectrum { height: 1fr; min-height: 8; }
    #waterfall { height: 1fr; min-height: 5; }
    #motors { height: auto; max-height: 10; border-top: solid #30363d; }
    #modes { height: auto; max-height: 16; border-top: solid #30363d; }
    #events { height: 1fr; border-top: solid #30363d; }
    #status { height: 1; background: #161b22; }
    """
    BINDINGS = [
        Binding("q", "quit_run", "quit"),
        Binding("ctrl+c", "quit_run", "quit", show=False, priority=True),
        Binding("space", "freeze", "freeze"),
        Binding("p", "peak", "peak hold"),
        Binding("left_square_bracket", "window(-1)", "shorter window"),
        Binding("right_square_bracket", "window(1)", "longer window"),
        Binding("o", "overlap", "overlap"),
        Binding("left", "cursor(-1)", "cursor", show=False),
        Binding("right", "cursor(1)", "cursor", show=False),
        Binding("shift+left", "cursor(-10)", show=False),
        Binding("shift+right", "cursor(10)", show=False),
        Binding("m", "mark", "mark mode"),
        Binding("c", "capture", "capture"),
        Binding("r", "axis(0)", show=False),
        Binding("t", "axis(1)", show=False),
        Binding("y", "axis(2)", show=False),
        Binding("k", "tap", show=False),
        Binding("question_mark", "help", "help"),
    ]

    def __init__(self, run: LiveRun, capture_path: str | None = None, fps: float = 20.0, start: bool = True,
                 duration: float | None = None, clock=None):
        super().__init__(ansi_color=True)
        self.live = run
        self.capture_path = capture_path
        self.fps = fps
        self._start = start
        self.duration = duration
        self.clock = clock or (lambda: time.strftime("%H:%M:%S"))  # tests fix it for snapshots
        self._wf_seen = 0
        self._events_seen = 0
        self._last_frames = -1
        self.messages: list[str] = []
        self._last_wf = 0.0
        self._last_panels = 0.0

    def compose(self) -> ComposeResult:
        yield TextPanel([self._caution_text()], CAUTION_STYLE, auto_height=False, id="caution")
        with Horizontal(id="main"):
            with Vertical(id="left"):
                yield TextPanel(["spectrum"], TITLE_STYLE, auto_height=False, id="spec_title")
                yield SpectrumView(id="spectrum")
                yield TextPanel(["waterfall (newest at the top)"], TITLE_STYLE, auto_height=False, id="wf_title")
                yield WaterfallView(id="waterfall")
            with Vertical(id="right"):
                yield TextPanel(["motors"], id="motors")
                yield TextPanel(["modes"], id="modes")
                yield EventLog(id="events")
        yield TextPanel([""], STATUS_STYLE, auto_height=False, id="status")

    def on_mount(self) -> None:
        if self._start:
            try:
                self.live.start()
            except Exception as exc:  # noqa: BLE001 - the screen shows it and stays up
                self.note(f"cannot start: {exc}")
        self.set_interval(1.0 / self.fps, self.tick)
        if self.duration:
            self.set_timer(self.duration, self.action_quit_run)

    # ---------------------------------------------------------------- drawing

    def _caution_text(self) -> str:
        return CAUTION if self.size.width == 0 or self.size.width >= len(CAUTION) else CAUTION_SHORT

    def on_resize(self, event) -> None:
        self.query_one("#caution", TextPanel).set_lines([self._caution_text()])

    def note(self, text: str) -> None:
        self.messages.append(text)
        self.query_one("#events", EventLog).write(f"{self.clock()} {text}")

    def tick(self, force: bool = False) -> None:
        """Draw the newest snapshot (the screen's timer calls this at ``fps``). The waterfall and the
        text panels are throttled to their own rates by the monotonic clock unless ``force``."""
        run = self.live
        snap = run.snapshot()
        spec = self.query_one(SpectrumView)
        wf = self.query_one(WaterfallView)
        if snap.frames != self._last_frames or run.frozen_snapshot is not None:
            self._last_frames = snap.frames
            spec.update_snapshot(snap, list(run.profile.modes))
            now = time.monotonic()
            if run.frozen_snapshot is None and (force or now - self._last_wf >= WATERFALL_PERIOD_S):
                self._last_wf = now
                rows, marks = run.engine.waterfall_rows(self._wf_seen)
                self._wf_seen = snap.waterfall_total
                wf.add_rows(rows, marks, snap.freqs)
        self._events()
        now = time.monotonic()
        if force or now - self._last_panels >= PANEL_PERIOD_S:
            self._last_panels = now
            self._panels(snap)

    def _events(self) -> None:
        log = self.query_one("#events", EventLog)
        evs = list(self.live.events)
        new = evs[self._events_seen - len(evs):] if self._events_seen > len(evs) else evs[self._events_seen:]
        self._events_seen = len(evs) if len(evs) < self.live.events.maxlen else self._events_seen
        for e in new[-50:]:
            if isinstance(e, CrossingEvent):
                log.write(_event_line(e), STATE_STYLES.get(e.state, BASE))
            else:
                log.write(e.text(), STRAY_STYLE if getattr(e, "freq_hz", None) is not None else BASE)
        if len(evs) >= self.live.events.maxlen:
            self.live.events.clear()
            self._events_seen = 0

    def _set(self, wid: str, text) -> None:
        """New lines for a panel (a string, or a list of lines); unchanged text costs nothing."""
        lines = text.split("\n") if isinstance(text, str) else text
        self.query_one(wid, TextPanel).set_lines(lines)

    def _panels(self, snap) -> None:
        spec = self.query_one(SpectrumView)
        cfg = self.live.engine.config
        est = " (estimated)" if snap.rpm_estimated else ""
        self._set(
            "#spec_title",
            f"spectrum {'peak hold' if spec.use_peak else 'live'} | window {cfg.window_s * 1000:.0f} ms, "
            f"overlap {cfg.overlap * 100:.1f} % | {spec.readout}"
        )
        lines = [f"motors{est}"]
        for m in range(snap.rpm.shape[0]):
            rpm = snap.rpm[m]
            f1 = snap.order_hz[m, 0] if snap.order_hz.size else np.nan
            tel = "telem" if (snap.telemetry.size and snap.telemetry[m]) else ("est" if snap.rpm_estimated else "none")
            thr = snap.throttle[m] * 100 if snap.throttle.size and np.isfinite(snap.throttle[m]) else float("nan")
            lines.append(f" M{m + 1} {rpm:6.0f} rpm {thr:4.0f}% 1x {f1:5.1f} Hz {tel}")
        self._set("#motors", "\n".join(lines))
        # on a short terminal (80x24) the nearest order and its band are shown for modes that are
        # not clear only, and two bands, so the event log keeps some rows
        compact = 0 < self.size.height < 32
        mlines: list = ["modes"]
        for st in snap.mode_states:
            mark = STATE_MARK[st["state"]]
            mlines.append([(" ", BASE), (f"{mark:8s}", STATE_STYLES[st["state"]]),
                           (f" {st['freq_hz']:6.1f} Hz {st['mode'][:18]}", BASE)])
            if (compact and st["state"] == "clear") or "order" not in st:
                continue
            lo, hi = st["watch_rpm"]
            who = "M" + ",".join(str(m) for m in st["motors"])
            k = _short_order(st["order_name"])
            if compact:  # fits 28 columns: motors, order, its frequency, the watch band in RPM
                mlines.append(f"   {who} {k} {st['order_hz']:4.0f}Hz {lo:.0f}-{hi:.0f}")
            else:
                lead = "" if st["state"] != "clear" else "nearest "
                mlines.append(f"     {lead}{who} {k} {st['order_hz']:5.0f} Hz, watch {lo:.0f}-{hi:.0f} rpm")
        if not snap.mode_states:
            mlines.append(" no profile: stray peaks only")
        for b in snap.bands[: 2 if compact else 4]:
            lo, hi = b["observed_rpm"]
            mlines.append(f"  seen {b['mode_hz']:.0f} Hz {_short_order(b['order_name'])} {lo:.0f}-{hi:.0f} rpm")
        self._set("#modes", mlines)
        s = self.live.status()
        cap = f" | capture {s.capture} {s.capture_bytes / 1e6:.1f} MB" if s.capture else ""
        link = "" if s.connected else " | LINK DOWN"
        frozen = " | FROZEN" if s.frozen else ""
        self._set(
            "#status",
            f"{s.source} | {s.rate_hz:.0f} Hz | {s.frames_per_s:4.1f} frames/s | CRC {s.crc_errors} | "
            f"gaps {s.gaps} ({s.samples_lost} lost) | reconnects {s.reconnects}{cap}{link}{frozen} | ? help"
        )

    # ---------------------------------------------------------------- actions

    def action_quit_run(self) -> None:
        self.live.stop()
        self.exit(0)

    def action_freeze(self) -> None:
        self.note("display frozen" if self.live.toggle_freeze() else "display resumed")

    def action_peak(self) -> None:
        spec = self.query_one(SpectrumView)
        spec.use_peak = not spec.use_peak
        if spec.use_peak:
            self.live.toggle_peak_hold()
        self.note(f"peak hold {'on' if spec.use_peak else 'off'}")

    def action_window(self, step: int) -> None:
        w = self.live.step_window(step)
        self.query_one(WaterfallView).clear()
        self._wf_seen = 0
        self.note(f"window {w * 1000:.0f} ms")

    def action_overlap(self) -> None:
        o = self.live.cycle_overlap()
        self.query_one(WaterfallView).clear()
        self._wf_seen = 0
        self.note(f"overlap {o * 100:.1f} %")

    def action_cursor(self, step: int) -> None:
        spec = self.query_one(SpectrumView)
        spec.cursor_col = int(np.clip(spec.cursor_col + step, 0, spec.plot_width() - 1))
        spec.update_snapshot(self.live.snapshot(), list(self.live.profile.modes))

    def action_mark(self) -> None:
        spec = self.query_one(SpectrumView)
        f = spec.cursor_frequency()
        if f is None:
            self.note("nothing to mark yet")
            return
        snap = self.live.snapshot()
        k = int(round(f / (snap.freqs[1] - snap.freqs[0])))
        axis = int(np.argmax(snap.psd[k])) if snap.psd is not None else 0
        self.note(self.live.mark_mode(f, axis))

    def action_capture(self) -> None:
        if self.live.link is not None and self.live.link.capture is not None:
            self.note(self.live.stop_capture() or "no capture")
            return
        path = self.capture_path or time.strftime("spinrig-%Y%m%d-%H%M%S.spinrec")
        self.note(self.live.start_capture(path))

    def action_axis(self, i: int) -> None:
        spec = self.query_one(SpectrumView)
        wf = self.query_one(WaterfallView)
        spec.axes_shown[i] = not spec.axes_shown[i]
        wf.axes_shown = list(spec.axes_shown)
        self.note(f"{AXES[i]} {'shown' if spec.axes_shown[i] else 'hidden'}")

    def action_tap(self) -> None:
        self.note(self.live.tap(0))

    def action_help(self) -> None:
        self.push_screen(HelpScreen())


__all__ = ["SpinrigApp", "ORDER_NAMES"]
