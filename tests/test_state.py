"""Explicit node state (DESIGN.md rule 5): every node of every example graph
hands out its whole state and takes it back, so a stream cut anywhere and
continued in another process gives the same output, sample for sample.

Each case runs a graph to a random sample, pickles every node's state to a
file, and continues in a fresh Python process from that state; what every
node emits after the cut (indices, decoded samples, events) and every meter's
figures at the end must equal those of one uninterrupted run. Sinks write no
files here: the comparison is on what the nodes hand downstream."""

from __future__ import annotations

import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]

#: every offline example graph, shortened where it synthesises its input
GRAPHS = {
    "demo.toml": ["feed.seconds=2.5"],
    "side-by-side.toml": [],
    "replay.toml": [],
}

CHILD = r"""
import pickle, sys
sys.path.insert(0, {tests!r})
from test_state import run_from
cut, graph, overrides, state_file, out_file = pickle.loads(bytes.fromhex(sys.argv[1]))
with open(state_file, "rb") as f:
    state = pickle.load(f)
emitted, reports = run_from(graph, overrides, cut, state)
with open(out_file, "wb") as f:
    pickle.dump((emitted, reports), f)
"""


def _build(graph: str, overrides):
    from streamq.engine.graph import load_graph
    from streamq.engine.scheduler import build
    g = load_graph(REPO / "graphs" / graph, list(overrides))
    # sinks are left out: this checks what nodes hand downstream, not files
    for nid in [n for n in g.order if g.nodes[n].role == "sink"]:
        g.order.remove(nid)
        del g.nodes[nid]
    return build(g, None)


def _digest(pkt):
    """What a packet carries, as plain comparable values."""
    if pkt is None:
        return None
    events = []
    for ev in pkt.events:
        d = {k: getattr(ev, k) for k in ev.__slots__} if hasattr(ev, "__slots__") else vars(ev)
        events.append((type(ev).__name__, {k: (v.tobytes() if isinstance(v, np.ndarray) else v)
                                           for k, v in d.items() if k != "stats"}))
    return pkt.block.data.tobytes(), pkt.block.start, events


def _step(built, frames, emitted):
    from streamq.engine.scheduler import _step_all
    outs = _step_all(built, frames)
    for nid, pkt in outs.items():
        emitted.setdefault(nid, []).append(_digest(pkt))


def run_from(graph, overrides, cut, state=None, sizes_seed=0):
    """Run ``graph`` from sample ``cut`` (with ``state``) or from 0 to ``cut``;
    returns what every node emitted and the meters' reports (or the state at ``cut``)."""
    built = _build(graph, overrides)
    rng = np.random.default_rng(sizes_seed)
    emitted: dict = {}
    if state is None:       # from the start to the cut: return the state there
        pos = 0
        while pos < cut:
            n = int(min(rng.integers(1, 20_000), cut - pos))
            _step(built, n, emitted)
            pos += n
        return {nid: node.get_state() for nid, node in built.nodes.items()}, emitted
    for nid, node in built.nodes.items():
        node.set_state(state[nid])
    pos = cut
    while pos < built.length:
        n = int(min(rng.integers(1, 20_000), built.length - pos))
        _step(built, n, emitted)
        pos += n
    for nid in built.graph.order:
        built.nodes[nid].finish()
    reports = {nid: node.report() for nid, node in built.nodes.items() if node.role == "meter"}
    return emitted, reports


def _flatten(emitted: dict, start: int) -> dict:
    """Per node: its samples from ``start`` on (joined across packets) and its events there."""
    out = {}
    for nid, pkts in emitted.items():
        pkts = [p for p in pkts if p is not None]
        if not pkts:
            continue
        out[nid] = (b"".join(p[0] for p in pkts), [e for p in pkts for e in p[2]])
    return out


@pytest.mark.parametrize("graph", sorted(GRAPHS))
def test_cut_anywhere_and_continue_in_another_process(tmp_path, graph):
    overrides = GRAPHS[graph]
    built = _build(graph, overrides)
    length = built.length
    for nid in built.graph.order:
        built.nodes[nid].close(False)
    rng = np.random.default_rng(abs(hash(graph)) % 1000)
    cuts = sorted({int(rng.integers(1, length - 1)) for _ in range(2)} | {length // 2})
    # the uninterrupted run, stepped in blocks that all end at the cuts
    whole: dict = {}
    ref = _build(graph, overrides)
    pos = 0
    for stop in cuts + [length]:
        while pos < stop:
            n = min(30_000, stop - pos)
            _step(ref, n, whole)
            pos += n
    for nid in ref.graph.order:
        ref.nodes[nid].finish()
    whole_reports = {nid: node.report() for nid, node in ref.nodes.items() if node.role == "meter"}
    for cut in cuts:
        state, before = run_from(graph, overrides, cut, sizes_seed=cut)
        state_file, out_file = tmp_path / f"state-{cut}.pickle", tmp_path / f"out-{cut}.pickle"
        with open(state_file, "wb") as f:
            pickle.dump(state, f)
        arg = pickle.dumps((cut, graph, overrides, str(state_file), str(out_file))).hex()
        res = subprocess.run([sys.executable, "-c", CHILD.format(tests=str(REPO / "tests")), arg],
                             capture_output=True, text=True, timeout=600)
        assert res.returncode == 0, res.stderr[-3000:]
        with open(out_file, "rb") as f:
            after, reports = pickle.load(f)
        # samples before the cut (this run) + after it (the other process) = the whole run
        for nid, (data, events) in _flatten(whole, 0).items():
            b = _flatten(before, 0).get(nid, (b"", []))
            a = _flatten(after, cut).get(nid, (b"", []))
            assert b[0] + a[0] == data, (graph, cut, nid)
            assert b[1] + a[1] == events, (graph, cut, nid)
        assert reports == whole_reports, (graph, cut)
