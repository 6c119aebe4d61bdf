"""Forward gain adaptation, block by block (``adapt = "gain"``).

The encoder holds back one block (``gain_block`` samples, 16 ms by default),
measures its RMS (or peak), puts that gain on a logarithmic grid
(``gain_step_db`` apart, ``gain_bits`` bits, the top at full scale, the
last index meaning silence: every sample decodes to 0) and codes
the block with one fixed unit-variance codebook scaled by the gain. The gain
index is the side information: ``gain_bits`` per block and channel, announced
as a CodebookUpdate at the block's first output sample, so any decoder (and
an index file) follows it with no knowledge of the scheme. Latency: one block.

Blocks are counted in samples from the stream's start, and each block's gain
is one compiled sum over exactly its samples, so the output does not depend
on how the input is cut. The core is scipy-shaped:
``indices, announcements, state = encode(x, start, state)``.

References
----------
.. [1] N. S. Jayant and P. Noll, *Digital Coding of Waveforms*, Prentice-Hall,
   1984, ch. 4 (forward-adaptive quantization, AQF).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from streamq.design.kernels import encode_span
from streamq.engine.blocks import CodebookUpdate


@njit(cache=True)
def block_gains(x, a, size, count, peak, out):  # pragma: no cover - compiled
    """Per-block RMS (or peak magnitude) of ``count`` blocks of ``size`` rows
    of ``x`` starting at row ``a``, each channel summed in row order.

    ``out[b, c]`` is ``sqrt(sum(x[a + b*size + i, c] ** 2 for i) / size)``, or
    ``max(abs(...))`` with ``peak``.
    """
    C = x.shape[1]
    for b in range(count):
        r0 = a + b * size
        for c in range(C):
            acc = 0.0
            if peak:
                for i in range(r0, r0 + size):
                    v = abs(x[i, c])
                    if v > acc:
                        acc = v
                out[b, c] = acc
            else:
                for i in range(r0, r0 + size):
                    acc += x[i, c] * x[i, c]
                out[b, c] = math.sqrt(acc / size)


@njit(cache=True)
def grid_step(g, peak, top, step_db, count):  # pragma: no cover - compiled
    """Gain index of one measured gain ``g`` (see :meth:`GainScheme.grid_index`)."""
    if peak:
        g = g / top
    if not g > 0.0:                      # silence, or NaN
        return count - 1
    steps = -20.0 * math.log10(g) / step_db
    k = math.floor(steps) if peak else np.rint(steps)
    if not k < count - 1:                # also +inf
        return count - 1
    return 0 if k < 0 else int(k)


@njit(cache=True)
def gain_encode(both, start, size, peak, top, step_db, count, thresholds, index, out, ks):  # pragma: no cover - compiled
    """One step of the gain encoder, every channel, in one call.

    ``both`` is the held block followed by this step's input (output row
    ``i`` codes ``both[i]``); output rows ``[start, start + len(out))``.
    Each block whose first output sample falls in this step gets its gain
    from its own ``size`` input rows (:func:`block_gains`), its index on the
    grid (:func:`grid_step`) and codes from there with ``thresholds[k]``
    (the scaled unit thresholds of each index). ``index`` (per channel, the
    index in force) is updated in place; ``ks[j, c]`` receives the index of
    the ``j``-th new block. Returns the number of new blocks.
    """
    frames = out.shape[0]
    C = out.shape[1]
    e = start + frames
    b0 = max(0, -(-(start - size) // size))
    b1 = -(-(e - size) // size) if e > size else 0
    nb = max(0, b1 - b0)
    gains = np.empty((nb, C))
    if nb:
        block_gains(both, b0 * size - (start - size), size, nb, peak, gains)
    for c in range(C):
        pos = 0
        k = index[c]
        for j in range(nb):
            t = (b0 + j + 1) * size - start        # this block's first output row
            if t > pos:
                encode_span(both[pos:t, c], thresholds[k], out[pos:t, c])
            pos = t
            k = grid_step(gains[j, c], peak, top, step_db, count)
            ks[j, c] = k
        if pos < frames:
            encode_span(both[pos:frames, c], thresholds[k], out[pos:frames, c])
        index[c] = k
    return nb


def unit_blocks(x: np.ndarray, size: int) -> np.ndarray:
    """Training samples for the unit codebook: each whole block of ``size``
    samples divided by its RMS (silent blocks left out)."""
    n = x.shape[0] // size
    blocks = x[:n * size].reshape(n, size)
    rms = np.sqrt(np.mean(blocks * blocks, axis=1))
    keep = rms > 0
    return (blocks[keep] / rms[keep, None]).ravel()


@dataclass(frozen=True)
class GainState:
    """What the encoder carries between blocks.

    ``held``: the last ``block`` input frames (not yet coded); ``index``: the
    gain index in force on each channel; ``version``: each channel's newest
    codebook version. Arrays are never changed in place.
    """

    held: np.ndarray
    index: tuple[int, ...]
    version: tuple[int, ...]


class GainScheme:
    """The encoder side of forward gain adaptation.

    Parameters
    ----------
    unit : Codebook
        The fixed codebook for a unit-RMS block.
    block : int
        Block length in samples.
    step_db, bits : float, int
        The gain grid: ``2**bits`` gains, ``step_db`` apart, the top at 1.0.
    peak : bool
        Gain from the block's peak (scaled so the peak lands on the top
        level, rounded up: no overload) instead of its RMS (rounded to the
        nearest grid point).
    method : str
        Recorded in the announcements.
    """

    def __init__(self, unit, block: int, step_db: float, bits: int, peak: bool, method: str):
        self.unit = unit
        self.block = int(block)
        self.step_db = float(step_db)
        self.count = 2 ** int(bits)
        self.bits = int(bits)
        self.peak = bool(peak)
        self.method = method
        self.top = float(abs(np.asarray(unit.levels)).max())
        self._table: dict[int, object] = {}
        # the scaled unit thresholds of every index, one row each (the compiled
        # encoder's table; codebook(k) takes its thresholds from here too). The
        # silence index keeps those its grid point would have, so its codebook stays valid.
        tg = 10.0 ** (-np.arange(self.count) * self.step_db / 20.0)
        self.thresholds = np.asarray(unit.thresholds, dtype=np.float64)[None, :] * tg[:, None]

    def gain(self, k: int) -> float:
        """Gain of index ``k``; the last index is silence (gain 0)."""
        return 0.0 if k == self.count - 1 else 10.0 ** (-k * self.step_db / 20.0)

    def codebook(self, k: int):
        """The unit codebook scaled by gain ``k`` (made once per index). The
        silence index decodes every index to 0 (its thresholds are those of
        the smallest gain, so the codebook stays valid): digital silence
        passes as silence, with no idle noise."""
        cb = self._table.get(k)
        if cb is None:
            from streamq.design import Codebook
            cb = self._table[k] = Codebook._trusted(np.asarray(self.unit.levels) * self.gain(k),
                                                    self.thresholds[k].copy())
        return cb

    def grid_index(self, g: np.ndarray) -> np.ndarray:
        """Gain indices of measured gains (0 = full scale; the last one,
        silence, for blocks below the grid): RMS gains rounded to the nearest
        grid point, peak gains (over the codebook's top level) rounded down."""
        g = np.asarray(g, dtype=np.float64)
        return np.array([grid_step(v, self.peak, self.top, self.step_db, self.count)
                         for v in g.ravel()], dtype=np.int64).reshape(g.shape)

    def first_index(self, scale: float) -> int:
        """The gain index in force before the first block (a source of RMS ``scale``)."""
        return int(self.grid_index(np.array([scale * (self.top if self.peak else 1.0)]))[0])

    def initial_state(self, channels: int, scale: float) -> GainState:
        k = self.first_index(scale)
        return GainState(np.zeros((self.block, channels)), (k,) * channels, (1,) * channels)

    def encode(self, x: np.ndarray, start: int, state: GainState, dtype):
        """Code output frames ``[start, start + len(x))`` (input delayed by one block).

        One compiled call (:func:`gain_encode`) codes every channel; Python
        only books an announcement for each new block.

        Returns
        -------
        indices : ndarray (frames, channels)
        announcements : list of CodebookUpdate, in sample order
        state : GainState
        """
        size = self.block
        frames, channels = x.shape
        both = np.concatenate([state.held, x]) if frames else state.held
        if both.dtype != np.float64:
            both = both.astype(np.float64)
        idx = np.empty((frames, channels), dtype=dtype)
        index = np.array(state.index, dtype=np.int64)
        ks = np.empty((frames // size + 2, channels), dtype=np.int64)
        nb = gain_encode(both, start, size, self.peak, self.top, self.step_db, self.count,
                         self.thresholds, index, idx, ks)
        events: list[CodebookUpdate] = []
        version = list(state.version)
        if nb:
            first = (-(-(start - size) // size) if start > size else 0) + 1
            for j in range(nb):
                at = (first + j) * size            # the block's first output sample
                for ch in range(channels):
                    version[ch] += 1
                    cb = self.codebook(int(ks[j, ch]))
                    events.append(CodebookUpdate(version[ch], at, ch, cb.thresholds,
                                                 cb.levels, self.bits, self.method))
        return idx, events, GainState(both[frames:].copy(), tuple(index.tolist()), tuple(version))
