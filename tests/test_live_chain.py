"""The live chain without a sound device: the audio callback's share of a graph
and the follower thread's share, stepped by hand, against an offline run.

The worker process is replaced by a function that runs each job at once (the
live nodes cannot tell), so every design is back long before it falls due
(apply_after): the split chain must then reproduce an offline run of the same
input exactly, whatever the batch sizes of the follower.
"""

from __future__ import annotations

import json
from concurrent.futures import Future
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from streamq.engine.blocks import IndexBlock, Packet, SignalBlock, merge_packets
from streamq.engine.graph import parse_graph
from streamq.engine.scheduler import build, make_report
from streamq.live.chain import LiveChain

RATE = 48_000
BLOCK = 128

CHAIN = """
[nodes.stats]
use = "pdf-estimator"
input = "mic"
window = "100 ms"
hop = "25 ms"

[nodes.enc]
use = "encoder"
input = "mic"
pdf = "stats"
method = "lloyd-max"
bits = 4
adapt = "trailing"
apply_after = "10 ms"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "DOUBLE"
"""

LIVE = f"""
[graph]
name = "split"
sample_rate = {RATE}
block = {BLOCK}

[nodes.mic]
use = "live-input"
channels = 2
""" + CHAIN + """
[nodes.mon]
use = "live-output"
input = "dec"
reference = "mic"
monitor = "noise"
"""


def at_once(fn, *args):
    """Stands in for the live worker: runs the job now, hands back a done future."""
    fut: Future = Future()
    fut.set_result(fn(*args))
    return fut


def programme(seconds: float) -> np.ndarray:
    """Invented: Laplacian noise whose level steps every 0.3 s, and a tone under noise."""
    rng = np.random.default_rng(2)
    n = int(seconds * RATE)
    level = np.repeat(rng.choice([0.02, 0.08, 0.2], size=n // (RATE * 3 // 10) + 1),
                      RATE * 3 // 10)[:n]
    ch0 = np.clip(level * rng.laplace(size=n), -0.95, 0.95)
    ch1 = 0.3 * np.sin(2 * np.pi * 440 * np.arange(n) / RATE) + 0.01 * rng.standard_normal(n)
    return np.stack([ch0, ch1], axis=1).astype(np.float32)


def run_split(x: np.ndarray, out: Path, batch: int) -> tuple[dict, LiveChain]:
    out.mkdir(parents=True)
    graph = parse_graph(LIVE, out / "live.toml")
    built = build(graph, out, live=True, offload=at_once, background=at_once)
    chain = LiveChain(built)
    mic = built.graph.nodes["mic"]
    try:
        for i in range(x.shape[0] // BLOCK):
            mic.feed(x[i * BLOCK:(i + 1) * BLOCK])
            chain.step(BLOCK)
            if (i + 1) % batch == 0:
                chain.follow_once()
        chain.follow_once()
        for nid in built.graph.order:
            built.graph.nodes[nid].finish()
    finally:
        for nid in built.graph.order:
            built.graph.nodes[nid].close(True)
    samples = x.shape[0] // BLOCK * BLOCK
    return make_report(built, complete=True, samples=samples, seconds=0.0), chain


def test_callback_steps_only_what_the_output_needs(tmp_path):
    graph = parse_graph(LIVE, tmp_path / "live.toml")
    built = build(graph, tmp_path, live=True, offload=at_once, background=at_once)
    chain = LiveChain(built)
    assert [nid for nid, *_ in chain.rt] == ["mic", "enc", "dec", "mon"]
    assert [nid for nid, *_ in chain.rest] == ["stats", "noise", "keep"]
    assert chain.feeds == ("dec", "mic")
    for nid in built.graph.order:
        built.graph.nodes[nid].close(False)


@pytest.mark.parametrize("batch", [1, 3, 40])
def test_split_chain_equals_an_offline_run(tmp_path, batch):
    """Designs delivered in time: the live chain's decoded output and figures are
    those of the same chain run offline on the same samples (DESIGN.md rule 1 and
    apply_after), whatever the follower's batch size. A follower that lags more
    than apply_after (40 blocks: 107 ms) makes designs late: they are counted,
    apply at the next block, and the figures move."""
    x = programme(1.6)      # 600 blocks of 128
    sf.write(tmp_path / "input.wav", x, RATE, subtype="FLOAT")
    live, chain = run_split(x, tmp_path / "live", batch)
    offline = run_toml(f'[graph]\nname = "split"\nsample_rate = {RATE}\n\n[nodes.mic]\n'
                       f'use = "file-source"\npath = "{tmp_path / "input.wav"}"\n' + CHAIN,
                       tmp_path / "offline")
    assert live["nodes"]["enc"]["codebook_updates"] > 2 * 50
    assert chain.followed == x.shape[0] // BLOCK * BLOCK
    if batch * BLOCK > 10 * RATE // 1000:
        assert live["nodes"]["enc"]["late_codebooks"] > 0
        # (a lag of four hops on material whose level jumps every 0.3 s costs dBs)
        assert 10 < live["meters"]["noise"]["snr_db"] < offline["meters"]["noise"]["snr_db"] + 1
        return
    assert live["nodes"]["enc"]["late_codebooks"] == 0
    a = sf.read(tmp_path / "live" / "decoded.wav", always_2d=True)[0]
    b = sf.read(tmp_path / "offline" / "decoded.wav", always_2d=True)[0]
    assert a.shape == b.shape and np.array_equal(a, b)
    for key in ("snr_db", "segsnr_db", "codebook_updates", "side_info_bits", "entropy_bits"):
        assert live["meters"]["noise"][key] == offline["meters"]["noise"][key], key


def test_merge_packets_keeps_frames_events_and_version_spans():
    s = SignalBlock(np.arange(6.0).reshape(3, 2), 10, RATE)
    t = SignalBlock(np.arange(6.0, 10.0).reshape(2, 2), 13, RATE)
    m = merge_packets([Packet(s, ("a",)), Packet(t, ("b", "c"))])
    assert m.block.start == 10 and np.array_equal(m.block.data, np.arange(10.0).reshape(5, 2))
    assert m.events == ("a", "b", "c")
    i1 = IndexBlock(np.zeros((3, 1), np.uint8), 10, RATE, (((10, 4),),))
    i2 = IndexBlock(np.zeros((2, 1), np.uint8), 13, RATE, (((13, 4), (14, 5)),))
    mi = merge_packets([Packet(i1), Packet(i2)])
    assert mi.block.versions == (((10, 4), (14, 5)),)
