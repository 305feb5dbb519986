"""The report of an analysis: one self-contained HTML page (plots embedded as base64 PNG, no
script, no network; it prints on A4/Letter), the plots as PNG files and the JSON, in one folder.

Plots are drawn with matplotlib's Agg back end (no display needed): the Campbell map (RPM against
frequency, PSD in dB, order lines k n / 60 and the modes' bands), the per-axis averaged spectra,
every order's level against RPM, and the imbalance chart when there is one.
"""

from __future__ import annotations

import base64
import html
import io
import json
import os
from pathlib import Path

import numpy as np

COLOURS = ("#b5562f", "#2f7d6d", "#6b5aa6")  #: roll, pitch, yaw
AXES = ("roll", "pitch", "yaw")


MODE_COLUMNS = ["Hz", "+- Hz (standard error)", "damping", "main axis", "prominence dB"]


def _fig_png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def _plots(a) -> dict[str, bytes]:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    m = a.map
    out: dict[str, bytes] = {}
    top_order = max(k for k, _ in _orders(a))
    reach = [1.3 * md.freq_hz for md in a.modes]
    if m.rpm.size:
        reach.append(1.05 * top_order * float(m.rpm.max()) / 60)
    reach = max(reach, default=0.8 * float(m.freqs[-1]))
    fmax = min(0.8 * float(m.freqs[-1]), reach)
    if m.rpm.size >= 2:
        fig, ax = plt.subplots(figsize=(11, 5.2), layout="constrained")
        total = 10 * np.log10(np.maximum(m.psd.sum(axis=2), 1e-12))
        top = np.percentile(total, 99.5)
        sel = m.freqs <= fmax
        mesh = ax.pcolormesh(m.freqs[sel], m.rpm, total[:, sel], shading="nearest", cmap="magma",
                             vmin=top - 50, vmax=top)
        fig.colorbar(mesh, ax=ax, label="PSD, dB re 1 (deg/s)²/Hz (sum of axes)")
        for k, name in _orders(a):
            ax.plot(k * m.rpm / 60.0, m.rpm, lw=0.8, ls="--", color="#e8e1d2", alpha=0.8)
            if k * m.rpm[-1] / 60 < fmax:
                ax.annotate(name, (k * m.rpm[-1] / 60, m.rpm[-1]), color="#e8e1d2", fontsize=8,
                            xytext=(2, -10), textcoords="offset points")
        for md in a.modes:
            ax.axvline(md.freq_hz, color="#7fd1c1", lw=0.8)
        for b in a.bands:
            if b.observed:
                ax.plot([b.mode_hz, b.mode_hz], [b.rpm_low, b.rpm_high], color="#7fd1c1", lw=5, alpha=0.7,
                        solid_capstyle="butt")
        ax.set_xlim(0, fmax)
        ax.set_xlabel("frequency, Hz")
        ax.set_ylabel("motor speed, RPM" + (" (estimated)" if a.estimated else ""))
        ax.set_title("Campbell map: order lines dashed, modes as lines, excited bands as bars")
        out["campbell.png"] = _fig_png(fig)

        fig, ax = plt.subplots(figsize=(11, 4), layout="constrained")
        for k, name in _orders(a):
            f, cut = m.order_cut(k)
            ax.plot(m.rpm, 10 * np.log10(np.maximum(np.nansum(cut, axis=1), 1e-12)), label=name, lw=1.2)
        ax.set_xlabel("motor speed, RPM")
        ax.set_ylabel("order level, dB re 1 (deg/s)²/Hz")
        ax.set_title("Every order's level against speed (peaks: a mode crossed)")
        ax.legend(loc="upper left", fontsize=8)
        ax.grid(alpha=0.3)
        out["orders.png"] = _fig_png(fig)

    fig, ax = plt.subplots(figsize=(11, 4), layout="constrained")
    sel = (m.freqs > 0) & (m.freqs <= fmax)
    for i in range(3):
        ax.plot(m.freqs[sel], 10 * np.log10(np.maximum(m.mean_psd[sel, i], 1e-12)), color=COLOURS[i], lw=1,
                label=AXES[i])
    for md in a.modes:
        ax.axvline(md.freq_hz, color="#888", lw=0.7, ls=":")
    ax.set_xlabel("frequency, Hz")
    ax.set_ylabel("PSD, dB re 1 (deg/s)²/Hz")
    ax.set_title("Averaged spectrum per axis (all spinning frames); dotted: modes found")
    ax.legend(fontsize=8)
    ax.grid(alpha=0.3)
    out["spectra.png"] = _fig_png(fig)

    if a.imbalance.figures:
        fig, ax = plt.subplots(figsize=(7, 3.2), layout="constrained")
        rows = sorted(a.imbalance.figures, key=lambda r: r["motor"])
        ax.bar([f"motor {r['motor']}" for r in rows], [r["ratio"] for r in rows],
               color=["#b5562f" if r["flagged"] else "#6f8f86" for r in rows])
        ax.axhline(2.0, color="#b5562f", ls="--", lw=0.8)
        ax.axhline(1.0, color="#555", lw=0.6)
        ax.set_ylabel("1x per RPM², ratio to median")
        ax.set_title("Imbalance (dashed: flagged at 2x the median)")
        out["imbalance.png"] = _fig_png(fig)
    return out


def _orders(a):
    from .sweep import orders_followed

    return orders_followed(a.blades)


CSS = """
body { font-family: system-ui, sans-serif; color: #1d1b17; background: #faf8f3; margin: 0; }
main { max-width: 1180px; margin: 0 auto; padding: 16px 24px; }
h1 { font-size: 1.5em; margin: 0.2em 0; } h2 { font-size: 1.15em; border-bottom: 1px solid #d8d0c0; }
img { max-width: 100%; height: auto; display: block; margin: 8px 0; }
table { border-collapse: collapse; font-size: 0.9em; } td, th { padding: 3px 10px; border-bottom: 1px solid #e6dfd2; }
th { text-align: left; } .verdict { background: #efe8da; padding: 8px 14px; border-left: 4px solid #b5562f; }
.flag { color: #b5562f; font-weight: bold; } .small { color: #6d6556; font-size: 0.85em; }
@media print { body { background: white; } main { max-width: none; } img { break-inside: avoid; } }
"""


def _table(rows: list[list], head: list[str]) -> str:
    h = "".join(f"<th>{html.escape(x)}</th>" for x in head)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><tr>{h}</tr>{body}</table>"


def page(a, images: dict[str, bytes], extra_html: str = "") -> str:
    d = a.as_dict()
    cond = d["conditions"] or {}
    cond_rows = [[k, v] for k, v in sorted(cond.items())] + [
        ["source", d["source"]], ["gyro rate", f"{d['sample_rate_hz']:g} Hz"], ["duration", f"{d['duration_s']:.1f} s"],
        ["motors", d["motors"]], ["blades", d["blades"]],
        ["speeds", "estimated from the spectrum" if d["rpm_estimated"] else "motor telemetry"],
        ["swept", f"{d['rpm_swept'][0]}-{d['rpm_swept'][1]} RPM" if d["rpm_swept"] else "nothing swept"]]
    modes = [[f"{m['freq_hz']:.1f}", "-" if m.get("freq_sd_hz") is None else f"{m['freq_sd_hz']:.1f}",
              "-" if m["damping_ratio"] is None else f"{100 * m['damping_ratio']:.1f} %",
              m["axis"], f"{m['prominence_db']:.1f}"] for m in d["modes"]]
    bands = [[f"{b['mode_hz']:.0f}", b["order_name"], f"{b['rpm_low']:.0f}-{b['rpm_high']:.0f}",
              f"{b['predicted_low']:.0f}-{b['predicted_high']:.0f}", f"{b['peak_db']:.1f}",
              "yes" if b["observed"] else "no"] for b in d["bands"]]
    band_table = _table(bands, ["mode Hz", "order", "RPM seen", "RPM predicted", "peak dB", "seen"]) if bands else \
        "<p>none</p>"
    imb = d["imbalance"]
    imb_rows = [[r["motor"], f"{r['figure']:.4f}", f"{r['ratio']:.2f}", "out of balance" if r["flagged"] else ""]
                for r in imb["motors"]]

    def img(name, alt):
        return embed(images, name, alt)

    advice = "".join(f"<li>{html.escape(x)}</li>" for x in d["guidance"])
    notes = "".join(f"<li>{html.escape(x)}</li>" for x in d["notes"])
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>spinrig analysis: {html.escape(Path(d['source']).name)}</title>
<meta name="viewport" content="width=device-width, initial-scale=1"><style>{CSS}</style></head>
<body><main>
<h1>spinrig analysis: {html.escape(Path(d['source']).name)}</h1>
{extra_html}
<div class="verdict"><ul>{advice}</ul></div>
{f'<ul class="small">{notes}</ul>' if notes else ''}
<h2>Run</h2>{_table(cond_rows, ["", ""])}
<h2>Campbell map</h2>{img("campbell.png", "Campbell map")}
<h2>Frame modes</h2>{_table(modes, MODE_COLUMNS) if modes else "<p>none found</p>"}
<h2>Bands (strongest first)</h2>{band_table}
{img("orders.png", "order levels against RPM")}
<h2>Averaged spectra</h2>{img("spectra.png", "averaged spectra per axis")}
<h2>Imbalance</h2><p>{html.escape(imb['method'])}: {html.escape(imb['note'])}</p>
{_table(imb_rows, ["motor", "1x per kRPM² (deg/s)", "ratio to median", ""]) if imb_rows else ""}
{img("imbalance.png", "imbalance chart")}
<p class="small">PSD in dB re 1 (deg/s)²/Hz; bands are RPM ranges where an order excites a mode (seen: within 3 dB of
the order's peak; predicted: 60 f (1 ± ζ) / k). Bench safety: props off or the frame clamped, eye protection, clear of
the prop arc, a current-limited supply and a physical kill switch within reach.</p>
</main></body></html>
"""


def write_files(folder: str | Path, files: dict[str, bytes]) -> None:
    """Write each file into ``folder`` (created) beside its target and rename it over the target,
    so a full disk leaves no half file."""
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        tmp = out / (name + ".part")
        try:
            with open(tmp, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            tmp.replace(out / name)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise


def embed(images: dict[str, bytes], name: str, alt: str) -> str:
    """An <img> with the PNG inline (base64), or nothing when there is no such plot."""
    if name not in images:
        return ""
    data = base64.b64encode(images[name]).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}" width="1100">'


def write_report(a, folder: str | Path, extra_html: str = "") -> Path:
    """Write ``report.html``, the PNGs and ``analysis.json`` into ``folder``."""
    images = _plots(a)
    files = dict(images)
    files["analysis.json"] = (json.dumps(a.as_dict(), indent=2) + "\n").encode()
    files["report.html"] = page(a, images, extra_html).encode("utf-8")
    write_files(folder, files)
    return Path(folder) / "report.html"
