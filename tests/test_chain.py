"""The adaptive chain: estimator -> encoder -> decoder -> meter, checked
against published figures and independent computations."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from streamq.design.sideinfo import decode_levels, encode_levels

RATE = 48000


def chain(scene_table: str, enc_table: str, *, window="500 ms", hop="100 ms", extra="") -> str:
    return f"""
[graph]
name = "t"
sample_rate = {RATE}

[nodes.feed]
{scene_table}

[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "{window}"
hop = "{hop}"

[nodes.enc]
use = "encoder"
input = "feed"
{enc_table}

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
{extra}
"""


NOISE = 'use = "test-signal"\nscene = "noise"\npdf = "{pdf}"\nlevel = -20\nseconds = {seconds}\nseed = 3'


# Published 8-level (3-bit) minimum-MSE quantizers for unit-variance PDFs. Both figures are
# recalled from the tables, not re-read from the papers (from memory):
# - J. Max (1960), "Quantizing for minimum distortion", IRE Transactions on Information
#   Theory IT-6(1), 7-12: Gaussian, D = 0.03454 -> 14.62 dB;
# - M. D. Paez and T. H. Glisson (1972), "Minimum mean-squared-error quantization in speech
#   PCM and DPCM systems", IEEE Transactions on Communications COM-20(2), 225-230:
#   Laplacian, 12.64 dB.
@pytest.mark.parametrize("pdf,published", [
    ("gaussian", 14.62),   # Max (1960), from memory
    ("laplacian", 12.64),  # Paez & Glisson (1972), from memory
])
def test_stationary_adaptive_snr_matches_published_tables(tmp_path, pdf, published):
    text = chain(NOISE.format(pdf=pdf, seconds=20),
                 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "trailing"',
                 window="2 s", hop="500 ms")
    rep = run_toml(text, tmp_path)["meters"]["noise"]
    assert abs(rep["snr_db"] - published) < 0.3, rep["snr_db"]


def test_meter_snr_equals_numpy_on_written_files(tmp_path):
    text = chain('use = "test-signal"\nscene = "drift"\nseconds = 6\nchannels = 2',
                 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"')
    rep = run_toml(text, tmp_path)["meters"]["noise"]
    ref, _ = sf.read(tmp_path / "reference.wav")
    dec, _ = sf.read(tmp_path / "decoded.wav")
    err = dec - ref
    snr = 10 * np.log10(np.sum(ref ** 2) / np.sum(err ** 2))
    assert rep["snr_db"] == pytest.approx(snr, abs=1e-9)
    # segmental SNR, 20 ms frames clamped to [-10, 35] dB (common practice)
    F = int(0.02 * RATE)
    K = ref.shape[0] // F
    vals = []
    for ch in range(2):
        r = ref[:K * F, ch].reshape(K, F)
        e = err[:K * F, ch].reshape(K, F)
        s = np.sum(r ** 2, axis=1)
        n = np.sum(e ** 2, axis=1)
        with np.errstate(divide="ignore"):
            v = np.clip(10 * np.log10(s / n), -10, 35)
        v[n == 0] = 35
        vals.append(v[~((s == 0) & (n == 0))])
    assert rep["segsnr_db"] == pytest.approx(np.concatenate(vals).mean(), abs=1e-9)
    assert rep["peak_abs_error"] == pytest.approx(np.max(np.abs(err)), abs=0)


def test_drift_scene_adaptive_beats_fixed_beats_uniform(tmp_path):
    # write the drift scene to a file so the fixed design can train on all of it
    text = chain('use = "test-signal"\nscene = "drift"\nseconds = 15\nbits = 16',
                 'method = "lloyd-max"\nbits = 4')
    run_toml(text, tmp_path / "prep")
    src = tmp_path / "prep" / "reference.wav"
    feed = f'use = "file-source"\npath = "{src}"'
    adaptive = run_toml(chain(feed, 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"'),
                        tmp_path / "a")["meters"]["noise"]
    fixed = run_toml(chain(feed, f'method = "lloyd-max"\nbits = 4\ntrain = "{src}"'),
                     tmp_path / "f")["meters"]["noise"]
    uniform = run_toml(chain(feed, 'method = "uniform"\nbits = 4\nscale = 0.25'),
                       tmp_path / "u")["meters"]["noise"]
    assert adaptive["snr_db"] > fixed["snr_db"] > uniform["snr_db"]
    assert adaptive["segsnr_db"] > fixed["segsnr_db"]

    # count the side information independently: every codebook in the index
    # file, coded with our own Rice length formula, must give the same bits
    from streamq.engine.indexio import IndexReader
    total_side = 0
    updates = 0
    with IndexReader(tmp_path / "a" / "indices.sqi") as reader:
        for pkt in reader:
            for u in pkt.events:
                q = np.round(np.asarray(u.levels) * 2 ** 15).astype(np.int64)
                d = np.diff(q)
                rice = min(int(np.sum(d >> k)) + d.size * (1 + k) for k in range(32))
                assert u.side_info_bits == 16 + 5 + rice
                payload, nbits = encode_levels(u.levels)
                assert nbits == u.side_info_bits
                np.testing.assert_array_equal(decode_levels(payload, len(u.levels)), u.levels)
                total_side += u.side_info_bits
                updates += 1
    frames = adaptive["frames"]
    assert adaptive["codebook_updates"] == updates
    assert adaptive["side_info_bits"] == total_side
    assert adaptive["side_info_bits_per_sample"] == pytest.approx(total_side / frames)
    assert adaptive["bits_per_sample"] == pytest.approx(4 + total_side / frames)
    # 15 s at a 100 ms hop: the first codebook plus 150 retrains (the last at the very end
    # of the input is never used)
    assert updates == 150


MODES = {
    "fixed": 'method = "lloyd-max"\nbits = 3\nscale = 0.05',
    "trailing": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "trailing"',
    "trailing-drift": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "trailing"\n'
                      'trigger = "drift"\ndrift_threshold = 0.02\nmin_interval = "20 ms"',
    "trailing-apply-after": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "trailing"\n'
                            'apply_after = "7 ms"',
    "lookahead": 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 3\nadapt = "lookahead"',
    "backward": 'method = "lloyd-max"\nbits = 3\nadapt = "backward"\nwindow = "40 ms"\nhop = "10 ms"',
    "ecsq": 'pdf = "stats"\nmethod = "ecsq"\nbits = 4\nentropy = 2.5\nadapt = "trailing"',
    "mu-law": 'method = "mu-law"\nbits = 4',
}


@pytest.mark.parametrize("mode", sorted(MODES))
def test_block_size_invariance_every_mode(tmp_path, mode):
    # block 1 is slow (one Python step per sample): keep the signal short
    text = chain('use = "test-signal"\nscene = "drift"\nseconds = 0.12\nchannels = 2',
                 MODES[mode], window="20 ms", hop="5 ms")
    reports, decoded, indices = [], [], []
    for block in (1, 7, 256, 65536):
        out = tmp_path / f"b{block}"
        rep = run_toml(text, out, block=block, graph_dir=tmp_path)
        rep.pop("graph_file", None)
        for o in rep["outputs"].values():
            o.pop("path", None)
        reports.append(json.dumps(rep, sort_keys=True))
        # float WAVs carry a time stamp in their PEAK chunk: compare the samples
        decoded.append(sf.read(out / "decoded.wav")[0].tobytes())
        indices.append((out / "indices.sqi").read_bytes())
        for name in ("noise-series.csv", "noise-spectrum.csv", "stats-windows.csv"):
            p = out / name
            reports[-1] += p.read_text() if p.exists() else ""
    assert all(r == reports[0] for r in reports[1:])
    assert all(d == decoded[0] for d in decoded[1:])
    assert all(i == indices[0] for i in indices[1:])


def test_adaptive_ecsq_meets_its_entropy_target_like_a_cold_start(tmp_path):
    """Warm starts must not collapse an entropy-constrained design: the first
    adaptive design on the drift scene's quiet opening must not start from the
    (far wider) model codebook, and cells an ECSQ design dropped must come back."""
    scene = 'use = "test-signal"\nscene = "drift"\nseconds = 6'
    enc = 'pdf = "stats"\nmethod = "ecsq"\nbits = 4\nentropy = 3\nadapt = "trailing"'
    warm = run_toml(chain(scene, enc), tmp_path / "warm")["meters"]["noise"]
    cold = run_toml(chain(scene, enc + "\nwarm_start = false"), tmp_path / "cold")["meters"]["noise"]
    # (on shorter scenes the parts change faster than a trailing design follows, and
    # warm and cold starts alike overshoot the target)
    assert abs(warm["entropy_bits"] - 3.0) < 0.15, warm["entropy_bits"]
    assert warm["snr_db"] > cold["snr_db"] - 1.0, (warm["snr_db"], cold["snr_db"])


def test_warm_start_refuses_collapsed_or_too_wide_codebooks():
    from streamq.design import Codebook
    from streamq.design import lloyd_kernels as K
    from streamq.nodes.coding import pad_levels
    centers = np.linspace(-1, 1, 201)
    counts = np.where(np.abs(centers) <= 0.5, 1.0, 0.0)

    def start(cb):
        """The encoder's choice for this window: WARM (from cb) or COLD."""
        levels = K.NO_LEVELS if cb is None else cb.levels
        return K.design_window(centers, counts, 8, levels, 0, 0, 0.0, 0)[0]

    fits = Codebook(levels=np.linspace(-0.4, 0.4, 8))
    assert start(fits) == K.WARM
    assert start(None) == K.COLD
    # two distinct levels padded to eight: collapsed
    collapsed = pad_levels(Codebook(levels=[-0.1, 0.1]), 8)
    assert len(collapsed.levels) == 8
    assert start(collapsed) == K.COLD
    # outer levels beyond the window's occupied range: too wide
    assert start(Codebook(levels=np.linspace(-0.9, 0.9, 8))) == K.COLD


def _announcements(path):
    from streamq.engine.indexio import IndexReader
    reader = IndexReader(path)
    try:
        return [u for pkt in reader for u in pkt.events]
    finally:
        reader.close()


def test_apply_after_delays_each_codebook_by_exactly_that(tmp_path):
    """A design from the window ending at t applies from t + apply_after: the same
    codebooks as with apply_after = 0, each announced exactly that much later
    (the first codebooks, in force from sample 0, stay put)."""
    scene = 'use = "test-signal"\nscene = "drift"\nseconds = 1.5\nchannels = 2'
    enc = MODES["trailing"]
    runs = {}
    for name, extra in (("now", ""), ("later", '\napply_after = "30 ms"')):
        out = tmp_path / name
        runs[name] = run_toml(chain(scene, enc + extra), out)
        runs[name + "-events"] = _announcements(out / "indices.sqi")
    now, later = runs["now-events"], runs["later-events"]
    shift = 30 * RATE // 1000
    assert len(now) == len(later) > 2 * 10
    for a, b in zip(now, later):
        assert (a.channel, a.version) == (b.channel, b.version)
        assert b.at_sample == (a.at_sample + shift if a.at_sample else 0)
        np.testing.assert_array_equal(a.levels, b.levels)
    assert runs["now"]["meters"]["noise"]["snr_db"] != runs["later"]["meters"]["noise"]["snr_db"]


def test_lookahead_latency_declared_and_compensated(tmp_path):
    base = 'use = "test-signal"\nscene = "noise"\npdf = "laplacian"\nlevel = -20\nseconds = 8'
    look = run_toml(chain(base, MODES["lookahead"], window="200 ms", hop="200 ms"),
                    tmp_path / "l")["meters"]["noise"]
    trail = run_toml(chain(base, MODES["trailing"], window="200 ms", hop="200 ms"),
                     tmp_path / "t")["meters"]["noise"]
    assert look["latency_frames"] == int(0.2 * RATE)
    assert trail["latency_frames"] == 0
    # aligned by the meter, the delayed output measures as well as (or better than) trailing
    assert look["snr_db"] > trail["snr_db"] - 0.05
    # independent check: decoded[d:] against reference[:-d]
    d = look["latency_frames"]
    ref, _ = sf.read(tmp_path / "l" / "reference.wav")
    dec, _ = sf.read(tmp_path / "l" / "decoded.wav")
    snr = 10 * np.log10(np.sum(ref[:-d] ** 2) / np.sum((dec[d:] - ref[:-d]) ** 2))
    assert look["snr_db"] == pytest.approx(snr, abs=1e-9)
    assert look["samples"] == ref.shape[0] - d


def test_backward_mode_no_side_info_and_decoder_matches_encoder_shadow(tmp_path):
    text = chain('use = "test-signal"\nscene = "drift"\nseconds = 6', MODES["backward"])
    rep = run_toml(text, tmp_path)["meters"]["noise"]
    assert rep["side_info_bits"] == 0
    assert rep["bits_per_sample"] == 3
    assert rep["snr_db"] > 10
    # the encoder's shadow codebooks (in the index file) rebuild exactly the decoder's output
    from streamq.engine.indexio import IndexReader
    dec, _ = sf.read(tmp_path / "decoded.wav", always_2d=True)
    levels = None
    rebuilt = []
    with IndexReader(tmp_path / "indices.sqi") as reader:
        for pkt in reader:
            cuts = sorted(pkt.events, key=lambda u: u.at_sample)
            idx = pkt.block.data[:, 0]
            pos = 0
            for u in cuts + [None]:
                end = pkt.block.frames if u is None else u.at_sample - pkt.block.start
                if end > pos:
                    rebuilt.append(levels[idx[pos:end]])
                    pos = end
                if u is not None:
                    levels = np.asarray(u.levels)
    np.testing.assert_array_equal(np.concatenate(rebuilt), dec[:, 0])


@pytest.mark.parametrize("method", ["lloyd-max", "uniform"])
def test_backward_mode_follows_a_dc_offset(tmp_path, method):
    """DC 0.3 plus a little noise lies beyond the first codebook (Gaussian, 0.1):
    the decoded past sat at the top level with variance zero and the codebook
    shrank onto it for the whole file (about 11 dB). The overload rule grows the
    scale when nearly a whole hop decodes to one outer level."""
    rng = np.random.default_rng(5)
    x = 0.3 + 1e-3 * rng.standard_normal(3 * RATE)
    sf.write(tmp_path / "dc.wav", x, RATE, subtype="DOUBLE")
    feed = f'use = "file-source"\npath = "{tmp_path / "dc.wav"}"'
    enc = f'method = "{method}"\nbits = 3\nadapt = "backward"'
    # the decoder checks every codebook it derives against the encoder's shadow
    # announcements and stops on the first difference (bit-exact mirror)
    rep = run_toml(chain(feed, enc), tmp_path / "o")["meters"]["noise"]
    assert rep["side_info_bits"] == 0
    ref, _ = sf.read(tmp_path / "o" / "reference.wav")
    dec, _ = sf.read(tmp_path / "o" / "decoded.wav")
    after = slice(RATE, None)   # from one second on
    snr = 10 * np.log10(np.sum(ref[after] ** 2) / np.sum((dec[after] - ref[after]) ** 2))
    assert snr > 30, snr


def test_index_file_decodes_bit_identical_in_another_graph(tmp_path):
    for mode in ("trailing", "backward", "lookahead"):
        out = tmp_path / mode
        run_toml(chain('use = "test-signal"\nscene = "drift"\nseconds = 3\nchannels = 2',
                       MODES[mode]), out)
        text = f"""
[graph]
name = "far-end"
sample_rate = {RATE}
[nodes.src]
use = "index-source"
path = "{out / 'indices.sqi'}"
[nodes.dec]
use = "decoder"
input = "src"
[nodes.keep]
use = "file-sink"
input = "dec"
path = "far.wav"
subtype = "DOUBLE"
"""
        run_toml(text, out / "far", block=333)
        a, _ = sf.read(out / "decoded.wav")
        b, _ = sf.read(out / "far" / "far.wav")
        np.testing.assert_array_equal(a, b)


def test_report_shape(tmp_path):
    text = chain('use = "test-signal"\nscene = "drift"\nseconds = 2',
                 'pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"')
    rep = run_toml(text, tmp_path)
    m = rep["meters"]["noise"]
    for key in ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample",
                "entropy_bits", "codebook_updates", "samples", "peak_abs_error",
                "granular_noise_power", "overload_noise_power"):
        assert key in m
    assert m["granular_noise_power"] + m["overload_noise_power"] == pytest.approx(m["noise_power"])
    assert 0 < m["entropy_bits"] <= 4
    assert (tmp_path / "noise-series.csv").exists() and (tmp_path / "noise-spectrum.csv").exists()
