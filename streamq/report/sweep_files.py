"""What ``streamq sweep`` writes: the envelope of the best points, the Gaussian
reference figures, ``sweep.csv``, ``sweep.json`` and ``sweep.png`` (see
:mod:`streamq.report.sweep`)."""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path
from typing import Any

from streamq.engine.scheduler import json_ready
from streamq.errors import StreamqError


# Fixed-rate Lloyd-Max quantizers of a unit-variance Gaussian at 1 to 5 bits
# (2 to 32 levels): mean squared error as printed in J. Max, "Quantizing for
# minimum distortion", IRE Trans. Information Theory 6(1), 1960, Table I,
# typed from memory. tests/test_sweep.py checks them against streamq.design's
# own Lloyd-Max design of the Gaussian (itself checked against the whole table
# in tests/design/test_design_tables.py).
MAX_GAUSSIAN_MSE = {1: 0.3634, 2: 0.1175, 3: 0.03454, 4: 0.009497, 5: 0.002499}

CSV_FIELDS = ("scheme", "label", "bits", "block_ms", "bits_per_sample",
              "side_info_bits_per_sample", "snr_db", "segsnr_db", "codebook_updates", "status",
              "error")


def envelope(points: list[dict[str, Any]], key: str = "snr_db") -> list[int]:
    """Indices of the finished points on the upper envelope of ``key`` against
    total bits/sample: each has the highest ``key`` of all points at its rate
    or below (the least distortion reached for that many bits), in rising
    rate."""
    done = [(float(p["bits_per_sample"]), -float(p[key]), i) for i, p in enumerate(points)
            if p.get("status") == "done" and _finite(p.get(key))
            and _finite(p.get("bits_per_sample"))]
    done.sort()
    out: list[int] = []
    best = -math.inf
    for _, neg, i in done:
        if -neg > best:
            best = -neg
            out.append(i)
    return out


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def gaussian_references() -> dict[str, Any]:
    """The reference figures for a unit-variance memoryless Gaussian source."""
    from streamq.design.theory import ECSQ_GAP_BITS, ECSQ_GAP_DB
    return {
        "source": "unit-variance memoryless Gaussian (not the recording)",
        "rate_distortion": "D(R) = 2^(-2R), SNR = 6.02 R dB (Shannon 1959)",
        "lloyd_max_fixed_rate": [{"bits": b, "mse": m, "snr_db": -10 * math.log10(m)}
                                 for b, m in sorted(MAX_GAUSSIAN_MSE.items())],
        "lloyd_max_source": "Max 1960, Table I",
        "entropy_coded_uniform_gap_db": ECSQ_GAP_DB,
        "entropy_coded_uniform_gap_bits": ECSQ_GAP_BITS,
        "entropy_coded_uniform_source": "high-rate gap to the bound (Gish and Pierce 1968)",
    }


# -- output files ---------------------------------------------------------------------------------

def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf" if v < 0 else "")
    return str(v)


def _written(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically; a failure is a one-line StreamqError."""
    from streamq.engine.audiofile import replacing, unwritable
    try:
        with replacing(Path(path), newline="") as f:
            f.write(text)
    except OSError as exc:
        raise StreamqError(unwritable(Path(path), exc)) from None


def write_csv(path: Path, points: list[dict[str, Any]]) -> None:
    """sweep.csv: one row per point (:data:`CSV_FIELDS`), written atomically."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_FIELDS)
    for p in points:
        row = []
        for k in CSV_FIELDS:
            v = p.get(k)
            row.append(f"{v:g}" if k == "block_ms" and v is not None else _cell(v))
        w.writerow(row)
    _written(path, buf.getvalue())


def json_text(res: dict[str, Any]) -> str:
    """The sweep as JSON text (non-finite figures become null)."""
    return json.dumps(json_ready(res), indent=2) + "\n"


def write_json(path: Path, res: dict[str, Any]) -> None:
    """sweep.json, written atomically."""
    _written(path, json_text(res))


# Our own colour cycle for up to 15 schemes (then it repeats with other markers).
_COLOURS = ("#1f5f8b", "#d9822b", "#2e8b57", "#b23a48", "#7a4f9a", "#8c6d31", "#d45d9e",
            "#e6194b", "#3fa7b5", "#a6a13a", "#5a7bd8", "#e0a31b", "#1b8f7e", "#9b2f6b",
            "#6b8e23")
_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "*", "<", ">", "h", "p", "d", "8", "H")
REF_INK = "#55606a"
ENVELOPE = "#f2b01e"


def plot_sweep(path: Path, res: dict[str, Any]) -> Path | None:
    """sweep.png: SNR (left) and segmental SNR (right) against total
    bits/sample, one colour and marker per scheme (its own best points joined),
    the upper envelope over all schemes, and the Gaussian reference curves.
    Returns None (and writes nothing) when no point has figures."""
    import numpy as np

    from streamq.design.theory import ECSQ_GAP_DB
    from streamq.report.plots import INK, _figure, _save, _style

    pts = [p for p in res["points"] if p["status"] == "done"
           and _finite(p.get("bits_per_sample")) and _finite(p.get("snr_db"))]
    if not pts:
        return None
    rates = [float(p["bits_per_sample"]) for p in pts]
    lo, hi = max(0.0, min(rates) - 0.35), max(rates) + 0.35
    r = np.linspace(lo, hi, 200)
    per_bit = 20 * math.log10(2)  # 6.02 dB per bit
    fig = _figure(14.0, 6.6)
    grid = fig.add_gridspec(1, 3, width_ratios=[1, 1, 0.58])
    axes = [fig.add_subplot(grid[0, 0]), fig.add_subplot(grid[0, 1])]
    legend_ax = fig.add_subplot(grid[0, 2])
    legend_ax.axis("off")
    schemes = list(dict.fromkeys(p["scheme"] for p in pts))
    handles: dict[str, Any] = {}
    for ax, key, title in zip(axes, ("snr_db", "segsnr_db"), ("SNR", "segmental SNR")):
        _style(ax)
        ys = [float(p[key]) for p in pts if _finite(p.get(key))]
        # references: unit-variance memoryless Gaussian (the same for SNR and
        # segmental SNR, since such a source has the same variance in every frame)
        handles["bound"], = ax.plot(r, per_bit * r, color=REF_INK, lw=1.6, zorder=1,
                                    label="rate-distortion bound, SNR = 6.02 R dB "
                                          "(Shannon 1959)")
        handles["ecsq"], = ax.plot(r, per_bit * r - ECSQ_GAP_DB, color=REF_INK, lw=1.3,
                                   ls="--", zorder=1,
                                   label=f"entropy-coded uniform, high rate: bound - "
                                         f"{ECSQ_GAP_DB:.2f} dB (Gish & Pierce 1968)")
        mx = [(b, -10 * math.log10(m)) for b, m in sorted(MAX_GAUSSIAN_MSE.items())
              if lo <= b <= hi]
        if mx:
            handles["max"], = ax.plot([b for b, _ in mx], [s for _, s in mx], color=REF_INK,
                                      ls=":", lw=1.2, marker="x", ms=8, mew=1.8, zorder=4,
                                      label="Lloyd-Max, fixed rate (Max 1960)")
        for si, s in enumerate(schemes):
            mine = [i for i, p in enumerate(pts) if p["scheme"] == s and _finite(p.get(key))]
            if not mine:
                continue
            colour, marker = _COLOURS[si % len(_COLOURS)], _MARKERS[si % len(_MARKERS)]
            x = [rates[i] for i in mine]
            y = [float(pts[i][key]) for i in mine]
            h = ax.scatter(x, y, s=70 if marker == "*" else 32, color=colour, marker=marker, alpha=0.85, zorder=3,
                           linewidths=0.4, edgecolors="white", label=s)
            handles.setdefault(f"s:{s}", h)
            front = envelope([pts[i] for i in mine], key)
            ax.plot([x[i] for i in front], [y[i] for i in front], color=colour, lw=1.0,
                    alpha=0.7, zorder=2)
        env = envelope(pts, key)
        if env:
            ex = [rates[i] for i in env] + [hi]
            ey = [float(pts[i][key]) for i in env]
            ey.append(ey[-1])
            handles["env"], = ax.step(ex, ey, where="post", color=ENVELOPE, lw=5, alpha=0.45,
                                      zorder=1.5, solid_joinstyle="miter", label="upper envelope: best of all schemes at "
                                                      "this rate or below")
        all_y = ys + [float(v) for v in per_bit * np.array([lo, hi])]
        ymin, ymax = min(all_y), max(all_y)
        pad = 0.05 * (ymax - ymin) + 0.5
        ax.set_ylim(ymin - pad, ymax + pad)
        ax.set_xlim(lo, hi)
        ax.set_xlabel("total bits/sample (index bits + side information)", fontsize=9)
        ax.set_ylabel(f"{title} (dB)", fontsize=9)
        ax.set_title(f"{title} against rate", fontsize=10, color=INK)
    order = ([handles[k] for k in ("env",) if k in handles]
             + [handles[f"s:{s}"] for s in schemes if f"s:{s}" in handles])
    refs = [handles[k] for k in ("bound", "max", "ecsq") if k in handles]
    leg1 = legend_ax.legend(handles=order, labels=[_wrap(h.get_label(), 40) for h in order],
                            loc="upper left", fontsize=8.5, frameon=False,
                            title="this recording: one marker per point\n(word length x block)",
                            title_fontsize=8.5, alignment="left")
    legend_ax.add_artist(leg1)
    wrapped = [h.get_label() for h in refs]
    legend_ax.legend(handles=refs, labels=[_wrap(t, 40) for t in wrapped], loc="lower left",
                     fontsize=8, frameon=False, title="references: unit-variance Gaussian\n"
                     "source (not this recording)", title_fontsize=8.5, alignment="left")
    name = Path(res["file"]).name
    done = len(pts)
    state = "" if res.get("complete") else ", STOPPED EARLY (points done so far)"
    fig.suptitle(f"{name}: {done} points, {len(schemes)} schemes, {res['seconds']:.1f} s at "
                 f"{res['sample_rate']} Hz{state}\ngrey lines: theory for a Gaussian source, "
                 f"not for this recording", fontsize=10.5, color=INK)
    return _save(fig, path)


def _wrap(text: str, width: int) -> str:
    import textwrap
    return "\n".join(textwrap.wrap(text, width))
