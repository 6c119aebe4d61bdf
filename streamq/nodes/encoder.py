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

import math
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec, index_dtype
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register
from streamq.nodes import coding
from streamq.nodes.schemes.backward import BackwardAdapter
from streamq.nodes.schemes.window import Recipe, WindowDesigns

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
            est = pspec.estimator
            if est is None:
                raise self.fail("pdf", f"node '{c.pdf}' is not a pdf-estimator")
            if pspec.channels != self.C:
                raise self.fail("pdf", f"node '{c.pdf}' watches {pspec.channels} channel(s) but "
                                       f"the input has {self.C}")
            if c.design_from == "model" and est.fit == "none":
                raise self.fail("design_from", f"design_from = \"model\" needs a fit on "
                                               f"pdf-estimator '{c.pdf}' (set its field 'fit')")
        if c.adapt == "lookahead" and est is not None:
            self.delay = est.window
        self.int16 = spec.int_bits == 16
        self.in_latency = spec.latency
        self.version = [0] * self.C
        self.th_rows = None             # thresholds of the codebooks in force, stacked
        self.updates = 0
        self.side_bits = 0
        self.pending: list[CodebookUpdate] = []
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
            self.backward = BackwardAdapter(coding_info, self.C)
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
        self.window = None     # trailing and lookahead: designs from the estimator's windows
        if c.adapt in ("trailing", "lookahead"):
            recipe = Recipe(c.method, self.L, c.design_from, c.model, self.opts, c.grid_bits,
                            self.standard, c.trigger, c.drift_threshold)
            self.window = WindowDesigns(recipe, list(self.current),
                                        min_interval=c.min_interval.samples(self.rate),
                                        apply_after=c.apply_after.samples(self.rate),
                                        warm_start=c.warm_start)
            if self.live:   # designs start as soon as the estimator's snapshot is ready
                specs["pdf"].estimator.subscribe(self.window)
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
        from streamq.nodes.schemes.gain import GainScheme, unit_blocks
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
            out, made, self.scheme_state = self.scheme.encode(x, s, self.scheme_state, self.dtype)
            for u in made:
                self._book(u)
        if not self.pending:        # the common case in the audio callback
            return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, ())))
        events = [u for u in self.pending if u.at_sample < s + frames]
        self.pending = [u for u in self.pending if u.at_sample >= s + frames]
        events.sort(key=lambda u: (u.at_sample, u.channel))
        return Packet(IndexBlock(out, s, self.rate, _versions(s, at_start, events)), tuple(events))

    def _book(self, u: CodebookUpdate) -> None:
        """Count an announcement (made here, by a scheme, or replayed), its
        version now in force, and queue it."""
        self.version[u.channel] = self.in_force[u.channel] = u.version
        self.pending.append(u)
        self.updates += 1
        self.side_bits += int(u.side_info_bits)

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
        self._book(CodebookUpdate(v, t, ch, np.asarray(cb.thresholds), np.asarray(cb.levels),
                                  bits, self.config.method))

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
            return self.window is None or self.window.nothing_due()
        return self.config.adapt == "fixed"

    def _live_step(self, s: int, e: int, x: np.ndarray, frames: int) -> Packet:
        """Live runs, in the audio callback: one compiled pass over the block
        with the codebooks in force; a codebook that falls due inside the block
        re-encodes its channel from that sample on."""
        out = np.empty((frames, self.C), dtype=self.dtype)
        self.kernel(x, self.th_rows, out)
        if self.window is None or self.window.nothing_due():
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
                    self._book(u)
                    changes[u.channel].append((u.at_sample, cb))
            elif self.live and self.window is not None:
                self._live_designs(s, e, changes)
            elif self.window is not None:
                snaps = [ev for ev in inputs["pdf"].events
                         if getattr(ev, "counts", None) is not None and s <= ev.at_sample < e]
                for at, ch, cb, bits in self.window.offline(snaps, e):
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
        delivered that fall due in this block (only reference swaps)."""
        for at, ch, ready in self.window.due_live(s, e):
            self._announce(at, ch, *ready)
            if changes is not None:
                changes[ch].append((at, self.current[ch]))

    @property
    def drift(self) -> list:
        """The newest drift figure per channel (None where none was measured)."""
        return list(self.window.state.drift) if self.window is not None else [None] * self.C

    def report(self):
        extra = self.window.report() if self.window is not None else {}
        if self.live and self.config.adapt == "trailing":
            extra["late_codebooks"] = self.window.late
        return {**extra, "codebook_updates": self.updates, "side_info_bits": self.side_bits,
                "levels": self.L, "latency_frames": self.delay, "drift": self.drift}

    def get_state(self):
        """Everything needed to continue the stream: the codebooks in force and
        their versions, announcements not yet sent, counters, the delay line,
        and the adaptive scheme's own state."""
        st = {"version": list(self.version), "in_force": list(self.in_force),
              "current": list(self.current), "pending": list(self.pending),
              "updates": self.updates, "side_bits": self.side_bits,
              "delay_line": self.delay_line.get_state()}
        if self.window is not None:
            st["window"] = self.window.get_state()
        if self.backward is not None:
            st["backward"] = self.backward.get_state()
        if self.scheme is not None:
            st["scheme"] = self.scheme_state
        return st

    def set_state(self, st):
        self.version, self.updates, self.side_bits = list(st["version"]), st["updates"], st["side_bits"]
        self.in_force = list(st["in_force"])
        self.current, self.pending = list(st["current"]), list(st["pending"])
        self.th_rows = None
        self.delay_line.set_state(st["delay_line"])
        if self.window is not None:
            self.window.set_state(st["window"])
        if self.backward is not None:
            self.backward.set_state(st["backward"])
        if self.scheme is not None:
            self.scheme_state = st["scheme"]
