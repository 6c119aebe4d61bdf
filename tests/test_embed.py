"""``streamq.Chain``: a graph run in-process, block by block, by any host.

The main check: a chain fed in random block sizes gives the same decoded
samples and the same report figures as ``streamq run`` of the same graph with
a file-source in place of the live-input (DESIGN.md rule 1). Then misuse, and
what a chain without an output folder writes (nothing)."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

import streamq
from chain_util import run_toml
from live_util import jack_server  # noqa: F401  (the live test's JACK server fixture)
from streamq.errors import StreamqError

RATE = 48_000
REPO = Path(__file__).resolve().parents[1]

CHAIN = """
[nodes.stats]
use = "pdf-estimator"
input = "mic"
window = "500 ms"
hop = "100 ms"

[nodes.enc]
use = "encoder"
input = "mic"
pdf = "stats"
method = "lloyd-max"
bits = 4
adapt = "trailing"
apply_after = "40 ms"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.gain]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "gain"

[nodes.gain_dec]
use = "decoder"
input = "gain"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.gain_noise]
use = "error-meter"
reference = "mic"
input = "gain_dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "DOUBLE"
"""

LIVE = f"""
[graph]
name = "embedded"
sample_rate = {RATE}

[nodes.mic]
use = "live-input"
channels = 2
""" + CHAIN + """
[nodes.mon]
use = "live-output"
input = "gain_dec"
"""

#: report fields that depend on timing or on knowing the length in advance
#: (a live input's length is unknown, so the meter keeps no "middle" codebook picture)
VARYING = {"seconds", "codebooks"}


def material(seconds: float = 4.0, seed: int = 1) -> np.ndarray:
    """Invented stereo test signal: Laplacian noise whose level jumps every 250 ms."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    level = np.repeat(rng.choice([0.005, 0.1], size=n // 12000 + 1), 12000)[:n]
    return np.clip(rng.laplace(size=(n, 2)) * level[:, None], -1, 1)


def offline_equivalent(wav: Path, out: Path) -> dict:
    text = f"""
[graph]
name = "embedded"

[nodes.mic]
use = "file-source"
path = "{wav}"
""" + CHAIN
    return run_toml(text, out)


def figures(meter: dict) -> dict:
    return {k: v for k, v in meter.items() if k not in VARYING}


def run_chain(x: np.ndarray, out: Path | None, sizes) -> tuple[dict, list[np.ndarray]]:
    outs = []
    with streamq.Chain.from_toml(LIVE, out) as chain:
        pos = 0
        for n in sizes:
            if pos >= len(x):
                break
            block = x[pos:pos + n]
            y = chain.process(block.astype(np.float32) if n % 2 else block)
            assert y.dtype == np.float32 and y.shape == block.shape
            outs.append(y)
            pos += n
    return chain.report, outs


def test_random_blocks_equal_streamq_run(tmp_path):
    x = material()
    # the same samples for both: float32 blocks must not round anything away
    x = x.astype(np.float32).astype(np.float64)
    sf.write(tmp_path / "in.wav", x, RATE, subtype="DOUBLE")
    off = offline_equivalent(tmp_path / "in.wav", tmp_path / "offline")
    rng = np.random.default_rng(5)
    sizes = list(rng.integers(1, 9000, size=400)) + [65_536] * 4
    rep, _ = run_chain(x, tmp_path / "chain", sizes)
    assert rep["complete"] is True and rep["samples"] == x.shape[0] == off["samples"]
    a, _ = sf.read(tmp_path / "chain" / "decoded.wav")
    b, _ = sf.read(tmp_path / "offline" / "decoded.wav")
    np.testing.assert_array_equal(a, b)
    for mid in ("noise", "gain_noise"):
        assert figures(rep["meters"][mid]) == figures(off["meters"][mid]), mid
    assert rep["nodes"]["enc"]["codebook_updates"] == off["nodes"]["enc"]["codebook_updates"]
    assert rep["nodes"]["enc"]["late_codebooks"] == 0
    # report.json in the folder says the same
    assert json.loads((tmp_path / "chain" / "report.json").read_text())["samples"] == rep["samples"]
    # the estimator's windows file too (every hop, as offline)
    assert (tmp_path / "chain" / "stats-windows.csv").read_text() == \
        (tmp_path / "offline" / "stats-windows.csv").read_text()


def test_without_output_folder_nothing_is_written(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    text = LIVE.replace('path = "decoded.wav"', f'path = "{tmp_path / "abs.wav"}"')
    x = material(1.0)
    with streamq.Chain.from_toml(text) as chain:
        for i in range(0, len(x), 4096):
            chain.process(x[i:i + 4096])
    assert chain.report["complete"] and chain.report["meters"]["noise"]["snr_db"] > 5
    assert sorted(p.name for p in tmp_path.iterdir()) == ["abs.wav"]   # the absolute sink only
    # a relative sink path needs a folder: said when the chain opens, naming node and field
    chain = streamq.Chain.from_toml(LIVE)
    with pytest.raises(StreamqError) as err:
        chain.open()
    assert "node 'keep', field 'path'" in str(err.value) and "out_dir" in str(err.value)
    assert chain.state == "closed"


def test_misuse_is_a_one_line_error(tmp_path):
    chain = streamq.Chain.from_toml(LIVE.replace('path = "decoded.wav"',
                                                 f'path = "{tmp_path / "d.wav"}"'))
    block = np.zeros((64, 2))
    with pytest.raises(StreamqError, match="not open yet"):
        chain.process(block)
    chain.open()
    for bad, needle in ((np.zeros((64, 3)), "takes (frames, 2) blocks"),
                        (np.zeros((64, 2), dtype=np.int16), "float32 or float64"),
                        (np.zeros((0, 2)), "1 to 65536 frames"),
                        (np.zeros((65_537, 2)), "1 to 65536 frames"),
                        ({"other": block}, "one block per live-input")):
        with pytest.raises(StreamqError) as err:
            chain.process(bad)
        assert needle in str(err.value) and "\n" not in str(err.value)
        assert chain.state == "open"          # still usable
    nan = block.copy()
    nan[10, 1] = np.nan
    with pytest.raises(StreamqError) as err:
        chain.process(nan)
    assert "sample 10, channel 1" in str(err.value) and "nonfinite" in str(err.value)
    assert chain.process(block).shape == (64, 2)     # usable after a refused block
    rep = chain.close()
    assert rep["samples"] == 64
    with pytest.raises(StreamqError, match="closed"):
        chain.process(block)
    assert chain.close() is rep       # closing twice is harmless


def test_nonfinite_zero_policy_replaces_samples():
    text = LIVE.replace('channels = 2\n', 'channels = 2\nnonfinite = "zero"\n', 1)
    text = text.replace('[nodes.keep]\nuse = "file-sink"\ninput = "dec"\npath = "decoded.wav"\n'
                        'subtype = "DOUBLE"\n', "")
    with streamq.Chain.from_toml(text) as chain:
        x = np.full((256, 2), 0.01)
        x[3, 0] = np.inf
        chain.process(x)
    assert chain.report["complete"]


def test_validation_errors_match_streamq_check(tmp_path):
    bad = LIVE.replace("bits = 4\nadapt = \"trailing\"", "bits = 40\nadapt = \"trailing\"")
    path = tmp_path / "bad.toml"
    path.write_text(bad)
    with pytest.raises(StreamqError) as err:
        streamq.Chain.load(path)
    check = subprocess.run([sys.executable, "-m", "streamq.cli", "check", str(path)],
                           capture_output=True, text=True)
    assert check.returncode == 2
    assert str(err.value) in check.stderr
    with pytest.raises(StreamqError, match="no such graph file"):
        streamq.Chain.load(tmp_path / "missing.toml")
    # overrides as --set takes them
    chain = streamq.Chain.load(REPO / "graphs" / "live-monitor.toml", overrides=["enc.bits=3"])
    assert chain.graph.nodes["enc"].config.bits == 3 and chain.inputs == ("mic",)


def test_graph_driven_by_its_sources_runs_as_streamq_run(tmp_path):
    """A graph without a live-input: Chain.run is what `streamq run` hosts
    (the command's report equals the chain's, timing aside); process() on it
    is a one-line error naming the way to run it."""
    wav = tmp_path / "in.wav"
    sf.write(wav, material(2.0), RATE, subtype="DOUBLE")
    text = f'[graph]\nname = "embedded"\n[nodes.mic]\nuse = "file-source"\npath = "{wav}"\n' + CHAIN
    want = offline_equivalent(wav, tmp_path / "cli")
    chain = streamq.Chain.from_toml(text, tmp_path / "chain", source=tmp_path / "g.toml")
    with chain:
        assert chain.inputs == () and chain.length == 2 * RATE
        with pytest.raises(StreamqError, match="no live-input; its own sources drive it"):
            chain.process(np.zeros((8, 2)))
        rep = chain.run(block=1001)
    assert chain.state == "closed" and rep["complete"] and rep["samples"] == 2 * RATE
    for nid in ("noise", "gain_noise"):
        assert figures(rep["meters"][nid]) == figures(want["meters"][nid])
    assert json.loads((tmp_path / "chain" / "report.json").read_text())["samples"] == 2 * RATE
    a, _ = sf.read(tmp_path / "chain" / "decoded.wav")
    b, _ = sf.read(tmp_path / "cli" / "decoded.wav")
    np.testing.assert_array_equal(a, b)


def test_realtime_chain_driven_by_a_file_plays_it(tmp_path):
    """A file played to a live-output in an audio callback: process_into with
    no input blocks steps the file by the callback's frames; the host stops at
    Chain.length."""
    wav = tmp_path / "in.wav"
    x = material(0.5)
    sf.write(wav, x, RATE, subtype="DOUBLE")
    text = (f'[graph]\nname = "play"\nsample_rate = {RATE}\n[nodes.mic]\nuse = "file-source"\n'
            f'path = "{wav}"\n[nodes.mon]\nuse = "live-output"\ninput = "mic"\n')
    got = []
    with streamq.Chain.from_toml(text, realtime=True) as chain:
        buf = np.zeros((128, 2), dtype=np.float32)
        while chain.position < chain.length:
            n = min(128, chain.length - chain.position)
            chain.process_into(n, (), (buf,))
            got.append(buf[:n].copy())
    assert chain.report["complete"] and chain.report["samples"] == len(x)
    assert np.concatenate(got).shape == x.shape


def test_several_inputs_and_outputs_are_keyed_by_id():
    text = f"""
[graph]
name = "two"
sample_rate = {RATE}
[nodes.left]
use = "live-input"
[nodes.right]
use = "live-input"
channels = 2
[nodes.a]
use = "encoder"
input = "left"
method = "uniform"
bits = 8
[nodes.a_out]
use = "decoder"
input = "a"
[nodes.b]
use = "encoder"
input = "right"
method = "lloyd-max"
bits = 4
adapt = "step"
[nodes.b_out]
use = "decoder"
input = "b"
[nodes.mon_a]
use = "live-output"
input = "a_out"
[nodes.mon_b]
use = "live-output"
input = "b_out"
"""
    with streamq.Chain.from_toml(text) as chain:
        assert chain.inputs == ("left", "right") and chain.outputs == ("mon_a", "mon_b")
        with pytest.raises(StreamqError, match="dict of blocks"):
            chain.process(np.zeros((8, 1)))
        out = chain.process({"left": np.zeros(8), "right": np.zeros((8, 2))})
        assert set(out) == {"mon_a", "mon_b"} and out["mon_b"].shape == (8, 2)
        # returned blocks are the host's own: the chain never changes them later
        kept = out["mon_a"].copy()
        chain.process({"left": np.ones(8) * 0.5, "right": np.ones((8, 2)) * 0.5})
        np.testing.assert_array_equal(out["mon_a"], kept)


def test_realtime_mode_runs_and_stops_its_threads(tmp_path):
    before = threading.active_count()
    x = material(1.0)
    chain = streamq.Chain.from_toml(LIVE, tmp_path, realtime=True)
    with chain:
        assert chain.latency == int(0.016 * RATE)      # the gain encoder's block
        for i in range(0, len(x), 128):
            chain.process(x[i:i + 128])
    rep = chain.report
    assert rep["complete"] and rep["samples"] == len(x)
    assert rep["meters"]["gain_noise"]["snr_db"] > 10
    assert threading.active_count() <= before


def test_process_never_prints(tmp_path, capfd):
    x = material(0.5)
    with streamq.Chain.from_toml(LIVE, tmp_path) as chain:
        for i in range(0, len(x), 1000):
            chain.process(x[i:i + 1000])
    out, err = capfd.readouterr()
    assert out == "" and err == ""


@pytest.mark.parametrize("script", sorted(p.name for p in (REPO / "examples").glob("*.py")
                                          if "sounddevice" not in p.name))
def test_examples_run(tmp_path, script):
    """The examples folder's scripts run as they are (the sound-card one needs a
    device: test_sounddevice_example_on_jack runs it against a JACK server)."""
    res = subprocess.run([sys.executable, str(REPO / "examples" / script), str(tmp_path)],
                         capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert res.returncode == 0, res.stderr[-2000:]


@pytest.mark.live
def test_sounddevice_example_on_jack(jack_server, tmp_path):
    """examples/sounddevice_callback.py: a chain inside the user's own PortAudio
    callback, on a real JACK server (dummy driver)."""
    res = subprocess.run([sys.executable, str(REPO / "examples" / "sounddevice_callback.py"),
                          "2", "system"], env=jack_server.env(), capture_output=True, text=True,
                         timeout=120, cwd=tmp_path)
    assert res.returncode == 0, res.stderr[-2000:]
    assert res.stdout.startswith("SNR ") and " dB over " in res.stdout, res.stdout
