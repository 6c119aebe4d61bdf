"""The offline scheduler: block-size invariance (DESIGN.md rule 1), run results and reports.

Every run here goes through the real scheduler (parse/load, build, run_offline)
and real files written and read back with libsndfile.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf

from conftest import cli, digest, make_audio, read_audio, run_file, write_graph
from streamq.engine.graph import load_graph, parse_graph
from streamq.engine.scheduler import REPLAY_BLOCK, build, run_offline
from streamq.errors import StreamqError
from streamq.nodes import scenes

BLOCKS = (7, 256, 65_536)


def _drift_graph(seconds: float, rate: int = 8000, subtype: str = "DOUBLE") -> str:
    return f"""
        [graph]
        name = "drift-check"
        sample_rate = {rate}

        [nodes.feed]
        use = "test-signal"
        scene = "drift"
        seconds = {seconds}
        channels = 2

        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
        subtype = "{subtype}"

        [nodes.keep_pcm]
        use = "file-sink"
        input = "feed"
        path = "pcm.wav"
        subtype = "PCM_24"
    """


def _file_graph(source: str) -> str:
    return f"""
        [graph]
        name = "file-check"

        [nodes.src]
        use = "file-source"
        path = "{source}"

        [nodes.keep]
        use = "file-sink"
        input = "src"
        path = "out.wav"
        subtype = "PCM_24"
    """


def _runs(tmp_path, graph_text, blocks, bytes_of="pcm.wav"):
    """Run one graph once per block size.

    Returns {block: (samples of out.wav, digest of the ``bytes_of`` file, result)}.
    File bytes are compared on an integer-PCM file only: for FLOAT/DOUBLE WAV
    libsndfile writes a PEAK chunk holding the wall-clock time, so those bytes
    differ between runs a second apart even when every sample is equal.
    """
    g = write_graph(tmp_path, graph_text)
    out = {}
    for block in blocks:
        d = tmp_path / f"b{block}"
        result = run_file(g, d, block=block)
        assert result.complete
        data, _ = read_audio(d / "out.wav")
        out[block] = (data, digest(d / bytes_of), result)
    return out


def _assert_identical(runs):
    blocks = list(runs)
    ref_data, ref_digest, ref_result = runs[blocks[0]]
    for b in blocks[1:]:
        data, dig, result = runs[b]
        assert data.shape == ref_data.shape, f"block {b}"
        # Bit-identical: compare the float64 arrays exactly, and the file bytes.
        assert np.array_equal(data, ref_data), f"block {b} differs from block {blocks[0]}"
        assert dig == ref_digest, f"block {b}: file bytes differ"
        assert result.samples == ref_result.samples


def test_drift_scene_is_block_size_invariant(tmp_path):
    runs = _runs(tmp_path, _drift_graph(2.0), BLOCKS)
    _assert_identical(runs)
    data = runs[65_536][0]
    assert data.shape == (16_000, 2)  # crosses the noise chunks (8,192 frames)
    # The two channels differ (the scene gives each its own noise) and nothing is silent.
    assert not np.array_equal(data[:, 0], data[:, 1])
    assert np.abs(data).max() > 0.1


def test_drift_scene_in_blocks_of_one_frame(tmp_path):
    # Blocks of one frame are slow: a short program (0.2 s at 8 kHz = 1,600 frames).
    runs = _runs(tmp_path, _drift_graph(0.2), (1, 65_536))
    _assert_identical(runs)
    assert runs[1][0].shape == (1600, 2)


def test_scene_equals_one_piece_rendering(tmp_path):
    # The scene is a function of the absolute sample index: the file written in
    # blocks of 100 equals the whole range rendered in one call.
    g = write_graph(tmp_path, _drift_graph(1.5))
    run_file(g, tmp_path / "o", block=100)
    data, _ = read_audio(tmp_path / "o" / "out.wav")
    total = 12_000
    for ch in range(2):
        whole = scenes.render("drift", seed=1, channel=ch, start=0, stop=total, rate=8000,
                              total=total, frequency=1000.0, level_dbfs=-20.0, pdf="gaussian")
        assert np.array_equal(data[:, ch], whole)


@pytest.mark.parametrize("scene", ["noise", "tone"])
def test_other_scenes_are_block_size_invariant(tmp_path, scene):
    # 20,000 frames cross the noise generator's 8,192-frame chunks several times.
    text = f"""
        [graph]
        sample_rate = 10000
        [nodes.feed]
        use = "test-signal"
        scene = "{scene}"
        pdf = "laplacian"
        seconds = 2
        channels = 2
        bits = 16
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
        subtype = "PCM_16"
    """
    _assert_identical(_runs(tmp_path, text, (7, 8192, 65_536), bytes_of="out.wav"))


def test_file_graph_is_block_size_invariant(tmp_path):
    src = tmp_path / "take.wav"
    original = make_audio(src, frames=12_345, channels=2, rate=44_100, subtype="PCM_24")
    runs = _runs(tmp_path, _file_graph(str(src)), (1, 7, 256, 65_536), bytes_of="out.wav")
    _assert_identical(runs)
    data = runs[1][0]
    # PCM_24 in, PCM_24 out: the samples pass through unchanged, at the file's own rate.
    assert np.array_equal(data, original)
    assert read_audio(tmp_path / "b1" / "out.wav")[1] == 44_100


def test_block_option_of_the_cli_gives_identical_files(tmp_path):
    g = write_graph(tmp_path, _drift_graph(0.5, subtype="PCM_24"))
    outs = []
    for block in ("7", None):
        d = tmp_path / f"cli-{block}"
        args = ["run", g, "--out", d, "--quiet"] + (["--block", block] if block else [])
        proc = cli(*args)
        assert proc.returncode == 0, proc.stderr
        outs.append(d / "out.wav")
    assert digest(outs[0]) == digest(outs[1])  # PCM_24 here: no PEAK chunk
    assert digest(outs[0].parent / "pcm.wav") == digest(outs[1].parent / "pcm.wav")
    api = tmp_path / "api"
    run_file(g, api, block=256)
    assert np.array_equal(read_audio(outs[0])[0], read_audio(api / "out.wav")[0])


# -- run results and report.json ------------------------------------------------------

def test_report_of_a_complete_run(tmp_path):
    g = write_graph(tmp_path, _drift_graph(0.5))
    result = run_file(g, tmp_path / "o", block=1000)
    assert result.complete and result.samples == 4000 and result.error is None
    report = json.loads((tmp_path / "o" / "report.json").read_text())
    assert report["complete"] is True
    assert report["samples"] == 4000
    assert report["sample_rate"] == 8000
    assert report["audio_seconds"] == pytest.approx(0.5)
    assert report["outputs"]["keep"]["frames"] == 4000
    assert report["outputs"]["keep_pcm"]["frames"] == 4000
    assert report["outputs"]["keep"]["path"] == str(tmp_path / "o" / "out.wav")
    assert not list((tmp_path / "o").glob(".*")), "temporary files left behind"


def test_default_step_is_the_replay_block(tmp_path):
    # 2.5 s at 48 kHz = 120,000 frames: one full step of 65,536 and one short one.
    g = write_graph(tmp_path, _drift_graph(2.5, rate=48_000, subtype="PCM_16"))
    seen = []
    built = build(parse_graph(g.read_text(), g), tmp_path / "o")
    run_offline(built, progress=lambda done, total: seen.append((done, total)),
                handle_signals=False)
    assert seen == [(REPLAY_BLOCK, 120_000), (120_000, 120_000)]


@pytest.mark.parametrize("block", [0, -5])
def test_block_below_one_frame_is_refused(tmp_path, block):
    g = write_graph(tmp_path, _drift_graph(0.1))
    built = build(parse_graph(g.read_text(), g), tmp_path / "o")
    with pytest.raises(StreamqError, match="block size must be at least 1 frame"):
        run_offline(built, block=block, handle_signals=False)
    # The nodes were closed: no temporary or empty output is left behind.
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == []



def _metered_graph(seconds: float) -> str:
    return _drift_graph(seconds) + """
        [nodes.enc]
        use = "encoder"
        input = "feed"
        bits = 4

        [nodes.dec]
        use = "decoder"
        input = "enc"

        [nodes.noise]
        use = "error-meter"
        reference = "feed"
        input = "dec"
    """


def test_meters_step_behind_on_their_own_thread_and_catch_up(tmp_path):
    """An offline run steps a meter on a thread of its own (Node.runs_behind),
    every block in order, all before finish() and the report."""
    import threading
    g = write_graph(tmp_path, _metered_graph(0.5))
    built = build(parse_graph(g.read_text(), g), tmp_path / "o")
    meter = built.nodes["noise"]
    seen, step = [], meter.step
    meter.step = lambda frames, ins: (seen.append((threading.current_thread().name,
                                                   ins["input"].block.start)),
                                      step(frames, ins))[1]
    result = run_offline(built, block=300, handle_signals=False)
    assert [start for _, start in seen] == list(range(0, 4000, 300))
    assert {name for name, _ in seen} == {"streamq-noise"}
    assert result.report["meters"]["noise"]["samples"] == 4000
    # the same figures as the same blocks stepped in line
    again = build(parse_graph(g.read_text(), g), tmp_path / "inline")
    again.nodes["noise"].runs_behind = False
    inline = run_offline(again, block=300, handle_signals=False)
    assert inline.report["meters"] == result.report["meters"]


def test_a_meter_failing_behind_stops_the_run_and_the_files_stay_valid(tmp_path):
    g = write_graph(tmp_path, _metered_graph(0.5))
    built = build(parse_graph(g.read_text(), g), tmp_path / "o")
    meter = built.nodes["noise"]
    step, calls = meter.step, []

    def failing(frames, ins):
        calls.append(frames)
        if len(calls) == 3:
            raise meter.fail(None, "cannot measure this block")
        return step(frames, ins)

    meter.step = failing
    with pytest.raises(StreamqError, match="node 'noise': cannot measure this block"):
        run_offline(built, block=300, handle_signals=False)
    assert len(calls) == 3      # nothing is stepped after the failure
    data, rate = read_audio(tmp_path / "o" / "out.wav")   # closed and valid
    assert rate == 8000 and 600 <= data.shape[0] <= 4000


# -- explicit state (DESIGN.md rule 3): stop half way, continue in fresh nodes ---------

def _open_source(graph_file, out_dir):
    """Build the graph anew (fresh node objects); return its node 'src' and length."""
    built = build(load_graph(graph_file), out_dir)
    return built.nodes["src"], built.length


def _pull(node, frames: int, block: int) -> np.ndarray:
    """Step a source node over ``frames`` frames in steps of ``block``; check the
    blocks' start indices follow on from the node's position."""
    parts = []
    for start in range(0, frames, block):
        n = min(block, frames - start)
        pkt = node.step(n, {})
        if parts:
            assert pkt.block.start == parts[-1][0] + parts[-1][1].shape[0]
        parts.append((pkt.block.start, pkt.block.data))
    return np.concatenate([data for _, data in parts])


def _resumed_equals_whole(graph_file, tmp_path, cut: int) -> tuple:
    """Run ``src`` whole, and again as two halves with its state carried (through
    JSON, as plain data) from one node object to a fresh one built from the file.
    The two results must be bit-identical; return both nodes' reports."""
    whole_node, total = _open_source(graph_file, tmp_path / "whole")
    whole = _pull(whole_node, total, 4096)
    whole_node.finish()
    whole_node.close(True)

    first, _ = _open_source(graph_file, tmp_path / "first")
    head = _pull(first, cut, 1000)
    state = json.loads(json.dumps(first.get_state()))
    first.close(False)

    second, _ = _open_source(graph_file, tmp_path / "second")
    second.set_state(state)
    pkt = second.step(1, {})
    assert pkt.block.start == cut
    tail = np.concatenate([pkt.block.data, _pull(second, total - cut - 1, 777)])
    second.finish()
    second.close(True)

    resumed = np.concatenate([head, tail])
    assert resumed.shape == whole.shape
    assert np.array_equal(resumed, whole)  # bit-exact, not approximately equal
    return whole_node.report(), second.report()


@pytest.mark.parametrize("scene, extra", [
    ("drift", ""), ("noise", 'pdf = "laplacian"\nbits = 16'), ("tone", "frequency = 997"),
])
def test_test_signal_resumes_from_its_state(tmp_path, scene, extra):
    # 20,000 frames cut at 10,007: the cut lies inside a noise chunk (8,192 frames),
    # so the resumed node must regenerate that chunk from the absolute position.
    g = write_graph(tmp_path, f"""
        [graph]
        sample_rate = 8000
        [nodes.src]
        use = "test-signal"
        scene = "{scene}"
        seconds = 2.5
        channels = 2
        seed = 5
        {extra}
    """)
    _resumed_equals_whole(g, tmp_path, cut=10_007)


def test_file_source_resumes_from_its_state(tmp_path):
    # A float file with NaN samples on both sides of the cut, read with channels
    # picked and swapped: the resumed node seeks to the position and keeps
    # counting replaced samples from where the first one stopped.
    x = make_audio(tmp_path / "clean.wav", 20_000, 3, rate=8000, subtype="FLOAT")
    x[[1234, 15_000], 0] = np.nan
    x[9000, 1] = np.inf
    sf.write(str(tmp_path / "take.wav"), x, 8000, subtype="FLOAT")
    g = write_graph(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        channels = [2, 1]
        nonfinite = "zero"
    """)
    whole, resumed = _resumed_equals_whole(g, tmp_path, cut=10_007)
    assert whole["frames_read"] == resumed["frames_read"] == 20_000
    assert whole["nonfinite_replaced"] == resumed["nonfinite_replaced"] == 3
