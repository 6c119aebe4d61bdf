"""`streamq sweep`: each point must be exactly a single run of its own graph;
the CSV, JSON and plot must hold what was run; bad input is one line, exit 2;
an interrupted sweep keeps its finished points."""

from __future__ import annotations

import csv
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from kernel_reference import envelope_flags
from streamq.design import lloyd_max_pdf
from streamq.design.theory import ECSQ_GAP_BITS, ECSQ_GAP_DB, gaussian_rd_mse
from streamq.errors import StreamqError
from streamq.report.compare import (
    DEFAULT_COMPARED,
    SCHEMES,
    build_compare_toml,
    encoder_settings,
    file_rms,
    label,
)
from streamq.report.sweep import (
    CSV_FIELDS,
    DEFAULT_BLOCKS_MS,
    MAX_GAUSSIAN_MSE,
    parse_bits,
    parse_blocks,
    plan_points,
    sweep,
)

REPO = Path(__file__).resolve().parents[1]
AUDIO = REPO / "graphs" / "audio" / "three-part-program.flac"  # invented 9 s mono program
SCHEMES_ASKED = "uniform,lloyd-max-gain,lloyd-max-trailing,uniform-step"
EXACT = ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample",
         "codebook_updates", "samples")


@pytest.fixture(scope="module")
def short(tmp_path_factory) -> Path:
    """The first 2 s of the example program."""
    data, rate = sf.read(AUDIO, frames=2 * 48_000, dtype="int16", always_2d=True)
    path = tmp_path_factory.mktemp("audio") / "short.flac"
    sf.write(path, data, rate, subtype="PCM_16")
    return path


@pytest.fixture(scope="module")
def swept(short, tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "out"
    res = sweep(short, "2-3", SCHEMES_ASKED, blocks="8,32", out_dir=out, workers=2,
                handle_signals=False)
    return res, out


def _cli(*args, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamq.cli", *map(str, args)],
                          capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=300,
                          **kw)


# -- the points ----------------------------------------------------------------------------

def test_points_cover_schemes_bits_and_blocks(swept):
    res, _ = swept
    got = [(p["scheme"], p["bits"], p["block_ms"]) for p in res["points"]]
    want = [("uniform", 2, None), ("uniform", 3, None)]
    for s in ("lloyd-max-gain", "lloyd-max-trailing"):
        want += [(s, b, blk) for b in (2, 3) for blk in (8.0, 32.0)]
    want += [("uniform-step", 2, None), ("uniform-step", 3, None)]
    assert got == want
    assert res["complete"] is True
    assert res["counts"] == {"done": len(want)}
    assert all(p["status"] == "done" and p["error"] is None for p in res["points"])


def test_each_point_equals_a_single_run_of_its_graph(swept, short, tmp_path):
    """The point's figures are those of the same one-method graph (compare's
    graph builder, compare's settings) run on its own through the scheduler."""
    res, _ = swept
    rms, _ = file_rms(short)
    for p in res["points"]:
        settings = encoder_settings(p["scheme"], p["bits"], short.resolve(), rms,
                                    block_ms=p["block_ms"])
        own = settings.pop("estimator", None)
        assert p["settings"] == settings and p["estimator"] == own
        assert p["label"] == label(p["scheme"], settings, block_ms=p["block_ms"])
        text = build_compare_toml(short.resolve(), [p["scheme"]],
                                  {p["scheme"]: {**settings, **({"estimator": own} if own else {})}})
        report = run_toml(text, tmp_path / p["id"])
        meter = report["meters"][p["scheme"]]
        for key in EXACT:
            assert p[key] == meter[key], (p["id"], key)


def test_a_point_equals_streamq_run_of_its_kept_graph(swept, tmp_path):
    res, out = swept
    p = next(q for q in res["points"] if q["scheme"] == "lloyd-max-trailing" and q["bits"] == 3
             and q["block_ms"] == 8.0)
    graph = out / p["folder"] / "graph.toml"
    r = _cli("run", graph, "--out", tmp_path / "run", "--quiet")
    assert r.returncode == 0, r.stderr
    meter = json.loads((tmp_path / "run" / "report.json").read_text())["meters"][p["scheme"]]
    for key in EXACT:
        assert p[key] == meter[key], key
    assert meter["side_info_bits_per_sample"] > 0  # trailing codebooks are sent


def test_rates_include_side_information(swept):
    res, _ = swept
    for p in res["points"]:
        assert p["bits_per_sample"] == pytest.approx(p["fixed_rate_bits"]
                                                     + p["side_info_bits_per_sample"], abs=1e-12)
    step = [p for p in res["points"] if p["scheme"] == "uniform-step"]
    assert all(p["side_info_bits_per_sample"] == 0 for p in step)  # backward: no side info
    gain = {p["block_ms"]: p for p in res["points"] if p["scheme"] == "lloyd-max-gain"
            and p["bits"] == 2}
    # 6 bits of gain per block (a last partial block counts whole) over 96,000 samples
    for ms, n in ((8.0, 384), (32.0, 1536)):
        assert gain[ms]["side_info_bits_per_sample"] == 6 * math.ceil(96_000 / n) / 96_000


# -- the files ------------------------------------------------------------------------------

def test_csv_holds_one_row_per_point(swept):
    res, out = swept
    with open(out / "sweep.csv", newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    assert tuple(rows[0]) == CSV_FIELDS
    assert len(rows) == 1 + len(res["points"])
    for row, p in zip(rows[1:], res["points"]):
        r = dict(zip(CSV_FIELDS, row))
        assert r["scheme"] == p["scheme"] and r["label"] == p["label"]
        assert int(r["bits"]) == p["bits"]
        assert (r["block_ms"] == "") == (p["block_ms"] is None)
        if p["block_ms"] is not None:
            assert float(r["block_ms"]) == p["block_ms"]
        for key in ("bits_per_sample", "side_info_bits_per_sample", "snr_db", "segsnr_db"):
            assert float(r[key]) == p[key]  # repr round-trips exactly
        assert int(r["codebook_updates"]) == p["codebook_updates"]
        assert r["status"] == "done" and r["error"] == ""


def test_json_has_points_and_the_files_facts(swept, short):
    res, out = swept
    data = json.loads((out / "sweep.json").read_text(encoding="utf-8"))
    assert data["complete"] is True
    assert data["file"] == str(short.resolve())
    assert (data["sample_rate"], data["channels"], data["frames"]) == (48_000, 1, 96_000)
    assert data["seconds"] == pytest.approx(2.0)
    assert data["bits"] == [2, 3] and data["blocks_ms"] == [8.0, 32.0]
    assert data["schemes"] == SCHEMES_ASKED.split(",")
    assert data["plot"] == "sweep.png"
    assert len(data["points"]) == len(res["points"])
    for p, q in zip(data["points"], res["points"]):
        for key in ("scheme", "settings", "label", "bits", "block_ms", "bits_per_sample",
                    "snr_db", "segsnr_db", "codebook_updates", "status", "on_envelope"):
            assert p[key] == q[key], key
        assert (out / p["folder"] / "report.json").is_file()


def test_envelope_marks_the_best_snr_at_or_below_each_rate(swept):
    res, _ = swept
    pts = res["points"]
    on = [p for p in pts if p["on_envelope"]]
    assert on
    assert [p["on_envelope"] for p in pts] == envelope_flags(pts)


def test_plot_is_written(swept):
    _, out = swept
    png = (out / "sweep.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000
    assert not list(out.glob(".*.part"))  # every file was written whole


# -- what runs by default -------------------------------------------------------------------

def test_default_schemes_follow_what_compare_allows(short):
    rms, _ = file_rms(short)
    pts = plan_points(short, rms, [2, 6], None, list(DEFAULT_BLOCKS_MS))
    for b in (2, 6):
        names = [p["scheme"] for p in pts if p["bits"] == b]
        for m in DEFAULT_COMPARED:
            blocks = SCHEMES[m].block_ms is not None if m in SCHEMES else False
            runs = m not in SCHEMES or SCHEMES[m].min_bits <= b <= SCHEMES[m].max_bits
            assert names.count(m) == (0 if not runs else len(DEFAULT_BLOCKS_MS) if blocks else 1)
    assert not any(p["scheme"].startswith("g711") for p in pts)  # only when asked


def test_g711_only_at_8_bits(short):
    rms, _ = file_rms(short)
    pts = plan_points(short, rms, [7, 8], ["g711-mu", "uniform"], [8.0])
    assert [(p["scheme"], p["bits"]) for p in pts] == [("g711-mu", 8), ("uniform", 7),
                                                      ("uniform", 8)]
    with pytest.raises(StreamqError, match="--schemes: g711-a .*include 8"):
        plan_points(short, rms, [2, 3], ["g711-a"], [8.0])
    with pytest.raises(StreamqError, match="--schemes: uniform-step runs at 2 to 5"):
        plan_points(short, rms, [6, 7], ["uniform-step"], [8.0])


def test_bits_and_blocks_forms():
    assert parse_bits("4") == [4]
    assert parse_bits("2-6") == [2, 3, 4, 5, 6]
    assert parse_bits("2,4,6") == [2, 4, 6]
    assert parse_bits("6, 2-3,3") == [2, 3, 6]
    assert parse_bits(5) == [5]
    assert parse_blocks("32,8,16 ms") == [8.0, 16.0, 32.0]
    assert parse_blocks(None) == list(DEFAULT_BLOCKS_MS)
    for bad in ("6-2", "0-3", "2-17", "x", "2-", ",", "1.5"):
        with pytest.raises(StreamqError, match="--bits"):
            parse_bits(bad)
    for bad in ("0", "-8", "nan", "inf", "eight", ","):
        with pytest.raises(StreamqError, match="--blocks"):
            parse_blocks(bad)


# -- references -------------------------------------------------------------------------------

@pytest.mark.parametrize("bits", sorted(MAX_GAUSSIAN_MSE))
def test_max_table_against_our_lloyd_max(bits):
    """Max 1960, Table I, from memory (in streamq/report/sweep_files.py) against
    streamq.design's Lloyd-Max design of a unit Gaussian. Max prints four
    significant digits; his 16- and 32-level distortions are slightly off in
    the last digits (float64: 0.009501 and 0.002505), hence 3e-3 there."""
    _, rep = lloyd_max_pdf("gaussian", 2 ** bits)
    assert rep.mse == pytest.approx(MAX_GAUSSIAN_MSE[bits], rel=1e-3 if bits <= 3 else 3e-3)


def test_gaussian_reference_lines():
    # Shannon 1959: D(R) = sigma^2 2^(-2R), i.e. 6.02 dB per bit (common practice: "6 dB/bit")
    assert -10 * math.log10(gaussian_rd_mse(1.0)) == pytest.approx(6.0206, abs=1e-4)
    # Gish and Pierce 1968: entropy-coded uniform quantizer at high rate is
    # 10 log10(pi e / 6) = 1.53 dB, 0.254 bit, from the bound (common practice figures)
    assert ECSQ_GAP_DB == pytest.approx(1.53, abs=0.005)
    assert ECSQ_GAP_BITS == pytest.approx(0.254, abs=0.001)  # 0.2546, often quoted 0.254


def test_no_point_beats_the_gaussian_bound_on_gaussian_noise(tmp_path):
    """On white Gaussian noise the fixed schemes stay under the rate-distortion
    bound, and the file-trained Lloyd-Max lands on Max's figure (Max 1960, from
    memory; the file's histogram is only close to the density, hence 0.15 dB)."""
    rng = np.random.default_rng(7)
    x = np.clip(0.1 * rng.standard_normal(96_000), -1, 1)
    path = tmp_path / "noise.wav"
    sf.write(path, x, 48_000, subtype="DOUBLE")
    res = sweep(path, "2-3", "lloyd-max,uniform", workers=1, handle_signals=False)
    for p in res["points"]:
        assert p["snr_db"] < 20 * math.log10(2) * p["bits_per_sample"]
        if p["scheme"] == "lloyd-max":
            assert p["snr_db"] == pytest.approx(-10 * math.log10(MAX_GAUSSIAN_MSE[p["bits"]]),
                                                abs=0.15)


# -- failures, bad input, interruption ----------------------------------------------------------

def test_failed_point_is_a_row_and_the_rest_go_on(short, tmp_path):
    """A block too short for the sample rate fails that point only; exit 1;
    --json prints what sweep.json holds."""
    out = tmp_path / "o"
    r = _cli("sweep", short, "--bits", "2", "--schemes", "uniform,lloyd-max-gain",
             "--blocks", "0.01,8", "--out", out, "--workers", "2", "--json")
    assert r.returncode == 1
    assert "Traceback" not in r.stderr
    data = json.loads(r.stdout)
    assert data == json.loads((out / "sweep.json").read_text())
    status = {p["id"]: (p["status"], p["error"]) for p in data["points"]}
    assert list(status) == ["uniform-2b", "lloyd-max-gain-2b-0.01ms", "lloyd-max-gain-2b-8ms"]
    assert status["uniform-2b"] == ("done", None)
    assert status["lloyd-max-gain-2b-8ms"] == ("done", None)
    st, err = status["lloyd-max-gain-2b-0.01ms"]
    assert st == "failed" and "gain_block" in err and "\n" not in err
    assert data["complete"] is True  # every point was tried
    assert data["counts"] == {"done": 2, "failed": 1}
    assert "lloyd-max-gain-2b-0.01ms" in r.stderr


BAD_OPTIONS = [
    (["--bits", "6-2"], "--bits 6-2"),
    (["--bits", "0-3"], "--bits 0-3"),
    (["--bits", "two"], "--bits two"),
    (["--bits", "2", "--schemes", "uniform,vq"], "unknown scheme 'vq'"),
    (["--bits", "2", "--schemes", "g711-mu"], "include 8 in --bits"),
    (["--bits", "2", "--blocks", "0"], "--blocks 0"),
    (["--bits", "2", "--workers", "0"], "--workers 0"),
    (["--bits", "2", "--workers", "1", "--cluster", "local:1"], "not both"),
    (["--bits", "2", "--cluster", "nowhere"], "--cluster 'nowhere'"),
    (["--schemes", "uniform"], "--bits"),
]


def _one_error_line(stderr: str, *words: str) -> None:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("streamq: "), stderr
    for w in words:
        assert w in lines[0], stderr


@pytest.mark.parametrize("args, words", BAD_OPTIONS)
def test_bad_options_exit_2_with_one_line(short, tmp_path, capsys, args, words):
    from streamq.cli import main
    try:
        code = main(["sweep", str(short), *args, "--out", str(tmp_path / "o")])
    except SystemExit as exc:  # argparse's own errors
        code = exc.code
    assert code == 2
    cap = capsys.readouterr()
    _one_error_line(cap.err, words)
    assert cap.out == ""
    assert not (tmp_path / "o" / "sweep.csv").exists()


def test_bad_input_from_the_command_line(short, tmp_path):
    """The same through a real process: exit 2, one line, no traceback."""
    for args, words in ((["--bits", "6-2"], ["--bits 6-2"]),
                        (["--bits", "2", "--schemes", "vq"], ["--schemes", "'vq'"])):
        r = _cli("sweep", short, *args, "--out", tmp_path / "o")
        assert r.returncode == 2 and r.stdout == ""
        _one_error_line(r.stderr, *words)
    missing = tmp_path / "missing.flac"
    r = _cli("sweep", missing, "--bits", "2", "--out", tmp_path / "o")
    assert r.returncode == 2
    _one_error_line(r.stderr, str(missing), "no such file")


def test_bad_files(tmp_path):
    empty = tmp_path / "empty.wav"
    empty.write_bytes(b"")
    silent = tmp_path / "silent.wav"
    sf.write(silent, np.zeros(4800), 48_000)
    for path, words in ((tmp_path / "missing.flac", "no such file"),
                        (empty, "not a readable audio file"), (silent, "silent")):
        with pytest.raises(StreamqError) as info:
            sweep(path, 2, out_dir=tmp_path / "o", handle_signals=False)
        msg = str(info.value)
        assert "\n" not in msg and str(path) in msg and words in msg


def test_stop_keeps_finished_points(short, tmp_path):
    """A real SIGINT to this process after the first point: the sweep stops
    cleanly and its files hold the finished points, marked incomplete."""
    seen = []

    def first_done(entry):
        seen.append(entry["id"])
        if len(seen) == 1:
            os.kill(os.getpid(), signal.SIGINT)

    out = tmp_path / "o"
    res = sweep(short, "2-3", "uniform,lloyd-max-trailing,uniform-step", blocks="8,16,32",
                out_dir=out, workers=1, progress=first_done)
    assert res["complete"] is False
    done = [p for p in res["points"] if p["status"] == "done"]
    assert 1 <= len(done) < len(res["points"])
    assert {p["id"] for p in done} == set(seen)
    data = json.loads((out / "sweep.json").read_text())
    assert data["complete"] is False
    assert [p["status"] for p in data["points"]] == [p["status"] for p in res["points"]]
    with open(out / "sweep.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == len(res["points"])
    assert sum(r["status"] == "done" for r in rows) == len(done)
    assert (out / "sweep.png").is_file()
    assert not list(out.glob(".stop-*"))


def test_sigint_to_the_command_exits_130_and_keeps_points(tmp_path):
    rng = np.random.default_rng(3)
    path = tmp_path / "noise.flac"
    sf.write(path, 0.1 * rng.standard_normal(4 * 48_000), 48_000, subtype="PCM_16")
    out = tmp_path / "o"
    proc = subprocess.Popen([sys.executable, "-m", "streamq.cli", "sweep", str(path), "--bits",
                             "2-4", "--blocks", "8,16,32,64", "--out", str(out), "--workers", "1",
                             "--quiet"], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                data = json.loads((out / "sweep.json").read_text())
            except (OSError, ValueError):
                data = None
            if data and any(p["status"] == "done" for p in data["points"]):
                break
            time.sleep(0.05)
        assert proc.poll() is None, "the sweep ended before it could be interrupted"
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, stderr
    assert "Traceback" not in stderr and "interrupted" in stderr
    data = json.loads((out / "sweep.json").read_text())
    assert data["complete"] is False
    done = [p for p in data["points"] if p["status"] == "done"]
    assert 1 <= len(done) < len(data["points"])
    assert all(p["snr_db"] is not None for p in done)
    assert (out / "sweep.png").is_file()
