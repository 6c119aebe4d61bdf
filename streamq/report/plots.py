"""PNG plots of one meter's results, drawn with matplotlib's Agg canvas.

No pyplot and no display: every figure is a :class:`matplotlib.figure.Figure`
rendered straight to a file, so plotting touches no global matplotlib state
and works on servers without a screen.

Three plots per meter:

``<meter>-codebooks.png``
    amplitude histogram of the reference while a codebook was in force, with
    that codebook's decision thresholds and reconstruction levels on top; one
    panel each for the first, a middle and the last codebook of channel 0.
``<meter>-snr.png``
    SNR and segmental SNR per series row over time, codebook updates marked,
    and below it the signal and noise levels.
``<meter>-spectrum.png``
    Welch power spectral density of the noise against the signal.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any

import numpy as np

from streamq.engine.audiofile import replacing

# Our own palette (colour-blind friendly pairs, distinct in greyscale too).
INK = "#22313f"
SIGNAL = "#2f6f8f"
NOISE = "#d9822b"
SEGSNR = "#7a4f9a"
THRESH = "#b23a48"
LEVEL = "#1b8f7e"
HIST = "#9db7cf"
UPDATE = "#5b6770"

DPI = 110


def _join(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def _figure(width: float, height: float):
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    return fig


def _save(fig, path: Path) -> Path:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    FigureCanvasAgg(fig)
    path = Path(path)
    with replacing(path, "wb") as f:
        fig.savefig(f, format="png", dpi=DPI)
    return path


def warm_up() -> None:
    """Import matplotlib and draw a small throw-away figure in memory, so that
    the first real plot does not pay for loading the fonts and the drawing code.
    Nothing is written; later figures come out the same as without it."""
    import io
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.ticker import EngFormatter  # noqa: F401 - the spectrum plot's
    fig = _figure(2.0, 1.5)
    ax = fig.subplots()
    _style(ax)
    ax.stairs([1.0, 2.0], [0.0, 1.0, 2.0], color=SIGNAL, label="x")
    ax.set_title("warm-up", fontsize=9.5, color=INK, loc="left")
    ax.set_xlabel("x")
    ax.legend(fontsize=8, frameon=False)
    FigureCanvasAgg(fig)
    fig.savefig(io.BytesIO(), format="png", dpi=DPI)


def _style(ax) -> None:
    ax.grid(True, color="#d5dbe0", linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=INK, labelsize=8.5)
    ax.xaxis.label.set_color(INK)
    ax.yaxis.label.set_color(INK)


def time_unit(seconds: float) -> tuple[str, float]:
    """A readable unit for a time axis spanning ``seconds``: (name, divisor)."""
    if seconds > 3 * 3600:
        return "h", 3600.0
    if seconds > 300:
        return "min", 60.0
    return "s", 1.0


def read_csv_columns(path: Path) -> dict[str, np.ndarray]:
    """A CSV with a header row as float columns (empty or unreadable cells become NaN).

    Streams the rows into compact arrays, so a two-hour series (72,000 rows)
    costs a few megabytes, not a list of Python objects per cell.
    """
    from array import array
    with open(path, newline="", encoding="utf-8") as f:
        reader = csv.reader(f)
        head = next(reader, None)
        if not head:
            return {}
        cols = [array("d") for _ in head]
        n = len(head)
        for row in reader:
            for j in range(n):
                cell = row[j] if j < len(row) else ""
                try:
                    v = float(cell) if cell else math.nan
                except ValueError:
                    v = math.nan
                cols[j].append(v)
    return {name: np.frombuffer(col, dtype=np.float64).copy() if len(col) else
            np.zeros(0) for name, col in zip(head, cols)}


# -- (1) histogram with the codebook on top ---------------------------------------

def plot_codebooks(meter_id: str, meter: dict[str, Any], rate: float, path: Path) -> Path | None:
    """Histogram of the reference under the first, a middle and the last codebook."""
    picks = meter.get("codebooks") or {}
    # the same codebook period can be first, middle and last at once (fixed quantizers)
    groups: list[tuple[list[str], dict]] = []
    for k in ("first", "middle", "last"):
        p = picks.get(k)
        if not p:
            continue
        for names, q in groups:
            if (q.get("version"), q.get("at_sample")) == (p.get("version"), p.get("at_sample")):
                names.append(k)
                break
        else:
            groups.append(([k], p))
    shown = [(_join(names) + " codebook", p) for names, p in groups]
    if not shown:
        return None
    fig = _figure(8.6, 2.35 * len(shown) + 0.6)
    axes = fig.subplots(len(shown), 1, squeeze=False)[:, 0]
    for ax, (title, p) in zip(axes, shown):
        many = _codebook_panel(ax, title, p, rate)
    fig.legend(handles=_codebook_legend(many), loc="outside lower center", ncols=3, fontsize=8.5,
               frameon=False)
    fig.suptitle(f"{meter_id}: amplitude histogram of the reference and the codebook in force "
                 f"(channel 1)", color=INK, fontsize=10.5)
    return _save(fig, path)


def _codebook_legend(many: bool) -> list:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    return [Patch(facecolor=HIST, edgecolor=SIGNAL, label="reference samples (200 bins)"),
            Line2D([], [], color=THRESH, linestyle="solid" if many else "dashed",
                   linewidth=0.9, label="decision thresholds" + (" (bottom ticks)"
                                                                  if many else "")),
            Line2D([], [], color=LEVEL, linestyle="none", marker="|" if many else "v",
                   label="reconstruction levels" + (" (top ticks)" if many else ""))]


MANY_LEVELS = 40


def _codebook_panel(ax, title: str, p: dict, rate: float) -> bool:
    lo, hi = (float(v) for v in p["range"])
    counts = np.asarray(p.get("counts") or [], dtype=np.float64)
    th = np.asarray(p.get("thresholds") or [], dtype=np.float64)
    lv = np.asarray(p.get("levels") or [], dtype=np.float64)
    nb = max(len(counts), 1)
    edges = np.linspace(lo, hi, nb + 1)
    total = counts.sum()
    share = counts / total * 100.0 if total > 0 else np.zeros(nb)
    _style(ax)
    ax.stairs(share, edges, fill=True, color=HIST, edgecolor=SIGNAL, linewidth=0.6)
    top = float(share.max()) if share.max() > 0 else 1.0
    ymax = top * 1.25
    ax.set_ylim(0, ymax)
    ax.set_xlim(lo, hi)
    many = len(lv) > MANY_LEVELS
    th_in = th[(th > lo) & (th < hi)]
    lv_in = lv[(lv >= lo) & (lv <= hi)]
    if many:
        # hundreds of lines would paint the panel over: short ticks in two strips instead
        # (where they merge into a solid band, the quantizer is dense)
        ax.vlines(th_in, 0.0, 0.07, transform=ax.get_xaxis_transform(), colors=THRESH,
                  linewidths=0.5)
        ax.vlines(lv_in, 0.88, 0.97, transform=ax.get_xaxis_transform(), colors=LEVEL,
                  linewidths=0.5)
    else:
        ax.vlines(th_in, 0, ymax, colors=THRESH, linewidths=0.9, alpha=0.85, linestyles="dashed")
        ax.plot(lv_in, np.full(lv_in.shape, top * 1.15), linestyle="none", marker="v",
                markersize=5, color=LEVEL)
    start = p.get("at_sample") or 0
    until = p.get("until")
    span = (f"{clock(start / rate)} to {clock(until / rate)}" if until is not None
            else f"from {clock(start / rate)}")
    method = p.get("method") or "codebook"
    ax.set_title(f"{title}: version {p.get('version')}, {method}, {len(lv)} levels, "
                 f"in force {span}", fontsize=9.5, color=INK, loc="left")
    ax.set_ylabel("share of samples (%)")
    ax.set_xlabel("amplitude (full scale = 1)")
    if total <= 0:
        ax.text(0.5, 0.5, "no samples measured under this codebook", transform=ax.transAxes,
                ha="center", va="center", color=UPDATE, fontsize=9)
    return many


def clock(seconds: float) -> str:
    """A time position: ``12.345 s`` below a minute, else ``1:02:03.4`` / ``2:03.4``."""
    if seconds < 60:
        return f"{seconds:.3f} s"
    m, s = divmod(seconds, 60.0)
    h, m = divmod(int(m), 60)
    return f"{h}:{m:02d}:{s:04.1f}" if h else f"{m}:{s:04.1f}"


# -- (2) SNR over time ----------------------------------------------------------------

MAX_POINTS = 1200     # beyond this many rows, show per-bin mean and range
MAX_TICKS = 200       # beyond this many update marks, show the update rate in its own panel


def _bin(x: np.ndarray, k: int, how: str) -> np.ndarray:
    n = x.size // k * k
    rest = x[n:]
    parts = [x[:n].reshape(-1, k)] if n else []
    with np.errstate(all="ignore"):
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            f = {"mean": np.nanmean, "min": np.nanmin, "max": np.nanmax, "sum": np.nansum}[how]
            out = [f(p, axis=1) for p in parts]
            if rest.size:
                out.append(np.atleast_1d(f(rest)))
    return np.concatenate(out) if out else x[:0]


def plot_snr(meter_id: str, meter: dict[str, Any], series: dict[str, np.ndarray],
             path: Path) -> Path | None:
    """SNR and segmental SNR per series row; codebook updates marked; levels below."""
    t = series.get("time_s")
    if t is None or t.size == 0:
        return None
    from matplotlib.lines import Line2D
    nan = np.full(t.shape, np.nan)
    row_s = _row_seconds(series)
    end = float(t[-1]) + (float(series["samples"][-1]) / _rate_from(series)
                          if "samples" in series and t.size > 1 else row_s)
    unit, div = time_unit(end)
    k = max(1, math.ceil(t.size / MAX_POINTS))
    x = _bin(t, k, "min") / div
    x_end = end / div
    upd = np.nan_to_num(series.get("codebook_updates", np.zeros(t.shape)))
    n_upd = int(upd.sum())
    upd_times = t[upd > 0] / div
    rate_panel = upd_times.size > MAX_TICKS
    if rate_panel:
        fig = _figure(9.0, 6.6)
        top, bottom, third = fig.subplots(3, 1, sharex=True, height_ratios=[3, 1.6, 1.1])
        axes = (top, bottom, third)
    else:
        fig = _figure(9.0, 5.6)
        top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=[3, 1.6])
        axes = (top, bottom)
    for ax in axes:
        _style(ax)
    xs = np.append(x, x_end)   # step edges

    def trace(ax, y, colour, label):
        if k == 1:
            ax.stairs(y, xs, color=colour, linewidth=1.1, label=label, baseline=None)
            return
        lo, hi, mean = _bin(y, k, "min"), _bin(y, k, "max"), _bin(y, k, "mean")
        ax.stairs(hi, xs, baseline=lo, fill=True, color=colour, alpha=0.22, linewidth=0)
        ax.stairs(mean, xs, color=colour, linewidth=1.0, label=label, baseline=None)

    snr_raw = series.get("snr_db", nan)
    snr = np.where(np.isfinite(snr_raw), snr_raw, np.nan)
    seg = series.get("segsnr_db", nan)
    trace(top, snr, SIGNAL, "SNR")
    trace(top, seg, SEGSNR, "segmental SNR")
    handles, _ = top.get_legend_handles_labels()
    # rows without any noise (SNR = +inf) or with a silent reference (SNR = -inf)
    for value, y, marker, label in ((np.inf, 0.90, "^", "row without noise (SNR infinite)"),
                                    (-np.inf, 0.03, "v", "silent reference row (SNR -inf)")):
        hit = snr_raw == value
        if hit.any():
            starts = t[hit] if k == 1 else _bin(t, k, "min")[_bin(hit.astype(float), k, "max") > 0]
            xm = (np.unique(starts) + 0.5 * k * row_s) / div   # mid-row
            top.plot(xm, np.full(xm.shape, y), transform=top.get_xaxis_transform(),
                     linestyle="none", marker=marker, markersize=4, color=SIGNAL, alpha=0.8)
            handles.append(Line2D([], [], color=SIGNAL, linestyle="none", marker=marker,
                                  markersize=4, label=f"{label}: {int(hit.sum())}"))
    overall = meter.get("snr_db")
    if overall is not None and math.isfinite(overall):
        top.axhline(overall, color=INK, linestyle=":", linewidth=1.0)
        handles.append(Line2D([], [], color=INK, linestyle=":",
                              label=f"SNR of the whole run ({overall:.2f} dB)"))
    if upd_times.size and not rate_panel:
        top.vlines(upd_times, 0.955, 1.0, transform=top.get_xaxis_transform(), colors=UPDATE,
                   linewidth=0.7)
        handles.append(Line2D([], [], color=UPDATE, linestyle="none", marker="|", markersize=8,
                              label=f"codebook update ({n_upd} in all)"))
    finite = np.concatenate([snr[np.isfinite(snr)], seg[np.isfinite(seg)]])
    if finite.size:
        lo, hi = float(finite.min()), float(finite.max())
        pad = max(2.0, 0.08 * (hi - lo))
        top.set_ylim(lo - pad, hi + pad + (0.1 * (hi - lo + 2 * pad) if not rate_panel else 0))
    top.set_ylabel("SNR (dB)")
    top.legend(handles=handles, fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0),
               frameon=False)
    how = (f"one row per {row_s * 1000:.0f} ms" if k == 1 else
           f"rows of {row_s * 1000:.0f} ms: line = mean, band = range over {_span(k * row_s)}")
    top.set_title(f"{meter_id}: SNR over time ({how})", fontsize=10.5, color=INK, loc="left")

    sig = series.get("signal_dbfs", nan)
    noi = series.get("noise_dbfs", nan)
    sig = np.where(np.isfinite(sig), sig, np.nan)   # digital silence: a gap in the line
    noi = np.where(np.isfinite(noi), noi, np.nan)
    trace(bottom, sig, SIGNAL, "signal level")
    trace(bottom, noi, NOISE, "noise level")
    bottom.set_ylabel("level (dBFS)")
    bottom.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    lv = np.concatenate([sig[np.isfinite(sig)], noi[np.isfinite(noi)]])
    if lv.size:
        bottom.set_ylim(max(float(lv.min()) - 5, -200), min(float(lv.max()) + 5, 10))
    if rate_panel:
        # updates per second, on display bins of at least one second
        kb = max(k, math.ceil(1.0 / row_s))
        xb = _bin(t, kb, "min") / div
        per_s = _bin(upd, kb, "sum") / (kb * row_s)
        third.stairs(per_s, np.append(xb, x_end), color=UPDATE, linewidth=1.0, baseline=0,
                     fill=True, alpha=0.5, label=f"codebook updates ({n_upd} in all)")
        third.set_ylabel("updates/s")
        third.set_ylim(0, max(float(per_s.max()) * 1.25, 1.0))
        third.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    axes[-1].set_xlabel(f"time ({unit})")
    axes[-1].set_xlim(0, x_end)
    return _save(fig, path)


def _span(seconds: float) -> str:
    if seconds < 1:
        return f"{seconds * 1000:.0f} ms"
    if seconds < 120:
        return f"{seconds:.3g} s"
    return f"{seconds / 60:.3g} min"


def _rate_from(series: dict[str, np.ndarray]) -> float:
    t, n = series["time_s"], series["samples"]
    if t.size > 1 and t[1] > t[0]:
        return float(n[0] / (t[1] - t[0]))
    return 48_000.0


def _row_seconds(series: dict[str, np.ndarray]) -> float:
    t = series["time_s"]
    return float(t[1] - t[0]) if t.size > 1 and t[1] > t[0] else 0.1


# -- (3) noise spectrum against signal spectrum --------------------------------------

def plot_spectrum(meter_id: str, meter: dict[str, Any], spectrum: dict[str, np.ndarray],
                  path: Path) -> Path | None:
    f = spectrum.get("frequency_hz")
    if f is None or f.size < 2:
        return None
    keep = f > 0
    f = f[keep]
    s = spectrum["signal_psd_db"][keep]
    n = spectrum["noise_psd_db"][keep]
    fig = _figure(8.5, 4.2)
    ax = fig.subplots()
    _style(ax)
    ax.semilogx(f, s, color=SIGNAL, linewidth=1.1, label="signal (reference)")
    ax.semilogx(f, n, color=NOISE, linewidth=1.1, label="quantization noise")
    both = np.concatenate([s, n])
    both = both[np.isfinite(both) & (both > -290)]
    if both.size:
        lo, hi = float(np.percentile(both, 0.5)), float(both.max())
        ax.set_ylim(lo - 6, hi + 6)
    ax.set_xlim(f[0], f[-1])
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("power spectral density (dB re FS²/Hz)")
    ax.set_title(f"{meter_id}: spectrum of the noise against the signal (Welch, channels "
                 f"averaged)", fontsize=10.5, color=INK, loc="left")
    ax.legend(fontsize=8.5, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    from matplotlib.ticker import EngFormatter
    ax.xaxis.set_major_formatter(EngFormatter(unit="Hz", sep=" "))
    return _save(fig, path)
