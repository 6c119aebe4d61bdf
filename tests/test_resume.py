"""``streamq run --resume``: an offline run stopped by Ctrl-C or killed (kill -9)
continues from its last checkpoint, and its outputs and report equal those of
one uninterrupted run; a checkpoint of another graph, input or streamq version
is refused with one line."""

from __future__ import annotations

import json
import os
import pickle
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

RATE = 48_000

GRAPH = """
[graph]
name = "resumable"

[nodes.feed]
use = "file-source"
path = "{audio}"

[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "500 ms"
hop = "100 ms"

[nodes.enc]
use = "encoder"
input = "feed"
pdf = "stats"
method = "lloyd-max"
bits = 6
adapt = "trailing"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"

[nodes.gain]
use = "encoder"
input = "feed"
method = "lloyd-max"
bits = 4
adapt = "gain"

[nodes.gain_dec]
use = "decoder"
input = "gain"

[nodes.gain_noise]
use = "error-meter"
reference = "feed"
input = "gain_dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "PCM_24"

[nodes.codes]
use = "index-sink"
input = "enc"
path = "codes.sqi"
"""

OUTPUTS = ("decoded.wav", "codes.sqi", "noise-series.csv", "noise-spectrum.csv",
           "gain_noise-series.csv", "stats-windows.csv")


def material(path: Path, seconds: float, seed: int = 4) -> None:
    """Invented mono test signal: Laplacian noise whose level changes every 0.5 s."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    level = np.repeat(rng.choice([0.003, 0.03, 0.15], size=n // 24000 + 1), 24000)[:n]
    sf.write(path, np.clip(rng.laplace(size=n) * level, -1, 1), RATE, subtype="PCM_16")


def env(every: float = 0.2) -> dict:
    e = dict(os.environ, STREAMQ_CHECKPOINT_SECONDS=str(every))
    return e


def streamq(*args, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamq.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=900, env=env(), **kw)


def stop_midway(graph: Path, out: Path, sig: int) -> int:
    """Start a run, wait for its second checkpoint, stop it with ``sig``; its exit code."""
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "run", str(graph), "--out",
                             str(out), "--quiet"], env=env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    ck = out / ".streamq-checkpoint"
    deadline = time.monotonic() + 600
    seen = 0
    last = None
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            m = ck.stat().st_mtime_ns
        except OSError:
            m = None
        if m is not None and m != last:
            seen += 1
            last = m
            if seen >= 2:
                break
        time.sleep(0.05)
    assert proc.poll() is None, "the run ended before it could be stopped: make it longer"
    proc.send_signal(sig)
    proc.communicate(timeout=300)
    return proc.returncode


def same_results(a: Path, b: Path) -> None:
    for name in OUTPUTS:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    ra, rb = (json.loads((p / "report.json").read_text()) for p in (a, b))

    def strip(d):
        if isinstance(d, dict):
            return {k: strip(v) for k, v in d.items() if k not in ("seconds", "path")}
        return d
    assert strip(ra) == strip(rb)
    assert not (b / ".streamq-checkpoint").exists()
    assert not [p for p in b.iterdir() if p.name.endswith((".part", ".resume"))]


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    base = tmp_path_factory.mktemp("resume")
    material(base / "in.wav", 90)
    graph = base / "g.toml"
    graph.write_text(GRAPH.format(audio=base / "in.wav"))
    res = streamq("run", graph, "--out", base / "whole", "--quiet")
    assert res.returncode == 0, res.stderr
    return base, graph


def test_ctrl_c_then_resume_equals_an_uninterrupted_run(setup):
    base, graph = setup
    out = base / "ctrl-c"
    assert stop_midway(graph, out, signal.SIGINT) == 130
    rep = json.loads((out / "report.json").read_text())
    assert rep["complete"] is False and (out / ".streamq-checkpoint").exists()
    res = streamq("run", graph, "--out", out, "--quiet", "--resume")
    assert res.returncode == 0, res.stderr
    same_results(base / "whole", out)


@pytest.mark.slow
def test_kill_9_in_a_10_minute_replay_then_resume(tmp_path):
    """A 10-minute replay killed outright (no clean-up at all) continues from its
    last checkpoint: the sinks' half-written files are continued, not redone."""
    material(tmp_path / "in.wav", 600, seed=9)
    graph = tmp_path / "g.toml"
    graph.write_text(GRAPH.format(audio=tmp_path / "in.wav"))
    res = streamq("run", graph, "--out", tmp_path / "whole", "--quiet")
    assert res.returncode == 0, res.stderr
    out = tmp_path / "killed"
    assert stop_midway(graph, out, signal.SIGKILL) == -signal.SIGKILL
    assert (out / ".decoded.wav.part").exists() and not (out / "report.json").exists()
    res = streamq("run", graph, "--out", out, "--quiet", "--resume")
    assert res.returncode == 0, res.stderr
    same_results(tmp_path / "whole", out)


def one_line(res) -> str:
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr
    return lines[0]


def test_checkpoints_of_something_else_are_refused(setup, tmp_path):
    base, graph = setup
    out = tmp_path / "stopped"
    assert stop_midway(graph, out, signal.SIGINT) == 130
    # another graph: any edit to the file, or other --set values
    other = tmp_path / "other.toml"
    other.write_text(graph.read_text() + "\n# an edit\n")
    assert "of another graph" in one_line(streamq("run", other, "--out", out, "--resume"))
    assert "of another graph" in one_line(
        streamq("run", graph, "--out", out, "--resume", "--set", "enc.bits=5"))
    # another input file (same path, changed since)
    moved = tmp_path / "in.wav"
    material(moved, 90)
    g2 = tmp_path / "g2.toml"
    g2.write_text(GRAPH.format(audio=moved))
    out2 = tmp_path / "stopped2"
    assert stop_midway(g2, out2, signal.SIGINT) == 130
    os.utime(moved, ns=(time.time_ns(), time.time_ns() + 10**9))
    line = one_line(streamq("run", g2, "--out", out2, "--resume"))
    assert "node 'feed', field 'path'" in line and "changed since the checkpoint" in line
    # another streamq version
    ck_path = out / ".streamq-checkpoint"
    ck = pickle.loads(ck_path.read_bytes())
    ck.fingerprint["streamq"] = "0.0.1"
    ck_path.write_bytes(pickle.dumps(ck))
    assert "written by streamq 0.0.1" in one_line(streamq("run", graph, "--out", out, "--resume"))
    # no checkpoint at all, or a damaged one
    assert "holds no checkpoint" in one_line(
        streamq("run", graph, "--out", tmp_path / "empty", "--resume"))
    ck_path.write_bytes(b"not a checkpoint")
    assert "not a streamq checkpoint" in one_line(streamq("run", graph, "--out", out, "--resume"))


def test_a_flac_output_cannot_be_continued(tmp_path):
    material(tmp_path / "in.wav", 90)
    graph = tmp_path / "g.toml"
    graph.write_text(GRAPH.format(audio=tmp_path / "in.wav").replace("decoded.wav", "decoded.flac"))
    out = tmp_path / "o"
    assert stop_midway(graph, out, signal.SIGINT) == 130
    line = one_line(streamq("run", graph, "--out", out, "--resume"))
    assert "node 'keep', field 'path'" in line and "FLAC file cannot be continued" in line
