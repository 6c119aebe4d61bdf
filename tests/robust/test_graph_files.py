"""Graph files: random mutations of a valid graph never give a traceback.

Every mutated graph either runs (exit 0, outputs whole) or is refused with exit 2
and one line per problem, each naming the graph file and the node and field at
fault (wrong types, missing fields, unknown kinds, cycles, self-loops, dangling
inputs, huge or negative durations, bits out of range, unicode and very long
names, TOML syntax errors with line and column). tests/test_graph.py checks the
exact wording of each problem once; here hypothesis throws hundreds of random
variants at ``streamq check`` and ``streamq run`` in-process, and a few go
through a real subprocess.
"""

from __future__ import annotations

import copy
import datetime
import re
import string
import tomllib
from pathlib import Path

import pytest
from hypothesis import assume, given, strategies as st

from conftest import cli
from robust.util import (assert_clean, assert_outputs_valid, dump_graph, fuzz_settings,
                         leftovers, run_cli)
from streamq.engine.graph import _ID
from streamq.engine.registry import registry

# A valid graph: every built-in kind that runs offline, 0.2 s at 8 kHz.
BASE = {
    "graph": {"name": "robust", "sample_rate": 8000, "block": 256},
    "nodes": {
        "feed": {"use": "test-signal", "scene": "drift", "seconds": 0.2, "channels": 2},
        "stats": {"use": "pdf-estimator", "input": "feed", "window": "50 ms", "hop": "10 ms"},
        "enc": {"use": "encoder", "input": "feed", "pdf": "stats", "method": "lloyd-max",
                "bits": 3, "adapt": "trailing"},
        "dec": {"use": "decoder", "input": "enc"},
        "noise": {"use": "error-meter", "reference": "feed", "input": "dec"},
        "keep": {"use": "file-sink", "input": "dec", "path": "decoded.wav", "subtype": "PCM_16"},
        "idx": {"use": "index-sink", "input": "enc", "path": "coded.sqi"},
    },
}
IDS = list(BASE["nodes"])
INPUT_FIELDS = {nid: [f for f in ("input", "reference", "pdf") if f in t]
                for nid, t in BASE["nodes"].items()}
# kinds a mutation may pick: live kinds would open sound devices from an offline test
KINDS = [k for k, cls in registry.kinds().items() if not cls.live_only]


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    """Plots take ~1 s a run; they have their own tests (tests/test_report.py).
    Everything else of `streamq run` (report.json, audio and index files) stays."""
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


def fields_of(kind: str) -> list[str]:
    return [f for f in registry.get(kind).Config.model_fields if f != "use"]


# -- values a graph file can hold ------------------------------------------------------

NAMES = st.one_of(
    st.sampled_from(IDS + ["", "nobody", "feed ", "FEED", "é", "节点", "a" * 65, "0feed", "-x"]),
    st.text(min_size=0, max_size=12),
    st.text(alphabet=string.ascii_letters + "_-" + string.digits, min_size=60, max_size=300),
)
DURATIONS = st.one_of(
    st.integers(-10**20, 10**20),
    st.builds(lambda v, u: f"{v} {u}", st.one_of(st.integers(-10**9, 10**30), st.floats(allow_nan=True)),
              st.sampled_from(["ms", "s", "samples", "sample", "min", "", "parsecs"])),
)
SCALARS = st.one_of(
    st.booleans(),
    st.integers(-(2**63), 2**63 - 1),
    st.sampled_from([0, -1, 1, 2, 16, 17, 65_536, 2**31, -(2**63), 2**63 - 1]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, 1e-300, 1e300, -1e300, float("nan"), float("inf")]),
    st.text(max_size=30),
    st.text(min_size=200, max_size=3000),
    st.sampled_from(["gaussian", "lloyd-max", "trailing", "tone", "PCM_24", "out.flac", "x.sqi"]),
    st.dates(), st.times(),
    DURATIONS,
)
VALUES = st.one_of(SCALARS, st.lists(SCALARS, max_size=4),
                   st.dictionaries(st.text(max_size=5), SCALARS, max_size=3))


# -- mutations ---------------------------------------------------------------------------

def _field_for(draw, nid: str, table: dict) -> str:
    kind = table.get("use")
    known = fields_of(kind) if isinstance(kind, str) and kind in KINDS else []
    return draw(st.one_of(st.sampled_from(sorted(table) or ["use"]),
                          st.sampled_from(known or ["use"]), st.text(min_size=1, max_size=10)))


@st.composite
def mutation(draw, raw: dict) -> str:
    """Apply one random change to ``raw`` (in place); return what was done."""
    nodes = raw["nodes"]
    op = draw(st.sampled_from(["set", "set", "set", "delete", "kind", "rewire", "cycle",
                               "rename", "drop", "header", "duration", "bits", "table"]))
    ids = [k for k, v in nodes.items() if isinstance(v, dict)]
    if not ids:
        op = "header"
    nid = draw(st.sampled_from(ids)) if ids else None
    table = nodes[nid] if nid else {}
    if op == "set":
        fld = _field_for(draw, nid, table)
        table[fld] = draw(VALUES)
        return f"set {nid}.{fld}"
    if op == "delete":
        if table:
            fld = draw(st.sampled_from(sorted(table)))
            del table[fld]
            return f"delete {nid}.{fld}"
        return "noop"
    if op == "kind":
        table["use"] = draw(st.one_of(st.sampled_from(KINDS), st.text(max_size=20),
                                      st.sampled_from(["os.system", "streamq.nodes.sources:FileSource",
                                                       "__import__('os').system('true')",
                                                       "Test-Signal", " encoder"])))
        return f"kind {nid}"
    if op in ("rewire", "cycle"):
        fields = [f for f in ("input", "reference", "pdf") if f in table] or ["input"]
        fld = draw(st.sampled_from(fields))
        if op == "cycle":  # to itself or to a node downstream of it
            table[fld] = draw(st.sampled_from([nid] + ids))
        else:
            table[fld] = draw(NAMES)
        return f"{op} {nid}.{fld}"
    if op == "rename":
        new = draw(NAMES)
        if new not in nodes:
            nodes[new] = nodes.pop(nid)
        return f"rename {nid}"
    if op == "drop":
        del nodes[nid]
        return f"drop {nid}"
    if op == "header":
        header = raw.setdefault("graph", {})
        if not isinstance(header, dict):
            return "noop"
        fld = draw(st.sampled_from(["name", "sample_rate", "block", "batch_input", "extra"]))
        header[fld] = draw(st.one_of(VALUES, NAMES))
        return f"header {fld}"
    if op == "duration":
        target, fld = draw(st.sampled_from([("stats", "window"), ("stats", "hop"),
                                            ("enc", "min_interval"), ("noise", "frame"),
                                            ("feed", "seconds")]))
        if target in nodes and isinstance(nodes[target], dict):
            nodes[target][fld] = draw(DURATIONS)
        return f"duration {target}.{fld}"
    if op == "bits":
        if "enc" in nodes and isinstance(nodes["enc"], dict):
            nodes["enc"][draw(st.sampled_from(["bits", "levels", "grid_bits"]))] = \
                draw(st.integers(-(2**40), 2**40))
        return "bits"
    # "table": a node or the header that is not a table, or a stray top-level table
    where = draw(st.sampled_from(["node", "graph", "top"]))
    if where == "node":
        nodes[nid] = draw(SCALARS)
    elif where == "graph":
        raw["graph"] = draw(SCALARS)
    else:
        raw[draw(st.sampled_from(["links", "node", "Graph"]))] = {"x": 1}
    return f"table {where}"


def check_outcome(res, graph: Path, out: Path | None) -> None:
    """The contract for any graph: exit 0, or exit 2 with one clean line per problem."""
    assert "Traceback" not in res.err and "Traceback" not in res.out, res
    assert res.code in (0, 2), res
    if res.code == 2:
        lines = assert_clean(res, n_lines=None)
        for line in lines:
            # every problem names the graph file; problems found while running name the node
            assert line.startswith(f"{graph}: ") or "node '" in line, res
            assert len(line) < 3000, res
    if out is not None:
        report = assert_outputs_valid(out)
        if res.code == 0:
            assert report is not None and report["complete"] is True, res


@fuzz_settings(250)
@given(data=st.data())
def test_random_mutations_check_and_run(tmp_path_factory, capsys, data):
    raw = copy.deepcopy(BASE)
    done = [data.draw(mutation(raw)) for _ in range(data.draw(st.integers(1, 3)))]
    folder = tmp_path_factory.mktemp("g")
    graph = folder / "g.toml"
    graph.write_text(dump_graph(raw), encoding="utf-8")
    res = run_cli(capsys, "check", graph)
    check_outcome(res, graph, None)
    if res.code == 0 or data.draw(st.booleans(), label="run anyway"):
        out = folder / "out"
        run = run_cli(capsys, "run", graph, "--out", out, "--quiet")
        check_outcome(run, graph, out)
        if res.code == 2:
            # what check refuses, run refuses with the same lines and writes nothing
            # (the output folder in the messages differs: check uses a scratch one)
            assert run.code == 2 and len(run.lines) == len(res.lines), (done, res, run)
            assert not (out / "report.json").exists()
        if run.code == 2:
            assert not (out / "decoded.wav").exists() and not (out / "coded.sqi").exists(), done


# -- mutations with a known answer ---------------------------------------------------------

def _plain_scalar_fields():
    from streamq.engine.graph import _scalar_types
    out = []
    for nid, table in BASE["nodes"].items():
        cfg = registry.get(table["use"]).Config
        for fld, info in cfg.model_fields.items():
            sub = _scalar_types(info.annotation)
            if fld != "use" and sub is not None and sub[1]:
                out.append((nid, fld, sub[1]))
    return out


PLAIN = _plain_scalar_fields()
TOML_TYPES = {bool: st.booleans(), int: st.integers(-1000, 1000), float: st.floats(-1e3, 1e3).filter(
    lambda x: x != int(x)), str: st.text(max_size=8), list: st.lists(st.integers(0, 3), max_size=2),
    datetime.date: st.dates()}


@fuzz_settings(150)
@given(data=st.data())
def test_wrong_type_names_node_and_field(tmp_path_factory, capsys, data):
    nid, fld, allowed = data.draw(st.sampled_from(PLAIN))
    wrong = [t for t in TOML_TYPES if not (bool in allowed if t is bool else t in allowed)]
    t = data.draw(st.sampled_from(wrong))
    raw = copy.deepcopy(BASE)
    raw["nodes"][nid][fld] = data.draw(TOML_TYPES[t])
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    lines = assert_clean(run_cli(capsys, "check", graph), str(graph))
    assert f"node '{nid}', field '{fld}'" in lines[0]


@fuzz_settings(60)
@given(nid=st.sampled_from(IDS), data=st.data())
def test_missing_required_field(tmp_path_factory, capsys, nid, data):
    cfg = registry.get(BASE["nodes"][nid]["use"]).Config
    required = [f for f, i in cfg.model_fields.items() if i.is_required()]
    fld = data.draw(st.sampled_from(required))
    raw = copy.deepcopy(BASE)
    del raw["nodes"][nid][fld]
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    res = run_cli(capsys, "check", graph)
    lines = assert_clean(res, n_lines=None)
    assert any(f"node '{nid}', field '{fld}'" in line and "missing" in line for line in lines), res


@fuzz_settings(80)
@given(nid=st.sampled_from(IDS), kind=st.text(max_size=40).filter(lambda k: k not in KINDS))
def test_unknown_kind(tmp_path_factory, capsys, nid, kind):
    raw = copy.deepcopy(BASE)
    raw["nodes"][nid]["use"] = kind
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    lines = assert_clean(run_cli(capsys, "check", graph), n_lines=None)
    why = "contains a NUL character" if "\x00" in kind else "unknown node kind"
    assert any(f"node '{nid}', field 'use': {why}" in line for line in lines), lines


# (node, input field) -> nodes downstream of that node (itself included); pointing
# the field at any of them closes a loop
DOWNSTREAM = {"stats": ["stats", "enc", "dec", "noise"], "enc": ["enc", "dec", "noise"],
              "dec": ["dec", "noise"], "noise": ["noise"]}


@fuzz_settings(80)
@given(data=st.data())
def test_cycles_and_self_loops(tmp_path_factory, capsys, data):
    nid = data.draw(st.sampled_from(sorted(DOWNSTREAM)))
    fld = data.draw(st.sampled_from(INPUT_FIELDS[nid]))
    back = data.draw(st.sampled_from(DOWNSTREAM[nid]))
    raw = copy.deepcopy(BASE)
    raw["nodes"][nid][fld] = back
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    res = run_cli(capsys, "check", graph)
    lines = assert_clean(res, n_lines=None)
    cyc = [line for line in lines if "cycle through nodes" in line]
    assert len(cyc) == 1, res
    assert line_names_a_node(cyc[0]) and f"'{nid}'" in cyc[0], res


def line_names_a_node(line: str) -> bool:
    return re.search(r"node '[^']+', field '[^']+'", line) is not None


@fuzz_settings(80)
@given(nid=st.sampled_from([n for n in IDS if INPUT_FIELDS[n]]), data=st.data())
def test_dangling_inputs(tmp_path_factory, capsys, nid, data):
    fld = data.draw(st.sampled_from(INPUT_FIELDS[nid]))
    ref = data.draw(st.text(min_size=1, max_size=80).filter(lambda r: r not in IDS))
    raw = copy.deepcopy(BASE)
    raw["nodes"][nid][fld] = ref
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    lines = assert_clean(run_cli(capsys, "check", graph), n_lines=None)
    why = "contains a NUL character" if "\x00" in ref else "no node named"
    assert any(f"node '{nid}', field '{fld}': {why}" in line for line in lines), lines


@fuzz_settings(80)
@given(target=st.sampled_from([("stats", "window"), ("stats", "hop"), ("enc", "min_interval"),
                               ("noise", "frame")]),
       value=st.one_of(st.integers(-(10**30), -1), st.integers(10**13, 10**40),
                       st.builds("{} s".format, st.integers(10**9, 10**300)),
                       st.builds("-{} ms".format, st.integers(1, 10**9)),
                       st.builds("{} ms".format, st.floats(1e15, 1e300))))
def test_huge_or_negative_durations(tmp_path_factory, capsys, target, value):
    """Refused, naming node and field; or (a huge minimum interval, a huge meter
    frame) taken as 'never' / 'the whole run', and the run completes."""
    nid, fld = target
    raw = copy.deepcopy(BASE)
    raw["nodes"][nid][fld] = value
    folder = tmp_path_factory.mktemp("g")
    graph = folder / "g.toml"
    graph.write_text(dump_graph(raw))
    res = run_cli(capsys, "run", graph, "--out", folder / "o", "--quiet")
    negative = (isinstance(value, int) and value < 0) or str(value).startswith("-")
    if negative or nid == "stats":
        assert_clean(res, str(graph), f"node '{nid}', field '{fld}'")
    else:
        check_outcome(res, graph, folder / "o")


@fuzz_settings(60)
@given(fld=st.sampled_from(["bits", "levels"]),
       value=st.one_of(st.integers(-(2**63), 0), st.integers(17, 2**63 - 1)))
def test_bits_out_of_range(tmp_path_factory, capsys, fld, value):
    assume(not (fld == "levels" and 2 <= value <= 65_536))
    raw = copy.deepcopy(BASE)
    raw["nodes"]["enc"].pop("bits")
    raw["nodes"]["enc"][fld] = value
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(dump_graph(raw))
    assert_clean(run_cli(capsys, "check", graph), str(graph), f"node 'enc', field '{fld}'")


@fuzz_settings(80)
@given(new=st.one_of(st.text(min_size=1, max_size=40),
                     st.text(alphabet=string.ascii_letters + "_-", min_size=50, max_size=400)))
def test_unicode_and_long_node_ids(tmp_path_factory, capsys, new):
    assume(new not in IDS)
    raw = copy.deepcopy(BASE)
    raw["nodes"] = {(new if k == "dec" else k): v for k, v in raw["nodes"].items()}
    for t in raw["nodes"].values():
        for f in ("input", "reference"):
            if t.get(f) == "dec":
                t[f] = new
    folder = tmp_path_factory.mktemp("g")
    graph = folder / "g.toml"
    graph.write_text(dump_graph(raw), encoding="utf-8")
    res = run_cli(capsys, "run", graph, "--out", folder / "o", "--quiet")
    if _ID.match(new):
        assert res.code == 0, res
        assert_outputs_valid(folder / "o")
    else:
        assert_clean(res, str(graph), "bad node id", n_lines=None)
        assert not (folder / "o" / "report.json").exists()


@fuzz_settings(60)
@given(name=st.one_of(st.text(min_size=1, max_size=200), st.text(min_size=201, max_size=2000),
                      st.sampled_from(["../../etc", "/", ".", "..", "~", "$(id)", "a/b\\c", " "])))
def test_unicode_and_long_graph_names_pick_a_safe_folder(tmp_path_factory, capsys, monkeypatch, name):
    """The default output folder comes from the graph name: it stays inside
    streamq-out/ whatever the name holds."""
    raw = copy.deepcopy(BASE)
    raw["graph"]["name"] = name
    folder = tmp_path_factory.mktemp("g")
    graph = folder / "g.toml"
    graph.write_text(dump_graph(raw), encoding="utf-8")
    monkeypatch.chdir(folder)
    res = run_cli(capsys, "run", graph, "--quiet")
    if len(name) > 200 or "\x00" in name:
        assert_clean(res, str(graph), "[graph], field 'name'")
        assert not (folder / "streamq-out").exists()
        return
    assert res.code == 0, res
    made = [p for p in folder.rglob("report.json")]
    assert len(made) == 1 and made[0].parent.parent == folder / "streamq-out", made
    assert_outputs_valid(made[0].parent)


# -- TOML syntax -------------------------------------------------------------------------

BROKEN = ["x = = 1", "x = ", "= 3", "[nodes.feed", "x = \"open", "x = [1, 2", "x = 1 2",
          "x = {a = 1", "x = 0x", "x = 1979-13-40", "x = tru", "[[]]", "x = 'a\nb'"]


@fuzz_settings(120)
@given(at=st.integers(0, 60), bad=st.sampled_from(BROKEN), indent=st.text(" \t", max_size=3))
def test_toml_syntax_errors_report_line_and_column(tmp_path_factory, capsys, at, bad, indent):
    lines = dump_graph(BASE).splitlines()
    at = at % (len(lines) + 1)
    text = "\n".join(lines[:at] + [indent + bad] + lines[at:]) + "\n"
    try:
        tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        where = re.search(r"line (\d+), column (\d+)", str(exc))
    else:  # still valid TOML (e.g. a key the table already lacks): not this test's case
        assume(False)
    graph = tmp_path_factory.mktemp("g") / "g.toml"
    graph.write_text(text)
    (line,) = assert_clean(run_cli(capsys, "run", graph, "--quiet"), str(graph), "TOML syntax error")
    if where is None:  # an unclosed array at the very end: tomllib says "at end of document"
        assert "end of document" in line, line
        return
    assert f"line {where.group(1)}, column {where.group(2)}" in line
    assert int(where.group(1)) >= at + 1  # at or after the broken line, never before it


@pytest.mark.parametrize("content, ok", [
    (b"\xff\xfe\x00n\x00o", False),                       # UTF-16 text
    (b"\x00" * 64, False),                                  # zeros
    ("[graph]\nname = \"caf\u00e9\"\n".encode("latin-1"), False),  # not UTF-8
    (b"\xef\xbb\xbf[nodes.a]\nuse = \"test-signal\"\n", True),  # UTF-8 byte-order mark
    (b"[nodes.a]\r\nuse = \"test-signal\"\r\nseconds = 0.1\r\n", True),  # CRLF lines
])
def test_binary_or_badly_encoded_graph_file(tmp_path, capsys, content, ok):
    graph = tmp_path / "g.toml"
    graph.write_bytes(content)
    res = run_cli(capsys, "check", graph)
    if ok:
        assert res.code == 0, res
    else:
        assert_clean(res, str(graph))


def test_huge_graph_file(tmp_path, capsys):
    """2,000 chained nodes validate and build within a few seconds, or are refused cleanly."""
    raw = {"graph": {"sample_rate": 8000}, "nodes": {"n0": {"use": "test-signal", "seconds": 0.01}}}
    for i in range(1, 2000):
        raw["nodes"][f"n{i}"] = {"use": "pdf-estimator", "input": "n0", "window": 4, "hop": 2}
    graph = tmp_path / "g.toml"
    graph.write_text(dump_graph(raw))
    res = run_cli(capsys, "check", graph)
    assert res.code == 0, res


def test_deep_toml_nesting(tmp_path, capsys):
    graph = tmp_path / "g.toml"
    graph.write_text("[nodes.a]\nuse = \"test-signal\"\nx = " + "[" * 5000 + "]" * 5000 + "\n")
    res = run_cli(capsys, "check", graph)
    assert_clean(res, str(graph), n_lines=None)


# -- the same through a real subprocess -----------------------------------------------------

@pytest.mark.parametrize("change, expect", [
    ({"enc": {"bits": True}}, ["node 'enc', field 'bits'", "true"]),
    ({"dec": {"input": "dec"}}, ["node 'dec', field 'input'", "cycle"]),
    ({"stats": {"window": "-3 s"}}, ["node 'stats', field 'window'"]),
    # a meter has no output: reading it is a wiring error, not a crash (found by the fuzzer)
    ({"idx": {"input": "noise"}}, ["node 'idx', field 'input'", "no output"]),
    ({"enc": {"apply_after": "10 ms", "adapt": "fixed"}}, ["node 'enc', field 'apply_after'"]),
])
def test_subprocess_sees_one_line(tmp_path, change, expect):
    raw = copy.deepcopy(BASE)
    for nid, fields in change.items():
        raw["nodes"][nid].update(fields)
    graph = tmp_path / "g.toml"
    graph.write_text(dump_graph(raw))
    proc = cli("run", graph, "--out", tmp_path / "o")
    assert proc.returncode == 2, proc
    assert "Traceback" not in proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"streamq: {graph}: "), lines
    for part in expect:
        assert part in lines[0], lines
    assert leftovers(tmp_path / "o") == []
