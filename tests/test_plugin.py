"""Node kinds from other packages, found through the ``streamq.nodes`` entry-point group.

Each test "installs" a tiny plugin package into tmp_path the way pip would
lay it out (the package folder plus a ``*.dist-info`` folder with METADATA and
entry_points.txt) and puts tmp_path on sys.path (in-process tests) or on
PYTHONPATH (command-line tests).
"""

from __future__ import annotations

import importlib
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from conftest import assert_names, cli, error_lines, read_audio, write_graph
from streamq.engine.graph import load_graph
from streamq.engine.node import Node
from streamq.engine.registry import ENTRY_POINT_GROUP, Registry
from streamq.engine.scheduler import build, run_offline
from streamq.errors import StreamqError

# The module, not the `registry` object that streamq.engine re-exports under the same name.
registry_mod = importlib.import_module("streamq.engine.registry")

PLUGIN_CODE = '''
"""An invented plugin: halves a signal."""
from typing import Literal
from pydantic import Field
from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
from streamq.engine.node import Node, NodeConfig


class HalveConfig(NodeConfig):
    use: Literal["{kind}"]
    input: str = Field(description="node whose signal is halved")
    trim_db: float = Field(0.0, description="unused extra field")


class Halve(Node):
    """Halves the signal (a plugin node kind)."""

    kind = "{class_kind}"
    Config = HalveConfig
    inputs = ("input",)

    def open(self, specs, ctx):
        s = specs["input"]
        return StreamSpec("signal", s.rate, s.channels, s.latency, None, s.frames)

    def step(self, frames, inputs):
        b = inputs["input"].block
        return Packet(SignalBlock(b.data * 0.5, b.start, b.rate))


NOT_A_NODE = 42
'''


def install_plugin(root: Path, dist: str, entry_points: dict[str, str], code: str | None = None,
                   module: str | None = None) -> str:
    """Lay out package ``module`` and ``<dist>-0.1.dist-info`` under ``root``; return the module name."""
    module = module or dist.replace("-", "_")
    pkg = root / module
    pkg.mkdir(parents=True)
    (pkg / "__init__.py").write_text(code if code is not None else "")
    info = root / f"{dist.replace('-', '_')}-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {dist}\nVersion: 0.1\n")
    lines = [f"[{ENTRY_POINT_GROUP}]"] + [f"{k} = {v}" for k, v in entry_points.items()]
    (info / "entry_points.txt").write_text("\n".join(lines) + "\n")
    (info / "RECORD").write_text("")
    return module


def halve_code(kind: str = "halve", class_kind: str | None = None) -> str:
    return PLUGIN_CODE.format(kind=kind, class_kind=kind if class_kind is None else class_kind)


@pytest.fixture
def plugin_path(tmp_path, monkeypatch):
    """A folder on sys.path for plugin packages; their modules are forgotten afterwards.

    The global registry is loaded first, so a broken plugin in a test can never
    leave it half-loaded for the rest of the session.
    """
    registry_mod.registry.kinds()
    root = tmp_path / "site"
    root.mkdir()
    before = set(sys.modules)
    yield root, lambda: monkeypatch.syspath_prepend(str(root))
    for name in set(sys.modules) - before:
        if name.startswith("sqplug"):
            del sys.modules[name]


def test_fresh_registry_finds_a_plugin_kind(plugin_path):
    root, activate = plugin_path
    mod = install_plugin(root, "sqplug-halve", {"halve": "sqplug_halve:Halve"}, halve_code())
    activate()
    kinds = Registry().kinds()
    assert "halve" in kinds
    cls = kinds["halve"]
    assert issubclass(cls, Node) and cls.__module__ == mod and cls.kind == "halve"
    assert cls.help() == "Halves the signal (a plugin node kind)."


def test_plugin_without_a_kind_takes_the_entry_point_name(plugin_path):
    root, activate = plugin_path
    install_plugin(root, "sqplug-named", {"third": "sqplug_named:Halve"},
                   halve_code(kind="third", class_kind=""))
    activate()
    assert Registry().get("third").kind == "third"


def test_plugin_not_visible_without_the_install(plugin_path):
    root, _ = plugin_path
    install_plugin(root, "sqplug-absent", {"halve": "sqplug_absent:Halve"}, halve_code())
    assert Registry().get("halve") is None


def test_graph_with_a_plugin_kind_validates_and_runs(plugin_path, monkeypatch, tmp_path):
    root, activate = plugin_path
    install_plugin(root, "sqplug-run", {"halve": "sqplug_run:Halve"}, halve_code())
    activate()
    reg = Registry()
    for cls in registry_mod.registry.kinds().values():  # built-ins (already imported)
        reg.add(cls)
    assert "halve" in reg.kinds() and "file-sink" in reg.kinds()
    import streamq.engine.graph as graph_mod
    monkeypatch.setattr(graph_mod, "registry", reg)

    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        scene = "noise"
        seconds = 0.5
        channels = 2
        [nodes.half]
        use = "halve"
        input = "feed"
        [nodes.keep_in]
        use = "file-sink"
        input = "feed"
        path = "in.wav"
        subtype = "DOUBLE"
        [nodes.keep_out]
        use = "file-sink"
        input = "half"
        path = "out.wav"
        subtype = "DOUBLE"
    """)
    graph = load_graph(g)
    assert graph.order == ["feed", "half", "keep_in", "keep_out"]
    result = run_offline(build(graph, tmp_path / "o"), block=300, handle_signals=False)
    assert result.complete and result.samples == 4000
    x, _ = read_audio(tmp_path / "o" / "in.wav")
    y, _ = read_audio(tmp_path / "o" / "out.wav")
    assert np.array_equal(y, x * 0.5)

    # The plugin's fields are validated like any built-in's.
    bad = write_graph(tmp_path, g.read_text() + 'gain = 2\n', name="bad.toml")
    with pytest.raises(StreamqError) as info:
        load_graph(bad)
    assert_names(str(info.value), str(bad), "node 'keep_out'", "field 'gain'")


BROKEN = [
    ("import-error", "raise ImportError('needs the frobnicator library')\n", "sqplug_{c}:Halve",
     "failed to load: needs the frobnicator library"),
    ("syntax-error", "def broken(:\n", "sqplug_{c}:Halve", "failed to load"),
    ("missing-attr", "", "sqplug_{c}:Halve", "failed to load"),
    ("missing-module", None, "sqplug_nowhere_{c}:Halve", "failed to load"),
    ("not-a-node", halve_code(), "sqplug_{c}:NOT_A_NODE", "is not a streamq Node class"),
    ("the-base-class", halve_code(), "sqplug_{c}:Node", "is not a streamq Node class"),
]


@pytest.mark.parametrize("case, code, value, expect", [pytest.param(*b, id=b[0]) for b in BROKEN])
def test_broken_plugin_gives_one_line(plugin_path, case, code, value, expect):
    root, activate = plugin_path
    c = case.replace("-", "_")
    install_plugin(root, f"sqplug-{case}", {"broken": value.format(c=c)},
                   code if code is not None else "", module=f"sqplug_{c}")
    activate()
    with pytest.raises(StreamqError) as info:
        Registry().kinds()
    msg = str(info.value)
    assert "\n" not in msg
    assert_names(msg, "node plugin 'broken'", value.format(c=c))
    assert expect in msg
    assert Node.kind == ""  # the base class is never given the entry point's name


def test_plugin_kind_clashing_with_a_built_in(plugin_path):
    root, activate = plugin_path
    install_plugin(root, "sqplug-clash", {"file-sink": "sqplug_clash:Halve"},
                   halve_code(kind="file-sink"))
    activate()
    reg = Registry()
    for cls in registry_mod.registry.kinds().values():
        reg.add(cls)
    with pytest.raises(StreamqError) as info:
        reg.kinds()
    assert_names(str(info.value), "node kind 'file-sink' is defined twice", "sqplug_clash.Halve")


# -- through the command line (the global registry of a fresh process) -----------------

def test_cli_lists_and_runs_a_plugin_kind(tmp_path):
    root = tmp_path / "site"
    install_plugin(root, "sqplug-cli", {"halve": "sqplug_cli:Halve"}, halve_code())
    proc = cli("nodes", "halve", pythonpath=[root])
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith("halve: Halves the signal")
    assert "input [input]: text; required" in proc.stdout
    assert "trim_db: number; default 0.0" in proc.stdout

    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        scene = "tone"
        seconds = 0.25
        [nodes.half]
        use = "halve"
        input = "feed"
        [nodes.keep]
        use = "file-sink"
        input = "half"
        path = "half.wav"
        subtype = "DOUBLE"
    """)
    proc = cli("run", g, "--out", tmp_path / "o", "--quiet", pythonpath=[root])
    assert proc.returncode == 0, proc.stderr
    y, _ = read_audio(tmp_path / "o" / "half.wav")
    assert y.shape == (2000, 1)
    assert np.max(np.abs(y)) == pytest.approx(0.5 * 10 ** (-20 / 20), rel=1e-3)  # tone peak -20 dBFS

    proc = cli("run", g, "--out", tmp_path / "o2")  # without the plugin installed
    assert proc.returncode == 2
    assert_names(error_lines(proc.stderr)[0], "node 'half'", "field 'use'", "'halve'")


def test_cli_reports_a_broken_plugin_in_one_line(tmp_path):
    root = tmp_path / "site"
    install_plugin(root, "sqplug-cli-broken", {"oops": "sqplug_cli_broken:Missing"},
                   textwrap.dedent("""
                       import streamq_no_such_dependency
                   """))
    proc = cli("nodes", pythonpath=[root])
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    lines = error_lines(proc.stderr)
    assert len(lines) == 1
    assert_names(lines[0], "streamq: node plugin 'oops'", "sqplug_cli_broken:Missing",
                 "streamq_no_such_dependency")
