"""The `streamq` command, run as a real subprocess (``python -m streamq.cli``).

Exit codes: 0 done, 2 bad input (one line per problem, no traceback),
130 interrupted (outputs closed and valid, report marked incomplete).
"""

from __future__ import annotations

import json
import resource
import signal
import subprocess
import sys
import textwrap
import time

import pytest
import soundfile as sf

from conftest import (DEMO, HIDE_PORTAUDIO, assert_names, cli, cli_env, digest, error_lines,
                      make_audio, write_graph)
from streamq.engine.registry import registry


def assert_clean_failure(proc: subprocess.CompletedProcess, n_lines: int | None = None) -> list[str]:
    """Exit 2, every stderr line is 'streamq: ...', no traceback; return the messages."""
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr and "Traceback" not in proc.stdout
    lines = error_lines(proc.stderr)
    assert lines, "no message"
    for line in lines:
        assert line.startswith("streamq: "), line
    if n_lines is not None:
        assert len(lines) == n_lines, lines
    return [line[len("streamq: "):] for line in lines]


# -- the demo -------------------------------------------------------------------------

def _demo_outputs_match(out_dir, cwd) -> dict:
    """report.json says complete, and every file the demo wrote holds every sample."""
    report = json.loads((out_dir / "report.json").read_text())
    assert report["complete"] is True
    assert report["samples"] > 0
    for nid, entry in report["outputs"].items():
        if "path" in entry:
            info = sf.info(str(cwd / entry["path"]))  # relative paths: from the run's cwd
            assert info.frames == report["samples"] == entry["frames"], nid
    return report


def test_demo_runs(tmp_path):
    proc = cli("run", DEMO, "--out", tmp_path / "demo", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    report = _demo_outputs_match(tmp_path / "demo", tmp_path)
    assert report["graph"] == "demo"
    assert report["sample_rate"] == 48_000
    assert "demo: done" in proc.stdout
    assert list(tmp_path.iterdir()) == [tmp_path / "demo"]  # nothing outside --out


def test_default_output_folder(tmp_path):
    proc = cli("run", DEMO, "--quiet", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    _demo_outputs_match(tmp_path / "streamq-out" / "demo", tmp_path)
    assert proc.stdout == ""  # --quiet


def test_check_demo(tmp_path):
    proc = cli("check", DEMO, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "ok" in proc.stdout and "demo" in proc.stdout and "48000 Hz" in proc.stdout
    assert list(tmp_path.iterdir()) == []  # checking writes nothing


def test_check_does_not_touch_an_existing_output(tmp_path):
    make_audio(tmp_path / "precious.wav", 4000, 2, rate=48_000, subtype="PCM_24")
    before = digest(tmp_path / "precious.wav")
    g = write_graph(tmp_path, f"""
        [nodes.feed]
        use = "test-signal"
        seconds = 1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{tmp_path / 'precious.wav'}"
    """)
    proc = cli("check", g)
    assert proc.returncode == 0, proc.stderr
    assert digest(tmp_path / "precious.wav") == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["g.toml", "precious.wav"]


def test_version_and_no_command():
    proc = cli("--version")
    assert proc.returncode == 0 and proc.stdout.startswith("streamq ")
    proc = cli()
    assert proc.returncode == 2 and "usage" in proc.stdout


# -- without PortAudio: file graphs never need it ----------------------------------------

#: The CLI with PortAudio unfindable (as in tests/test_live.py) and sounddevice itself
#: unimportable; after main() returns, the child says whether sounddevice got loaded
#: or was even asked for.
NO_SOUNDDEVICE = HIDE_PORTAUDIO + textwrap.dedent("""
    import importlib.abc
    tried = []
    class Refuse(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path=None, target=None):
            if name.partition(".")[0] == "sounddevice":
                tried.append(name)
                raise ModuleNotFoundError(f"No module named {name!r}", name=name)
            return None
    sys.meta_path.insert(0, Refuse())
    from streamq.cli import main
    code = main(sys.argv[1:])
    print(f"sounddevice loaded: {'sounddevice' in sys.modules}, asked for: {bool(tried)}",
          file=sys.stderr)
    sys.exit(code)
""")


@pytest.mark.parametrize("command", ["run", "check", "nodes"])
def test_file_commands_without_sounddevice(tmp_path, command):
    # The job statement promises that importing streamq and running file graphs work
    # without the PortAudio library: sounddevice is imported only for live nodes.
    args = {"run": ["run", DEMO, "--set", "feed.seconds=1", "--out", tmp_path / "o", "--quiet"],
            "check": ["check", DEMO],
            "nodes": ["nodes"]}[command]
    proc = subprocess.run([sys.executable, "-c", NO_SOUNDDEVICE, *map(str, args)], cwd=tmp_path,
                          env=cli_env(), capture_output=True, text=True, timeout=120,
                          stdin=subprocess.DEVNULL)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    assert error_lines(proc.stderr)[-1] == "sounddevice loaded: False, asked for: False"
    if command == "run":
        report = json.loads((tmp_path / "o" / "report.json").read_text())
        assert report["complete"] is True and report["samples"] == 48_000  # 1 s at 48 kHz


# -- node listing ---------------------------------------------------------------------

def test_nodes_lists_every_kind_with_its_fields():
    proc = cli("nodes")
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout.splitlines()
    # The kinds streamq itself ships (other test modules may add their own kinds to
    # this process's registry; a fresh process knows only the shipped ones).
    kinds = {k: c for k, c in registry.kinds().items() if c.__module__.startswith("streamq.")}
    assert {"test-signal", "file-source", "file-sink"} <= set(kinds)
    headers = [line.split(":")[0] for line in out if line and not line.startswith(" ")]
    assert headers == list(kinds)
    for kind, cls in kinds.items():
        start = out.index(next(line for line in out if line.startswith(f"{kind}: ")))
        block = []
        for line in out[start + 1:]:
            if not line.strip():
                break
            block.append(line)
        fields = [name for name in cls.Config.model_fields if name != "use"]
        listed = [line.strip().split(":")[0].split(" ")[0] for line in block]
        assert listed == fields, kind
        for name in cls.inputs:
            assert any(line.strip().startswith(f"{name} [input]:") for line in block), (kind, name)
        assert out[start] == f"{kind}: {cls.help()}"


def test_nodes_shows_types_and_defaults():
    proc = cli("nodes", "test-signal", "file-sink")
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    assert "file-source" not in text
    assert 'scene: "tone" | "noise" | "drift"; default "drift"' in text
    assert "seconds: number; default 10.0" in text
    assert "input [input]: text; required" in text
    assert "path: text; required" in text


# -- bad input: exit 2, one line per problem, no traceback ----------------------------

BAD_GRAPHS = {
    "unknown-kind": ("""
        [nodes.feed]
        use = "tone-generator"
    """, ["node 'feed'", "field 'use'", "'tone-generator'"]),
    "toml-syntax": ("""
        [nodes.feed]
        use = "test-signal
    """, ["TOML syntax error", "line 2"]),
    "unknown-field": ("""
        [nodes.feed]
        use = "test-signal"
        loudness = 3
    """, ["node 'feed'", "field 'loudness'"]),
    "missing-audio": ("""
        [graph]
        sample_rate = 48000
        [nodes.src]
        use = "file-source"
        path = "gone.wav"
    """, ["node 'src'", "field 'path'", "gone.wav", "no such file"]),
}


@pytest.mark.parametrize("case, command", [(case, "run") for case in sorted(BAD_GRAPHS)]
                         + [("unknown-kind", "check"), ("missing-audio", "check")])
def test_bad_graph_exit_2(tmp_path, case, command):
    text, parts = BAD_GRAPHS[case]
    g = write_graph(tmp_path, text)
    proc = cli(command, g, *(["--out", tmp_path / "o"] if command == "run" else []))
    (line,) = assert_clean_failure(proc, 1)
    assert_names(line, str(g), *parts)


def test_missing_graph_file(tmp_path):
    (line,) = assert_clean_failure(cli("run", tmp_path / "none.toml"), 1)
    assert_names(line, str(tmp_path / "none.toml"), "no such graph file")


def test_all_problems_printed(tmp_path):
    g = write_graph(tmp_path, """
        [nodes.feed]
        use = "test-signal"
        seconds = "ages"
        [nodes.keep]
        use = "file-sink"
        input = "fed"
        path = "x.wav"
        [nodes.more]
        use = "file-sink"
        input = "keep"
        path = "y.wav"
        [nodes.extra]
        use = "file-sink"
        input = "feed"
    """)
    lines = assert_clean_failure(cli("check", g, "--set", "nobody.x=1"), 5)
    for parts in [("--set", "'nobody'"), ("node 'feed'", "field 'seconds'"),
                  ("node 'extra'", "field 'path'"), ("node 'keep'", "field 'input'", "'fed'"),
                  ("node 'more'", "field 'input'", "'keep'")]:
        assert any(all(p in line for p in parts) for line in lines), (parts, lines)
    for line in lines:
        assert line.startswith(f"{g}: ")


@pytest.mark.parametrize("command", ["check", "run"])
def test_file_problems_listed_with_validation_problems(tmp_path, command):
    # A cycle is found by validation, a missing file and a file at another rate
    # only when the sources are opened: all three are listed in one go, and a
    # run writes nothing (not even its output folder).
    make_audio(tmp_path / "take.wav", 1000, 1, rate=44_100)
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        [nodes.gone]
        use = "file-source"
        path = "gone.wav"
        [nodes.enc]
        use = "encoder"
        input = "dec"
        bits = 4
        [nodes.dec]
        use = "decoder"
        input = "enc"
    """)
    proc = cli(command, g, *(["--out", tmp_path / "o"] if command == "run" else []))
    lines = assert_clean_failure(proc, 3)
    assert_names(lines[0], str(g), "node 'dec'", "field 'input'", "cycle", "'enc'")
    assert_names(lines[1], str(g), "node 'src'", "field 'path'", str(tmp_path / "take.wav"),
                 "44100 Hz", "48000 Hz")
    assert_names(lines[2], str(g), "node 'gone'", "field 'path'", str(tmp_path / "gone.wav"),
                 "no such file")
    assert not (tmp_path / "o").exists()


def test_set_overrides_on_the_command_line(tmp_path):
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        seconds = 1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
    """)
    proc = cli("run", g, "--out", tmp_path / "o", "--quiet", "--set", "feed.seconds=0.25",
               "--set", "feed.channels=2", "--set", "keep.path=other.flac",
               "--set", "graph.sample_rate=16000")
    assert proc.returncode == 0, proc.stderr
    info = sf.info(str(tmp_path / "o" / "other.flac"))
    assert (info.frames, info.channels, info.samplerate) == (4000, 2, 16_000)
    (line,) = assert_clean_failure(cli("check", g, "--set", "feed.channels=[1]"), 1)
    assert_names(line, str(g), "node 'feed'", "field 'channels'")


@pytest.mark.parametrize("block", ["0", "-5"])
def test_bad_block_option(tmp_path, block):
    g = write_graph(tmp_path, """
        [nodes.feed]
        use = "test-signal"
        seconds = 0.1
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
    """)
    # Refused while the arguments are read (a positive whole number), before the
    # graph is loaded or the output folder made.
    (line,) = assert_clean_failure(cli("run", g, "--out", tmp_path / "o", f"--block={block}"), 1)
    assert_names(line, "--block", "block size must be at least 1 frame")
    assert not (tmp_path / "o").exists()


def test_seconds_option_is_refused_for_an_offline_run(tmp_path):
    # --seconds stops live runs; an offline run goes to the end of its sources,
    # so a --seconds there would be silently ignored: say so, write nothing.
    (line,) = assert_clean_failure(cli("run", DEMO, "--out", tmp_path / "o", "--seconds", "2"), 1)
    assert_names(line, "--seconds 2", "live runs", "offline", "'demo'")
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("command", ["check", "run"])
def test_test_signal_shorter_than_a_sample(tmp_path, command):
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 8000
        [nodes.feed]
        use = "test-signal"
        seconds = 0.00005
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
    """)
    proc = cli(command, g, *(["--out", tmp_path / "o"] if command == "run" else []))
    (line,) = assert_clean_failure(proc, 1)
    assert_names(line, str(g), "node 'feed'", "field 'seconds'", "5e-05 s", "0 samples", "8000 Hz")
    assert not (tmp_path / "o").exists()
    # 0.7 of a sample rounds to one: that runs, and writes one frame.
    proc = cli("run", g, "--out", tmp_path / "o", "--quiet", "--set", "feed.seconds=0.0000875")
    assert proc.returncode == 0, proc.stderr
    assert sf.info(str(tmp_path / "o" / "out.wav")).frames == 1


# -- output folder and file sink safety -----------------------------------------------

def _short_graph(tmp_path, path="out.wav", seconds=0.2, subtype="PCM_16"):
    return write_graph(tmp_path, f"""
        [graph]
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        scene = "noise"
        channels = 2
        seconds = {seconds}
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "{path}"
        subtype = "{subtype}"
    """)


def test_output_folder_under_a_regular_file(tmp_path):
    # Root ignores permission bits, so make the folder impossible instead: its
    # parent is a regular file.
    (tmp_path / "plain").write_text("a file, not a folder")
    g = _short_graph(tmp_path)
    out = tmp_path / "plain" / "run1"
    (line,) = assert_clean_failure(cli("run", g, "--out", out), 1)
    assert_names(line, str(out), "cannot create the output folder")
    assert not out.exists()


def test_output_file_under_a_regular_file(tmp_path):
    (tmp_path / "plain").write_text("a file, not a folder")
    target = tmp_path / "plain" / "out.wav"
    g = _short_graph(tmp_path, path=str(target))
    (line,) = assert_clean_failure(cli("run", g, "--out", tmp_path / "o"), 1)
    assert_names(line, str(g), "node 'keep'", "field 'path'", str(target), "cannot create")
    assert (tmp_path / "plain").read_text() == "a file, not a folder"
    assert not (tmp_path / "o" / "report.json").exists()


def _limit_file_size(max_bytes: int):
    def apply():  # runs in the child: files above max_bytes fail to grow (EFBIG)
        resource.setrlimit(resource.RLIMIT_FSIZE, (max_bytes, resource.RLIM_INFINITY))
    return apply


def test_write_failure_leaves_nothing_under_the_final_name(tmp_path):
    # 2 s of stereo DOUBLE = 1.5 MB, but the process may only write 256 KiB per
    # file: the write fails mid-run (Python ignores SIGXFSZ, so write() sees EFBIG).
    g = _short_graph(tmp_path, seconds=2.0, subtype="DOUBLE")
    out = tmp_path / "o"
    out.mkdir()
    proc = cli("run", g, "--out", out, "--block", "4096", preexec_fn=_limit_file_size(256 * 1024))
    (line,) = assert_clean_failure(proc, 1)
    assert_names(line, "node 'keep'", "field 'path'", str(out / "out.wav"), "write failed")
    assert not (out / "out.wav").exists()
    assert not (out / ".out.wav.part").exists()
    assert not (out / "report.json").exists()


def test_write_failure_keeps_the_older_file(tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    make_audio(out / "out.wav", 1000, 2, rate=48_000, subtype="DOUBLE")
    before = digest(out / "out.wav")
    g = _short_graph(tmp_path, seconds=2.0, subtype="DOUBLE")
    proc = cli("run", g, "--out", out, "--block", "4096", preexec_fn=_limit_file_size(256 * 1024))
    assert_clean_failure(proc, 1)
    assert digest(out / "out.wav") == before
    assert not (out / ".out.wav.part").exists()


# -- interruption ---------------------------------------------------------------------

@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_interrupt_leaves_valid_partial_output(tmp_path, signum):
    g = write_graph(tmp_path, """
        [graph]
        name = "long-take"
        sample_rate = 48000
        [nodes.feed]
        use = "test-signal"
        scene = "drift"
        seconds = 3000
        channels = 2
        [nodes.keep]
        use = "file-sink"
        input = "feed"
        path = "long.wav"
        subtype = "PCM_16"
    """)
    out = tmp_path / "o"
    part = out / ".long.wav.part"
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "run", str(g), "--out", str(out)],
                            env=cli_env(), stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        # Wait until the run is well inside its step loop: the temporary file
        # holds more than one step of audio.
        deadline = time.monotonic() + 60
        while not (part.exists() and part.stat().st_size > 300_000):
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "the run never started writing"
            time.sleep(0.02)
        proc.send_signal(signum)
        stdout, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 130, (stdout, stderr)
    assert "Traceback" not in stderr
    assert "interrupted at sample" in stderr
    assert "stopped early" in stdout

    final = out / "long.wav"
    assert final.exists() and not part.exists()
    data, rate = sf.read(str(final), dtype="float64", always_2d=True)
    assert rate == 48_000 and data.shape[1] == 2
    frames = data.shape[0]
    assert 0 < frames < 3000 * 48_000
    assert frames % 65_536 == 0  # stopped between steps

    report = json.loads((out / "report.json").read_text())
    assert report["complete"] is False
    assert report["samples"] == frames
    assert report["outputs"]["keep"]["frames"] == frames


def test_device_table_has_a_plain_default_column():
    """`streamq devices`: which devices are the system's defaults, said in words."""
    from streamq.live.devices import device_table
    devs = [{"index": 0, "name": "card", "host_api": "ALSA", "inputs": 2, "outputs": 2,
             "default_rate": 48000.0, "default_input": True, "default_output": True},
            {"index": 1, "name": "mic", "host_api": "ALSA", "inputs": 1, "outputs": 0,
             "default_rate": 44100.0, "default_input": False, "default_output": False},
            {"index": 2, "name": "phones", "host_api": "ALSA", "inputs": 0, "outputs": 2,
             "default_rate": 48000.0, "default_input": False, "default_output": True}]
    lines = device_table(devs)
    assert lines[0].split()[-1] == "default"
    assert lines[1].endswith("in+out") and lines[1].startswith("0 ")
    assert lines[2].endswith("44100 Hz") and lines[3].endswith("out")
    assert not any("<" in ln or ">" in ln for ln in lines)
