"""`streamq batch`: one graph over an archive of files, on a local process pool
and on a real Dask cluster, resumable.

Everything here is real: audio files written with soundfile, the command run
as a subprocess (or through ``streamq.cli.main``), a Dask scheduler with two
worker processes on loopback, and a real SIGINT.

The reference for a file's results is a plain single run of the same graph
on that file (``streamq.engine.scheduler.run_offline``): a batch must give
exactly what running the files one by one gives, whichever engine ran it.
"""

from __future__ import annotations

import json
import math
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from streamq.batch.inputs import expand_inputs, folder_name
from streamq.cli import main as cli_main
from streamq.engine.graph import load_graph
from streamq.engine.scheduler import build, run_offline

REPO = Path(__file__).resolve().parents[1]
RATE = 16_000

# The replay chain (adaptive Lloyd-Max, retrained every 100 ms from the last
# 500 ms, meter, decoded file), as in graphs/replay.toml.
CHAIN = """\
[graph]
name = "archive-check"

[nodes.feed]
use = "file-source"
path = "placeholder.wav"

[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "500 ms"
hop = "100 ms"

[nodes.enc]
use = "encoder"
input = "feed"
pdf = "stats"
method = "lloyd-max"
bits = 4
adapt = "trailing"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.flac"
subtype = "PCM_16"
"""


def _program(seconds: float, seed: int) -> np.ndarray:
    """Invented program material: a tone with a slowly changing level plus noise,
    so the adaptive encoder has something to follow."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    t = np.arange(n) / RATE
    env = 0.15 + 0.1 * np.sin(2 * np.pi * 0.4 * t + seed)
    x = env * np.sin(2 * np.pi * (180 + 40 * seed) * t) + 0.03 * rng.standard_normal(n)
    return np.clip(x, -0.95, 0.95)


def _write(path: Path, seconds: float, seed: int) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    sf.write(str(path), _program(seconds, seed), RATE, subtype="PCM_16")
    return path


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO)
    return env


def batch_cli(*args, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamq.cli", "batch", *map(str, args)],
                          env=_env(), capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)


def batch_main(*args) -> int:
    """The command run in this process (the pool's fork server is then started
    once for the whole module, which keeps the tests quick)."""
    return cli_main(["batch", *map(str, args)])


def _summary(out: Path) -> dict:
    return json.loads((out / "summary.json").read_text())


def _by_input(out: Path) -> dict[str, dict]:
    return {e["input"]: e for e in _summary(out)["files"]}


def _report(folder: str | Path) -> dict:
    return json.loads((Path(folder) / "report.json").read_text())


@pytest.fixture(scope="module")
def archive(tmp_path_factory) -> dict:
    """Six short recordings in two folders (two share a file name) and one
    corrupt file with a .wav name, plus the graph."""
    root = tmp_path_factory.mktemp("archive")
    files = [
        _write(root / "studio-a" / "take.wav", 2.0, 1),
        _write(root / "studio-a" / "interview.wav", 3.0, 2),
        _write(root / "studio-a" / "phone-in.wav", 4.0, 3),
        _write(root / "studio-b" / "take.wav", 2.5, 4),
        _write(root / "studio-b" / "field-notes.wav", 3.5, 5),
        _write(root / "studio-b" / "late-show.wav", 2.0, 6),
    ]
    bad = root / "studio-b" / "bad-take.wav"
    bad.write_bytes(np.random.default_rng(9).bytes(6000))  # not audio at all
    graph = root / "chain.toml"
    graph.write_text(CHAIN)
    return {"root": root, "files": files, "bad": bad, "graph": graph}


@pytest.fixture(scope="module")
def local_run(archive, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("local") / "out"
    rc = batch_main(archive["graph"], "--inputs", archive["root"], "--out", out, "--workers", "2")
    assert rc == 1  # 1: finished, some files failed
    return out


def test_local_pool_results_equal_single_runs(archive, local_run, tmp_path):
    entries = _by_input(local_run)
    assert len(entries) == 7
    folders = {e["folder"] for e in entries.values()}
    assert len(folders) == 7  # equal file names in two folders get their own folders
    for f in archive["files"]:
        e = entries[str(f.resolve())]
        assert e["status"] == "done", e
        rep = _report(e["folder"])
        assert rep["complete"] is True
        assert (Path(e["folder"]) / "decoded.flac").is_file()
    # The reference: the same graph run by hand on one file, in this process.
    for f in (archive["files"][0], archive["files"][3]):  # both named take.wav
        graph = load_graph(archive["graph"], [f'feed.path = "{f.as_posix()}"'])
        single = tmp_path / f.parent.name
        single.mkdir()
        res = run_offline(build(graph, single), handle_signals=False)
        assert res.complete
        batch_rep = _report(entries[str(f.resolve())]["folder"])
        assert batch_rep["meters"] == json.loads((single / "report.json").read_text())["meters"]
        assert batch_rep["meters"]["noise"]["codebook_updates"] > 5  # the chain adapted


def test_corrupt_file_is_recorded_and_does_not_stop_the_others(archive, local_run):
    e = _by_input(local_run)[str(archive["bad"].resolve())]
    assert e["status"] == "failed"
    assert "bad-take.wav" in e["error"] and "not a readable audio file" in e["error"]
    assert "\n" not in e["error"]
    marker = json.loads((Path(e["folder"]) / "batch.json").read_text())
    assert marker["status"] == "failed" and marker["error"] == e["error"]
    s = _summary(local_run)
    assert s["counts"] == {"done": 6, "failed": 1}


def test_summary_table_totals_weighted_by_samples(archive, local_run):
    s = _summary(local_run)
    done = [e for e in s["files"] if e["status"] == "done"]
    m = [e["meters"]["noise"] for e in done]
    w = np.array([x["samples"] * x["channels"] for x in m], float)
    sig = np.array([x["signal_power"] for x in m]) @ w
    noi = np.array([x["noise_power"] for x in m]) @ w
    t = s["totals"]["noise"]
    # SNR of the archive played end to end: total signal energy over total noise energy.
    assert t["snr_db"] == pytest.approx(10 * math.log10(sig / noi), abs=1e-9)
    assert t["segsnr_db"] == pytest.approx(
        float(np.array([x["segsnr_db"] for x in m]) @ w / w.sum()), abs=1e-9)
    assert t["samples"] == sum(x["samples"] for x in m)
    assert t["files"] == 6
    lines = (local_run / "summary.csv").read_text().splitlines()
    header = lines[0].split(",")
    assert header[:3] == ["input", "folder", "status"] and "snr_db" in header
    assert len(lines) == 1 + 7 + 1  # header, one row per file, the total
    assert lines[-1].split(",")[header.index("status")] == "total"
    png = local_run / "summary.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 10_000


def test_two_meters_get_one_summary_plot_each(tmp_path):
    """With more than one meter the SNR plot is summary-<meter>.png per meter
    (no summary.png); the table has one row per file and meter and a total per meter."""
    for i, secs in enumerate((1.0, 1.5)):
        _write(tmp_path / "in" / f"reel-{i}.wav", secs, 70 + i)
    graph = tmp_path / "two-meters.toml"
    graph.write_text(CHAIN + """
[nodes.enc3]
use = "encoder"
input = "feed"
pdf = "stats"
method = "lloyd-max"
bits = 3
adapt = "trailing"

[nodes.dec3]
use = "decoder"
input = "enc3"

[nodes.coarse]
use = "error-meter"
reference = "feed"
input = "dec3"
""")
    out = tmp_path / "out"
    assert batch_main(graph, "--inputs", tmp_path / "in", "--out", out, "--workers", "2",
                      "--quiet") == 0
    s = _summary(out)
    assert s["plots"] == {"noise": "summary-noise.png", "coarse": "summary-coarse.png"}
    assert not (out / "summary.png").exists()
    for name in s["plots"].values():
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert s["totals"]["coarse"]["snr_db"] < s["totals"]["noise"]["snr_db"]  # 3 bits < 4 bits
    lines = (out / "summary.csv").read_text().splitlines()
    assert len(lines) == 1 + 2 * 2 + 2  # header, file x meter, a total per meter


def _assert_same_results(out: Path, reference: Path) -> None:
    """The batch in ``out`` gave what the batch in ``reference`` gave: the same
    files with the same status, equal meters in every per-file report.json,
    the same errors for failed files and equal totals in summary.json."""
    ref, got = _by_input(reference), _by_input(out)
    assert set(ref) == set(got)
    for inp, e in got.items():
        assert e["status"] == ref[inp]["status"], (e, ref[inp])
        if e["status"] == "done":
            assert _report(e["folder"])["meters"] == _report(ref[inp]["folder"])["meters"], inp
        else:
            assert e["error"] == ref[inp]["error"]
    assert _summary(out)["totals"] == _summary(reference)["totals"]


def test_dask_cluster_gives_the_same_results(archive, local_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    out = tmp_path / "out"
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        rc = batch_main(archive["graph"], "--inputs", archive["root"], "--out", out,
                        "--cluster", cluster.scheduler_address, "--quiet")
        # Workers that cannot see a path (no shared storage) are named before any work.
        from streamq.batch.engines import DaskCluster
        from streamq.errors import StreamqError
        engine = DaskCluster(cluster.scheduler_address)
        try:
            with pytest.raises(StreamqError, match="cannot see /no/such/share/out"):
                engine.check_workers([str(archive["graph"]), "/no/such/share/out"])
        finally:
            engine.close()
    assert rc == 1, _summary(out)["counts"]
    assert "Dask cluster tcp://127.0.0.1:" in _summary(out)["engine"]
    _assert_same_results(out, local_run)


def test_cluster_local_n_gives_the_same_results(archive, local_run, tmp_path):
    """--cluster local:2: the command starts its own Dask scheduler and two
    worker processes on loopback, runs the archive there and stops them."""
    pytest.importorskip("distributed")
    import psutil  # a dependency of distributed
    me = psutil.Process()
    before = {c.pid for c in me.children(recursive=True)}
    out = tmp_path / "out"
    rc = batch_main(archive["graph"], "--inputs", archive["root"], "--out", out,
                    "--cluster", "local:2", "--quiet")
    assert rc == 1, _summary(out)["counts"]  # 1: finished, the corrupt file failed
    # the scheduler and workers it started are gone again
    left = [c for c in me.children(recursive=True) if c.pid not in before and c.is_running()
            and c.status() != psutil.STATUS_ZOMBIE]
    assert not left, [c.cmdline() for c in left]
    assert _summary(out)["engine"] == "local Dask cluster (2 workers)"
    _assert_same_results(out, local_run)


def _done_markers(out: Path) -> list[Path]:
    found = []
    for m in (out / "files").glob("*/batch.json"):
        try:
            if json.loads(m.read_text()).get("status") == "done":
                found.append(m)
        except (OSError, ValueError):
            pass  # being written
    return found


def test_interrupted_batch_resumes_with_only_the_missing_files(tmp_path):
    root = tmp_path / "shows"
    n_files = 16
    for i in range(n_files):
        _write(root / f"show-{i:02d}.wav", 4.0, 10 + i)
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "batch", str(graph),
                             "--inputs", str(root), "--out", str(out), "--workers", "1"],
                            env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, stdin=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while len(_done_markers(out)) < 2 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.send_signal(signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    assert "interrupted" in stderr
    first = _summary(out)
    done_before = {e["input"]: e for e in first["files"] if e["status"] == "done"}
    print(f"{len(done_before)} of {n_files} files done before the stop")
    assert 2 <= len(done_before) < n_files
    assert not any(e["status"] == "failed" for e in first["files"])
    stamps = {i: (Path(e["folder"]) / "report.json").stat().st_mtime_ns
              for i, e in done_before.items()}
    # Files cut short keep a report marked incomplete and are not taken as done.
    for e in first["files"]:
        if e["status"] == "interrupted":
            assert _report(e["folder"])["complete"] is False

    assert batch_main(graph, "--inputs", root, "--out", out, "--workers", "2") == 0
    second = _summary(out)
    assert second["counts"] == {"done": n_files}
    assert second["this_run"]["files_run"] == n_files - len(done_before)
    for i, e in done_before.items():
        assert (Path(e["folder"]) / "report.json").stat().st_mtime_ns == stamps[i]
    reused = {e["input"] for e in second["files"] if e["reused"]}
    assert reused == set(done_before)


def test_changed_input_is_redone(tmp_path):
    root = tmp_path / "calls"
    a = _write(root / "call-a.wav", 2.0, 21)
    b = _write(root / "call-b.wav", 2.0, 22)
    c = _write(root / "call-c.wav", 2.0, 23)
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    out = tmp_path / "out"
    args = [graph, "--inputs", root, "--out", out, "--workers", "2", "--quiet"]
    assert batch_main(*args) == 0
    reports = {p: Path(e["folder"]) / "report.json" for p, e in _by_input(out).items()}
    before = {p: r.stat().st_mtime_ns for p, r in reports.items()}

    assert batch_main(*args) == 0
    assert _summary(out)["this_run"]["files_run"] == 0  # nothing changed, nothing redone

    _write(a, 2.5, 31)  # new content and size
    st = b.stat()  # same content and size, newer modification time
    os.utime(b, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    assert batch_main(*args) == 0
    s = _summary(out)
    assert s["this_run"]["files_run"] == 2
    redone = {e["input"] for e in s["files"] if not e["reused"]}
    assert redone == {str(a.resolve()), str(b.resolve())}
    assert reports[str(c.resolve())].stat().st_mtime_ns == before[str(c.resolve())]
    assert _by_input(out)[str(a.resolve())]["samples"] == int(2.5 * RATE)

    before_snr = {}
    for e in _summary(out)["files"]:  # 4 bits, as the graph says
        noise = _report(e["folder"])["meters"]["noise"]
        assert (noise["fixed_rate_bits"], noise["levels"]) == (4, 16), e["input"]
        before_snr[e["input"]] = noise["snr_db"]

    # A different setup (--set) is a different result: everything is redone,
    # and each file's report.json holds the new figures (5 bits: 32 levels).
    assert batch_main(*args, "--set", "enc.bits=5") == 0
    s = _summary(out)
    assert s["this_run"]["files_run"] == 3
    assert s["overrides"] == ["enc.bits=5"]
    for e in s["files"]:
        rep = _report(e["folder"])
        assert rep["complete"] is True
        noise = rep["meters"]["noise"]
        assert (noise["fixed_rate_bits"], noise["levels"]) == (5, 32), e["input"]
        assert rep["nodes"]["enc"]["levels"] == 32
        assert e["meters"]["noise"]["fixed_rate_bits"] == 5  # the summary row too
        # one more bit: about 6 dB more SNR (common practice: the 6.02 dB-per-bit rule,
        # Jayant & Noll, Digital Coding of Waveforms, 1984); half of it is ample margin
        assert e["meters"]["noise"]["snr_db"] > before_snr[e["input"]] + 3
    assert batch_main(*args, "--set", "enc.bits=5") == 0
    assert _summary(out)["this_run"]["files_run"] == 0  # same setup again: nothing redone

    # Any edit of the graph file's text is a new setup too, even a comment.
    graph.write_text(CHAIN + "# checked again\n")
    assert batch_main(*args, "--set", "enc.bits=5") == 0
    assert _summary(out)["this_run"]["files_run"] == 3


PAGES = {"noise-codebooks.png", "noise-snr.png", "noise-spectrum.png", "report.html"}


def test_pages_option_writes_what_streamq_run_writes(tmp_path):
    """--pages adds each file's plots and report.html (as `streamq run` writes
    them); a re-run with --pages adds them to finished files without running
    the files again; a re-run that redoes a file without --pages removes the
    pages that no longer match its results."""
    a = _write(tmp_path / "calls" / "call-a.wav", 1.0, 61)
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    out = tmp_path / "out"
    args = [graph, "--inputs", a, "--out", out, "--workers", "1", "--quiet"]

    def names(folder) -> set[str]:
        return {p.name for p in Path(folder).iterdir()}

    assert batch_main(*args) == 0
    first = _summary(out)
    assert first["pages"] is False
    held = {"report.json", "batch.json", "noise-series.csv", "noise-spectrum.csv", "decoded.flac",
            "stats-windows.csv"}
    for e in first["files"]:
        assert names(e["folder"]) == held  # what the README lists, without --pages

    stamps = {e["input"]: (Path(e["folder"]) / "report.json").stat().st_mtime_ns
              for e in first["files"]}
    assert batch_main(*args, "--pages") == 0
    s = _summary(out)
    assert s["this_run"]["files_run"] == 0 and s["this_run"]["pages_only"] == 1
    for e in s["files"]:
        assert names(e["folder"]) == held | PAGES
        assert (Path(e["folder"]) / "report.json").stat().st_mtime_ns == stamps[e["input"]]
        page = (Path(e["folder"]) / "report.html").read_text()
        snr = _report(e["folder"])["meters"]["noise"]["snr_db"]
        assert "data:image/png;base64," in page and f"<td>{snr:.2f}</td>" in page
    assert batch_main(*args, "--pages") == 0
    assert _summary(out)["this_run"]["pages_only"] == 0  # nothing left to add

    # The same file names as a plain `streamq run` of the graph on one file.
    single = tmp_path / "single"
    assert cli_main(["run", str(graph), "--set", f'feed.path="{a.as_posix()}"',
                     "--out", str(single), "--quiet"]) == 0
    assert names(single) == held - {"batch.json"} | PAGES

    # Redone without --pages: the old pages would describe 4-bit results.
    assert batch_main(*args, "--set", "enc.bits=5") == 0
    for e in _summary(out)["files"]:
        assert names(e["folder"]) == held
    # Redone with --pages: new pages, made in the same pass.
    assert batch_main(*args, "--set", "enc.bits=6", "--pages") == 0
    s = _summary(out)
    assert s["this_run"]["files_run"] == 1 and s["this_run"]["pages_only"] == 0
    for e in s["files"]:
        assert names(e["folder"]) == held | PAGES


def test_a_plot_that_fails_is_a_warning_not_a_failed_file(tmp_path, capsys):
    a = _write(tmp_path / "calls" / "call-a.wav", 1.0, 63)
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    out = tmp_path / "out"
    args = [graph, "--inputs", a, "--out", out, "--workers", "1", "--quiet"]
    assert batch_main(*args) == 0
    folder = Path(_summary(out)["files"][0]["folder"])
    rep = _report(folder)
    rep["meters"]["noise"]["codebooks"] = "not a list of codebooks"  # the plot cannot use it
    (folder / "report.json").write_text(json.dumps(rep))
    capsys.readouterr()
    assert batch_main(*args, "--pages") == 0
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1, err
    assert err[0].startswith(f"streamq: warning: {a.resolve()}: plot noise-codebooks.png not "
                             f"written (")
    assert _summary(out)["counts"] == {"done": 1}
    assert {"report.html", "noise-snr.png"} <= {p.name for p in folder.iterdir()}


def test_files_run_in_threads_of_one_process(tmp_path):
    """A Dask worker may run several files at once in threads: in a fresh process
    (node kinds not loaded yet), four files started together all complete and
    give what they give alone."""
    for i in range(4):
        _write(tmp_path / "in" / f"desk-{i}.wav", 1.0, 40 + i)
    (tmp_path / "chain.toml").write_text(CHAIN)
    code = """if True:
        import json, sys, threading
        from pathlib import Path
        from streamq.batch.work import process_file
        tmp = Path(sys.argv[1])
        text = (tmp / "chain.toml").read_text()
        res = {}
        def one(i, where):
            job = {"graph_text": text, "graph_file": str(tmp / "chain.toml"), "overrides": [],
                   "node": "feed", "input": str(tmp / "in" / f"desk-{i}.wav"),
                   "folder": str(tmp / where / str(i)), "setup": "s", "stop_file": str(tmp / "stop")}
            res[(where, i)] = process_file(job)["status"]
        threads = [threading.Thread(target=one, args=(i, "together")) for i in range(4)]
        [t.start() for t in threads]
        [t.join() for t in threads]
        for i in range(4):
            one(i, "alone")
        print(json.dumps(sorted(set(res.values()))))
    """
    r = subprocess.run([sys.executable, "-c", code, str(tmp_path)], env=_env(),
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout) == ["done"], r.stdout
    for i in range(4):
        assert (_report(tmp_path / "together" / str(i))["meters"]
                == _report(tmp_path / "alone" / str(i))["meters"])


# -- progress -------------------------------------------------------------------------

BATCH_BAR = re.compile(r"^archive-check: (\d+)/(\d+) files, ([\d.]+) s audio"
                       r"(?:, ([\d.,]+)x real time)? \|.*\| \[[\d:]+, [\d:?]+ left\]$")


def _progress_archive(tmp_path: Path) -> tuple[Path, Path, list[float]]:
    lengths = [1.0, 1.5, 2.0, 2.5, 3.0]  # seconds; file names sort in this order
    for i, secs in enumerate(lengths):
        _write(tmp_path / "in" / f"desk-{i}.wav", secs, 50 + i)
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    return graph, tmp_path / "in", lengths


def test_progress_bar_on_a_terminal(tmp_path):
    """On a terminal the bar reads 'N/M files, A s audio, Sx real time': files
    done out of all, the audio of the files done so far and the speed; it is
    cleared before the summary lines."""
    from test_progress import run_on_pty  # the pty helper of `streamq run`'s bar tests
    graph, inputs, lengths = _progress_archive(tmp_path)
    code, text = run_on_pty([sys.executable, "-m", "streamq.cli", "batch", str(graph),
                             "--inputs", str(inputs), "--out", str(tmp_path / "out"),
                             "--workers", "1"], tmp_path)
    assert code == 0, text
    frames = [f.rstrip() for f in re.split(r"[\r\n]", text) if " files, " in f]
    assert frames, f"no progress bar in: {text!r}"
    seen = []
    for f in frames:
        m = BATCH_BAR.match(f)
        assert m, f
        n, total, audio = int(m.group(1)), int(m.group(2)), float(m.group(3))
        assert total == len(lengths)
        # one worker takes the files in order: the audio is that of the first n files
        assert audio == pytest.approx(sum(lengths[:n]), abs=0.051), f
        assert (m.group(4) is None) == (n == 0), f  # a speed once something is done
        seen.append(n)
    assert seen == sorted(seen) and seen[0] == 0 and seen[-1] >= 1, seen
    tail = text[text.rindex("archive-check: 5 of 5 files done"):]
    assert " files, " not in tail and "|" not in tail  # bar cleared, summary on clean lines


def test_no_progress_off_a_terminal_or_with_quiet(tmp_path):
    """Like `streamq run`: no bar, and no progress lines instead, when stderr is
    not a terminal (a log) or with --quiet."""
    from test_progress import run_on_pty
    graph, inputs, _ = _progress_archive(tmp_path)
    r = batch_cli(graph, "--inputs", inputs, "--out", tmp_path / "piped", "--workers", "1")
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""
    assert r.stdout.startswith("archive-check: 5 of 5 files done") and " files, " not in r.stdout
    code, text = run_on_pty([sys.executable, "-m", "streamq.cli", "batch", str(graph),
                             "--inputs", str(inputs), "--out", str(tmp_path / "quiet"),
                             "--workers", "1", "--quiet"], tmp_path)
    assert code == 0, text
    assert text.strip() == ""


# -- bad input: one clear line, exit 2 ----------------------------------------------

def _bad(capsys, *argv) -> str:
    assert cli_main(["batch", *map(str, argv)]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1, err
    return err[0]


def test_bad_input_errors(tmp_path, capsys):
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    _write(tmp_path / "in" / "one.wav", 1.0, 1)
    out = tmp_path / "out"
    line = _bad(capsys, tmp_path / "nope.toml", "--inputs", tmp_path / "in", "--out", out)
    assert "nope.toml" in line and "no such graph file" in line
    line = _bad(capsys, graph, "--inputs", str(tmp_path / "in" / "*.flac"), "--out", out)
    assert "*.flac" in line and "matched no files" in line
    line = _bad(capsys, graph, "--inputs", tmp_path / "missing", "--out", out)
    assert "missing" in line and "no such file or folder" in line
    for address in ("127.0.0.1:8786", "tcp://host", "local:0", "udp://127.0.0.1:8786"):
        line = _bad(capsys, graph, "--inputs", tmp_path / "in", "--out", out, "--cluster", address)
        assert address in line and ("tcp://HOST:PORT" in line or "local:N" in line)
    line = _bad(capsys, graph, "--inputs", tmp_path / "in", "--out", out,
                "--set", 'feed.path="x.wav"')
    assert "feed" in line and "--inputs" in line


def test_cluster_address_nobody_listens_on(tmp_path, capsys, monkeypatch):
    pytest.importorskip("distributed")
    import socket
    from streamq.batch import engines
    with socket.socket() as s:  # a free port, closed again: nothing listens there
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    _write(tmp_path / "in" / "one.wav", 1.0, 1)
    monkeypatch.setattr(engines, "CONNECT_TIMEOUT", 2.0)  # give up sooner than 10 s
    line = _bad(capsys, graph, "--inputs", tmp_path / "in", "--out", tmp_path / "out",
                "--cluster", f"tcp://127.0.0.1:{port}")
    assert f"tcp://127.0.0.1:{port}" in line and "cannot reach a Dask scheduler" in line


def test_batch_input_must_be_named_when_the_graph_has_two_file_sources(tmp_path, capsys):
    _write(tmp_path / "in" / "one.wav", 1.0, 1)
    _write(tmp_path / "ref.wav", 1.0, 2)
    two = """\
        [graph]
        name = "two-sources"
        {extra}
        [nodes.feed]
        use = "file-source"
        path = "x.wav"
        [nodes.ref]
        use = "file-source"
        path = "ref.wav"
        [nodes.noise]
        use = "error-meter"
        reference = "ref"
        input = "feed"
        """
    import textwrap
    g = tmp_path / "two.toml"
    g.write_text(textwrap.dedent(two.format(extra="")))
    line = _bad(capsys, g, "--inputs", tmp_path / "in", "--out", tmp_path / "out")
    assert "2 file-sources" in line and "feed" in line and "ref" in line and "batch_input" in line
    g.write_text(textwrap.dedent(two.format(extra='batch_input = "noise"')))
    line = _bad(capsys, g, "--inputs", tmp_path / "in", "--out", tmp_path / "out")
    assert "batch_input" in line and "noise" in line and "file-source" in line
    # Named: the other source keeps its own file (relative to the graph's folder).
    g.write_text(textwrap.dedent(two.format(extra='batch_input = "feed"')))
    assert cli_main(["batch", str(g), "--inputs", str(tmp_path / "in"), "--out",
                     str(tmp_path / "out"), "--workers", "1", "--quiet"]) == 0
    e = _summary(tmp_path / "out")["files"][0]
    assert e["status"] == "done"
    assert e["meters"]["noise"]["samples"] == RATE


def test_missing_dask_names_the_extra(tmp_path):
    graph = tmp_path / "chain.toml"
    graph.write_text(CHAIN)
    _write(tmp_path / "in" / "one.wav", 1.0, 1)
    # Run the command in a Python where importing distributed fails, as it does
    # when the extra is not installed.
    code = ("import sys; sys.modules['distributed'] = None; from streamq.cli import main; "
            f"sys.exit(main(['batch', {str(graph)!r}, '--inputs', {str(tmp_path / 'in')!r}, "
            f"'--out', {str(tmp_path / 'out')!r}, '--cluster', 'local:1']))")
    r = subprocess.run([sys.executable, "-c", code], env=_env(), capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 2
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "streamq[cluster]" in lines[0]


def test_inputs_from_list_file_and_glob(tmp_path):
    a = _write(tmp_path / "x" / "a.wav", 0.5, 1)
    b = _write(tmp_path / "x" / "deep" / "b.flac", 0.5, 2)
    (tmp_path / "x" / "notes.txt").write_text("not audio")
    lst = tmp_path / "list.txt"
    lst.write_text("# tonight's calls\nx/deep/b.flac\n\nx/a.wav\nx/a.wav\n")
    assert expand_inputs([str(lst)]) == [b.resolve(), a.resolve()]
    assert expand_inputs([str(tmp_path / "x" / "**" / "*.flac")]) == [b.resolve()]
    assert expand_inputs([str(tmp_path / "x")]) == [a.resolve(), b.resolve()]
    # Files under the output folder are never inputs.
    assert expand_inputs([str(tmp_path / "x")], exclude=tmp_path / "x" / "deep") == [a.resolve()]
    assert folder_name(a.resolve()) != folder_name((tmp_path / "y" / "a.wav").resolve())
