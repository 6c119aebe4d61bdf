"""The batch summary: one table over every input file (CSV and JSON) with totals
weighted by samples, and a plot of SNR per file and its distribution.

Totals, per meter, over the files that completed:

- ``snr_db``: total signal energy over total noise energy (each file's power
  times its samples times its channels), i.e. the SNR of the whole archive
  played end to end;
- ``snr_db_mean``, ``segsnr_db``, ``bits_per_sample``, ``side_info_bits_per_sample``,
  ``entropy_bits``: means weighted by samples x channels;
- ``snr_db_median``, ``snr_db_min``/``snr_db_max`` (with the file): over files;
- ``codebook_updates``, ``overload_samples``: sums; ``peak_abs_error``: the largest.
"""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path
from typing import Any

from streamq.batch.work import REPORT, read_json
from streamq.engine.audiofile import replacing

#: Meter figures copied into the table, in column order.
METER_FIELDS = ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample",
                "entropy_bits", "fixed_rate_bits", "codebook_updates", "peak_abs_error",
                "signal_power", "noise_power", "granular_noise_power", "overload_noise_power",
                "overload_samples")
FILE_FIELDS = ("input", "folder", "status", "reused", "error", "sample_rate", "channels",
               "samples", "audio_seconds")
_WEIGHTED_MEANS = ("segsnr_db", "bits_per_sample", "side_info_bits_per_sample", "entropy_bits")


def _num(v) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(v) else None


def file_entry(input_path: str, folder: str, status: str, error: str | None,
               reused: bool) -> dict[str, Any]:
    """One file's row: its state and, when done, its meters' figures from report.json."""
    entry: dict[str, Any] = {"input": input_path, "folder": folder, "status": status,
                             "reused": reused, "error": error, "sample_rate": None,
                             "channels": None, "samples": None, "audio_seconds": None,
                             "meters": {}}
    if status != "done":
        return entry
    report = read_json(Path(folder) / REPORT)
    if not report:
        entry.update(status="failed", error=f"{Path(folder) / REPORT}: missing or unreadable "
                                            f"(are the output folder and inputs on storage "
                                            f"every worker shares?)")
        return entry
    entry["sample_rate"] = report.get("sample_rate")
    entry["samples"] = report.get("samples")
    entry["audio_seconds"] = report.get("audio_seconds")
    for mid, m in (report.get("meters") or {}).items():
        entry["meters"][mid] = {k: m.get(k) for k in ("samples", "channels") + METER_FIELDS}
        if entry["channels"] is None:
            entry["channels"] = m.get("channels")
    return entry


def totals(entries: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Per meter, figures over all completed files (see the module docstring)."""
    out: dict[str, dict[str, Any]] = {}
    meters: list[str] = []
    for e in entries:
        for mid in e["meters"]:
            if mid not in meters:
                meters.append(mid)
    for mid in meters:
        rows = [(e, e["meters"][mid]) for e in entries if e["status"] == "done" and mid in e["meters"]]
        w_all = 0.0
        sig_e = noi_e = 0.0
        power_ok = True
        sums = {k: [0.0, 0.0] for k in _WEIGHTED_MEANS + ("snr_db",)}
        updates = overload = 0
        peak = None
        snrs: list[tuple[float, str]] = []
        for e, m in rows:
            w = float((m.get("samples") or 0) * (m.get("channels") or 1))
            w_all += w
            sp, np_ = _num(m.get("signal_power")), _num(m.get("noise_power"))
            if sp is None or np_ is None:
                power_ok = False
            else:
                sig_e += sp * w
                noi_e += np_ * w
            for k in sums:
                v = _num(m.get(k))
                if v is not None:
                    sums[k][0] += v * w
                    sums[k][1] += w
            updates += int(m.get("codebook_updates") or 0)
            overload += int(m.get("overload_samples") or 0)
            pk = _num(m.get("peak_abs_error"))
            if pk is not None:
                peak = pk if peak is None else max(peak, pk)
            s = _num(m.get("snr_db"))
            if s is not None:
                snrs.append((s, e["input"]))
        if power_ok and rows and noi_e > 0 and sig_e > 0:
            pooled = 10.0 * math.log10(sig_e / noi_e)
        else:
            pooled = None
        t: dict[str, Any] = {
            "files": len(rows),
            "samples": sum(int(m.get("samples") or 0) for _, m in rows),
            "weight": "samples x channels",
            "snr_db": pooled,
            "snr_db_mean": sums["snr_db"][0] / sums["snr_db"][1] if sums["snr_db"][1] else None,
        }
        for k in _WEIGHTED_MEANS:
            t[k] = sums[k][0] / sums[k][1] if sums[k][1] else None
        if snrs:
            vals = sorted(v for v, _ in snrs)
            n = len(vals)
            t["snr_db_median"] = vals[n // 2] if n % 2 else 0.5 * (vals[n // 2 - 1] + vals[n // 2])
            lo, hi = min(snrs), max(snrs)
            t.update(snr_db_min=lo[0], snr_db_min_file=lo[1], snr_db_max=hi[0],
                     snr_db_max_file=hi[1])
        t["files_without_finite_snr"] = len(rows) - len(snrs)
        t.update(codebook_updates=updates, overload_samples=overload, peak_abs_error=peak)
        out[mid] = t
    return out


def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    return str(v)


def _atomic_write(path: Path, text: str) -> None:
    with replacing(path) as f:
        f.write(text)


def write_csv(path: Path, entries: list[dict[str, Any]], tot: dict[str, dict[str, Any]]) -> None:
    """One row per file and meter (files without figures get one row with no meter),
    then one "total" row per meter."""
    import io
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(FILE_FIELDS + ("meter",) + METER_FIELDS)
    for e in entries:
        base = [_cell(e.get(k)) for k in FILE_FIELDS]
        if e["meters"]:
            for mid, m in e["meters"].items():
                w.writerow(base + [mid] + [_cell(m.get(k)) for k in METER_FIELDS])
        else:
            w.writerow(base + [""] + [""] * len(METER_FIELDS))
    for mid, t in tot.items():
        seconds = sum(e["audio_seconds"] or 0.0 for e in entries
                      if e["status"] == "done" and mid in e["meters"])
        row = {"input": f"(all {t['files']} files)", "status": "total", "samples": t["samples"],
               "audio_seconds": seconds}
        w.writerow([_cell(row.get(k)) for k in FILE_FIELDS] + [mid]
                   + [_cell(t.get(k)) for k in METER_FIELDS])
    _atomic_write(path, buf.getvalue())


def write_json(path: Path, head: dict[str, Any], entries: list[dict[str, Any]],
               tot: dict[str, dict[str, Any]]) -> None:
    def finite(o):
        if isinstance(o, float) and not math.isfinite(o):
            return None
        if isinstance(o, dict):
            return {k: finite(v) for k, v in o.items()}
        if isinstance(o, list):
            return [finite(v) for v in o]
        return o
    data = dict(head)
    data["totals"] = tot
    data["files"] = entries
    _atomic_write(path, json.dumps(finite(data), indent=2) + "\n")


def audio_duration(seconds: float) -> str:
    """A length of audio in the unit that reads best: s, min or h."""
    if seconds < 120:
        return f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.2f} h"


def _short(name: str, n: int = 34) -> str:
    return name if len(name) <= n else name[: n - 13] + "..." + name[-10:]


def plot_snr(path: Path, meter: str, entries: list[dict[str, Any]], total: dict[str, Any],
             title: str) -> bool:
    """SNR per file (left) and the distribution of per-file SNR (right) for one meter.

    Both panels mark the all-files SNR (``total["snr_db"]``: pooled, total signal
    energy over total noise energy with files weighted by samples x channels,
    labelled so) and the right one the median file's. Returns False (and writes
    nothing) when no file has a finite SNR.
    """
    done = [e for e in entries if e["status"] == "done" and meter in e["meters"]]
    names = [Path(e["input"]).name for e in done]
    dup = {nm for nm in names if names.count(nm) > 1}
    labels = [f"{Path(e['input']).parent.name}/{nm}" if nm in dup else nm
              for e, nm in zip(done, names)]
    pts = [(_num(e["meters"][meter].get("snr_db")), lab) for e, lab in zip(done, labels)]
    pts = sorted((s, n) for s, n in pts if s is not None)
    if not pts:
        return False
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    snr = np.array([s for s, _ in pts])
    n = len(pts)
    named = n <= 40
    height = max(4.2, min(14.0, 1.6 + 0.24 * n)) if named else 4.8
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(12, height), layout="constrained",
                                   gridspec_kw={"width_ratios": [1.25, 1]})
    pooled, median = total.get("snr_db"), total.get("snr_db_median")
    # total signal energy over total noise energy, files weighted by samples x channels
    pooled_label = None if pooled is None else f"all files, pooled by samples: {pooled:.2f} dB"
    if named:
        y = np.arange(n)[::-1]  # lowest SNR at the top
        ax1.plot(snr, y, "o", ms=6, color="#3b75af")
        ax1.set_yticks(y, [_short(nm) for _, nm in pts], fontsize=8 if n > 20 else 9)
        ax1.set_ylim(-0.7, n - 0.3)
        ax1.set_xlabel("SNR (dB)")
        ax1.set_ylabel("file (lowest SNR at the top)")
        ax1.grid(axis="y", alpha=0.2)
        if pooled is not None:
            ax1.axvline(pooled, color="#d1495b", ls="--", lw=1.2, label=pooled_label)
            # sorted points run from top left to bottom right: the top right is free
            ax1.legend(loc="upper right", fontsize=8, framealpha=0.9)
        lo, hi = float(snr.min()), float(snr.max())
        pad = max(0.5, 0.08 * (hi - lo))
        ax1.set_xlim(lo - pad, hi + pad)
    else:
        rank = np.arange(1, n + 1)
        ax1.plot(rank, snr, "o", ms=3, color="#3b75af")
        ax1.set_xlabel("file rank (lowest SNR first)")
        ax1.set_ylabel("SNR (dB)")
        if pooled is not None:
            ax1.axhline(pooled, color="#d1495b", ls="--", lw=1.2, label=pooled_label)
            ax1.legend(loc="lower right", fontsize=8, framealpha=0.9)
        ax1.grid(alpha=0.3)
    ax1.set_title("SNR per file", fontsize=10)
    ax1.grid(axis="x", alpha=0.3)

    bins = min(30, max(5, int(math.sqrt(n)) + 3))
    span = float(snr.max() - snr.min())
    if span < 1e-9:
        edges = np.linspace(snr[0] - 0.5, snr[0] + 0.5, 6)
    else:
        edges = np.linspace(snr.min() - 0.02 * span, snr.max() + 0.02 * span, bins + 1)
    counts, _, _ = ax2.hist(snr, bins=edges, color="#7aa6c2", edgecolor="#2e5c80")
    ax2.set_ylim(0, float(counts.max()) * 1.4 + 0.5)  # head room for the legend
    ax2.set_xlabel("SNR (dB)")
    ax2.set_ylabel("files")
    ax2.yaxis.get_major_locator().set_params(integer=True)
    if pooled is not None:
        ax2.axvline(pooled, color="#d1495b", ls="--", lw=1.2, label=pooled_label)
    if median is not None:
        ax2.axvline(median, color="#333333", ls=":", lw=1.2, label=f"median file: {median:.2f} dB")
    if pooled is not None or median is not None:
        ax2.legend(loc="upper left", fontsize=8, framealpha=0.9)
    ax2.set_title("distribution over files", fontsize=10)
    ax2.grid(axis="y", alpha=0.3)
    fig.suptitle(title, fontsize=11)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return True


def write_summary(out_dir: Path, head: dict[str, Any],
                  entries: list[dict[str, Any]]) -> list[Path]:
    """Write summary.csv, summary.json and the SNR plot(s); returns the paths written."""
    out_dir = Path(out_dir)
    tot = totals(entries)
    paths = [out_dir / "summary.csv", out_dir / "summary.json"]
    write_csv(paths[0], entries, tot)
    plots = {}
    for mid, t in tot.items():
        name = "summary.png" if len(tot) == 1 else f"summary-{re.sub(r'[^A-Za-z0-9_-]', '-', mid)}.png"
        hours = sum(e["audio_seconds"] or 0.0 for e in entries
                    if e["status"] == "done" and mid in e["meters"]) / 3600.0
        failed = sum(1 for e in entries if e["status"] == "failed")
        title = (f"{head.get('graph', 'batch')}, meter '{mid}': {t['files']} files, "
                 f"{audio_duration(hours * 3600.0)} of audio"
                 + (f" ({failed} more failed, not shown)" if failed else ""))
        if plot_snr(out_dir / name, mid, entries, t, title):
            plots[mid] = name
            paths.append(out_dir / name)
    write_json(paths[1], {**head, "plots": plots}, entries, tot)
    return paths
