"""The coordinating side of `streamq batch`: check the graph, list the inputs,
skip what is done, hand the rest to an engine, gather the results.

Ctrl-C (or SIGTERM) asks for a clean stop: files not started are dropped,
running ones stop at their next step boundary (each worker looks for a stop
file in the output folder), their outputs are closed and their reports
marked incomplete, the summary is written and the exit status is 130. A
second Ctrl-C ends the workers at once.
"""

from __future__ import annotations

import queue
import signal
import sys
import time
import uuid
from concurrent.futures import CancelledError
from pathlib import Path
from typing import Any

from streamq.batch.inputs import expand_inputs, folder_name
from streamq.batch.summary import audio_duration, file_entry, write_summary
from streamq.batch.work import is_done, needs_pages, one_line, setup_key
from streamq.engine.graph import Graph, parse_graph
from streamq.errors import StreamqError

EXIT_OK, EXIT_SOME_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130
POLL = 0.1


def pick_batch_input(graph: Graph) -> str:
    """The id of the file-source the inputs are bound to."""
    label = str(graph.source) if graph.source else "<graph>"
    chosen = graph.header.batch_input
    if chosen is not None:
        node = graph.nodes.get(chosen)
        if node is None or node.kind != "file-source":
            kind = node.kind if node is not None else "?"
            raise StreamqError(f"{label}: [graph], field 'batch_input': node '{chosen}' is a "
                               f"'{kind}'; name a file-source node")
        return chosen
    sources = [nid for nid in graph.order if graph.nodes[nid].kind == "file-source"]
    if not sources:
        raise StreamqError(f"{label}: the graph has no file-source to bind the batch inputs to")
    if len(sources) > 1:
        raise StreamqError(f"{label}: the graph has {len(sources)} file-sources "
                           f"({', '.join(sources)}); set batch_input in [graph] to the one that "
                           f"reads the batch inputs")
    return sources[0]


def check_graph(graph: Graph, node: str, overrides: list[str]) -> None:
    """Refuse graphs that cannot run once per file."""
    label = str(graph.source) if graph.source else "<graph>"
    for item in overrides:
        key = item.split("=", 1)[0].strip()
        if key == f"{node}.path":
            raise StreamqError(f"--set {item!r}: node '{node}' reads the batch inputs; its path "
                               f"comes from --inputs")
    for nid in graph.order:
        n = graph.nodes[nid]
        if n.live_only:
            raise StreamqError(f"{label}: node '{nid}': kind '{n.kind}' needs a live run; a batch "
                               f"runs offline")
        path = getattr(n.config, "path", None)
        if n.role == "sink" and isinstance(path, str) and Path(path).expanduser().is_absolute():
            raise StreamqError(f"{label}: node '{nid}', field 'path': {path} is absolute, so every "
                               f"file of the batch would write it; give a relative path (it lands "
                               f"in each file's own folder)")


def _speed(x: float) -> str:
    return f"{x:,.1f}x" if x < 10 else f"{x:,.0f}x"


class BatchProgress:
    """The batch's progress bar: files done / total, audio processed and speed as
    a multiple of real time.

    It is drawn with tqdm on stderr, reading for example
    ``archive: 4/6 files, 12.5 s audio, 3.9x real time |####  | [00:02, 00:01 left]``
    (audio in s, min or h as :func:`audio_duration` gives it). Like the bar of
    ``streamq run``, nothing is shown when ``quiet`` or when stderr is not a
    terminal: logs get the summary lines at the end, not a progress trace.

    Parameters
    ----------
    total : int
        Number of input files.
    initial : int
        Files already done by an earlier run (counted as done from the start).
    quiet : bool
        No bar at all.
    label : str
        Shown before the counts (the graph's name).
    """

    def __init__(self, total: int, initial: int, quiet: bool, label: str):
        self.bar = None
        self.audio = 0.0
        self.t0 = time.perf_counter()
        if quiet or not sys.stderr.isatty():
            return
        from tqdm import tqdm
        self.bar = tqdm(total=total, initial=initial, desc=label, unit="file", leave=False,
                        dynamic_ncols=True,
                        bar_format="{desc}: {n_fmt}/{total_fmt} files{postfix} |{bar}| "
                                   "[{elapsed}, {remaining} left]")
        self.bar.set_postfix_str(f"{audio_duration(0.0)} audio", refresh=True)

    def file_done(self, audio_seconds: float) -> None:
        """Count one more file finished (or failed, with ``audio_seconds`` 0)."""
        self.audio += audio_seconds
        if self.bar is None:
            return
        elapsed = max(time.perf_counter() - self.t0, 1e-9)
        self.bar.set_postfix_str(f"{audio_duration(self.audio)} audio, "
                                 f"{_speed(self.audio / elapsed)} real time", refresh=False)
        self.bar.update(1)

    def note(self, text: str) -> None:
        if self.bar is not None:
            self.bar.write(text, file=sys.stderr)
        else:
            print(text, file=sys.stderr)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def finished_jobs(done_q: "queue.Queue", submitted: int, stop, stop_file: Path, engine, bar,
                  what: str):
    """(job, future) of each submitted job as it finishes, in completion order.
    At the first stop request the jobs not started are cancelled and the running
    ones told (``stop_file``) to stop at the end of their current step; ``what``
    names them in the note that says so."""
    stopping = False
    received = 0
    while received < submitted:
        if stop.requests and not stopping:
            stopping = True
            stop_file.touch()
            engine.cancel_pending()
            bar.note(f"streamq: stopping: finishing the current step of the running {what} "
                     f"(Ctrl-C again to stop at once)")
        try:
            yield done_q.get(timeout=POLL)
        except queue.Empty:
            continue
        received += 1


def stopped_by_request(res: dict, stop) -> dict:
    """A job whose worker failed after a stop request (a worker that got the
    terminal's Ctrl-C too) counts as interrupted, not failed."""
    if stop.requests and res["status"] == "failed" and \
            str(res["error"]).startswith("worker failed"):
        res.update(status="interrupted", error="stopped: " + res["error"])
    return res


class _signals_held:
    """Block SIGINT/SIGTERM in this thread (and so in the processes it starts)
    for the duration; a signal that came meanwhile is handled on exit."""

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __enter__(self):
        self.ok = hasattr(signal, "pthread_sigmask")
        if self.ok:
            # multiprocessing's resource tracker unblocks these signals after
            # starting its own process: start it first, outside the block.
            try:
                from multiprocessing import resource_tracker
                resource_tracker.ensure_running()
            except Exception:
                pass
            self.old = signal.pthread_sigmask(signal.SIG_BLOCK, self.SIGNALS)
        return self

    def __exit__(self, *exc):
        if self.ok:
            signal.pthread_sigmask(signal.SIG_SETMASK, self.old)
        return False


def _result_of(job: dict[str, Any], fut) -> dict[str, Any]:
    base = {"input": job["input"], "folder": job["folder"], "samples": 0, "audio_seconds": 0.0,
            "seconds": 0.0}
    try:
        return fut.result()
    except CancelledError:
        return {**base, "status": "not run", "error": None}
    except Exception as exc:  # the worker itself died (crash, out of memory, lost node)
        return {**base, "status": "failed", "error": f"worker failed: {one_line(exc)}"}


def run_batch(args) -> int:
    from streamq.batch.engines import parse_cluster_address
    from streamq.runner import prepare_out_dir

    overrides = list(getattr(args, "overrides", []) or [])
    graph_path = Path(args.graph).expanduser()
    try:
        text = graph_path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise StreamqError(f"{graph_path}: no such graph file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise StreamqError(f"{graph_path}: cannot read graph file: {exc}") from None
    graph_path = graph_path.resolve()
    graph = parse_graph(text, graph_path, overrides)
    node = pick_batch_input(graph)
    check_graph(graph, node, overrides)
    if args.workers is not None and args.workers < 1:
        raise StreamqError(f"--workers {args.workers}: give at least 1")
    if args.cluster is not None:
        if args.workers is not None:
            raise StreamqError("give --workers (local pool) or --cluster, not both")
        parse_cluster_address(args.cluster)
    out = prepare_out_dir(Path(args.out).expanduser()).resolve()
    inputs = expand_inputs(list(args.inputs), exclude=out)
    quiet = bool(getattr(args, "quiet", False))
    pages = bool(getattr(args, "pages", False))

    setup = setup_key(text, overrides, node)
    files_dir = out / "files"
    run_id = uuid.uuid4().hex[:10]
    stop_file = out / f".stop-{run_id}"
    states: dict[str, dict[str, Any]] = {}
    jobs: list[dict[str, Any]] = []
    page_jobs: list[dict[str, Any]] = []  # --pages for files an earlier run finished
    for inp in inputs:
        folder = files_dir / folder_name(inp)
        job = {"graph_text": text, "graph_file": str(graph_path), "overrides": overrides,
               "node": node, "input": str(inp), "folder": str(folder), "setup": setup,
               "stop_file": str(stop_file), "run_id": run_id, "pages": pages}
        if is_done(folder, inp, setup):
            states[str(inp)] = {"status": "done", "error": None, "reused": True,
                                "folder": str(folder)}
            if pages and needs_pages(folder):
                page_jobs.append({**job, "pages_only": True})
            continue
        states[str(inp)] = {"status": "not run", "error": None, "reused": False,
                            "folder": str(folder)}
        jobs.append(job)
    reused = len(inputs) - len(jobs)

    with _StopRequests() as stop:
        run = _run_jobs(jobs + page_jobs, states, args, stop,
                        BatchProgress(len(inputs), reused, quiet, graph.name), stop_file)
        stop.hard = False  # from here on a Ctrl-C changes nothing: finish the summary
        for inp in inputs:  # finished, but not heard of before a hard stop
            st = states[str(inp)]
            if st["status"] == "not run" and is_done(Path(st["folder"]), inp, setup):
                st["status"] = "done"
        entries = [file_entry(str(inp), states[str(inp)]["folder"], states[str(inp)]["status"],
                              states[str(inp)]["error"], states[str(inp)]["reused"])
                   for inp in inputs]
        counts: dict[str, int] = {}
        for e in entries:
            counts[e["status"]] = counts.get(e["status"], 0) + 1
        done_audio = sum(e["audio_seconds"] or 0.0 for e in entries if e["status"] == "done")
        head = {"graph": graph.name, "graph_file": str(graph_path), "batch_input": node,
                "overrides": overrides, "engine": run["engine"], "out_dir": str(out),
                "complete": counts.get("done", 0) == len(entries), "files_total": len(entries),
                "counts": counts, "reused": reused, "audio_seconds_done": done_audio,
                "pages": pages,
                "this_run": {"files_run": len(jobs), "pages_only": len(page_jobs),
                             "audio_seconds": run["audio"], "wall_seconds": run["wall"]}}
        paths = write_summary(out, head, entries)
        failed = [e for e in entries if e["status"] == "failed"]
        # A stop that came after the last file finished changed nothing.
        stopped = bool(stop.requests) and counts.get("done", 0) + len(failed) < len(entries)
        if not quiet:
            _print_summary(head, paths, stopped)
        _print_failures(failed, paths[0])
        if stopped:
            print(f"streamq: interrupted; {counts.get('done', 0)} finished files are kept, run the "
                  f"same command again to do the rest", file=sys.stderr)
            return EXIT_INTERRUPTED
        return EXIT_SOME_FAILED if failed else EXIT_OK


class _StopRequests:
    """SIGINT/SIGTERM handling for the whole batch: the first signal asks for a
    clean stop; another one, while ``hard`` is set, raises KeyboardInterrupt."""

    def __init__(self):
        self.requests: list[int] = []
        self.hard = True
        self.old: dict = {}

    def _on_signal(self, signum, frame):
        if self.requests and self.hard:
            raise KeyboardInterrupt
        self.requests.append(signum)

    def __enter__(self):
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                self.old[sig] = signal.signal(sig, self._on_signal)
            except ValueError:  # not the main thread: no signal handling
                pass
        return self

    def __exit__(self, *exc):
        for sig, h in self.old.items():
            signal.signal(sig, h)
        return False


def _run_jobs(jobs, states, args, stop: _StopRequests, bar: BatchProgress,
              stop_file: Path) -> dict[str, Any]:
    """Run ``jobs`` on the chosen engine, updating ``states``; returns the engine's
    name, the audio seconds done and the wall time.

    Jobs marked ``pages_only`` (plots and report.html for files an earlier run
    finished) leave the file's state and the progress counts alone; any of
    their problems, like those of ``--pages`` for files run now, become
    warning lines.
    """
    from streamq.batch.engines import make_engine
    engine = None
    engine_name = "none (every file already done)"
    killed = False
    audio = 0.0
    t0 = time.perf_counter()
    try:
        if jobs:
            done_q: queue.Queue = queue.Queue()
            submitted = 0
            # Worker processes started now inherit a blocked Ctrl-C, so a Ctrl-C
            # in the terminal (sent to the whole process group) reaches only this
            # process, which then stops the workers cleanly; it is handled here
            # as soon as the workers are started.
            with _signals_held():
                try:
                    engine = make_engine(args.workers, args.cluster, len(jobs))
                    n_workers = engine.check_workers([jobs[0]["graph_file"], str(stop_file.parent)])
                    engine_name = engine.describe()
                    for job in jobs:
                        engine.submit(job, done_q)
                        submitted += 1
                except StreamqError:
                    raise
                except Exception as exc:
                    raise StreamqError(f"cannot start the batch workers: {one_line(exc)}") from None
            if n_workers == 0:
                bar.note(f"streamq: {engine_name} has no workers yet; the files wait for some")
            for job, fut in finished_jobs(done_q, submitted, stop, stop_file, engine, bar,
                                          "files"):
                res = _result_of(job, fut)
                for w in res.get("page_warnings") or []:
                    bar.note(f"streamq: warning: {job['input']}: {w}")
                if job.get("pages_only"):
                    if res["status"] == "failed":
                        bar.note(f"streamq: warning: {job['input']}: plots and report.html not "
                                 f"written ({res['error']})")
                    continue
                stopped_by_request(res, stop)
                states[job["input"]].update(status=res["status"], error=res.get("error"))
                if res["status"] == "done":
                    audio += float(res.get("audio_seconds") or 0.0)
                    bar.file_done(float(res.get("audio_seconds") or 0.0))
                elif res["status"] == "failed":
                    bar.file_done(0.0)
    except KeyboardInterrupt:  # asked twice: stop at once
        killed = True
        if engine is not None:
            engine.kill()
    finally:
        bar.close()
        if engine is not None and not killed:
            engine.close()
        try:
            stop_file.unlink()
        except OSError:
            pass
    return {"engine": engine_name, "audio": audio, "wall": time.perf_counter() - t0}


def _print_summary(head: dict[str, Any], paths: list[Path], stopped: bool) -> None:
    import json
    counts, run = head["counts"], head["this_run"]
    failed = counts.get("failed", 0)
    unfinished = counts.get("interrupted", 0) + counts.get("not run", 0)
    speed = run["audio_seconds"] / run["wall_seconds"] if run["wall_seconds"] > 0 else 0.0
    print(f"{head['graph']}: {counts.get('done', 0)} of {head['files_total']} files done "
          f"({head['reused']} from an earlier run), {failed} failed"
          + (f", {unfinished} not finished" if stopped else "")
          + f"; {audio_duration(run['audio_seconds'])} of audio run in {run['wall_seconds']:.1f} s "
            f"({_speed(speed)} real time) on {head['engine']}")
    tot = json.loads(paths[1].read_text(encoding="utf-8"))["totals"]
    for mid, t in tot.items():
        def f(key, fmt="{:.2f}"):
            v = t.get(key)
            return "n/a" if v is None else fmt.format(v)
        print(f"  {mid}: SNR {f('snr_db')} dB pooled over all files (per file {f('snr_db_min')} to "
              f"{f('snr_db_max')} dB, median {f('snr_db_median')}), segmental SNR "
              f"{f('segsnr_db')} dB, {f('bits_per_sample', '{:.3f}')} bits/sample")
    print(f"  summary: {', '.join(str(p) for p in paths)}")


def _print_failures(failed: list[dict[str, Any]], table: Path) -> None:
    if not failed:
        return
    print(f"streamq: {len(failed)} file(s) failed:", file=sys.stderr)
    for e in failed[:20]:
        err = e["error"] or "unknown error"
        print(f"  {err if e['input'] in err else e['input'] + ': ' + err}", file=sys.stderr)
    if len(failed) > 20:
        print(f"  ... and {len(failed) - 20} more (see {table})", file=sys.stderr)
