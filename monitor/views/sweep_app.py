"""The sweep screen: a thin view over :class:`monitor.bench.run.SweepRun`.

Top to bottom: the bench cautions, the plan with its limits, the confirmation (type SPIN and
Enter: nothing is armed before), where the plan stands (a progress bar and the time), each motor's
set-point and speed, mean RPM against time (a sparkline of the last minute), the controller's
messages, and the abort line, always on screen. Abort keys: ``a``, ``space``, ``Esc`` and
``Ctrl-C`` (the last two take priority over any focused widget); ``q`` quits (stopping first).
"""

from __future__ import annotations

from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.widgets import Input, ProgressBar, Sparkline

from ..bench.command import CONFIRM_WORD
from ..bench.controller import BenchError
from ..bench.plan import PlanError
from ..bench.run import SweepRun
from .app import CAUTION, CAUTION_SHORT
from .widgets import CAUTION_STYLE, STATUS_STYLE, TITLE_STYLE, TextPanel

ABORT_LINE = "ABORT: press a, space or Esc at any time: every motor stops at once"


class SweepApp(App):
    TITLE = "spinrig sweep"
    CSS = """
    Screen { background: #17150f; }
    #caution { height: 1; background: #5a3a00; }
    #plan { height: auto; max-height: 12; }
    #confirm { height: 3; }
    #where { height: 1; }
    #bar { height: 1; }
    #motors { height: auto; max-height: 9; }
    #rpm_title { height: 1; }
    #rpm { height: 4; }
    #log { height: 1fr; }
    #abort { height: 1; background: #7a1010; dock: bottom; }
    """
    BINDINGS = [
        Binding("escape", "abort", "abort", priority=True),
        Binding("ctrl+c", "abort", "abort", show=False, priority=True),
        Binding("a", "abort", "abort"),
        Binding("space", "abort", "abort", show=False),
        Binding("q", "quit_run", "quit"),
    ]

    def __init__(self, run: SweepRun, fps: float = 10.0):
        super().__init__(ansi_color=True)
        self.run_ = run
        self.fps = fps
        self.notes: list[str] = []
        self.started = False

    def compose(self) -> ComposeResult:
        yield TextPanel([CAUTION], CAUTION_STYLE, auto_height=False, id="caution")
        yield TextPanel(self.run_.plan_lines(), id="plan")
        yield Input(placeholder=f"type {CONFIRM_WORD} and press Enter to arm the device and start", id="confirm")
        yield TextPanel(["not armed"], TITLE_STYLE, auto_height=False, id="where")
        yield ProgressBar(total=1.0, show_eta=False, id="bar")
        yield TextPanel(["motors"], id="motors")
        yield TextPanel(["mean RPM, the last minute"], TITLE_STYLE, auto_height=False, id="rpm_title")
        yield Sparkline([0.0], id="rpm")
        yield TextPanel([""], id="log")
        yield TextPanel([ABORT_LINE], STATUS_STYLE, auto_height=False, id="abort")

    def on_mount(self) -> None:
        if self.size.width and self.size.width < len(CAUTION):
            self.query_one("#caution", TextPanel).set_lines([CAUTION_SHORT])
        self.query_one("#confirm", Input).focus()
        self.set_interval(1.0 / self.fps, self.tick)

    # ---------------------------------------------------------------- actions

    def on_input_submitted(self, event: Input.Submitted) -> None:
        if self.started:
            return
        if event.value.strip() != CONFIRM_WORD:
            self.note(f"not confirmed ({event.value.strip()!r} is not {CONFIRM_WORD}): nothing armed")
            event.input.value = ""
            return
        try:
            self.run_.check()
            self.run_.start()
        except (PlanError, BenchError) as exc:
            self.note(f"{exc}")
            return
        self.started = True
        event.input.disabled = True
        event.input.value = f"confirmed: {CONFIRM_WORD}"
        self.set_focus(None)
        self.note("armed: the plan runs")

    def action_abort(self) -> None:
        if self.run_.ctl.progress.state in ("running", "arming"):
            self.run_.abort("the abort key")
            self.note("abort key: stopping every motor")
        elif not self.started:
            self.note("nothing is armed")

    def action_quit_run(self) -> None:
        self.run_.close()  # stops first when still spinning
        self.exit(0 if (self.run_.ctl.report is None or self.run_.ctl.report.acknowledged) else 1)

    def on_unmount(self) -> None:
        self.run_.close()

    def note(self, text: str) -> None:
        self.notes.append(text)
        self.tick()

    # ---------------------------------------------------------------- drawing

    def tick(self) -> None:
        v = self.run_.view()
        where = self.query_one("#where", TextPanel)
        if v["state"] in ("running", "stopping", "stopped") and v["duration_s"]:
            where.set_lines([f"{v['state']}: {v['t_s']:.1f} of {v['duration_s']:.1f} s, highest set-point "
                             f"{v['max_commanded']:.1f} %"])
            self.query_one("#bar", ProgressBar).update(total=v["duration_s"], progress=min(v["t_s"], v["duration_s"]))
        elif v["state"] == "idle":
            self.query_one("#plan", TextPanel).set_lines(self.run_.plan_lines())
        motors = [f"M{i + 1}  set-point {c:5.1f} %   {r:7.0f} RPM"
                  for i, (c, r) in enumerate(zip(v["commanded"], v["rpm"], strict=False))]
        self.query_one("#motors", TextPanel).set_lines(motors or ["motors: no reading yet"])
        hist = [r for _, r in v["history"]]
        if hist:
            self.query_one("#rpm", Sparkline).data = hist
        lines = self.notes[-3:] + v["messages"][-3:]
        if v["report"]:
            lines = [v["report"]] + lines
        self.query_one("#log", TextPanel).set_lines(lines or [""])

    def text_of(self, wid: str) -> str:
        """A panel's text (tests)."""
        return self.query_one(wid, TextPanel).text
