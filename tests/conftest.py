"""Shared helpers for the engine, file, CLI and plugin tests.

Nothing here is autouse: other test modules are not affected by importing it. The one
setting made here for every test is the property-test profile (below).
Every helper works on real files in pytest's tmp_path (soundfile/libsndfile),
and the command line is run as a real subprocess.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Literal

import numpy as np
import pytest
import soundfile as sf
from hypothesis import settings
from pydantic import Field

from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
from streamq.engine.graph import load_graph
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import Registry, registry
from streamq.engine.scheduler import RunResult, build, run_offline

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "graphs" / "demo.toml"


# -- property tests: the same examples on every run unless asked otherwise ---------

# A failing CI run keeps the work from landing, so the suite draws the same examples each
# time ("repeatable"); "--hypothesis-profile=explore" draws fresh ones, to look for new
# failures before a change goes in (see DEVELOPERS.md).
settings.register_profile("repeatable", derandomize=True, print_blob=True)
settings.register_profile("explore", print_blob=True)


def pytest_configure(config):
    if config.getoption("hypothesis_profile", None) is None:
        settings.load_profile("repeatable")


# -- graphs and runs ----------------------------------------------------------------

def write_graph(folder: Path, text: str, name: str = "g.toml") -> Path:
    """Write a graph file (dedented) into ``folder`` and return its path."""
    path = Path(folder) / name
    path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
    return path


def run_file(graph_path: Path, out_dir: Path, block: int | None = None,
             overrides: list[str] = ()) -> RunResult:
    """Load, build and run a graph file offline through the scheduler API."""
    graph = load_graph(graph_path, list(overrides))
    out_dir.mkdir(parents=True, exist_ok=True)
    return run_offline(build(graph, out_dir), block=block, handle_signals=False)


def read_audio(path: Path) -> tuple[np.ndarray, int]:
    """Samples as float64 (frames, channels) and the sample rate."""
    data, rate = sf.read(str(path), dtype="float64", always_2d=True)
    return data, rate


def digest(path: Path) -> str:
    """SHA-256 of a file's bytes (keeps assertion messages short)."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# -- audio files --------------------------------------------------------------------

def make_audio(path: Path, frames: int, channels: int, rate: int = 48_000,
               subtype: str = "PCM_24", fmt: str | None = None, seed: int = 7) -> np.ndarray:
    """Write an invented test recording (a different tone plus noise per channel)
    and return the samples as read back from the file (float64)."""
    rng = np.random.default_rng(seed)
    t = np.arange(frames)[:, None] / rate
    freqs = 220.0 * (1.0 + np.arange(channels))[None, :]
    x = 0.4 * np.sin(2 * np.pi * freqs * t) + 0.05 * rng.standard_normal((frames, channels))
    sf.write(str(path), np.clip(x, -0.99, 0.99), rate, subtype=subtype, format=fmt)
    return read_audio(path)[0]


# -- the command line ---------------------------------------------------------------

def cli_env(pythonpath: list[Path] = ()) -> dict[str, str]:
    """Environment for a child ``python -m streamq.cli``: this checkout first on the
    path (after ``pythonpath``), whatever PYTHONPATH the test run itself had."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(p) for p in pythonpath] + [str(REPO)])
    return env


def cli(*args: str | Path, cwd: Path | None = None, pythonpath: list[Path] = (),
        timeout: float = 120, **kw) -> subprocess.CompletedProcess:
    """Run ``python -m streamq.cli ARGS`` with this interpreter; capture text output."""
    return subprocess.run([sys.executable, "-m", "streamq.cli", *map(str, args)],
                          cwd=cwd, env=cli_env(pythonpath), capture_output=True, text=True,
                          timeout=timeout, stdin=subprocess.DEVNULL, **kw)


#: Start of a ``python -c`` program for a child process: makes PortAudio unfindable, as
#: on a machine without libportaudio2 (sounddevice looks the library up with
#: ctypes.util.find_library and raises OSError).
HIDE_PORTAUDIO = textwrap.dedent("""
    import ctypes.util, sys
    ctypes.util.find_library = lambda name: None
""")

#: ``python -c NO_PORTAUDIO ARGS``: the ``streamq`` command without PortAudio.
NO_PORTAUDIO = HIDE_PORTAUDIO + textwrap.dedent("""
    from streamq.cli import main
    sys.exit(main(sys.argv[1:]))
""")


def error_lines(stderr: str) -> list[str]:
    """The non-empty lines of stderr."""
    return [line for line in stderr.splitlines() if line.strip()]


def assert_names(line: str, *parts: str) -> None:
    """A one-line message names every one of ``parts`` (file, node, field ...)."""
    assert "\n" not in line, line
    for part in parts:
        assert part in line, f"{part!r} not named in: {line}"


# -- test-only node kinds (never registered in the global registry) -----------------

class GainConfig(NodeConfig):
    use: Literal["test-gain"]
    input: str = Field(description="node whose signal is scaled")
    factor: float = Field(1.0, description="gain")
    hold: Duration | None = Field(None, description="unused; a field of the Duration type")


class Gain(Node):
    """Test-only node kind: scales a signal (gives an input and an output, for wiring tests)."""

    kind = "test-gain"
    Config = GainConfig
    inputs = ("input",)

    def open(self, specs, ctx):
        spec = specs["input"]
        if self.config.hold is not None:
            self.hold_samples = self.config.hold.samples(ctx.sample_rate)
        return StreamSpec("signal", spec.rate, spec.channels, spec.latency, None, spec.frames)

    def step(self, frames, inputs):
        b = inputs["input"].block
        return Packet(SignalBlock(b.data * self.config.factor, b.start, b.rate))


def registry_with(*extra: type[Node]) -> Registry:
    """A fresh registry holding every built-in kind plus ``extra``."""
    reg = Registry()
    for cls in registry.kinds().values():
        reg.add(cls)
    for cls in extra:
        reg.add(cls)
    return reg


@pytest.fixture
def gain_kind(monkeypatch):
    """Make the test-only 'test-gain' kind visible to graph validation."""
    import streamq.engine.graph as graph_mod
    monkeypatch.setattr(graph_mod, "registry", registry_with(Gain))
    return Gain

