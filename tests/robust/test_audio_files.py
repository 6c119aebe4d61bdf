"""Audio files: damaged, odd or hostile input files through a full chain.

Bad files (truncated headers or data, zero length, text, NaN/Inf, values far
beyond full scale) exit 2 with one line naming the graph or the file, the node,
the field and, where it applies, the sample position; odd but valid files
(wrong extension for the content, 1 Hz and 768 kHz rates, 64 channels, 8- and
24-bit words) run to the end with every sample accounted for. Whatever a failed
run had written stays a valid file.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
import soundfile as sf
from hypothesis import given, strategies as st

from robust.util import assert_clean, assert_outputs_valid, fuzz_settings, run_cli

CHAIN = """
[graph]
name = "audio"
{header}
[nodes.src]
use = "file-source"
path = "{path}"
{src_extra}
[nodes.stats]
use = "pdf-estimator"
input = "src"
window = {window}
hop = {hop}
[nodes.enc]
use = "encoder"
input = "src"
pdf = "stats"
bits = 4
adapt = "trailing"
[nodes.dec]
use = "decoder"
input = "enc"
[nodes.noise]
use = "error-meter"
reference = "src"
input = "dec"
[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "FLOAT"
"""


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


def chain(folder, path: str, window='"50 ms"', hop='"10 ms"', header="", src_extra=""):
    g = folder / "g.toml"
    g.write_text(CHAIN.format(path=path, window=window, hop=hop, header=header, src_extra=src_extra))
    return g


def noise(frames: int, channels: int = 1, level: float = 0.3, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(level * rng.standard_normal((frames, channels)), -0.99, 0.99)


def good_wav(path, frames=8000, rate=8000, subtype="PCM_16", channels=1) -> bytes:
    sf.write(str(path), noise(frames, channels), rate, subtype=subtype)
    return path.read_bytes()


def run(capsys, g, out):
    return run_cli(capsys, "run", g, "--out", out, "--quiet")


def assert_ran(res, out, frames: int, channels: int | None = None):
    assert res.code == 0, res
    report = assert_outputs_valid(out)
    assert report["complete"] and report["samples"] == frames
    info = sf.info(str(out / "decoded.wav"))
    assert info.frames == frames
    if channels is not None:
        assert info.channels == channels
    m = report["meters"]["noise"]
    assert m["samples"] == frames * (channels or 1) or m["samples"] == frames
    return report


# -- damaged files -------------------------------------------------------------------

HEADER_CUTS = [0, 1, 4, 8, 11, 12, 16, 20, 24, 36, 40, 43]


@pytest.mark.parametrize("cut", HEADER_CUTS)
def test_truncated_header(tmp_path, capsys, cut):
    raw = good_wav(tmp_path / "whole.wav")
    (tmp_path / "cut.wav").write_bytes(raw[:cut])
    g = chain(tmp_path, "cut.wav")
    assert_clean(run(capsys, g, tmp_path / "o"), str(g), "node 'src', field 'path'",
                 str(tmp_path / "cut.wav"))
    assert not (tmp_path / "o" / "decoded.wav").exists()


@fuzz_settings(40)
@given(keep=st.integers(45, 16_043), fmt=st.sampled_from([("WAV", "wav"), ("AIFF", "aiff")]))
def test_truncated_data(tmp_path_factory, capsys, keep, fmt):
    """The header promises 8,000 frames, the file holds fewer: refused, with the
    sample where the audio ends, rather than quietly run on what is there."""
    folder = tmp_path_factory.mktemp("a")
    whole = folder / f"whole.{fmt[1]}"
    sf.write(str(whole), noise(8000), 8000, subtype="PCM_16", format=fmt[0])
    raw = whole.read_bytes()
    keep = min(keep, len(raw) - 2)
    (folder / f"cut.{fmt[1]}").write_bytes(raw[:keep])
    g = chain(folder, f"cut.{fmt[1]}")
    res = run(capsys, g, folder / "o")
    (line,) = assert_clean(res, "node 'src', field 'path'", f"cut.{fmt[1]}")
    header = len(raw) - 8000 * 2   # 44 bytes for WAV, 54 for AIFF
    if keep <= header:   # (AIFF only) the cut falls in the header, before any audio
        assert "not a readable" in line or "holds no audio" in line, line
    elif "holds no audio" not in line:
        assert "truncated" in line and re.search(r"sample \d+", line), line
        assert f"ends at sample {(keep - header) // 2})" in line, line
    assert_outputs_valid(folder / "o")


def test_truncated_flac_stops_at_the_last_good_sample(tmp_path, capsys):
    """A FLAC file cut short: libsndfile knows the frame count from the header, the
    read comes up short; the run stops with the sample position, and the decoded
    file written so far is closed and valid."""
    sf.write(str(tmp_path / "whole.flac"), noise(200_000), 8000, subtype="PCM_16")
    raw = (tmp_path / "whole.flac").read_bytes()
    (tmp_path / "cut.flac").write_bytes(raw[: len(raw) * 2 // 3])
    g = chain(tmp_path, "cut.flac")
    res = run_cli(capsys, "run", g, "--out", tmp_path / "o", "--quiet", "--block", "4096")
    (line,) = assert_clean(res, "node 'src', field 'path'", "cut.flac", "sample")
    assert_outputs_valid(tmp_path / "o")


@pytest.mark.parametrize("content, expect", [
    (b"", "empty"),
    (b"RIFF\x00\x00\x00\x00WAVE", "not a readable audio file"),
    (b"this is a text file, not audio\n" * 40, "not a readable audio file"),
    (b"\x00" * 4096, "not a readable audio file"),
])
def test_zero_length_and_garbage(tmp_path, capsys, content, expect):
    (tmp_path / "take.wav").write_bytes(content)
    g = chain(tmp_path, "take.wav")
    assert_clean(run(capsys, g, tmp_path / "o"), str(g), "node 'src', field 'path'", "take.wav", expect)


@pytest.mark.parametrize("bad, where", [(np.nan, 777), (np.inf, 0), (-np.inf, 7999)])
def test_nan_and_inf_are_refused_with_their_position(tmp_path, capsys, bad, where):
    x = noise(8000)
    x[where, 0] = bad
    sf.write(str(tmp_path / "take.wav"), x, 8000, subtype="FLOAT")
    g = chain(tmp_path, "take.wav")
    res = run_cli(capsys, "run", g, "--out", tmp_path / "o", "--quiet", "--block", "1000")
    assert_clean(res, "node 'src', field 'path'", "take.wav", f"sample {where}")
    out = assert_outputs_valid(tmp_path / "o")
    assert out is None  # no report for a failed run
    if (tmp_path / "o" / "decoded.wav").exists():  # the steps before the bad one
        assert sf.info(str(tmp_path / "o" / "decoded.wav")).frames == where // 1000 * 1000


def test_nan_replaced_when_asked(tmp_path, capsys):
    x = noise(8000)
    x[[5, 500, 5000], 0] = [np.nan, np.inf, -np.inf]
    sf.write(str(tmp_path / "take.wav"), x, 8000, subtype="DOUBLE")
    g = chain(tmp_path, "take.wav", src_extra='nonfinite = "zero"')
    report = assert_ran(run(capsys, g, tmp_path / "o"), tmp_path / "o", 8000)
    assert report["nodes"]["src"]["nonfinite_replaced"] == 3
    assert all(v is None or np.isfinite(v) for v in (report["meters"]["noise"]["snr_db"],))


@fuzz_settings(40)
@given(scale=st.sampled_from([1.5e3, 32768.0, 8388608.0, 2.0**31, 1e30, 1e300, 1.7e308]),
       at=st.integers(0, 7999), subtype=st.sampled_from(["FLOAT", "DOUBLE"]))
def test_far_beyond_full_scale_is_refused(tmp_path_factory, capsys, scale, at, subtype):
    """Float files with integer-scaled samples (or garbage) would give a silent
    0 dB SNR or overflow: refused, naming the first such sample."""
    folder = tmp_path_factory.mktemp("a")
    x = noise(8000)
    x[at, 0] = scale
    if subtype == "FLOAT" and scale > 3e38:
        x[at, 0] = 3e38
    sf.write(str(folder / "hot.wav"), x, 8000, subtype=subtype)
    g = chain(folder, "hot.wav")
    res = run_cli(capsys, "run", g, "--out", folder / "o", "--quiet", "--block", "1000")
    assert_clean(res, "node 'src', field 'path'", "hot.wav", f"sample {at}", "full scale")
    assert "RuntimeWarning" not in res.err
    assert_outputs_valid(folder / "o")


def test_moderately_hot_float_file_runs(tmp_path, capsys):
    """+12 dBFS peaks are legal in float files: the chain runs, overload is measured."""
    x = noise(8000) * 4.0
    sf.write(str(tmp_path / "hot.wav"), x, 8000, subtype="FLOAT")
    report = assert_ran(run(capsys, chain(tmp_path, "hot.wav"), tmp_path / "o"), tmp_path / "o", 8000)
    assert report["meters"]["noise"]["overload_noise_power"] > 0


# -- odd but valid files -----------------------------------------------------------------

@pytest.mark.parametrize("write_as, name", [("FLAC", "take.wav"), ("WAV", "take.flac"),
                                            ("AIFF", "take.wav"), ("WAV", "take.mp3"),
                                            ("WAV", "take"), ("FLAC", "take.txt")])
def test_wrong_extension_for_the_content(tmp_path, capsys, write_as, name):
    """libsndfile goes by the content, not the name: the file is read as what it is."""
    sf.write(str(tmp_path / name), noise(8000), 8000, subtype="PCM_16", format=write_as)
    assert_ran(run(capsys, chain(tmp_path, name), tmp_path / "o"), tmp_path / "o", 8000)


def test_one_hertz(tmp_path, capsys):
    """At 1 Hz the default 50 ms window is 0 samples: a clear error. Windows given
    in samples run."""
    sf.write(str(tmp_path / "slow.wav"), noise(300), 1, subtype="PCM_16")
    g = chain(tmp_path, "slow.wav")
    assert_clean(run(capsys, g, tmp_path / "o"), str(g), "node 'stats', field 'window'")
    g = chain(tmp_path, "slow.wav", window="20", hop="5")
    assert_ran(run(capsys, g, tmp_path / "o2"), tmp_path / "o2", 300)


def test_768_khz(tmp_path, capsys):
    sf.write(str(tmp_path / "fast.wav"), noise(76_800), 768_000, subtype="PCM_24")
    report = assert_ran(run(capsys, chain(tmp_path, "fast.wav"), tmp_path / "o"), tmp_path / "o", 76_800)
    assert report["sample_rate"] == 768_000


def test_rate_mismatch_with_the_graph(tmp_path, capsys):
    sf.write(str(tmp_path / "take.wav"), noise(800), 44_100, subtype="PCM_16")
    g = chain(tmp_path, "take.wav", header="sample_rate = 48000")
    assert_clean(run(capsys, g, tmp_path / "o"), str(g), "node 'src', field 'path'", "44100 Hz",
                 "48000 Hz")


def test_64_channels(tmp_path, capsys):
    sf.write(str(tmp_path / "wide.wav"), noise(2000, 64), 8000, subtype="PCM_16")
    report = assert_ran(run(capsys, chain(tmp_path, "wide.wav"), tmp_path / "o"), tmp_path / "o",
                        2000, channels=64)
    assert len(report["meters"]["noise"]["per_channel"]) == 64


@pytest.mark.parametrize("fmt, subtype, ext", [("WAV", "PCM_U8", "wav"), ("AIFF", "PCM_S8", "aiff"),
                                               ("WAV", "PCM_24", "wav"), ("FLAC", "PCM_24", "flac"),
                                               ("WAV", "PCM_32", "wav"), ("WAV", "ULAW", "wav")])
def test_word_lengths(tmp_path, capsys, fmt, subtype, ext):
    sf.write(str(tmp_path / f"w.{ext}"), noise(8000), 8000, subtype=subtype, format=fmt)
    assert_ran(run(capsys, chain(tmp_path, f"w.{ext}"), tmp_path / "o"), tmp_path / "o", 8000)


def test_single_frame_and_silence(tmp_path, capsys):
    sf.write(str(tmp_path / "one.wav"), noise(1), 8000, subtype="PCM_16")
    assert_ran(run(capsys, chain(tmp_path, "one.wav"), tmp_path / "o"), tmp_path / "o", 1)
    sf.write(str(tmp_path / "quiet.wav"), np.zeros((8000, 1)), 8000, subtype="PCM_16")
    report = assert_ran(run(capsys, chain(tmp_path, "quiet.wav"), tmp_path / "o2"), tmp_path / "o2", 8000)
    assert report["meters"]["noise"]["snr_db"] is None  # 0/0: undefined, written as null


def test_training_file_problems(tmp_path, capsys):
    """The encoder's `train` file gets the same checks as a source file."""
    x = noise(4000) * 32768.0
    sf.write(str(tmp_path / "ints.wav"), x, 8000, subtype="FLOAT")
    (tmp_path / "empty.wav").write_bytes(b"")
    for name, expect in (("ints.wav", "full scale"), ("empty.wav", "empty"), ("gone.wav", "no such file")):
        g = tmp_path / f"{name}.toml"
        g.write_text(f'[graph]\nsample_rate = 8000\n[nodes.f]\nuse = "test-signal"\nseconds = 0.1\n'
                     f'[nodes.e]\nuse = "encoder"\ninput = "f"\ntrain = "{name}"\n')
        assert_clean(run(capsys, g, tmp_path / "o"), "node 'e', field 'train'", name, expect)


@pytest.mark.parametrize("method", ["lloyd-max", "optimal", "uniform"])
def test_design_from_a_file_with_huge_samples(tmp_path, capsys, method):
    """`streamq design --from`: a finite sample whose square overflows (|x| ~ 1e200 in a
    float64 file) is refused in one line naming the file and the sample, not a traceback
    or an 'mse inf' result."""
    x = noise(1000, channels=2)
    x[123, 1] = -1e200
    sf.write(str(tmp_path / "huge.wav"), x, 8000, subtype="DOUBLE")
    res = run_cli(capsys, "design", "--from", tmp_path / "huge.wav", "--bits", "3",
                  "--method", method, "--json")
    assert_clean(res, "huge.wav", "frame 123, channel 1", "too large")
    assert res.out == ""
