"""The progress bar of `streamq run`, watched through a pseudo-terminal.

The bar (tqdm) must show the audio position, the speed as a multiple of real
time and the time left on a terminal once a run lasts more than two seconds,
and print nothing on a pipe or with --quiet.

To make the run's length independent of the machine's speed, the child
process registers a test-only node kind that sleeps a fixed time per step (so
the test costs wall time, not CPU) and then runs the real command line entry
point, ``streamq.cli.main``.
"""

from __future__ import annotations

import fcntl
import os
import pty
import re
import select
import struct
import subprocess
import sys
import termios
import textwrap
import time
from pathlib import Path

import pytest

CHILD = textwrap.dedent('''
    import sys, time
    from typing import Literal
    from streamq.engine.blocks import StreamSpec
    from streamq.engine.node import Node, NodeConfig
    from streamq.engine.registry import registry

    class PauseConfig(NodeConfig):
        use: Literal["test-pause"]
        input: str
        seconds: float = 0.01

    class Pause(Node):
        """Test-only: passes its input on after sleeping a while each step."""
        kind = "test-pause"
        Config = PauseConfig
        inputs = ("input",)

        def open(self, specs, ctx):
            s = specs["input"]
            return StreamSpec("signal", s.rate, s.channels, s.latency, s.int_bits, s.frames)

        def step(self, frames, inputs):
            time.sleep(self.config.seconds)
            return inputs["input"]

    registry.add(Pause)
    from streamq.cli import main
    sys.exit(main(sys.argv[1:]))
''')

# 40 s of audio in steps of 4800 frames, 10 ms asleep each: at least 4 s of wall time
GRAPH = """
[graph]
name = "slow-take"
sample_rate = 48000

[nodes.feed]
use = "test-signal"
scene = "tone"
seconds = 40

[nodes.hold]
use = "test-pause"
input = "feed"
seconds = 0.010

[nodes.keep]
use = "file-sink"
input = "hold"
path = "take.wav"
subtype = "PCM_16"
"""
BLOCK = "4800"
BAR = re.compile(r"slow-take: +\d+%\|.*\| *[\d.]+/40\.0 s audio, [\d.,]+x real time "
                 r"\[[\d:]+ left\]")


def _child(tmp_path: Path, *extra: str) -> list[str]:
    script = tmp_path / "child.py"
    script.write_text(CHILD)
    graph = tmp_path / "g.toml"
    graph.write_text(GRAPH)
    return [sys.executable, str(script), "run", str(graph), "--out", str(tmp_path / "o"),
            "--block", BLOCK, *extra]


def _env() -> dict:
    env = dict(os.environ)
    env.pop("PYTHONPATH", None)
    env.pop("TQDM_DISABLE", None)
    env["COLUMNS"] = "120"
    return env


def run_on_pty(cmd: list[str], cwd: Path, timeout: float = 120) -> tuple[int, str]:
    """Run ``cmd`` with stdout and stderr on a pseudo-terminal (120 columns);
    return its exit code and everything it wrote."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 120, 0, 0))
    proc = subprocess.Popen(cmd, cwd=cwd, env=_env(), stdin=subprocess.DEVNULL, stdout=slave,
                            stderr=slave, close_fds=True)
    os.close(slave)
    chunks = []
    deadline = time.monotonic() + timeout
    try:
        while time.monotonic() < deadline:
            ready, _, _ = select.select([master], [], [], 0.2)
            if ready:
                try:
                    data = os.read(master, 65536)
                except OSError:  # EIO: the child closed its side
                    break
                if not data:
                    break
                chunks.append(data)
            elif proc.poll() is not None:
                break
        proc.wait(timeout=max(1.0, deadline - time.monotonic()))
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        os.close(master)
    return proc.returncode, b"".join(chunks).decode("utf-8", "replace")


def test_bar_appears_on_a_terminal(tmp_path):
    t0 = time.monotonic()
    code, text = run_on_pty(_child(tmp_path), tmp_path)
    took = time.monotonic() - t0
    assert code == 0, text
    assert took > 3.9  # long enough for the bar's two-second delay
    frames = [f for f in re.split(r"[\r\n]", text) if "s audio" in f]
    assert frames, f"no progress bar in: {text!r}"
    assert any(BAR.search(f) for f in frames), frames[-3:]
    # the position moves forward through the run
    pos = [float(m.group(1)) for f in frames for m in [re.search(r"\| *([\d.]+)/40\.0 s audio", f)]
           if m]
    assert pos == sorted(pos) and pos[-1] > pos[0]
    # the bar is cleared at the end and the summary follows on a clean line
    assert "slow-take: done: 40.00 s of audio" in text
    tail = text[text.rindex("slow-take: done"):]
    assert "%|" not in tail


def test_speed_below_real_time_is_not_shown_as_zero(tmp_path):
    # 25 ms asleep per 960-frame step (20 ms of audio): about 0.8 times real time
    cmd = _child(tmp_path)
    graph = Path(cmd[3])
    graph.write_text(GRAPH.replace("seconds = 40", "seconds = 3").replace("0.010", "0.025"))
    cmd[cmd.index("--block") + 1] = "960"
    code, text = run_on_pty(cmd, tmp_path)
    assert code == 0, text
    speeds = re.findall(r"s audio, ([\d.,]+)x real time", text)
    assert speeds, text
    assert all(0.05 < float(s) < 1.0 for s in speeds), speeds


def test_nothing_on_a_pipe(tmp_path):
    proc = subprocess.run(_child(tmp_path), cwd=tmp_path, env=_env(), capture_output=True,
                          text=True, stdin=subprocess.DEVNULL, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    assert "%|" not in proc.stdout and "real time [" not in proc.stdout
    assert "slow-take: done" in proc.stdout


def test_nothing_with_quiet_on_a_terminal(tmp_path):
    code, text = run_on_pty(_child(tmp_path, "--quiet"), tmp_path)
    assert code == 0, text
    assert "%|" not in text and "s audio," not in text
    assert text.strip() == ""  # quiet and complete: no summary either


def test_bar_on_stderr_only(tmp_path):
    """stdout piped (e.g. into a log) while stderr is a terminal: the bar goes
    to the terminal and never into the log."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 120, 0, 0))
    proc = subprocess.Popen(_child(tmp_path), cwd=tmp_path, env=_env(), stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=slave, close_fds=True)
    os.close(slave)
    seen = b""
    try:
        while True:
            ready, _, _ = select.select([master], [], [], 0.2)
            if ready:
                try:
                    data = os.read(master, 65536)
                except OSError:
                    break
                if not data:
                    break
                seen += data
            elif proc.poll() is not None:
                break
        out = proc.stdout.read().decode()
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
        os.close(master)
    assert proc.returncode == 0
    assert BAR.search(seen.decode("utf-8", "replace"))
    assert "%|" not in out and "slow-take: done" in out


@pytest.mark.parametrize("quiet", [False, True])
def test_progress_object_is_silent_off_a_terminal(quiet, capsys):
    """In-process: Progress creates no bar when stderr is not a terminal (pytest
    captures it) and calling it is harmless."""
    from streamq.runner import Progress
    bar = Progress(48_000 * 10, 48_000, quiet, "x")
    assert bar.bar is None
    for done in range(0, 48_000 * 10 + 1, 48_000):
        bar(done, 48_000 * 10)
    bar.close()
    assert capsys.readouterr().err == ""
