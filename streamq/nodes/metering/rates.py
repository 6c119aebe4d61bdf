"""What a metered stream costs: the codebooks in force, their side
information, and the entropy of the indices under each codebook.

Index counts are kept per channel since its last codebook change (the
meter's compiled pass adds to them); a change closes the channel's span, and
the spans' entropies are added in span order, so the figures do not depend
on the block size.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field

import numpy as np

from streamq.engine.blocks import CodebookUpdate


@dataclass
class RateState:
    """Everything the rate books carry between blocks."""

    bounds: np.ndarray         # (C, 2): lowest and highest level in force per channel
    version: list              # version in force per channel (None before the first)
    counts: np.ndarray         # (C, L) int64: index counts since each channel's last change
    counting: np.ndarray       # (C,) bool: channels with a codebook
    ent_acc: np.ndarray        # per channel: sum of n * H over finished spans
    ent_n: np.ndarray          # per channel: indices in finished spans
    levels_seen: int | None = None
    side_bits: int = 0
    updates: int = 0
    spans: list[int] = field(default_factory=list)                  # finished spans' channels
    span_counts: list[np.ndarray] = field(default_factory=list)     # and their counts


class Rates:
    """The rate books of one meter.

    Parameters
    ----------
    channels : int
    levels : int or None
        The stream's level count, when its spec tells it (else the first
        codebook's).
    """

    def __init__(self, channels: int, levels: int | None):
        self.C = channels
        z = np.zeros(channels)
        self.state = RateState(np.tile(np.array([-np.inf, np.inf]), (channels, 1)),
                               [None] * channels, np.zeros((channels, levels or 0), dtype=np.int64),
                               np.zeros(channels, dtype=np.bool_), z.copy(), z.copy(), levels)

    def apply(self, u: CodebookUpdate) -> None:
        """A codebook in force from now on (its channel's count span ends)."""
        st, ch = self.state, u.channel
        self.end_span(ch)
        st.bounds[ch] = (u.levels[0], u.levels[-1])
        st.version[ch] = u.version
        st.counting[ch] = True
        st.side_bits += int(u.side_info_bits)
        st.updates += 1
        if st.levels_seen is None:
            st.levels_seen = u.n_levels

    def end_span(self, ch: int) -> None:
        """Channel ``ch``'s codebook changes: its index counts so far make one
        span, whose entropy :meth:`add_spans` adds."""
        st = self.state
        st.spans.append(ch)
        st.span_counts.append(st.counts[ch].copy())
        st.counts[ch] = 0

    def add_spans(self) -> None:
        """Add ``n * H`` of each finished span to its channel, spans in order,
        where ``n`` is the span's index count and ``H`` the entropy (bits) of
        its index frequencies ``p = counts[counts > 0] / n``, summed as
        ``-(p * log2(p)).sum()``: the spans' ``p`` side by side, each summed alone."""
        st = self.state
        if not st.spans:
            return
        counts = np.stack(st.span_counts)
        seen = counts > 0
        n = counts.sum(axis=1)
        m = seen.sum(axis=1)
        p = counts[seen] / np.repeat(n, m)
        plogp = p * np.log2(p)
        at = 0
        for ch, n_s, m_s in zip(st.spans, n.tolist(), m.tolist()):
            if n_s > 0:
                st.ent_acc[ch] += float(n_s) * float(-plogp[at:at + m_s].sum())
                st.ent_n[ch] += float(n_s)
            at += m_s
        st.spans, st.span_counts = [], []

    def fit(self, idx: np.ndarray) -> None:
        """Widen the index counts when ``idx`` may hold an index past them."""
        st = self.state
        have = st.counts.shape[1]
        if have >= np.iinfo(idx.dtype).max + 1 or idx.shape[0] == 0:
            return
        need = int(idx.max()) + 1
        if need > have:
            self.add_spans()            # (spans of one width at a time)
            wider = np.zeros((self.C, need), dtype=np.int64)
            wider[:, :have] = st.counts
            st.counts = wider

    def close(self) -> None:
        """The stream ended: every channel's last span counts."""
        for ch in range(self.C):
            self.end_span(ch)
        self.add_spans()

    def side_per_sample(self, frames: int) -> float:
        """Side information, bits per sample, over ``frames`` frames of every channel."""
        return self.state.side_bits / (frames * self.C) if frames else 0.0

    def fixed_bits(self) -> int | None:
        """Bits of a fixed-length index word (None before any level count is known)."""
        L = self.state.levels_seen
        return math.ceil(math.log2(L)) if L else None

    def report(self, frames: int) -> dict:
        """The rate figures over ``frames`` output frames (empty before any
        level count is known)."""
        st = self.state
        L = st.levels_seen
        if not L:
            return {}
        fixed = self.fixed_bits()
        side_ps = self.side_per_sample(frames)
        ent = float(st.ent_acc.sum() / st.ent_n.sum()) if st.ent_n.sum() else None
        return {"levels": L, "fixed_rate_bits": fixed, "entropy_bits": ent,
                "side_info_bits": st.side_bits, "side_info_bits_per_sample": side_ps,
                "bits_per_sample": fixed + side_ps,
                "entropy_bits_per_sample_with_side_info": None if ent is None else ent + side_ps}

    def get_state(self) -> RateState:
        return copy.deepcopy(self.state)

    def set_state(self, st: RateState) -> None:
        self.state = copy.deepcopy(st)
