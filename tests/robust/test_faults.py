"""Faults while an offline run is under way: a full disk (for the audio, the
index file and report, the meter's CSV files), a read-only output folder, an
input file deleted or cut short during a replay, and an error while closing
that must not hide the one that stopped the run.

The live faults are tested elsewhere: a failing worker job in tests/test_live.py,
a worker process that dies in tests/test_live_chain.py, and a JACK server killed
mid-run in tests/robust/test_live_devices.py.

Root ignores permission bits, so the disk faults use real small or read-only
tmpfs mounts (skipped where ``mount`` is not allowed; tests/test_cli.py covers
the same writer paths with RLIMIT_FSIZE).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import cli, digest, write_graph
from robust.util import assert_clean, assert_outputs_valid, leftovers


@pytest.fixture
def tiny_disk(tmp_path):
    """A 256 KiB tmpfs: writes past it fail with ENOSPC."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(mnt)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def long_graph(tmp_path, out_name="out.wav", extra=""):
    return write_graph(tmp_path, f"""
        [graph]
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        scene = "noise"
        channels = 2
        seconds = 3
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{out_name}"
        subtype = "DOUBLE"
        {extra}
    """)


def test_disk_full_mid_run(tmp_path, tiny_disk):
    """2.3 MB of audio onto a 256 KiB disk: one line, nothing under the final
    name, no temporary file left, and a recording already there is kept."""
    out = tiny_disk / "run"
    out.mkdir()
    sf.write(str(out / "out.wav"), np.zeros((1000, 2)), 48000, subtype="PCM_16")
    before = digest(out / "out.wav")
    proc = cli("run", long_graph(tmp_path), "--out", out, "--block", "4096")
    (line,) = assert_clean_proc(proc)
    assert "node 'keep', field 'path'" in line and "write failed" in line, line
    assert "No space left on device" in line, line
    assert digest(out / "out.wav") == before
    assert leftovers(out) == []


def test_disk_full_for_the_index_file_and_report(tmp_path, tiny_disk):
    out = tiny_disk / "run"
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        seconds = 20
        [nodes.enc]
        use = "encoder"
        input = "feed"
        levels = 300
        [nodes.codes]
        use = "index-sink"
        input = "enc"
        path = "codes.sqi"
    """)
    proc = cli("run", g, "--out", out)
    (line,) = assert_clean_proc(proc)
    assert "codes.sqi" in line and ("No space left" in line or "write failed" in line), line
    assert not (out / "codes.sqi").exists() and leftovers(out) == []


def test_disk_full_for_the_meter_csv(tmp_path, tiny_disk):
    """The meter writes its CSV files when the run ends: on a disk with 4 KiB
    left the time series does not fit. One line names the meter node and the
    file; nothing partial is left under the final name, and the series CSV of
    an earlier run in the same folder is kept as it was."""
    out = tiny_disk / "run"
    out.mkdir()
    old = "time_s,samples\n0,4800\n"
    (out / "noise-series.csv").write_text(old)
    free = shutil.disk_usage(tiny_disk).free
    (tiny_disk / "filler").write_bytes(b"\0" * (free - 4096))
    assert shutil.disk_usage(tiny_disk).free <= 4096
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        seconds = 30
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
    """)
    proc = cli("run", g, "--out", out)
    (line,) = assert_clean_proc(proc)
    assert line.startswith("node 'noise': ") and str(out / "noise-series.csv") in line, line
    assert "No space left on device" in line, line
    assert (out / "noise-series.csv").read_text() == old
    assert not (out / "noise-spectrum.csv").exists()
    assert leftovers(out) == []
    assert_outputs_valid(out)


def test_a_failing_close_does_not_hide_the_first_error(tmp_path, monkeypatch):
    """When a step fails, the nodes are still closed; an error while closing
    (here the meter's CSV) must not take the place of the one that stopped the run."""
    from conftest import run_file
    from streamq.errors import StreamqError
    from streamq.nodes.meter import ErrorMeter
    from streamq.nodes.sources import SceneSignal

    def bad_step(self, frames, inputs):
        raise self.fail("seconds", "the first error")

    def bad_csv(self):
        raise self.fail(None, "the closing error")

    monkeypatch.setattr(SceneSignal, "step", bad_step)
    monkeypatch.setattr(ErrorMeter, "_write_files", bad_csv)
    g = write_graph(tmp_path, """
        [nodes.feed]
        use = "test-signal"
        seconds = 1
        [nodes.noise]
        use = "error-meter"
        reference = "feed"
        input = "feed"
    """)
    with pytest.raises(StreamqError, match="the first error"):
        run_file(g, tmp_path / "o")


def test_read_only_output_folder(tmp_path):
    mnt = tmp_path / "ro"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=64k", "tmpfs", str(mnt)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        proc = cli("run", long_graph(tmp_path), "--out", mnt / "run")
        (line,) = assert_clean_proc(proc)
        assert str(mnt / "run") in line and "Read-only file system" in line, line
        proc = cli("run", long_graph(tmp_path), "--out", mnt)
        (line,) = assert_clean_proc(proc)
        assert "not writable" in line and "Read-only file system" in line, line
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def assert_clean_proc(proc) -> list[str]:
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("streamq: "), lines
    return [lines[0][len("streamq: "):]]


# -- the input changes during a replay --------------------------------------------------

def _replay_graph(tmp_path, frames=200_000):
    rng = np.random.default_rng(9)
    sf.write(str(tmp_path / "take.wav"), 0.2 * rng.standard_normal((frames, 1)), 48000,
             subtype="PCM_16")
    return write_graph(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        [nodes.enc]
        use = "encoder"
        input = "src"
        bits = 6
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
    """)


def _run_with_hook(g, out, hook):
    from streamq.engine.graph import load_graph
    from streamq.engine.scheduler import build, run_offline
    out.mkdir(parents=True, exist_ok=True)
    return run_offline(build(load_graph(g), out), block=16_384, progress=hook, handle_signals=False)


def test_input_deleted_during_replay_loses_nothing(tmp_path):
    """The open file stays readable after its name is removed: every sample is replayed."""
    g = _replay_graph(tmp_path)

    def delete(done, total):
        if (tmp_path / "take.wav").exists():
            (tmp_path / "take.wav").unlink()

    result = _run_with_hook(g, tmp_path / "o", delete)
    assert result.complete and result.samples == 200_000
    assert sf.info(str(tmp_path / "o" / "decoded.wav")).frames == 200_000
    assert_outputs_valid(tmp_path / "o")


def test_input_shrinking_during_replay(tmp_path):
    """The file is cut to a quarter after the first step: the run stops at the
    sample where the audio ends, and what was decoded is a valid file."""
    from streamq.errors import StreamqError
    g = _replay_graph(tmp_path)
    size = (tmp_path / "take.wav").stat().st_size

    def shrink(done, total):
        if done == 16_384:
            os.truncate(tmp_path / "take.wav", size // 4)

    with pytest.raises(StreamqError) as info:
        _run_with_hook(g, tmp_path / "o", shrink)
    msg = str(info.value)
    assert "\n" not in msg and "node 'src', field 'path'" in msg and "take.wav" in msg, msg
    assert "sample" in msg, msg
    assert_outputs_valid(tmp_path / "o")
    assert 16_384 <= sf.info(str(tmp_path / "o" / "decoded.wav")).frames < 200_000


def test_input_shrinking_during_a_real_run(tmp_path):
    """The same through the command: the file is cut while the process reads it."""
    g = _replay_graph(tmp_path, frames=48000 * 600)
    out = tmp_path / "o"
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "run", str(g), "--out", str(out),
                             "--block", "4096"], env=dict(os.environ, PYTHONPATH=str(Path(__file__).parents[2])),
                            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    try:
        part = out / ".decoded.wav.part"
        deadline = time.monotonic() + 60
        while not (part.exists() and part.stat().st_size > 200_000):
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.01)
        os.truncate(tmp_path / "take.wav", 44 + 2 * 48000 * 300)  # keep 300 s
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    if proc.returncode == 0:  # the reader was past the cut already: nothing to see
        pytest.skip("the run finished before the file was cut")
    assert proc.returncode == 2 and "Traceback" not in err, err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "node 'src', field 'path'" in lines[0] and "sample" in lines[0], lines
    assert_outputs_valid(out)
