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

import collections
import math
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec, index_dtype
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register
from streamq.errors import StreamqError
from streamq.nodes import coding
from streamq.nodes.estimator import js_drift

def unit_blocks(x: np.ndarray, size: int) -> np.ndarray:
    """Training samples for gain mode's unit codebook: each whole block of
    ``size`` samples divided by its RMS (silent blocks left out)."""
    n = x.shape[0] // size
    blocks = x[:n * size].reshape(n, size)
    rms = np.sqrt(np.mean(blocks * blocks, axis=1))
    keep = rms > 0
    return (blocks[keep] / rms[keep, None]).ravel()


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
    else:
        return coding.window_codebook(recipe["method"], L, snap.centers, snap.counts, init, opts,
                                      recipe["grid_bits"], recipe["standard"])
    return coding.finish_levels(cb, recipe["grid_bits"], recipe["standard"])


def live_design_job(snap, ref, init, recipe: dict):
    """Live runs: (drift, design or None), the trigger rule applied in the worker."""
    if recipe["trigger"] == "drift":
        drift, go = drift_decision(snap, ref, recipe["threshold"])
    else:
        drift, go = (None if ref is None else
                     js_drift(ref.centers, ref.counts, snap.centers, snap.counts)), True
    return drift, (design_job(snap, init, recipe) if go else None)


FAILED = object()   # a live job whose worker call raised


def _versions(s: int, at_start, events) -> tuple:
    """IndexBlock.versions of a block from ``s``: per channel, the version in
    force at ``s`` (unless replaced right there) and each announcement's."""
    if not events:     # the common case, kept cheap: it runs in the audio callback
        return tuple([((s, v),) for v in at_start])
    return tuple(
        tuple([(s, at_start[ch])] * (not any(u.at_sample == s and u.channel == ch for u in events))
              + [(u.at_sample, u.version) for u in events if u.channel == ch])
        for ch in range(len(at_start)))

METHODS = ("lloyd-max", "optimal", "ecsq", "uniform", "mu-law", "a-law", "g711-mu", "g711-a")


class EncoderConfig(NodeConfig):
    use: Literal["encoder"]
    input: str = Field(description="signal to quantize")
    pdf: str | None = Field(None, description="pdf-estimator feeding adaptive designs "
                                              "(needed by trailing and lookahead)")
    method: Literal[METHODS] = Field("lloyd-max", description="design method")
    bits: int | None = Field(None, ge=1, le=16, description="index word length (levels = 2**bits)")
    levels: int | None = Field(None, ge=2, le=65_536, description="level count (instead of bits)")
    adapt: Literal["fixed", "trailing", "lookahead", "backward", "step", "gain"] = Field(
        "fixed", description="adaptation mode (step: backward step adaptation sample by sample; "
                             "gain: forward gain adaptation block by block)")
    design_from: Literal["histogram", "model"] = Field(
        "histogram", description="adaptive designs use the estimator's histogram or its fitted model")
    trigger: Literal["every-hop", "drift"] = Field(
        "every-hop", description="retrain at every snapshot, or when drift passes drift_threshold")
    drift_threshold: float = Field(0.05, gt=0, le=1, description="Jensen-Shannon divergence (bits) "
                                                                 "that triggers a retrain")
    min_interval: Duration = Field(Duration(0), description="least time between retrains")
    apply_after: Duration = Field(
        Duration(0), description="trailing: a design from the window ending at t applies from "
                                 "t + apply_after (gives a live worker time to finish it, so a "
                                 "live run and an offline replay apply it at the same sample)")
    warm_start: bool = Field(True, description="start each design from the newest codebook (a "
                                               "cold start when that one has lost levels or is "
                                               "wider than the window's data)")
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
    multipliers: list[float] | None = Field(
        None, min_length=1, max_length=32_768,
        description="step mode: step multiplier per index magnitude, innermost first (default: "
                    "the table for 2 to 5 bits)")
    multiplier_power: float = Field(
        1.0, gt=0, le=4, description="step mode: raise every multiplier to this power (1: as "
                                     "given; below 1 the step moves more slowly: steadier on "
                                     "noise-like material, slower on onsets)")
    min_step_db: float = Field(-80.0, ge=-200, le=0, description="step mode: smallest step, dB "
                                                                  "re full scale")
    max_step_db: float | None = Field(None, ge=-200, le=0,
                                      description="step mode: largest step, dB re full scale "
                                                  "(default: the step whose top level is at full "
                                                  "scale)")
    gain_block: Duration = Field(Duration(16, "ms"), description="gain mode: block coded with one "
                                                                  "gain (also the added latency)")
    gain_from: Literal["rms", "peak"] = Field("rms", description="gain mode: the block's RMS, or "
                                                                 "its peak (no overload)")
    gain_step_db: float = Field(1.5, gt=0, le=24, description="gain mode: spacing of the gain grid")
    gain_bits: int = Field(6, ge=1, le=12, description="gain mode: side information per block and "
                                                       "channel (the grid has 2**gain_bits gains "
                                                       "from full scale down)")
    window: Duration = Field(Duration(20, "ms"), description="backward mode: decoded past used")
    hop: Duration = Field(Duration(5, "ms"), description="backward mode: time between redesigns "
                                                         "(speech changes within 5 to 20 ms)")

    @model_validator(mode="after")
    def _check(self):
        if self.bits is not None and self.levels is not None:
            raise ValueError("levels: give bits or levels, not both")
        why = coding.check_method(self.method, self.adapt)
        if why:
            raise ValueError(why)
        if self.method in coding.G711 and self.n_levels != 256:
            raise ValueError(f"bits: {self.method} has 256 levels (bits = 8)")
        if self.adapt in ("trailing", "lookahead") and self.pdf is None and self.codebooks_from is None:
            raise ValueError(f"pdf: adapt = \"{self.adapt}\" needs a pdf-estimator: set this field")
        if self.apply_after.value and self.adapt != "trailing":
            raise ValueError("apply_after: only adapt = \"trailing\" applies designs later")
        if self.method == "optimal" and (self.adapt != "fixed" or self.train is not None):
            from streamq.design.optimal import MAX_DP_LEVELS  # the design library loads lazily
            if self.n_levels > MAX_DP_LEVELS:   # designs on histograms: the DP's limit
                raise ValueError(f"{'levels' if self.levels is not None else 'bits'}: method "
                                 f"\"optimal\" designs on histograms with at most "
                                 f"{MAX_DP_LEVELS} levels ({self.n_levels} asked)")
        if self.adapt in ("step", "gain"):
            self._check_scheme()
        if self.method == "ecsq" and self.entropy is None:
            raise ValueError("entropy: method \"ecsq\" needs a target: set this field (bits/sample)")
        return self

    def _check_scheme(self) -> None:
        """The step and gain modes' own rules."""
        from streamq.nodes.schemes.step import MULTIPLIERS
        if self.method not in ("lloyd-max", "uniform"):
            raise ValueError(f"method: adapt = \"{self.adapt}\" scales a \"lloyd-max\" or "
                             f"\"uniform\" codebook")
        if self.codebooks_from is not None:
            raise ValueError(f"codebooks_from: adapt = \"{self.adapt}\" derives its codebooks "
                             f"from the signal; nothing to replay")
        if self.adapt == "gain":
            return
        L = self.n_levels
        if L % 2 or L < 4:
            raise ValueError(f"{'levels' if self.levels is not None else 'bits'}: adapt = "
                             f"\"step\" needs an even level count of at least 4 (got {L})")
        if self.multipliers is None:
            if L not in {2 ** b for b in MULTIPLIERS}:
                raise ValueError(f"multipliers: no default table for {L} levels (there is one "
                                 f"for 2 to 5 bits); give {L // 2} values")
        elif len(self.multipliers) != L // 2:
            raise ValueError(f"multipliers: give {L // 2} values (one per index magnitude, "
                             f"innermost first), got {len(self.multipliers)}")
        elif not all(math.isfinite(m) and m > 0 for m in self.multipliers):
            raise ValueError("multipliers: every multiplier must be a finite number above 0")
        if self.max_step_db is not None and self.max_step_db < self.min_step_db:
            raise ValueError("max_step_db: must not be below min_step_db")

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
        self.apply_after = c.apply_after.samples(self.rate)
        self.late = 0                   # live: codebooks applied after their due sample
        self.scheduled: list = []       # designed, not yet due: (at, channel, codebook, bits)
        self.version = [0] * self.C
        self.th_rows = None             # thresholds of the codebooks in force, stacked
        self.updates = 0
        self.side_bits = 0
        self.pending: list[CodebookUpdate] = []
        self.ref = [None] * self.C      # snapshot each channel's codebook was designed on
        self.last_design = [-(10 ** 18)] * self.C
        self.drift = [None] * self.C
        self.backward = None
        self.scheme = self.scheme_state = None    # step and gain modes (nodes/schemes)
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
        elif c.adapt in ("step", "gain"):
            first, bits0 = self._open_scheme(ctx, coding_info)
            self.current = [first] * self.C
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
        # the newest design of each channel: the warm start of the next one
        self.designed = list(self.current)
        # the first codebook of every channel is in force from sample 0
        for ch in range(self.C):
            self._announce(0, ch, self.current[ch], bits0)
        self.replay = None
        self.replaying = c.codebooks_from is not None
        if self.replaying:
            self._open_replay(ctx)
        # live runs: designs go to the worker process; finished ones apply when due (at a
        # block boundary or inside a block), or at the next block if late
        self.live = bool(ctx.live and ctx.offload is not None) and self.replay is None
        # live: [channel, snapshot_at, snapshot, result, (codebook, bits, version) or None]
        self.jobs = collections.deque()
        self.next_version = list(self.version)
        if self.live and c.adapt in ("trailing", "lookahead"):
            # designs start as soon as the estimator's snapshot is ready
            specs["pdf"].extra["subscribe"](self)
        self.worker_errors: list[str] = []
        self.design_errors = 0          # offline designs that failed (codebook kept)
        self.design_error = ""
        self.recipe = {"method": c.method, "levels": self.L, "design_from": c.design_from,
                       "model": c.model, "opts": self.opts, "grid_bits": c.grid_bits,
                       "standard": self.standard, "trigger": c.trigger,
                       "threshold": c.drift_threshold}
        self.preroll_index = int(first.encode(np.zeros(1))[0])
        self.delay_line = DelayLine(self.delay, self.C)
        self.dtype = index_dtype(self.L)
        self.kernel = None
        from streamq.design.kernels import encode_rows, encode_span, warm_up
        self.span_kernel = encode_span
        if ctx.live:    # compiled (or loaded from the disk cache) now, not in the callback
            warm_up()
        # live, float input, no delay: the callback's lean path (_live_step)
        self.fast_live = (self.live and not self.int16 and self.delay == 0
                          and self.backward is None and c.adapt in ("fixed", "trailing"))
        if self.fast_live:  # small blocks: one compiled call per block (compiled now)
            self.kernel = encode_rows
        return StreamSpec("index", self.rate, self.C, spec.latency + self.delay, None, spec.frames,
                          {"coding": coding_info, "n_levels": self.L,
                           "index_dtype": self.dtype.name})

    def _open_scheme(self, ctx, coding_info: dict):
        """Step and gain modes: the scheme, its first state, and the first
        codebook to announce with its cost in bits."""
        c = self.config
        if c.adapt == "step":
            from streamq.nodes.schemes.step import MULTIPLIERS, StepScheme, coding_info as step_info
            bits = self.L.bit_length() - 1
            mult = np.asarray(c.multipliers if c.multipliers is not None else MULTIPLIERS[bits],
                              dtype=np.float64) ** c.multiplier_power
            coding_info.update(step_info(c.method, self.L, c.model, c.shape, c.scale, mult,
                                         c.min_step_db, c.max_step_db))
            self.scheme = StepScheme(coding_info)
            self.scheme_state = self.scheme.initial_state(self.C)
            # announced for the meter: the reach of the widest step (the decoder
            # derives every step itself: no side information)
            return self.scheme.widest(), 0
        from streamq.nodes.schemes.gain import GainScheme
        size = c.gain_block.samples(self.rate)
        if size < 1:
            raise self.fail("gain_block", "a gain block must hold at least 1 sample")
        samples = None
        if c.train is not None:
            samples = self._read_training(ctx)
            samples = unit_blocks(samples, size)
            if samples.size == 0:
                raise self.fail("train", f"{c.train}: silent; nothing to design the unit "
                                         f"codebook on")
        try:
            unit = coding.fixed_codebook(c.method, self.L, {**self.opts, "scale": 1.0}, samples)
        except Exception as exc:
            raise self.fail("method", f"cannot design the unit codebook: {exc}") from None
        # a model's unit codebook is known at both ends; a trained one is sent
        # once, a grid_bits word per level
        bits0 = 0 if samples is None else self.L * c.grid_bits
        self.scheme = GainScheme(unit, size, c.gain_step_db, c.gain_bits, c.gain_from == "peak",
                                 c.method)
        self.scheme_state = self.scheme.initial_state(self.C, c.scale)
        self.delay = size
        coding_info.update({"gain_block": size, "gain_from": c.gain_from,
                            "gain_step_db": c.gain_step_db, "gain_bits": c.gain_bits})
        return self.scheme.codebook(self.scheme_state.index[0]), bits0 + c.gain_bits

    def _scheme_step(self, s: int, x: np.ndarray, frames: int) -> Packet:
        """Step and gain modes: the scheme codes the block; the node keeps the
        books (versions, updates, side information)."""
        at_start = list(self.in_force)
        if self.config.adapt == "step":
            out, self.scheme_state = self.scheme.encode(x, self.scheme_state, self.dtype)
        else:
            out, made, self.scheme_state = self.scheme.encode(x, s, self.scheme_state, self.dtype,
                                                              self.span_kernel)
            for u in made:
                self._book(u)
        events = [u for u in self.pending if u.at_sample < s + frames]
        self.pending = [u for u in self.pending if u.at_sample >= s + frames]
        events.sort(key=lambda u: (u.at_sample, u.channel))
        return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, events)), tuple(events))

    def _book(self, u: CodebookUpdate) -> None:
        """Count an announcement the scheme made, and queue it."""
        self.version[u.channel] = self.in_force[u.channel] = u.version
        self.pending.append(u)
        self.updates += 1
        self.side_bits += u.side_info_bits

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

    def _announce(self, t: int, ch: int, cb, bits: int, version: int | None = None) -> None:
        """Put ``cb`` in force on channel ``ch`` from sample ``t`` and queue its
        announcement. ``version``: given when ``cb`` already carries it (live
        designs are numbered when delivered)."""
        # versions count per channel, so they do not depend on processing order
        if version is None:
            self.version[ch] += 1
            v = self.version[ch]
            cb = cb.with_version(v) if hasattr(cb, "with_version") else cb
        else:
            v = self.version[ch] = version
        self.current[ch] = cb
        self.th_rows = None
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
        """The design for one snapshot (offline), or None. A design that fails
        (a window the method cannot design on) keeps the codebook in force; the
        failure is counted and the last one named in the report, and the next
        snapshot is tried as usual. (Live runs: a failing design fails its
        worker job, counted in ``worker_errors``.)"""
        init = self.designed[snap.channel] if self.config.warm_start else None
        try:
            return design_job(snap, init, self.recipe)
        except (StreamqError, ArithmeticError) as exc:
            self.design_errors += 1
            self.design_error = (f"design on the window ending at sample {snap.at_sample}, "
                                 f"channel {snap.channel} failed: {exc}")
            return None

    def _designed(self, ch: int, snap, cb) -> None:
        """Book-keeping of a finished design (the snapshot it came from)."""
        self.designed[ch] = cb
        self.ref[ch] = snap
        self.last_design[ch] = snap.at_sample

    # 16-bit input: the 65,536-entry table pays for itself on long stretches only;
    # an adaptive codebook that codes one hop (a few thousand samples) searches
    LUT_FROM = 16_384

    def _encode(self, cb, x: np.ndarray, out: np.ndarray) -> None:
        """Indices of the stretch ``x`` of one channel under ``cb``, into ``out``."""
        if self.int16 and x.shape[0] >= self.LUT_FROM:
            out[:] = cb.encode_int16((x * 32768.0).astype(np.int16))
        else:   # compiled: equal to cb.encode(x), without numpy's per-value search
            self.span_kernel(x, cb.thresholds, out)

    def live_upstream(self):
        """Live runs get designs from the estimator's worker jobs, not its packets."""
        ups = self.upstream()
        if self.live or self.replaying:
            ups.pop("pdf", None)
        return ups

    def close(self, complete):
        if getattr(self, "replay_reader", None) is not None:
            self.replay_reader.close()

    def _steady(self) -> bool:
        """Whether this step can change no codebook: a fixed or live encoder with
        nothing due (the audio callback's common case)."""
        if self.backward is not None or self.replaying or self.delay or self.pending:
            return False
        if self.live:
            jobs = self.jobs
            return not jobs or jobs[0][3] is None
        return self.config.adapt == "fixed"

    def _live_step(self, s: int, e: int, x: np.ndarray, frames: int) -> Packet:
        """Live runs, in the audio callback: one compiled pass over the block
        with the codebooks in force; a codebook that falls due inside the block
        re-encodes its channel from that sample on."""
        out = np.empty((frames, self.C), dtype=self.dtype)
        self.kernel(x, self.th_rows, out)
        jobs = self.jobs
        if not jobs or jobs[0][3] is None:
            return Packet(IndexBlock(out, s, self.rate, _versions(s, self.in_force, ())))
        at_start = list(self.in_force)
        self._live_designs(s, e, None)
        events, self.pending = self.pending, []
        for u in events:   # in sample order; a later one overwrites the rows after it
            a, ch = u.at_sample - s, u.channel
            self.kernel(x[a:, ch:ch + 1], u.thresholds[None, :], out[a:, ch:ch + 1])
        return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, events)), tuple(events))

    def _stack_thresholds(self):
        """Every channel's thresholds as rows of one array (None if their counts
        differ); kept until the next codebook change."""
        th = [np.asarray(cb.thresholds, dtype=np.float64) for cb in self.current]
        if any(t.shape != th[0].shape for t in th):
            return None
        self.th_rows = np.ascontiguousarray(np.stack(th))
        return self.th_rows

    def step(self, frames, inputs) -> Packet:
        pkt = inputs["input"]
        s, e = pkt.block.start, pkt.block.start + frames
        x = pkt.block.data
        if self.scheme is not None:
            return self._scheme_step(s, x, frames)
        if self.fast_live and not self.pending and (self.th_rows is not None
                                                    or self._stack_thresholds() is not None):
            return self._live_step(s, e, x, frames)
        if self._steady():
            out = np.empty((frames, self.C), dtype=self.dtype)
            for ch, cb in enumerate(self.current):
                self._encode(cb, x[:, ch], out[:, ch])
            return Packet(IndexBlock(out, s, self.rate, _versions(s, self.in_force, ())))
        x = self.delay_line.push(x)
        out = np.empty((frames, self.C), dtype=self.dtype)
        at_start = list(self.in_force)
        if self.backward is not None:
            for ch in range(self.C):
                xc = x[:, ch]
                oc = out[:, ch]

                def seg(a, b, cb, xc=xc, oc=oc):
                    self._encode(cb, xc[a:b], oc[a:b])
                    return np.asarray(cb.levels)[oc[a:b]]

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
                    self.th_rows = None
                    self.version[u.channel] = u.version
                    self.in_force[u.channel] = u.version
                    self.pending.append(u)
                    self.updates += 1
                    self.side_bits += int(u.side_info_bits)
                    changes[u.channel].append((u.at_sample, cb))
            elif self.live:
                self._live_designs(s, e, changes)
            elif self.config.adapt in ("trailing", "lookahead"):
                snaps = [ev for ev in inputs["pdf"].events
                         if getattr(ev, "counts", None) is not None and s <= ev.at_sample < e]
                for ev in sorted(snaps, key=lambda ev: (ev.at_sample, ev.channel)):
                    if not self._consider(ev):
                        continue
                    done = self._design(ev)
                    if done is None:
                        continue
                    self._designed(ev.channel, ev, done[0])
                    self.scheduled.append((ev.at_sample + self.apply_after, ev.channel, *done))
                # codebooks fall due in sample order (apply_after is the same for all)
                while self.scheduled and self.scheduled[0][0] < e:
                    at, ch, cb, bits = self.scheduled.pop(0)
                    self._announce(at, ch, cb, bits)
                    changes[ch].append((at, self.current[ch]))
            for ch in range(self.C):
                cur, pos = in_force[ch], s
                for t, cb in changes[ch]:
                    if t > pos:
                        self._encode(cur, x[pos - s:t - s, ch], out[pos - s:t - s, ch])
                    cur, pos = cb, t
                if pos < e:
                    self._encode(cur, x[pos - s:, ch], out[pos - s:, ch])
        if not self.pending:     # the common case: no announcements in this block
            return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, ())))
        # announcements travel with the packet that holds their first sample
        events = [u for u in self.pending if u.at_sample < e]
        self.pending = [u for u in self.pending if u.at_sample >= e]
        events.sort(key=lambda u: (u.at_sample, u.channel))
        return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, events)), tuple(events))

    def _live_designs(self, s: int, e: int, changes) -> None:
        """Live runs (audio thread): apply the designs the worker process has
        delivered, in order, each at its due sample (the snapshot's sample plus
        ``apply_after``), or at this block's first sample if that has passed
        (counted as late). Only reference swaps happen here."""
        jobs = self.jobs
        while jobs:
            job = jobs[0]
            res = job[3]
            if res is None:            # not back from the worker yet
                return
            if res is FAILED:
                jobs.popleft()
                continue
            ready = job[4]
            at = job[1] + self.apply_after
            if ready is not None and at >= e:
                return                 # due in a later block
            jobs.popleft()
            if ready is None:
                continue
            if at < s:
                self.late += 1
                at = s
            ch = job[0]
            self._announce(at, ch, *ready)
            if changes is not None:
                changes[ch].append((at, self.current[ch]))

    def requests(self, t: int) -> list:
        """Live runs (at a hop of the estimator): the designs to run with the
        snapshots of sample ``t``, as (channel, job, args). Each design is
        warm-started from the channel's newest one, as offline."""
        out = []
        for ch in range(self.C):
            if any(j[0] == ch and j[3] is None for j in list(self.jobs)):
                continue   # the worker is behind: skip, the next snapshot is fresher
            if t - self.last_design[ch] < self.min_interval:
                continue
            init = self.designed[ch] if self.config.warm_start else None
            out.append((ch, live_design_job, (self.ref[ch], init, self.recipe)))
            self.jobs.append([ch, t, None, None, None])   # filled in when delivered
        return out

    def failed(self, exc: BaseException) -> None:
        """Live runs (worker result thread): the hop's job failed. Keep the codebooks
        in force, mark the waiting jobs failed, and say what went wrong."""
        self.worker_errors.append(f"{type(exc).__name__}: {exc}")
        for job in list(self.jobs):
            if job[3] is None:
                job[3] = FAILED

    def deliver(self, snaps, results) -> None:
        """Live runs (worker result thread): finished designs, in job order. The
        bookkeeping for the next request (warm start, drift reference, interval)
        is done here; the audio thread applies them when due."""
        for ch, res in results:
            for job in list(self.jobs):
                if job[0] == ch and job[3] is None:
                    drift, done = res
                    self.drift[ch] = drift
                    if done is not None:
                        self._designed(ch, snaps[ch], done[0])
                        # numbered now (designs apply in delivery order), so the audio
                        # thread only swaps references
                        self.next_version[ch] += 1
                        v = self.next_version[ch]
                        job[4] = (done[0].with_version(v), done[1], v)
                    job[2] = snaps[ch]
                    job[3] = res     # set last: the audio thread reads it as "ready"
                    break

    def report(self):
        extra = {"worker_errors": len(self.worker_errors),
                 "worker_error": self.worker_errors[-1]} if self.worker_errors else {}
        if self.design_errors:
            extra.update(design_errors=self.design_errors, design_error=self.design_error)
        if self.live and self.config.adapt == "trailing":
            extra["late_codebooks"] = self.late
        return {**extra, "codebook_updates": self.updates, "side_info_bits": self.side_bits,
                "levels": self.L, "latency_frames": self.delay,
                "drift": [d for d in self.drift]}

    def get_state(self):
        st = {"version": list(self.version), "current": list(self.current), "pending": list(self.pending),
              "ref": list(self.ref), "last_design": list(self.last_design),
              "updates": self.updates, "side_bits": self.side_bits,
              "designed": list(self.designed), "scheduled": list(self.scheduled),
              "design_errors": (self.design_errors, self.design_error),
              "delay_line": self.delay_line.get_state()}
        if self.backward is not None:
            st["backward"] = self.backward.get_state()
        if self.scheme is not None:
            st["scheme"] = self.scheme_state
        return st

    def set_state(self, st):
        self.version, self.updates, self.side_bits = list(st["version"]), st["updates"], st["side_bits"]
        self.current, self.pending = list(st["current"]), list(st["pending"])
        self.th_rows = None
        self.ref, self.last_design = list(st["ref"]), list(st["last_design"])
        self.designed, self.scheduled = list(st["designed"]), list(st["scheduled"])
        self.design_errors, self.design_error = st.get("design_errors", (0, ""))
        self.delay_line.set_state(st["delay_line"])
        if self.backward is not None:
            self.backward.set_state(st["backward"])
        if self.scheme is not None:
            self.scheme_state = st["scheme"]
            self.in_force = list(self.version)
