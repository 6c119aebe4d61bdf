"""Designs from an estimator's windows (``adapt = "trailing"`` and
``"lookahead"``).

Offline, each PDF snapshot of the estimator may trigger a design (every hop,
or when the window has drifted from the one the codebook in force came from,
with a least interval between designs); the design applies ``apply_after``
samples after its window ends. Live, the estimator's worker job computes the
snapshot and the designs this scheme asked for in one round trip
(:meth:`WindowDesigns.requests`), hands them back on its result thread
(:meth:`WindowDesigns.deliver`), and the audio thread applies each when due
(:meth:`WindowDesigns.due_live`): only reference swaps happen there.

The encoder node keeps the books (versions, announcements, side bits); this
module decides *which* codebook applies *when*.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass, field
from typing import Any

from streamq.errors import StreamqError
from streamq.nodes import coding
from streamq.nodes.estimator import js_drift


@dataclass(frozen=True)
class Recipe:
    """What a window design needs besides the window (sent to the worker process)."""

    method: str
    levels: int
    design_from: str           # "histogram" or "model"
    model: str
    opts: dict[str, Any]
    grid_bits: int
    standard: bool
    trigger: str               # "every-hop" or "drift"
    threshold: float


def drift_decision(snap, ref, threshold: float):
    """(drift, retrain?) for the drift trigger: Jensen-Shannon divergence between
    this snapshot and the one the codebook in force was designed on."""
    if ref is None:
        return None, True
    drift = js_drift(ref.centers, ref.counts, snap.centers, snap.counts)
    return drift, drift > threshold


def design_job(snap, init, recipe: Recipe):
    """The codebook for one snapshot, on the side-information grid, with its
    cost in bits; None when the window is empty. A pure function (live runs
    compute it in a worker process)."""
    if recipe.design_from == "model" and snap.model is not None:
        m = snap.model
        model = m["model"] if m["model"] in coding.PARAMETRIC else recipe.model
        cb = coding.model_codebook(recipe.method, recipe.levels, model, m["mean"], m["std"],
                                   m.get("shape"), recipe.opts)
        return coding.finish_levels(cb, recipe.grid_bits, recipe.standard)
    return coding.window_codebook(recipe.method, recipe.levels, snap.centers, snap.counts, init,
                                  recipe.opts, recipe.grid_bits, recipe.standard)


def live_design_job(snap, ref, init, recipe: Recipe):
    """Live runs: (drift, design or None), the trigger rule applied in the worker."""
    if recipe.trigger == "drift":
        drift, go = drift_decision(snap, ref, recipe.threshold)
    else:
        drift, go = (None if ref is None else
                     js_drift(ref.centers, ref.counts, snap.centers, snap.counts)), True
    return drift, (design_job(snap, init, recipe) if go else None)


FAILED = object()   # a live job whose worker call raised


@dataclass(eq=False)
class LiveJob:
    """One channel's design asked of the worker at one hop (live runs).

    ``result`` stays None until the worker's answer is in (then ``FAILED`` or
    ``(drift, design or None)``); it is set last, so the audio thread reads it
    as "ready". ``ready`` is the numbered codebook to apply: (codebook, side
    bits, version), or None when no design came of it.
    """

    channel: int
    at: int
    snapshot: Any = None
    result: Any = None
    ready: tuple | None = None


@dataclass
class WindowState:
    """Everything the scheme carries between blocks (offline runs)."""

    ref: list                  # snapshot each channel's codebook was designed on
    last_design: list[int]     # sample of each channel's newest design
    drift: list                # newest drift figure per channel
    designed: list             # newest design per channel: the next one's warm start
    scheduled: list = field(default_factory=list)   # (at, channel, codebook, bits), due later
    design_errors: int = 0
    design_error: str = ""


class WindowDesigns:
    """The trailing / lookahead scheme of one encoder.

    Parameters
    ----------
    recipe : Recipe
    first : list of Codebook
        Each channel's first codebook (the first warm start).
    min_interval, apply_after : int
        Samples.
    warm_start : bool
    """

    def __init__(self, recipe: Recipe, first: list, *, min_interval: int, apply_after: int,
                 warm_start: bool):
        C = len(first)
        self.recipe = recipe
        self.min_interval = min_interval
        self.apply_after = apply_after
        self.warm_start = warm_start
        self.state = WindowState([None] * C, [-(10 ** 18)] * C, [None] * C, list(first))
        # live runs
        self.jobs: collections.deque[LiveJob] = collections.deque()
        self.next_version = [1] * C     # the first codebooks are version 1
        self.late = 0                   # codebooks applied after their due sample
        self.worker_errors: list[str] = []

    # -- offline ---------------------------------------------------------------------
    def offline(self, snaps, e: int) -> list[tuple]:
        """Design on this block's snapshots, in sample order (each warm-started
        from the one before); return the designs due before ``e`` as
        ``(at, channel, codebook, bits)``, in order."""
        st = self.state
        for snap in sorted(snaps, key=lambda ev: (ev.at_sample, ev.channel)):
            if not self._consider(snap):
                continue
            done = self._design(snap)
            if done is None:
                continue
            self._designed(snap.channel, snap, done[0])
            st.scheduled.append((snap.at_sample + self.apply_after, snap.channel, *done))
        due = []
        while st.scheduled and st.scheduled[0][0] < e:   # (apply_after is the same for all)
            due.append(st.scheduled.pop(0))
        return due

    def _consider(self, snap) -> bool:
        """Whether this snapshot should trigger a redesign (trigger rule)."""
        st, ch = self.state, snap.channel
        if snap.at_sample - st.last_design[ch] < self.min_interval:
            return False
        if self.recipe.trigger != "drift":
            return True
        drift, go = drift_decision(snap, st.ref[ch], self.recipe.threshold)
        st.drift[ch] = drift
        return go

    def _design(self, snap):
        """The design for one snapshot, or None. A design that fails (a window
        the method cannot design on) keeps the codebook in force; the failure
        is counted and the last one named in the report."""
        st = self.state
        init = st.designed[snap.channel] if self.warm_start else None
        try:
            return design_job(snap, init, self.recipe)
        except (StreamqError, ArithmeticError) as exc:
            st.design_errors += 1
            st.design_error = (f"design on the window ending at sample {snap.at_sample}, "
                               f"channel {snap.channel} failed: {exc}")
            return None

    def _designed(self, ch: int, snap, cb) -> None:
        st = self.state
        st.designed[ch] = cb
        st.ref[ch] = snap
        st.last_design[ch] = snap.at_sample

    # -- live ------------------------------------------------------------------------
    def nothing_due(self) -> bool:
        """Whether no delivered design waits (the audio callback's common case)."""
        return not self.jobs or self.jobs[0].result is None

    def requests(self, t: int) -> list:
        """(Audio thread, at a hop of the estimator) the designs to run with the
        snapshots of sample ``t``, as (channel, job, args); each design is
        warm-started from the channel's newest one, as offline."""
        st = self.state
        out = []
        for ch in range(len(st.designed)):
            if any(j.channel == ch and j.result is None for j in list(self.jobs)):
                continue   # the worker is behind: skip, the next snapshot is fresher
            if t - st.last_design[ch] < self.min_interval:
                continue
            init = st.designed[ch] if self.warm_start else None
            out.append((ch, live_design_job, (st.ref[ch], init, self.recipe)))
            self.jobs.append(LiveJob(ch, t))
        return out

    def failed(self, exc: BaseException) -> None:
        """(Worker result thread) the hop's job failed: keep the codebooks in
        force, mark the waiting jobs failed, and say what went wrong."""
        self.worker_errors.append(f"{type(exc).__name__}: {exc}")
        for job in list(self.jobs):
            if job.result is None:
                job.result = FAILED

    def deliver(self, snaps, results) -> None:
        """(Worker result thread) finished designs, in job order. The book-keeping
        for the next request (warm start, drift reference, interval) is done
        here; the audio thread applies them when due."""
        st = self.state
        for ch, res in results:
            for job in list(self.jobs):
                if job.channel == ch and job.result is None:
                    drift, done = res
                    st.drift[ch] = drift
                    if done is not None:
                        self._designed(ch, snaps[ch], done[0])
                        # numbered now (designs apply in delivery order), so the audio
                        # thread only swaps references
                        self.next_version[ch] += 1
                        v = self.next_version[ch]
                        job.ready = (done[0].with_version(v), done[1], v)
                    job.snapshot = snaps[ch]
                    job.result = res     # set last: the audio thread reads it as "ready"
                    break

    def due_live(self, s: int, e: int) -> list[tuple]:
        """(Audio thread) the delivered designs due before ``e``, in order, as
        ``(at, channel, (codebook, bits, version))``: each at its due sample
        (the snapshot's plus ``apply_after``), or at ``s`` if that has passed
        (counted as late)."""
        jobs = self.jobs
        out = []
        while jobs:
            job = jobs[0]
            if job.result is None:      # not back from the worker yet
                break
            if job.result is FAILED:
                jobs.popleft()
                continue
            at = job.at + self.apply_after
            if job.ready is not None and at >= e:
                break                   # due in a later block
            jobs.popleft()
            if job.ready is None:
                continue
            if at < s:
                self.late += 1
                at = s
            out.append((at, job.channel, job.ready))
        return out

    # -- report and state --------------------------------------------------------------
    def report(self) -> dict:
        st = self.state
        out: dict[str, Any] = {}
        if self.worker_errors:
            out.update(worker_errors=len(self.worker_errors), worker_error=self.worker_errors[-1])
        if st.design_errors:
            out.update(design_errors=st.design_errors, design_error=st.design_error)
        return out

    def get_state(self) -> WindowState:
        st = self.state
        return WindowState(list(st.ref), list(st.last_design), list(st.drift), list(st.designed),
                           list(st.scheduled), st.design_errors, st.design_error)

    def set_state(self, st: WindowState) -> None:
        self.state = WindowState(list(st.ref), list(st.last_design), list(st.drift),
                                 list(st.designed), list(st.scheduled), st.design_errors,
                                 st.design_error)
