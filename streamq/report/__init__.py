"""Reporting: plots and the HTML page made from a run's report.json and the
meters' CSV files, and the ``streamq compare`` command.

:func:`write_report_files` is called after every ``streamq run`` (also after
an interrupted one, with whatever the meters wrote). It never raises for a
plotting problem: each failure becomes a one-line warning on stderr, so the
report.json that is already on disk is never lost.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, Callable

__all__ = ["write_report_files", "plot_names"]


def plot_names(meter_id: str) -> dict[str, str]:
    """File names of one meter's plots."""
    return {"codebooks": f"{meter_id}-codebooks.png", "snr": f"{meter_id}-snr.png",
            "spectrum": f"{meter_id}-spectrum.png"}


def _warn(what: str, exc: BaseException) -> None:
    msg = " ".join(str(exc).split()) or type(exc).__name__
    print(f"streamq: warning: {what} failed ({type(exc).__name__}: {msg[:200]})", file=sys.stderr)


def write_report_files(out_dir: str | Path, report: dict[str, Any], *,
                       warn: Callable[[str, BaseException], None] = _warn) -> list[Path]:
    """Write the PNG plots of every meter and report.html into ``out_dir``.

    Parameters
    ----------
    out_dir : the run's output folder (where report.json and the meters' CSV files are).
    report : the run's report, as written to report.json.
    warn : called as ``warn(what, exception)`` for each plot or page that fails
        (default: one line on stderr); the other files are still written.

    Returns
    -------
    The paths written, plots first and report.html last.
    """
    out_dir = Path(out_dir)
    written: list[Path] = []
    plots: dict[str, dict[str, Path]] = {}
    try:
        from streamq.report import plots as P
    except Exception as exc:  # matplotlib missing or broken: keep going without plots
        warn("plotting (matplotlib)", exc)
        P = None
    rate = float(report.get("sample_rate") or 48_000)
    for mid, meter in (report.get("meters") or {}).items():
        if not isinstance(meter, dict) or P is None:
            continue
        names = plot_names(mid)
        mine: dict[str, Path] = {}

        def attempt(kind: str, fn) -> None:
            try:
                p = fn(out_dir / names[kind])
            except Exception as exc:
                warn(f"plot {names[kind]}", exc)
                return
            if p is not None:
                mine[kind] = Path(p)
                written.append(Path(p))

        attempt("codebooks", lambda path: P.plot_codebooks(mid, meter, rate, path))
        series_name = meter.get("series_csv")
        if series_name and (out_dir / series_name).is_file():
            attempt("snr", lambda path: P.plot_snr(
                mid, meter, P.read_csv_columns(out_dir / series_name), path))
        spec_name = meter.get("spectrum_csv")
        if spec_name and (out_dir / spec_name).is_file():
            attempt("spectrum", lambda path: P.plot_spectrum(
                mid, meter, P.read_csv_columns(out_dir / spec_name), path))
        plots[mid] = mine
    try:
        from streamq.report.page import render_html
        from streamq.engine.audiofile import replacing
        page = out_dir / "report.html"
        with replacing(page) as f:
            f.write(render_html(report, plots))
        written.append(page)
    except Exception as exc:
        warn("report.html", exc)
    return written
