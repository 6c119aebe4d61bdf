"""``[graph] host = "jack"``: streamq as a JACK client of its own, no mocks.

Each test starts a real server (``jackd -d dummy``, or a headless PipeWire
with its JACK layer), a player client in a child process
(tests/live_util.py's ``PlayerProcess``) and ``streamq run`` as a child
process whose live-input and live-output ``connect`` to the player's ports.
The player plays an invented signal and records what streamq sends back.

The main check, on both servers, changes the server's period twice while
streamq runs: the recorded input equals what was played, an offline replay
of it with the live run's codebooks (``codebooks_from``) gives the live
decoded output bit for bit, and the player heard exactly those samples.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from live_util import (RATE, JackServer, PipeWireServer, PlayerProcess, launch_streamq,
                       live_problem, pipewire_problem)
from test_live import CHAIN, REPLAY, one_line_error, programme, write
from test_plugin import install_plugin

LIVE = pytest.mark.live
SECONDS = 8
PLAYER = "sq-player"


def graph_text(player: str, *, name: str = "jack-check", mic_connect=None,
               mon_connect=None, mon_input: str = "dec", extra: str = "") -> str:
    mic = mic_connect if mic_connect is not None else [f"{player}:out_1", f"{player}:out_2"]
    mon = mon_connect if mon_connect is not None else [f"{player}:in_1", f"{player}:in_2"]
    return f"""
[graph]
name = "{name}"
sample_rate = 48000
host = "jack"

[nodes.mic]
use = "live-input"
channels = 2
connect = {json.dumps(mic)}
""" + CHAIN + extra + f"""
[nodes.rec]
use = "file-sink"
input = "mic"
path = "input.wav"
subtype = "FLOAT"

[nodes.codes]
use = "index-sink"
input = "enc"
path = "codes.sqi"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "DOUBLE"

[nodes.mon]
use = "live-output"
input = "{mon_input}"
monitor = "input"
gain_db = 0
fade_in = "1 ms"
connect = {json.dumps(mon)}
"""


def signal_for_test(seconds: float) -> np.ndarray:
    """The live tests' programme at half level: peaks stay below the monitor's
    -1 dBFS ceiling, so at 0 dB the monitor passes the decoded samples as they are."""
    return (programme(seconds) * 0.5).astype(np.float32)


@pytest.fixture(scope="module")
def jackd():
    why = live_problem()
    if why:
        pytest.skip(why)
    server = JackServer()
    try:
        server.start()
    except RuntimeError as exc:
        pytest.fail(f"could not start a JACK server: {exc}")
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture(scope="module")
def pipewire():
    why = live_problem() or pipewire_problem()
    if why:
        pytest.skip(why)
    server = PipeWireServer()
    try:
        server.start()
    except RuntimeError as exc:
        pytest.fail(f"could not start PipeWire: {exc}")
    try:
        yield server
    finally:
        server.stop()


def session(server, graph: Path, out: Path, audio: np.ndarray, *, record: int = 2,
            periods=(), seconds: float | None = SECONDS, interrupt_after: float | None = None,
            timeout: float = 150, first_period: int | None = None, env=None):
    """Player up, streamq started, playing once streamq has connected; the
    server's period set to each of ``periods`` in turn during the run (every
    2.5 s), or SIGINT after ``interrupt_after`` s. Returns (returncode, stdout,
    stderr, recording, ports seen, player stats)."""
    player = PlayerProcess(server, audio, record=record, name=PLAYER,
                           record_seconds=len(audio) / RATE + 5)
    proc = None
    try:
        if first_period is not None:
            assert player.set_blocksize(first_period) == first_period
        args = ["run", graph, "--out", out, "--quiet"]
        if seconds is not None:
            args += ["--seconds", seconds]
        proc = launch_streamq(server, *args, env=env)
        playing = player.wait_playing(timeout=90)
        ports = player.ports("jack-check:") if playing else []
        for p in periods:
            time.sleep(2.5)
            if proc.poll() is not None:
                break
            assert player.set_blocksize(p) == p
        if interrupt_after is not None and proc.poll() is None:
            time.sleep(interrupt_after)
            proc.send_signal(signal.SIGINT)
        try:
            stdout, stderr = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            stdout, stderr = proc.communicate()
            raise AssertionError(f"streamq did not stop within {timeout} s:\n{stderr[-3000:]}")
        rec, stats = player.stop()
    finally:
        player.close()
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait()
    return proc.returncode, stdout, stderr, rec, ports, stats


def start_of(x: np.ndarray) -> int:
    """The first frame where the player's signal arrived (first non-zero sample)."""
    nz = np.flatnonzero(x[:, 0])
    assert nz.size, "the player's signal never reached streamq"
    return int(nz[0])


def same_run(a: np.ndarray, b: np.ndarray) -> int:
    """How many frames from the start of ``a`` and ``b`` are equal."""
    n = min(len(a), len(b))
    bad = np.flatnonzero(np.any(a[:n] != b[:n], axis=1))
    return int(bad[0]) if bad.size else n


def aligned_run(a: np.ndarray, b: np.ndarray, k0: int) -> int:
    """The longest stretch of ``b`` found whole in ``a`` (frame ``i`` of ``b`` near
    frame ``k0 + i`` of ``a``), looked for every half second."""
    best = 0
    for t0 in range(0, len(b) - RATE // 10, RATE // 2):
        near = np.arange(max(0, k0 + t0 - 8192), min(len(a), k0 + t0 + 8192))
        for r in near[np.all(a[near] == b[t0], axis=1)]:
            best = max(best, same_run(a[int(r):], b[t0:]))
        if best >= RATE // 10:
            return best
    return best


def check_heard(rec: np.ndarray, dec32: np.ndarray, k0: int, whole: bool) -> int:
    """The player's recording of streamq's output ports holds the decoded samples
    (float32) exactly, at one offset near ``k0``: all of them from half a second
    after the signal arrived (``whole``), or, after a dropout (JACK then skips a
    client's period, so the streams slip), at least 0.1 s in one piece. Returns
    the frames that matched."""
    best = 0
    for t0 in range(k0 + RATE // 2, len(dec32) - RATE // 10, RATE // 2):
        near = np.arange(max(0, t0 - k0 - 8192), min(len(rec), t0 - k0 + 8192))
        for r in near[np.all(rec[near] == dec32[t0], axis=1)]:
            d = int(r) - t0
            n = same_run(rec[t0 + d:], dec32[t0:])
            best = max(best, n)
            if whole and n == min(len(dec32) - t0, len(rec) - t0 - d) and n > 2 * RATE:
                return n
            if not whole and n >= RATE // 10:
                return n
        if whole:
            break
    raise AssertionError(f"the player's recording of streamq's output ports does not hold "
                         f"the decoded samples (longest match {best} frames)")


def main_check(server, base: Path, periods, first_period=None, whole_stream=True) -> dict:
    graph = write(base / "g.toml", graph_text(PLAYER))
    out = base / "out"
    audio = signal_for_test(SECONDS + 40)
    code, stdout, stderr, rec, ports, _stats = session(server, graph, out, audio,
                                                       periods=periods,
                                                       first_period=first_period)
    assert code == 0, stderr[-3000:]
    assert "Traceback" not in stderr
    report = json.loads((out / "report.json").read_text())
    live = report["live"]
    # ports named <node id>_<channel>, under the graph's name
    assert sorted(ports) == ["jack-check:mic_1", "jack-check:mic_2", "jack-check:mon_1",
                             "jack-check:mon_2"], ports
    assert live["client"] == "jack-check"
    assert live["ports"] == {"mic": ["jack-check:mic_1", "jack-check:mic_2"],
                             "mon": ["jack-check:mon_1", "jack-check:mon_2"]}
    # the period changes were followed, without a failure
    # (PipeWire's JACK layer may announce its default quantum before the one in force)
    assert live["periods"][-len(periods) - 1:] == [first_period or 128, *periods], \
        live["periods"]
    assert live["callback_errors"] == 0 and live["callback_error"] is None
    assert report["complete"] is True and report["stopped_by"] == "seconds"
    assert report["samples"] == SECONDS * RATE
    assert live["callbacks"] > 0 and live["callback_ms"]["p99"] > 0
    # what streamq received is what the player played, sample for sample
    x, rate = sf.read(out / "input.wav", dtype="float32", always_2d=True)
    assert rate == RATE and x.shape == (SECONDS * RATE, 2)
    k0 = start_of(x)
    assert k0 < 4 * RATE and not x[:k0].any()
    # (a dropout makes JACK skip a client's period: the streams slip from there on,
    # which is the server's doing; the replay below holds whatever happened)
    # PipeWire 0.3.65 was seen to hand streamq one period that the player had not
    # written (the streams in step before and after it) around a quantum change:
    # there the stream itself is checked on its first stretch only
    clean = live["xruns"] == 0 and _stats.get("xruns", 0) == 0 and whole_stream
    got = same_run(x[k0:], audio)
    if clean:
        assert got == len(x) - k0, (got, live["xruns"])
    else:   # after a slip: the player's signal still arrives whole, at some offset
        assert aligned_run(x, audio, k0) >= RATE // 10, (got, live["xruns"], _stats)
    # the offline replay with the live codebooks gives the live decoded output bit for bit
    replay_dir = base / "replay"
    offline = run_toml(REPLAY.format(input=out / "input.wav", codes=out / "codes.sqi"),
                       replay_dir)
    live_dec, _ = sf.read(out / "decoded.wav", dtype="float64", always_2d=True)
    replay_dec, _ = sf.read(replay_dir / "decoded.wav", dtype="float64", always_2d=True)
    assert live_dec.shape == replay_dec.shape == (SECONDS * RATE, 2)
    diff = np.flatnonzero(np.any(live_dec != replay_dec, axis=1))
    assert diff.size == 0, f"{diff.size} frames differ, first at sample {diff[:1]}"
    assert offline["meters"]["noise"]["snr_db"] == report["meters"]["noise"]["snr_db"]
    # ... and the player heard exactly those samples on streamq's output ports
    assert report["outputs"]["mon"]["limited_blocks"] == 0
    check_heard(rec, live_dec.astype(np.float32), k0, clean and _stats.get("xruns", 0) == 0)
    return report


@LIVE
def test_jack_run_follows_period_changes_and_replays_bit_exactly(jackd, tmp_path):
    main_check(jackd, tmp_path, periods=(256, 64))


@LIVE
def test_pipewire_run_follows_period_changes_and_replays_bit_exactly(pipewire, tmp_path):
    main_check(pipewire, tmp_path, periods=(256, 64), first_period=128, whole_stream=False)


@LIVE
@pytest.mark.parametrize("node", ["mic", "mon"])
def test_missing_connect_port_is_a_one_line_error(jackd, tmp_path, node):
    kw = {"mic_connect": ["nobody-here:out_1"]} if node == "mic" else \
        {"mic_connect": ["system:capture_1"], "mon_connect": ["system:playback_1",
                                                             "nobody-here:in_2"]}
    graph = write(tmp_path / "g.toml", graph_text(PLAYER, **kw))
    out = tmp_path / "out"
    proc = launch_streamq(jackd, "run", graph, "--out", out, "--seconds", 1, "--quiet")
    _stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 2, stderr
    line = one_line_error(stderr)
    assert f"node '{node}', field 'connect'" in line and "nobody-here" in line, line
    assert str(graph) in line
    assert not out.exists() or not any(out.iterdir()), list(out.iterdir())


@LIVE
def test_wrong_sample_rate_and_no_server_are_one_line_errors(jackd, tmp_path):
    graph = write(tmp_path / "g.toml", graph_text(PLAYER).replace("sample_rate = 48000",
                                                                  "sample_rate = 44100"))
    proc = launch_streamq(jackd, "run", graph, "--out", tmp_path / "out", "--seconds", 1)
    _stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 2, stderr
    line = one_line_error(stderr)
    assert "[graph], field 'sample_rate'" in line and "48000" in line, line
    # no server of that name: streamq says so and starts none
    graph = write(tmp_path / "g2.toml", graph_text(PLAYER))
    env = jackd.env(JACK_DEFAULT_SERVER="streamq-test-nobody")
    res = subprocess.run([sys.executable, "-m",
                          "streamq.cli", "run", str(graph), "--out", str(tmp_path / "out2"),
                          "--seconds", "1"], env=env, capture_output=True, text=True,
                         timeout=120, stdin=subprocess.DEVNULL)
    assert res.returncode == 2, res.stderr
    line = one_line_error(res.stderr)
    assert "no JACK server 'streamq-test-nobody'" in line, line
    assert not (tmp_path / "out2" / "report.json").exists()


TRIPWIRE = '''
"""An invented node kind for the tests: passes its input on, and raises once
the stream reaches sample ``at``."""
from typing import Literal
from pydantic import Field
from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
from streamq.engine.node import Node, NodeConfig


class TripConfig(NodeConfig):
    use: Literal["tripwire"]
    input: str = Field(description="signal passed on")
    at: int = Field(description="sample at which the node raises")


class Trip(Node):
    """Passes its input on until sample ``at``, then raises."""

    kind = "tripwire"
    Config = TripConfig
    inputs = ("input",)

    def open(self, specs, ctx):
        s = specs["input"]
        return StreamSpec("signal", s.rate, s.channels, s.latency, None, s.frames)

    def step(self, frames, inputs):
        b = inputs["input"].block
        if b.start + frames > self.config.at:
            raise RuntimeError(f"tripped at {self.config.at}")
        return Packet(b)
'''


@LIVE
def test_node_failure_in_the_callback_is_reported_not_a_crash(jackd, tmp_path):
    """A node on the callback's path raises 3 s into the stream: the output goes
    silent, exit status 2 with one line naming the node, report.json says
    complete false and counts the failure, the files written so far are valid."""
    plugins = tmp_path / "plugins"
    install_plugin(plugins, "streamq-tripwire", {"tripwire": "streamq_tripwire:Trip"},
                   code=TRIPWIRE)
    extra = f"""
[nodes.trip]
use = "tripwire"
input = "dec"
at = {3 * RATE}
"""
    graph = write(tmp_path / "g.toml", graph_text(PLAYER, mon_input="trip", extra=extra))
    out = tmp_path / "out"
    repo = Path(__file__).resolve().parents[1]
    code, _stdout, stderr, rec, _ports, _stats = session(
        jackd, graph, out, signal_for_test(40), seconds=20,
        env={"PYTHONPATH": f"{repo}:{plugins}"})
    assert code == 2, stderr[-3000:]
    line = one_line_error(stderr)
    assert "node 'trip'" in line and "RuntimeError: tripped at" in line, line
    report = json.loads((out / "report.json").read_text())
    assert report["complete"] is False and report["stopped_by"] == "failure"
    live = report["live"]
    assert live["callback_errors"] >= 1 and live["callback_error_node"] == "trip"
    assert "tripped" in live["callback_error"]
    n = report["samples"]
    assert 3 * RATE - 4096 <= n <= 3 * RATE
    assert sf.info(str(out / "input.wav")).frames == n
    # the monitor was heard, then went silent
    loud = np.flatnonzero(np.abs(rec).max(axis=1) > 0)
    assert loud.size and not rec[loud[-1] + 1:].any() and loud[-1] + 1 < len(rec)


@LIVE
def test_ctrl_c_stops_cleanly(jackd, tmp_path):
    graph = write(tmp_path / "g.toml", graph_text(PLAYER))
    out = tmp_path / "out"
    code, stdout, stderr, _rec, _ports, _stats = session(
        jackd, graph, out, signal_for_test(60), seconds=None, interrupt_after=3.0)
    assert code == 130, (stdout, stderr[-3000:])
    assert "Traceback" not in stderr
    report = json.loads((out / "report.json").read_text())
    assert report["complete"] is False and report["stopped_by"] == "interrupt"
    n = report["samples"]
    assert 2 * RATE <= n <= 60 * RATE
    assert report["meters"]["noise"]["samples"] == n
    for name in ("input.wav", "decoded.wav"):
        assert sf.info(str(out / name)).frames == n, name
    # the interrupted recording still replays bit-exactly
    replay = run_toml(REPLAY.format(input=out / "input.wav", codes=out / "codes.sqi"),
                      tmp_path / "replay")
    assert replay["samples"] == n
    a, _ = sf.read(out / "decoded.wav", dtype="float64", always_2d=True)
    b, _ = sf.read(tmp_path / "replay" / "decoded.wav", dtype="float64", always_2d=True)
    assert np.array_equal(a, b)
