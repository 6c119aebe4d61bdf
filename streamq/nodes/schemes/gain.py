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
from dataclasses import dataclass, replace

import numpy as np
from numba import njit

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
            g = self.gain(k)
            tg = g if g > 0 else 10.0 ** (-(self.count - 1) * self.step_db / 20.0)
            cb = self._table[k] = Codebook._trusted(np.asarray(self.unit.levels) * g,
                                                    np.asarray(self.unit.thresholds) * tg)
        return cb

    def grid_index(self, g: np.ndarray) -> np.ndarray:
        """Gain indices of measured gains (0 = full scale; the last one,
        silence, for blocks below the grid)."""
        g = np.asarray(g, dtype=np.float64)
        if self.peak:
            g = g / self.top
        with np.errstate(divide="ignore"):
            steps = -20.0 * np.log10(g) / self.step_db
        k = np.floor(steps) if self.peak else np.rint(steps)
        return np.clip(np.nan_to_num(k, nan=self.count - 1, posinf=self.count - 1),
                       0, self.count - 1).astype(np.int64)

    def first_index(self, scale: float) -> int:
        """The gain index in force before the first block (a source of RMS ``scale``)."""
        return int(self.grid_index(np.array([scale * (self.top if self.peak else 1.0)]))[0])

    def initial_state(self, channels: int, scale: float) -> GainState:
        k = self.first_index(scale)
        return GainState(np.zeros((self.block, channels)), (k,) * channels, (1,) * channels)

    def encode(self, x: np.ndarray, start: int, state: GainState, dtype, span_kernel):
        """Code output frames ``[start, start + len(x))`` (input delayed by one block).

        Returns
        -------
        indices : ndarray (frames, channels)
        announcements : list of CodebookUpdate, in sample order
        state : GainState
        """
        N = self.block
        frames, C = x.shape
        both = np.concatenate([state.held, x]) if frames else state.held
        e = start + frames
        # blocks whose first input sample b*N lies in [start - N, e - N): they
        # start at output sample (b + 1) * N inside this step
        b0 = max(0, -(-(start - N) // N))
        b1 = -(-(e - N) // N) if e > N else 0
        nb = max(0, b1 - b0)
        idx = np.empty((frames, C), dtype=dtype)
        events: list[CodebookUpdate] = []
        index, version = list(state.index), list(state.version)
        if nb:
            gains = np.empty((nb, C))
            block_gains(both, b0 * N - (start - N), N, nb, self.peak, gains)
            ks = self.grid_index(gains)
        for ch in range(C):
            pos = 0
            for j in range(nb):
                t = (b0 + j + 1) * N - start          # this block's first output row
                if t > pos:
                    span_kernel(both[pos:t, ch], self.codebook(index[ch]).thresholds,
                                idx[pos:t, ch])
                pos = t
                index[ch] = int(ks[j, ch])
                version[ch] += 1
                cb = self.codebook(index[ch])
                events.append(CodebookUpdate(version[ch], start + t, ch, cb.thresholds,
                                             cb.levels, self.bits, self.method))
            if pos < frames:
                span_kernel(both[pos:frames, ch], self.codebook(index[ch]).thresholds,
                            idx[pos:, ch])
        events.sort(key=lambda u: (u.at_sample, u.channel))
        held = both[frames:].copy()
        return idx, events, replace(state, held=held, index=tuple(index), version=tuple(version))
