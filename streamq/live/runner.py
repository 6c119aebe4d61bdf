"""Running a graph on a live device.

One PortAudio stream (duplex when the graph has both a live input and a
live output) drives a :class:`streamq.Chain` opened with ``realtime=True``:
its callback hands the device's buffers to :meth:`Chain.process_into`, which
steps the nodes the monitor output needs on ``block`` frames and writes the
monitor block out; the other nodes (estimators, meters, sinks) follow on a
thread in batches of a few blocks (streamq.live.chain). The callback's step is
O(block) vectorised work (DESIGN.md rule 4): PDF snapshots and codebook
designs go to a worker process through ``ctx.offload`` and come back as
reference swaps, each applied at its due sample (or at the next block if it
came late), with the sample recorded in the CodebookUpdate, so an offline
replay with the recorded events is bit-exact.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading
import time
import gc
import multiprocessing
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path

import numpy as np

from streamq.engine.graph import Graph
from streamq.errors import StreamqError

STATUS_FLAGS = ("input_underflow", "input_overflow", "output_underflow", "output_overflow",
                "priming_output")
TIMES = 1 << 16  # callback work times kept (a ring: constant memory)
# the other threads must not hold the interpreter lock long when the callback wants it
SWITCH_INTERVAL = 0.0001
STALL_SECONDS = 3.0  # no audio callback for this long: the device or server is gone


def _device(sd, node, direction: str, channels: int):
    """The device index for a live node (None: PortAudio's default, which must exist)."""
    from streamq.live.devices import resolve_device
    idx = resolve_device(node.config.device, direction, channels, sd=sd,
                         where=f"node '{node.id}', field 'device'")
    if idx is None:
        try:
            default = sd.default.device[0 if direction == "input" else 1]
        except Exception:
            default = -1
        if default is None or default < 0:
            raise StreamqError(f"node '{node.id}': no default {direction} device; name one with "
                               f"field 'device' (see 'streamq devices')")
    return idx


# PortAudio's error codes for a stream it cannot open with these settings
_BAD_RATE = -9997
_BAD_CHANNELS = -9998


def _open_failure(exc, sd, run: "LiveRun", graph: Graph, rate: int, block: int) -> StreamqError:
    """One line for a stream PortAudio would not open, naming the graph field to
    change: ``[graph] sample_rate`` for a rate the device does not run, the live
    node's ``channels`` (live-input) or ``input`` (live-output, whose channels
    come from its input) for a channel count it does not have."""
    label = str(graph.source) if graph.source else "<graph>"
    detail = " ".join(str(exc).splitlines()[0].split())
    code = exc.args[1] if len(exc.args) > 1 else None
    if code == _BAD_RATE:
        return StreamqError(f"{label}: [graph], field 'sample_rate': the audio device does not "
                            f"run at {rate} Hz ({detail}); give a rate it runs (see `streamq "
                            f"devices`)")
    if code == _BAD_CHANNELS:
        sides = []
        if run.inp:
            sides.append((run.inp[0], "input", "channels", run.inp[0].spec.channels))
        if run.out:
            sides.append((run.out[0], "output", "input", run.out[0].C))
        node, direction, field, n = sides[0]
        have = None
        for side in sides:   # a duplex stream: the side the device is short of
            have = _device_channels(sd, side[0], side[1])
            if have is not None and have < side[3]:
                node, direction, field, n = side
                break
        else:
            have = _device_channels(sd, node, direction)
        what = "" if field == "channels" else f", the channels of node '{node.config.input}'"
        has = "" if have is None else f" (it has {have})"
        return StreamqError(f"{label}: node '{node.id}', field '{field}': the audio device cannot "
                            f"open {n} {direction} channel(s){what}{has}: {detail} (see "
                            f"`streamq devices`)")
    return StreamqError(f"cannot open the audio stream at {rate} Hz, block {block}: {detail} "
                        f"(choose a supported sample_rate or device; see `streamq devices`)")


def _device_channels(sd, node, direction: str) -> int | None:
    """The channel count the device of a live node offers in ``direction`` (None if unknown)."""
    from streamq.live.devices import resolve_device
    try:
        idx = resolve_device(node.config.device, direction, 0, sd=sd, where="")
        if idx is None:
            idx = sd.default.device[0 if direction == "input" else 1]
        return int(sd.query_devices(idx)[f"max_{direction}_channels"])
    except Exception:
        return None


def _warm_worker() -> None:
    """Import the design code and load the compiled kernels in the worker process
    before the stream starts (loading them takes a second or more: at the first
    hop it would make the first designs late and skip hops)."""
    import streamq.design  # noqa: F401
    import streamq.nodes.encoder  # noqa: F401
    import streamq.nodes.estimator  # noqa: F401
    from streamq.design import kernels, lloyd_kernels
    kernels.warm_up()
    lloyd_kernels.warm_up()


def make_workers() -> tuple[ProcessPoolExecutor, ThreadPoolExecutor]:
    """The live run's helpers: a started worker process for designs and PDF
    snapshots (``ctx.offload``) and one thread for short node-bound jobs
    (``ctx.background``)."""
    designer = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"),
                                   initializer=_warm_worker)
    designer.submit(_warm_worker).result()   # start it now, not at the first hop
    return designer, ThreadPoolExecutor(max_workers=1, thread_name_prefix="streamq-meter")


@contextlib.contextmanager
def realtime_conditions():
    """The interpreter settings for a running audio callback, restored after.

    A short switch interval: another thread must not hold the interpreter lock
    long when the callback wants it. Everything loaded so far is set aside from
    garbage collection (``gc.freeze``: a full collection could take
    milliseconds), and automatic collection is off, so that none starts inside
    the callback: the follower thread collects between callbacks
    (streamq.live.chain).
    """
    old_switch = sys.getswitchinterval()
    was_enabled = gc.isenabled()
    sys.setswitchinterval(SWITCH_INTERVAL)
    gc.collect()
    gc.freeze()
    gc.disable()
    try:
        yield
    finally:
        sys.setswitchinterval(old_switch)
        gc.unfreeze()
        if was_enabled:
            gc.enable()


class LiveRun:
    """The state shared between the audio callback and the main thread."""

    def __init__(self, chain, block: int, stop_after: int | None):
        self.chain = chain
        self.built = chain.built
        self.block = block
        self.stop_after = stop_after
        nodes = chain.graph.nodes
        self.inp = [nodes[nid] for nid in chain.inputs]
        self.out = [nodes[nid] for nid in chain.outputs]
        if len(self.inp) > 1 or len(self.out) > 1:
            raise StreamqError("a live graph has at most one live-input and one live-output "
                               "(one duplex stream)")
        self.length = chain.length
        if not self.inp and self.length is None:
            raise StreamqError("a live graph needs a live-input or a finite source")
        self.pos = 0
        self.times = [0.0] * TIMES    # (a list: cheaper to store into from the callback)
        self.calls = 0
        self.status = dict.fromkeys(STATUS_FLAGS, 0)
        self.xrun_calls = 0
        self.sd = None
        self.error: BaseException | None = None
        self.done = threading.Event()
        if chain._live is not None:
            chain._live.on_error = self._follower_failed

    def _follower_failed(self, exc: BaseException) -> None:
        if self.error is None:
            self.error = exc
        self.done.set()

    def callback(self, *args):
        sd = self.sd
        t0 = time.perf_counter()
        if len(args) == 5:
            indata, outdata, frames, _t, status = args
        elif self.inp:
            indata, frames, _t, status = args
            outdata = None
        else:
            outdata, frames, _t, status = args
            indata = None
        if status:
            hit = False
            for flag in STATUS_FLAGS:
                if getattr(status, flag, False):
                    self.status[flag] += 1
                    hit = hit or flag != "priming_output"
            # one dropout often sets both an input and an output flag: count callbacks
            self.xrun_calls += hit
        try:
            n = frames
            if self.length is not None:
                n = min(frames, self.length - self.pos)
            if n > 0:
                # the device's samples go in as they come (see check_finite)
                self.chain.process_into(n, () if indata is None else (indata,),
                                        () if outdata is None else (outdata,),
                                        check_finite=False)
                if outdata is not None and n < frames:
                    outdata[n:] = 0
                self.pos += n
            elif outdata is not None:
                outdata[:] = 0
        except BaseException as exc:  # stop the stream; the main thread reports it
            self.error = exc
            if outdata is not None:
                outdata[:] = 0
            self.done.set()
            raise sd.CallbackAbort from None
        self.times[self.calls % TIMES] = time.perf_counter() - t0
        self.calls += 1
        if (self.stop_after is not None and self.pos >= self.stop_after) or \
                (self.length is not None and self.pos >= self.length):
            self.done.set()
            raise sd.CallbackStop

    @property
    def xruns(self) -> int:
        """Callbacks that PortAudio flagged with an overflow or underflow."""
        return self.xrun_calls

    def timing(self) -> dict:
        return callback_timing(self.times, self.calls)


def callback_timing(times: list, calls: int) -> dict:
    """Percentiles (p50, p90, p99) and maximum of the callback work times, in ms.

    Parameters
    ----------
    times : list of float
        A ring of :data:`TIMES` work times in seconds, filled in call order.
    calls : int
        Callbacks so far (how much of the ring holds times).

    Returns
    -------
    dict
        Empty before the first callback.
    """
    n = min(calls, TIMES)
    if n == 0:
        return {}
    ms = np.array(times[:n]) * 1000.0
    return {f"p{q}": float(np.percentile(ms, q)) for q in (50, 90, 99)} | {"max": float(ms.max())}


def _gather(run: LiveRun) -> dict:
    """Figures for the terminal meter (main thread; plain reads). ``run`` is a
    :class:`LiveRun` or another host's run with the same ``pos``, ``built``,
    ``block``, ``xruns`` and ``timing()``."""
    stats = {"seconds": run.pos / run.built.ctx.sample_rate, "xruns": run.xruns, "meters": {}}
    t = run.timing()
    block_ms = 1000.0 * run.block / run.built.ctx.sample_rate
    stats["load"] = t.get("p99", 0.0) / block_ms if t else 0.0
    for nid, node in run.built.graph.nodes.items():
        if hasattr(node, "live_stats"):
            stats["meters"][nid] = node.live_stats()
        if node.kind == "encoder":
            d = [v for v in getattr(node, "drift", []) if v is not None]
            if d:
                stats["drift"] = max(d)
            stats["codebook_version"] = max(getattr(node, "version", [0]) or [0])
    first = next(iter(stats["meters"].values()), None)
    if first:
        for k in ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample"):
            stats[k] = first.get(k)
        stats.setdefault("codebook_version", first.get("codebook_version"))
    return stats


@contextlib.contextmanager
def sigterm_interrupts():
    """SIGTERM raises KeyboardInterrupt inside the block (as Ctrl-C does), so a
    terminated live run stops as an interrupted one: outputs closed, report
    written. Outside the main thread nothing changes."""
    def on_term(signum, frame):
        raise KeyboardInterrupt
    try:
        old = signal.signal(signal.SIGTERM, on_term)
    except ValueError:  # not the main thread
        old = None
    try:
        yield
    finally:
        if old is not None:
            signal.signal(signal.SIGTERM, old)


def wait_for_end(run, meter, active=lambda: True) -> bool:
    """Wait on the main thread until ``run.done`` is set, updating the terminal
    meter four times a second. True when the audio stalled: no callback for
    :data:`STALL_SECONDS` (the device or audio server went away), or
    ``active()`` turned false without the run saying it is done. Ctrl-C
    (KeyboardInterrupt) passes through."""
    seen, since = run.calls, time.monotonic()
    while not run.done.wait(0.25):
        if not active():
            return not run.done.is_set()
        if meter:
            meter.update(_gather(run))
        if run.calls != seen:
            seen, since = run.calls, time.monotonic()
        elif time.monotonic() - since > STALL_SECONDS:
            return True
    return False


def run_live(graph: Graph, out_dir: Path, args) -> int:
    """`streamq run` for graphs with live nodes: a PortAudio stream hosting a
    :class:`streamq.Chain` opened with ``realtime=True``."""
    if graph.header.host == "jack":
        from streamq.live.jack_host import run_jack
        return run_jack(graph, out_dir, args)
    from streamq.chain import Chain
    from streamq.live.devices import import_sounddevice
    sd = import_sounddevice()
    block = int(getattr(args, "block", None) or graph.header.block)
    seconds = getattr(args, "seconds", None)
    # designs and PDF snapshots go to a worker process (no contention for the
    # interpreter lock with the audio callback), meters' sums to a worker thread
    chain = Chain(graph, out_dir, realtime=True).open()
    rate = chain.sample_rate
    try:
        run = LiveRun(chain, block, None if seconds is None else int(round(seconds * rate)))
        run.sd = sd
        stream = _open_stream(sd, run, graph, rate, block)
    except BaseException:
        chain.close(failed=True, report_file=False)    # no audio ran: nothing to report
        raise
    meter = _terminal_meter(args)
    interrupted = stalled = False
    try:
        with sigterm_interrupts(), realtime_conditions():
            stream.start()
            try:
                # a stream that ends without our say, or stops calling us: the device
                # or audio server went away; stop, keep what was recorded, say so
                stalled = wait_for_end(run, meter, lambda: stream.active)
            except KeyboardInterrupt:
                interrupted = True
            if not stalled:
                # (with a dead server PortAudio would wait for a callback forever)
                stream.stop()
                stream.close()
    finally:
        if meter:
            meter.close()
    failed = run.error is not None
    if stalled:
        interrupted = True
    live = {"block": block, "block_ms": 1000.0 * block / rate, "xruns": run.xruns,
            "status": run.status, "callback_ms": run.timing(), "callbacks": run.calls,
            "worker_errors": worker_errors(chain.built)}
    # as offline: a run stopped by Ctrl-C/SIGTERM says "complete": false (its outputs are
    # still closed and valid); one that reached --seconds or its source's end is complete
    stopped_by = ("failure" if failed else "stalled" if stalled else "interrupt" if interrupted
                  else "seconds" if seconds else "end")
    closing_error: StreamqError | None = None   # (a meter's CSV on a full disk, ...)
    try:
        report = chain.close(early=interrupted, failed=failed,
                             extra={"live": live, "stopped_by": stopped_by})
    except StreamqError as exc:      # said after the report, which is written all the same
        report, closing_error = chain.report, exc
    except Exception as exc:         # a follower node failed at the end
        report = chain.report
        run.error = run.error or exc
        failed = True
    if failed:
        err = run.error
        if isinstance(err, StreamqError):
            raise err
        raise StreamqError(f"live run stopped at sample {run.pos}: "
                           f"{type(err).__name__}: {err}") from None
    _after(out_dir, report, args)
    live_summary(graph.name, out_dir, report)
    if closing_error is not None:
        print(f"streamq: {closing_error}", file=sys.stderr)
    if stalled:
        print(f"streamq: the audio stopped after {run.pos / rate:.2f} s (did the audio "
              f"server or device go away?); the outputs so far are kept", file=sys.stderr)
        # PortAudio cannot be shut down without its server; everything is written
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(2)
    return 2 if closing_error else 130 if interrupted else 0


def _open_stream(sd, run: LiveRun, graph: Graph, rate: int, block: int):
    """The PortAudio stream for a live run: duplex, input or output."""
    kwargs = dict(samplerate=rate, blocksize=block, dtype="float32", callback=run.callback)
    try:
        if run.inp and run.out:
            i = _device(sd, run.inp[0], "input", run.inp[0].spec.channels)
            o = _device(sd, run.out[0], "output", run.out[0].C)
            return sd.Stream(device=(i, o), channels=(run.inp[0].spec.channels, run.out[0].C),
                             **kwargs)
        if run.inp:
            i = _device(sd, run.inp[0], "input", run.inp[0].spec.channels)
            return sd.InputStream(device=i, channels=run.inp[0].spec.channels, **kwargs)
        if not run.out:
            raise StreamqError("a live run needs a live-input or a live-output node")
        o = _device(sd, run.out[0], "output", run.out[0].C)
        return sd.OutputStream(device=o, channels=run.out[0].C, **kwargs)
    except sd.PortAudioError as exc:
        raise _open_failure(exc, sd, run, graph, rate, block) from None


def worker_errors(built) -> int:
    """Failed worker jobs of a live run (every job is one estimator hop:
    snapshot and designs together), for the report's "live" section."""
    return sum(n.worker_errors for n in built.graph.nodes.values() if n.kind == "pdf-estimator")


def live_summary(name: str, out_dir: Path, report: dict) -> None:
    """What a live run prints at its end: a warning for failed worker jobs, then
    the run's length, dropouts and callback p99, and one line per meter.

    Parameters
    ----------
    name : str
        The graph's name.
    out_dir : Path
    report : dict
        The run's report, with its "live" section.
    """
    live = report["live"]
    failures = [(nid, r["worker_error"]) for nid, r in report.get("nodes", {}).items()
                if isinstance(r, dict) and r.get("worker_error")]
    if failures:
        nid, msg = failures[-1]
        print(f"streamq: warning: {live['worker_errors']} worker job(s) failed (last, node "
              f"'{nid}': {msg}); the audio went on with the codebooks in force", file=sys.stderr)
    t = live["callback_ms"]
    print(f"{name}: live run of {report['samples'] / report['sample_rate']:.1f} s, "
          f"{live['xruns']} xruns, callback p99 {t.get('p99', 0):.3f} ms of a "
          f"{live['block_ms']:.2f} ms block; output in {out_dir}/")
    for nid, m in report["meters"].items():
        print(f"  {nid}: SNR {m.get('snr_db') or float('nan'):.2f} dB, segmental SNR "
              f"{m.get('segsnr_db') or float('nan'):.2f} dB, {m.get('bits_per_sample') or 0:.3f} bits/sample")


def _terminal_meter(args):
    if getattr(args, "quiet", False):
        return None
    try:
        from streamq.report.terminal import LiveMeter
    except ImportError:
        return None
    return LiveMeter()


def _after(out_dir, report, args) -> None:
    try:
        from streamq.report import write_report_files
    except ImportError:
        return
    try:
        write_report_files(out_dir, report)
    except Exception as exc:  # plots must never cost the report
        print(f"streamq: warning: plots not written: {exc}", file=sys.stderr)
