"""The screen at the four sizes people run it at: nothing cut, everything that matters visible.

A recorded stretch of the simulated Quillback 7 (four motors, six frame modes, its own throttle
script up to a crossing) is drawn at 80x24, 120x40, 160x48 and 220x60. In every text panel no
line is wider than the panel (a wider one would be cut, possibly mid-word); every frame mode's
full name, every motor and the newest event line are on the screen.
"""

from __future__ import annotations

import asyncio

import pytest

from monitor.engine import EngineConfig
from monitor.live import LiveRun
from monitor.profile import load_profile
from monitor.views.app import SpinrigApp, layout_for
from monitor.views.widgets import EventLog, TextPanel
from tests.conftest import sim_items

SIZES = [(80, 24), (120, 40), (160, 48), (220, 60)]
SECONDS = 26.0  #: the script is in the middle of its sweep here, with crossings in the log


class RecordedRun(LiveRun):
    """A LiveRun over a recorded (simulated, fast) stretch of a scenario: no port, no thread."""

    def __init__(self, scenario="quillback7", seconds=SECONDS):
        super().__init__(f"sim://{scenario}", load_profile(scenario), config=EngineConfig())
        for chunk in sim_items(scenario, seed=1, seconds=seconds):
            self.events.extend(self.engine.feed(chunk))
        self.events.extend(self.engine.flush())

    def start(self):
        pass

    def stop(self):
        pass

    def status(self):
        st = super().status()
        st.frames_per_s = 15.6
        return st


def recorded_app():
    return SpinrigApp(RecordedRun(), start=False, clock=lambda: "12:00:00")


async def _settle(pilot):
    pilot.app.tick(force=True)
    await pilot.pause()
    pilot.app.tick(force=True)  # panels drawn at their laid-out widths
    await pilot.pause()


def _lines(widget) -> list[str]:
    return widget.text.split("\n") if widget.text else []


@pytest.mark.parametrize("size", SIZES, ids=[f"{w}x{h}" for w, h in SIZES])
def test_every_panel_fits_and_shows_what_matters(size):
    async def go():
        app = recorded_app()
        async with app.run_test(size=size) as pilot:
            await _settle(pilot)
            run = app.live
            for panel in app.query(TextPanel):
                w = panel.size.width
                for line in _lines(panel):
                    assert len(line) <= w, f"{panel.id} at {size}: {line!r} is wider than {w}"
            log = app.query_one("#events", EventLog)
            lines = list(log.lines)
            assert lines and all(len(t) <= log.size.width for t, _ in lines), size
            assert len(str(log.border_title)) + 4 <= log.size.width  # its title is not cut either
            modes = app.query_one("#modes", TextPanel)
            text = " ".join(x.strip() for x in _lines(modes))
            for m in run.profile.modes:
                assert m.name in text, f"mode {m.name!r} not shown whole at {size}"
            assert len(_lines(modes)) <= modes.size.height, f"frame-mode lines hidden at {size}"
            motors = app.query_one("#motors", TextPanel)
            assert all(f"M{k}" in motors.text for k in range(1, 5)) and len(_lines(motors)) <= motors.size.height
            assert log.size.height >= 3, f"only {log.size.height} event rows at {size}"
            # the spectra get more rows than the waterfall, and the side column its share
            assert app.query_one("#spectrum").size.height > app.query_one("#waterfall").size.height
            assert app.query_one("#right").size.width == layout_for(*size)["side"]
            await pilot.press("q")

    asyncio.run(go())


@pytest.mark.parametrize("size", SIZES, ids=[f"{w}x{h}" for w, h in SIZES])
def test_screen_at_each_size_snapshot(snap_compare, size):
    assert snap_compare(recorded_app(), terminal_size=size, run_before=_settle)


def test_a_timed_run_ends_on_its_bands_until_a_key():
    async def go():
        app = recorded_app()
        async with app.run_test(size=(120, 40)) as pilot:
            await _settle(pilot)
            app.action_end_run()  # what the duration timer calls
            await pilot.pause()
            assert app.screen.__class__.__name__ == "SummaryScreen"
            text = app.screen.text
            bands = app.live.engine.bands()
            assert bands and "observed bands" in text and "any key quits" in text
            assert all(f"{b.mode} {b.mode_hz:.1f} Hz" in text for b in bands)
            await pilot.press("x")
        assert app.return_code == 0

    asyncio.run(go())


def test_help_lists_only_bound_keys_and_fits_an_80_column_terminal():
    from monitor.views.app import HELP

    async def go():
        app = recorded_app()
        async with app.run_test(size=(80, 24)) as pilot:
            await _settle(pilot)
            await pilot.press("question_mark")
            box = app.screen.query_one("#help")
            assert box.size.width <= 80 and box.size.height <= 24
            await pilot.press("x")
            assert app.screen.__class__.__name__ != "HelpScreen"
            await pilot.press("q")

    asyncio.run(go())
    keys = {b.key for b in SpinrigApp.BINDINGS}
    assert "<" not in HELP and ">" not in HELP and "left right" in HELP and {"left", "right", "k"} <= keys
    assert max(len(line) for line in HELP.splitlines()) <= 60  # inside the box at 80 columns
