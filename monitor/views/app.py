"""The live screen: spectra, waterfall, motors, modes, events and status, over a LiveRun.

Layout and key map are spinrig's own. Keys: space freeze, p peak hold, [ ] window length,
o overlap, left/right (shift: x10) cursor, m mark the cursor peak as a mode, c capture on/off,
r/t/y toggle roll/pitch/yaw, k tap (simulated devices), ? help, q quit.
"""

from __future__ import annotations

import textwrap
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
STATE_MARK = {"clear": "  ok    ", "nearing": ">> near ", "crossing": "!! CROSS"}
STATE_MARK_SHORT = {"clear": "ok", "nearing": ">>", "crossing": "!!"}  #: narrow columns: symbol only

HELP = """spinrig keys

space        freeze / resume (data keeps flowing)
p            peak hold on / off
[  ]         shorter / longer spectrum window
o            next overlap: 50, 75, 87.5 %
left right   move the cursor (shift: 10 columns)
m            mark the cursor peak as a frame mode
             (saved to the profile file)
c            start / stop a capture
r  t  y      show / hide roll, pitch, yaw
k            tap the frame (simulated devices)
?            this help
q            quit

any key closes this box"""

#: right-hand column width by terminal width: a share of it, within these bounds (columns)
SIDE_SHARE, SIDE_MIN, SIDE_MAX = 0.36, 30, 78


def layout_for(width: int, height: int) -> dict:
    """Sizes (in cells) for a terminal of ``width`` x ``height``: the side column, the waterfall
    rows and the rows kept for the frame-mode panel, so that every panel keeps what matters."""
    side = int(min(SIDE_MAX, max(SIDE_MIN, round(width * SIDE_SHARE))))
    if height < 30:
        wf = 4
    elif height < 44:
        wf = max(6, height // 5)
    else:
        wf = height // 4
    return {"side": side, "waterfall": wf, "modes_max": max(6, height // 2), "compact": height < 32}


def wrap(text: str, width: int, indent: int = 3) -> list[str]:
    """``text`` in lines of at most ``width`` cells, broken between words (never inside one)."""
    if width <= indent + 4 or len(text) <= width:
        return [text]
    return textwrap.wrap(text, width, subsequent_indent=" " * indent, break_long_words=False,
                         break_on_hyphens=False) or [text]


def _short_order(name: str) -> str:
    return "2bp" if name.startswith("2x blade") else "bp" if name.startswith("blade") else name


def _event_line(e: CrossingEvent, width: int = 200) -> list[str]:
    """One (mode, order) group's change in the side column's width: when (stream s), what, which
    mode, which motors and order, where, and how strong (dB over the mode's floor). The longest
    form that fits; the shortest keeps time, state, mode frequency, order, RPM and level; if even
    that is too wide it is wrapped between words."""
    word = {"crossing": "CROSS", "nearing": "NEAR", "clear": "clear"}[e.state]
    who = e.motor_list(("crossing",) if e.state == "crossing" else ("crossing", "nearing"))
    k = _short_order(e.order_name)
    forms = [
        f"{e.t_s:6.1f} s {word:5s} {e.mode} ({e.mode_hz:.0f} Hz) {who} {k} at {e.order_hz:.0f} Hz, "
        f"{e.rpm:.0f} rpm, {e.over_floor_db:+.0f} dB over floor",
        f"{e.t_s:6.1f} {word:5s} {e.mode} {who} {k} {e.order_hz:.0f} Hz {e.rpm:.0f} rpm "
        f"{e.over_floor_db:+.0f} dB/floor",
        f"{e.t_s:6.1f} s {word:5s} {e.mode_hz:.0f} Hz {who} {k} at {e.rpm:.0f} rpm, "
        f"{e.over_floor_db:+.0f} dB over floor",
        f"{e.t_s:6.1f} {word:5s} {e.mode_hz:.0f} Hz {who} {k} {e.rpm:.0f} rpm {e.over_floor_db:+.0f} dB/floor",
        f"{e.t_s:.1f} {word} {e.mode_hz:.0f}Hz {who} {k} {e.rpm:.0f}rpm {e.over_floor_db:+.0f}dB",
    ]
    for f in forms:
        if len(f) <= width:
            return [f]
    return wrap(forms[-1], width)


class HelpScreen(ModalScreen):
    DEFAULT_CSS = """
    HelpScreen { align: center middle; }
    HelpScreen { background: #17150f 0%; }
    #help { width: auto; max-width: 100%; height: auto; max-height: 100%; border: round #d9a54a;
            padding: 0 1; background: #25211a; color: #e2dacb; }
    """

    def compose(self) -> ComposeResult:
        yield Static(HELP, id="help")

    def on_key(self, event) -> None:
        event.stop()
        self.app.pop_screen()


class SummaryScreen(ModalScreen):
    """The end of a timed run (the demo): the bands to avoid and the stray peaks, until a key."""

    DEFAULT_CSS = """
    SummaryScreen { align: center middle; background: #17150f 0%; }
    #summary { width: auto; max-width: 100%; height: auto; max-height: 100%; border: round #d9a54a;
               padding: 0 1; background: #25211a; color: #e2dacb; }
    """

    def __init__(self, text: str):
        super().__init__()
        self.text = text

    def compose(self) -> ComposeResult:
        yield Static(self.text, id="summary", markup=False)

    def on_key(self, event) -> None:
        event.stop()
        self.app.exit(0)


class SpinrigApp(App):
    TITLE = "spinrig"
    CSS = """
    Screen { background: #17150f; }
    #caution { height: 1; background: #5a3a00; }
    #main { height: 1fr; }
    #left { width: 2fr; }
    #right { width: 30; }
    #spec_title, #wf_title { height: 1; }
    #spectrum { height: 1fr; min-height: 8; }
    #waterfall { height: 4; }
    #motors { height: auto; max-height: 10; border-top: solid #433b2f; }
    #modes { height: auto; max-height: 16; border-top: solid #433b2f; }
    #events { height: 1fr; border-top: solid #433b2f; border-title-color: #aa9e8a; border-title-align: left; }
    #status { height: 1; background: #25211a; }
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
                yield TextPanel(["motor speeds"], id="motors")
                yield TextPanel(["frame modes"], id="modes")
                log = EventLog(id="events")
                log.border_title = "events: stream s, dB over the mode's floor"
                yield log
        yield TextPanel([""], STATUS_STYLE, auto_height=False, id="status")

    def on_mount(self) -> None:
        if self._start:
            try:
                self.live.start()
            except Exception as exc:  # noqa: BLE001 - the screen shows it and stays up
                self.note(f"cannot start: {exc}")
        self.set_interval(1.0 / self.fps, self.tick)
        if self.duration:
            self.set_timer(self.duration, self.action_end_run)

    # ---------------------------------------------------------------- drawing

    def _caution_text(self) -> str:
        return CAUTION if self.size.width == 0 or self.size.width >= len(CAUTION) else CAUTION_SHORT

    def on_resize(self, event) -> None:
        self.query_one("#caution", TextPanel).set_lines([self._caution_text()])
        lay = layout_for(self.size.width, self.size.height)
        self.query_one("#right").styles.width = lay["side"]
        self.query_one("#waterfall").styles.height = lay["waterfall"]
        self.query_one("#modes").styles.max_height = lay["modes_max"]
        long_title = "events: stream s, dB over the mode's floor"
        fits = lay["side"] >= len(long_title) + 4
        self.query_one("#events").border_title = long_title if fits else "events (s, dB/floor)"
        self._panels(self.live.snapshot())

    def _side_width(self) -> int:
        w = self.query_one("#events").size.width
        return w if w > 0 else layout_for(self.size.width, self.size.height)["side"]

    def note(self, text: str) -> None:
        """A message in the event log, stamped with stream time like the events (s)."""
        self.messages.append(text)
        t = self.live.snapshot().t_s
        log = self.query_one("#events", EventLog)
        for line in wrap(f"{t:6.1f} {text}", self._side_width(), indent=7):
            log.write(line)

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
        width = self._side_width()
        for e in new[-50:]:
            if isinstance(e, CrossingEvent):
                lines, style = _event_line(e, width), STATE_STYLES.get(e.state, BASE)
            else:
                lines = wrap(e.text(), width, indent=7)
                style = STRAY_STYLE if getattr(e, "freq_hz", None) is not None else BASE
            for line in lines:
                log.write(line, style)
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
        width = self._side_width()
        est = " (estimated)" if snap.rpm_estimated else ""
        shown = "frozen" if self.live.frozen_snapshot is not None else "peak hold" if spec.use_peak else "live"
        title = (f"spectrum {shown} | window {cfg.window_s * 1000:.0f} ms, overlap {cfg.overlap * 100:.1f} % | "
                 f"{spec.readout}")
        left_w = self.query_one("#spec_title").size.width
        cur = " ".join(spec.readout.replace("cursor", "").split())
        for t in (title, f"{shown} | {cfg.window_s * 1000:.0f} ms, {cfg.overlap * 100:.1f} % | {spec.readout}",
                  f"{shown} {cfg.window_s * 1000:.0f} ms {cfg.overlap * 100:.0f} % | cursor {cur}",
                  f"{shown} | cursor {cur}"):
            if not left_w or len(t) <= left_w:
                title = t
                break
        self._set("#spec_title", title)
        lines = [f"motor speeds{est}"]
        for m in range(snap.rpm.shape[0]):
            rpm = snap.rpm[m]
            f1 = snap.order_hz[m, 0] if snap.order_hz.size else np.nan
            tel = "telem" if (snap.telemetry.size and snap.telemetry[m]) else ("est" if snap.rpm_estimated else "none")
            thr = snap.throttle[m] * 100 if snap.throttle.size and np.isfinite(snap.throttle[m]) else float("nan")
            full = f" M{m + 1} {rpm:6.0f} rpm {thr:4.0f}% 1x {f1:5.1f} Hz {tel}"
            lines.append(full if len(full) <= width else f" M{m + 1} {rpm:5.0f}rpm {thr:3.0f}% 1x {f1:4.0f}Hz")
        self._set("#motors", lines)
        # on a short terminal the nearest order and its band are shown for modes that are not clear
        # only, and two bands, so the event log keeps some rows
        compact = 0 < self.size.height < 32
        mlines: list = ["frame modes (watch band in rpm)" if width >= 34 else "frame modes"]
        for st in snap.mode_states:
            mark = STATE_MARK[st["state"]] if width >= 36 else STATE_MARK_SHORT[st["state"]]
            head = f" {st['freq_hz']:.0f} Hz {st['mode']}"
            room = width - len(mark) - 1
            lead = " " if width >= 36 else ""
            room -= len(lead) - 1
            parts = wrap(head, room, indent=4)
            mlines.append([(lead, BASE), (mark, STATE_STYLES[st["state"]]), (parts[0], BASE)])
            mlines += [" " * (len(lead) + len(mark)) + x for x in parts[1:]]
            if (compact and st["state"] == "clear") or "order" not in st:
                continue
            lo, hi = st["watch_rpm"]
            who = "M" + ",".join(str(m) for m in st["motors"])
            k = _short_order(st["order_name"])
            lead = "" if st["state"] != "clear" else "nearest "
            detail = f"     {lead}{who} {k} {st['order_hz']:5.0f} Hz, watch {lo:.0f}-{hi:.0f} rpm"
            if len(detail) > width:
                detail = f"   {who} {k} {st['order_hz']:.0f}Hz {lo:.0f}-{hi:.0f}"
            mlines += wrap(detail, width, indent=5)
        if not snap.mode_states:
            mlines += wrap(" no profile: stray peaks only", width)
        for b in snap.bands[: 1 if compact else 4]:
            lo, hi = b["observed_rpm"]
            mlines += wrap(f"  seen {b['mode_hz']:.0f} Hz {_short_order(b['order_name'])} {lo:.0f}-{hi:.0f} rpm", width)
        self._set("#modes", mlines)
        s = self.live.status()
        cap = f" | capture {s.capture} {s.capture_bytes / 1e6:.1f} MB" if s.capture else ""
        link = "" if s.connected else " | LINK DOWN"
        frozen = " | FROZEN" if s.frozen else ""
        status = (f"{s.source} | {s.rate_hz:.0f} Hz | {s.frames_per_s:4.1f} spectra/s | CRC {s.crc_errors} | "
                  f"gaps {s.gaps} ({s.samples_lost} lost) | reconnects {s.reconnects}{cap}{link}{frozen} | ? help")
        sw = self.size.width
        if sw and len(status) > sw:
            status = (f"{s.rate_hz:.0f} Hz | {s.frames_per_s:4.1f} spectra/s | CRC {s.crc_errors} | gaps {s.gaps} | "
                      f"recon {s.reconnects}{cap}{link}{frozen} | ? help")
        self._set("#status", status)

    # ---------------------------------------------------------------- actions

    def action_quit_run(self) -> None:
        self.live.stop()
        self.exit(0)

    def summary_text(self) -> str:
        from ..headless import bands_table

        eng = self.live.engine
        lines = [f"run ended after {self.live.snapshot().t_s:.0f} s of stream: {eng.frames} spectra", ""]
        lines += bands_table([b.as_dict() for b in eng.bands()])
        strays = eng.stray_peaks()
        if strays:
            lines += ["", "stray peaks (not in the profile):"]
            lines += [f"  {p.freq_hz:.1f} Hz on {p.axis}, {p.over_floor_db:+.1f} dB over the floor" for p in strays]
        lines += ["", "any key quits"]
        return "\n".join(lines)

    def action_end_run(self) -> None:
        """A timed run is over: stop it (motors too) and keep its summary up until a key."""
        self.live.stop()
        self.tick(force=True)
        self.push_screen(SummaryScreen(self.summary_text()))

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
