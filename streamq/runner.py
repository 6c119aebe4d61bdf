"""`streamq run`: load, build and run a graph, then print a short summary."""

from __future__ import annotations

import contextlib
import re
import sys
import time
from pathlib import Path

from streamq.chain import Chain
from streamq.engine import checkpoint
from streamq.engine.graph import Graph, load_graph
from streamq.engine.scheduler import RunResult
from streamq.errors import StreamqError

EXIT_OK, EXIT_INTERRUPTED = 0, 130


def default_out_dir(graph: Graph) -> Path:
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "-", graph.name).strip("-.") or "graph"
    return Path("streamq-out") / safe


def prepare_out_dir(out: Path) -> Path:
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StreamqError(f"{out}: cannot create the output folder ({exc.strerror or exc})") from None
    probe = out / ".streamq-write-test"
    try:
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise StreamqError(f"{out}: output folder is not writable ({exc.strerror or exc})") from None
    return out


def speed_text(speed: float) -> str:
    """A speed as a multiple of real time: ``1,234x``, ``42x``, ``0.75x``."""
    if speed == float("inf"):
        return "inf x"
    return f"{speed:,.0f}x" if speed >= 10 else f"{speed:.2g}x"


class Progress:
    """A progress bar (tqdm) showing audio position, speed as a multiple of
    real time and time left. It appears only after two seconds, and not at
    all when quiet or when stderr is not a terminal."""

    def __init__(self, total_frames: int, rate: int, quiet: bool, label: str):
        self.rate = rate
        self.bar = None
        self.t0 = time.perf_counter()
        if quiet or not sys.stderr.isatty():
            return
        from tqdm import tqdm
        self.bar = tqdm(total=round(total_frames / rate, 1), desc=label, delay=2.0, leave=False,
                        unit="s", dynamic_ncols=True,
                        bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.1f}/{total:.1f} s audio"
                                   "{postfix} [{remaining} left]")

    def __call__(self, done: int, total: int | None) -> None:
        if self.bar is None:
            return
        elapsed = max(time.perf_counter() - self.t0, 1e-9)
        self.bar.set_postfix_str(f"{speed_text(done / self.rate / elapsed)} real time",
                                 refresh=False)
        self.bar.update(round(done / self.rate, 1) - self.bar.n)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def summary_lines(result: RunResult) -> list[str]:
    rep = result.report
    audio = rep["audio_seconds"]
    speed = audio / result.seconds if result.seconds > 0 else float("inf")
    state = "done" if result.complete else f"stopped early at sample {rep['last_sample']}"
    lines = [f"{rep['graph']}: {state}: {audio:.2f} s of audio in {result.seconds:.2f} s "
             f"({speed_text(speed)} real time); output in {result.out_dir}/"]
    for nid, m in rep.get("meters", {}).items():
        def f(key, fmt="{:.2f}"):
            v = m.get(key)
            return "n/a" if v is None else fmt.format(v)
        lines.append(f"  {nid}: SNR {f('snr_db')} dB, segmental SNR {f('segsnr_db')} dB, "
                     f"{f('bits_per_sample', '{:.3f}')} bits/sample "
                     f"(side info {f('side_info_bits_per_sample', '{:.4f}')}), "
                     f"{m.get('codebook_updates', 0)} codebook updates")
    for nid, o in rep.get("outputs", {}).items():
        if "path" in o:
            lines.append(f"  {nid}: wrote {o['path']} ({o.get('frames', 0)} frames)")
    return lines


def release_memory() -> None:
    """Collect garbage and hand freed heap pages back to the system (glibc's
    ``malloc_trim``; a no-op elsewhere), so that what a finished run freed does
    not add to the peak of what comes next."""
    import ctypes
    import gc
    gc.collect()
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):   # not glibc
        pass


def write_report_pages(out_dir: Path, report: dict) -> list[Path]:
    """Plots and report.html after a run (complete or not). A failure here only
    warns: report.json is already on disk and stays as it is."""
    try:
        from streamq.report import write_report_files
        return write_report_files(out_dir, report)
    except Exception as exc:
        msg = " ".join(str(exc).split()) or type(exc).__name__
        print(f"streamq: warning: plots and report.html not written ({msg[:200]})", file=sys.stderr)
        return []


PLOTS_PER_METER = 3


def plot_workers(graph_file) -> "contextlib.AbstractContextManager":
    """The helper processes that will draw an offline run's plots (one per
    core, at most one per plot; see :class:`streamq.report.PlotWorkers`), as
    a context manager. They start before the graph is loaded, so that their
    matplotlib imports overlap the loading and the run; the graph file is only
    glanced at for its meters (``error-meter`` nodes). None for a live graph,
    a graph without meters or a file that does not read: its plots, if any,
    are then drawn in this process, as always."""
    import tomllib
    try:
        with open(graph_file, "rb") as f:
            nodes = tomllib.load(f).get("nodes") or {}
        uses = [n.get("use") for n in nodes.values() if isinstance(n, dict)]
        meters = uses.count("error-meter")
        if not meters or any(isinstance(u, str) and u.startswith("live-") for u in uses):
            return contextlib.nullcontext()
        from streamq.report import PlotWorkers
        return PlotWorkers(PLOTS_PER_METER * meters)
    except Exception:            # no helpers: the plots are drawn here, as always
        return contextlib.nullcontext()


def run_graph_file(args) -> int:
    # the plots' helper processes start first: they load matplotlib while the graph
    # loads and runs
    with plot_workers(args.graph):
        return _run_graph_file(args)


def _run_graph_file(args) -> int:
    graph = load_graph(args.graph, args.overrides, precheck=True)
    live = any(n.live_only for n in graph.nodes.values())
    if not live and getattr(args, "seconds", None) is not None:
        raise StreamqError(f"--seconds {args.seconds:g}: only live runs stop after a time; "
                           f"'{graph.name}' runs offline to the end of its sources (shorten a "
                           f"test-signal with --set NODE.seconds=...)")
    resume = getattr(args, "resume", False)
    if live and resume:
        raise StreamqError(f"--resume: only offline runs resume; '{graph.name}' runs live")
    out = prepare_out_dir(Path(args.out) if args.out else default_out_dir(graph))
    if live:
        from streamq.live.runner import run_live
        return run_live(graph, out, args)
    # an offline run is a chain its file sources drive, run to the end in this thread
    chain = Chain(graph, out, overrides=args.overrides)
    chain.open(resume=resume)
    bar = Progress(chain.length, chain.sample_rate, getattr(args, "quiet", False), graph.name)
    try:
        report = chain.run(block=args.block, progress=bar, handle_signals=True,
                           checkpoint_every=checkpoint.every())
    finally:
        bar.close()
    result = RunResult(report["complete"], report["samples"], chain.wall_seconds, report, out)
    # the nodes' buffers and series are in the files and the report now: let them
    # go before plotting, which is when an hours-long run's memory peaks
    del chain
    release_memory()
    if not getattr(args, "quiet", False) or not result.complete:
        for line in summary_lines(result):
            print(line)
    written = write_report_pages(out, report)
    if written and not getattr(args, "quiet", False):
        print(f"  report: {written[-1]}" if written[-1].suffix == ".html" else
              f"  plots: {len(written)} files")
    if not result.complete:
        print(f"streamq: interrupted at sample {result.samples}; outputs so far are closed and "
              f"valid, report marked incomplete", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_OK
