"""Orders, the crossing watch, stray peaks and the RPM estimate."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import firmware_protocol as fp
from monitor.assembler import Assembler
from monitor.crossing import CrossingWatch
from monitor.engine import Engine, EngineConfig
from monitor.orders import order_amplitudes, order_freqs
from monitor.profile import Mode, Profile, ProfileError, load_profile, parse_profile
from simulators.device import DeviceOptions
from simulators.faults import FaultPlan
from simulators.scenario import load_scenario
from simulators.stream import SimStream, StreamOptions

PROFILES = __import__("pathlib").Path(__file__).resolve().parents[1] / "monitor" / "profiles"


def test_order_frequencies_follow_campbell_lines():
    # Campbell diagram order lines f = k n / 60; blade-pass = blades x RPM / 60
    f = order_freqs(np.array([[6000.0, 12000.0]]), blades=3)
    assert f[0, 0].tolist() == [100.0, 200.0, 300.0, 600.0]
    assert f[0, 1].tolist() == [200.0, 400.0, 600.0, 1200.0]


def test_order_amplitude_reads_a_known_tone():
    bins = np.arange(1025) * (8000 / 2048)
    amp = np.zeros((1, 1025, 3))
    k = int(round(100.0 / bins[1]))
    amp[0, k, 1] = 4.0
    rss, axis = order_amplitudes(amp, order_freqs(np.array([[6000.0]]), 3), bins[1])
    assert rss[0, 0, 0] == pytest.approx(4.0) and axis[0, 0, 0] == 1


@given(st.integers(0, 2**32 - 1), st.integers(1, 3), st.integers(1, 2))
def test_order_amplitudes_equal_the_definition(seed, frames, search):
    # definition: per frame, motor, order and axis the largest sqrt(PSD) x factor within
    # +-search bins of the order's bin (clipped to the spectrum), root-sum-square over the axes
    rng = np.random.default_rng(seed)
    nb, bin_hz = 257, 4.0
    psd = rng.exponential(size=(frames, nb, 3))
    factor = rng.uniform(0.5, 2.0, size=nb)
    rpm = rng.uniform(0.0, 20_000.0, size=(frames, 2))
    rpm[0, 0] = np.nan
    freqs = order_freqs(rpm, 3)
    rss, axis = order_amplitudes(psd, freqs, bin_hz, search_bins=search, amp_factor=factor)
    amp = np.sqrt(psd) * factor[None, :, None]
    for f, m, k in np.ndindex(freqs.shape):
        b = int(np.rint(freqs[f, m, k] / bin_hz)) if np.isfinite(freqs[f, m, k]) else -1
        if b < 1 or b >= nb:
            assert np.isnan(rss[f, m, k]) and axis[f, m, k] == -1
            continue
        best = amp[f, max(0, b - search) : b + search + 1].max(axis=0)
        assert rss[f, m, k] == pytest.approx(np.sqrt(np.sum(best**2)), rel=1e-12)
        assert axis[f, m, k] == int(np.argmax(best))


def test_band_in_rpm_is_60_f_1_pm_zeta_over_k():
    m = Mode("arm", 120.0, 0.05)
    lo, hi = m.rpm_band(2.0)
    assert lo == pytest.approx(60 * 120 * 0.95 / 2) and hi == pytest.approx(60 * 120 * 1.05 / 2)
    assert m.half_power_bw_hz == pytest.approx(12.0)


def _sweep(watch, rpm_of_t, t_end, hop=0.032, bins=1025):
    """Frames every ``hop`` s of a flat spectrum; both motors at rpm_of_t, the slope by difference."""
    events = []
    psd = np.full((1, bins), 1e-4)
    for t in np.arange(0.0, t_end, hop):
        now = rpm_of_t(t)
        slope = (now - rpm_of_t(t - 0.25)) / 0.25
        events += watch.update(np.array([t]), psd, np.array([[now, now]]), np.array([[slope, slope]]),
                               np.array([[1.0, 1.0]]))
    return events


def test_no_event_when_no_order_comes_near_a_mode():
    profile = Profile("test", 2, "bungee", (Mode("plate", 450.0, 0.03, "roll"),))
    freqs = np.arange(1025) * (8000 / 2048)
    watch = CrossingWatch(profile, 2, freqs, 0.032)
    # 1x 83..97 Hz, 2x and blade-pass (2 blades) 167..193, 4x 333..387: all outside 10 % of 450 Hz,
    # and at 80 RPM/s the 4x order would need far more than the 0.8 s lookahead to reach the band
    ev = _sweep(watch, lambda t: 5000 + 80 * t, 10.0)
    assert ev == []


def _sim_engine(name, profile, seconds, telemetry=True, seed=2, script=True, overlap=0.875, detect_every_s=0.1):
    sc = load_scenario(name)
    if not telemetry:
        sc = replace(sc, motors=replace(sc.motors, telemetry=False))
    stream = SimStream(sc, DeviceOptions(stream_at_boot=True, seed=seed, script=script), FaultPlan(),
                       StreamOptions(realtime=False))
    dec, asm = fp.StreamDecoder(merge=True), Assembler()
    eng = Engine(EngineConfig(overlap=overlap, detect_every_s=detect_every_s), profile)
    events, truth = [], []
    while stream.time_s < seconds:
        events += eng.feed(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
        truth.append((stream.time_s, stream.device.physics.motors.rpm.mean()))
    return eng, events, np.array(truth)


def test_simulated_sweep_crosses_the_front_arm_flap_inside_its_band():
    profile = load_profile(PROFILES / "quillback7.toml")
    eng, events, _ = _sim_engine("quillback7", profile, 24.0)
    hits = [e for e in events if getattr(e, "state", "") == "crossing" and e.mode == "arm flap, front pair"
            and e.order == 1.0]
    assert hits, "the 1x order of the sweep must cross the 118 Hz mode"
    for h in hits:  # inside the watch band it prints: f_n (1 -+ zeta) +- (df / 2 + 0.5 % f_n)
        assert h.watch_rpm[0] <= h.rpm <= h.watch_rpm[1]
        w = 118.0 * 0.03 + 0.5 * 8000 / 2048 + 0.005 * 118.0
        assert h.watch_rpm == pytest.approx((60 * (118.0 - w), 60 * (118.0 + w)))
    bands = {(b.mode, b.order) for b in eng.bands()}
    assert ("arm flap, front pair", 1.0) in bands and ("frame torsion", 1.0) in bands


def test_rpm_from_the_spectrum_within_one_percent_without_telemetry():
    profile = load_profile(PROFILES / "quillback7.toml")
    sc = load_scenario("quillback7")
    stream = SimStream(replace(sc, motors=replace(sc.motors, telemetry=False)),
                       DeviceOptions(stream_at_boot=True, seed=4), FaultPlan(), StreamOptions(realtime=False))
    dec, asm, eng = fp.StreamDecoder(merge=True), Assembler(), Engine(EngineConfig(), profile)
    errors = []
    while stream.time_s < 30.0:
        eng.feed(asm.feed(dec.feed(stream.produce_chunk()), host_s=stream.time_s))
        true = float(stream.device.physics.motors.rpm.mean())
        snap = eng.snapshot()
        if stream.time_s > 9.0 and snap.rpm.size and np.all(np.isfinite(snap.rpm)):
            assert snap.rpm_estimated
            errors.append(abs(snap.rpm[0] - true) / true)
    assert len(errors) > 100 and np.median(errors) < 0.01 and np.percentile(errors, 90) < 0.02


@pytest.mark.parametrize(
    ("data", "match"),
    [
        ({"modes": [{"freq_hz": 100, "damping_ratio": 0.9}]}, r"modes\[0\]\.damping_ratio: 0.9 is outside"),
        ({"modes": [{"damping_ratio": 0.1}]}, r"modes\[0\]\.freq_hz: missing"),
        ({"modes": [{"freq_hz": 100}]}, r"modes\[0\]\.damping_ratio: missing"),
        ({"modes": [{"freq_hz": 100, "damping_ratio": 0.1, "axis": "up"}]}, r"modes\[0\]\.axis: 'up'"),
        ({"airframe": {"blades": 0}}, r"airframe\.blades: 0 must be"),
        ({"airframe": {"colour": 1}}, r"airframe\.colour: unknown field"),
        ({"modes": [{"freq_hz": 100, "damping_ratio": 0.1, "half_power_bw_hz": 5}]}, "not both"),
    ],
)
def test_profile_errors_name_the_field(data, match):
    with pytest.raises(ProfileError, match=match):
        parse_profile(data, "p.toml")


def test_profile_round_trip_and_bandwidth_form(tmp_path):
    p = parse_profile({"airframe": {"name": 'Pipit "3"', "blades": 4},
                       "modes": [{"name": "duct", "freq_hz": 300, "half_power_bw_hz": 18, "axis": "yaw"}]})
    assert p.modes[0].damping_ratio == pytest.approx(0.03)
    f = tmp_path / "p.toml"
    p.with_mode(Mode("new", 150.0, 0.02, "roll")).save(f)
    back = load_profile(f)
    assert [m.name for m in back.modes] == ["new", "duct"] and back.airframe == 'Pipit "3"' and back.blades == 4


toml_values = st.one_of(st.integers(-5, 1000), st.floats(allow_nan=True), st.text(max_size=6), st.booleans(),
                        st.lists(st.integers(), max_size=3))


@given(st.dictionaries(st.sampled_from(["name", "freq_hz", "damping_ratio", "half_power_bw_hz", "axis", "x"]),
                       toml_values, max_size=5), st.dictionaries(st.sampled_from(["name", "blades", "mounting"]),
                                                                  toml_values, max_size=3))
def test_any_profile_loads_or_fails_in_one_line(mode, air):
    try:
        p = parse_profile({"airframe": air, "modes": [mode]}, "f.toml")
    except ProfileError as exc:
        assert str(exc).startswith("f.toml: ") and "\n" not in str(exc)
    else:
        assert p.modes[0].freq_hz > 0 and 0 < p.modes[0].damping_ratio <= 0.5


@given(st.integers(0, 2**32 - 1), st.integers(1, 6), st.floats(-3.0, 3.0))
def test_local_peaks_equal_scipy_find_peaks(seed, distance, offset):
    # reference: scipy.signal.find_peaks(x, height=h, distance=d) on data without flat tops
    from scipy.signal import find_peaks

    from monitor.stray import local_peaks

    rng = np.random.default_rng(seed)
    x = np.cumsum(rng.normal(size=300)) + rng.normal(size=300) * 2.0  # many peaks, no ties
    h = np.convolve(x, np.ones(15) / 15, mode="same") + offset
    ref, _ = find_peaks(x, height=h, distance=distance)
    assert local_peaks(x, h, distance).tolist() == ref.tolist()


@given(st.integers(0, 2**32 - 1))
def test_crossing_watch_in_batches_equals_frame_by_frame(seed):
    # the watch skips runs of frames in which nothing can rise; fed in random batches (with
    # frames of unknown RPM among them) it must give exactly the events and bands of one frame a call
    rng = np.random.default_rng(seed)
    profile = Profile("t", 2, "bungee", (Mode("arm", 150.0, 0.03), Mode("plate", 260.0, 0.05)))
    freqs = np.arange(513) * 4.0
    n = 240
    t = np.arange(n) * 0.032
    rpm = 6000.0 + 2500.0 * np.sin(t / 2.5)[:, None] + rng.normal(0, 30, (n, 2))
    rpm[rng.random(n) < 0.05] = np.nan
    slope = 1000.0 * np.cos(t / 2.5)[:, None] + rng.normal(0, 40, (n, 2))
    se = rng.uniform(1.0, 30.0, (n, 2))
    rms = rng.uniform(0.0, 200.0, (n, 2))
    est = rng.random(n) < 0.1
    psd = rng.exponential(1e-4, (n, 513)) * (1 + 300 * np.exp(-((freqs - 150.0) / 6.0) ** 2))

    def run(cuts):
        w = CrossingWatch(profile, 2, freqs, 0.032)
        ev, k = [], 0
        for c in cuts:
            sl = slice(k, k + c)
            ev += w.update(t[sl], psd[sl], rpm[sl], slope[sl], se[sl], est[sl], rms[sl])
            k += c
        return [e.as_dict() for e in ev], [b.as_dict() for b in w.all_bands()]

    cuts = []
    while sum(cuts) < n:
        cuts.append(int(min(rng.integers(1, 12), n - sum(cuts))))
    one = run([1] * n)
    assert one[0] and run(cuts) == one


def test_stray_search_over_many_frames_equals_one_at_a_time():
    # update_many computes the dB levels of all frames in one call
    from monitor.stray import StrayPeakFinder

    rng = np.random.default_rng(5)
    freqs = np.arange(1025) * 3.90625
    profile = Profile("t", 2, "bungee", (Mode("arm", 150.0, 0.03),))
    t = np.arange(40) * 0.2
    rpm = np.stack([6000.0 + 375.0 * t, 6010.0 + 375.0 * t], axis=1)
    psd = rng.exponential(1e-4, (40, 1025, 3))
    psd[:, 13, 1] += 0.05  # a still peak near 50.8 Hz (below every order) while the motors speed up
    one = StrayPeakFinder(profile, freqs)
    a = [p.as_dict() for i in range(40) for p in one.update(float(t[i]), psd[i], rpm[i])]
    many = StrayPeakFinder(profile, freqs)
    b = [p.as_dict() for k in range(0, 40, 7) for p in many.update_many(t[k : k + 7], psd[k : k + 7], rpm[k : k + 7])]
    assert a and a == b and abs(a[0]["freq_hz"] - 50.8) < 2.0


def test_speed_estimate_reads_orders_one_bin_either_side_and_needs_two():
    # harmonic sum (Noll 1969): each order counts the best bin within +-1 of k x f0; one order
    # alone is no motor (ORDER_EVIDENCE_DB at two orders at least)
    from monitor.rpm_estimate import RpmEstimator

    freqs = np.arange(0, 2001.0, 2.0)
    est = RpmEstimator(freqs, blades=3)

    def spectrum(lines):
        p = np.ones(freqs.size)
        for f_hz, db in lines:
            p[int(round(f_hz / 2.0))] = 10 ** (db / 10)
        return p

    # 1x one bin low, 2x one bin high, both 20 dB up: f0 = 100 Hz, 6000 RPM
    got = est.estimate(spectrum([(98.0, 20.0), (202.0, 20.0)]))
    assert got == pytest.approx(6000.0, rel=0.03)
    assert np.isnan(est.estimate(spectrum([(100.0, 20.0)])))  # one line: not a motor
    assert np.isnan(est.estimate(np.ones(freqs.size)))  # nothing: no estimate
    # two orders just under the evidence needed: no estimate
    assert np.isnan(est.estimate(spectrum([(100.0, 5.0), (200.0, 5.0)])))
