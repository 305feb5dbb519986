"""CSV input: the time base from all stamps, gaps, and one clear message for a change of rate."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.csv_input import CsvError, read_csv_items, sample_rate
from monitor.engine import Engine, EngineConfig

from .conftest import examples


def write_csv(path, t, gyro, rpm=None, decimals=6):
    cols = [np.round(t, decimals), gyro[:, 0], gyro[:, 1], gyro[:, 2]]
    head = "time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps"
    if rpm is not None:
        cols += [rpm[:, k] for k in range(rpm.shape[1])]
        head += "".join(f",rpm_{k + 1}" for k in range(rpm.shape[1]))
    np.savetxt(path, np.column_stack(cols), delimiter=",", header=head, comments="", fmt="%.6f")


@settings(max_examples=examples(30), deadline=None)
@given(st.floats(500.0, 8000.0), st.integers(2000, 40000), st.floats(0.0, 100.0))
def test_rate_from_microsecond_stamps_within_1e_4(fs, n, t0):
    # stamps rounded to the microsecond: the least-squares rate is within 1e-4 (the issue asks for
    # frequencies within 0.01 %); one rounded step alone would be off by up to 1e-6 s x fs
    t = np.round(t0 + np.arange(n) / fs, 6)
    rate, breaks = sample_rate(t)
    assert abs(rate - fs) / fs < 1e-4 and breaks.size == 0


def test_a_tone_in_a_csv_is_read_at_its_frequency(tmp_path):
    # 3200 Hz with microsecond stamps: one rounded step gives 3194.89 Hz (0.16 % low); the fit does
    # not. Reference: the tone's own frequency, read by the engine's interpolated peak
    fs, f0 = 3200.0, 187.3
    t = np.arange(int(fs * 4)) / fs
    g = np.zeros((t.size, 3), np.float32)
    g[:, 0] = 10 * np.sin(2 * np.pi * f0 * t)
    p = tmp_path / "tone.csv"
    write_csv(p, t, g)
    items = read_csv_items(p)
    info = items[0][0].info
    assert abs(info.sample_rate_hz - fs) / fs < 1e-4
    eng = Engine(EngineConfig(window_s=0.5))
    for chunk in items:
        eng.feed(chunk)
    eng.flush()
    from monitor.peaks import interpolate_bin

    snap = eng.snapshot()
    amp = np.sqrt(snap.psd[:, 0])
    k = int(np.argmax(amp))
    f = (k + float(interpolate_bin(amp, k))) * (snap.freqs[1] - snap.freqs[0])
    assert abs(f - f0) / f0 < 1e-4


def test_a_change_of_rate_is_one_message_naming_the_line(tmp_path):
    t = np.concatenate([np.arange(8000) / 8000.0, 1.0 + np.arange(1, 4000) / 4000.0])
    p = tmp_path / "two_rates.csv"
    write_csv(p, t, np.zeros((t.size, 3)))
    with pytest.raises(CsvError, match=r"two_rates.csv: line 8002: the sample rate changes from 8000 Hz to about "
                                        r"4000 Hz; spinrig needs one rate per file"):
        read_csv_items(p)


def test_gaps_are_gaps_not_a_change_of_rate(tmp_path):
    fs = 2000.0
    t = np.arange(10000) / fs
    t = np.concatenate([t[:3000], t[3050:7000], t[7400:]])
    rate, breaks = sample_rate(np.round(t, 6))
    assert breaks.tolist() == [3000, 6950] and abs(rate - fs) / fs < 1e-6


def test_a_drifting_clock_is_refused(tmp_path):
    fs = 1000.0
    i = np.arange(20000)
    t = i / fs + 0.2e-9 * i**2  # the period grows 20 % over the file
    with pytest.raises(CsvError, match=r"line \d+: time_s strays .* sample periods from a constant rate|"
                                       r"line \d+: the sample rate changes"):
        sample_rate(t, "drift.csv")


def test_a_gyro_only_file_is_watched_on_an_estimated_speed(tmp_path):
    """A log with gyro columns only (many rigs log no motor speed): one speed is estimated from the
    spectrum, flagged as estimated in every event, within 1 % (median) of the true mean speed once
    the motors run, and the crossings the telemetry run raised are raised (nearly) all."""
    from monitor.assembler import MotorUpdate, Samples
    from monitor.csv_input import read_csv_items
    from monitor.engine import Engine, EngineConfig
    from monitor.profile import load_profile
    from tests.conftest import judge_items, sim_items

    items = sim_items("quillback7", seed=6, seconds=40.0)
    t, g, mt, mr = [], [], [], []
    for chunk in items:
        for o in chunk:
            if isinstance(o, Samples) and o.valid is None:
                t.append(o.t0_s + np.arange(o.dps.shape[0]) / o.fs_hz)
                g.append(o.dps)
            elif isinstance(o, MotorUpdate):
                mt.append(o.t_s)
                mr.append(o.rpm.mean(axis=1))
    t, g, mt, mr = np.concatenate(t), np.concatenate(g), np.concatenate(mt), np.concatenate(mr)
    f = tmp_path / "gyro_only.csv"
    with open(f, "w") as out:
        out.write("time_s,gyro_roll_dps,gyro_pitch_dps,gyro_yaw_dps\n")
        np.savetxt(out, np.column_stack([t, g]), fmt=["%.6f", "%.4f", "%.4f", "%.4f"], delimiter=",")
    profile = load_profile("quillback7")
    eng = Engine(EngineConfig(), profile)
    events, errors = [], []
    for chunk in read_csv_items(f):
        events += eng.feed(chunk)
        snap = eng.snapshot()
        true = float(np.interp(snap.t_s, mt, mr))
        if snap.rpm.size and np.isfinite(snap.rpm[0]) and true > 3000:
            assert snap.rpm_estimated and snap.rpm.shape == (1,)
            errors.append(abs(snap.rpm[0] - true) / true)
    events += eng.flush()
    assert len(errors) > 50 and np.median(errors) < 0.01  # one reading per 4096-sample chunk
    crossings = [e for e in events if getattr(e, "state", None) == "crossing"]
    assert crossings and all(e.estimated for e in crossings)
    # the script sweeps slowly: no order steps over a band between frames; an estimate that leaps
    # between orders at spin-up must not pass for one (7 such crossings before MAX_STEP_FRACTION)
    assert not [e for e in crossings if "stepped over" in e.reason]
    _, told = judge_items(items, profile)
    want = {(e.mode_hz, e.order) for e in told if getattr(e, "state", None) == "crossing"}
    got = {(e.mode_hz, e.order) for e in crossings}
    assert len(want & got) >= 0.8 * len(want), (sorted(want - got), sorted(got - want))
