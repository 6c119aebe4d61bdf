"""Data that travels on the wires between nodes.

Every wire carries one :class:`Packet` per scheduler step. A packet holds a
block (signal or index) covering the absolute frame range
``[block.start, block.start + block.frames)`` and the events that take effect
inside that range (or at its end), in order.

See ``DESIGN.md`` ("Data on the wires") for the rules these types follow.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Literal, Union

import numpy as np


def index_dtype(n_levels: int) -> np.dtype:
    """Smallest unsigned integer dtype that can hold indices ``0 .. n_levels-1``."""
    for dt in (np.uint8, np.uint16, np.uint32):
        if n_levels - 1 <= np.iinfo(dt).max:
            return np.dtype(dt)
    return np.dtype(np.uint64)


@dataclass(frozen=True, slots=True)
class SignalBlock:
    """Float64 samples shaped ``(frames, channels)`` starting at absolute frame ``start``."""

    data: np.ndarray
    start: int
    rate: int

    @property
    def frames(self) -> int:
        return int(self.data.shape[0])

    @property
    def channels(self) -> int:
        return int(self.data.shape[1])

    @property
    def stop(self) -> int:
        return self.start + self.frames


@dataclass(frozen=True, slots=True)
class IndexBlock:
    """Quantizer indices shaped ``(frames, channels)``.

    ``versions`` lists, per channel, the ``(from_sample, version)`` pairs of the
    codebook versions in force inside the block; the first pair starts at or
    before ``start``.
    """

    data: np.ndarray
    start: int
    rate: int
    versions: tuple[tuple[tuple[int, int], ...], ...] = ()

    @property
    def frames(self) -> int:
        return int(self.data.shape[0])

    @property
    def channels(self) -> int:
        return int(self.data.shape[1])

    @property
    def stop(self) -> int:
        return self.start + self.frames


@dataclass(frozen=True, slots=True, eq=False)
class CodebookUpdate:
    """A new codebook for one channel, in force from ``at_sample`` on.

    The decoder needs only ``levels``; ``thresholds`` travel along for meters
    and plots. ``side_info_bits`` is what sending this update costs on the
    link (0 when the decoder can derive it itself).
    """

    version: int
    at_sample: int
    channel: int
    thresholds: np.ndarray
    levels: np.ndarray
    side_info_bits: int
    method: str = ""

    @property
    def n_levels(self) -> int:
        return int(self.levels.shape[0])


@dataclass(frozen=True, slots=True, eq=False)
class PdfSnapshot:
    """The amplitude distribution of one channel over ``[window_start, at_sample)``.

    ``centers``/``counts`` is the histogram (counts may be fractional when
    forgetting is on); ``model`` holds a fitted parametric PDF, if any;
    ``stats`` holds mean, variance, kurtosis, crest factor and clip count;
    ``drift`` is the Jensen-Shannon divergence (bits) against the channel's
    previous snapshot, hop to hop (None for the first); an encoder measures
    the divergence from the snapshot its codebook was designed on itself.
    """

    at_sample: int
    channel: int
    window_start: int
    centers: np.ndarray
    counts: np.ndarray
    stats: dict[str, float] = field(default_factory=dict)
    model: dict[str, Any] | None = None
    drift: float | None = None


Event = Union[CodebookUpdate, PdfSnapshot]


@dataclass(slots=True)
class Packet:
    """What one wire carries in one step: a block and the events that go with it.

    ``indices`` is set on decoded-signal packets: the index block the samples
    were rebuilt from, so meters can measure index entropy without
    re-encoding.
    """

    block: SignalBlock | IndexBlock
    events: tuple[Event, ...] = ()
    indices: IndexBlock | None = None

    @property
    def frames(self) -> int:
        return self.block.frames

    @property
    def start(self) -> int:
        return self.block.start


@dataclass(frozen=True, slots=True)
class EstimatorLink:
    """What a pdf-estimator tells the nodes that design from it (its
    :class:`StreamSpec`'s ``estimator``).

    Attributes
    ----------
    window, hop : int
        Window length and hop, samples (a lookahead encoder delays its input
        by one window).
    bins : int
        Histogram bins of each snapshot.
    span : str
        ``"tracked"`` (the window's own range) or ``"full-scale"``.
    fit : str
        The parametric PDF fitted to each window, or ``"none"``.
    subscribe : callable
        Live runs: ``subscribe(hook)`` asks the estimator to run the hook's
        designs with each hop's snapshots in its worker job (see
        ``PdfEstimator.subscribe``); offline, snapshots travel as events.
    """

    window: int
    hop: int
    bins: int
    span: str
    fit: str
    subscribe: Callable[[Any], None]


@dataclass(frozen=True, slots=True)
class StreamSpec:
    """What a node's output stream looks like; worked out before the run starts.

    Attributes
    ----------
    kind : "signal" or "index"
    rate : sample rate in Hz
    channels : channel count
    latency : frames of delay of this stream relative to source time
    int_bits : if every sample is exactly ``k / 2**(int_bits-1)`` for integer k
        (e.g. 16 for a 16-bit PCM source passed through unchanged), else None
    frames : total length in frames when known, else None (live input)
    extra : plain JSON-able facts about the stream: an index stream's
        ``coding``, ``n_levels`` and ``index_dtype`` (index files store them
        as they are), a source's file or scene
    estimator : set on a pdf-estimator's output: its settings and the live
        subscription (:class:`EstimatorLink`)
    """

    kind: Literal["signal", "index"]
    rate: int
    channels: int
    latency: int = 0
    int_bits: int | None = None
    frames: int | None = None
    extra: dict[str, Any] = field(default_factory=dict)
    estimator: EstimatorLink | None = None


def _merge_versions(blocks) -> tuple:
    """Per channel: the (from_sample, version) pairs of consecutive index blocks,
    without the repeats each block starts with."""
    if not blocks[0].versions:
        return ()
    out = []
    for ch in range(len(blocks[0].versions)):
        pairs = list(blocks[0].versions[ch])
        for b in blocks[1:]:
            for p in b.versions[ch]:
                if p[1] != pairs[-1][1]:
                    pairs.append(p)
        out.append(tuple(pairs))
    return tuple(out)


def _merge_blocks(blocks):
    first = blocks[0]
    data = np.concatenate([b.data for b in blocks])
    if isinstance(first, IndexBlock):
        return IndexBlock(data, first.start, first.rate, _merge_versions(blocks))
    return SignalBlock(data, first.start, first.rate)


def merge_packets(packets: list[Packet]) -> Packet:
    """Consecutive packets of one wire as one packet (blocks joined, events in
    order). Every node is block-size invariant (DESIGN.md rule 1), so stepping
    a node once on the merged packet gives what stepping it on each would."""
    if len(packets) == 1:
        return packets[0]
    events = tuple(e for p in packets for e in p.events)
    indices = None
    if packets[0].indices is not None:
        indices = _merge_blocks([p.indices for p in packets])
    return Packet(_merge_blocks([p.block for p in packets]), events, indices)
