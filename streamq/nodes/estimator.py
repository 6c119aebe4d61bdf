"""The ``pdf-estimator`` node: amplitude distribution of a running signal on
sliding windows, with statistics, an optional parametric fit and a drift
statistic.

Windows and hops are counted in samples from the start of the stream: a
snapshot is due at every ``t = k * hop`` (k >= 1) and covers
``[max(0, t - window), t)``. It travels in the packet that covers sample
``t`` (rule 1 of DESIGN.md: the result is the same whatever the block size).

Each snapshot's statistics are also written to ``<node id>-windows.csv`` in
the run's output folder (one row per hop and channel, see WINDOW_COLUMNS).
Its ``drift`` is hop to hop: the Jensen-Shannon divergence between this
window and the previous one. The divergence from the window a codebook was
designed on belongs to each encoder (several may share one estimator); the
encoder computes it for its drift trigger and reports it.
"""

from __future__ import annotations

import copy

from concurrent.futures import BrokenExecutor, wait
from typing import Literal

import numpy as np
from pydantic import Field
from scipy import optimize, special

from streamq.engine.audiofile import unwritable
from streamq.engine.blocks import EstimatorLink, Packet, PdfSnapshot, StreamSpec
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register
from streamq.nodes import estimator_kernels
from streamq.nodes.estimator_kernels import (GRID_CODES, PIECE_COLUMNS, bin_window,
                                             combine_pieces, grid_fill, grid_histogram,
                                             grid_push, piece_stats)
from streamq.nodes.meter import Series, write_series_csv

#: seconds a live run's end waits for the worker jobs still out
FINISH_WAIT = 30.0

FITS = ("gaussian", "laplacian", "gamma", "generalized-gaussian")
CLIP_LEVEL = 1.0 - 2.0 ** -15  # at or beyond: counted as clipped (16-bit full scale)
#: Fitted shapes are kept in these ranges. A window with (almost) no spread, such
#: as silence or a DC offset, drives the maximum-likelihood shape of a two-sided
#: gamma towards 1e4, where the model cannot be designed on; beyond about 8 the
#: two-sided gamma is a pair of narrow bumps away from zero, which no audio
#: amplitude distribution resembles (speech fits are well below 1).
SHAPE_RANGE = {"gamma": (0.05, 8.0), "generalized-gaussian": (0.2, 8.0)}
#: Columns of ``<node id>-windows.csv``; a fit adds model_mean, model_std and,
#: for gamma and generalized-gaussian, model_shape.
WINDOW_COLUMNS = ("at_sample", "channel", "samples", "mean", "variance", "kurtosis", "crest_db",
                  "peak", "clipped", "drift")


# -- window math (also used by the encoder and the backward adapter) ----------

def window_histogram(x: np.ndarray, bins: int, span: str, weights: np.ndarray | None = None
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Histogram of one window as (bin centers, counts).

    ``span="full-scale"`` uses ``bins`` bins over [-1, 1]; ``span="tracked"``
    spreads them over the window's own [min, max] (widened by half a bin so the
    extremes sit inside). A constant window gives one occupied bin.
    """
    if span == "full-scale":
        lo, hi = -1.0, 1.0
    else:
        lo, hi = float(x.min()), float(x.max())
        if hi - lo < 1e-12:
            lo, hi = lo - 1e-6, hi + 1e-6
        pad = 0.5 * (hi - lo) / bins
        lo, hi = lo - pad, hi + pad
    width = (hi - lo) / bins
    idx = ((x - lo) * (1.0 / width)).astype(np.int64)
    np.clip(idx, 0, bins - 1, out=idx)
    counts = np.bincount(idx, weights=weights, minlength=bins).astype(np.float64)
    return _centers(lo, width, bins), counts


def _centers(lo: float, width: float, bins: int) -> np.ndarray:
    return lo + (np.arange(bins) + 0.5) * width


def _stats(mean: float, var: float, m4: float, peak: float, clipped: int, n: int) -> dict:
    """The statistics dict of a window from its moments (see window_stats)."""
    rms = float(np.sqrt(var + mean * mean))
    return {
        "mean": mean,
        "variance": var,
        "kurtosis": m4 / (var * var) if var > 0 else 0.0,
        "crest_db": 20.0 * np.log10(peak / rms) if rms > 0 and peak > 0 else 0.0,
        "peak": peak,
        "clipped": int(clipped),
        "samples": int(n),
    }


def window_stats(x: np.ndarray, weights: np.ndarray | None = None) -> dict[str, float]:
    """Mean, variance, kurtosis (plain, 3 for a Gaussian), crest factor in dB,
    peak and clipped-sample count of a window."""
    if weights is None:
        mean = float(x.mean())
        d = x - mean
        d2 = d * d
        var = float(d2.mean())
        m4 = float((d2 * d2).mean())
    else:
        wsum = float(weights.sum())
        mean = float(np.dot(weights, x) / wsum)
        d = x - mean
        d2 = d * d
        var = float(np.dot(weights, d2) / wsum)
        m4 = float(np.dot(weights, d2 * d2) / wsum)
    return _stats(mean, var, m4, float(np.max(np.abs(x))),
                  np.count_nonzero(np.abs(x) >= CLIP_LEVEL), x.shape[0])


def fit_model(name: str, centers: np.ndarray, counts: np.ndarray) -> dict[str, float]:
    """Maximum-likelihood fit of a zero-symmetric parametric PDF around the
    histogram's mean, computed on the (weighted) histogram.

    Returns a dict with ``model``, ``mean``, ``std`` and, for gamma and
    generalized-gaussian, ``shape`` (kept inside :data:`SHAPE_RANGE`, the
    scale then refitted for that shape). A window without spread (silence,
    DC) gives a standard deviation of zero.

    References
    ----------
    .. [1] Varanasi, M. K. and Aazhang, B. (1989). Parametric generalized
       Gaussian density estimation. J. Acoust. Soc. Am. 86(4), 1404-1415.
    """
    w = counts / counts.sum()
    mean = float(np.dot(w, centers))
    d = np.abs(centers - mean)
    var = float(np.dot(w, d * d))
    std = float(np.sqrt(var))
    out = {"model": name, "mean": mean, "std": std}
    if name == "laplacian":
        b = float(np.dot(w, d))  # ML scale of a Laplacian: mean absolute deviation
        out["std"] = b * np.sqrt(2.0)
    elif name == "generalized-gaussian":
        occupied = w > 0
        dd, ww = np.maximum(d[occupied], 1e-300), w[occupied]
        logd = np.log(dd)

        def nll(beta):  # profile negative log-likelihood per sample, scale at its ML value
            m = np.dot(ww, np.exp(beta * logd))
            alpha = (beta * m) ** (1.0 / beta)
            return -(np.log(beta / (2.0 * alpha)) - special.gammaln(1.0 / beta) - 1.0 / beta)

        lo, hi = SHAPE_RANGE[name]
        # a window without spread makes the likelihood degenerate (log 0): quietly
        with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
            res = optimize.minimize_scalar(nll, bounds=(lo, hi), method="bounded",
                                           options={"xatol": 1e-4})
            beta = min(max(float(res.x), lo), hi)
            alpha = (beta * np.dot(ww, np.exp(beta * logd))) ** (1.0 / beta)
            std = float(alpha * np.exp(0.5 * (special.gammaln(3.0 / beta)
                                              - special.gammaln(1.0 / beta))))
        out["shape"] = beta
        out["std"] = std if np.isfinite(std) else 0.0
    elif name == "gamma":
        occupied = w > 0
        dd, ww = np.maximum(d[occupied], 1e-300), w[occupied]
        mabs = float(np.dot(ww, dd))
        mlog = float(np.dot(ww, np.log(dd)))
        # two-sided gamma p(x) ~ |x|^(a-1) exp(-|x|/theta): ML shape solves
        # log(a) - digamma(a) = log(mean|x|) - mean(log|x|)
        # log(a) - digamma(a) falls from ~1/a at 0 to ~1/(2a) at infinity: clamp the
        # target into what the bracket can reach (a constant window has s = 0)
        s = min(max(np.log(mabs) - mlog, 5.1e-5), 9.0e3) if mabs > 0 else 1.0
        a = optimize.brentq(lambda a: np.log(a) - special.digamma(a) - s, 1e-4, 1e4)
        lo, hi = SHAPE_RANGE[name]
        a = min(max(a, lo), hi)
        theta = mabs / a   # the ML scale for that shape
        out["shape"] = float(a)
        out["std"] = float(theta * np.sqrt(a * (a + 1.0)))
    return out


def js_drift(c1: np.ndarray, n1: np.ndarray, c2: np.ndarray, n2: np.ndarray, points: int = 128) -> float:
    """Jensen-Shannon divergence (bits, 0..1) between two histograms that may
    sit on different bin grids: both are moved onto one common grid of
    ``points`` cells through their cumulative counts."""
    from streamq.design.kernels import js_divergence   # compiled: one call per hop
    f = np.float64
    return float(js_divergence(np.asarray(c1, f), np.asarray(n1, f), np.asarray(c2, f),
                               np.asarray(n2, f), int(points)))


def next_cut(p: int, hop: int, window: int) -> int:
    """The first piece boundary after sample ``p``: boundaries are the
    multiples of the hop and the window starts ``k * hop - window``, so every
    window is a run of whole pieces (see streamq.nodes.estimator_kernels)."""
    r = (-window) % hop
    return min((p // hop + 1) * hop, ((p - r) // hop + 1) * hop + r)


def window_cuts(t: int, have: int, window: int, hop: int) -> list[int]:
    """Piece boundaries of the window ``[t - have, t)``, as offsets into it
    (0 first, ``have`` last)."""
    start = t - have
    cuts = [0]
    b = start
    while b < t:
        b = min(next_cut(b, hop, window), t)
        cuts.append(b - start)
    return cuts


def _summaries(pieces: np.ndarray) -> np.ndarray:
    """A window's summary (channels x PIECE_COLUMNS) from its pieces'."""
    out = np.empty(pieces.shape[1:])
    combine_pieces(pieces, out)
    return out


def _snapshots(t: int, have: int, summary: np.ndarray, histogram, params: dict, last: list
               ) -> list[PdfSnapshot]:
    """Snapshots of every channel from the window's summary; ``histogram(ch, lo,
    hi, centers, counts)`` fills the channel's histogram given its extremes."""
    bins = params["bins"]
    out = []
    for ch in range(summary.shape[0]):
        n, total, m2, _, m4, lo, hi, peak, clipped = summary[ch]
        centers, counts = np.empty(bins), np.empty(bins)
        histogram(ch, lo, hi, centers, counts)
        stats = _stats(total / n, m2 / n, m4 / n, peak, clipped, have)
        out.append(_snapshot_of(t, ch, have, centers, counts, stats, params, last))
    return out


def _snapshot_of(t, ch, have, centers, counts, stats, params, last) -> PdfSnapshot:
    model = fit_model(params["fit"], centers, counts) if params["fit"] != "none" else None
    prev = last[ch]
    drift = js_drift(prev.centers, prev.counts, centers, counts) if prev is not None else None
    return PdfSnapshot(t, ch, t - have, centers, counts, stats, model, drift)


def snapshot_job(t: int, win: np.ndarray, params: dict, last: list) -> list[PdfSnapshot]:
    """Snapshots of every channel for the window ``win`` ending at sample ``t``.

    A pure function of its arguments, so live runs can compute it in a worker
    process; offline runs get the same snapshots hop by hop from the node's
    pieces and code counts. ``last`` holds each channel's previous snapshot
    (for the hop-to-hop drift) or None. ``params`` gives ``bins``, ``span``,
    ``half_life``, ``fit`` and, without forgetting, ``window`` and ``hop`` (the
    piece boundaries; the whole window is one piece without them) and
    ``grid`` (every sample on the 16-bit grid).
    """
    have = win.shape[0]
    if params["half_life"]:
        age = np.arange(have - 1, -1, -1, dtype=np.float64)
        weights = np.exp2(-age / params["half_life"])
        out = []
        for ch in range(win.shape[1]):
            x = win[:, ch]
            centers, counts = window_histogram(x, params["bins"], params["span"], weights)
            out.append(_snapshot_of(t, ch, have, centers, counts, window_stats(x, weights),
                                    params, last))
        return out
    cuts = window_cuts(t, have, params.get("window", have), params.get("hop", have))
    pieces = np.empty((len(cuts) - 1, win.shape[1], len(PIECE_COLUMNS)))
    for k in range(len(cuts) - 1):
        piece_stats(win[cuts[k]:cuts[k + 1]], CLIP_LEVEL, pieces[k])
    tracked = params["span"] != "full-scale"
    if params.get("grid"):
        fine = np.empty((win.shape[1], GRID_CODES), dtype=np.int32)
        grid_fill(win, fine)

        def histogram(ch, lo, hi, centers, counts):
            grid_histogram(fine[ch], lo, hi, params["bins"], tracked, centers, counts)
    else:
        def histogram(ch, lo, hi, centers, counts):
            bin_window(win[:, ch], lo, hi, params["bins"], tracked, centers, counts)
    return _snapshots(t, have, _summaries(pieces), histogram, params, last)


def hop_job(t: int, win: np.ndarray, params: dict, last: list, requests: list) -> tuple:
    """Live runs, in the worker process: the snapshots of one hop, then the
    designs the subscribed encoders asked for (``requests``: per encoder, a
    list of ``(channel, job, args)``; ``job(snapshot, *args)``)."""
    snaps = snapshot_job(t, win, params, last)
    results = [[(ch, job(snaps[ch], *args)) for ch, job, args in req] for req in requests]
    return snaps, results


# -- the node ---------------------------------------------------------------------

class EstimatorConfig(NodeConfig):
    use: Literal["pdf-estimator"]
    input: str = Field(description="signal to watch")
    window: Duration = Field(Duration(500, "ms"), description="window length (samples, ms or s)")
    hop: Duration = Field(Duration(100, "ms"), description="time between snapshots")
    bins: int = Field(1024, ge=8, le=65_536, description="histogram bins")
    span: Literal["tracked", "full-scale"] = Field(
        "tracked", description="histogram range: the window's own min..max, or -1..1")
    half_life: Duration | None = Field(
        None, description="exponential forgetting inside the window: a sample this old counts half")
    fit: Literal["none", "gaussian", "laplacian", "gamma", "generalized-gaussian"] = Field(
        "none", description="also fit a parametric PDF by maximum likelihood")


@register
class PdfEstimator(Node):
    """Amplitude histogram, statistics and optional PDF fit on sliding windows."""

    kind = "pdf-estimator"
    Config = EstimatorConfig
    inputs = ("input",)

    def open(self, specs, ctx) -> StreamSpec:
        spec = specs["input"]
        if spec.kind != "signal":
            raise self.fail("input", f"node '{self.config.input}' gives indices, not a signal")
        rate = spec.rate
        self.W = self.config.window.samples(rate)
        self.H = self.config.hop.samples(rate)
        if self.W < 2:
            raise self.fail("window", f"window must be at least 2 samples (got {self.W})")
        if self.H < 1:
            raise self.fail("hop", "hop must be at least 1 sample")
        if self.H > self.W:
            raise self.fail("hop", f"hop ({self.H} samples) is longer than the window "
                                   f"({self.W} samples); samples between windows would be ignored")
        if spec.frames is not None and self.W > 100 * max(spec.frames, 1) and self.W > 10**8:
            raise self.fail("window", "window is absurdly long")
        self.C = spec.channels
        self.half_life = (self.config.half_life.samples(rate) if self.config.half_life else None)
        if self.half_life is not None and self.half_life < 1:
            raise self.fail("half_life", "half_life must be at least 1 sample")
        self.params = {"bins": self.config.bins, "span": self.config.span,
                       "half_life": self.half_life, "fit": self.config.fit,
                       "window": self.W, "hop": self.H,
                       "grid": spec.int_bits is not None and spec.int_bits <= 16}
        self.live = bool(ctx.live and ctx.offload is not None)
        # offline, windows are summed from pieces and code counts (see
        # estimator_kernels); live runs summarise each window in the worker
        self.hopwise = not (self.live or self.half_life)
        self.grid = self.hopwise and self.params["grid"]
        # ring of the last W samples, kept twice over (rows i and W + i hold the
        # same sample), so that every window is one contiguous stretch of it
        self.buf = np.zeros((2 * self.W, self.C))
        self.written = 0
        self._derive()
        self.pending: list[PdfSnapshot] = []  # snapshots due at the start of the next packet
        self.last: list[PdfSnapshot | None] = [None] * self.C
        self.snapshots = 0
        self.jobs: list = []
        self.listeners: list = []
        self.worker_errors = 0
        self.worker_lost = False   # the worker process died: no more offloads this run
        self.skipped = 0
        model_cols = ()
        if self.config.fit != "none":
            model_cols = ("model_mean", "model_std") + (
                ("model_shape",) if self.config.fit in SHAPE_RANGE else ())
        self.rows = Series(WINDOW_COLUMNS + model_cols,
                           {"at_sample", "channel", "samples", "clipped"})
        self.out_dir = ctx.out_dir
        if self.live:   # compiled before the stream starts, never on its threads
            estimator_kernels.warm_up()
        return StreamSpec("signal", rate, self.C, spec.latency, spec.int_bits, spec.frames,
                          dict(spec.extra),
                          estimator=EstimatorLink(self.W, self.H, self.config.bins,
                                                  self.config.span, self.config.fit,
                                                  self.subscribe))

    def _push(self, data: np.ndarray) -> None:
        """Append to the ring of the last W samples (both copies) and, on the
        16-bit grid, to the window's code counts: O(len(data)), no shifting."""
        if data.shape[0]:
            grid_push(self.buf, self.written, data, self.fine, self.grid)
            self.written += data.shape[0]

    def _next(self, p: int) -> int:
        """The first boundary after sample ``p``: pieces' boundaries when windows
        are summed from pieces, else hops."""
        return next_cut(p, self.H, self.W) if self.hopwise else (p // self.H + 1) * self.H

    def _derive(self) -> None:
        """What the hop-by-hop summaries keep besides the ring, rebuilt from
        it: the code counts of the last W samples and the finished pieces
        that later windows hold (a state taken back continues exactly)."""
        self.fine = np.zeros((self.C, GRID_CODES if self.grid else 1), dtype=np.int32)
        self.pieces: list[tuple[int, np.ndarray]] = []   # (first sample, summary), in order
        self.cut = 0                                      # where the open piece starts
        if not self.hopwise or not self.written:
            return
        have = min(self.W, self.written)
        if self.grid:
            grid_fill(self._window(have), self.fine)
        a = self.written - have
        b = next_cut(a - 1, self.H, self.W) if a else 0   # first boundary at or after a
        while True:
            nxt = next_cut(b, self.H, self.W)
            if nxt > self.written:
                break
            self._close(b, nxt)
            b = nxt
        self.cut = b

    def _close(self, a: int, b: int) -> None:
        """Summarise the piece [a, b), all of it still in the ring."""
        end = self.written % self.W + self.W
        summary = np.empty((self.C, len(PIECE_COLUMNS)))
        piece_stats(self.buf[end - (self.written - a):end - (self.written - b)], CLIP_LEVEL,
                    summary)
        self.pieces.append((a, summary))

    def _window(self, have: int) -> np.ndarray:
        """The last ``have`` samples, oldest first: a view of the ring, valid
        until the next push."""
        end = self.written % self.W + self.W
        return self.buf[end - have:end]

    def _snapshot(self, t: int) -> list[PdfSnapshot]:
        have = min(self.W, t)
        if not self.hopwise:
            snaps = snapshot_job(t, self._window(have), self.params, self.last)
        else:
            while self.pieces[0][0] < t - have:     # pieces no later window holds
                self.pieces.pop(0)
            summary = _summaries(np.stack([p for _, p in self.pieces]))
            bins, tracked = self.config.bins, self.config.span != "full-scale"
            if self.grid:
                def histogram(ch, lo, hi, centers, counts):
                    grid_histogram(self.fine[ch], lo, hi, bins, tracked, centers, counts)
            else:
                win = self._window(have)

                def histogram(ch, lo, hi, centers, counts):
                    bin_window(win[:, ch], lo, hi, bins, tracked, centers, counts)
            snaps = _snapshots(t, have, summary, histogram, self.params, self.last)
        self._took(snaps)
        return snaps

    def subscribe(self, hook) -> None:
        """Live runs: an encoder designing from these snapshots. At each hop
        ``hook.requests(t)`` (audio thread, cheap) says which designs to run;
        the worker process computes the snapshots and those designs in one job,
        and ``hook.deliver(snapshots, results)`` gets them from the worker's
        result thread: one round trip per hop, no audio block waited for."""
        self.listeners.append(hook)

    def _ready(self, fut) -> None:
        exc = fut.exception()
        if exc is None:
            snaps, results = fut.result()
            for hook, res in zip(self.listeners, results):
                hook.deliver(snaps, res)
        else:   # the audio goes on with the codebooks in force; the failure is reported
            for hook in self.listeners:
                hook.failed(exc)

    def _took(self, snaps: list[PdfSnapshot]) -> None:
        for snap in snaps:
            self.last[snap.channel] = snap
            row = {"at_sample": snap.at_sample, "channel": snap.channel, **snap.stats,
                   "drift": snap.drift}
            if snap.model is not None:
                row.update(model_mean=snap.model["mean"], model_std=snap.model["std"],
                           model_shape=snap.model.get("shape"))
            self.rows.append(row)
        self.snapshots += 1

    def step(self, frames, inputs) -> Packet:
        pkt = inputs["input"]
        data = pkt.block.data
        s = pkt.block.start
        events = list(self.pending)
        self.pending = []
        events.extend(self._take_done())
        # boundaries b with s < b <= s + frames (hops among them), each using
        # data up to b
        pos = 0
        b = self._next(s)
        while b <= s + frames:
            self._push(data[pos:b - s])
            pos = b - s
            t, b = b, self._next(b)
            if self.hopwise:
                self._close(self.cut, t)
                self.cut = t
                if t % self.H:     # a window start, not a hop
                    continue
            if self.live:
                # live runs: the worker computes the snapshot from a copy of the
                # window; it travels with the first block after it is ready. A
                # worker that falls behind skips hops instead of piling them up.
                if self.worker_lost:
                    continue
                if sum(1 for f in self.jobs if not f.done()) >= 2:
                    self.skipped += 1
                    continue
                requests = [h.requests(t) for h in self.listeners]
                try:
                    fut = self.ctx.offload(hop_job, t, self._window(min(self.W, t)).copy(),
                                           self.params, list(self.last), requests)
                except BrokenExecutor as exc:
                    self._lost(exc)
                    continue
                fut.add_done_callback(self._ready)
                self.jobs.append(fut)
                if fut.done():   # a host that waits for each job (streamq.Chain): take it now,
                    for snap in self._take_done():   # so the next hop's drift sees it, as offline
                        (events if snap.at_sample < s + frames else self.pending).append(snap)
                continue
            snaps = self._snapshot(t)
            if t < s + frames:
                events.extend(snaps)
            else:
                self.pending.extend(snaps)
        if pos < frames:
            self._push(data[pos:])
        return Packet(pkt.block, tuple(pkt.events) + tuple(events), pkt.indices)

    def _take_done(self) -> list[PdfSnapshot]:
        """Live runs: the snapshots of the worker jobs done so far, in order."""
        events: list[PdfSnapshot] = []
        while self.jobs and self.jobs[0].done():
            fut = self.jobs.pop(0)
            exc = fut.exception()
            if exc is None:
                snaps = fut.result()[0]
                self._took(snaps)
                events.extend(snaps)
            else:
                self.worker_errors += 1
                self.worker_error = f"{type(exc).__name__}: {exc}"
        return events

    def finish(self) -> None:
        """Live runs: wait for the jobs still out (a few hops at most), so the
        windows file holds every hop, as offline."""
        if self.jobs:
            wait(self.jobs, timeout=FINISH_WAIT)
            self._take_done()

    def _lost(self, exc: BaseException) -> None:
        """The worker process is gone (killed, out of memory): like a failed job,
        the audio goes on with the codebooks in force and the failure is counted
        and reported; no more jobs are offered to the dead pool."""
        self.worker_lost = True
        self.worker_errors += 1
        self.worker_error = (f"{type(exc).__name__}: {exc} (the worker process is gone; "
                             f"no more snapshots or designs this run)")
        for hook in self.listeners:
            hook.failed(exc)

    def close(self, complete: bool) -> None:
        """Write ``<node id>-windows.csv`` (if any samples came in)."""
        if not (complete or self.written) or self.out_dir is None:
            return
        path = self.out_dir / f"{self.id}-windows.csv"
        try:
            write_series_csv(path, self.rows)
        except OSError as exc:
            raise self.fail(None, unwritable(path, exc)) from None

    def report(self):
        return {"snapshots": self.snapshots, "window_samples": self.W, "hop_samples": self.H,
                "windows_csv": f"{self.id}-windows.csv",
                "worker_errors": self.worker_errors, "hops_skipped": self.skipped,
                **({"worker_error": self.worker_error} if self.worker_errors else {})}

    def get_state(self):
        return {"buf": self.buf.copy(), "written": self.written, "pending": list(self.pending),
                "last": list(self.last), "snapshots": self.snapshots,
                "rows": copy.deepcopy(self.rows)}

    def set_state(self, state):
        self.buf = state["buf"].copy()
        self.written = state["written"]
        self._derive()
        self.pending = list(state["pending"])
        self.last = list(state["last"])
        self.snapshots = state["snapshots"]
        self.rows = copy.deepcopy(state["rows"])
