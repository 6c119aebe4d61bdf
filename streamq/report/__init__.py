"""Reporting: plots and the HTML page made from a run's report.json and the
meters' CSV files, and the ``streamq compare`` command.

:func:`write_report_files` is called after every ``streamq run`` (also after
an interrupted one, with whatever the meters wrote). It never raises for a
plotting problem: each failure becomes a one-line warning on stderr, so the
report.json that is already on disk is never lost.

Inside ``with PlotWorkers(n):`` the plots are drawn by ``n`` helper processes,
side by side; ``streamq run`` starts them before the graph runs, so that
importing matplotlib and loading its fonts overlap the run. The pictures are
the same either way: each plot is the same function of the same data.
"""

from __future__ import annotations

import contextvars
import os
import sys
from pathlib import Path
from typing import Any, Callable

__all__ = ["write_report_files", "plot_names", "PlotWorkers"]

# the helper processes of the ``with PlotWorkers(...)`` block in force, if any
_WORKERS: contextvars.ContextVar = contextvars.ContextVar("streamq_plot_workers", default=None)


def plot_names(meter_id: str) -> dict[str, str]:
    """File names of one meter's plots."""
    return {"codebooks": f"{meter_id}-codebooks.png", "snr": f"{meter_id}-snr.png",
            "spectrum": f"{meter_id}-spectrum.png"}


def _warn(what: str, exc: BaseException) -> None:
    kind = exc.kind if isinstance(exc, PlotFailed) else type(exc).__name__
    msg = " ".join(str(exc).split()) or kind
    print(f"streamq: warning: {what} failed ({kind}: {msg[:200]})", file=sys.stderr)


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
    meters = report.get("meters") or {}
    # every plot to draw, in the order of the written list: (meter, kind, CSV name)
    todo: list[tuple[str, str, str | None]] = []
    for mid, meter in meters.items():
        if not isinstance(meter, dict) or P is None:
            continue
        plots[mid] = {}
        todo.append((mid, "codebooks", None))
        for kind, key in (("snr", "series_csv"), ("spectrum", "spectrum_csv")):
            name = meter.get(key)
            if name and (out_dir / name).is_file():
                todo.append((mid, kind, name))
    workers = _WORKERS.get()
    futures = [workers.submit(_draw_portable, kind, mid, meters[mid], rate, out_dir, csv)
               if workers is not None else None for mid, kind, csv in todo]
    for (mid, kind, csv), future in zip(todo, futures):
        name = plot_names(mid)[kind]
        try:
            drawn = False
            if future is not None:
                try:
                    ok, p = future.result()
                    drawn = True
                except Exception:        # the helper process failed, not the plot: draw here
                    pass
                if drawn and not ok:
                    raise p
            if not drawn:
                p = _draw(kind, mid, meters[mid], rate, out_dir, csv)
        except Exception as exc:
            warn(f"plot {name}", exc)
            continue
        if p is not None:
            plots[mid][kind] = Path(p)
            written.append(Path(p))
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


def _draw(kind: str, mid: str, meter: dict[str, Any], rate: float, out_dir: Path,
          csv: str | None) -> Path | None:
    """Draw one plot of one meter (``kind`` as in :func:`plot_names`); raises
    what the plot raises."""
    from streamq.report import plots as P
    path = Path(out_dir) / plot_names(mid)[kind]
    if kind == "codebooks":
        return P.plot_codebooks(mid, meter, rate, path)
    columns = P.read_csv_columns(Path(out_dir) / csv)
    if kind == "snr":
        return P.plot_snr(mid, meter, columns, path)
    return P.plot_spectrum(mid, meter, columns, path)


class PlotFailed(Exception):
    """A plot's exception as it travels back from a helper process: its type's
    name (``kind``) and its message (any exception travels, picklable or not)."""

    def __init__(self, kind: str, message: str):
        super().__init__(message)
        self.kind = kind

    def __reduce__(self):
        return (PlotFailed, (self.kind, str(self)))


def _draw_portable(*args) -> tuple[bool, Any]:
    """:func:`_draw` in a helper process: ``(True, path)``, or ``(False,
    PlotFailed)`` when the plot raised, so that a failing plot is told apart
    from a failing process."""
    try:
        return True, _draw(*args)
    except Exception as exc:
        return False, PlotFailed(type(exc).__name__, str(exc))


def _start_worker() -> None:
    """A helper process's start: leave Ctrl-C to the run, end with the run
    (a run killed outright must not leave its helpers waiting for ever), then
    import matplotlib and load the fonts (what the first plot would pay)."""
    import os
    import signal
    import threading
    import time
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    parent = os.getppid()

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(0.5)
        os._exit(0)

    threading.Thread(target=watch, name="streamq-plot-watch", daemon=True).start()
    from streamq.report import plots as P
    P.warm_up()


def _nothing() -> None:
    return None


def available_cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


class PlotWorkers:
    """Helper processes that draw a run's plots side by side.

    Started before a run (they import matplotlib and load its fonts while the
    run computes), used by :func:`write_report_files` inside ``with``, stopped
    at the end of the block. The processes are forked, so they see the modules
    as the caller has them. Where forking is not possible, or with fewer than
    two plots or cores, there are no helpers and the plots are drawn in the
    calling process as always; a helper that fails has its plots drawn there too.

    Parameters
    ----------
    plots : int
        How many plots the run will draw (at most this many helpers start).
    limit : int
        At most this many helpers (default 4; never more than the cores).
    """

    def __init__(self, plots: int, limit: int = 4):
        self.pool = None
        self._token = None
        count = min(plots, limit, available_cores())
        if count < 2:
            return
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor
        try:
            context = multiprocessing.get_context("fork")
            sys.stdout.flush()
            sys.stderr.flush()
            self.pool = ProcessPoolExecutor(count, mp_context=context, initializer=_start_worker)
            self.pool.submit(_nothing)    # start the processes now
        except (ValueError, OSError, RuntimeError):
            self.close()

    def submit(self, fn, *args):
        """Run ``fn(*args)`` in a helper: a future, or None when the helpers
        are gone (the caller then runs it itself)."""
        try:
            return self.pool.submit(fn, *args) if self.pool is not None else None
        except Exception:        # a broken or closed pool
            return None

    def __enter__(self) -> "PlotWorkers":
        if self.pool is not None:
            self._token = _WORKERS.set(self)
        return self

    def __exit__(self, *exc) -> None:
        self.close(wait=exc[0] is None)

    def close(self, wait: bool = True) -> None:
        """Stop the helpers (without waiting when the run was cut short)."""
        if self._token is not None:
            _WORKERS.reset(self._token)
            self._token = None
        if self.pool is not None:
            pool, self.pool = self.pool, None
            if not wait:         # a failed run: nothing to draw, stop the helpers now
                for process in list((getattr(pool, "_processes", None) or {}).values()):
                    process.terminate()
            # (waited for either way: terminated helpers end at once, and a pool left
            # to itself has its wake-up pipe closed under it at interpreter exit)
            pool.shutdown(wait=True, cancel_futures=True)
