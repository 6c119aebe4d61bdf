"""Codebook pictures for the report: the first, middle and last codebook of
channel 0, each with a histogram of the reference signal it coded.

The first codebook's histogram is summed as the run goes. The middle one (in
force at the middle of a run of known length) is pictured from a kept tail
of the signal once the run reaches the middle, then summed until replaced;
the last one is pictured from the kept tail when the stream ends.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field

import numpy as np

from streamq.engine.blocks import CodebookUpdate

#: histogram cells of a picture, over the levels' span and a quarter of it on each side
BINS = 200
#: samples of channel 0's reference kept for the pictures (about 11 s at 48 kHz)
TAIL = 1 << 19


@dataclass
class CodebookPicture:
    """One codebook of channel 0 and the histogram of what it coded."""

    version: int
    at_sample: int             # output time it took effect
    method: str
    thresholds: np.ndarray
    levels: np.ndarray
    range: list[float]         # the histogram's [low, high]
    counts: np.ndarray         # (BINS,) int64
    from_m: int                # measured sample it took effect (after the latency pre-roll)
    accumulate: bool           # the histogram is summed as the run goes
    until: int | None = None   # output time it was replaced (or the stream ended)
    pictured_from: int | None = None   # output time the tail picture starts

    def report(self) -> dict:
        """The picture as report.json holds it."""
        out = {"version": self.version, "at_sample": self.at_sample, "method": self.method,
               "thresholds": self.thresholds.tolist(), "levels": self.levels.tolist(),
               "range": self.range, "counts": self.counts.tolist(), "until": self.until}
        if self.pictured_from is not None:
            out["pictured_from"] = self.pictured_from
        return out


@dataclass
class PictureState:
    """Everything the pictures carry between blocks."""

    tail: np.ndarray           # ring of channel 0's last reference samples
    tail_n: int = 0            # samples ever put in the ring
    picks: dict[str, CodebookPicture] = field(default_factory=dict)   # first, middle, last
    current: CodebookPicture | None = None


class Pictures:
    """The codebook pictures of one meter.

    Parameters
    ----------
    delay : int
        Samples of latency pre-roll before the first measured sample.
    total_frames : int or None
        The stream's length, when known (for the middle picture).
    """

    def __init__(self, delay: int, total_frames: int | None):
        self.delay = delay
        self.total = total_frames
        self.mid = (total_frames or 0) // 2
        self.state = PictureState(np.zeros(TAIL))

    def start(self, u: CodebookUpdate) -> None:
        """A codebook takes effect (pictured when on channel 0)."""
        if u.channel != 0:
            return
        st = self.state
        self.end(u.at_sample)
        lv = np.array(u.levels)     # (copies: the report makes lists of the kept few)
        span = max(lv[-1] - lv[0], 1e-9)
        # only the first codebook's picture is summed as the run goes; the middle
        # and last ones are pictured from the kept tail of the signal
        st.current = CodebookPicture(
            u.version, u.at_sample, u.method, np.array(u.thresholds), lv,
            [float(lv[0] - 0.25 * span), float(lv[-1] + 0.25 * span)],
            np.zeros(BINS, dtype=np.int64), max(0, u.at_sample - self.delay),
            "first" not in st.picks)

    def end(self, at: int) -> None:
        """The codebook being pictured is replaced at output time ``at``."""
        st = self.state
        p = st.current
        if p is None:
            return
        p.until = at
        if "first" not in st.picks:
            st.picks["first"] = p
        st.picks["last"] = p
        if self.total and p.at_sample <= self.mid < at:
            st.picks["middle"] = p
        st.current = None

    def keep_tail(self, r0: np.ndarray) -> None:
        """The last seconds of channel 0's reference, for the later pictures."""
        st = self.state
        R, n = st.tail.shape[0], r0.shape[0]
        if n >= R:
            r0, n = r0[-R:], R
        at = st.tail_n % R
        first = min(n, R - at)
        st.tail[at:at + first] = r0[:first]
        st.tail[:n - first] = r0[first:]
        st.tail_n += n

    def add(self, r0: np.ndarray, start: int, stop: int, end_m: int) -> None:
        """Channel 0's reference over output samples ``[start, stop)`` under
        the current codebook (``end_m``: the measured samples up to ``stop``)."""
        p = self.state.current
        if p is None:
            return
        if self.mid and not p.accumulate and start <= self.mid < stop:
            # the codebook in force at the middle of the run: picture it so
            # far from the kept tail, then keep summing until it is replaced
            self._from_tail(p, end_m)
            p.accumulate = True
        elif p.accumulate:
            plo, phi = p.range
            k0 = ((r0 - plo) * (BINS / (phi - plo))).astype(np.int64)
            p.counts += np.bincount(k0[(k0 >= 0) & (k0 < BINS)], minlength=BINS)

    def _from_tail(self, p: CodebookPicture, end_m: int | None = None) -> None:
        """Picture ``p`` from the kept tail: its span up to measured sample
        ``end_m`` (default: all kept), as far back as the tail reaches."""
        st = self.state
        R = st.tail.shape[0]
        end_m = st.tail_n if end_m is None else end_m
        lo = max(p.from_m, st.tail_n - R)
        n = end_m - lo
        if n <= 0:
            return
        end = end_m % R
        x = st.tail[end - n:end] if n <= end else np.concatenate([st.tail[R - (n - end):],
                                                                   st.tail[:end]])
        plo, phi = p.range
        k = ((x - plo) * (BINS / (phi - plo))).astype(np.int64)
        p.counts = np.bincount(k[(k >= 0) & (k < BINS)], minlength=BINS)
        p.pictured_from = lo + self.delay

    def close(self, at: int) -> None:
        """The stream ended at output time ``at``: the last picture is made."""
        self.end(at)
        p = self.state.picks.get("last")
        if p is not None and not p.accumulate:
            self._from_tail(p)

    def report(self) -> dict:
        """``first``, ``middle``, ``last``: those pictured, as report.json holds them."""
        picks = self.state.picks
        return {key: picks[key].report() for key in ("first", "middle", "last") if key in picks}

    def get_state(self) -> PictureState:
        return copy.deepcopy(self.state)

    def set_state(self, st: PictureState) -> None:
        self.state = copy.deepcopy(st)
