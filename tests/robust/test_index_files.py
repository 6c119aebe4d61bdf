"""Index files (streamq's own format) at the command level.

tests/test_indexfile.py fuzzes the reader itself (2,500 hypothesis cases, and
tests/fuzz_indexfile.py with atheris). Here the same mutations go through a
whole graph (index-source -> decoder -> file-sink, and a copy to an index-sink)
run by ``streamq run`` in-process: the run either completes with whole outputs,
or exits 2 with one line naming the graph or the index file, node 'play' and
field 'path'; what was decoded before the damage stays a valid file. Named
cases: truncated files, corrupted codebook records, wrong format version,
levels and indices out of range. The atheris fuzzer runs here too when atheris
is installed (it is not a project dependency).
"""

from __future__ import annotations

import importlib.util
import os
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import given, strategies as st

import test_indexfile as T  # the reader tests: seed file, mutations, record builders
from robust.util import assert_clean, assert_outputs_valid, examples, fuzz_settings, run_cli

GRAPH = """
[graph]
name = "replay"
[nodes.play]
use = "index-source"
path = "{path}"
[nodes.dec]
use = "decoder"
input = "play"
[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "{subtype}"
[nodes.copy]
use = "index-sink"
input = "play"
path = "copy.sqi"
"""


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


def records(raw: bytes) -> list[tuple[int, int, int]]:
    """(offset, type, total length) of every record of a well-formed file."""
    (hlen,) = struct.unpack_from("<I", raw, 12)
    pos, out = 16 + hlen + 4, []
    while pos + 8 <= len(raw):
        rtype, length = struct.unpack_from("<II", raw, pos)
        out.append((pos, rtype, 8 + length + 4))
        pos += 8 + length + 4
    return out


SEED = T.SEED
RECS = records(SEED)
FIRST_CODEBOOK = next(r for r in RECS if r[1] == 1)
FIRST_CHUNK = next(r for r in RECS if r[1] == 2)
SEED_FRAMES = 600


def replay(capsys, folder: Path, content: bytes, subtype: str = "PCM_16", block: int | None = None):
    (folder / "in.sqi").write_bytes(content)
    g = folder / "g.toml"
    g.write_text(GRAPH.format(path="in.sqi", subtype=subtype))
    argv = ["run", g, "--out", folder / "o", "--quiet"] + (["--block", str(block)] if block else [])
    return g, run_cli(capsys, *argv)


def check_replay(res, g: Path, folder: Path) -> None:
    """Exit 0 with whole outputs, or exit 2 with one line naming the file, node and field."""
    out = folder / "o"
    if res.code == 0:
        report = assert_outputs_valid(out)
        n = report["samples"]
        assert sf.info(str(out / "decoded.wav")).frames == n
        assert report["outputs"]["copy"]["frames"] == n
        data, _ = sf.read(str(out / "decoded.wav"), always_2d=True)
        assert np.all(np.isfinite(data))
        return
    (line,) = assert_clean(res)
    assert "node 'play', field 'path'" in line, res
    assert str(folder / "in.sqi") in line, res
    assert_outputs_valid(out)
    assert not (out / "report.json").exists()


@fuzz_settings(300)
@given(ops=st.lists(T._mutation, min_size=1, max_size=4), fix=st.booleans(),
       block=st.sampled_from([None, 1, 97, 256]), subtype=st.sampled_from(["PCM_16", "FLOAT"]))
def test_fuzzed_index_file_through_a_graph(tmp_path_factory, capsys, ops, fix, block, subtype):
    folder = tmp_path_factory.mktemp("i")
    g, res = replay(capsys, folder, T.mutate(SEED, ops, fix), subtype, block)
    check_replay(res, g, folder)


def test_seed_replays_whole(tmp_path, capsys):
    g, res = replay(capsys, tmp_path, SEED)
    check_replay(res, g, tmp_path)
    assert res.code == 0
    assert sf.info(str(tmp_path / "o" / "decoded.wav")).frames == SEED_FRAMES


@pytest.mark.parametrize("cut", sorted({1, 8, 15, 16, 40, RECS[0][0] - 1, RECS[0][0] + 5,
                                        FIRST_CHUNK[0] + 20, len(SEED) // 2, len(SEED) - 36,
                                        len(SEED) - 1}))
def test_truncated(tmp_path, capsys, cut):
    g, res = replay(capsys, tmp_path, SEED[:cut])
    check_replay(res, g, tmp_path)
    assert res.code == 2 or cut >= len(SEED) - 36  # only a lost end record may still replay


def test_truncated_inside_the_last_chunk_is_refused_at_open(tmp_path, capsys):
    """A file cut inside its last chunk has no end record. The reader has no
    salvage mode: it checks the end record when it opens the file, so the chunks
    before the cut are not replayed either; the run stops before decoding with
    one line that says the file is truncated (exit 2)."""
    last_chunk = [r for r in RECS if r[1] == 2][-1]
    g, res = replay(capsys, tmp_path, SEED[:last_chunk[0] + 10])
    check_replay(res, g, tmp_path)
    assert res.code == 2, res
    (line,) = res.lines
    assert "truncated file" in line and "no end record" in line, line
    assert not (tmp_path / "o" / "decoded.wav").exists()


@pytest.mark.parametrize("offset", [8, 12, 20, 30, 40, 44, 50])
@pytest.mark.parametrize("fix", [False, True])
def test_corrupted_codebook_record(tmp_path, capsys, offset, fix):
    """Bytes of the first codebook record changed: the CRC catches it, and with
    the CRC recomputed the content checks do."""
    at = FIRST_CODEBOOK[0] + offset
    b = bytearray(SEED)
    b[at] ^= 0x5A
    content = T.fix_crcs(bytes(b)) if fix else bytes(b)
    g, res = replay(capsys, tmp_path, content)
    check_replay(res, g, tmp_path)
    if not fix:
        assert res.code == 2 and "CRC" in res.err.upper(), res


@pytest.mark.parametrize("version", [0, 2, 99, 2**32 - 1])
def test_wrong_version(tmp_path, capsys, version):
    b = bytearray(SEED)
    struct.pack_into("<I", b, 8, version)
    g, res = replay(capsys, tmp_path, T.fix_crcs(bytes(b)))
    check_replay(res, g, tmp_path)
    assert res.code == 2 and "version" in res.err, res


def _with_levels(tmp_path, levels, thresholds=T.THR4):
    recs = [T.rec_codebook(0, c, thresholds, levels) for c in range(2)]
    recs += [T.rec_chunk(0, np.array([[0, 1], [2, 3], [3, 0]], np.uint8)), T.rec_end(3, 2)]
    return T.blob(T.preamble(T.header_dict(2, 4, frames=3)), *recs)


@pytest.mark.parametrize("levels, thresholds", [
    ([-1.5, -0.5, 0.5], T.THR4),                      # three levels for a 4-level stream
    ([-1.5, -0.5, 0.5, float("nan")], T.THR4),        # not finite
    ([-1.5, -0.5, 0.5, float("inf")], T.THR4),
    (T.LEV4, [1.0, 0.0, -1.0]),                       # thresholds not increasing
])
def test_levels_out_of_range(tmp_path, capsys, levels, thresholds):
    g, res = replay(capsys, tmp_path, _with_levels(tmp_path, levels, thresholds))
    check_replay(res, g, tmp_path)
    assert res.code == 2, res


def test_index_values_out_of_range(tmp_path, capsys):
    recs = [T.rec_codebook(0, c, T.THR4, T.LEV4) for c in range(2)]
    recs += [T.rec_chunk(0, np.array([[0, 1], [2, 9], [3, 0]], np.uint8)), T.rec_end(3, 2)]
    g, res = replay(capsys, tmp_path, T.blob(T.preamble(T.header_dict(2, 4, frames=3)), *recs))
    check_replay(res, g, tmp_path)
    assert res.code == 2 and "sample 1" in res.err and "index out of range" in res.err, res


def test_huge_finite_levels_do_not_reach_the_output_as_inf(tmp_path, capsys):
    """Levels of 1e300 are finite: the decoded float file must not fill with inf
    without a word (refused like float audio far beyond full scale)."""
    g, res = replay(capsys, tmp_path, _with_levels(tmp_path, [-1e300, -1.0, 1.0, 1e300]), "FLOAT")
    check_replay(res, g, tmp_path)
    assert res.code == 2 and "full scale" in res.err, res


def test_not_an_index_file(tmp_path, capsys):
    sf.write(str(tmp_path / "a.wav"), np.zeros((100, 1)), 8000)
    g, res = replay(capsys, tmp_path, (tmp_path / "a.wav").read_bytes())
    check_replay(res, g, tmp_path)
    assert res.code == 2


def test_index_file_shrinking_during_replay(tmp_path):
    """The file loses its tail while a replay reads it (cut between steps)."""
    from streamq.engine.graph import load_graph
    from streamq.engine.scheduler import build, run_offline
    from streamq.errors import StreamqError
    rng = np.random.default_rng(4)
    data, events = T.random_stream(rng, 50_000, 2, 16, 8)
    T.write_file(tmp_path / "in.sqi", T.make_spec(2, 16, frames=50_000), data, events, sizes=[999],
                 chunk_frames=4096)
    g = tmp_path / "g.toml"
    g.write_text(GRAPH.format(path="in.sqi", subtype="PCM_16"))
    built = build(load_graph(g), tmp_path / "o")
    size = (tmp_path / "in.sqi").stat().st_size

    def shrink(done, total):
        if done == 8192:
            os.truncate(tmp_path / "in.sqi", size // 2)

    with pytest.raises(StreamqError) as info:
        run_offline(built, block=4096, progress=shrink, handle_signals=False)
    msg = str(info.value)
    assert "\n" not in msg and "node 'play', field 'path'" in msg and "in.sqi" in msg, msg
    assert_outputs_valid(tmp_path / "o")
    frames = sf.info(str(tmp_path / "o" / "decoded.wav")).frames
    assert 8192 <= frames < 50_000


# -- atheris (optional) ---------------------------------------------------------------

@pytest.mark.skipif(importlib.util.find_spec("atheris") is None,
                    reason="atheris is not installed (pip install atheris)")
def test_atheris_fuzzes_the_reader(tmp_path):
    """Coverage-guided fuzzing of the reader (tests/fuzz_indexfile.py); a crash
    is any exception other than StreamqError. STREAMQ_ATHERIS_RUNS sets the count."""
    runs = int(os.environ.get("STREAMQ_ATHERIS_RUNS", str(examples(3000))))
    script = Path(__file__).resolve().parents[1] / "fuzz_indexfile.py"
    proc = subprocess.run([sys.executable, str(script), str(tmp_path / "corpus"), f"-runs={runs}",
                           "-seed=1", "-max_len=4096", f"-artifact_prefix={tmp_path}/"],
                          capture_output=True, text=True, timeout=600, stdin=subprocess.DEVNULL,
                          cwd=tmp_path)
    tail = "\n".join((proc.stdout + proc.stderr).splitlines()[-30:])
    assert proc.returncode == 0, tail
    assert f"Done {runs} runs" in proc.stderr, tail
