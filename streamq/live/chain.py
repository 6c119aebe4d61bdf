"""Splitting a live graph between the audio callback and a follower thread.

The audio callback runs only the nodes the live output needs (the live input,
encoder, decoder and monitor, say) on each device block. Everything else
(estimators, meters, file and index sinks) runs on a follower thread that
takes the callback's packets in batches of a few blocks: every node is
block-size invariant (DESIGN.md rule 1), so stepping it on a batch gives what
stepping it on each block would, and the callback's work stays small and even.
The follower lags the audio by a few milliseconds; an encoder that applies
each design ``apply_after`` its snapshot absorbs that lag. The callback wakes
the follower when a batch is full, so the follower works in the gap after a
callback instead of competing with it for the interpreter lock.
"""

from __future__ import annotations

import collections
import gc
import threading

from streamq.engine.blocks import merge_packets

FOLLOW_EVERY = 0.005   # seconds of audio per follower batch


def _needed_live(built) -> set[str]:
    """The nodes the audio callback must step: the live input, and everything
    the live output reads (through the inputs nodes read in live steps)."""
    from streamq.nodes.live import LiveInput, LiveOutput
    nodes = built.graph.nodes
    todo = [nid for nid, n in nodes.items() if isinstance(n, (LiveInput, LiveOutput))]
    need: set[str] = set()
    todo = todo or list(built.sources)
    while todo:
        nid = todo.pop()
        if nid not in need:
            need.add(nid)
            todo.extend(nodes[nid].live_upstream().values())
    return need


class LiveChain:
    """One live graph, split: :meth:`step` in the audio callback, the rest on a
    follower thread (:meth:`start`, :meth:`stop`)."""

    def __init__(self, built):
        self.built = built
        nodes, order = built.graph.nodes, built.graph.order
        rt = _needed_live(built)
        # (id, node, its inputs dict, reused every block, and where each input comes from)
        self.rt = [(nid, nodes[nid], {}, tuple(nodes[nid].live_upstream().items()))
                   for nid in order if nid in rt]
        self.outs: dict = {}
        self.rest = [(nid, nodes[nid], tuple(nodes[nid].upstream().items()))
                     for nid in order if nid not in rt]
        # the callback's packets the follower reads
        self.feeds = tuple(sorted({ref for _, _, ups in self.rest for _, ref in ups if ref in rt}))
        self.queue: collections.deque = collections.deque()
        self.error: BaseException | None = None
        self.on_error = None          # called (from the follower) when it fails
        self._stop = False
        self._wake = threading.Event()
        self.batch = max(1, int(FOLLOW_EVERY * built.ctx.sample_rate))
        self.queued = 0               # frames queued since the follower was woken
        self._thread: threading.Thread | None = None
        self.followed = 0             # frames the follower has stepped

    # -- the audio callback ---------------------------------------------------
    def step(self, frames: int) -> None:
        """One device block through the callback's nodes; queue what the follower needs."""
        outs = self.outs
        for nid, node, ins, ups in self.rt:
            for f, ref in ups:
                ins[f] = outs[ref]
            outs[nid] = node.step(frames, ins)
        if self.rest:
            self.queue.append((frames, tuple([outs[f] for f in self.feeds])))
            self.queued += frames
            if self.queued >= self.batch:
                self.queued = 0
                self._wake.set()

    # -- the follower thread --------------------------------------------------
    def start(self) -> None:
        if self.rest:
            self._thread = threading.Thread(target=self._follow, name="streamq-follower",
                                            daemon=True)
            self._thread.start()

    def follow_once(self) -> int:
        """Step the follower nodes over everything queued so far; the frames done."""
        q = self.queue
        items = []
        while q:
            items.append(q.popleft())
        if not items:
            return 0
        frames = sum(n for n, _ in items)
        outs = {ref: merge_packets([pk[i] for _, pk in items]) for i, ref in enumerate(self.feeds)}
        for nid, node, ups in self.rest:
            outs[nid] = node.step(frames, {f: outs[ref] for f, ref in ups})
        self.followed += frames
        return frames

    def _follow(self) -> None:
        try:
            batches = 0
            while not self._stop:
                self._wake.wait(0.1)    # (a stalled stream still gets followed)
                self._wake.clear()
                self.follow_once()
                batches += 1
                if not gc.isenabled():
                    # the live runner turns automatic collection off, so that it never
                    # starts inside the audio callback: collect here, between callbacks
                    gc.collect(2 if batches % 12_000 == 0 else 1 if batches % 200 == 0 else 0)
            self.follow_once()
        except BaseException as exc:   # the main thread reports it and stops the run
            self.error = exc
            if self.on_error is not None:
                self.on_error(exc)

    def stop(self) -> None:
        """Step what is still queued and end the thread (after the stream has stopped)."""
        if self._thread is not None:
            self._stop = True
            self._wake.set()
            self._thread.join()
            self._thread = None
        elif self.rest and self.error is None:
            self.follow_once()
