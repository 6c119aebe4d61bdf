"""Audio files in and out: sample conservation (DESIGN.md rule 2) for every format
libsndfile gives us, channel picking, and the file sink's safety rules.

All files are real: written and read back with soundfile (libsndfile).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf

from conftest import assert_names, digest, make_audio, read_audio, run_file, write_graph
from streamq.engine.graph import load_graph
from streamq.engine.scheduler import build, run_offline
from streamq.errors import StreamqError

FRAMES = 12_345  # odd, and not a multiple of any block size used below

FORMATS = [
    ("WAV", "PCM_16", "wav"),
    ("WAV", "PCM_24", "wav"),
    ("WAV", "PCM_32", "wav"),
    ("WAV", "FLOAT", "wav"),
    ("WAV", "DOUBLE", "wav"),
    ("FLAC", "PCM_16", "flac"),
    ("FLAC", "PCM_24", "flac"),
    pytest.param("OGG", "VORBIS", "ogg", marks=pytest.mark.skipif(
        not sf.check_format("OGG", "VORBIS"), reason="this libsndfile has no Ogg Vorbis")),
]
LOSSLESS = {"PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"}


def copy_graph(src: str, out: str, subtype: str, extra: str = "") -> str:
    return f"""
        [nodes.src]
        use = "file-source"
        path = "{src}"
        {extra}

        [nodes.keep]
        use = "file-sink"
        input = "src"
        path = "{out}"
        subtype = "{subtype}"
    """


@pytest.mark.parametrize("channels", [1, 2, 6])
@pytest.mark.parametrize("fmt, subtype, ext", FORMATS)
def test_sample_conservation(tmp_path, fmt, subtype, ext, channels):
    src = tmp_path / f"take.{ext}"
    original = make_audio(src, FRAMES, channels, rate=48_000, subtype=subtype, fmt=fmt)
    in_info = sf.info(str(src))
    assert in_info.frames == FRAMES  # the input really has the odd length

    g = write_graph(tmp_path, copy_graph(src.name, f"copy.{ext}", subtype))
    result = run_file(g, tmp_path / "o", block=1000)
    out = tmp_path / "o" / f"copy.{ext}"
    info = sf.info(str(out))
    # One output frame per input frame, channel count and rate unchanged.
    assert info.frames == FRAMES
    assert info.channels == channels
    assert info.samplerate == 48_000
    assert (info.format, info.subtype) == (fmt, subtype)
    assert result.samples == FRAMES
    assert result.report["outputs"]["keep"]["frames"] == FRAMES
    assert result.report["nodes"]["src"]["frames_read"] == FRAMES
    data, _ = read_audio(out)
    assert data.shape == (FRAMES, channels)
    if subtype in LOSSLESS:
        # Same word length in and out: the samples pass through bit for bit.
        assert np.array_equal(data, original)
        assert result.report["outputs"]["keep"]["clipped_samples"] == 0


@pytest.mark.parametrize("out_ext, out_subtype", [("wav", "PCM_16"), ("flac", "PCM_24"),
                                                  ("wav", "DOUBLE")])
def test_conservation_across_formats(tmp_path, out_ext, out_subtype):
    src = tmp_path / "take.wav"
    original = make_audio(src, FRAMES, 2, rate=44_100, subtype="FLOAT")
    g = write_graph(tmp_path, copy_graph(src.name, f"copy.{out_ext}", out_subtype))
    run_file(g, tmp_path / "o")
    data, rate = read_audio(tmp_path / "o" / f"copy.{out_ext}")
    assert data.shape == original.shape and rate == 44_100
    if out_subtype == "DOUBLE":
        assert np.array_equal(data, original)
    else:
        # Rounded to the word length: within half a step (plus libsndfile's rounding).
        bits = 16 if out_subtype == "PCM_16" else 24
        assert np.max(np.abs(data - original)) <= 2.0 ** -(bits - 1)


@pytest.mark.parametrize("picks", [[2], [3, 1], [6, 6]])
def test_channel_picking(tmp_path, picks):
    src = tmp_path / "take.wav"
    original = make_audio(src, FRAMES, 6, rate=48_000, subtype="PCM_24")
    g = write_graph(tmp_path, copy_graph(src.name, "picked.wav", "PCM_24",
                                         extra=f"channels = {picks}"))
    run_file(g, tmp_path / "o", block=4096)
    data, _ = read_audio(tmp_path / "o" / "picked.wav")
    assert data.shape == (FRAMES, len(picks))
    assert np.array_equal(data, original[:, [p - 1 for p in picks]])


def test_channels_two_from_stereo(tmp_path):
    src = tmp_path / "take.flac"
    original = make_audio(src, FRAMES, 2, rate=48_000, subtype="PCM_16", fmt="FLAC")
    g = write_graph(tmp_path, copy_graph(src.name, "right.wav", "PCM_16", extra="channels = [2]"))
    run_file(g, tmp_path / "o", block=777)
    data, _ = read_audio(tmp_path / "o" / "right.wav")
    assert data.shape == (FRAMES, 1)
    assert np.array_equal(data[:, 0], original[:, 1])


def test_test_signal_length(tmp_path):
    # seconds * rate, rounded to the nearest frame: 0.2573 s at 44.1 kHz = 11,346.93 -> 11,347.
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 44100
        [nodes.feed]
        use = "test-signal"
        scene = "noise"
        seconds = 0.2573
        channels = 6
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "noise.flac"
        subtype = "PCM_24"
    """)
    result = run_file(g, tmp_path / "o", block=1000)
    info = sf.info(str(tmp_path / "o" / "noise.flac"))
    assert info.frames == result.samples == 11_347
    assert info.channels == 6


def test_nonfinite_samples_replaced_when_asked(tmp_path):
    x = np.full((3000, 2), 0.25)
    x[100, 0] = np.nan
    x[2999, 1] = np.inf
    sf.write(str(tmp_path / "take.wav"), x, 48_000, subtype="FLOAT")
    g = write_graph(tmp_path, copy_graph("take.wav", "clean.wav", "FLOAT",
                                         extra='nonfinite = "zero"'))
    result = run_file(g, tmp_path / "o", block=1024)
    data, _ = read_audio(tmp_path / "o" / "clean.wav")
    assert data.shape == (3000, 2)
    assert data[100, 0] == 0.0 and data[2999, 1] == 0.0 and data[101, 0] == 0.25
    assert result.report["nodes"]["src"]["nonfinite_replaced"] == 2


def test_pcm_sink_clips_and_counts(tmp_path):
    x = np.zeros((1000, 1))
    x[10] = 1.5
    x[20] = -2.0
    x[30] = 1.0  # one step above the largest 16-bit code
    sf.write(str(tmp_path / "hot.wav"), x, 48_000, subtype="DOUBLE")
    g = write_graph(tmp_path, copy_graph("hot.wav", "out.wav", "PCM_16"))
    result = run_file(g, tmp_path / "o")
    data, _ = read_audio(tmp_path / "o" / "out.wav")
    assert result.report["outputs"]["keep"]["clipped_samples"] == 3
    assert data[10, 0] == data[30, 0] == 1.0 - 2.0 ** -15  # common practice: 16-bit full scale
    assert data[20, 0] == -1.0


# -- file sink safety -------------------------------------------------------------------

def test_output_parent_is_a_file(tmp_path):
    (tmp_path / "blocker").write_text("not a folder")
    g = write_graph(tmp_path, f"""
        [nodes.feed]
        use = "test-signal"
        seconds = 0.1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{tmp_path / 'blocker' / 'out.wav'}"
    """)
    with pytest.raises(StreamqError) as info:
        build(load_graph(g), tmp_path / "o")
    assert_names(str(info.value), str(g), "node 'keep'", "field 'path'",
                 str(tmp_path / "blocker" / "out.wav"), "cannot create")


@pytest.mark.parametrize("path, subtype, field, expect", [
    ("out.xyz", "PCM_16", "path", "unknown audio file extension '.xyz'"),
    ("out.flac", "FLOAT", "subtype", "subtype FLOAT is not available for FLAC"),
    ("out.wav", "PCM_12", "subtype", "subtype PCM_12 is not available for WAV"),
    ("out.wav", "VORBIS", "subtype", "subtype VORBIS is not available for WAV"),
])
def test_bad_output_format(tmp_path, path, subtype, field, expect):
    # The extension picks the format (field 'path'); the subtype must be one that
    # format has (soundfile.check_format), else field 'subtype' is at fault. Both
    # the build and validation with precheck (what `streamq check` runs) say so.
    g = write_graph(tmp_path, f"""
        [nodes.feed]
        use = "test-signal"
        seconds = 0.1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{path}"
        subtype = "{subtype}"
    """)
    with pytest.raises(StreamqError) as info:
        build(load_graph(g), tmp_path / "o")
    assert_names(str(info.value), str(g), "node 'keep'", f"field '{field}'", expect)
    with pytest.raises(StreamqError) as info:
        load_graph(g, precheck=True)
    assert_names(str(info.value), str(g), "node 'keep'", f"field '{field}'", expect)
    assert not (tmp_path / "o" / path).exists()


def _two_sinks(tmp_path, first: str, second: str, third: str = "other.wav"):
    return write_graph(tmp_path, f"""
        [nodes.feed]
        use = "test-signal"
        seconds = 0.1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{first}"
        [nodes.enc]
        use = "encoder"
        input = "feed"
        bits = 4
        [nodes.dec]
        use = "decoder"
        input = "enc"
        [nodes.copy]
        use = "file-sink"
        input = "dec"
        path = "{second}"
        [nodes.codes]
        use = "index-sink"
        input = "enc"
        path = "{third}"
    """)


@pytest.mark.parametrize("second", ["out.wav", "./sub/../out.wav", "OUT"])
def test_two_sinks_writing_one_file_are_refused(tmp_path, second):
    # Relative and absolute spellings of one file clash alike ("OUT" stands for
    # the absolute path of the first sink's file). One line names both nodes and
    # the field; nothing is left in the output folder.
    out = tmp_path / "o"
    second = str(out / "out.wav") if second == "OUT" else second
    g = _two_sinks(tmp_path, "out.wav", second)
    with pytest.raises(StreamqError) as info:
        build(load_graph(g), out)
    (line,) = str(info.value).splitlines()
    assert_names(line, str(g), "nodes 'keep' and 'copy'", "field 'path'", "out.wav")
    assert not list(out.iterdir())


def test_two_sinks_behind_a_link_loop_are_compared_as_written(tmp_path):
    # A path through a loop of symbolic links cannot be resolved: the two
    # spellings are then compared as absolute paths, and still clash.
    out = tmp_path / "o"
    out.mkdir()
    (out / "loop").symlink_to(out / "loop")
    g = _two_sinks(tmp_path, "loop/out.wav", "loop/out.wav")
    with pytest.raises(StreamqError) as info:
        build(load_graph(g), out)
    lines = str(info.value).splitlines()
    assert any("nodes 'keep' and 'copy'" in line and "field 'path'" in line for line in lines)


def test_an_index_sink_and_a_file_sink_writing_one_file_are_refused(tmp_path):
    g = _two_sinks(tmp_path, "a.wav", "b.wav", third="a.wav")
    with pytest.raises(StreamqError) as info:
        build(load_graph(g), tmp_path / "o")
    (line,) = str(info.value).splitlines()
    assert_names(line, str(g), "nodes 'keep' and 'codes'", "field 'path'", "a.wav")


def test_sinks_with_their_own_files_run(tmp_path):
    g = _two_sinks(tmp_path, "out.wav", "sub/out.wav", third="codes.sqi")
    result = run_file(g, tmp_path / "o")
    assert result.complete
    assert sf.info(str(tmp_path / "o" / "out.wav")).frames == 4800
    assert sf.info(str(tmp_path / "o" / "sub" / "out.wav")).frames == 4800


def _sink_graph(tmp_path, seconds=1.0, path="out.wav"):
    return write_graph(tmp_path, f"""
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        scene = "noise"
        seconds = {seconds}
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{path}"
        subtype = "PCM_16"
    """)


def test_output_appears_only_when_closed(tmp_path):
    g = _sink_graph(tmp_path)
    built = build(load_graph(g), tmp_path / "o")
    # While open, only the hidden temporary file exists.
    assert (tmp_path / "o" / ".out.wav.part").exists()
    assert not (tmp_path / "o" / "out.wav").exists()
    run_offline(built, handle_signals=False)
    assert (tmp_path / "o" / "out.wav").exists()
    assert not (tmp_path / "o" / ".out.wav.part").exists()


def test_failed_build_leaves_no_file_and_keeps_an_old_one(tmp_path):
    # The sink opens fine, another node fails: the sink must not leave an empty
    # file under its name, nor replace the recording already there.
    make_audio(tmp_path / "keep.wav", 500, 1, rate=8000, subtype="PCM_16")
    before = digest(tmp_path / "keep.wav")
    g = write_graph(tmp_path, f"""
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        seconds = 0.5
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{tmp_path / 'keep.wav'}"
        [nodes.src]
        use = "file-source"
        path = "missing.wav"
    """)
    with pytest.raises(StreamqError, match="missing.wav: no such file"):
        build(load_graph(g), tmp_path / "o")
    assert digest(tmp_path / "keep.wav") == before
    assert not list(tmp_path.glob(".*.part"))


def test_error_mid_run_closes_the_outputs(tmp_path):
    # A NaN at sample 5,000 stops the run; the temporary file must not linger.
    x = np.zeros((8000, 1))
    x[5000] = np.nan
    sf.write(str(tmp_path / "take.wav"), x, 8000, subtype="FLOAT")
    g = write_graph(tmp_path, copy_graph("take.wav", "out.wav", "FLOAT"))
    with pytest.raises(StreamqError, match="sample 5000"):
        run_file(g, tmp_path / "o", block=1000)
    assert not list((tmp_path / "o").glob(".*.part"))
    # Whatever is left under the final name is a valid file (today: the 5,000
    # frames written before the bad step).
    out = tmp_path / "o" / "out.wav"
    if out.exists():
        assert sf.info(str(out)).frames <= 5000


def test_report_is_written_atomically(tmp_path):
    g = _sink_graph(tmp_path, seconds=0.2)
    result = run_file(g, tmp_path / "o")
    report = json.loads((tmp_path / "o" / "report.json").read_text())
    assert report["samples"] == result.samples == 1600
    assert not list((tmp_path / "o").glob(".report.json.*"))   # no temporary file left
