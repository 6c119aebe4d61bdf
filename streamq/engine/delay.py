"""A fixed delay of whole frames, used wherever a node must line streams up
(lookahead encoding, latency compensation in meters and monitors)."""

from __future__ import annotations

import numpy as np


class DelayLine:
    """Delays a (frames, channels) signal by ``frames`` frames; starts with zeros."""

    def __init__(self, frames: int, channels: int):
        self.frames = int(frames)
        self.buf = np.zeros((self.frames, channels))

    def push(self, x: np.ndarray) -> np.ndarray:
        """The delayed block: same length as ``x``."""
        if self.frames == 0:
            return x
        both = np.concatenate([self.buf, x])
        out, self.buf = both[:x.shape[0]], both[x.shape[0]:]
        return out

    def get_state(self) -> np.ndarray:
        return self.buf.copy()

    def set_state(self, buf: np.ndarray) -> None:
        self.buf = buf.copy()


class FrameCollector:
    """Cuts a stream of rows into whole frames of ``F`` rows, copying O(block)
    per push: a partial frame waits in a preallocated buffer."""

    def __init__(self, frame: int, width: int):
        self.F = int(frame)
        self.buf = np.empty((self.F, width))
        self.fill = 0

    def push(self, data: np.ndarray) -> np.ndarray | None:
        """The complete frames this push finishes, as (K * F, width) rows in order."""
        F, n = self.F, data.shape[0]
        head, pos = None, 0
        if self.fill:
            take = min(F - self.fill, n)
            self.buf[self.fill:self.fill + take] = data[:take]
            self.fill += take
            pos = take
            if self.fill < F:
                return None
            head, self.fill = self.buf.copy(), 0
        K = (n - pos) // F
        mid = data[pos:pos + K * F]
        pos += K * F
        if pos < n:
            self.buf[:n - pos] = data[pos:]
            self.fill = n - pos
        if head is None:
            return mid if K else None
        return np.concatenate([head, mid]) if K else head

    @property
    def pending(self) -> np.ndarray:
        """The rows of the unfinished frame."""
        return self.buf[:self.fill]

    def clear(self) -> None:
        self.fill = 0
