"""The design() dispatcher and the `streamq design` sub-command (in process)."""

import argparse
import json
import math
import shutil
import subprocess

import numpy as np
import pytest

from streamq.design import METHODS, Codebook, design, lloyd_max_pdf
from streamq.design import command
from streamq.errors import StreamqError

RNG = np.random.default_rng(11)
SAMPLES = RNG.laplace(size=6000) * 0.1


def _opts(method):
    return {"entropy": 3.0} if method == "ecsq" else {}


@pytest.mark.parametrize("method", [m for m in METHODS if not m.startswith("g711")])
@pytest.mark.parametrize("data", ["pdf", "histogram", "samples"])
def test_every_method_on_every_data_kind(method, data):
    if data == "pdf":
        kw = {"pdf": "laplacian"}
    elif data == "histogram":
        kw = {"centers": np.sort(SAMPLES), "weights": np.ones(SAMPLES.size)}
    else:
        kw = {"samples": SAMPLES}
    cb, rep = design(method, 16, **kw, **_opts(method))
    assert isinstance(cb, Codebook)
    assert cb.size <= 16 and rep.size == cb.size
    for v in (rep.mse, rep.snr_db, rep.entropy_bits):
        assert np.isfinite(v)
    if data == "samples":
        assert rep.reference == "samples"
        assert rep.mse == pytest.approx(cb.distortion(SAMPLES), rel=1e-9)


def test_lloyd_max_dispatch_matches_direct_call():
    cb, rep = design("lloyd-max", 8, pdf="gaussian")
    cb2, rep2 = lloyd_max_pdf("gaussian", 8)
    assert cb == cb2 and rep.mse == rep2.mse
    # a named pdf takes mean/std/shape from the options
    cb3, _ = design("lloyd-max", 8, pdf="gaussian", mean=1.0, std=2.0)
    assert np.allclose(cb3.levels, 1.0 + 2.0 * cb.levels)


def test_optimal_from_pdf_is_lloyd_max_for_log_concave():
    cb, rep = design("optimal", 8, pdf="gaussian")
    lm, lm_rep = lloyd_max_pdf("gaussian", 8)
    assert rep.method == "optimal"
    assert np.allclose(cb.levels, lm.levels, atol=1e-9)


def test_large_sample_route_uses_histogram():
    x = np.random.default_rng(2).normal(size=300_000)
    cb, rep = design("lloyd-max", 8, samples=x)
    assert rep.details["route"] == "histogram"
    assert rep.mse == pytest.approx(cb.distortion(x), rel=1e-12)
    # close to the Gaussian Lloyd-Max figure (Max 1960: 0.03454)
    assert rep.mse == pytest.approx(0.03454, rel=0.02)


def test_warm_start_through_dispatcher():
    cb0, _ = design("lloyd-max", 16, samples=SAMPLES)
    cb1, rep1 = design("lloyd-max", None, samples=SAMPLES, init=cb0, version=4)
    assert cb1.version == 4 and rep1.iterations <= 2


def test_g711_and_compander_without_data():
    cb, rep = design("g711-mu")
    assert cb.size == 255 and rep.reference.startswith("uniform")
    cb, rep = design("g711-a", 256)
    assert cb.size == 256
    cb, rep = design("mu-law", 256, peak=0.5)
    assert cb.levels[-1] < 0.5
    cb, rep = design("uniform", 8, step=0.25)
    assert np.allclose(np.diff(cb.levels), 0.25)


@pytest.mark.parametrize(
    "args, kwargs, fragment",
    [
        (("k-means", 8), {"pdf": "gaussian"}, "known methods"),
        (("lloyd-max", 8), {"pdf": "cauchy"}, "known models"),
        (("lloyd-max", 8), {}, "needs data"),
        (("lloyd-max", 1), {"pdf": "gaussian"}, "between 2 and 65536"),
        (("lloyd-max", 70000), {"pdf": "gaussian"}, "between 2 and 65536"),
        (("lloyd-max", 8), {"pdf": "gaussian", "samples": SAMPLES}, "only one"),
        (("lloyd-max", 8), {"samples": [0.0, np.nan]}, "non-finite"),
        (("lloyd-max", 4), {"samples": [1e308, -1e308, 0.0]}, r"too large .* at position 0"),
        (("optimal", 4), {"samples": [0.0, 1.0, 1e200]}, r"too large .* at position 2"),
        (("uniform", 4), {"samples": [0.0, -1e200, 1.0]}, r"too large .* at position 1"),
        (("lloyd-max", 4), {"centers": [0.0, 1e200], "weights": [1, 1]},
         r"centers has a value too large .* at position 1"),
        (("lloyd-max", 8), {"samples": []}, "empty"),
        (("lloyd-max", 8), {"centers": [0.0, 1.0]}, "without weights"),
        (("g711-mu", 16), {}, "255 levels"),
        (("ecsq", 8), {"pdf": "gaussian"}, "entropy"),
        (("uniform", 8), {}, "step"),
        (("lloyd-max", 8), {"pdf": "gaussian", "bogus": 1}, "bogus"),
        (("lloyd-max", 8), {"pdf": "gaussian", "tol": float("nan")}, "tol must be finite"),
        (("lloyd-max", 8), {"samples": SAMPLES, "tol": float("nan")}, "tol must be finite"),
        (("lloyd-max", 8), {"pdf": "gaussian", "tol": -1e-3}, "tol must be at least 0"),
        (("lloyd-max", 8), {"pdf": "gaussian", "max_iter": -1}, "max_iter must be at least 0"),
        (("lloyd-max", 8), {"samples": SAMPLES, "max_iter": -1}, "max_iter must be at least 0"),
        (("lloyd-max", 8), {"pdf": "gaussian", "max_iter": "many"}, "max_iter must be an integer"),
        (("ecsq", 8), {"pdf": "gaussian", "entropy": 2.0, "max_iter": -1}, "max_iter"),
        (("ecsq", 8), {"pdf": "gaussian", "entropy": 2.0, "tol": float("nan")}, "tol"),
        (("ecsq", 8), {"pdf": "gaussian", "entropy": "abc"}, "entropy .* must be a number.*'abc'"),
        (("ecsq", 8), {"pdf": "gaussian", "multiplier": "x"}, "multiplier must be a number"),
        (("lloyd-max", 8), {"pdf": "gaussian", "version": "v1"}, "version must be an integer.*'v1'"),
        (("lloyd-max", 8), {"samples": SAMPLES, "bins": "abc"}, "bins must be an integer"),
        (("mu-law", 8), {"mu": "abc"}, "mu must be a number"),
    ],
)
def test_dispatcher_errors(args, kwargs, fragment):
    with pytest.raises(StreamqError, match=fragment):
        design(*args, **kwargs)


def test_report_to_dict_is_json_ready():
    _, rep = design("lloyd-max", 4, samples=np.repeat([0.0, 1.0], 10))
    text = json.dumps(rep.to_dict())
    assert json.loads(text)["snr_db"] == "inf"
    # a quantizer without a zero level on an all-zero signal: power 0, MSE > 0
    _, rep = design("mu-law", 8, samples=np.zeros(10))
    assert rep.mse > 0 and rep.to_dict()["snr_db"] == "-inf"


def test_entropy_is_never_negative_zero():
    # one cell holds everything: the entropy is 0.0, printed as 0.0, not -0.0
    from streamq.design import index_entropy

    assert math.copysign(1.0, index_entropy([1.0, 0.0])) == 1.0
    for kw in ({"samples": np.full(50, 0.25)},
               {"centers": [0.25], "weights": [3.0]}):
        _, rep = design("lloyd-max", 4, **kw)
        assert rep.entropy_bits == 0.0 and math.copysign(1.0, rep.entropy_bits) == 1.0
        assert '"entropy_bits": 0.0' in json.dumps(rep.to_dict())
        assert "-0.0" not in json.dumps(rep.to_dict())


# -- command -----------------------------------------------------------------


def _run(argv, capsys):
    parser = argparse.ArgumentParser(prog="streamq")
    sub = parser.add_subparsers()
    command.add_parser(sub)
    args = parser.parse_args(argv)
    code = args.func(args)
    return code, capsys.readouterr().out


def test_command_table(capsys):
    code, out = _run(["design", "--pdf", "gaussian", "--bits", "3"], capsys)
    assert code == 0
    lines = out.splitlines()
    assert "8 levels" in lines[0]
    assert len(lines) == 1 + 1 + 8 + 1
    assert "-2.1519457" in out and "mse 0.0345478" in out
    widths = {len(line) for line in lines[1:10]}
    assert len(widths) == 1  # aligned columns


def test_command_json(capsys):
    code, out = _run(["design", "--pdf", "laplacian", "--levels", "8", "--json"], capsys)
    data = json.loads(out)
    for key in ("thresholds", "levels", "mse", "snr_db", "entropy_bits", "iterations"):
        assert key in data
    assert len(data["levels"]) == 8 and len(data["thresholds"]) == 7
    assert data["snr_db"] == pytest.approx(12.64, abs=0.005)  # Paez & Glisson 1972


@pytest.mark.parametrize("method", ["optimal", "uniform", "mu-law", "a-law", "compander"])
def test_command_methods(method, capsys):
    code, out = _run(["design", "--pdf", "uniform", "--levels", "4", "--method", method,
                      "--json"], capsys)
    assert code == 0 and len(json.loads(out)["levels"]) == 4


def test_command_ecsq_needs_entropy(capsys):
    with pytest.raises(StreamqError, match="--entropy"):
        _run(["design", "--pdf", "gaussian", "--levels", "32", "--method", "ecsq"], capsys)
    code, out = _run(["design", "--pdf", "gaussian", "--levels", "32", "--method", "ecsq",
                      "--entropy", "3", "--json"], capsys)
    assert json.loads(out)["entropy_bits"] <= 3.001


def test_command_from_audio_file(tmp_path, capsys):
    sf = pytest.importorskip("soundfile")
    path = tmp_path / "two-channel.wav"
    data = np.stack([SAMPLES[:3000], SAMPLES[3000:]], axis=1)
    sf.write(path, data, 48000, subtype="FLOAT")
    code, out = _run(["design", "--from", str(path), "--levels", "8", "--json"], capsys)
    res = json.loads(out)
    assert res["source"]["samples"] == 6000  # channels pooled
    cb, rep = design("lloyd-max", 8, samples=data.astype(np.float32).astype(np.float64))
    assert res["mse"] == pytest.approx(rep.mse, rel=1e-12)
    with pytest.raises(StreamqError, match="no such file"):
        _run(["design", "--from", str(tmp_path / "missing.wav"), "--levels", "8"], capsys)
    bad = tmp_path / "bad.wav"
    bad.write_bytes(b"not audio at all")
    with pytest.raises(StreamqError, match="cannot read"):
        _run(["design", "--from", str(bad), "--levels", "8"], capsys)


def test_command_export(tmp_path, capsys):
    prefix = str(tmp_path / "fw-gauss16")
    code, out = _run(["design", "--pdf", "gaussian", "--levels", "16", "--export", prefix],
                     capsys)
    assert code == 0 and "wrote" in out
    data = json.load(open(prefix + ".json"))
    cb = Codebook(data["levels"], data["thresholds"])
    assert cb == lloyd_max_pdf("gaussian", 16)[0]
    rows = open(prefix + ".csv").read().splitlines()
    assert rows[0] == "index,from,to,level" and len(rows) == 17
    assert rows[1].split(",")[1] == "-inf"
    header = open(prefix + ".h").read()
    assert "static const double fw_gauss16_levels[16]" in header
    assert "static const float fw_gauss16_thresholds_f[15]" in header
    cc = shutil.which("cc")
    if cc:
        src = tmp_path / "use.c"
        src.write_text('#include "fw-gauss16.h"\nint main(void){return (int)(fw_gauss16_levels[0]'
                       ' > 0) + (int)(fw_gauss16_thresholds_f[0] > 0);}\n')
        res = subprocess.run([cc, "-Wall", "-Werror", "-Wno-unused-const-variable", "-I",
                              str(tmp_path), str(src), "-o", str(tmp_path / "use")],
                             capture_output=True, text=True)
        assert res.returncode == 0, res.stderr


def test_command_bad_sizes(capsys):
    with pytest.raises(StreamqError, match="--bits"):
        _run(["design", "--pdf", "gaussian", "--bits", "0"], capsys)
    with pytest.raises(StreamqError, match="between 2 and 65536"):
        _run(["design", "--pdf", "gaussian", "--levels", "1"], capsys)
    with pytest.raises(SystemExit):
        _run(["design", "--pdf", "cauchy", "--levels", "4"], capsys)


def test_command_ecsq_missed_target_warns(tmp_path, capsys):
    parser = argparse.ArgumentParser(prog="streamq")
    command.add_parser(parser.add_subparsers())
    args = parser.parse_args(["design", "--pdf", "uniform", "--levels", "8", "--method", "ecsq",
                              "--entropy", "2.5", "--json"])
    assert args.func(args) == 0
    cap = capsys.readouterr()
    data = json.loads(cap.out)
    assert data["entropy_bits"] <= 2.5 and len(data["levels"]) >= 4
    assert data["details"]["target_missed"] is True
    err = [line for line in cap.err.splitlines() if line.strip()]
    assert len(err) == 1 and err[0].startswith("streamq: warning: ecsq") and "2.5-bit" in err[0]
    # on target: no warning
    args = parser.parse_args(["design", "--pdf", "uniform", "--levels", "8", "--method", "ecsq",
                              "--entropy", "2", "--json"])
    assert args.func(args) == 0
    cap = capsys.readouterr()
    assert cap.err == "" and json.loads(cap.out)["mse"] == pytest.approx(1 / 16, rel=1e-6)


@pytest.mark.parametrize("prefix, fragment", [
    ("{tmp}/", "give a file name prefix"),
    ("{tmp}/.", "give a file name prefix"),
    ("", "give a file name prefix"),
    ("{tmp}/missing/fw", "folder {tmp}/missing does not exist"),
    ("{tmp}/plain.txt/fw", "folder {tmp}/plain.txt is not a folder"),
])
def test_command_export_bad_prefix_refused_before_designing(tmp_path, capsys, prefix, fragment):
    from streamq.cli import main

    (tmp_path / "plain.txt").write_text("x")
    prefix = prefix.format(tmp=tmp_path)
    capsys.readouterr()
    code = main(["design", "--pdf", "gaussian", "--levels", "8", "--export", prefix])
    cap = capsys.readouterr()
    assert code == 2
    assert cap.out == ""  # refused before the table is printed
    lines = [line for line in cap.err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("streamq: --export")
    assert fragment.format(tmp=tmp_path) in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plain.txt"]  # no hidden .json/.csv/.h
