"""One file of a batch, as run inside a worker (a pool process or a Dask worker).

:func:`process_file` binds the graph's batch input to the file, builds and
runs the graph into the file's own folder (``report.json`` and the graph's
outputs), and writes the folder's marker, ``batch.json``: the input's size
and modification time as they were when the run started, a fingerprint of
the graph setup, and how the run ended. A later batch skips the file when
the marker says "done", the report is complete, and neither the input nor
the setup has changed since. With ``pages`` set in the job, a finished file
also gets the plots and report.html that ``streamq run`` writes
(:func:`streamq.report.write_report_files`); a job with ``pages_only`` writes
just those for a file finished earlier.

Nothing here touches module-level state: a Dask worker may run several files
at once in threads.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import signal
import time
import tomllib
from pathlib import Path
from typing import Any

from streamq.engine.audiofile import replacing
from streamq.engine.graph import Graph, validate_graph
from streamq.engine.scheduler import Interrupted
from streamq.errors import StreamqError

MARKER = "batch.json"
REPORT = "report.json"
#: How often (seconds) a running file looks for the batch's stop request.
STOP_POLL = 0.2


def setup_key(graph_text: str, overrides: list[str], node: str) -> str:
    """Fingerprint of what decides a file's results besides the file itself."""
    h = hashlib.sha256()
    for part in (graph_text, json.dumps(list(overrides)), node):
        h.update(part.encode("utf-8", "surrogateescape"))
        h.update(b"\0")
    return h.hexdigest()[:16]


def input_stamp(path: Path) -> tuple[int, int] | None:
    """(size in bytes, modification time in ns) of an input, or None when it is missing."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def read_json(path: Path) -> dict[str, Any] | None:
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def is_done(folder: Path, input_path: Path, setup: str) -> bool:
    """Whether ``folder`` holds a finished run of ``input_path`` under this setup,
    made from the input as it is now (same size and modification time)."""
    marker = read_json(Path(folder) / MARKER)
    if not marker or marker.get("status") != "done" or marker.get("setup") != setup:
        return False
    if marker.get("input") != str(input_path):
        return False
    stamp = input_stamp(input_path)
    if stamp is None or [marker.get("size"), marker.get("mtime_ns")] != list(stamp):
        return False
    report = read_json(Path(folder) / REPORT)
    return bool(report and report.get("complete") is True)


def bind_graph(graph_text: str, graph_file: Path, overrides: list[str], node: str,
               input_path: Path) -> Graph:
    """The graph with file-source ``node`` reading ``input_path``.

    The path goes straight into the parsed TOML, so no quoting of file names
    is involved; ``--set`` overrides are applied after it.
    """
    raw = tomllib.loads(graph_text)
    raw["nodes"][node]["path"] = str(input_path)
    return validate_graph(raw, Path(graph_file), list(overrides))


def one_line(exc: BaseException) -> str:
    """An exception as a single line (GraphError may list several problems)."""
    text = "; ".join(line.strip() for line in str(exc).splitlines() if line.strip())
    if isinstance(exc, StreamqError):
        return text or type(exc).__name__
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _write_json(path: Path, data: dict[str, Any]) -> None:
    with replacing(path) as f:
        f.write(json.dumps(data, indent=2) + "\n")


def _remove(path: Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


PAGE = "report.html"
_NODE_ID = re.compile(r"[A-Za-z0-9_-]+")


def needs_pages(folder: Path) -> bool:
    """Whether a finished file's folder lacks the plots and report.html of ``--pages``."""
    return not (Path(folder) / PAGE).is_file()


def write_pages(folder: Path, report: dict[str, Any]) -> list[str]:
    """Write the plots and report.html of one file's run into its folder.

    Parameters
    ----------
    folder : Path
        The file's output folder (report.json and the meters' CSV files).
    report : dict
        The run's report, as in the folder's report.json.

    Returns
    -------
    list of str
        One line per plot or page that could not be written (empty when all
        were). A failure here never changes the file's results or status.
    """
    problems: list[str] = []

    def warn(what: str, exc: BaseException) -> None:
        problems.append(f"{what} not written ({one_line(exc)})")

    try:
        from streamq.report import write_report_files
        write_report_files(folder, report, warn=warn)
    except Exception as exc:
        warn("plots and report.html", exc)
    return problems


def _remove_pages(folder: Path) -> None:
    """Remove the plots and report.html an earlier run of this folder wrote."""
    from streamq.report import plot_names
    old = read_json(folder / REPORT) or {}
    meters = old.get("meters")
    for mid in (meters if isinstance(meters, dict) else {}):
        if isinstance(mid, str) and _NODE_ID.fullmatch(mid):  # node ids only: stay in the folder
            for name in plot_names(mid).values():
                _remove(folder / name)
    _remove(folder / PAGE)


def _pages_only(job: dict[str, Any]) -> dict[str, Any]:
    """Plots and report.html for a file an earlier run finished (its results stay as they are)."""
    inp, folder = Path(job["input"]), Path(job["folder"])
    out: dict[str, Any] = {"input": str(inp), "folder": str(folder), "status": "not run",
                           "error": None, "samples": 0, "audio_seconds": 0.0, "seconds": 0.0,
                           "pages_only": True, "page_warnings": []}
    if Path(job["stop_file"]).exists():
        return out
    t0 = time.perf_counter()
    report = read_json(folder / REPORT)
    if report is None:
        out["page_warnings"] = [f"{folder / REPORT}: missing or unreadable; plots and "
                                f"report.html not written"]
    else:
        out["page_warnings"] = write_pages(folder, report)
    out["status"] = "done"
    out["seconds"] = time.perf_counter() - t0
    return out


class _StopCheck:
    """Progress callback for run_offline: stops the run at the next step
    boundary once the batch's stop file exists (checked every STOP_POLL s)."""

    def __init__(self, stop_file: Path):
        self.stop_file = stop_file
        self.next_check = time.monotonic() + STOP_POLL

    def __call__(self, done: int, total: int | None) -> None:
        now = time.monotonic()
        if now >= self.next_check:
            self.next_check = now + STOP_POLL
            if self.stop_file.exists():
                raise Interrupted("batch stop")


def process_file(job: dict[str, Any]) -> dict[str, Any]:
    """Run the batch graph over one input file; never raises for a bad file.

    Parameters
    ----------
    job : dict with ``graph_text``, ``graph_file``, ``overrides``, ``node`` (the
        batch-input file-source), ``input``, ``folder`` (this file's output folder),
        ``setup`` (see :func:`setup_key`) and ``stop_file``; optionally ``pages``
        (also write the plots and report.html when the file is done) or
        ``pages_only`` (write only those, for a file finished earlier).

    Returns
    -------
    dict with ``input``, ``folder``, ``status`` ("done", "failed", "interrupted"
    or "not run"), ``error`` (one line, or None), ``samples``, ``audio_seconds``,
    ``seconds`` (wall time) and ``cpu_seconds`` (CPU time of the thread that ran it);
    with ``pages`` or ``pages_only``, ``page_warnings`` (a list of one-line problems).
    """
    if job.get("pages_only"):
        return _pages_only(job)
    t0, c0 = time.perf_counter(), time.thread_time()
    inp, folder = Path(job["input"]), Path(job["folder"])
    out: dict[str, Any] = {"input": str(inp), "folder": str(folder), "status": "not run",
                           "error": None, "samples": 0, "audio_seconds": 0.0, "seconds": 0.0}
    stop_file = Path(job["stop_file"])
    if stop_file.exists():
        return out
    stamp = input_stamp(inp)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        # A stale marker or report must never make a new, unfinished run look done,
        # and an earlier run's plots and page must not sit beside new results.
        _remove(folder / MARKER)
        _remove_pages(folder)
        _remove(folder / REPORT)
    except OSError as exc:
        out.update(status="failed", error=f"{folder}: cannot prepare the output folder "
                                          f"({exc.strerror or exc})")
        return out
    try:
        graph = bind_graph(job["graph_text"], job["graph_file"], job["overrides"], job["node"], inp)
        from streamq.chain import Chain
        report = Chain(graph, folder).open().run(progress=_StopCheck(stop_file))
        out["samples"] = report["samples"]
        out["audio_seconds"] = float(report.get("audio_seconds", 0.0))
        if report["complete"]:
            if input_stamp(inp) != stamp:
                out.update(status="failed", error=f"{inp}: the file changed during the run")
            else:
                out["status"] = "done"
                if job.get("pages"):
                    out["page_warnings"] = write_pages(folder, report)
        else:
            out["status"] = "interrupted"
            out["error"] = f"stopped at sample {report['samples']}"
    except Exception as exc:  # one bad file must not stop the batch: record it
        out.update(status="failed", error=one_line(exc))
    out["seconds"] = time.perf_counter() - t0
    out["cpu_seconds"] = time.thread_time() - c0
    marker = {"input": str(inp), "size": stamp[0] if stamp else None,
              "mtime_ns": stamp[1] if stamp else None, "setup": job["setup"],
              "status": out["status"], "error": out["error"], "samples": out["samples"],
              "audio_seconds": out["audio_seconds"], "seconds": out["seconds"],
              "cpu_seconds": out["cpu_seconds"],
              "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
    try:
        _write_json(folder / MARKER, marker)
    except OSError as exc:
        out.update(status="failed", error=f"{folder / MARKER}: cannot write ({exc.strerror or exc})")
    return out


def missing_paths(paths: list[str]) -> list[str]:
    """The ``paths`` this machine cannot see (run on each Dask worker before a batch)."""
    return [p for p in paths if not os.path.exists(p)]


def ignore_sigint() -> None:
    """Pool-worker initializer: Ctrl-C in a terminal reaches every process of the
    group; the coordinator handles it and tells the workers to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
