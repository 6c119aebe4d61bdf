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
    monkeypatch.setattr(streamq.runner, "write_report_pages", lambda out_dir, report: [])


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
    import streamq.nodes.schemes.window as enc_mod
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
    from streamq.nodes.schemes.backward import BackwardAdapter
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


# -- exponential forgetting ---------------------------------------------------------------

@pytest.mark.parametrize("half_life", [1, 37.5, 400])
def test_half_life_weights_equal_numpy_weighted_moments(half_life):
    """With ``half_life`` h a sample of age a (0 = newest) weighs 2**(-a / h); the
    window's moments are the weighted ones (numpy.average with those weights)."""
    from streamq.nodes.estimator import snapshot_job
    rng = np.random.default_rng(8)
    win = np.stack([0.2 * rng.standard_normal(1000) + 0.05,
                    rng.laplace(0.0, 0.1, 1000)], axis=1)
    params = {"bins": 256, "span": "tracked", "half_life": half_life, "fit": "none"}
    snaps = snapshot_job(5000, win, params, [None, None])
    w = 0.5 ** (np.arange(999, -1, -1) / half_life)
    for ch, snap in enumerate(snaps):
        x = win[:, ch]
        mean = np.average(x, weights=w)
        var = np.average((x - mean) ** 2, weights=w)
        kurt = np.average((x - mean) ** 4, weights=w) / var ** 2
        assert snap.stats["mean"] == pytest.approx(mean, rel=1e-12, abs=1e-15)
        assert snap.stats["variance"] == pytest.approx(var, rel=1e-12)
        assert snap.stats["kurtosis"] == pytest.approx(kurt, rel=1e-10)
        # the histogram carries the same weights: total and first moment
        assert snap.counts.sum() == pytest.approx(w.sum(), rel=1e-12)
        width = snap.centers[1] - snap.centers[0]
        assert np.dot(snap.centers, snap.counts) / snap.counts.sum() == pytest.approx(
            mean, abs=width / 2)


# -- maximum-likelihood fits against scipy.stats ---------------------------------------------

def test_fits_match_scipy_stats_maximum_likelihood():
    """fit_model works on the window's histogram (1024 bins) with the location at
    the histogram's mean; the references are scipy.stats' ``.fit`` (maximum
    likelihood) on the samples themselves, with the location fixed at that mean
    where fit_model fixes it (gennorm, gamma). Tolerances allow for the binning."""
    import scipy.stats as st
    from scipy import special
    rng = np.random.default_rng(4)
    n = 200_000

    def fit(name, x):
        c, w = window_histogram(x, 1024, "tracked")
        return fit_model(name, c, w)

    x = 0.3 + 0.1 * rng.standard_normal(n)
    m = fit("gaussian", x)
    loc, scale = st.norm.fit(x)                               # scipy.stats.norm.fit
    assert m["mean"] == pytest.approx(loc, abs=1e-5)
    assert m["std"] == pytest.approx(scale, rel=1e-4)

    x = 0.3 + rng.laplace(0.0, 0.05, n)
    m = fit("laplacian", x)
    loc, b = st.laplace.fit(x)                                # scipy.stats.laplace.fit
    # the ML location of a Laplacian is the median; fit_model keeps the mean
    assert m["mean"] == pytest.approx(loc, abs=0.01 * b)   # (sampling: both ~ b / sqrt(n))
    assert m["std"] == pytest.approx(b * np.sqrt(2.0), rel=1e-3)

    for beta in (0.7, 1.5, 4.0):
        x = 0.1 + st.gennorm.rvs(beta, scale=0.05, size=n, random_state=rng)
        m = fit("generalized-gaussian", x)
        b, _, scale = st.gennorm.fit(x, floc=m["mean"])       # scipy.stats.gennorm.fit
        assert m["shape"] == pytest.approx(b, rel=0.01)
        std = scale * np.sqrt(special.gamma(3 / b) / special.gamma(1 / b))
        assert m["std"] == pytest.approx(std, rel=0.005)

    for a in (0.5, 1.0, 2.0):
        x = -0.05 + st.dgamma.rvs(a, scale=0.03, size=n, random_state=rng)
        m = fit("gamma", x)
        # two-sided gamma: |x - mean| ~ Gamma(a, theta)        scipy.stats.gamma.fit
        aa, _, theta = st.gamma.fit(np.abs(x - m["mean"]), floc=0)
        assert m["shape"] == pytest.approx(aa, rel=0.03)
        assert m["std"] == pytest.approx(theta * np.sqrt(aa * (aa + 1)), rel=0.015)


# -- the drift trigger and the minimum interval ---------------------------------------------

def test_drift_trigger_and_minimum_interval(tmp_path):
    """trigger = "drift": a design only when the Jensen-Shannon divergence between the
    hop's window and the one the codebook in force was designed on passes the
    threshold, and never sooner than min_interval after the last one. The rule is
    replayed here on the estimator's own snapshots of the written reference."""
    from streamq.engine.indexio import IndexReader
    from streamq.nodes.estimator import js_drift, snapshot_job
    W, H, interval, threshold = 400, 80, 240, 0.1   # 50 ms, 10 ms, 30 ms at 8 kHz
    text = f"""
[graph]
name = "drift"
sample_rate = {RATE}
[nodes.feed]
use = "test-signal"
scene = "drift"
seconds = 3
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "{W}"
hop = "{H}"
[nodes.enc]
use = "encoder"
input = "feed"
pdf = "stats"
bits = 3
adapt = "trailing"
trigger = "drift"
drift_threshold = {threshold}
min_interval = "{interval}"
[nodes.idx]
use = "index-sink"
input = "enc"
path = "i.sqi"
[nodes.ref]
use = "file-sink"
input = "feed"
path = "reference.wav"
subtype = "DOUBLE"
"""
    rep = run_toml(text, tmp_path)
    with IndexReader(tmp_path / "i.sqi") as reader:
        at = [u.at_sample for pkt in reader for u in pkt.events]
    x, _ = sf.read(tmp_path / "reference.wav", always_2d=True)
    params = {"bins": 1024, "span": "tracked", "half_life": None, "fit": "none"}
    expect, ref, last = [0], None, None
    held = {"interval": 0, "threshold": 0}
    for t in range(H, x.shape[0], H):    # a design at the very end would never apply
        snap = snapshot_job(t, x[max(0, t - W):t], params, [None])[0]
        if last is not None and t - last < interval:
            held["interval"] += 1
            continue
        if ref is None or js_drift(ref.centers, ref.counts, snap.centers, snap.counts) > threshold:
            expect.append(t)
            ref, last = snap, t
        else:
            held["threshold"] += 1
    assert at == expect
    assert np.all(np.diff(at[1:]) >= interval)
    # both rules held designs back on this scene
    assert held["interval"] > 20 and held["threshold"] > 20 and len(at) > 20, held
    assert rep["nodes"]["enc"]["codebook_updates"] == len(at)


# -- decoder errors that name the sample ---------------------------------------------------

def _decoder(tmp_path, channels: int, levels: int):
    from streamq.engine.blocks import StreamSpec
    from streamq.engine.node import RunContext
    from streamq.nodes.decoder import Decoder, DecoderConfig
    dec = Decoder("dec", DecoderConfig(use="decoder", input="enc"))
    dec.open({"input": StreamSpec("index", RATE, channels, extra={"n_levels": levels})},
             RunContext(None, tmp_path, RATE))
    return dec


def _update(ch, at, levels):
    from streamq.engine.blocks import CodebookUpdate
    lv = np.linspace(-0.5, 0.5, levels)
    return CodebookUpdate(1, at, ch, 0.5 * (lv[1:] + lv[:-1]), lv, 0)


def test_decoder_refuses_indices_without_a_codebook_naming_the_sample(tmp_path):
    from streamq.engine.blocks import IndexBlock, Packet
    dec = _decoder(tmp_path, 2, 4)
    idx = np.zeros((256, 2), np.uint8)
    # channel 0 has its codebook from sample 0, channel 1 only from sample 100
    pkt = Packet(IndexBlock(idx, 0, RATE), (_update(0, 0, 4), _update(1, 100, 4)))
    with pytest.raises(StreamqError) as err:
        dec.step(256, {"input": pkt})
    msg = str(err.value)
    assert "node 'dec'" in msg and "without a codebook" in msg
    assert "at sample 0, channel 1" in msg and "\n" not in msg


@pytest.mark.parametrize("with_event", [False, True])
def test_decoder_refuses_an_index_out_of_range_naming_the_sample(tmp_path, with_event):
    from streamq.engine.blocks import IndexBlock, Packet
    dec = _decoder(tmp_path, 1, 4)
    first = np.zeros((256, 1), np.uint8)
    out = dec.step(256, {"input": Packet(IndexBlock(first, 0, RATE), (_update(0, 0, 4),))})
    assert np.all(out.block.data == -0.5)
    bad = np.ones((256, 1), np.uint8)
    bad[37, 0] = 7
    events = (_update(0, 300, 4),) if with_event else ()
    with pytest.raises(StreamqError) as err:
        dec.step(256, {"input": Packet(IndexBlock(bad, 256, RATE), events)})
    msg = str(err.value)
    assert "node 'dec'" in msg and "index 7 out of range" in msg and "4 levels" in msg
    assert "at sample 293, channel 0" in msg and "\n" not in msg


# -- the meter against numpy and scipy on the written files -------------------------------

METER_CHAIN = f"""
[graph]
name = "meter"
sample_rate = {RATE}
[nodes.feed]
use = "test-signal"
scene = "drift"
seconds = 3
channels = 2
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "100 ms"
hop = "25 ms"
[nodes.enc]
use = "encoder"
input = "feed"
pdf = "stats"
bits = 3
adapt = "trailing"
[nodes.dec]
use = "decoder"
input = "enc"
[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"
spectrum_size = 1024
[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "DOUBLE"
[nodes.ref]
use = "file-sink"
input = "feed"
path = "reference.wav"
subtype = "DOUBLE"
[nodes.idx]
use = "index-sink"
input = "enc"
path = "indices.sqi"
"""


@pytest.fixture(scope="module")
def metered(tmp_path_factory):
    """One metered run (trailing 3-bit Lloyd-Max, two channels): its report, the
    written reference and decoded samples, and the index file's indices and
    codebook announcements."""
    from streamq.engine.indexio import IndexReader
    out = tmp_path_factory.mktemp("meter")
    rep = run_toml(METER_CHAIN, out, block=333)["meters"]["noise"]
    ref, _ = sf.read(out / "reference.wav", always_2d=True)
    dec, _ = sf.read(out / "decoded.wav", always_2d=True)
    blocks, updates = [], []
    with IndexReader(out / "indices.sqi") as reader:
        for pkt in reader:
            blocks.append(pkt.block.data)
            updates.extend(pkt.events)
    return out, rep, ref, dec, np.concatenate(blocks), updates


def _periods(updates, ch: int, n: int):
    """(start, stop, levels) of each codebook of channel ``ch`` over [0, n)."""
    mine = sorted((u for u in updates if u.channel == ch), key=lambda u: u.at_sample)
    starts = [u.at_sample for u in mine] + [n]
    return [(a, b, np.asarray(u.levels)) for u, a, b in zip(mine, starts[:-1], starts[1:]) if b > a]


def test_meter_noise_split_equals_numpy(metered):
    """Overload = reference samples beyond the outermost reconstruction levels of the
    codebook in force (README); granular = the rest of the noise."""
    _, rep, ref, dec, _, updates = metered
    n, C = ref.shape
    err2 = (dec - ref) ** 2
    over = np.zeros_like(ref, dtype=bool)
    for ch in range(C):
        for a, b, lv in _periods(updates, ch, n):
            over[a:b, ch] = (ref[a:b, ch] < lv[0]) | (ref[a:b, ch] > lv[-1])
    assert over.sum() > 0 and (~over).sum() > 0
    assert rep["overload_samples"] == int(over.sum())
    assert rep["overload_noise_power"] == pytest.approx(err2[over].sum() / (n * C), rel=1e-9)
    assert rep["granular_noise_power"] == pytest.approx(err2[~over].sum() / (n * C), rel=1e-9)


def test_meter_index_entropy_equals_numpy(metered):
    """Index entropy per codebook period, -sum p log2 p of the indices coded with
    each codebook, averaged over periods weighted by their samples (README)."""
    _, rep, ref, _, idx, updates = metered
    n, C = ref.shape
    total, weight = 0.0, 0
    for ch in range(C):
        for a, b, _ in _periods(updates, ch, n):
            counts = np.bincount(idx[a:b, ch].astype(np.int64))
            p = counts[counts > 0] / (b - a)
            total += (b - a) * float(-(p * np.log2(p)).sum())
            weight += b - a
    assert weight == n * C
    assert rep["entropy_bits"] == pytest.approx(total / weight, rel=1e-12)


def test_meter_spectra_equal_scipy_welch(metered):
    """The meter's Welch spectra (spectrum_size samples per segment, periodic Hann,
    no overlap, one-sided density, channels averaged) against
    scipy.signal.welch(window="hann", noverlap=0, nperseg=spectrum_size) on the
    written files, with detrend=False (the meter removes no mean per segment)."""
    from scipy import signal
    out, rep, ref, dec, _, _ = metered
    rows = _read_csv(out / rep["spectrum_csv"])
    freqs, ps = signal.welch(ref, fs=RATE, window="hann", nperseg=1024, noverlap=0,
                             detrend=False, axis=0)
    _, pn = signal.welch(dec - ref, fs=RATE, window="hann", nperseg=1024, noverlap=0,
                         detrend=False, axis=0)
    assert len(rows) == freqs.size
    np.testing.assert_allclose([float(r["frequency_hz"]) for r in rows], freqs, atol=5e-4)
    db = lambda p: 10 * np.log10(np.maximum(p.mean(axis=1), 1e-30))  # noqa: E731
    # the CSV keeps 3 decimals (dB)
    np.testing.assert_allclose([float(r["signal_psd_db"]) for r in rows], db(ps), atol=6e-4)
    np.testing.assert_allclose([float(r["noise_psd_db"]) for r in rows], db(pn), atol=6e-4)
