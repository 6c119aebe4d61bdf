"""Building a graph into a runnable chain, and running it offline.

Offline runs read the sources in large steps (65,536 frames by default),
whatever the graph's live block size: every node keeps its schedules in
samples (DESIGN.md rule 1), so the step size cannot change any output.
"""

from __future__ import annotations

import json
import math
import os
import signal
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from streamq.engine.audiofile import replacing
from streamq.engine.background import BackgroundWriter
from streamq.engine.blocks import Packet, StreamSpec
from streamq.engine.graph import Graph, GraphError, infer_rate
from streamq.engine.node import Node, RunContext, SourceNode
from streamq.errors import StreamqError

REPLAY_BLOCK = 65_536


@dataclass
class BuiltGraph:
    graph: Graph
    ctx: RunContext
    specs: dict[str, StreamSpec | None]
    sources: list[str]
    length: int | None

    @property
    def nodes(self) -> dict[str, Node]:
        return self.graph.nodes


def build(graph: Graph, out_dir: Path | None, *, live: bool = False,
          offload: Callable[..., Any] | None = None, background: Callable[..., Any] | None = None,
          options: dict | None = None) -> BuiltGraph:
    """Open every node in order; collect every problem before giving up."""
    label = str(graph.source) if graph.source else "<graph>"
    rate = infer_rate(graph)
    ctx = RunContext(graph_file=graph.source, out_dir=None if out_dir is None else Path(out_dir),
                     sample_rate=rate,
                     live=live, offload=offload, background=background,
                     options=dict(options or {}))
    specs: dict[str, StreamSpec | None] = {}
    failed: set[str] = set()
    problems: list[str] = []
    for first, later, path in same_output_paths(graph, ctx):
        problems.append(f"{label}: nodes '{first}' and '{later}', field 'path': both write "
                        f"{path}; give each sink its own file")
        failed.add(later)  # not opened: it would share the first one's temporary file
    for nid in graph.order:
        node = graph.nodes[nid]
        ups = node.upstream()
        if nid in failed or any(ref in failed for ref in ups.values()):
            failed.add(nid)
            continue
        if node.live_only and not live:
            problems.append(f"{label}: node '{nid}': kind '{node.kind}' needs a live run")
            failed.add(nid)
            continue
        node.ctx = ctx
        silent = [f for f, ref in ups.items() if specs[ref] is None]
        if silent:   # a node without an output (a sink or meter kind from a plugin)
            problems.append(f"{label}: node '{nid}', field '{silent[0]}': node "
                            f"'{ups[silent[0]]}' has no output to read")
            failed.add(nid)
            continue
        try:
            spec = node.open({f: specs[ref] for f, ref in ups.items()}, ctx)
        except StreamqError as exc:
            problems.append(f"{label}: {exc}")
            failed.add(nid)
            continue
        node.spec = spec
        specs[nid] = spec
    if problems:
        for nid in graph.order:
            if nid in specs:
                try:
                    graph.nodes[nid].close(complete=False)
                except Exception:
                    pass
        raise GraphError(problems)
    sources = [nid for nid in graph.order if isinstance(graph.nodes[nid], SourceNode)]
    if not sources:
        raise GraphError([f"{label}: the graph has no source node"])
    lengths = [graph.nodes[s].length for s in sources]
    known = [n for n in lengths if n is not None]
    length = min(known) if known else None
    return BuiltGraph(graph, ctx, specs, sources, length)


def same_output_paths(graph: Graph, ctx: RunContext) -> list[tuple[str, str, Path]]:
    """Sinks that would write the same file.

    Parameters
    ----------
    graph : Graph
        The validated graph; sinks are nodes of role ``"sink"`` with a ``path`` field.
    ctx : RunContext
        Gives the output folder relative paths land in.

    Returns
    -------
    list of (str, str, Path)
        ``(first sink, later sink, path)`` in graph order, one per later sink.
        Paths are compared once resolved (``.``, ``..`` and links followed), so
        a relative and an absolute spelling of one file clash too.
    """
    seen: dict[Path, str] = {}
    clashes = []
    for nid in graph.order:
        node = graph.nodes[nid]
        path = getattr(node.config, "path", None)
        if node.role != "sink" or not isinstance(path, str):
            continue
        try:
            target = ctx.resolve_path(path)
        except StreamqError:   # no output folder: the sink itself says so when it opens
            continue
        try:
            key = target.resolve()
        except (OSError, RuntimeError):  # a loop of links, a name too long: compare as written
            key = Path(os.path.abspath(target))
        if key in seen:
            clashes.append((seen[key], nid, target))
        else:
            seen[key] = nid
    return clashes


@dataclass
class RunResult:
    complete: bool
    samples: int
    seconds: float
    report: dict[str, Any]
    out_dir: Path
    error: str | None = None


class Interrupted(BaseException):
    """Stops the step loop after SIGINT/SIGTERM.

    The first signal only sets a flag: the loop stops at the next step
    boundary, so every node has handled the same frames and the files and the
    report agree. A second signal raises at once. Like KeyboardInterrupt it
    derives from BaseException, so a node's ``except Exception`` (e.g. the
    file writer's clean-up on write errors) cannot mistake it for a failure.
    """


def _step_all(built: BuiltGraph, frames: int,
              behind: dict[str, BackgroundWriter] | None = None) -> dict[str, Packet | None]:
    outputs: dict[str, Packet | None] = {}
    nodes = built.graph.nodes
    for nid in built.graph.order:
        node = nodes[nid]
        ins = {f: outputs[ref] for f, ref in node.upstream().items()}
        if behind and nid in behind:
            behind[nid].put((frames, ins))
            outputs[nid] = None
        else:
            outputs[nid] = node.step(frames, ins)
    return outputs


#: blocks a node that runs behind may have waiting (memory bound)
BEHIND_QUEUE = 2


def _start_behind(built: BuiltGraph) -> dict[str, BackgroundWriter]:
    """Threads for the nodes that may step behind the rest of an offline run
    (``Node.runs_behind``) and that no other node reads from."""
    nodes = built.graph.nodes
    read = {ref for node in nodes.values() for ref in node.upstream().values()}
    return {nid: BackgroundWriter(lambda item, node=node: node.step(*item),
                                  name=f"streamq-{nid}", limit=BEHIND_QUEUE)
            for nid, node in nodes.items() if node.runs_behind and nid not in read}


def _catch_up(behind: dict[str, BackgroundWriter]) -> None:
    """Wait until every node that runs behind has stepped all its blocks; raise
    the first failure of one (after all have caught up)."""
    failure = None
    for worker in behind.values():
        try:
            worker.close()
        except BaseException as exc:
            failure = failure or exc
    if failure is not None:
        raise failure


def run_offline(built: BuiltGraph, *, block: int | None = None,
                progress: Callable[[int, int | None], None] | None = None,
                handle_signals: bool = True, start: int = 0,
                checkpoint: Callable[[int], None] | None = None,
                checkpoint_every: float = 5.0) -> RunResult:
    """Run a built graph from its file/test sources to the end.

    Parameters
    ----------
    block : frames per step (default 65,536); any value gives the same outputs.
    progress : called as progress(done_frames, total_frames) after each step.
    handle_signals : turn SIGINT/SIGTERM into a clean stop (report marked incomplete).
    start : the sample the nodes' state is at (a resumed run; see engine.checkpoint).
    checkpoint : called as checkpoint(sample) at a step boundary every
        ``checkpoint_every`` seconds of wall time, once every node has stepped
        every block (the nodes that run behind have caught up).
    """
    if built.length is None:
        raise StreamqError("this graph has an endless source; run it live")
    step = REPLAY_BLOCK if block is None else int(block)
    total = built.length
    pos = int(start)
    complete = False
    error: str | None = None
    t0 = last_checkpoint = time.perf_counter()
    old_handlers = {}
    stop_requested: list[str] = []

    def on_signal(signum, frame):
        name = signal.Signals(signum).name
        if stop_requested:  # asked twice: stop right now
            raise Interrupted(name)
        stop_requested.append(name)

    if handle_signals:
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                old_handlers[sig] = signal.signal(sig, on_signal)
            except ValueError:  # not the main thread
                pass
    behind = _start_behind(built)
    try:
        try:
            if step < 1:  # inside the try, so the opened nodes get closed
                raise StreamqError(f"block size must be at least 1 frame, got {block}")
            while pos < total:
                if stop_requested:
                    raise Interrupted(stop_requested[0])
                n = min(step, total - pos)
                _step_all(built, n, behind)
                pos += n
                if progress:
                    progress(pos, total)
                if checkpoint is not None and pos < total and \
                        time.perf_counter() - last_checkpoint >= checkpoint_every:
                    for worker in behind.values():
                        worker.drain()
                    checkpoint(pos)
                    last_checkpoint = time.perf_counter()
            _catch_up(behind)
            for nid in built.graph.order:
                built.graph.nodes[nid].finish()
            complete = True
        except (Interrupted, KeyboardInterrupt):
            error = "interrupted"
        except BaseException:
            error = "failed"   # this error is the one to report, not a later closing one
            raise
        finally:
            for sig, h in old_handlers.items():
                signal.signal(sig, h)
    finally:
        closing_error = None
        try:   # (after an error or a stop too: every stepped block is measured)
            _catch_up(behind)
        except StreamqError as exc:
            closing_error = exc
        except BaseException:
            if error is None:
                raise
        for nid in built.graph.order:
            try:
                built.graph.nodes[nid].close(complete)
            except StreamqError as exc:
                closing_error = closing_error or exc
        if closing_error is not None and error is None:
            raise closing_error
    seconds = time.perf_counter() - t0
    report = make_report(built, complete=complete, samples=pos, seconds=seconds)
    write_report(built.ctx.out_dir, report)
    return RunResult(complete, pos, seconds, report, built.ctx.out_dir, error)


def make_report(built: BuiltGraph, *, complete: bool, samples: int, seconds: float,
                extra: dict | None = None) -> dict[str, Any]:
    rate = built.ctx.sample_rate
    report: dict[str, Any] = {
        "graph": built.graph.name,
        "graph_file": str(built.graph.source) if built.graph.source else None,
        "complete": complete,
        "samples": samples,
        "last_sample": samples,
        "sample_rate": rate,
        "audio_seconds": samples / rate,
        "meters": {},
        "outputs": {},
        "nodes": {},
    }
    for nid in built.graph.order:
        node = built.graph.nodes[nid]
        r = node.report()
        if r is None:
            continue
        if node.role == "meter":
            report["meters"][nid] = r
        elif node.role == "sink":
            report["outputs"][nid] = r
        else:
            report["nodes"][nid] = r
    if extra:
        report.update(extra)
    return report


def _json_default(o):
    import numpy as np
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(type(o).__name__)


def json_ready(o):
    """JSON has no inf/nan: write them as null (in dicts, lists and tuples too)."""
    if isinstance(o, float) and not math.isfinite(o):
        return None
    if isinstance(o, dict):
        return {k: json_ready(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [json_ready(v) for v in o]
    return o


def report_text(report: dict[str, Any]) -> str:
    """A report as ``report.json`` holds it (numpy values plain, non-finite as null)."""
    return json.dumps(json_ready(json.loads(json.dumps(report, default=_json_default))), indent=2)


def write_report(out_dir: Path, report: dict[str, Any]) -> Path:
    """Write report.json atomically (temporary name, then rename)."""
    path = Path(out_dir) / "report.json"
    text = report_text(report)
    try:
        with replacing(path) as f:
            f.write(text + "\n")
    except OSError as exc:
        raise StreamqError(f"{path}: cannot write report: {exc.strerror or exc}") from None
    return path
