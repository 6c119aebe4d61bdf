"""The adaptive chain's nodes one at a time: the estimator's fits and
statistics, the encoder's design failures, the decoder's errors, the meter's
figures, each checked against an independent computation (the source of each
reference is named beside it)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from robust.util import run_cli
from streamq.design.pdfs import pdf_model
from streamq.errors import StreamqError
from streamq.nodes.estimator import FITS, SHAPE_RANGE, fit_model, window_histogram

RATE = 8000


@pytest.fixture(autouse=True)
def _no_plots(monkeypatch):
    import streamq.runner
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda result: [])


# -- windows without spread: silence and DC ------------------------------------------

MODEL_CHAIN = """
[graph]
name = "still"
[nodes.src]
use = "file-source"
path = "{path}"
[nodes.stats]
use = "pdf-estimator"
input = "src"
window = "50 ms"
hop = "10 ms"
fit = "{fit}"
[nodes.enc]
use = "encoder"
input = "src"
pdf = "stats"
bits = 4
adapt = "trailing"
design_from = "model"
[nodes.dec]
use = "decoder"
input = "enc"
[nodes.noise]
use = "error-meter"
reference = "src"
input = "dec"
"""


@pytest.mark.filterwarnings("error::RuntimeWarning")
@pytest.mark.parametrize("content", ["silence", "dc"])
@pytest.mark.parametrize("fit", FITS)
def test_silence_and_dc_run_with_every_fit(tmp_path, capsys, fit, content):
    """A window with no spread drove the two-sided gamma's ML shape to ~1e4 and the
    model's normalisation overflowed (a traceback); every fit now runs to the end,
    with no RuntimeWarning either."""
    x = np.zeros(RATE) if content == "silence" else np.full(RATE, 0.3)
    sf.write(str(tmp_path / "in.wav"), x, RATE, subtype="PCM_16")
    g = tmp_path / "g.toml"
    g.write_text(MODEL_CHAIN.format(path="in.wav", fit=fit))
    res = run_cli(capsys, "run", g, "--out", tmp_path / "o", "--quiet")
    assert res.code == 0, res
    assert "Traceback" not in res.err
    import json
    report = json.loads((tmp_path / "o" / "report.json").read_text())
    assert report["complete"] and report["samples"] == RATE
    assert "design_errors" not in report["nodes"]["enc"]


@pytest.mark.parametrize("fit", FITS)
@pytest.mark.parametrize("value", [0.0, 0.3, -0.7])
def test_fit_of_a_constant_window_is_finite_and_in_range(fit, value):
    with np.errstate(all="raise"):   # no floating-point trouble inside the fit either
        centers, counts = window_histogram(np.full(4000, value), 1024, "tracked")
        m = fit_model(fit, centers, counts)
    assert math.isfinite(m["std"]) and m["std"] < 1e-6
    assert m["mean"] == pytest.approx(value, abs=1e-6)
    if fit in SHAPE_RANGE:
        lo, hi = SHAPE_RANGE[fit]
        assert lo <= m["shape"] <= hi


def test_pdf_models_take_extreme_shapes_without_overflow():
    # log-gamma forms: math.gamma(1e4) overflows, theta**1e4 underflows
    z = np.array([0.0, 0.5, 1.0, 3.0])
    for shape in (1e-3, 0.05, 8.0, 1e4):
        m = pdf_model("gamma", 0.0, 1.0, shape)
        p = m.pdf(z[1:])
        assert np.all(np.isfinite(p)) and np.all(p >= 0)
        m0, m1, m2 = m.partial_moments(np.array([-np.inf]), np.array([np.inf]))
        assert m0[0] == pytest.approx(1.0) and m2[0] == pytest.approx(1.0)
        assert math.isfinite(m.cube_root_integral())
    for shape in (0.01, 20.0):
        m = pdf_model("generalized-gaussian", 0.0, 1.0, shape)
        _, _, m2 = m.partial_moments(np.array([-np.inf]), np.array([np.inf]))
        assert m2[0] == pytest.approx(1.0)
    with pytest.raises(StreamqError, match="too small"):
        pdf_model("generalized-gaussian", 0.0, 1.0, 1e-3)


def test_failed_design_keeps_the_codebook_in_force_and_is_counted(tmp_path, monkeypatch):
    import streamq.nodes.encoder as enc_mod
    real = enc_mod.design_job
    bad_at = 2400   # a hop (10 ms = 80 samples at 8 kHz)

    def flaky(snap, init, recipe):
        if snap.at_sample == bad_at:
            raise StreamqError("no design for you")
        return real(snap, init, recipe)

    monkeypatch.setattr(enc_mod, "design_job", flaky)
    text = f"""
[graph]
name = "flaky"
sample_rate = {RATE}
[nodes.feed]
use = "test-signal"
scene = "noise"
seconds = 0.5
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "50 ms"
hop = "10 ms"
[nodes.enc]
use = "encoder"
input = "feed"
pdf = "stats"
bits = 3
adapt = "trailing"
[nodes.idx]
use = "index-sink"
input = "enc"
path = "i.sqi"
"""
    rep = run_toml(text, tmp_path)
    enc = rep["nodes"]["enc"]
    assert enc["design_errors"] == 1
    assert f"sample {bad_at}, channel 0" in enc["design_error"] and "no design" in enc["design_error"]
    # the first codebook, then one design per hop (the one at the very end would
    # apply after the last sample) except the failed one: the codebook before it
    # stays in force until the next hop
    from streamq.engine.indexio import IndexReader
    with IndexReader(tmp_path / "i.sqi") as reader:
        at = [u.at_sample for pkt in reader for u in pkt.events]
    assert at == [0] + [t for t in range(80, 4000, 80) if t != bad_at]
    assert enc["codebook_updates"] == len(at)


# -- backward adaptation ---------------------------------------------------------------

@pytest.mark.parametrize("method", ["lloyd-max", "uniform"])
@pytest.mark.parametrize("levels", [2, 8, 16])
def test_backward_scale_estimate_settles_on_the_input_scale(method, levels):
    """Stationary Gaussian noise of standard deviation 0.05: the scale the backward
    adapter settles on, from decoded samples only, is the input's (the decoded
    variance of the unit design is sigma**2 * V; V = 1 - D only for Lloyd-Max: a
    uniform quantizer's was taken as 1 - D, and at 1 bit the scale ran away)."""
    from streamq.nodes.coding import BackwardAdapter
    rng = np.random.default_rng(11)
    x = 0.05 * rng.standard_normal(96_000)
    ad = BackwardAdapter({"method": method, "levels": levels, "window": 24_000, "hop": 4_800,
                          "model": "gaussian", "scale": 0.1, "options": {"loading": 4.0}}, 1)
    out = np.empty_like(x)

    def segment(a, b, cb):
        out[a:b] = cb.levels[cb.encode(x[a:b])]
        return out[a:b]

    ad.run(0, 0, x.size, segment)
    # two levels decode every input to +-a, so the decoded past carries no scale:
    # the estimate must stay where it started (it ran away before), not learn 0.05
    expect = 0.1 if levels == 2 else 0.05
    assert ad.std[0] == pytest.approx(expect, rel=0.03)


# -- the estimator's windows CSV ---------------------------------------------------------

def _read_csv(path):
    import csv
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


@pytest.mark.parametrize("fit", ["none", "gamma"])
def test_estimator_writes_one_row_per_hop_with_numpy_moments(tmp_path, fit):
    W, H = 400, 80   # 50 ms and 10 ms at 8 kHz
    text = f"""
[graph]
name = "windows"
sample_rate = {RATE}
[nodes.feed]
use = "test-signal"
scene = "drift"
seconds = 1.23
channels = 2
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "{W}"
hop = "{H}"
fit = "{fit}"
[nodes.ref]
use = "file-sink"
input = "feed"
path = "reference.wav"
subtype = "DOUBLE"
"""
    rep = run_toml(text, tmp_path, block=97)
    assert rep["nodes"]["stats"]["windows_csv"] == "stats-windows.csv"
    rows = _read_csv(tmp_path / "stats-windows.csv")
    x, _ = sf.read(tmp_path / "reference.wav", always_2d=True)
    hops = list(range(H, x.shape[0] + 1, H))
    assert [(int(r["at_sample"]), int(r["channel"])) for r in rows] == \
        [(t, ch) for t in hops for ch in range(2)]
    for r in rows:
        t, ch = int(r["at_sample"]), int(r["channel"])
        win = x[max(0, t - W):t, ch]
        assert int(r["samples"]) == win.size
        # the CSV keeps 6 significant digits
        assert float(r["mean"]) == pytest.approx(np.mean(win), rel=1e-5, abs=1e-12)
        assert float(r["variance"]) == pytest.approx(np.var(win), rel=1e-5)
        assert float(r["peak"]) == pytest.approx(np.max(np.abs(win)), rel=1e-5)
        assert int(r["clipped"]) == 0
    assert rows[0]["drift"] == "" and all(r["drift"] for r in rows[2:])
    if fit == "gamma":
        assert all(0.05 <= float(r["model_shape"]) <= 8 for r in rows)
    else:
        assert "model_std" not in rows[0]
