"""The live chain without a sound device: the audio callback's share of a graph
and the follower thread's share, stepped by hand, against an offline run.

The worker process is replaced by a function that runs each job at once (the
live nodes cannot tell), so every design is back long before it falls due
(apply_after): the split chain must then reproduce an offline run of the same
input exactly, whatever the batch sizes of the follower. One test uses the real
worker process and kills it mid-run.
"""

from __future__ import annotations

import json
import os
import signal
import time
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


def test_a_dead_worker_process_leaves_the_audio_flowing(tmp_path):
    """The live run's worker process dies mid-run (killed here, as the kernel's
    out-of-memory killer would): the jobs waiting on it fail, and the pool refuses
    every later job with BrokenProcessPool. As with a job that fails, the chain
    goes on with the codebooks in force, the failure is counted and reported, and
    no more jobs are offered to the dead pool."""
    from concurrent.futures.process import BrokenProcessPool
    from streamq.live.runner import make_workers

    x = programme(1.6)      # 600 blocks of 128
    blocks = x.shape[0] // BLOCK
    kill_at = 250
    out = tmp_path / "live"
    out.mkdir()
    designer, helper = make_workers()
    helper.shutdown()
    offers: list[str] = []

    def offload(fn, *args):
        try:
            fut = designer.submit(fn, *args)
        except BrokenProcessPool:
            offers.append("refused")
            raise
        offers.append("taken")
        return fut

    try:
        built = build(parse_graph(LIVE, out / "live.toml"), out, live=True, offload=offload,
                      background=at_once)
        chain = LiveChain(built)
        nodes = built.graph.nodes
        mic, stats, enc, mon = nodes["mic"], nodes["stats"], nodes["enc"], nodes["mon"]
        monitor_finite = True
        for i in range(blocks):
            if i < kill_at:   # up to the kill, every job is back before the next block
                deadline = time.monotonic() + 30
                while not all(f.done() for f in stats.jobs) and time.monotonic() < deadline:
                    time.sleep(0.001)
            elif i == kill_at:
                assert enc.updates > 2 * 4, "no designs came back before the kill"
                pid = designer.submit(os.getpid).result(timeout=30)
                probe = designer.submit(time.sleep, 30)
                os.kill(pid, signal.SIGKILL)
                assert isinstance(probe.exception(timeout=30), BrokenProcessPool)
                taken = offers.count("taken")
            elif i == kill_at + 100:    # whatever was under way has come back or failed
                settled = enc.updates
            mic.feed(x[i * BLOCK:(i + 1) * BLOCK])
            chain.step(BLOCK)
            monitor_finite &= bool(np.isfinite(mon.block).all())
            if (i + 1) % 3 == 0:
                chain.follow_once()
        chain.follow_once()
        for nid in built.graph.order:
            nodes[nid].finish()
    finally:
        for nid in built.graph.order:
            built.graph.nodes[nid].close(True)
        designer.shutdown(wait=False, cancel_futures=True)
    samples = blocks * BLOCK
    report = make_report(built, complete=True, samples=samples, seconds=0.0)
    # every block went through, to the end, and the monitor never went non-finite
    assert chain.followed == samples and monitor_finite
    decoded = sf.read(out / "decoded.wav", always_2d=True)[0]
    assert decoded.shape == (samples, 2) and np.isfinite(decoded).all()
    # with the last good codebooks: the decoded signal still follows the input
    tail = slice((kill_at + 100) * BLOCK, samples)
    err = decoded[tail] - x[tail]
    assert 10 * np.log10((x[tail].astype(float) ** 2).sum() / (err ** 2).sum()) > 5
    # the failure is counted and reported as a failed job is (estimator and encoder)
    stats = report["nodes"]["stats"]
    assert stats["worker_errors"] >= 1 and "BrokenProcessPool" in stats["worker_error"]
    assert "worker process is gone" in stats["worker_error"]
    assert report["nodes"]["enc"]["worker_errors"] >= 1
    # one job was refused, and none offered after it; no codebook changed after that
    assert offers[taken:].count("refused") == 1 and offers[-1] == "refused"
    assert enc.updates == settled
