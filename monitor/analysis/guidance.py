"""Filter and operating guidance from a sweep's modes and bands, in plain words.

Phase costs are those of standard digital filters at the gyro rate, evaluated with
``scipy.signal.freqz`` at a reference frequency: a second-order Butterworth low-pass
(``scipy.signal.butter``) and a second-order notch (``scipy.signal.iirnotch``, Q = centre /
-3 dB width). The reference is 50 Hz, a typical attitude-loop crossover for small multirotors
(common practice, recalled rather than sourced); every extra degree of lag there erodes the
loop's phase margin.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

REFERENCE_HZ = 50.0
STRONG_DB = 6.0  #: a mode or band this far over its surroundings counts as significant
WITHIN_DB = 20.0  #: bands more than this under the loudest one are not worth avoiding
GROUP_FRACTION = 0.15  #: modes closer than this share one notch


def phase_lag_deg(b: np.ndarray, a: np.ndarray, fs_hz: float, f_hz: float = REFERENCE_HZ) -> float:
    """Phase lag (degrees, positive = lag) of the digital filter (b, a) at ``f_hz``."""
    _, h = signal.freqz(b, a, worN=[f_hz], fs=fs_hz)
    return float(-np.degrees(np.angle(h[0])))


def notch_groups(modes: list, fraction: float = GROUP_FRACTION) -> list[tuple[float, float, list]]:
    """(centre Hz, -3 dB width Hz, modes) of notches that would cover the given modes: modes whose
    frequencies are within ``fraction`` of each other share one notch wide enough for both."""
    groups: list[list] = []
    for m in sorted(modes, key=lambda m: m.freq_hz):
        if groups and m.freq_hz <= groups[-1][0].freq_hz * (1 + fraction):
            groups[-1].append(m)
        else:
            groups.append([m])
    out = []
    for g in groups:
        lo = min(m.freq_hz * (1 - max(m.damping_ratio or 0.03, 0.03)) for m in g)
        hi = max(m.freq_hz * (1 + max(m.damping_ratio or 0.03, 0.03)) for m in g)
        out.append(((lo + hi) / 2, hi - lo, g))
    return out


def notch_covers(centre_hz: float, width_hz: float, mode) -> bool:
    """A notch covers a mode when the mode's half-power band f (1 -+ zeta) lies inside the notch's
    -3 dB band centre -+ width / 2 (zeta 3 % where the damping is unknown; common practice)."""
    z = mode.damping_ratio or 0.03
    return centre_hz - width_hz / 2 <= mode.freq_hz * (1 - z) and mode.freq_hz * (1 + z) <= centre_hz + width_hz / 2


def notch_check(centre_hz: float, width_hz: float, modes: list, fs_hz: float) -> str:
    """What a given notch (centre, -3 dB width, Hz) addresses among ``modes`` and what it costs."""
    b, a = signal.iirnotch(centre_hz, centre_hz / width_hz, fs=fs_hz)
    cost = phase_lag_deg(b, a, fs_hz)
    strong = [m for m in modes if m.prominence_db >= STRONG_DB]
    hit = [m for m in modes if notch_covers(centre_hz, width_hz, m)]
    missed = [m for m in strong if m not in hit]
    said = f"A notch at {centre_hz:g} Hz, {width_hz:g} Hz wide, "
    covered = ", ".join(f"{m.freq_hz:.0f} Hz" for m in hit)
    said += f"covers the mode(s) at {covered}" if hit else "covers no mode found"
    if missed:
        said += "; it leaves the strong mode(s) at " + ", ".join(f"{m.freq_hz:.0f} Hz" for m in missed)
    return said + f"; it costs about {cost:.1f} degrees of phase at {REFERENCE_HZ:.0f} Hz."


def guidance(modes: list, bands: list, fs_hz: float, notches: list[tuple[float, float]] = ()) -> list[str]:
    """Sentences a person can act on: the lowest strong mode, the notches that address the
    strong fixed modes and their phase cost, the RPM bands to keep steady throttle out of, and
    for each given notch (centre, width Hz) what it addresses."""
    out: list[str] = [notch_check(c, w, modes, fs_hz) for c, w in notches]
    strong = [m for m in modes if m.prominence_db >= STRONG_DB]
    if not modes:
        return out + ["No frame mode stood out in this sweep: no filter is needed for frame resonances."]
    if strong:
        low = min(strong, key=lambda m: m.freq_hz)
        cut = 0.8 * low.freq_hz
        b, a = signal.butter(2, cut, fs=fs_hz)
        out.append(f"The lowest mode with a strong response is {low.freq_hz:.0f} Hz ({low.axis}). A low-pass filter "
                   f"meant to remove it would sit near {cut:.0f} Hz and cost about {phase_lag_deg(b, a, fs_hz):.0f} "
                   f"degrees of phase at {REFERENCE_HZ:.0f} Hz (second-order).")
        for centre, width, g in notch_groups(strong):
            q = centre / max(width, 1e-6)
            b, a = signal.iirnotch(centre, q, fs=fs_hz)
            names = ", ".join(f"{m.freq_hz:.0f} Hz" for m in g)
            out.append(f"A fixed notch centred at {centre:.0f} Hz, {width:.0f} Hz wide, addresses the mode(s) at "
                       f"{names}; it costs about {phase_lag_deg(b, a, fs_hz):.1f} degrees of phase at "
                       f"{REFERENCE_HZ:.0f} Hz.")
    else:
        out.append("No mode rises 6 dB over its surroundings: the frame's resonances are weak in this sweep.")
    loudest = max((b.peak_db for b in bands if b.observed), default=0.0)
    avoid = [b for b in bands if b.observed and b.over_trend_db >= STRONG_DB and b.peak_db >= loudest - WITHIN_DB]
    if avoid:
        spans = []
        for b in sorted(avoid, key=lambda b: b.rpm_low)[:8]:
            thr = ""
            if b.throttle_low is not None and b.throttle_high is not None:
                thr = f", throttle {100 * b.throttle_low:.0f}-{100 * b.throttle_high:.0f} %"
            spans.append(f"{b.rpm_low:.0f}-{b.rpm_high:.0f} RPM ({b.order_name} on {b.mode_hz:.0f} Hz{thr})")
        out.append("Keep steady throttle (hover, cruise) out of: " + "; ".join(spans) + ".")
    return out
