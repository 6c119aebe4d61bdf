"""`streamq compare`: one fan-out pass must give exactly what separate
single-method runs of the same chain give, ranked by SNR."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from streamq.errors import StreamqError
from streamq.report.compare import DEFAULT_COMPARED, SCHEMES, compare, table_lines

REPO = Path(__file__).resolve().parents[1]
AUDIO = REPO / "graphs" / "audio" / "three-part-program.flac"  # invented 9 s mono program
FIGURES = ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample", "entropy_bits",
           "codebook_updates", "samples")


def single(audio: Path, encoder_fields: str, adaptive: bool = False,
           window: str = "500 ms", hop: str = "100 ms") -> str:
    """A one-method chain, written out by hand."""
    stats = f"""
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "{window}"
hop = "{hop}"
""" if adaptive else ""
    return f"""
[graph]
name = "single"

[nodes.feed]
use = "file-source"
path = "{audio}"
{stats}
[nodes.enc]
use = "encoder"
input = "feed"
{encoder_fields}

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"
"""


def by_method(res: dict) -> dict[str, dict]:
    return {r["method"]: r for r in res["methods"]}


def file_rms(path: Path) -> float:
    x, _ = sf.read(str(path), dtype="float64", always_2d=True)
    return float(np.sqrt(np.mean(x * x)))


@pytest.fixture(scope="module")
def four_bit(tmp_path_factory):
    out = tmp_path_factory.mktemp("compare4")
    return compare(AUDIO, 4, DEFAULT_COMPARED, out_dir=out, handle_signals=False, plots=False), out


def test_every_method_equals_its_own_single_run(four_bit, tmp_path):
    res, _ = four_bit
    got = by_method(res)
    assert list(got) != [] and set(got) == set(DEFAULT_COMPARED)
    rms = file_rms(AUDIO)
    fields = {
        # uniform over +-4 RMS of the file, as documented
        "uniform": f'method = "uniform"\nbits = 4\nloading = 4.0\nscale = {got["uniform"]["settings"]["scale"]!r}',
        "mu-law": 'method = "mu-law"\nbits = 4\nscale = 0.25',
        "a-law": 'method = "a-law"\nbits = 4\nscale = 0.25',
        "lloyd-max": f'method = "lloyd-max"\nbits = 4\ntrain = "{AUDIO}"',
        "lloyd-max-adaptive": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"',
        "optimal": f'method = "optimal"\nbits = 4\ntrain = "{AUDIO}"',
        "ecsq": f'method = "ecsq"\nbits = 4\nentropy = 3.5\ntrain = "{AUDIO}"',
        # the adaptive schemes on short blocks, as the module docstring describes them
        "lloyd-max-trailing": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"',
        "lloyd-max-lookahead": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "lookahead"',
        "lloyd-max-gain": 'method = "lloyd-max"\nbits = 4\nadapt = "gain"\ngain_block = "16 ms"',
        "lloyd-max-step": 'method = "lloyd-max"\nbits = 4\nadapt = "step"',
        "uniform-step": 'method = "uniform"\nbits = 4\nadapt = "step"',
        "lloyd-max-backward": 'method = "lloyd-max"\nbits = 4\nadapt = "backward"\nwindow = "20 ms"\nhop = "5 ms"',
    }
    short = {"lloyd-max-trailing", "lloyd-max-lookahead"}
    assert got["uniform"]["settings"]["scale"] == pytest.approx(rms, rel=1e-12)
    for method, enc in fields.items():
        adaptive = method == "lloyd-max-adaptive" or method in short
        win = "32 ms" if method in short else "500 ms"
        alone = run_toml(single(AUDIO, enc, adaptive=adaptive, window=win,
                                hop="32 ms" if method in short else "100 ms"),
                         tmp_path / method)["meters"]["noise"]
        for key in FIGURES:
            assert got[method][key] == alone[key], (method, key)


def test_table_is_ranked_by_snr(four_bit):
    res, _ = four_bit
    snrs = [r["snr_db"] for r in res["methods"]]
    assert snrs == sorted(snrs, reverse=True)
    lines = table_lines(res)
    names = [line.split()[0] for line in lines[3:3 + len(DEFAULT_COMPARED)]]
    assert names == [r["method"] for r in res["methods"]]
    for line, r in zip(lines[3:], res["methods"]):
        assert f"{r['snr_db']:.2f}" in line and f"{r['segsnr_db']:.2f}" in line
        assert f"{r['bits_per_sample']:.4f}" in line
    # on a recording whose level changes by some 50 dB, retraining wins on segmental SNR
    # and a fixed design trained on the file beats a fixed uniform one on SNR
    got = by_method(res)
    fixed_or_slow = [r for r in res["methods"] if r["method"] not in SCHEMES]
    assert got["lloyd-max-adaptive"]["segsnr_db"] == max(r["segsnr_db"] for r in fixed_or_slow)
    # every row says what it is and whether it keeps to the total-rate budget (bits + 0.25)
    assert res["max_rate"] == 4.25
    for r in res["methods"]:
        assert r["label"] and r["label"] in table_lines(res)[3 + res["methods"].index(r)]
        assert r["within_rate"] == (r["bits_per_sample"] <= 4.25)
    assert got["lloyd-max"]["snr_db"] > got["uniform"]["snr_db"]


def test_settings_follow_the_documented_choices(four_bit):
    res, out = four_bit
    got = by_method(res)
    rms = res["rms"]
    report = json.loads((out / "report.json").read_text())

    def levels(method):
        return np.asarray(report["meters"][method]["codebooks"]["first"]["levels"])

    # uniform, mid-rise over +-4 RMS: outermost level half a step inside 4 RMS (common practice)
    assert levels("uniform")[-1] == pytest.approx(4 * rms * (1 - 1 / 16), abs=2 ** -15)
    # mu-law and A-law over full scale: the outermost level of a 16-level compander sits at
    # the expansion of 15/16 (compressed domain), with the laws of ITU-T G.711's continuous
    # approximations F(x) = ln(1 + mu x)/ln(1 + mu) and, above 1/A, (1 + ln(A x))/(1 + ln A)
    y = 15 / 16
    mu, a = 255.0, 87.6
    assert levels("mu-law")[-1] == pytest.approx(((1 + mu) ** y - 1) / mu, abs=2 ** -15)
    assert levels("a-law")[-1] == pytest.approx(math.exp(y * (1 + math.log(a)) - 1) / a,
                                                abs=2 ** -15)
    assert got["ecsq"]["settings"]["entropy"] == 3.5  # bits - 0.5
    for fixed in ("uniform", "mu-law", "a-law", "lloyd-max", "optimal", "ecsq"):
        assert got[fixed]["codebook_updates"] == 1
    # 9 s at a 100 ms hop: the first codebook and one per hop (the one at the very end unused)
    assert got["lloyd-max-adaptive"]["codebook_updates"] == 90
    assert got["lloyd-max-adaptive"]["side_info_bits_per_sample"] > 0


def test_ecsq_reaches_the_entropy_asked_for(tmp_path):
    res = compare(AUDIO, 4, "ecsq,lloyd-max", entropy=2.0, handle_signals=False)
    got = by_method(res)
    # trained and measured on the same file: the index entropy lands on the target
    assert got["ecsq"]["entropy_bits"] == pytest.approx(2.0, abs=0.02)
    assert got["ecsq"]["entropy_bits"] < got["lloyd-max"]["entropy_bits"]


def test_stereo_file_pools_channels(tmp_path):
    rng = np.random.default_rng(4)
    n = 48_000 * 2
    x = np.stack([0.05 * rng.laplace(size=n), 0.2 * rng.standard_normal(n)], axis=1)
    path = tmp_path / "two.wav"
    sf.write(str(path), np.clip(x, -1, 1 - 2 ** -15), 48_000, subtype="PCM_16")
    res = compare(path, 3, "uniform,lloyd-max-adaptive", handle_signals=False)
    got = by_method(res)
    rms = file_rms(path)
    assert res["channels"] == 2 and got["uniform"]["settings"]["scale"] == pytest.approx(rms)
    for method, enc in (("uniform", f'method = "uniform"\nbits = 3\nscale = {rms!r}'),
                        ("lloyd-max-adaptive",
                         'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "trailing"')):
        alone = run_toml(single(path, enc, adaptive=method != "uniform"),
                         tmp_path / method)["meters"]["noise"]
        assert got[method]["snr_db"] == pytest.approx(alone["snr_db"], abs=1e-9), method
        assert got[method]["samples"] == alone["samples"] == n


def _cli(*args, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "streamq.cli", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=300)


def test_command_line_json_and_kept_run(tmp_path):
    out = tmp_path / "kept"
    proc = _cli("compare", AUDIO, "--bits", "3", "--methods", "mu-law,lloyd-max-adaptive",
                "--json", "--out", out, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    res = json.loads(proc.stdout)
    assert [r["method"] for r in res["methods"]] == sorted(
        ("mu-law", "lloyd-max-adaptive"), key=lambda m: -by_method(res)[m]["snr_db"])
    assert res["complete"] is True and res["bits"] == 3 and res["frames"] == 9 * 48_000
    for name in ("graph.toml", "report.json", "report.html", "mu-law-codebooks.png",
                 "lloyd-max-adaptive-snr.png"):
        assert (out / name).is_file(), name
    # the kept graph file reproduces the table when run on its own
    again = _cli("run", out / "graph.toml", "--out", tmp_path / "again", "--quiet")
    assert again.returncode == 0, again.stderr
    rep = json.loads((tmp_path / "again" / "report.json").read_text())
    for r in res["methods"]:
        assert rep["meters"][r["method"]]["snr_db"] == r["snr_db"]


def test_command_line_table(tmp_path):
    proc = _cli("compare", AUDIO, "--bits", "2", "--methods", "uniform, a-law", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    assert lines[0].startswith("three-part-program.flac: 2 bits, 9.00 s, 48000 Hz")
    assert lines[1].split()[:3] == ["method", "SNR", "dB"]
    assert {lines[3].split()[0], lines[4].split()[0]} == {"uniform", "a-law"}
    assert list(tmp_path.iterdir()) == []  # without --out nothing is left behind


@pytest.mark.parametrize("args,words", [
    (["--bits", "4", "--methods", "lloyd-max,wavelet"], ["--methods", "wavelet"]),
    (["--bits", "0"], ["--bits", "0"]),
    (["--bits", "17"], ["--bits", "17"]),
    (["--bits", "4", "--methods", "g711-mu"], ["g711-mu", "--bits 8"]),
    (["--bits", "4", "--methods", ","], ["--methods"]),
    (["--bits", "4", "--entropy", "-1"], ["--entropy"]),
    (["--bits", "4", "--loading", "0"], ["--loading"]),
    (["--bits", "4", "--hop", "soon"], ["--hop", "soon"]),
])
def test_bad_options_exit_2_with_one_line(tmp_path, args, words):
    proc = _cli("compare", AUDIO, *args, cwd=tmp_path)
    assert proc.returncode == 2, (proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("streamq: "), lines
    for w in words:
        assert w in lines[0], lines[0]


def test_bad_files(tmp_path):
    missing = tmp_path / "nowhere.wav"
    proc = _cli("compare", missing, "--bits", "4", cwd=tmp_path)
    assert proc.returncode == 2 and str(missing) in proc.stderr and "Traceback" not in proc.stderr
    silent = tmp_path / "silent.wav"
    sf.write(str(silent), np.zeros((4800, 1)), 48_000, subtype="PCM_16")
    with pytest.raises(StreamqError, match="silent"):
        compare(silent, 4, "uniform", handle_signals=False)
    text = tmp_path / "notes.wav"
    text.write_text("not audio")
    with pytest.raises(StreamqError, match="not a readable audio file"):
        compare(text, 4, "uniform", handle_signals=False)


def test_g711_tables_match_audioop(tmp_path):
    """At 8 bits the G.711 methods are the standard tables: the table's SNR is that of
    a G.711 round trip made by Python's audioop (lin2ulaw/ulaw2lin, lin2alaw/alaw2lin)."""
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            import audioop
        except ImportError:  # Python 3.13+: the audioop-lts package
            audioop = pytest.importorskip("audioop")
    x, _ = sf.read(str(AUDIO), dtype="int16", always_2d=True)
    raw = x[:, 0].tobytes()
    ref = x[:, 0] / 32768.0
    res = by_method(compare(AUDIO, 8, "g711-mu,g711-a,mu-law", handle_signals=False))
    for method, enc, dec in (("g711-mu", audioop.lin2ulaw, audioop.ulaw2lin),
                             ("g711-a", audioop.lin2alaw, audioop.alaw2lin)):
        y = np.frombuffer(dec(enc(raw, 2), 2), dtype=np.int16) / 32768.0
        snr = 10 * np.log10(np.sum(ref ** 2) / np.sum((y - ref) ** 2))
        assert res[method]["snr_db"] == pytest.approx(snr, abs=1e-9), method
        assert res[method]["bits_per_sample"] == 8.0  # standard tables: no side information
        assert res[method]["codebook_updates"] == 1
