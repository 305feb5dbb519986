"""The tap test's report: each decay with the curve the identified modes give, the modes table,
as one self-contained HTML page plus PNGs and ``taps.json`` (the same layout as the sweep report).

The fitted curve of a decay is the sum of its identified modes, x(t) = Re sum_m r_m e^(s_m t),
s_m = -zeta w_n + i w_n sqrt(1 - zeta^2) and its conjugate, with the complex amplitudes r_m
solved by least squares (:func:`.pencil.residues`) on the same samples.
"""

from __future__ import annotations

import html
import json
from pathlib import Path

import numpy as np

from .pencil import residues
from .report import AXES, COLOURS, CSS, _fig_png, _table, embed, write_files


def fitted_curve(decay: np.ndarray, rate_hz: float, poles) -> np.ndarray:
    """(n, 3) the decay rebuilt from ``poles`` (their complex amplitudes fitted to it)."""
    if not poles:
        return np.zeros_like(decay)
    w = np.array([2 * np.pi * p.freq_hz for p in poles])
    z = np.array([p.damping_ratio for p in poles])
    s = -z * w + 1j * w * np.sqrt(np.maximum(1 - z * z, 0.0))
    s = np.concatenate([s, s.conj()])
    r = residues(decay, 1.0 / rate_hz, s)
    n = np.arange(decay.shape[0])[:, None]
    return np.real(np.exp(n / rate_hz * s[None, :]) @ r)


def _decay_plot(tap) -> bytes:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    d = tap.decay
    t = np.arange(d.shape[0]) / tap.rate_hz
    fit = fitted_curve(d, tap.rate_hz, tap.poles)
    fig, axes = plt.subplots(3, 1, figsize=(11, 5.5), sharex=True, layout="constrained")
    for i, ax in enumerate(axes):
        ax.plot(t * 1000, d[:, i], color=COLOURS[i], lw=0.9, label=f"{AXES[i]} measured")
        ax.plot(t * 1000, fit[:, i], color="#1d1b17", lw=0.8, ls="--", label="fitted modes")
        ax.set_ylabel("deg/s")
        ax.legend(loc="upper right", fontsize=8)
        ax.grid(alpha=0.3)
    axes[-1].set_xlabel("time after the tap, ms")
    axes[-1].set_xlim(0, min(t[-1] * 1000, 300.0))  # the ringing; the rest is the rigid-body wobble
    names = ", ".join(f"{p.freq_hz:.1f} Hz / {100 * p.damping_ratio:.1f} %" for p in tap.poles)
    axes[0].set_title(f"tap {tap.index}: {names or 'no mode'}", fontsize=10)
    return _fig_png(fig)


def write_tap_report(source: str, taps, modes, folder: str | Path) -> Path:
    images = {f"tap{t.index}.png": _decay_plot(t) for t in taps if t.usable and t.decay is not None}
    rows = [[f"{m.freq_hz:.2f}", f"{m.freq_sd_hz:.2f}", f"{100 * m.damping_ratio:.2f} %", f"{100 * m.damping_sd:.2f}",
             m.taps, m.axis, "/".join(f"{v:.2f}" for v in m.participation),
             "agrees" if m.half_power_agrees else "differs or unresolved"] for m in modes]
    tap_rows = [[t.index, f"{t.t_s:.2f}", "yes" if t.usable else f"no: {t.why}", len(t.poles)] for t in taps]
    plots = "".join(embed(images, f"tap{t.index}.png", f"tap {t.index} decay") for t in taps)
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>spinrig tap test: {html.escape(Path(source).name)}</title>
<meta name="viewport" content="width=device-width, initial-scale=1"><style>{CSS}</style></head>
<body><main>
<h1>spinrig tap test: {html.escape(Path(source).name)}</h1>
<div class="verdict"><p>{len(modes)} modes from {sum(t.usable for t in taps)} usable taps of {len(taps)}.</p></div>
<h2>Modes (mean over the taps that found each; sd: spread between taps)</h2>
{_table(rows, ["Hz", "sd Hz", "damping", "sd %", "taps", "main axis", "roll/pitch/yaw share", "half-power check"])
 if rows else "<p>no mode found in two or more taps</p>"}
<h2>Taps</h2>{_table(tap_rows, ["tap", "at s", "usable", "modes"])}
<h2>Decays and the fitted modes</h2>{plots}
<p class="small">Modes by the matrix pencil (Hua and Sarkar 1990) on each free decay; the dashed curve is the sum of
the identified modes with amplitudes fitted to the decay.</p>
</main></body></html>
"""
    files = dict(images)
    files["taps.json"] = (json.dumps({"source": source, "taps": [t.as_dict() for t in taps],
                                      "modes": [m.as_dict() for m in modes]}, indent=2) + "\n").encode()
    files["report.html"] = page.encode("utf-8")
    write_files(folder, files)
    return Path(folder) / "report.html"
