"""The ``encoder`` node: quantizes a signal into an index stream, with a fixed
or adaptive codebook, and announces every codebook as a CodebookUpdate event
at the exact sample it takes effect.

Adaptation modes (DESIGN.md):

``fixed``
    one codebook designed before the run (from ``model``/``scale``, a
    ``train`` file, or a standard table).
``trailing``
    redesigned from the estimator's snapshot of the window that just ended;
    applies from the snapshot's sample on; no added latency; side info sent.
``lookahead``
    the input is delayed by one estimator window, so the codebook designed on
    ``[t - window, t)`` applies to those very samples; latency = window.
``backward``
    redesigned from the decoded past only (model fit on the shadow decoder's
    output); the decoder does the same; no side information.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec, index_dtype
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register
from streamq.nodes import coding
from streamq.nodes.estimator import js_drift

def drift_decision(snap, ref, threshold: float):
    """(drift, retrain?) for the drift trigger: Jensen-Shannon divergence between
    this snapshot and the one the codebook in force was designed on."""
    if ref is None:
        return None, True
    drift = js_drift(ref.centers, ref.counts, snap.centers, snap.counts)
    return drift, drift > threshold


def design_job(snap, init, recipe: dict):
    """The codebook for one snapshot, on the side-information grid, with its
    cost in bits; None when the window is empty. A pure function (live runs
    compute it in a worker process)."""
    L, opts = recipe["levels"], recipe["opts"]
    if recipe["design_from"] == "model" and snap.model is not None:
        m = snap.model
        model = m["model"] if m["model"] in coding.PARAMETRIC else recipe["model"]
        cb = coding.model_codebook(recipe["method"], L, model, m["mean"], m["std"], m.get("shape"),
                                   opts)
    elif snap.counts.sum() <= 0:
        return None
    else:
        cb = coding.histogram_codebook(recipe["method"], L, snap.centers, snap.counts, init, opts)
    return coding.finish_levels(cb, recipe["grid_bits"], recipe["standard"])


def live_design_job(snap, ref, init, recipe: dict):
    """Live runs: (drift, design or None), the trigger rule applied in the worker."""
    if recipe["trigger"] == "drift":
        drift, go = drift_decision(snap, ref, recipe["threshold"])
    else:
        drift, go = (None if ref is None else
                     js_drift(ref.centers, ref.counts, snap.centers, snap.counts)), True
    return drift, (design_job(snap, init, recipe) if go else None)


METHODS = ("lloyd-max", "optimal", "ecsq", "uniform", "mu-law", "a-law", "g711-mu", "g711-a")


class EncoderConfig(NodeConfig):
    use: Literal["encoder"]
    input: str = Field(description="signal to quantize")
    pdf: str | None = Field(None, description="pdf-estimator feeding adaptive designs "
                                              "(needed by trailing and lookahead)")
    method: Literal[METHODS] = Field("lloyd-max", description="design method")
    bits: int | None = Field(None, ge=1, le=16, description="index word length (levels = 2**bits)")
    levels: int | None = Field(None, ge=2, le=65_536, description="level count (instead of bits)")
    adapt: Literal["fixed", "trailing", "lookahead", "backward"] = Field(
        "fixed", description="adaptation mode")
    design_from: Literal["histogram", "model"] = Field(
        "histogram", description="adaptive designs use the estimator's histogram or its fitted model")
    trigger: Literal["every-hop", "drift"] = Field(
        "every-hop", description="retrain at every snapshot, or when drift passes drift_threshold")
    drift_threshold: float = Field(0.05, gt=0, le=1, description="Jensen-Shannon divergence (bits) "
                                                                 "that triggers a retrain")
    min_interval: Duration = Field(Duration(0), description="least time between retrains")
    warm_start: bool = Field(True, description="start each design from the codebook in force")
    model: Literal[coding.PARAMETRIC] = Field(
        "gaussian", description="PDF for fixed designs, the first adaptive codebook and backward fits")
    scale: float = Field(0.1, gt=0, le=10, description="standard deviation of `model` (full scale = 1)")
    shape: float | None = Field(None, gt=0, le=20, description="shape of gamma / generalized-gaussian")
    train: str | None = Field(None, description="fixed mode: design on this audio file's samples")
    entropy: float | None = Field(None, gt=0, le=16, description="ecsq: target index entropy, bits/sample")
    loading: float = Field(4.0, gt=0, le=64, description="uniform: half-range in standard deviations")
    mu: float = Field(255.0, gt=0, description="mu-law: mu")
    a: float = Field(87.6, ge=1, description="A-law: A")
    grid_bits: int = Field(16, ge=8, le=32, description="side info: levels are sent on a grid of "
                                                        "this many bits (full scale = 1)")
    codebooks_from: str | None = Field(
        None, description="replay: apply the codebook announcements of this index file (e.g. "
                          "recorded in a live run) instead of designing")
    window: Duration = Field(Duration(500, "ms"), description="backward mode: decoded past used")
    hop: Duration = Field(Duration(100, "ms"), description="backward mode: time between redesigns")

    @model_validator(mode="after")
    def _check(self):
        if self.bits is not None and self.levels is not None:
            raise ValueError("give bits or levels, not both")
        why = coding.check_method(self.method, self.adapt)
        if why:
            raise ValueError(why)
        if self.method in coding.G711 and self.n_levels != 256:
            raise ValueError(f"{self.method} has 256 levels (bits = 8)")
        if self.adapt in ("trailing", "lookahead") and self.pdf is None and self.codebooks_from is None:
            raise ValueError(f"adapt = \"{self.adapt}\" needs a pdf-estimator: set field 'pdf'")
        if self.method == "ecsq" and self.entropy is None:
            raise ValueError("method \"ecsq\" needs a target: set field 'entropy' (bits/sample)")
        return self

    @property
    def n_levels(self) -> int:
        if self.levels is not None:
            return self.levels
        if self.bits is not None:
            return 2 ** self.bits
        return 256 if self.method in coding.G711 else 16


@register
class Encoder(Node):
    """Quantizes a signal to indices with a fixed or adaptive codebook."""

    kind = "encoder"
    Config = EncoderConfig
    inputs = ("input", "pdf")
    optional_inputs = ("pdf",)

    def open(self, specs, ctx) -> StreamSpec:
        c = self.config
        spec = specs["input"]
        if spec.kind != "signal":
            raise self.fail("input", f"node '{c.input}' gives indices, not a signal")
        self.L = c.n_levels
        self.C = spec.channels
        self.rate = spec.rate
        self.opts = {"model": c.model, "scale": c.scale, "shape": c.shape, "entropy": c.entropy,
                     "loading": c.loading, "mu": c.mu, "a": c.a}
        self.standard = c.method in coding.G711
        self.delay = 0
        est = None
        if c.pdf is not None:
            pspec = specs["pdf"]
            est = pspec.extra.get("estimator")
            if est is None:
                raise self.fail("pdf", f"node '{c.pdf}' is not a pdf-estimator")
            if pspec.channels != self.C:
                raise self.fail("pdf", f"node '{c.pdf}' watches {pspec.channels} channel(s) but "
                                       f"the input has {self.C}")
            if c.design_from == "model" and est.get("fit", "none") == "none":
                raise self.fail("design_from", f"design_from = \"model\" needs a fit on "
                                               f"pdf-estimator '{c.pdf}' (set its field 'fit')")
        if c.adapt == "lookahead" and est is not None:
            self.delay = int(est["window"])
        self.int16 = spec.int_bits == 16
        self.in_latency = spec.latency
        self.min_interval = c.min_interval.samples(self.rate)
        self.version = [0] * self.C
        self.updates = 0
        self.side_bits = 0
        self.pending: list[CodebookUpdate] = []
        self.ref = [None] * self.C      # snapshot each channel's codebook was designed on
        self.last_design = [-(10 ** 18)] * self.C
        self.drift = [None] * self.C
        self.backward = None
        self.in_force = [0] * self.C
        coding_info = {"adapt": c.adapt, "method": c.method, "levels": self.L,
                       "grid_bits": None if self.standard else c.grid_bits}
        if c.adapt == "backward":
            W, H = c.window.samples(self.rate), c.hop.samples(self.rate)
            if W < 2:
                raise self.fail("window", "window must be at least 2 samples")
            if not 1 <= H <= W:
                raise self.fail("hop", f"hop must be 1..window samples (got {H}, window {W})")
            coding_info.update({"window": W, "hop": H, "model": c.model, "shape": c.shape,
                                "scale": c.scale, "options": {k: v for k, v in self.opts.items()
                                                              if k in ("loading",)}})
            self.backward = coding.BackwardAdapter(coding_info, self.C)
            first = self.backward.current[0]
            self.current = list(self.backward.current)
            bits0 = 0
        else:
            samples = None
            if c.train is not None:
                samples = self._read_training(ctx)
            try:
                first = coding.fixed_codebook(c.method, self.L, self.opts, samples)
            except Exception as exc:
                raise self.fail("method", f"cannot design the first codebook: {exc}") from None
            first, bits0 = coding.finish_levels(first, c.grid_bits, self.standard)
            if self.standard:  # G.711 mu-law decodes its two zero codes alike: 255 levels
                self.L = coding_info["levels"] = first.size
            self.current = [first] * self.C
        # the first codebook of every channel is in force from sample 0
        for ch in range(self.C):
            self._announce(0, ch, self.current[ch], bits0)
        self.replay = None
        self.replaying = c.codebooks_from is not None
        if self.replaying:
            self._open_replay(ctx)
        # live runs: designs go to the worker thread; finished ones apply at the next block
        self.live = bool(ctx.live and ctx.offload is not None) and self.replay is None
        self.jobs: list = []
        if self.live and c.adapt in ("trailing", "lookahead"):
            # designs start as soon as the estimator's snapshot is ready
            specs["pdf"].extra["subscribe"](self)
        self.worker_errors: list[str] = []
        self.recipe = {"method": c.method, "levels": self.L, "design_from": c.design_from,
                       "model": c.model, "opts": self.opts, "grid_bits": c.grid_bits,
                       "standard": self.standard, "trigger": c.trigger,
                       "threshold": c.drift_threshold}
        self.preroll_index = int(first.encode(np.zeros(1))[0])
        self.delay_line = DelayLine(self.delay, self.C)
        self.dtype = index_dtype(self.L)
        return StreamSpec("index", self.rate, self.C, spec.latency + self.delay, None, spec.frames,
                          {"coding": coding_info, "n_levels": self.L,
                           "index_dtype": self.dtype.name})

    def _open_replay(self, ctx) -> None:
        from streamq.engine.indexio import IndexReader
        path = ctx.resolve_input(self.config.codebooks_from)
        try:
            reader = IndexReader(path)
        except Exception as exc:
            raise self.fail("codebooks_from", str(exc)) from None
        info = reader.spec.extra
        if int(info.get("n_levels", 0)) != self.L or reader.spec.channels != self.C:
            reader.close()
            raise self.fail("codebooks_from", f"{path} holds {reader.spec.channels} channel(s) of "
                                              f"{info.get('n_levels')} levels; this encoder has "
                                              f"{self.C} of {self.L}")
        # a replayed stream keeps the recording's delay (lookahead recordings are late)
        self.delay = max(0, reader.spec.latency - self.in_latency)
        self.replay = iter(reader)
        self.replay_reader = reader
        self.replay_buf: list[CodebookUpdate] = []
        self.pending = []   # the recorded stream brings its own first codebooks
        self.version = [0] * self.C
        self.updates = self.side_bits = 0

    def _replayed(self, e: int) -> list[CodebookUpdate]:
        """Recorded announcements with at_sample < e, in order."""
        while self.replay is not None and (not self.replay_buf or self.replay_buf[-1].at_sample < e):
            pkt = next(self.replay, None)
            if pkt is None:
                self.replay = None
                break
            self.replay_buf.extend(pkt.events)
        out = [u for u in self.replay_buf if u.at_sample < e]
        self.replay_buf = [u for u in self.replay_buf if u.at_sample >= e]
        return out

    def _read_training(self, ctx) -> np.ndarray:
        from streamq.engine.audiofile import far_beyond_full_scale, open_for_reading
        path = ctx.resolve_input(self.config.train)
        f, info = open_for_reading(path, lambda m: self.fail("train", m))
        with f:
            try:
                x = f.read(dtype="float64", always_2d=True).ravel()
            except (RuntimeError, OSError) as exc:  # soundfile.LibsndfileError
                raise self.fail("train", f"{path}: cannot read it ({str(exc).strip()}); is the "
                                         f"file damaged or cut short?") from None
        if not np.all(np.isfinite(x)):
            raise self.fail("train", f"{path}: holds NaN or infinite samples")
        problem = far_beyond_full_scale(x[:, None], 0, path)
        if problem:
            raise self.fail("train", problem)
        return x

    def _announce(self, t: int, ch: int, cb, bits: int) -> None:
        # versions count per channel, so they do not depend on processing order
        self.version[ch] += 1
        v = self.version[ch]
        cb = cb.with_version(v) if hasattr(cb, "with_version") else cb
        self.current[ch] = cb
        self.in_force[ch] = v
        self.pending.append(CodebookUpdate(v, t, ch, np.asarray(cb.thresholds),
                                           np.asarray(cb.levels), bits, self.config.method))
        self.updates += 1
        self.side_bits += bits

    # -- adaptive designs -----------------------------------------------------
    def _consider(self, snap) -> bool:
        """Whether this snapshot should trigger a redesign (trigger rule)."""
        ch = snap.channel
        if snap.at_sample - self.last_design[ch] < self.min_interval:
            return False
        if self.config.trigger != "drift":
            return True
        drift, go = drift_decision(snap, self.ref[ch], self.config.drift_threshold)
        self.drift[ch] = drift
        return go

    def _design(self, snap):
        init = self.current[snap.channel] if self.config.warm_start else None
        return design_job(snap, init, self.recipe)

    def _encode(self, cb, x: np.ndarray) -> np.ndarray:
        if self.int16:
            return cb.encode_int16((x * 32768.0).astype(np.int16))
        return cb.encode(x)

    def close(self, complete):
        if getattr(self, "replay_reader", None) is not None:
            self.replay_reader.close()

    def step(self, frames, inputs) -> Packet:
        pkt = inputs["input"]
        s, e = pkt.block.start, pkt.block.start + frames
        x = pkt.block.data
        x = self.delay_line.push(x)
        out = np.empty((frames, self.C), dtype=self.dtype)
        at_start = list(self.in_force)
        if self.backward is not None:
            for ch in range(self.C):
                xc = x[:, ch]
                oc = out[:, ch]

                def seg(a, b, cb, xc=xc, oc=oc):
                    idx = self._encode(cb, xc[a:b])
                    oc[a:b] = idx
                    return np.asarray(cb.levels)[idx]

                for t, cb in self.backward.run(ch, s, frames, seg):
                    self._announce(t, ch, cb, 0)
        else:
            in_force = list(self.current)
            # designs happen in sample order, each warm-started from the one before
            changes: list[list[tuple[int, object]]] = [[] for _ in range(self.C)]
            if self.replaying:
                from streamq.design import Codebook
                for u in self._replayed(e):
                    cb = Codebook(levels=u.levels, thresholds=u.thresholds, version=u.version)
                    self.current[u.channel] = cb
                    self.version[u.channel] = u.version
                    self.in_force[u.channel] = u.version
                    self.pending.append(u)
                    self.updates += 1
                    self.side_bits += int(u.side_info_bits)
                    changes[u.channel].append((u.at_sample, cb))
            elif self.live:
                self._live_designs(s, inputs, changes)
            elif self.config.adapt in ("trailing", "lookahead"):
                snaps = [ev for ev in inputs["pdf"].events
                         if getattr(ev, "counts", None) is not None and s <= ev.at_sample < e]
                for ev in sorted(snaps, key=lambda ev: (ev.at_sample, ev.channel)):
                    if not self._consider(ev):
                        continue
                    done = self._design(ev)
                    if done is None:
                        continue
                    self._announce(ev.at_sample, ev.channel, *done)
                    self.ref[ev.channel] = ev
                    self.last_design[ev.channel] = ev.at_sample
                    changes[ev.channel].append((ev.at_sample, self.current[ev.channel]))
            for ch in range(self.C):
                cur, pos = in_force[ch], s
                for t, cb in changes[ch]:
                    if t > pos:
                        out[pos - s:t - s, ch] = self._encode(cur, x[pos - s:t - s, ch])
                    cur, pos = cb, t
                if pos < e:
                    out[pos - s:, ch] = self._encode(cur, x[pos - s:, ch])
        # announcements travel with the packet that holds their first sample
        events = [u for u in self.pending if u.at_sample < e]
        self.pending = [u for u in self.pending if u.at_sample >= e]
        events.sort(key=lambda u: (u.at_sample, u.channel))
        versions = tuple(
            tuple([(s, at_start[ch])] * (not any(u.at_sample == s and u.channel == ch for u in events))
                  + [(u.at_sample, u.version) for u in events if u.channel == ch])
            for ch in range(self.C))
        return Packet(IndexBlock(out, s, self.rate, versions), tuple(events))

    def _live_designs(self, s: int, inputs, changes) -> None:
        """Live runs: apply the designs the worker process has delivered, at this
        block's first sample (only reference swaps happen here)."""
        while self.jobs and self.jobs[0][1] is not None:
            ch, snap, (drift, done) = self.jobs.pop(0)
            self.drift[ch] = drift
            if done is None:
                continue
            self._announce(s, ch, *done)
            self.ref[ch] = snap
            self.last_design[ch] = s
            changes[ch].append((s, self.current[ch]))

    def requests(self, t: int) -> list:
        """Live runs (audio thread, at a hop of the estimator): the designs to run
        with the snapshots of sample ``t``, as (channel, job, args)."""
        out = []
        for ch in range(self.C):
            if any(j[0] == ch for j in self.jobs):
                continue   # the worker is behind: skip, the next snapshot is fresher
            if t - self.last_design[ch] < self.min_interval:
                continue
            init = self.current[ch] if self.config.warm_start else None
            out.append((ch, live_design_job, (self.ref[ch], init, self.recipe)))
            self.jobs.append((ch, None, None))   # placeholder until delivered
        return out

    def failed(self, exc: BaseException) -> None:
        """Live runs (worker result thread): the hop's job failed. Keep the codebooks
        in force, drop the placeholders, and say what went wrong."""
        self.worker_errors.append(f"{type(exc).__name__}: {exc}")
        self.jobs[:] = [j for j in self.jobs if j[1] is not None]

    def deliver(self, snaps, results) -> None:
        """Live runs (worker result thread): designs ready to apply at the next block."""
        for ch, res in results:
            for i, job in enumerate(self.jobs):
                if job[0] == ch and job[1] is None:
                    self.jobs[i] = (ch, snaps[ch], res)
                    break

    def report(self):
        extra = {"worker_errors": len(self.worker_errors),
                 "worker_error": self.worker_errors[-1]} if self.worker_errors else {}
        return {**extra, "codebook_updates": self.updates, "side_info_bits": self.side_bits,
                "levels": self.L, "latency_frames": self.delay,
                "drift": [d for d in self.drift]}

    def get_state(self):
        st = {"version": list(self.version), "current": list(self.current), "pending": list(self.pending),
              "ref": list(self.ref), "last_design": list(self.last_design),
              "updates": self.updates, "side_bits": self.side_bits,
              "delay_line": self.delay_line.get_state()}
        if self.backward is not None:
            st["backward"] = self.backward.get_state()
        return st

    def set_state(self, st):
        self.version, self.updates, self.side_bits = list(st["version"]), st["updates"], st["side_bits"]
        self.current, self.pending = list(st["current"]), list(st["pending"])
        self.ref, self.last_design = list(st["ref"]), list(st["last_design"])
        self.delay_line.set_state(st["delay_line"])
        if self.backward is not None:
            self.backward.set_state(st["backward"])
