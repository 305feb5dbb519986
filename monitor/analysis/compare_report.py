"""The rebuild check's report: one self-contained HTML page with the verdict on top, both runs'
averaged spectra overlaid per axis, both Campbell maps side by side on one colour scale, and the
tables of modes, crossings, levels and imbalance; the plots as PNG and ``compare.json`` beside it
(written as :func:`monitor.analysis.report.write_files` does: no half file on a full disk)."""

from __future__ import annotations

import html
import json
from pathlib import Path

import numpy as np

from .report import AXES, COLOURS, CSS, _fig_png, _table, embed, write_files
from .summary import RunSummary

VERDICT_COLOUR = {"pass": "#2f7d6d", "warn": "#b08a1e", "fail": "#b5562f"}


def _fmax(base: RunSummary, cand: RunSummary) -> float:
    tops = [1.3 * m["freq_hz"] for s in (base, cand) for m in s.analysis.get("modes", [])]
    nyq = [0.8 * float(s.freqs[-1]) for s in (base, cand) if s.freqs.size]
    if not nyq:
        return 1000.0
    return min(min(nyq), max(tops, default=min(nyq)))


def plots(base: RunSummary, cand: RunSummary, comparison) -> dict[str, bytes]:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    out: dict[str, bytes] = {}
    fmax = _fmax(base, cand)
    if base.freqs.size and cand.freqs.size:
        fig, axes = plt.subplots(3, 1, figsize=(11, 7.5), layout="constrained", sharex=True)
        for i, ax in enumerate(axes):
            for s, style, who in ((base, "-", "baseline"), (cand, "--", "candidate")):
                sel = (s.freqs > 0) & (s.freqs <= fmax)
                ax.plot(s.freqs[sel], s.mean_db[sel, i], ls=style, lw=1.1, color=COLOURS[i] if who == "candidate"
                        else "#333", label=who)
            for p in comparison.pairs:
                ax.axvline(p["baseline_hz"], color="#333", lw=0.6, ls=":")
                ax.axvline(p["candidate_hz"], color=COLOURS[i], lw=0.6, ls=":")
            ax.set_ylabel(f"{AXES[i]}, dB")
            ax.grid(alpha=0.3)
            ax.legend(fontsize=8, loc="upper right")
        axes[0].set_title("Averaged spectra, baseline (solid) and candidate (dashed); dB re 1 (deg/s)²/Hz; "
                          "dotted: paired modes")
        axes[-1].set_xlabel("frequency, Hz")
        out["spectra.png"] = _fig_png(fig)
    if base.map_rpm.size >= 2 and cand.map_rpm.size >= 2:
        fig, axes = plt.subplots(1, 2, figsize=(11, 4.6), layout="constrained", sharey=True)
        totals = [10 * np.log10(np.maximum((10 ** (s.map_db.astype(float) / 10)).sum(axis=2), 1e-12))
                  for s in (base, cand)]
        top = max(np.percentile(t, 99.5) for t in totals)
        mesh = None
        for ax, s, t, who in zip(axes, (base, cand), totals, ("baseline", "candidate"), strict=True):
            sel = s.freqs <= fmax
            mesh = ax.pcolormesh(s.freqs[sel], s.map_rpm, t[:, sel], shading="nearest", cmap="magma",
                                 vmin=top - 50, vmax=top)
            blades = s.analysis.get("blades", 2)
            for k in sorted({1.0, 2.0, float(blades)}):
                ax.plot(k * s.map_rpm / 60.0, s.map_rpm, lw=0.7, ls="--", color="#e8e1d2", alpha=0.8)
            for m in s.analysis.get("modes", []):
                ax.axvline(m["freq_hz"], color="#7fd1c1", lw=0.8)
            ax.set_xlim(0, fmax)
            ax.set_xlabel("frequency, Hz")
            ax.set_title(f"{who}: {Path(s.source).name}", fontsize=9)
        axes[0].set_ylabel("motor speed, RPM")
        fig.colorbar(mesh, ax=axes, label="PSD, dB re 1 (deg/s)²/Hz (sum of axes)")
        out["campbell.png"] = _fig_png(fig)
    return out


def page(comparison, base_name: str, cand_name: str, images: dict[str, bytes]) -> str:
    d = comparison.as_dict()
    v = d["verdict"]
    findings = "".join(f'<li><b>{html.escape(f["severity"])}</b>: {html.escape(f["text"])}</li>'
                       for f in d["findings"] if f["severity"] != "note") or "<li>no change past a tolerance</li>"
    notes = [f["text"] for f in d["findings"] if f["severity"] == "note"] + d["notes"]
    note_html = "".join(f"<li>{html.escape(n)}</li>" for n in notes)

    def pct(x):
        return "-" if x is None else f"{100 * x:.1f} %"

    mode_rows = [[f"{p['baseline_hz']:.1f}", f"{p['candidate_hz']:.1f}", f"{p['shift_pct']:+.1f} %", p["axis"],
                  f"{pct(p['baseline_damping'])} -> {pct(p['candidate_damping'])}"] for p in d["modes"]]
    mode_rows += [[f"{m['freq_hz']:.1f}", "missing", "", m["axis"], ""] for m in d["missing_modes"]]
    mode_rows += [["new", f"{m['freq_hz']:.1f}", "", m["axis"], ""] for m in d["new_modes"]]
    cross_rows = [[f"{c['baseline_hz']:.0f} -> {c['candidate_hz']:.0f}", c["order_name"],
                   f"{c['candidate_rpm'][0]:.0f}-{c['candidate_rpm'][1]:.0f}", f"{c['baseline_db']:.1f}",
                   f"{c['candidate_db']:.1f}", f"{c['change_db']:+.1f}", "yes" if c["judged"] else "no"]
                  for c in d["crossings"]]
    level_rows = []
    for r in d["levels"]:
        span = (f"{100 * r['low']:.0f}-{100 * r['high']:.0f} %" if r["by"] == "throttle"
                else f"{r['low']:.0f}-{r['high']:.0f} RPM")
        level_rows.append([span, r["axis"], f"{r['baseline_rms_dps']:.3f}", f"{r['candidate_rms_dps']:.3f}",
                           f"{r['change_db']:+.1f}"])
    imb_rows = [[r["motor"], f"{r['baseline']:.4f}", f"{r['candidate']:.4f}", f"{r['growth']:.2f}x"]
                for r in d["imbalance"]]

    def table(rows, head):
        return _table(rows, head) if rows else "<p>none</p>"

    title = f"spinrig rebuild check: {html.escape(cand_name)} against {html.escape(base_name)}"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<meta name="viewport" content="width=device-width, initial-scale=1"><style>{CSS}
.big {{ font-size: 1.6em; font-weight: bold; color: {VERDICT_COLOUR[v]}; }}</style></head>
<body><main>
<h1>{title}</h1>
<div class="verdict" style="border-left-color: {VERDICT_COLOUR[v]}"><p class="big">{v.upper()}</p>
<ul>{findings}</ul></div>
{f'<ul class="small">{note_html}</ul>' if note_html else ''}
<h2>Spectra</h2>{embed(images, "spectra.png", "averaged spectra of both runs, per axis")}
<h2>Campbell maps</h2>{embed(images, "campbell.png", "Campbell maps of both runs side by side")}
<h2>Modes</h2>{table(mode_rows, ["baseline Hz", "candidate Hz", "shift", "axis", "damping"])}
<h2>Crossings</h2>{table(cross_rows, ["mode Hz", "order", "RPM", "baseline dB", "candidate dB", "change dB",
                                       "judged"])}
<h2>Vibration level per band (RMS, deg/s)</h2>{table(level_rows, ["band", "axis", "baseline", "candidate",
                                                                    "change dB"])}
<h2>Imbalance (1x per kRPM², deg/s)</h2>{table(imb_rows, ["motor", "baseline", "candidate", "growth"])}
<p class="small">Tolerances: {html.escape(json.dumps(d["tolerances"]))}. Bench safety: props off or the frame
clamped, eye protection, clear of the prop arc, a current-limited supply and a physical kill switch within reach.</p>
</main></body></html>
"""


def write_compare_report(comparison, base: RunSummary, cand: RunSummary, base_name: str, cand_name: str,
                         folder: str | Path) -> Path:
    """Write ``report.html``, the PNGs and ``compare.json`` into ``folder``."""
    images = plots(base, cand, comparison)
    files = dict(images)
    files["compare.json"] = (json.dumps({"baseline": base_name, "candidate": cand_name, **comparison.as_dict()},
                                        indent=2) + "\n").encode()
    files["report.html"] = page(comparison, base_name, cand_name, images).encode("utf-8")
    write_files(folder, files)
    return Path(folder) / "report.html"
