"""``streamq.Chain``: run a graph in-process, block by block.

A chain is a validated graph whose ``live-input`` nodes are fed by the host
(a Python loop, an audio callback, an audio server client, a media pipeline)
and whose ``live-output`` nodes hand their blocks back::

    import streamq

    with streamq.Chain.load("graphs/live-monitor.toml") as chain:
        for block in blocks:                  # (frames, channels) float32 or float64
            out = chain.process(block)        # float32 (frames, channels)
    print(chain.report["meters"])

The chain never prints, never exits the process, and every thread or process
it starts ends with :meth:`Chain.close`. Every schedule is counted in samples
(rule 1 of the design), so the blocks may have any size and the results do not
depend on how the host cuts them.

A graph without a ``live-input`` is driven by its own sources (file-source,
test-signal): :meth:`Chain.run` runs it to the end in the caller's thread,
exactly as ``streamq run`` does (that command is a thin host of this class),
with checkpoints for ``--resume`` when asked; in an audio callback
(``realtime=True``), :meth:`Chain.process_into` with no input blocks steps
the sources by the callback's frames (a file played to a live-output).

Two ways to run a chain fed by its host, chosen by ``realtime``:

``realtime=False`` (default: a host that can wait, e.g. a loop over a file)
    Every node steps in the caller's thread, in graph order; PDF snapshots and
    codebook designs run in a worker process, and :meth:`process` waits for
    each one before it goes on, so every codebook applies at exactly the
    sample an offline run applies it: decoded samples and report figures
    equal those of ``streamq run`` on the same graph with a ``file-source`` in
    place of the ``live-input``, whatever the block sizes.
``realtime=True`` (an audio callback that must never wait)
    :meth:`process` steps only what the outputs need; estimators, meters and
    sinks follow on a thread; designs arrive from the worker process when they
    are ready and apply at their due sample (``apply_after``) or, if late, at
    the next block (counted in the encoder's ``late_codebooks``).
"""

from __future__ import annotations

import concurrent.futures
import concurrent.futures.process
import time
from pathlib import Path
from typing import Any

import numpy as np

from streamq.errors import StreamqError

#: the most frames one call of :meth:`Chain.process` takes
MAX_FRAMES = 65_536


class Chain:
    """A graph run in-process: :meth:`open`, :meth:`process` blocks, :meth:`close`.

    Build one with :meth:`load` (a graph file) or :meth:`from_toml` (its text).

    Parameters
    ----------
    graph : streamq.engine.graph.Graph
        A validated graph.
    out_dir : str or Path, optional
        Where sinks with relative paths, the meters' CSV files and
        ``report.json`` go. None (the default): nothing is written to disk,
        and a sink with a relative ``path`` is refused when the chain opens.
    realtime : bool
        See the module docstring.

    Attributes
    ----------
    inputs : tuple of str
        The ids of the ``live-input`` nodes :meth:`process` feeds.
    outputs : tuple of str
        The ids of the ``live-output`` nodes whose blocks it returns.
    sample_rate : int
    report : dict or None
        After :meth:`close`: what ``report.json`` holds.
    """

    def __init__(self, graph, out_dir: str | Path | None = None, *, realtime: bool = False,
                 overrides=()):
        from streamq.nodes.live import LiveInput, LiveOutput
        self.graph = graph
        self.out_dir = None if out_dir is None else Path(out_dir)
        self.realtime = bool(realtime)
        self.overrides = tuple(overrides)      # (what a checkpoint's fingerprint holds)
        self.inputs = tuple(nid for nid in graph.order
                            if isinstance(graph.nodes[nid], LiveInput))
        self.outputs = tuple(nid for nid in graph.order
                             if isinstance(graph.nodes[nid], LiveOutput))
        self.state = "new"           # "new" -> "open" -> "closed"
        self.wall_seconds = 0.0      # (closed) wall time from open to close
        self.report: dict[str, Any] | None = None
        self.position = 0            # frames processed
        self.built = None
        self._live = None            # realtime: the callback/follower split
        self._in_nodes: list = []    # (open) the live-input and live-output nodes
        self._out_nodes: list = []
        self._workers: list = []
        self._background = None      # realtime: the thread pool meters sum their frames on
        self._resumed = False        # opened from a checkpoint
        self._t0 = 0.0

    # -- building ------------------------------------------------------------------
    @classmethod
    def load(cls, path: str | Path, out_dir: str | Path | None = None, overrides=(), *,
             realtime: bool = False) -> "Chain":
        """A chain from a graph file; ``overrides`` as ``--set`` takes them
        (``"enc.bits=6"``). Raises :class:`StreamqError` with the one-line
        messages of ``streamq check``."""
        from streamq.engine.graph import load_graph
        return cls(load_graph(path, list(overrides), precheck=True), out_dir, realtime=realtime,
                   overrides=overrides)

    @classmethod
    def from_toml(cls, text: str, out_dir: str | Path | None = None, overrides=(), *,
                  source: str | Path | None = None, realtime: bool = False) -> "Chain":
        """A chain from graph text (``source``: the file name its relative
        input paths are taken from, and that messages name)."""
        from streamq.engine.graph import parse_graph
        graph = parse_graph(text, None if source is None else Path(source), list(overrides),
                            precheck=True)
        return cls(graph, out_dir, realtime=realtime, overrides=overrides)

    @property
    def sample_rate(self) -> int:
        from streamq.engine.graph import infer_rate
        return self.built.ctx.sample_rate if self.built is not None else infer_rate(self.graph)

    def channels(self, node_id: str | None = None) -> int:
        """The channel count of a live-input (the only one by default)."""
        nid = node_id if node_id is not None else self.inputs[0]
        return int(self.graph.nodes[nid].config.channels)

    def output_channels(self, node_id: str | None = None) -> int:
        """The channel count of a live-output (open chains only)."""
        nid = node_id if node_id is not None else self.outputs[0]
        return int(self.graph.nodes[nid].C)

    @property
    def latency(self) -> int:
        """Frames by which the first live-output lags its input (open chains):
        the lookahead the graph declares (e.g. a gain-adaptive encoder's block)."""
        self._require_open("latency")
        if not self.outputs:
            return 0
        return int(self.built.specs[self.graph.nodes[self.outputs[0]].config.input].latency)

    @property
    def length(self) -> int | None:
        """Frames the graph's own sources hold (open chains without a
        live-input; None for an endless source or a chain its host feeds)."""
        self._require_open("length")
        return None if self.inputs else self.built.length

    @property
    def offline(self) -> bool:
        """No live node at all and no ``realtime``: the chain builds and runs as
        ``streamq run`` runs a file graph (designs in this process)."""
        return not (self.inputs or self.outputs or self.realtime or
                    any(n.live_only for n in self.graph.nodes.values()))

    # -- life cycle ----------------------------------------------------------------
    def open(self, *, resume: bool = False) -> "Chain":
        """Open every node (and the worker process, when the graph designs).

        Parameters
        ----------
        resume : bool
            Continue an interrupted :meth:`run` from the last checkpoint in
            ``out_dir`` (offline chains only): the checkpoint must come from
            the same graph, overrides, inputs and streamq version, or a
            one-line StreamqError says why not.
        """
        if self.state != "new":
            raise StreamqError(f"Chain.open: the chain is {self.state}; a chain opens once")
        if resume:
            return self._open_resumed()
        from streamq.engine.scheduler import build
        if self.offline:
            try:
                self.built = build(self.graph, self.out_dir)
            except BaseException:
                self.state = "closed"
                raise
            self.state = "open"
            self._t0 = time.perf_counter()
            return self
        offload = background = None
        if any(n.kind == "pdf-estimator" for n in self.graph.nodes.values()):
            from streamq.live.runner import make_workers
            try:
                designer, executor = make_workers()
            except concurrent.futures.process.BrokenProcessPool:
                self.state = "closed"
                raise StreamqError("Chain.open: the design worker process could not start; a "
                                   "script that opens a chain with a pdf-estimator must run "
                                   "its code under `if __name__ == \"__main__\":` (Python "
                                   "starts worker processes by importing the script)") from None
            self._workers = [designer, executor]
            if self.realtime:
                offload, background = designer.submit, executor.submit
                self._background = executor
            else:
                offload = _waiting(designer.submit)
        elif self.realtime:
            executor = concurrent.futures.ThreadPoolExecutor(
                max_workers=1, thread_name_prefix="streamq-meter")
            self._workers = [executor]
            background = executor.submit
            self._background = executor
        try:
            self.built = build(self.graph, self.out_dir, live=True, offload=offload,
                               background=background)
        except BaseException:
            self._stop_workers()
            self.state = "closed"
            raise
        self._in_nodes = [self.graph.nodes[nid] for nid in self.inputs]
        self._out_nodes = [self.graph.nodes[nid] for nid in self.outputs]
        if self.realtime:
            from streamq.live.chain import LiveChain
            self._live = LiveChain(self.built)
            self._live.start()
        self.state = "open"
        self._t0 = time.perf_counter()
        return self

    def _open_resumed(self) -> "Chain":
        """:meth:`open` from the checkpoint in ``out_dir``."""
        from streamq.engine import checkpoint
        from streamq.engine.scheduler import build
        if not self.offline or self.out_dir is None:
            self.state = "closed"
            raise StreamqError("Chain.open(resume=True): only a chain run by its own file "
                               "sources, with an out_dir, resumes")
        try:
            ck = checkpoint.load(self.out_dir, checkpoint.fingerprint(self.graph, self.overrides))
            moved = checkpoint.set_aside(ck)
            self.built = build(self.graph, self.out_dir)
        except BaseException:
            self.state = "closed"
            raise
        try:
            checkpoint.restore(self.built, ck, moved)
        except BaseException:
            self.state = "closed"
            for nid in self.built.graph.order:
                try:
                    self.built.graph.nodes[nid].close(False)
                except Exception:
                    pass
            raise
        self.position = ck.position
        self._resumed = True
        self.state = "open"
        self._t0 = time.perf_counter()
        return self

    def run(self, *, block: int | None = None, progress=None, handle_signals: bool = False,
            checkpoint_every: float | None = None) -> dict[str, Any]:
        """Run a chain without a live-input from its sources to their end.

        The nodes step in this thread on blocks of ``block`` frames (any
        value gives the same outputs); the chain is closed at the end.

        Parameters
        ----------
        block : int, optional
            Frames per step (default 65,536).
        progress : callable, optional
            Called as ``progress(done_frames, total_frames)`` after each step.
        handle_signals : bool
            Turn SIGINT/SIGTERM into a clean stop (the report says
            ``"complete": false``; outputs stay valid). Main thread only.
        checkpoint_every : float, optional
            Write a checkpoint to ``out_dir`` every so many seconds of wall
            time (what :meth:`open` with ``resume=True`` continues from); it is
            removed once the run completes.

        Returns
        -------
        dict
            The report (also in :attr:`report`; ``report.json`` when there
            is an ``out_dir``).
        """
        from streamq.engine import checkpoint
        from streamq.engine.scheduler import run_offline
        self._require_open("run")
        if self.inputs:
            raise StreamqError(f"Chain.run: this chain is fed through its live-input(s) "
                               f"({', '.join(self.inputs)}); feed it with process()")
        if self.built.length is None:
            self._close(complete=False)
            raise StreamqError("this graph has an endless source; run it live")
        save = None
        if checkpoint_every is not None and self.out_dir is not None:
            fp = checkpoint.fingerprint(self.graph, self.overrides)
            built, out = self.built, self.out_dir
            save = lambda pos: checkpoint.save(out, fp, pos, built)  # noqa: E731
        self.state = "closed"          # run_offline closes every node, whatever happens
        result = run_offline(self.built, block=block, progress=progress,
                             handle_signals=handle_signals, start=self.position,
                             checkpoint=save, checkpoint_every=checkpoint_every or 0.0)
        self.position = result.samples
        self.wall_seconds = time.perf_counter() - self._t0
        self.report = result.report
        if result.complete and self.out_dir is not None and (save is not None or self._resumed):
            checkpoint.clear(self.out_dir)
        return self.report

    def process(self, block):
        """Push one block through the chain.

        Parameters
        ----------
        block : array_like or dict
            float32 or float64 samples shaped (frames, channels), 1 to 65,536
            frames (a 1-D array for a one-channel input); a dict keyed by
            live-input id when the graph has several (all the same length).

        Returns
        -------
        numpy.ndarray, dict or None
            The live-output's block as a new float32 array (frames, channels);
            a dict keyed by node id when there are several; None when there is
            none.

        Raises
        ------
        StreamqError
            A block of the wrong shape, type or length, or non-finite samples
            where the live-input's ``nonfinite`` is ``"refuse"``: nothing of
            it was processed, and the chain stays usable. A failure inside a
            node closes the chain (its report says ``"complete": false``).
        """
        self._require_open("process")
        if not self.inputs:
            raise StreamqError("Chain.process: this graph has no live-input; its own sources "
                               "drive it: use run(), or process_into(frames, ()) in an audio "
                               "callback")
        data = self._take(block)
        frames = next(iter(data.values())).shape[0]
        try:
            for nid, x in data.items():
                self.graph.nodes[nid].feed(x)
            if self._live is not None:
                if self._live.error is not None:
                    raise self._live.error
                self._live.step(frames)
            else:
                self._step_all(frames)
        except BaseException:
            self.position += frames
            self._close(complete=False)
            raise
        self.position += frames
        outs = {nid: np.array(self.graph.nodes[nid].block, dtype=np.float32)
                for nid in self.outputs}
        if not outs:
            return None
        return outs if len(outs) > 1 else next(iter(outs.values()))

    def process_into(self, frames: int, blocks, outs=(), *, check_finite: bool = True) -> None:
        """Push one block through the chain, from and into buffers the host owns.

        For audio callbacks that cannot afford :meth:`process`'s checks and new
        arrays: nothing is validated but the samples' finiteness (one sum per
        input unless a sample is not finite), and the output blocks are written
        into ``outs``.

        Parameters
        ----------
        frames : int
            Frames in this block (1 to 65,536; not checked).
        blocks : sequence of numpy.ndarray
            One array per live-input, in :attr:`inputs` order, shaped (at
            least ``frames``, channels), float32 or float64; only the first
            ``frames`` rows are read, and the chain keeps a copy. Empty for a
            chain its own sources drive (they step by ``frames``; the host
            stops at :attr:`length`).
        outs : sequence
            One destination per live-output, in :attr:`outputs` order: an
            array shaped (at least ``frames``, channels), or a sequence of one
            1-D array per channel (the buffers an audio server hands out); the
            first ``frames`` samples of each are written (cast to its dtype).
        check_finite : bool
            Apply each live-input's ``nonfinite`` policy (the default). False:
            the samples go in as they are (``streamq run`` on a PortAudio
            device: a NaN from a broken driver then fails that hop's design
            in the worker, which is reported, and the audio goes on).

        Raises
        ------
        StreamqError, Exception
            A refused non-finite sample (nothing of the block processed) or a
            failure inside a node. Unlike :meth:`process`, the chain is left
            open: the host decides, and calls :meth:`close` with
            ``failed=True`` once it stops.
        """
        nodes = self._in_nodes
        for i, x in enumerate(blocks):
            x = x[:frames]
            if check_finite and not np.isfinite(np.add.reduce(x, axis=None, dtype=np.float64)):
                x = self._finite(self.inputs[i], x, "Chain.process_into")
            nodes[i].feed(x)
        live = self._live
        if live is not None:
            if live.error is not None:
                raise live.error
            live.step(frames)
        else:
            self._step_all(frames)
        self.position += frames
        for node, out in zip(self._out_nodes, outs):
            y = node.block
            if isinstance(out, np.ndarray):
                out[:frames] = y
            else:
                for c, buf in enumerate(out):
                    buf[:frames] = y[:, c]

    def close(self, *, early: bool = False, failed: bool = False,
              extra: dict[str, Any] | None = None, report_file: bool = True) -> dict[str, Any]:
        """Finish the stream, close every node, stop every thread and process the
        chain started; returns (and keeps in :attr:`report`) the report.

        Parameters
        ----------
        early : bool
            The host stopped before the end of its stream (Ctrl-C, a time
            limit it did not reach): every node still finishes what it holds,
            so the outputs are whole up to the last sample processed, and the
            report says ``"complete": false``.
        failed : bool
            A call of :meth:`process_into` raised: the nodes are closed
            without finishing (one of them may hold half a block) and the
            report says ``"complete": false``.
        extra : dict, optional
            More top-level entries for the report (a host's own figures).
        report_file : bool
            Write ``report.json`` into ``out_dir`` (False: a host whose
            stream never started, e.g. a device that would not open, leaves
            no report of a run that did not happen).
        """
        if self.state == "new":
            self.state = "closed"
            return self.report or {}
        if self.state == "closed":
            return self.report or {}
        return self._close(complete=not failed, early=early, extra=extra,
                           report_file=report_file)

    def __enter__(self) -> "Chain":
        return self.open() if self.state == "new" else self

    def __exit__(self, kind, exc, tb) -> None:
        if self.state == "open":
            self._close(complete=kind is None)

    # -- inside --------------------------------------------------------------------
    def _require_open(self, what: str) -> None:
        if self.state == "new":
            raise StreamqError(f"Chain.{what}: the chain is not open yet; call open() or use "
                               f"it in a with block")
        if self.state == "closed":
            raise StreamqError(f"Chain.{what}: the chain is closed")

    def _take(self, block) -> dict[str, np.ndarray]:
        """The block(s) checked, per live-input id."""
        if isinstance(block, dict):
            unknown = sorted(set(block) - set(self.inputs))
            missing = [nid for nid in self.inputs if nid not in block]
            if unknown or missing:
                raise StreamqError(f"Chain.process: give one block per live-input "
                                   f"({', '.join(self.inputs)})"
                                   + (f"; unknown: {', '.join(map(str, unknown))}" if unknown
                                      else f"; missing: {', '.join(missing)}"))
            items = [(nid, block[nid]) for nid in self.inputs]
        elif len(self.inputs) > 1:
            raise StreamqError(f"Chain.process: the graph has {len(self.inputs)} live-inputs "
                               f"({', '.join(self.inputs)}); give a dict of blocks keyed by id")
        else:
            items = [(self.inputs[0], block)]
        out = {}
        frames = None
        for nid, x in items:
            node = self.graph.nodes[nid]
            x = np.asarray(x)
            if x.dtype not in (np.float32, np.float64):
                raise StreamqError(f"Chain.process: node '{nid}': give float32 or float64 "
                                   f"samples, got {x.dtype}")
            C = node.config.channels
            if x.ndim == 1 and C == 1:
                x = x[:, None]
            if x.ndim != 2 or x.shape[1] != C:
                raise StreamqError(f"Chain.process: node '{nid}' takes (frames, {C}) blocks, "
                                   f"got shape {x.shape}")
            n = x.shape[0]
            if not 1 <= n <= MAX_FRAMES:
                raise StreamqError(f"Chain.process: node '{nid}': give 1 to {MAX_FRAMES} "
                                   f"frames per call, got {n}")
            if frames is not None and n != frames:
                raise StreamqError("Chain.process: every live-input's block must have the "
                                   "same length")
            frames = n
            out[nid] = self._finite(nid, x)
        return out

    def _finite(self, nid: str, x: np.ndarray, where: str = "Chain.process") -> np.ndarray:
        """``x`` with the live-input's ``nonfinite`` policy applied: refused
        (StreamqError naming the sample and channel) or its NaN and infinite
        samples replaced with 0 (a new array)."""
        bad = ~np.isfinite(x)
        if bad.any():
            if self.graph.nodes[nid].config.nonfinite == "refuse":
                f, c = np.argwhere(bad)[0]
                raise StreamqError(f"{where}: node '{nid}': non-finite sample at "
                                   f"sample {self.position + int(f)}, channel {int(c)} (set "
                                   f"its nonfinite = \"zero\" to replace such samples "
                                   f"with 0)")
            x = np.where(bad, 0.0, x)
        return x

    def _step_all(self, frames: int) -> None:
        from streamq.engine.scheduler import _step_all
        _step_all(self.built, frames)

    def _close(self, complete: bool, early: bool = False,
               extra: dict[str, Any] | None = None, report_file: bool = True) -> dict[str, Any]:
        from streamq.engine.scheduler import make_report, write_report
        self.state = "closed"
        failure: BaseException | None = None
        try:
            if self._live is not None:
                self._live.stop()
                if self._live.error is not None and complete:
                    failure = self._live.error
                    complete = False
            if self._background is not None:
                # what the follower handed the meters' thread is summed before they finish
                self._background.shutdown(wait=True)
            if complete:
                for nid in self.built.graph.order:
                    self.built.graph.nodes[nid].finish()
        except BaseException as exc:
            failure, complete = exc, False
        complete = complete and not early
        for nid in self.built.graph.order:
            try:
                self.built.graph.nodes[nid].close(complete)
            except BaseException as exc:
                failure = failure or exc
        self._stop_workers()
        seconds = self.wall_seconds = time.perf_counter() - self._t0
        self.report = make_report(self.built, complete=complete, samples=self.position,
                                  seconds=seconds, extra=extra)
        if self.out_dir is not None and report_file:
            write_report(self.out_dir, self.report)
        if failure is not None:
            raise failure
        return self.report

    def _stop_workers(self) -> None:
        for w in self._workers:
            w.shutdown(wait=True, cancel_futures=True)
        self._workers = []


def _waiting(submit):
    """An ``offload`` that returns only once the job is done: the job still runs
    in the worker process, and its result is there when the node looks."""
    def offload(fn, *args):
        fut = submit(fn, *args)
        concurrent.futures.wait([fut])
        return fut
    return offload
