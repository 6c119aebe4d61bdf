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
