"""The live screen, driven headless with Textual's Pilot over an engine fed by the test."""

from __future__ import annotations

import asyncio

import numpy as np
import pytest

import firmware_protocol as fp
from monitor.assembler import DeviceChange, MotorUpdate, Samples
from monitor.engine import EngineConfig
from monitor.live import LiveRun
from monitor.profile import Mode, Profile, load_profile
from monitor.views.app import SpinrigApp
from monitor.views.widgets import SpectrumView

FS = 8000.0
PROFILE = Profile("test frame", 2, "bungee", (Mode("arm flap", 150.0, 0.03, "pitch"),))


class FedRun(LiveRun):
    """A LiveRun whose engine the test feeds directly (no port, no thread)."""

    def __init__(self, profile=PROFILE, profile_path=None):
        super().__init__("test://fed", profile, profile_path=profile_path, config=EngineConfig(overlap=0.75))
        self.engine.feed([DeviceChange(fp.DeviceInfo(motor_count=2, motor_state_rate_hz=500), False)])
        self.t = 0.0
        self.index = 0
        self.stopped = False

    def start(self):
        pass

    def stop(self):
        self.stopped = True

    def feed(self, seconds: float, rpm_of_t, tone_hz=None, amp=20.0):
        n = int(seconds * FS)
        t = self.t + np.arange(n) / FS
        rpm = np.array([rpm_of_t(x) for x in t[::16]])
        f1 = np.interp(t, t[::16], rpm) / 60.0
        phase = 2 * np.pi * np.cumsum(f1) / FS
        x = np.zeros((n, 3), np.float32)
        x[:, 1] = amp * np.sin(phase) if tone_hz is None else amp * np.sin(2 * np.pi * tone_hz * t)
        x += np.random.default_rng(self.index).normal(0, 0.05, x.shape).astype(np.float32)
        mt = t[::16]
        mu = MotorUpdate(mt, np.stack([rpm, rpm], 1), np.full((mt.size, 2), 0.3), np.ones((mt.size, 2), bool))
        self.events.extend(self.engine.feed([mu, Samples(0, self.index, self.t, FS, x)]))
        self.events.extend(self.engine.flush())
        self.t += seconds
        self.index += n


async def settled(pilot):
    """Draw the newest snapshot now (what the screen's timer does) and let the app process it:
    no waiting on the wall clock."""
    pilot.app.tick(force=True)
    await pilot.pause()


def text(app, wid):
    return app.query_one(wid).text


@pytest.mark.parametrize("size", [(80, 24), (160, 48)])
def test_keys_change_what_they_should(size):
    async def go():
        run = FedRun()
        run.feed(2.0, lambda t: 6000.0)
        app = SpinrigApp(run, start=False)
        async with app.run_test(size=size) as pilot:
            await settled(pilot)
            spec = app.query_one(SpectrumView)
            await pilot.press("space")
            assert run.frozen_snapshot is not None
            await pilot.press("space")
            assert run.frozen_snapshot is None
            await pilot.press("p")
            assert spec.use_peak
            w0 = run.engine.config.window_s
            await pilot.press("right_square_bracket")
            assert run.engine.config.window_s > w0
            await pilot.press("left_square_bracket", "left_square_bracket")
            assert run.engine.config.window_s < w0
            o0 = run.engine.config.overlap
            await pilot.press("o")
            assert run.engine.config.overlap == {0.5: 0.75, 0.75: 0.875, 0.875: 0.5}[o0]  # the cycle
            c0 = spec.cursor_col
            await pilot.press("right", "shift+right")
            assert spec.cursor_col == c0 + 11
            await pilot.press("t")
            assert spec.axes_shown == [True, False, True]
            await pilot.press("question_mark")
            assert app.screen.__class__.__name__ == "HelpScreen"
            await pilot.press("x")
            assert app.screen.__class__.__name__ != "HelpScreen"
            assert "CAUTION" in text(app, "#caution") and "kill switch" in text(app, "#caution")
            await pilot.press("q")
        assert run.stopped and app.return_code == 0

    asyncio.run(go())


def test_mode_panel_shows_the_crossing_as_the_sweep_goes_through():
    async def go():
        run = FedRun()
        app = SpinrigApp(run, start=False)
        states = []
        async with app.run_test(size=(100, 30)) as pilot:
            for _ in range(40):  # 1x sweeps 100 -> 200 Hz through the 150 Hz mode
                run.feed(0.1, lambda t: 6000.0 + 1500.0 * t)
                await settled(pilot)
                states.append(text(app, "#modes"))
            await pilot.press("q")
        marks = [">> near" if ">> near" in s else "!! CROSS" if "!! CROSS" in s else "ok" for s in states]
        first_cross = marks.index("!! CROSS")
        assert marks[0] == "ok" and marks[-1] == "ok" and "ok" not in marks[first_cross : first_cross + 3]
        assert all(m != ">> near" for m in marks[first_cross:first_cross + 3])  # no step back while on the mode
        assert "seen 150 Hz 1x" in states[-1]

    asyncio.run(go())


def test_cursor_reads_the_frequency_of_a_known_tone():
    async def go():
        run = FedRun()
        run.feed(1.0, lambda t: 0.0, tone_hz=234.0)
        app = SpinrigApp(run, start=False)
        async with app.run_test(size=(120, 36)) as pilot:
            await settled(pilot)
            spec = app.query_one(SpectrumView)
            await pilot.press(*["shift+left"] * 10)
            assert spec.cursor_col == 0
            from monitor.views.scale import column_bins, column_of

            snap = run.snapshot()
            target = column_of(234.0, snap.freqs, column_bins(snap.freqs, spec.plot_width(), spec.fmax_hz))
            await pilot.press(*["right"] * target)
            assert spec.cursor_col == target
            assert abs(spec.cursor_frequency() - 234.0) <= run.engine.spec.bin_hz
            assert f"{spec.cursor_frequency():7.1f} Hz" in spec.readout
            assert "cursor" in spec.readout
            await pilot.press("q")

    asyncio.run(go())


def test_marking_a_mode_writes_a_valid_profile(tmp_path):
    async def go():
        path = tmp_path / "frame.toml"
        PROFILE.save(path)
        run = FedRun(profile_path=str(path))
        run.feed(1.0, lambda t: 0.0, tone_hz=300.0)
        app = SpinrigApp(run, start=False)
        async with app.run_test(size=(120, 36)) as pilot:
            await settled(pilot)
            spec = app.query_one(SpectrumView)
            await pilot.press(*["shift+left"] * 10)
            while spec.cursor_frequency() is not None and spec.cursor_frequency() < 299.0:
                await pilot.press("right")
            await pilot.press("m")
            await pilot.press("q")
        saved = load_profile(path)
        assert len(saved.modes) == 2 and any(abs(m.freq_hz - 300.0) < 8 for m in saved.modes)
        assert any("saved to" in m for m in app.messages)

    asyncio.run(go())


def test_a_slow_screen_loses_no_samples():
    # The screen only reads snapshots; the reader and engine never wait for it. A screen that
    # redraws slowly (fps 2) over a fast simulated stream leaves the link counters clean.
    async def go():
        run = LiveRun("sim://pipit3?fast=1&seed=2", PROFILE)
        app = SpinrigApp(run, fps=2.0)
        async with app.run_test(size=(80, 24)) as pilot:
            # wait (bounded, for a hang only) until the fast stream has delivered two seconds of data
            for _ in range(600):
                if run.session.assembler.stats.samples > 8000:
                    break
                await pilot.pause(0.05)
            await pilot.press("q")
        assert run.link.health.overruns == 0
        assert run.session.assembler.stats.samples_lost == 0
        assert run.session.assembler.stats.samples > 4000

    asyncio.run(go())


class FixedRun(FedRun):
    """Fixed data and a fixed status line, for pictures that do not change between runs."""

    def status(self):
        st = super().status()
        st.frames_per_s = 15.6
        return st


def _fixed_app():
    run = FixedRun()
    run.feed(3.0, lambda t: 6000.0 + 1500.0 * t)  # ends with the 1x order on the 150 Hz mode
    return SpinrigApp(run, start=False, clock=lambda: "12:00:00")


@pytest.mark.parametrize("size", [(80, 24), (160, 48)])
def test_main_screen_snapshot(snap_compare, size):
    async def settle(pilot):
        await settled(pilot)

    assert snap_compare(_fixed_app(), terminal_size=size, run_before=settle)


def test_event_log_gives_one_line_per_group_change_with_its_motors():
    async def go():
        run = FedRun()
        app = SpinrigApp(run, start=False)
        async with app.run_test(size=(160, 48)) as pilot:
            for _ in range(30):  # both motors sweep 1x through the 150 Hz mode together
                run.feed(0.1, lambda t: 6000.0 + 1500.0 * t)
                await settled(pilot)
            log = app.query_one("#events").text
            await pilot.press("q")
        crossings = [e for e in run.events if getattr(e, "state", None) == "crossing"]
        assert len(crossings) == 1  # one voice for the (mode, order) group, not one per motor
        assert {m.motor for m in crossings[0].motors if m.state == "crossing"} == {1, 2}
        lines = [x for x in log.splitlines() if "CROSS" in x]
        assert len(lines) == 1 and "M1,2 1x" in lines[0] and "arm flap" in lines[0]

    asyncio.run(go())
