"""Command-line arguments: every misuse exits 2 with one line and no traceback.

Hypothesis builds random argument lists from the commands, options and odd
values a user might type; each run must end in exit 0 or in exit 2 with one
line (argparse's errors included: no usage block). Named cases cover bad
numbers, bad paths for the graph and for --out, --set syntax and unknown kinds.
"""

from __future__ import annotations

import os

import pytest
from hypothesis import given, strategies as st

from conftest import cli
from robust.util import assert_clean, fuzz_settings, leftovers, run_cli

GRAPH = """
[graph]
sample_rate = 8000
[nodes.feed]
use = "test-signal"
seconds = 0.05
[nodes.enc]
use = "encoder"
input = "feed"
bits = 3
[nodes.dec]
use = "decoder"
input = "enc"
[nodes.keep]
use = "file-sink"
input = "dec"
path = "out.wav"
"""


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


@pytest.fixture
def graph(tmp_path):
    g = tmp_path / "g.toml"
    g.write_text(GRAPH)
    return g


ODD = st.sampled_from(["", "-", "--", "0", "-1", "1e309", "nan", "inf", "abc", "é", " ", "\t",
                       "99999999999999999999", "/", ".", "..", "/dev/null", "~", "-h"])
# options that start no long work: no live runs, no batch, no compare (they have their own tests)
WORDS = st.sampled_from(["run", "check", "nodes", "design", "--set", "--out", "--block",
                         "--seconds", "--quiet", "--bits", "--levels", "--pdf", "--method",
                         "--json", "gaussian", "lloyd-max", "enc.bits=2", "feed.seconds=0.01",
                         "graph.block=0", "enc.bits=true", "nobody.x=1", "encoder", "4", "2"])


@fuzz_settings(200)
@given(args=st.lists(st.one_of(WORDS, ODD, st.just("GRAPH")), min_size=1, max_size=7))
def test_random_argument_lists(tmp_path_factory, capsys, monkeypatch, graph, args):
    folder = tmp_path_factory.mktemp("c")
    monkeypatch.chdir(folder)
    argv = [str(graph) if a == "GRAPH" else a for a in args]
    if argv and argv[0] not in ("run", "check", "nodes", "design"):
        argv = ["check"] + argv
    if "--bits" in argv or "--levels" in argv:  # keep 'design' quick
        argv = [a if not a.isdigit() or int(a) <= 6 else "4" for a in argv]
    res = run_cli(capsys, *argv)
    assert "Traceback" not in res.err and "Traceback" not in res.out, (argv, res)
    assert res.code in (0, 2), (argv, res)
    if res.code == 2:
        assert res.lines, (argv, res)
        assert all(line.startswith("streamq: ") for line in res.lines), (argv, res)
        if not any(a.startswith("--set") or a == "GRAPH" for a in args):
            assert len(res.lines) == 1, (argv, res)
    assert leftovers(folder) == []


@pytest.mark.parametrize("argv, parts", [
    (["frobnicate"], ["invalid choice", "'frobnicate'"]),
    (["run"], ["required", "graph"]),
    (["run", "GRAPH", "--block", "abc"], ["--block", "'abc'"]),
    (["run", "GRAPH", "--block", "0"], ["block size must be at least 1 frame"]),
    (["run", "GRAPH", "--block", "-7"], ["block size must be at least 1 frame"]),
    (["run", "GRAPH", "--seconds", "-1"], ["--seconds", "positive"]),
    (["run", "GRAPH", "--seconds", "nan"], ["--seconds", "positive"]),
    (["run", "GRAPH", "--seconds", "inf"], ["--seconds", "finite"]),
    (["run", "GRAPH", "--bogus"], ["unrecognized arguments", "--bogus"]),
    (["run", "GRAPH", "--set", "nothing"], ["--set 'nothing'", "NODE.FIELD=VALUE"]),
    (["run", "GRAPH", "--set", "a.b.c=1"], ["--set 'a.b.c=1'"]),
    (["run", "GRAPH", "--set", "nobody.bits=2"], ["there is no node 'nobody'"]),
    (["run", "GRAPH", "--set", "enc.bits=99"], ["node 'enc', field 'bits'"]),
    (["run", "GRAPH", "--set", "enc.bits=yes"], ["node 'enc', field 'bits'", "'yes'"]),
    (["nodes", "bogus-kind"], ["unknown node kind 'bogus-kind'"]),
    (["design", "--pdf", "nope", "--bits", "2"], ["--pdf", "'nope'"]),
    (["design", "--pdf", "gaussian"], ["--levels", "--bits"]),
    (["check", "/dev/null"], ["/dev/null", "no nodes"]),
])
def test_named_misuses(capsys, graph, argv, parts):
    argv = [str(graph) if a == "GRAPH" else a for a in argv]
    assert_clean(run_cli(capsys, *argv), *parts)


def test_graph_path_problems(tmp_path, capsys):
    (tmp_path / "folder.toml").mkdir()
    (tmp_path / "plain").write_text("x")
    for path, expect in [(tmp_path / "none.toml", "no such graph file"),
                         (tmp_path / "folder.toml", "cannot read graph file"),
                         (tmp_path / "plain" / "g.toml", "cannot read graph file"),
                         (tmp_path / ("x" * 300 + ".toml"), "graph file"),
                         ("", "graph file")]:
        assert_clean(run_cli(capsys, "run", path, "--out", tmp_path / "o"), str(path), expect)


def test_out_folder_problems(tmp_path, capsys, graph):
    (tmp_path / "plain").write_text("a file")
    for out, expect in [(tmp_path / "plain", "output folder"),
                        (tmp_path / "plain" / "sub", "cannot create the output folder"),
                        (tmp_path / ("y" * 300), "cannot create the output folder")]:
        assert_clean(run_cli(capsys, "run", graph, "--out", out), str(out), expect)
    assert (tmp_path / "plain").read_text() == "a file"


def test_subprocess_argument_error_is_one_line(tmp_path, graph):
    """What a user sees in a terminal: one line, exit 2, no usage block."""
    proc = cli("run", graph, "--block", "many")
    assert proc.returncode == 2
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("streamq: ") and "--block" in lines[0], lines
    assert "usage:" not in proc.stderr and "Traceback" not in proc.stderr
    proc = cli()  # no command at all still prints the help, exit 2
    assert proc.returncode == 2 and "usage" in proc.stdout


@pytest.fixture
def design_files(tmp_path):
    import numpy as np
    import soundfile as sf

    (tmp_path / "empty.wav").write_bytes(b"")
    sf.write(str(tmp_path / "silent-zero-frames.wav"), np.zeros((0, 1)), 8000, subtype="FLOAT")
    x = np.zeros((100, 2))
    x[42, 1] = np.nan
    sf.write(str(tmp_path / "nan.wav"), x, 8000, subtype="FLOAT")
    (tmp_path / "plain").write_text("a file")
    return tmp_path


@pytest.mark.parametrize("argv, parts", [
    (["--pdf", "gaussian", "--levels", "1"], ["--levels", "between 2 and 65536", "got 1"]),
    (["--pdf", "gaussian", "--levels", "70000"], ["--levels", "between 2 and 65536", "70000"]),
    (["--pdf", "gaussian", "--bits", "0"], ["--bits", "between 1 and 16", "got 0"]),
    (["--pdf", "gaussian", "--bits", "17"], ["--bits", "between 1 and 16", "got 17"]),
    (["--pdf", "gaussian", "--bits", "x"], ["--bits", "'x'"]),
    (["--pdf", "gaussian", "--levels", "8", "--method", "ecsq"], ["--method ecsq needs --entropy"]),
    (["--pdf", "gaussian", "--levels", "8", "--entropy", "2"], ["--entropy only applies"]),
    (["--pdf", "gaussian", "--levels", "8", "--method", "ecsq", "--entropy", "nan"],
     ["entropy", "finite", "nan"]),
    (["--pdf", "gaussian", "--levels", "8", "--method", "ecsq", "--entropy", "-1"],
     ["entropy", "positive", "-1"]),
    (["--pdf", "gaussian", "--levels", "8", "--export", "DIR/"], ["--export", "file name prefix"]),
    (["--pdf", "gaussian", "--levels", "8", "--export", "DIR/none/fw"],
     ["--export", "DIR/none", "does not exist"]),
    (["--pdf", "gaussian", "--levels", "8", "--export", "DIR/plain/fw"],
     ["--export", "DIR/plain", "not a folder"]),
    (["--from", "DIR/missing.wav", "--levels", "8"], ["DIR/missing.wav", "no such file"]),
    (["--from", "DIR/empty.wav", "--levels", "8"], ["DIR/empty.wav", "cannot read audio"]),
    (["--from", "DIR/silent-zero-frames.wav", "--levels", "8"],
     ["DIR/silent-zero-frames.wav", "no samples"]),
    (["--from", "DIR/nan.wav", "--levels", "8"],
     ["DIR/nan.wav", "frame 42, channel 1", "non-finite"]),
])
def test_design_misuses(capsys, design_files, argv, parts):
    """`streamq design` errors through main(): exit 2, one line naming the option,
    the file and (for bad samples) the frame and channel; nothing on stdout."""
    d = str(design_files)
    res = run_cli(capsys, "design", *[a.replace("DIR", d) for a in argv])
    assert_clean(res, *[p.replace("DIR", d) for p in parts])
    assert res.out == ""
    assert sorted(p.name for p in design_files.iterdir()) == [
        "empty.wav", "nan.wav", "plain", "silent-zero-frames.wav"]
