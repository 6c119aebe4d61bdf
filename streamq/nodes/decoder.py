"""The ``decoder`` node: rebuilds the signal from an index stream, exactly as
a far-end decoder would: each CodebookUpdate's levels apply from its
``at_sample`` on; in backward mode it runs the same adapter as the encoder on
its own output."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from streamq.engine.blocks import CodebookUpdate, Packet, SignalBlock, StreamSpec
from streamq.engine.node import Node, NodeConfig
from streamq.engine.registry import register


class DecoderConfig(NodeConfig):
    use: Literal["decoder"]
    input: str = Field(description="encoder or index-source to decode")


@register
class Decoder(Node):
    """Rebuilds the signal from indices and codebook events."""

    kind = "decoder"
    Config = DecoderConfig
    inputs = ("input",)

    def open(self, specs, ctx) -> StreamSpec:
        spec = specs["input"]
        if spec.kind != "index":
            raise self.fail("input", f"node '{self.config.input}' gives a signal, not indices; "
                                     f"a decoder reads an encoder or an index-source")
        info = spec.extra.get("coding", {})
        self.C = spec.channels
        self.L = int(spec.extra.get("n_levels", info.get("levels", 0)))
        self.levels: list[np.ndarray | None] = [None] * self.C
        self.codebooks: list[CodebookUpdate | None] = [None] * self.C
        self.backward = None
        self.pending: list[CodebookUpdate] = []
        self.versions = 0
        self.channel_versions = [1] * self.C  # version 1: the encoder's first codebook
        self.flat = None     # every channel's levels as rows (None: rebuild)
        self.kernel = None
        if ctx.live:         # small blocks: one compiled call per block (compiled now)
            from streamq.design.kernels import decode_rows, warm_up
            warm_up()
            self.kernel = decode_rows
        self.step_scheme = None
        if info.get("adapt") == "step":
            from streamq.nodes.schemes.step import StepScheme
            try:
                self.step_scheme = StepScheme(info)
            except (KeyError, TypeError, ValueError) as exc:
                raise self.fail("input", f"node '{self.config.input}' describes a step-adapted "
                                         f"stream this decoder cannot follow ({exc})") from None
            self.steps = self.step_scheme.initial_state(self.C)
        if info.get("adapt") == "backward":
            from streamq.nodes.schemes.backward import BackwardAdapter
            self.backward = BackwardAdapter(info, self.C)
            self.levels = [np.asarray(cb.levels) for cb in self.backward.current]
        return StreamSpec("signal", spec.rate, self.C, spec.latency, None, spec.frames,
                          {"coding": info, "n_levels": self.L})

    def _check(self, idx: np.ndarray, start: int, ch: int, levels) -> None:
        if levels is None:
            raise self.fail("input", f"indices without a codebook at sample {start}, channel {ch}")
        if idx.size and int(idx.max()) >= len(levels):
            bad = int(np.argmax(idx >= len(levels)))
            raise self.fail("input", f"index {int(idx[bad])} out of range (codebook has "
                                     f"{len(levels)} levels) at sample {start + bad}, channel {ch}")

    def step(self, frames, inputs) -> Packet:
        pkt = inputs["input"]
        s = pkt.block.start
        e = s + frames
        idx = pkt.block.data
        out = np.empty((frames, self.C))
        events = []
        if self.step_scheme is not None:
            # every step follows from the indices; the announcements (the first
            # codebook's reach, for meters) pass through
            out, steps, bad = self.step_scheme.decode(np.ascontiguousarray(idx), self.steps)
            if bad >= 0:
                ch, n = divmod(bad, frames)
                raise self.fail("input", f"index {int(idx[n, ch])} out of range (codebook has "
                                         f"{self.L} levels) at sample {s + n}, channel {ch}")
            self.steps = steps
            events = self._updates(pkt.events, [])
            self.versions += len(events)
        elif self.backward is not None:
            sent = {(u.channel, u.at_sample): u for u in pkt.events if isinstance(u, CodebookUpdate)}
            for ch in range(self.C):
                ic, oc = idx[:, ch], out[:, ch]

                def seg(a, b, cb, ic=ic, oc=oc, ch=ch):
                    lv = np.asarray(cb.levels)
                    self._check(ic[a:b], s + a, ch, lv)
                    oc[a:b] = lv[ic[a:b]]
                    return oc[a:b]

                for t, cb in self.backward.run(ch, s, frames, seg):
                    self.versions += 1
                    self.channel_versions[ch] += 1
                    mine = CodebookUpdate(self.channel_versions[ch], t, ch, np.asarray(cb.thresholds),
                                          np.asarray(cb.levels), 0, "backward")
                    theirs = sent.get((ch, t))
                    if theirs is not None and not np.array_equal(theirs.levels, mine.levels):
                        raise self.fail("input", f"backward adaptation lost step with the encoder "
                                                 f"at sample {t}, channel {ch}")
                    events.append(mine)
            # the encoder's announcements of the first codebooks come along as they are;
            # codebooks due at the block's end travel with the next block
            mine = self.pending + events
            events = [u for u in pkt.events if isinstance(u, CodebookUpdate) and u.at_sample == 0] \
                + [u for u in mine if u.at_sample < e]
            self.pending = [u for u in mine if u.at_sample >= e]
        elif self.kernel is not None and idx.dtype.kind == "u" and self._table() is not None:
            # live, in the audio callback: one compiled pass with the codebooks in
            # force; one that starts inside the block re-decodes its channel from there
            if self.kernel(idx, self.flat, out) >= 0:
                self._check_all(idx, s)
            for u in self._updates(pkt.events, events):
                a, ch = max(0, u.at_sample - s), u.channel
                lv = self.levels[ch] = u.levels
                self.flat[ch] = lv
                self.codebooks[ch] = u
                self.versions += 1
                if self.kernel(idx[a:, ch:ch + 1], lv[None, :], out[a:, ch:ch + 1]) >= 0:
                    self._check_all(idx[a:], s + a)
        elif not pkt.events and idx.dtype.kind == "u" and self._table() is not None:
            # offline, no codebook changes in this block: all channels at once
            if idx.size and int(idx.max()) >= self.L:
                self._check_all(idx, s)
            out = self.flat.ravel()[idx + self.offsets]
        else:
            self.flat = None
            cuts: list[list[CodebookUpdate]] = [[] for _ in range(self.C)]
            for u in self._updates(pkt.events, events):
                cuts[u.channel].append(u)
            for ch in range(self.C):
                pos = s
                for u in cuts[ch]:
                    if u.at_sample > pos:
                        self._decode(idx, out, pos - s, u.at_sample - s, ch, s)
                        pos = u.at_sample
                    self.levels[ch] = np.asarray(u.levels)
                    self.codebooks[ch] = u
                    self.versions += 1
                if pos < e:
                    self._decode(idx, out, pos - s, frames, ch, s)
        return Packet(SignalBlock(out, s, pkt.block.rate), tuple(events), pkt.block)

    def _updates(self, incoming, events: list) -> list[CodebookUpdate]:
        """The codebook announcements among ``incoming``, checked, appended to
        ``events``."""
        for u in incoming:
            if isinstance(u, CodebookUpdate):
                if not 0 <= u.channel < self.C:
                    raise self.fail("input", f"codebook for channel {u.channel} at sample "
                                             f"{u.at_sample}, but the stream has {self.C}")
                if self.L and u.n_levels != self.L:
                    raise self.fail("input", f"codebook with {u.n_levels} levels at sample "
                                             f"{u.at_sample}; the stream has {self.L}")
                events.append(u)
        return events

    def _check_all(self, idx, s: int) -> None:
        """Raise the one-line error for the first out-of-range index."""
        for ch in range(self.C):
            self._check(idx[:, ch], s, ch, self.levels[ch])

    def _table(self):
        """Every channel's levels as rows (rebuilt after a codebook change), or
        None if a channel has none yet or their sizes differ."""
        if self.flat is None:
            lv = self.levels
            if any(v is None or len(v) != self.L for v in lv):
                return None
            self.flat = np.ascontiguousarray(np.stack(lv), dtype=np.float64)
            self.offsets = np.arange(self.C, dtype=np.intp) * self.L
        return self.flat

    def _decode(self, idx, out, a, b, ch, s):
        lv = self.levels[ch]
        seg = idx[a:b, ch]
        self._check(seg, s + a, ch, lv)
        out[a:b, ch] = lv[seg]

    def report(self):
        return {"codebooks_applied": self.versions}

    def get_state(self):
        st = {"levels": list(self.levels), "versions": self.versions, "pending": list(self.pending),
              "channel_versions": list(self.channel_versions)}
        if self.backward is not None:
            st["backward"] = self.backward.get_state()
        if self.step_scheme is not None:
            st["steps"] = self.steps.copy()
        return st

    def set_state(self, st):
        self.levels, self.versions = list(st["levels"]), st["versions"]
        self.pending = list(st["pending"])
        self.channel_versions = list(st["channel_versions"])
        if self.backward is not None:
            self.backward.set_state(st["backward"])
        if self.step_scheme is not None:
            self.steps = st["steps"].copy()
