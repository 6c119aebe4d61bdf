"""Security: a graph file can only name registered node kinds, paths are used as
given with no shell, and no streamq process listens on a network port."""

from __future__ import annotations

import ast
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
import soundfile as sf

from conftest import REPO, cli_env, write_graph
from robust.util import assert_clean, run_cli
from streamq.errors import StreamqError

PACKAGE = REPO / "streamq"


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


# -- node kinds are names, never code ------------------------------------------------

@pytest.mark.parametrize("use", [
    "os.system", "os:system", "streamq.nodes.sources:FileSource", "streamq.nodes.sources.FileSource",
    "__import__('os').system('touch PWNED')", "subprocess.Popen", "builtins.eval",
    "test_signal", "Test-Signal", "file-source ", "../file-source", "FileSource",
])
def test_graph_names_only_registered_kinds(tmp_path, capsys, monkeypatch, use):
    monkeypatch.chdir(tmp_path)
    g = write_graph(tmp_path, f"""
        [nodes.evil]
        use = "{use.replace('"', "'")}"
        path = "x.wav"
    """)
    assert_clean(run_cli(capsys, "run", g, "--out", tmp_path / "o"), "node 'evil', field 'use'",
                 "unknown node kind")
    assert not (tmp_path / "PWNED").exists()


def test_no_code_from_strings_in_the_package():
    """No eval/exec/compile, no shell, no pickle, and imports only of fixed module
    names (the built-in node modules, the CLI's sub-command modules)."""
    allowed_dynamic = {("cli.py", "__import__"), ("engine/registry.py", "import_module"),
                       ("design/__init__.py", "import_module")}   # (module names from a fixed table)
    problems = []
    for path in PACKAGE.rglob("*.py"):
        rel = path.relative_to(PACKAGE).as_posix()
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call):
                f = node.func
                name = f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else ""
                if name in ("eval", "exec", "compile") and not isinstance(f, ast.Attribute):
                    problems.append(f"{rel}:{node.lineno}: {name}()")
                if name in ("system", "popen", "loads", "load") and isinstance(f, ast.Attribute) \
                        and isinstance(f.value, ast.Name) and f.value.id in ("os", "pickle", "marshal"):
                    problems.append(f"{rel}:{node.lineno}: {f.value.id}.{name}()")
                if name in ("__import__", "import_module") and (rel, name) not in allowed_dynamic:
                    problems.append(f"{rel}:{node.lineno}: {name}()")
                for kw in node.keywords:
                    if kw.arg == "shell" and not (isinstance(kw.value, ast.Constant) and kw.value.value is False):
                        problems.append(f"{rel}:{node.lineno}: shell=...")
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + ([node.module] if isinstance(node, ast.ImportFrom) and node.module else [])
                if any(n in ("pickle", "marshal", "shelve") for n in names) and \
                        rel != "engine/checkpoint.py":
                    problems.append(f"{rel}:{node.lineno}: imports {names}")
    assert problems == []
    # the one exception: checkpoints, read back only through an unpickler that
    # refuses every class but streamq's state types, numpy arrays and plain containers
    text = (PACKAGE / "engine" / "checkpoint.py").read_text(encoding="utf-8")
    assert "def find_class" in text and "pickle.loads" not in text and "pickle.load(" not in text


def test_a_checkpoint_cannot_run_code(tmp_path):
    """A crafted checkpoint file that would run a command when unpickled is refused
    with one line, and the command never runs (common practice: allow-list the
    classes an unpickler may build)."""
    import pickle
    from streamq.engine import checkpoint

    class Boom:
        def __reduce__(self):
            return (os.system, (f"touch {tmp_path / 'pwned'}",))

    (tmp_path / checkpoint.NAME).write_bytes(pickle.dumps(Boom()))
    with pytest.raises(StreamqError, match="not a streamq checkpoint"):
        checkpoint.load(tmp_path, {"streamq": "x", "graph": "", "inputs": {}})
    assert not (tmp_path / "pwned").exists()


def test_registry_imports_only_fixed_module_names():
    import importlib
    registry = importlib.import_module("streamq.engine.registry")
    assert all(m.startswith("streamq.nodes.") for m in registry._BUILTIN_MODULES)


# -- paths are used as given -------------------------------------------------------------

SHELLY = ["$(touch PWNED).wav", "`touch PWNED`.wav", "a;touch PWNED.wav", "a|touch PWNED.wav",
          "a && touch PWNED.wav", "$HOME.wav", "*.wav", "a'b\".wav", "-rf.wav", "a\\nb.wav"]


@pytest.mark.parametrize("name", SHELLY)
def test_output_paths_are_taken_literally(tmp_path, capsys, monkeypatch, name):
    monkeypatch.chdir(tmp_path)
    esc = name.replace("\\", "\\\\").replace('"', '\\"')
    g = write_graph(tmp_path, f"""
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        seconds = 0.05
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{esc}"
    """)
    res = run_cli(capsys, "run", g, "--out", tmp_path / "o", "--quiet")
    assert res.code == 0, res
    assert sf.info(str(tmp_path / "o" / name)).frames == 400  # exactly that name
    assert not list(tmp_path.rglob("PWNED*"))


@pytest.mark.parametrize("name", SHELLY[:5])
def test_input_paths_are_taken_literally(tmp_path, capsys, monkeypatch, name):
    monkeypatch.chdir(tmp_path)
    sf.write(str(tmp_path / "real.wav"), [[0.1]] * 400, 8000)
    esc = name.replace('"', '\\"')
    g = write_graph(tmp_path, f"""
        [nodes.src]
        use = "file-source"
        path = "{esc}"
    """)
    assert_clean(run_cli(capsys, "run", g, "--out", tmp_path / "o"), "no such file",
                 str(tmp_path / name))
    assert not list(tmp_path.rglob("PWNED*"))
    (tmp_path / name).write_bytes((tmp_path / "real.wav").read_bytes())
    assert run_cli(capsys, "run", g, "--out", tmp_path / "o2", "--quiet").code == 0


# -- no listening sockets --------------------------------------------------------------

def _listening_inodes() -> set[str]:
    """Socket inodes of every TCP/UDP socket in LISTEN (or unconnected UDP) state."""
    out = set()
    for name, state in (("tcp", "0A"), ("tcp6", "0A"), ("udp", "07"), ("udp6", "07")):
        p = Path("/proc/net") / name
        if not p.exists():
            continue
        for line in p.read_text().splitlines()[1:]:
            cols = line.split()
            if len(cols) > 9 and cols[3] == state:
                out.add(cols[9])
    return out


def _socket_inodes(pid: int) -> set[str]:
    out = set()
    fd_dir = Path(f"/proc/{pid}/fd")
    try:
        for fd in fd_dir.iterdir():
            try:
                target = str(fd.readlink())
            except OSError:
                continue
            if target.startswith("socket:["):
                out.add(target[8:-1])
    except OSError:
        pass
    return out


def test_a_run_opens_no_listening_socket(tmp_path):
    """Sample the running process's sockets while it works, and compare the
    machine's listening ports before and after."""
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        seconds = 240
        [nodes.stats]
        use = "pdf-estimator"
        input = "feed"
        [nodes.enc]
        use = "encoder"
        input = "feed"
        pdf = "stats"
        adapt = "trailing"
        bits = 4
        [nodes.dec]
        use = "decoder"
        input = "enc"
        [nodes.noise]
        use = "error-meter"
        reference = "feed"
        input = "dec"
    """)
    before = _listening_inodes()
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "run", str(g), "--out",
                             str(tmp_path / "o"), "--quiet"], env=cli_env(),
                            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    seen: set[str] = set()
    samples = 0
    try:
        while proc.poll() is None:
            seen |= _socket_inodes(proc.pid)
            samples += 1
            time.sleep(0.05)
        out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    assert samples > 3  # the run lasted long enough to be watched
    assert seen == set(), f"the run held sockets: {seen}"
    assert _listening_inodes() - before == set()
