"""Uniform quantizers, companders, G.711 and the high-rate theory.

Sources named beside each check: Max (1960) optimum uniform steps, the
6.02 N + 1.76 dB rule (common practice), Smith (1957) for the continuous
mu-law, Jayant & Noll (1984) for the continuous A-law, Python's audioop
(stdlib on 3.11/3.12, audioop-lts on 3.13+) for G.711, Panter & Dite (1951),
the Gaussian rate-distortion function (Shannon 1959).
"""

import math
import warnings

import numpy as np
import pytest

from streamq.design import (
    a_law_compress,
    a_law_expand,
    compander_codebook,
    g711_code_map,
    g711_codebook,
    g711_decode,
    g711_encode,
    gaussian_rd_mse,
    lloyd_max_pdf,
    mu_law_compress,
    mu_law_expand,
    optimal_compander_pdf,
    panter_dite_mse,
    pcm_sine_snr_db,
    pcm_sine_snr_rule_db,
    uniform_codebook,
    uniform_pdf,
)
from streamq.errors import StreamqError


def _audioop():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            import audioop  # stdlib up to 3.12, audioop-lts on 3.13+
        except ImportError:
            pytest.skip("neither the stdlib audioop nor audioop-lts is importable")
    return audioop


# -- uniform -------------------------------------------------------------------


@pytest.mark.parametrize("N", range(8, 17))
def test_full_scale_sine_snr_rule(N):
    # common practice: N-bit uniform PCM on a full-scale sine, 6.02 N + 1.76 dB
    # Full scale is taken as the top reconstruction level A - step/2: a sine
    # peaking at A itself spends its peaks (where the arcsine density piles
    # up) inside the outermost cell, which costs 0.13 dB at 8 bits.
    A = 1.0
    step = 2 * A / 2**N
    t = np.arange(1_000_000)
    x = (A - step / 2) * np.sin(2 * np.pi * t * (1 / math.pi / 7.3))  # incommensurate
    cb = uniform_codebook(2**N, step, kind="mid-rise")
    err = x - cb.quantize(x)
    snr = 10 * math.log10(np.mean(x * x) / np.mean(err * err))
    assert snr == pytest.approx(6.02 * N + 1.76, abs=0.1)
    assert pcm_sine_snr_db(N) == pytest.approx(pcm_sine_snr_rule_db(N), abs=0.02)


# Max (1960), Table II (optimum uniform quantizer, unit Gaussian), from memory:
# step size and mean squared error
MAX_UNIFORM = {2: (1.596, 0.3634), 4: (0.9957, 0.1188), 8: (0.5860, 0.03744),
               16: (0.3352, 0.01154)}


@pytest.mark.parametrize("L", sorted(MAX_UNIFORM))
def test_max_optimum_uniform_step(L):
    step, mse = MAX_UNIFORM[L]
    cb, rep = uniform_pdf("gaussian", L)
    assert rep.details["step"] == pytest.approx(step, rel=1.5e-3)
    assert rep.mse == pytest.approx(mse, rel=1.5e-3)
    # the optimum uniform quantizer is never better than Lloyd-Max
    assert rep.mse >= lloyd_max_pdf("gaussian", L)[1].mse * (1 - 1e-12)


def test_loading_factor_and_kinds():
    cb = uniform_codebook(16, loading=4.0, std=0.5)
    assert np.allclose(np.diff(cb.levels), 2 * 4.0 * 0.5 / 16)
    assert np.allclose(cb.levels, -cb.levels[::-1])  # mid-rise: symmetric, no zero level
    assert 0.0 not in cb.levels
    tread = uniform_codebook(16, 0.25, kind="mid-tread")
    assert 0.0 in tread.levels and tread.levels[0] == -8 * 0.25 and tread.levels[-1] == 7 * 0.25
    with pytest.raises(StreamqError):
        uniform_codebook(16)
    with pytest.raises(StreamqError):
        uniform_codebook(16, -1.0)
    with pytest.raises(StreamqError, match="kind"):
        uniform_codebook(16, 1.0, kind="mid-air")


# -- continuous companders -----------------------------------------------------


def test_mu_and_a_law_round_trip_and_shape():
    x = np.linspace(-2, 2, 2001)
    assert np.allclose(mu_law_expand(mu_law_compress(x, peak=2), peak=2), x, atol=1e-12)
    assert np.allclose(a_law_expand(a_law_compress(x, peak=2), peak=2), x, atol=1e-12)
    # continuous mu-law c(x) = ln(1 + mu x) / ln(1 + mu) (Smith 1957), at
    # G.711's mu = 255: 1 % of peak compresses to about 23 %
    assert mu_law_compress(0.01) == pytest.approx(math.log1p(2.55) / math.log1p(255))
    # continuous A-law (Jayant & Noll 1984) is linear below peak/A with slope
    # A / (1 + ln A), about 16 at G.711's A = 87.6
    slope = a_law_compress(0.001) / 0.001
    assert slope == pytest.approx(87.6 / (1 + math.log(87.6)))
    # ITU-T G.711's 13-segment A-law approximates that curve: its central
    # segment (bit-exact codec, checked against audioop below) has steps of 16
    # int16 units where a uniform 8-bit quantizer has 65536 / 256 = 256, i.e.
    # slope 256 / 16 = 16, within 0.1 % of the continuous A / (1 + ln A)
    k = np.arange(-300, 300).astype(np.int16)
    codes = g711_encode(k, "a")
    steps = np.diff(k[np.flatnonzero(codes[1:] != codes[:-1]) + 1])
    assert set(steps.tolist()) == {16}
    assert slope == pytest.approx(256 / 16, rel=1e-3)


@pytest.mark.parametrize("law", ["mu-law", "a-law"])
@pytest.mark.parametrize("L", [16, 256, 1024])
def test_compander_codebook_is_expanded_uniform(law, L):
    # common practice: a compander quantizer is compressor, uniform quantizer,
    # expander; so the compressed thresholds and levels are equally spaced
    cb = compander_codebook(law, L, peak=0.8)
    comp = mu_law_compress if law == "mu-law" else a_law_compress
    y = comp(cb.levels, peak=0.8)
    t = comp(cb.thresholds, peak=0.8)
    assert np.allclose(np.diff(y), 1.6 / L, rtol=1e-9)
    assert np.allclose(np.diff(t), 1.6 / L, rtol=1e-9)
    assert cb.levels[-1] < 0.8 and cb.thresholds[-1] < 0.8


# -- G.711 ---------------------------------------------------------------------


@pytest.mark.parametrize("law", ["mu", "a"])
def test_g711_bit_exact_with_audioop(law):
    audioop = _audioop()
    enc = audioop.lin2ulaw if law == "mu" else audioop.lin2alaw
    dec = audioop.ulaw2lin if law == "mu" else audioop.alaw2lin
    k = np.arange(-32768, 32768).astype(np.int16)
    want = np.frombuffer(enc(k.astype("<i2").tobytes(), 2), dtype=np.uint8)
    assert np.array_equal(g711_encode(k, law), want)
    codes = np.arange(256, dtype=np.uint8)
    want_d = np.frombuffer(dec(codes.tobytes(), 2), dtype="<i2")
    assert np.array_equal(g711_decode(codes, law), want_d)
    # shape is kept
    assert g711_encode(k.reshape(256, 256), law).shape == (256, 256)


@pytest.mark.parametrize("law, size", [("mu", 255), ("a", 256)])
def test_g711_codebook_reproduces_g711(law, size):
    cb = g711_codebook(law)
    assert cb.size == size
    rank_to_code, code_to_rank = g711_code_map(law)
    k = np.arange(-32768, 32768)
    codes = g711_encode(k.astype(np.int16), law)
    ranks = cb.encode(k / 32768.0)
    assert np.array_equal(rank_to_code[ranks], codes)
    assert np.array_equal(code_to_rank[codes], ranks)
    assert np.array_equal(cb.decode(ranks) * 32768.0, g711_decode(codes, law).astype(float))
    assert np.array_equal(cb.encode_int16(k.astype(np.int16)), ranks)
    # thresholds sit on half-integers of the 16-bit scale
    assert np.array_equal(cb.thresholds * 32768 + 0.5, np.round(cb.thresholds * 32768 + 0.5))


def test_g711_input_errors():
    with pytest.raises(StreamqError):
        g711_encode(np.array([0.5]), "mu")
    with pytest.raises(StreamqError):
        g711_decode(np.array([300]), "a")
    with pytest.raises(StreamqError, match="law"):
        g711_encode(np.zeros(2, np.int16), "b-law")


# -- theory --------------------------------------------------------------------


def test_panter_dite_at_8_bits():
    # Panter & Dite (1951): D = (sqrt(3) pi / 2) 2^(-2R) for a unit Gaussian
    _, rep = lloyd_max_pdf("gaussian", 256)
    pd = math.sqrt(3) * math.pi / 2 * 2.0 ** (-16)
    assert panter_dite_mse("gaussian", 8) == pytest.approx(pd, rel=1e-12)
    assert rep.mse == pytest.approx(pd, rel=0.02)


@pytest.mark.parametrize("bits", range(1, 9))
def test_lloyd_max_never_beats_rate_distortion(bits):
    # Shannon: no quantizer of rate R beats sigma^2 2^(-2R) on a Gaussian
    _, rep = lloyd_max_pdf("gaussian", 2**bits)
    assert rep.mse > gaussian_rd_mse(bits)
    assert rep.entropy_bits <= bits


def test_optimal_compander_approaches_panter_dite():
    # Bennett (1948), Panter & Dite (1951): the p^(1/3) compander reaches the
    # high-rate distortion, and Lloyd-Max is at least as good at any rate
    for name in ("gaussian", "laplacian"):
        cb, rep = optimal_compander_pdf(name, 1024)
        assert rep.mse == pytest.approx(panter_dite_mse(name, 10), rel=0.02)
        assert rep.mse >= lloyd_max_pdf(name, 1024)[1].mse * (1 - 1e-9)
