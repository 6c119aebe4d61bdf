"""Running a graph as a JACK client of its own (``[graph] host = "jack"``).

The client takes the graph's name. Each ``live-input`` node gets one JACK
input port per channel and each ``live-output`` node one output port per
channel, named ``<node id>_<channel from 1>`` (``mic_1``, ``mic_2``, ...), so
that any patchbay (JACK's or PipeWire's) shows and connects them. A node's
``connect`` list names the ports to connect at start, in channel order.

The JACK process callback feeds the live-input nodes from the port buffers
and writes the live-output blocks into them through
:meth:`streamq.Chain.process_into` on a chain opened with ``realtime=True``:
only what the outputs need runs in the callback, the rest follows on a
thread, designs come from the worker process (``streamq.live.chain``). The
callback takes any number of frames, so a change of the server's period
while running (the buffer-size callback) needs nothing but larger buffers,
made outside the callback.

Nothing escapes the callback: a failure there (a node that raises, a
non-finite input refused by the live-input's ``nonfinite``) silences the
outputs, is counted and recorded, and the main thread stops the run, writes
the report (``"complete": false``) and exits with status 2 and one line.
Dropouts (the xrun callback) and the callback's load are shown by the
terminal meter and kept in the report's ``"live"`` section, as for the
PortAudio runner, whose helpers this module uses.

The client never starts a JACK server: it joins the default one (or the
one ``JACK_DEFAULT_SERVER`` names), which may be ``jackd`` or PipeWire's
JACK layer.
"""

from __future__ import annotations

import collections
import os
import sys
import threading
import time
from pathlib import Path

import numpy as np

from streamq.engine.graph import Graph, infer_rate
from streamq.errors import StreamqError
from streamq.live.runner import (TIMES, _after, _terminal_meter,
                                 callback_timing, live_summary, realtime_conditions,
                                 sigterm_interrupts, wait_for_end, worker_errors)


def _import_jack():
    """The JACK-Client module, or a one-line error saying what to install."""
    try:
        import jack
    except ModuleNotFoundError:
        raise StreamqError("host = \"jack\" needs the JACK-Client package (pip install "
                           "JACK-Client)") from None
    except OSError as exc:
        raise StreamqError(f"host = \"jack\": the JACK library cannot be loaded ({exc}); "
                           f"apt-get install libjack-jackd2-0 (or PipeWire's pipewire-jack)"
                           ) from None
    return jack


def _label(graph: Graph) -> str:
    return str(graph.source) if graph.source else "<graph>"


def _server_name() -> str:
    name = os.environ.get("JACK_DEFAULT_SERVER")
    return f"JACK server '{name}' (JACK_DEFAULT_SERVER)" if name else "the default JACK server"


def _open_client(jack, graph: Graph):
    """Join the running server as a client named after the graph; never start one."""
    try:
        return jack.Client(graph.name, no_start_server=True)
    except jack.JackOpenError:
        raise StreamqError(f"{_label(graph)}: [graph], field 'host': no {_server_name()} is "
                           f"running; start jackd or PipeWire first (streamq never starts "
                           f"a server)") from None


def _check_connect(jack, client, graph: Graph, node_ids, want_output: bool) -> None:
    """Every port a node's ``connect`` names exists and goes the right way
    (live-input: a port that sends audio; live-output: one that takes it)."""
    for nid in node_ids:
        for name in graph.nodes[nid].config.connect:
            where = f"{_label(graph)}: node '{nid}', field 'connect'"
            try:
                port = client.get_port_by_name(name)
            except jack.JackError:
                raise StreamqError(f"{where}: no JACK port '{name}' (see jack_lsp or your "
                                   f"patchbay for the port names)") from None
            if not port.is_audio:
                raise StreamqError(f"{where}: '{name}' is not an audio port")
            if want_output and not port.is_output:
                raise StreamqError(f"{where}: '{name}' takes audio in; name a port that "
                                   f"sends audio (a capture or output port)")
            if not want_output and not port.is_input:
                raise StreamqError(f"{where}: '{name}' sends audio; name a port that takes "
                                   f"audio in (a playback or input port)")


def _failed_node(exc: BaseException) -> str | None:
    """The id of the node whose code raised ``exc`` (from its traceback), if any."""
    from streamq.engine.node import Node
    found = None
    tb = exc.__traceback__
    while tb is not None:
        obj = tb.tb_frame.f_locals.get("self")
        if isinstance(obj, Node):
            found = obj.id
        tb = tb.tb_next
    return found


class JackRun:
    """What the JACK callbacks share with the main thread.

    Parameters
    ----------
    chain : streamq.Chain
        An open chain (``realtime=True``).
    client : jack.Client
        The chain's client, not yet activated.
    stop_after : int or None
        Frames after which the run stops (``--seconds``).

    Attributes
    ----------
    pos : int
        Frames processed so far.
    block : int
        The server's period now (frames).
    periods : list of int
        The periods seen, in order (one entry per change).
    xruns : int
        Dropouts the server reported (xrun callback).
    failures : int
        Callbacks whose processing raised (the first error is kept in ``error``).
    """

    def __init__(self, chain, client, stop_after: int | None):
        self.chain = chain
        self.built = chain.built
        self.client = client
        self.rate = chain.sample_rate
        self.stop_after = stop_after
        nodes = chain.graph.nodes
        self.in_ports = [[client.inports.register(f"{nid}_{c + 1}")
                          for c in range(int(nodes[nid].config.channels))]
                         for nid in chain.inputs]
        self.out_ports = [[client.outports.register(f"{nid}_{c + 1}")
                           for c in range(chain.output_channels(nid))]
                          for nid in chain.outputs]
        self.block = int(client.blocksize)
        self.periods = [self.block]
        self.pos = 0
        self.times = [0.0] * TIMES        # work time of each callback (s), a ring
        self.loads = [0.0] * TIMES        # ... as a share of its period
        self.calls = 0
        self.xrun_count = 0
        self.failures = 0
        self.error: BaseException | None = None
        self.error_at: int | None = None  # the sample the failing block started at
        self.stopped = False              # the callback only writes silence now
        self.server_gone: str | None = None
        self.done = threading.Event()
        self.inbufs: list[np.ndarray] = []
        self._alloc(self.block)
        client.set_process_callback(self.process)
        client.set_blocksize_callback(self.blocksize)
        client.set_xrun_callback(self.xrun)
        client.set_samplerate_callback(self.samplerate)
        client.set_shutdown_callback(self.shutdown)

    def _alloc(self, frames: int) -> None:
        """Input buffers for periods of up to ``frames`` (swapped in whole)."""
        self.inbufs = [np.zeros((frames, len(ports))) for ports in self.in_ports]

    # -- JACK's callbacks (nothing may escape any of them) ---------------------
    def process(self, frames: int) -> None:
        """The process callback: one period through the chain."""
        t0 = time.perf_counter()
        try:
            if self.stopped:
                self._silence()
                return
            n = frames
            if self.stop_after is not None:
                n = min(frames, self.stop_after - self.pos)
            bufs = self.inbufs
            if bufs and bufs[0].shape[0] < n:   # (the buffer-size callback comes first)
                self._alloc(n)
                bufs = self.inbufs
            for x, ports in zip(bufs, self.in_ports):
                for c, port in enumerate(ports):
                    x[:n, c] = port.get_array()[:n]
            outs = [[port.get_array() for port in ports] for ports in self.out_ports]
            self.chain.process_into(n, bufs, outs)
            if n < frames:
                for bufs_out in outs:
                    for buf in bufs_out:
                        buf[n:] = 0.0
            self.pos += n
            if self.stop_after is not None and self.pos >= self.stop_after:
                self.stopped = True
                self.done.set()
        except BaseException as exc:
            try:
                self.failures += 1
                if self.error is None:
                    self.error, self.error_at = exc, self.pos
                self.stopped = True
                self.done.set()
                self._silence()
            except BaseException:
                pass
            return
        try:
            dt = time.perf_counter() - t0
            k = self.calls % TIMES
            self.times[k] = dt
            self.loads[k] = dt * self.rate / frames
            self.calls += 1
        except BaseException:
            pass

    def _silence(self) -> None:
        for ports in self.out_ports:
            for port in ports:
                port.get_array().fill(0.0)

    def blocksize(self, frames: int) -> None:
        """The server's period changed (called outside the process callback)."""
        try:
            if frames != self.block:
                self.block = int(frames)
                self.periods.append(self.block)
            if not self.inbufs or self.inbufs[0].shape[0] < frames:
                self._alloc(int(frames))
        except BaseException:
            pass

    def xrun(self, delay) -> None:
        try:
            self.xrun_count += 1
        except BaseException:
            pass

    def samplerate(self, rate: int) -> None:
        try:
            if rate != self.rate and self.error is None:
                self.error = StreamqError(f"the JACK server changed its sample rate to {rate} "
                                          f"Hz while the graph runs at {self.rate} Hz")
                self.error_at = self.pos
                self.failures += 1
                self.stopped = True
                self.done.set()
        except BaseException:
            pass

    def shutdown(self, status, reason: str) -> None:
        try:
            self.server_gone = reason or "no reason given"
            self.done.set()
        except BaseException:
            pass

    # -- read by the main thread ---------------------------------------------------
    @property
    def xruns(self) -> int:
        return self.xrun_count

    def timing(self) -> dict:
        return callback_timing(self.times, self.calls)

    def load(self) -> dict:
        """The callback's work time as a share of its own period (p50, p99, max)."""
        n = min(self.calls, TIMES)
        if n == 0:
            return {}
        r = np.array(self.loads[:n])
        return {"p50": float(np.percentile(r, 50)), "p99": float(np.percentile(r, 99)),
                "max": float(r.max())}

    def port_names(self) -> dict[str, list[str]]:
        ids = list(self.chain.inputs) + list(self.chain.outputs)
        return {nid: [p.name for p in ports]
                for nid, ports in zip(ids, self.in_ports + self.out_ports)}


def run_jack(graph: Graph, out_dir: Path, args) -> int:
    """`streamq run` of a graph with ``[graph] host = "jack"``.

    Parameters
    ----------
    graph : Graph
        A validated graph with at least one live-input.
    out_dir : Path
        The run's output folder (exists and is writable).
    args : argparse.Namespace
        ``seconds`` (stop after), ``quiet`` (no terminal meter), ``block``
        (refused: the server sets the period).

    Returns
    -------
    int
        0, 130 when stopped by Ctrl-C or SIGTERM, 2 after a failure in the
        callback, a lost server or an output that could not be closed.
    """
    from streamq.chain import Chain
    label = _label(graph)
    if getattr(args, "block", None):
        raise StreamqError(f"--block {args.block}: with host = \"jack\" the JACK server sets "
                           f"the period; change it there (e.g. jack_bufsize)")
    jack = _import_jack()
    messages: collections.deque = collections.deque(maxlen=8)   # libjack's own messages
    jack.set_error_function(messages.append)
    jack.set_info_function(lambda msg: None)
    client = _open_client(jack, graph)
    chain = None
    handed = False      # _run closes the client from there on
    try:
        rate = infer_rate(graph)
        if int(client.samplerate) != rate:
            raise StreamqError(f"{label}: [graph], field 'sample_rate': {rate} Hz, but "
                               f"{_server_name()} runs at {client.samplerate} Hz; set "
                               f"sample_rate = {client.samplerate}")
        chain = Chain(graph, out_dir, realtime=True)
        _check_connect(jack, client, graph, chain.inputs, want_output=True)
        _check_connect(jack, client, graph, [n.id for n in graph.nodes.values()
                                             if n.kind == "live-output"], want_output=False)
        seconds = getattr(args, "seconds", None)
        chain.open()
        try:
            for nid in chain.outputs:
                want, have = len(graph.nodes[nid].config.connect), chain.output_channels(nid)
                if want > have:
                    raise StreamqError(f"{label}: node '{nid}', field 'connect': {want} ports "
                                       f"for {have} channel(s)")
            run = JackRun(chain, client, None if seconds is None else int(round(seconds * rate)))
        except BaseException:
            chain.close(failed=True)
            raise
        handed = True
        return _run(jack, graph, chain, client, run, out_dir, args)
    finally:
        if not handed:
            try:
                client.close()
            except Exception:
                pass


def _connect_all(jack, client, graph: Graph, run: JackRun) -> None:
    chain = run.chain
    for nid, ports in zip(chain.inputs, run.in_ports):
        for src, port in zip(graph.nodes[nid].config.connect, ports):
            _connect(jack, client, graph, nid, src, port)
    for nid, ports in zip(chain.outputs, run.out_ports):
        for dst, port in zip(graph.nodes[nid].config.connect, ports):
            _connect(jack, client, graph, nid, port, dst)


def _connect(jack, client, graph, nid, src, dst) -> None:
    try:
        client.connect(src, dst)
    except jack.JackError as exc:
        raise StreamqError(f"{_label(graph)}: node '{nid}', field 'connect': cannot connect "
                           f"{getattr(src, 'name', src)} to {getattr(dst, 'name', dst)} "
                           f"({exc})") from None


def _run(jack, graph, chain, client, run: JackRun, out_dir: Path, args) -> int:
    """Activate, wait for the end (time, Ctrl-C, failure, lost server), report."""
    rate = run.rate
    seconds = getattr(args, "seconds", None)
    meter = _terminal_meter(args)
    interrupted = stalled = False
    problem: StreamqError | None = None      # said after the report
    try:
        with sigterm_interrupts(), realtime_conditions():
            try:
                client.activate()
                try:
                    _connect_all(jack, client, graph, run)
                except StreamqError as exc:
                    problem = exc
                    run.stopped = True
                    run.done.set()
                stalled = wait_for_end(run, meter)   # True: the server stopped calling us
            except KeyboardInterrupt:
                interrupted = True
            stalled = stalled or run.server_gone is not None
            if not stalled:
                try:
                    client.deactivate()
                except jack.JackError:
                    stalled = True
    finally:
        if meter:
            meter.close()
    failed = run.error is not None
    live = {"host": "jack", "client": client.name, "ports": run.port_names(),
            "block": run.periods[0], "periods": list(run.periods),
            "block_ms": 1000.0 * run.block / rate, "xruns": run.xruns,
            "callback_ms": run.timing(), "load": run.load(), "callbacks": run.calls,
            "callback_errors": run.failures,
            "callback_error": None if run.error is None else
            f"{type(run.error).__name__}: {run.error}",
            "worker_errors": worker_errors(chain.built)}
    node = _failed_node(run.error) if failed else None
    if node is not None:
        live["callback_error_node"] = node
    stopped_by = ("failure" if failed else "stalled" if stalled else "error" if problem
                  else "interrupt" if interrupted else "seconds" if seconds else "end")
    try:
        report = chain.close(early=interrupted or stalled or problem is not None, failed=failed,
                             extra={"live": live, "stopped_by": stopped_by})
    except StreamqError as exc:              # e.g. an output that could not be closed
        report, problem = chain.report, problem or exc
    except Exception as exc:                 # a follower node failed at the end
        report = chain.report
        problem = problem or StreamqError(f"live run stopped at sample {run.pos}: "
                                          f"{type(exc).__name__}: {exc}")
    if not stalled:
        try:
            client.close()
        except Exception:
            pass
    if report:
        _after(out_dir, report, args)
        live_summary(graph.name, out_dir, report)
    if failed:
        err = run.error
        where = f"node '{node}'" if node else "the JACK callback"
        msg = err if isinstance(err, StreamqError) else f"{type(err).__name__}: {err}"
        print(f"streamq: {where} failed at sample {run.error_at}: {msg}; the output went "
              f"silent and the run stopped (report.json: complete false)", file=sys.stderr)
    elif problem is not None:
        print(f"streamq: {problem}", file=sys.stderr)
    if stalled:
        why = run.server_gone or "no process callback for a while"
        print(f"streamq: the JACK server went away after {run.pos / rate:.2f} s ({why}); "
              f"the outputs so far are kept", file=sys.stderr)
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(2)      # libjack cannot be shut down cleanly without its server
    if failed or problem is not None:
        return 2
    return 130 if interrupted else 0
