"""Plots, report.html and the report after an interrupted replay.

The plots are checked for what can be checked without eyes: every file is a
real PNG of a sensible size, one set per meter, the page embeds them as data
URIs and nothing else, the summary table carries the report's own figures,
and a plotting failure never costs report.json. The replay tests stop a real
``streamq run`` with SIGTERM/SIGINT and check the files it leaves behind
against each other (soundfile reads the audio; the csv module the series).
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from PIL import Image

from streamq.report import plot_names, write_report_files
from streamq.report.page import render_html, summary_rows
from streamq.report.plots import clock, time_unit

RATE = 48_000
SERIES_COLUMNS = ["time_s", "samples", "snr_db", "segsnr_db", "signal_dbfs", "noise_dbfs",
                  "overload_fraction", "codebook_updates", "side_info_bits", "codebook_version"]


# -- a hand-made report (no run needed) ------------------------------------------------------

def _codebook(version, at, until, sigma, levels=16, seed=0):
    rng = np.random.default_rng(seed)
    lv = np.sort(rng.normal(0, sigma, levels))
    th = 0.5 * (lv[1:] + lv[:-1])
    span = lv[-1] - lv[0]
    lo, hi = lv[0] - 0.25 * span, lv[-1] + 0.25 * span
    counts, _ = np.histogram(rng.laplace(0, sigma / 2, 5000), 200, range=(lo, hi))
    return {"version": version, "at_sample": at, "method": "lloyd-max", "thresholds": th.tolist(),
            "levels": lv.tolist(), "range": [lo, hi], "counts": counts.tolist(), "until": until}


def fake_run(out: Path, meters=("alpha", "beta"), rows=90, levels=16) -> dict:
    """report.json plus the meters' CSV files, shaped as the error-meter writes them."""
    out.mkdir(parents=True, exist_ok=True)
    total = rows * 4800
    report = {"graph": "made-up", "graph_file": None, "complete": True, "samples": total,
              "last_sample": total, "sample_rate": RATE, "audio_seconds": total / RATE,
              "meters": {}, "outputs": {"keep": {"path": str(out / "x.wav"), "frames": total}},
              "nodes": {}}
    rng = np.random.default_rng(5)
    for i, mid in enumerate(meters):
        with open(out / f"{mid}-series.csv", "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(SERIES_COLUMNS)
            for r in range(rows):
                snr = 20 + rng.normal()
                sig = -30 + 10 * math.sin(r / 10)
                w.writerow([f"{r * 0.1:.6g}", 4800, f"{snr:.6g}", f"{snr - 1:.6g}", f"{sig:.6g}",
                            f"{sig - snr:.6g}", 0.001, 1, 120, r + 1])
        with open(out / f"{mid}-spectrum.csv", "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["frequency_hz", "signal_psd_db", "noise_psd_db"])
            for fr in np.fft.rfftfreq(2048, 1 / RATE):
                w.writerow([f"{fr:.3f}", f"{-60 - fr / 1000:.3f}", f"{-95 + rng.normal():.3f}"])
        report["meters"][mid] = {
            "snr_db": 20.123 + i, "segsnr_db": 18.456 + i, "samples": total, "channels": 2,
            "overload_samples": 864, "bits_per_sample": 4.0345, "entropy_bits": 3.7891,
            "codebook_updates": rows, "series_csv": f"{mid}-series.csv",
            "spectrum_csv": f"{mid}-spectrum.csv",
            "codebooks": {"first": _codebook(1, 0, 4800, 0.01, levels),
                          "middle": _codebook(45, total // 2, total // 2 + 4800, 0.1, levels, 1),
                          "last": _codebook(rows, total - 4800, total, 0.3, levels, 2)}}
    (out / "report.json").write_text(json.dumps(report))
    return report


def assert_png(path: Path) -> tuple[int, int]:
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", path
    with Image.open(path) as im:
        im.verify()
    with Image.open(path) as im:
        w, h = im.size
        # not blank: more than a handful of colours
        colours = im.convert("RGB").getcolors(maxcolors=1 << 16)
    assert 500 <= w <= 1400 and 250 <= h <= 1200, (path, w, h)
    assert colours is None or len(colours) > 20
    return w, h


def data_uris(page: str) -> list[str]:
    return re.findall(r'src="(data:image/png;base64,[A-Za-z0-9+/=]+)"', page)


def assert_self_contained(page: str) -> None:
    """No external resource of any kind: every src is a data URI, no links, scripts or urls."""
    srcs = re.findall(r'\bsrc="([^"]*)"', page)
    assert all(s.startswith("data:image/png;base64,") for s in srcs), srcs
    assert "<link" not in page and "<script" not in page and "@import" not in page
    assert "http:" not in page and "https:" not in page and "url(" not in page


def test_three_plots_per_meter_and_one_page(tmp_path):
    report = fake_run(tmp_path)
    written = write_report_files(tmp_path, report)
    names = [p.name for p in written]
    expected = [n for mid in ("alpha", "beta") for n in plot_names(mid).values()]
    assert names == expected + ["report.html"]
    for p in written[:-1]:
        assert_png(p)
    page = (tmp_path / "report.html").read_text()
    assert_self_contained(page)
    uris = data_uris(page)
    assert len(uris) == 6
    # the embedded images are the PNG files themselves
    import base64
    embedded = {base64.b64decode(u.split(",", 1)[1]) for u in uris}
    assert embedded == {p.read_bytes() for p in written[:-1]}
    assert page.startswith("<!DOCTYPE html>") and page.rstrip().endswith("</html>")


def test_summary_table_carries_the_report_figures(tmp_path):
    report = fake_run(tmp_path)
    page = render_html(report, {})
    rows = re.findall(r"<tr>(.*?)</tr>", page)
    cells = [re.findall(r"<td[^>]*>(.*?)</td>", r) for r in rows]
    alpha = next(c for c in cells if c and c[0] == "alpha")
    beta = next(c for c in cells if c and c[0] == "beta")
    # SNR, segmental SNR, bits/sample incl. side info, entropy, updates, overload share, samples
    assert alpha[1:] == ["20.12", "18.46", "4.035", "3.789", "90", "0.100 %", "432,000"]
    assert beta[1:3] == ["21.12", "19.46"]
    # overload share = overload samples / (samples x channels) = 864 / (432,000 x 2)
    assert summary_rows(report)[0]["overload_share"] == pytest.approx(864 / 864_000)
    for head in ("SNR (dB)", "segmental SNR (dB)", "bits/sample incl. side info",
                 "index entropy (bits/sample)", "codebook updates", "overload share", "samples"):
        assert f"<th>{head}</th>" in page


def test_fixed_codebook_is_drawn_once(tmp_path):
    """A fixed quantizer's first, middle and last codebook are the same period:
    one panel, titled as all three."""
    report = fake_run(tmp_path, meters=("fixed",))
    cb = report["meters"]["fixed"]["codebooks"]["first"]
    report["meters"]["fixed"]["codebooks"] = {"first": cb, "middle": cb, "last": cb}
    p = write_report_files(tmp_path, report)[0]
    _, h = assert_png(p)
    assert h < 450  # one panel, not three


def test_many_levels_and_a_long_series(tmp_path):
    """256 levels and two hours of 100 ms rows still make readable, finite plots."""
    report = fake_run(tmp_path, meters=("long",), rows=72_000, levels=256)
    written = write_report_files(tmp_path, report)
    assert [p.name for p in written] == list(plot_names("long").values()) + ["report.html"]
    for p in written[:-1]:
        assert_png(p)


def test_odd_values_do_not_break_the_plots(tmp_path):
    """Rows without noise (inf), silent rows (-inf), empty cells and a codebook
    period with no measured samples."""
    report = fake_run(tmp_path, meters=("odd",), rows=30)
    path = tmp_path / "odd-series.csv"
    lines = path.read_text().splitlines()
    cells = lines[5].split(",")
    cells[2], cells[5] = "inf", "-inf"
    lines[5] = ",".join(cells)
    cells = lines[6].split(",")
    cells[2], cells[3], cells[4] = "-inf", "", "-inf"
    lines[6] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")
    report["meters"]["odd"]["codebooks"]["last"]["counts"] = [0] * 200
    report["meters"]["odd"]["snr_db"] = math.inf
    warnings = []
    written = write_report_files(tmp_path, report, warn=lambda what, exc: warnings.append(what))
    assert warnings == []
    assert len(written) == 4
    page = (tmp_path / "report.html").read_text()
    assert '<td class="na">n/a</td>' in page  # the infinite SNR


def test_missing_files_and_figures(tmp_path):
    report = fake_run(tmp_path, meters=("bare",))
    (tmp_path / "bare-series.csv").unlink()
    m = report["meters"]["bare"]
    m["spectrum_csv"] = None
    m["codebooks"] = {}
    for key in ("segsnr_db", "entropy_bits", "bits_per_sample"):
        m[key] = None
    written = write_report_files(tmp_path, report)
    assert [p.name for p in written] == ["report.html"]
    page = written[0].read_text()
    assert "bare" in page and data_uris(page) == []


def test_one_failing_plot_warns_and_the_rest_is_written(tmp_path, capsys):
    report = fake_run(tmp_path, meters=("alpha", "beta"))
    report["meters"]["alpha"]["codebooks"]["first"]["range"] = "not a range"
    written = write_report_files(tmp_path, report)
    assert [p.name for p in written] == [
        "alpha-snr.png", "alpha-spectrum.png", *plot_names("beta").values(), "report.html"]
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1
    assert err[0].startswith("streamq: warning: plot alpha-codebooks.png failed (")


def test_incomplete_run_is_flagged_on_the_page(tmp_path):
    report = fake_run(tmp_path, meters=("m",))
    report.update(complete=False, last_sample=123_456)
    page = render_html(report, {})
    assert "stopped early at sample 123,456" in page


def test_time_helpers():
    assert time_unit(12.0) == ("s", 1.0)
    assert time_unit(600.0) == ("min", 60.0)
    assert time_unit(7200.0) == ("min", 60.0)
    assert time_unit(4 * 3600.0) == ("h", 3600.0)
    assert clock(0.1) == "0.100 s"
    assert clock(75.25) == "1:15.2"
    assert clock(3600.0) == "1:00:00.0"


# -- after a real run -------------------------------------------------------------------------

CHAIN = """
[graph]
name = "two-ways"
sample_rate = 48000

[nodes.feed]
use = "test-signal"
scene = "drift"
seconds = 3
channels = 2
bits = 16

[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "300 ms"
hop = "100 ms"

[nodes.adaptive]
use = "encoder"
input = "feed"
pdf = "stats"
method = "lloyd-max"
bits = 4
adapt = "trailing"

[nodes.adaptive_out]
use = "decoder"
input = "adaptive"

[nodes.adaptive_noise]
use = "error-meter"
reference = "feed"
input = "adaptive_out"

[nodes.fixed]
use = "encoder"
input = "feed"
method = "mu-law"
bits = 4

[nodes.fixed_out]
use = "decoder"
input = "fixed"

[nodes.fixed_noise]
use = "error-meter"
reference = "feed"
input = "fixed_out"
"""


def _cli(*args, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamq.cli", *map(str, args)],
                          capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=300,
                          **kw)


def test_run_writes_plots_and_page(tmp_path):
    g = tmp_path / "g.toml"
    g.write_text(CHAIN)
    out = tmp_path / "o"
    proc = _cli("run", g, "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    assert f"report: {out / 'report.html'}" in proc.stdout
    report = json.loads((out / "report.json").read_text())
    for mid in ("adaptive_noise", "fixed_noise"):
        for name in plot_names(mid).values():
            assert_png(out / name)
    page = (out / "report.html").read_text()
    assert_self_contained(page)
    assert len(data_uris(page)) == 6
    for mid, m in report["meters"].items():
        row = re.search(rf"<tr><td>{mid}</td><td>([^<]*)</td><td>([^<]*)</td>", page)
        assert row, mid
        assert row.group(1) == f"{m['snr_db']:.2f}"
        assert row.group(2) == f"{m['segsnr_db']:.2f}"


def _run_args(graph: Path, out: Path) -> argparse.Namespace:
    return argparse.Namespace(graph=str(graph), overrides=[], out=str(out), block=None,
                              seconds=None, quiet=True)


def test_plot_failure_never_loses_report_json(tmp_path, monkeypatch, capsys):
    from streamq import runner
    from streamq.report import plots

    def broken(*a, **k):
        raise RuntimeError("no ink left")

    monkeypatch.setattr(plots, "plot_snr", broken)
    g = tmp_path / "g.toml"
    g.write_text(CHAIN)
    out = tmp_path / "o"
    assert runner.run_graph_file(_run_args(g, out)) == 0
    err = capsys.readouterr().err.splitlines()
    assert sorted(err) == [f"streamq: warning: plot {mid}-snr.png failed (RuntimeError: no ink "
                           f"left)" for mid in ("adaptive_noise", "fixed_noise")]
    report = json.loads((out / "report.json").read_text())
    assert report["complete"] is True and set(report["meters"]) == {"adaptive_noise",
                                                                    "fixed_noise"}
    assert (out / "adaptive_noise-codebooks.png").exists()
    assert not (out / "adaptive_noise-snr.png").exists()
    assert len(data_uris((out / "report.html").read_text())) == 4


def test_report_module_failure_never_loses_report_json(tmp_path, monkeypatch, capsys):
    import streamq.report
    from streamq import runner

    def broken(out_dir, report):
        raise MemoryError("out of memory while plotting")

    monkeypatch.setattr(streamq.report, "write_report_files", broken)
    g = tmp_path / "g.toml"
    g.write_text(CHAIN.replace("seconds = 3", "seconds = 1"))
    out = tmp_path / "o"
    assert runner.run_graph_file(_run_args(g, out)) == 0
    err = capsys.readouterr().err.splitlines()
    assert err == ["streamq: warning: plots and report.html not written "
                   "(out of memory while plotting)"]
    assert json.loads((out / "report.json").read_text())["complete"] is True
    assert not (out / "report.html").exists()


# -- an interrupted replay --------------------------------------------------------------------

REPLAY = """
[graph]
name = "long-replay"

[nodes.feed]
use = "file-source"
path = "{path}"

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
bits = 8
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
path = "decoded.wav"
subtype = "PCM_16"
"""
LONG_SECONDS = 600


@pytest.fixture(scope="module")
def long_wav(tmp_path_factory) -> Path:
    """Ten minutes of invented stereo program (tones over noise, level changing
    every few seconds), 16-bit, written in pieces."""
    path = tmp_path_factory.mktemp("long") / "long-take.wav"
    rng = np.random.default_rng(11)
    piece = RATE * 10
    with sf.SoundFile(str(path), "w", RATE, 2, "PCM_16") as f:
        for k in range(LONG_SECONDS // 10):
            t = (np.arange(piece) + k * piece) / RATE
            level = 0.02 * (1 + 3 * (k % 4))
            x = level * (rng.laplace(size=(piece, 2)) + np.sin(2 * np.pi * 330 * t)[:, None])
            f.write(np.clip(x, -1, 1 - 2 ** -15))
    return path


def _read_series(path: Path) -> list[dict[str, str]]:
    with open(path, newline="") as f:
        reader = csv.DictReader(f)
        assert reader.fieldnames == SERIES_COLUMNS
        return list(reader)


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_interrupted_replay_leaves_consistent_files(tmp_path, long_wav, signum):
    g = tmp_path / "replay.toml"
    g.write_text(REPLAY.format(path=long_wav))
    out = tmp_path / "o"
    part = out / ".decoded.wav.part"
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "run", str(g), "--out", str(out)],
                            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        # wait until two steps (2 x 65,536 stereo 16-bit frames) are on disk
        deadline = time.monotonic() + 120
        while not (part.exists() and part.stat().st_size > 2 * 65_536 * 4):
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "the replay never started writing"
            time.sleep(0.02)
        proc.send_signal(signum)
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 130, (stdout, stderr)
    assert "Traceback" not in stderr
    assert "interrupted at sample" in stderr

    report = json.loads((out / "report.json").read_text())
    assert report["complete"] is False
    n = report["last_sample"]
    assert 0 < n < LONG_SECONDS * RATE
    assert n % 65_536 == 0  # stopped between steps
    assert report["samples"] == n

    # the decoded audio written so far: a valid WAV with exactly the frames the report says
    assert not part.exists()
    dec, rate = sf.read(str(out / "decoded.wav"), dtype="float64", always_2d=True)
    assert rate == RATE and dec.shape == (n, 2)
    assert report["outputs"]["keep"]["frames"] == n
    meter = report["meters"]["noise"]
    assert meter["frames"] == n and meter["samples"] == n
    # and it is the signal the meter measured: SNR from the files agrees (16-bit storage
    # of the decoded signal adds noise some 48 dB below that of an 8-bit quantizer)
    ref, _ = sf.read(str(long_wav), frames=n, dtype="float64", always_2d=True)
    snr_files = 10 * np.log10(np.sum(ref ** 2) / np.sum((dec - ref) ** 2))
    assert snr_files == pytest.approx(meter["snr_db"], abs=0.1)

    # the time series: well-formed rows of 100 ms covering exactly the measured samples
    rows = _read_series(out / meter["series_csv"])
    assert len(rows) == math.ceil(n / 4800)
    assert sum(int(r["samples"]) for r in rows) == n
    times = [float(r["time_s"]) for r in rows]
    assert times == pytest.approx([0.1 * k for k in range(len(rows))])
    for r in rows:
        for col in ("snr_db", "segsnr_db", "signal_dbfs", "noise_dbfs", "overload_fraction"):
            float(r[col])  # a number (inf allowed), never garbage
        assert 0.0 <= float(r["overload_fraction"]) <= 1.0
        assert int(r["codebook_updates"]) >= 0
    assert sum(int(r["codebook_updates"]) for r in rows) == meter["codebook_updates"]
    with open(out / meter["spectrum_csv"], newline="") as f:
        spec = list(csv.reader(f))
    assert spec[0] == ["frequency_hz", "signal_psd_db", "noise_psd_db"]
    assert len(spec) == 1 + 2048 // 2 + 1
    assert all(math.isfinite(float(v)) for row in spec[1:] for v in row)

    # plots and the page exist for the part that was run, and say it stopped early
    for name in plot_names("noise").values():
        assert_png(out / name)
    page = (out / "report.html").read_text()
    assert f"stopped early at sample {n:,}" in page
    assert "stopped early" in stdout


# -- plots drawn by helper processes (PlotWorkers) ----------------------------------------------

def _helpers(plots: int = 6):
    from streamq.report import PlotWorkers
    workers = PlotWorkers(plots, limit=2)
    if workers.pool is None:
        pytest.skip("no helper processes here (one core, or no fork)")
    return workers


def test_helpers_draw_the_same_files_as_one_process(tmp_path):
    one, two = tmp_path / "one", tmp_path / "two"
    report = fake_run(one)
    fake_run(two)
    alone = write_report_files(one, report)
    with _helpers():
        helped = write_report_files(two, report)
    assert [p.name for p in helped] == [p.name for p in alone]
    for a, b in zip(alone[:-1], helped[:-1]):
        assert a.read_bytes() == b.read_bytes(), a.name    # the same pictures, byte for byte
    assert (one / "report.html").read_text() == (two / "report.html").read_text()


def test_a_plot_failing_in_a_helper_warns_as_in_one_process(tmp_path, capsys):
    report = fake_run(tmp_path, meters=("alpha", "beta"))
    report["meters"]["alpha"]["codebooks"]["first"]["range"] = "not a range"
    with _helpers():
        written = write_report_files(tmp_path, report)
    assert [p.name for p in written] == [
        "alpha-snr.png", "alpha-spectrum.png", *plot_names("beta").values(), "report.html"]
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1
    assert err[0].startswith("streamq: warning: plot alpha-codebooks.png failed (ValueError: ")


def test_dead_helpers_leave_the_plots_to_the_caller(tmp_path):
    report = fake_run(tmp_path, meters=("alpha",))
    with _helpers() as workers:
        for process in list(workers.pool._processes.values()):
            process.kill()
            process.join()
        written = write_report_files(tmp_path, report)
    assert [p.name for p in written] == [*plot_names("alpha").values(), "report.html"]
    for p in written[:-1]:
        assert_png(p)


def test_helpers_only_inside_their_block_and_not_for_one_plot(tmp_path):
    import streamq.report as R
    assert R._WORKERS.get() is None
    with _helpers() as workers:
        assert R._WORKERS.get() is workers
    assert R._WORKERS.get() is None and workers.pool is None
    assert R.PlotWorkers(1).pool is None
