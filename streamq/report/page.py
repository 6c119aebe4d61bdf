"""report.html: one self-contained page (no external resources, images inlined
as base64 data URIs) with the summary table of every meter and its plots."""

from __future__ import annotations

import base64
import html
import math
from pathlib import Path
from typing import Any

from streamq import __version__

CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       color: #22313f; margin: 1.5rem auto; max-width: 1100px; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.45rem; margin-bottom: .2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #d5dbe0; padding-bottom: .2rem; }
p.meta { color: #5b6770; margin-top: 0; }
.state { display: inline-block; padding: .05rem .5rem; border-radius: .6rem; font-size: .85rem; }
.ok { background: #dcefe9; color: #14594f; }
.stopped { background: #f6e0d0; color: #7a3f0c; }
table { border-collapse: collapse; margin: .8rem 0; font-size: .92rem; }
th, td { padding: .3rem .7rem; border-bottom: 1px solid #e3e8ec; text-align: right; }
th { background: #eef2f5; font-weight: 600; }
td:first-child, th:first-child { text-align: left; }
td.na { color: #8a969f; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #e3e8ec; }
figcaption { color: #5b6770; font-size: .88rem; }
"""

COLUMNS = (
    ("meter", "meter"),
    ("SNR (dB)", "snr_db"),
    ("segmental SNR (dB)", "segsnr_db"),
    ("bits/sample incl. side info", "bits_per_sample"),
    ("index entropy (bits/sample)", "entropy_bits"),
    ("codebook updates", "codebook_updates"),
    ("overload share", "overload_share"),
    ("samples", "samples"),
)


def overload_share(meter: dict[str, Any]) -> float | None:
    """Share of measured samples beyond the outermost reconstruction levels."""
    n = (meter.get("samples") or 0) * (meter.get("channels") or 1)
    ov = meter.get("overload_samples")
    return None if not n or ov is None else ov / n


def summary_rows(report: dict[str, Any]) -> list[dict[str, Any]]:
    """One dict per meter with the summary table's figures (None = not available)."""
    rows = []
    for mid, m in (report.get("meters") or {}).items():
        rows.append({"meter": mid, "snr_db": m.get("snr_db"), "segsnr_db": m.get("segsnr_db"),
                     "bits_per_sample": m.get("bits_per_sample"),
                     "entropy_bits": m.get("entropy_bits"),
                     "codebook_updates": m.get("codebook_updates"),
                     "overload_share": overload_share(m), "samples": m.get("samples")})
    return rows


def _cell(key: str, v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return '<td class="na">n/a</td>'
    if key == "meter":
        return f"<td>{html.escape(str(v))}</td>"
    if key in ("snr_db", "segsnr_db"):
        return f"<td>{v:.2f}</td>"
    if key in ("bits_per_sample", "entropy_bits"):
        return f"<td>{v:.3f}</td>"
    if key == "overload_share":
        return f"<td>{v * 100:.3f} %</td>"
    return f"<td>{int(v):,}</td>"


def _img(path: Path, alt: str) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


CAPTIONS = {
    "codebooks": "Amplitude histogram of the reference while each codebook was in force "
                 "(channel 1), with its decision thresholds and reconstruction levels.",
    "snr": "SNR and segmental SNR per row of the time series, codebook updates marked along the "
           "top; below, the signal and noise levels.",
    "spectrum": "Power spectral density of the quantization noise against the signal.",
}


def render_html(report: dict[str, Any], plots: dict[str, dict[str, Path]]) -> str:
    """The page as text. ``plots`` maps meter id -> {"codebooks"|"snr"|"spectrum": png path}."""
    name = html.escape(str(report.get("graph", "run")))
    rate = report.get("sample_rate") or 0
    secs = report.get("audio_seconds") or 0.0
    if report.get("complete", True):
        state = '<span class="state ok">complete</span>'
    else:
        state = (f'<span class="state stopped">stopped early at sample '
                 f'{int(report.get("last_sample") or 0):,}</span>')
    parts = [
        "<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
        f"<title>streamq report: {name}</title>", f"<style>{CSS}</style>", "</head>", "<body>",
        f"<h1>streamq report: {name}</h1>",
        f'<p class="meta">{state} &nbsp; {secs:,.2f} s of audio at {rate:,} Hz'
        + (f" &nbsp; graph file {html.escape(str(report['graph_file']))}"
           if report.get("graph_file") else "") + "</p>",
    ]
    rows = summary_rows(report)
    if rows:
        parts.append("<h2>Summary</h2>")
        parts.append("<table><thead><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h, _ in COLUMNS)
                     + "</tr></thead><tbody>")
        for r in rows:
            parts.append("<tr>" + "".join(_cell(k, r[k]) for _, k in COLUMNS) + "</tr>")
        parts.append("</tbody></table>")
    else:
        parts.append("<p>This graph has no error meter, so there is nothing to summarise.</p>")
    outs = report.get("outputs") or {}
    files = [(nid, o) for nid, o in outs.items() if isinstance(o, dict) and "path" in o]
    if files:
        parts.append("<h2>Files written</h2><table><thead><tr><th>node</th><th>file</th>"
                     "<th>frames</th></tr></thead><tbody>")
        for nid, o in files:
            parts.append(f"<tr><td>{html.escape(nid)}</td><td>{html.escape(str(o['path']))}</td>"
                         f"<td>{int(o.get('frames') or 0):,}</td></tr>")
        parts.append("</tbody></table>")
    for mid in (report.get("meters") or {}):
        mine = plots.get(mid) or {}
        if not mine:
            continue
        parts.append(f"<h2>{html.escape(mid)}</h2>")
        for kind in ("codebooks", "snr", "spectrum"):
            p = mine.get(kind)
            if p is None:
                continue
            parts.append(f"<figure>{_img(p, f'{mid}: {kind}')}<figcaption>"
                         f"{html.escape(CAPTIONS[kind])}</figcaption></figure>")
    parts.append(f'<p class="meta">Made by streamq {html.escape(__version__)}.</p>')
    parts += ["</body>", "</html>"]
    return "\n".join(parts) + "\n"
