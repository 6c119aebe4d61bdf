"""The pdf-estimator's compiled window loops (streamq.nodes.estimator_kernels)
against their plain numpy definitions (tests/kernel_reference.py and the
estimator's own numpy ``window_histogram``), and the node's hop-by-hop
snapshots against the same snapshots computed from each whole window."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sst

from kernel_reference import code_counts, combined_summary, grid_code, piece_summary
from streamq.nodes.estimator import CLIP_LEVEL, snapshot_job, window_cuts, window_histogram
from streamq.nodes.estimator_kernels import (bin_window, combine_pieces, grid_fill,
                                             grid_histogram, grid_push, piece_stats)

RNG = np.random.default_rng(17)


def on_grid(x):
    """Values on the 16-bit grid, as a 16-bit file holds them."""
    return np.clip(np.round(np.asarray(x) * 32768), -32768, 32767) / 32768


def material(kind, n, channels=2, rng=RNG):
    """Windows the estimator meets: loud, quiet, constant, clipped, a DC offset."""
    x = {"laplace": lambda: rng.laplace(size=(n, channels)) * 0.1,
         "quiet": lambda: rng.laplace(size=(n, channels)) * 3e-4,
         "constant": lambda: np.full((n, channels), 0.25),
         "clipped": lambda: np.clip(rng.standard_normal((n, channels)) * 0.6, -1, 1 - 2**-15),
         "dc": lambda: 0.5 + rng.standard_normal((n, channels)) * 1e-3}[kind]()
    return on_grid(x)


KINDS = ["laplace", "quiet", "constant", "clipped", "dc"]


def test_grid_code_is_exact_on_the_16_bit_grid_and_stays_in_the_table_off_it():
    k = np.arange(-32768, 32768)
    np.testing.assert_array_equal(grid_code(k / 32768), k + 32768)  # definition of the grid
    off = np.array([np.nan, np.inf, -np.inf, -5.0, 1.0, 7.0, 1e300, 0.3e-7])
    assert np.all((grid_code(off) >= 0) & (grid_code(off) < 65536))
    fine = np.zeros((1, 65536), dtype=np.int32)
    grid_fill(off[:, None], fine)       # off the grid: counted inside the table, like numpy
    np.testing.assert_array_equal(fine, code_counts(off[:, None]))


@pytest.mark.parametrize("kind", KINDS)
def test_piece_stats_equal_numpy_definition(kind):
    ring = np.concatenate([material(kind, 3000)] * 2)      # a stretch of a doubled ring
    for a, b in [(0, 1), (10, 2990), (1500, 4500)]:
        x = ring[a:b]
        out = np.empty((2, 9))
        piece_stats(x, CLIP_LEVEL, out)
        np.testing.assert_array_equal(out, piece_summary(x, CLIP_LEVEL))
        out1 = np.empty((1, 9))
        piece_stats(x[:, 1:], CLIP_LEVEL, out1)                  # a column view
        np.testing.assert_array_equal(out1[0], out[1])


@pytest.mark.parametrize("kind", KINDS)
def test_combined_pieces_equal_numpy_definition_and_whole_window_moments(kind):
    x = material(kind, 24_000)
    cuts = [0, 1, 2400, 4800, 9000, 9001, 14_400, 24_000]
    pieces = np.stack([piece_summary(x[a:b], CLIP_LEVEL) for a, b in zip(cuts, cuts[1:])])
    out = np.empty((2, 9))
    combine_pieces(pieces, out)
    np.testing.assert_array_equal(out, combined_summary(list(pieces)))
    for c in range(2):
        v = x[:, c]
        n, total, m2, m3, m4, lo, hi, peak, clipped = out[c]
        assert (n, lo, hi, peak) == (v.size, v.min(), v.max(), np.abs(v).max())
        assert clipped == np.count_nonzero(np.abs(v) >= CLIP_LEVEL)
        # the sum of 16-bit values is exact in float64 (common practice: 2**-15 steps
        # summed 24,000 times need 30 bits), so the mean is that of sample order
        assert total / n == np.cumsum(v)[-1] / v.size
        # numpy / scipy.stats moments of the whole window (population variance, plain
        # kurtosis)
        assert m2 / n == pytest.approx(np.var(v), rel=1e-12, abs=1e-20)
        if kind != "constant":
            assert m3 / n == pytest.approx(sst.moment(v, 3), rel=1e-8, abs=1e-12 * np.var(v) ** 1.5)
            assert (m4 / n) / (m2 / n) ** 2 == pytest.approx(sst.kurtosis(v, fisher=False),
                                                             rel=1e-10)
        else:
            assert m2 == m3 == m4 == 0.0


@pytest.mark.parametrize("W", [5, 1000])
def test_grid_push_keeps_the_ring_and_the_code_counts_of_the_last_window(W):
    x = on_grid(RNG.laplace(size=(7000, 2)) * 0.2)
    buf = np.zeros((2 * W, 2))
    fine = np.zeros((2, 65536), dtype=np.int32)
    written = 0
    cuts = np.cumsum(RNG.integers(0, 2 * W, 40))
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, 7000]):
        a, b = min(a, 7000), min(b, 7000)
        grid_push(buf, written, x[a:b], fine, True)
        written = b
        last = x[max(0, b - W):b]
        np.testing.assert_array_equal(fine, code_counts(last))
        end = written % W + W
        np.testing.assert_array_equal(buf[end - last.shape[0]:end], last)


@pytest.mark.parametrize("span", ["tracked", "full-scale"])
@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("bins", [8, 1024, 65_536])
def test_grid_histogram_equals_numpy_histogram_of_the_samples(span, kind, bins):
    """The estimator's numpy definition (window_histogram) binned sample by sample."""
    x = material(kind, 24_000)
    x[0, 0], x[1, 0] = -1.0, 32767 / 32768      # channel 0 spans the whole grid
    fine = np.empty((2, 65536), dtype=np.int32)
    grid_fill(x, fine)
    np.testing.assert_array_equal(fine, code_counts(x))
    for c in range(2):
        v = x[:, c]
        centers, counts = np.empty(bins), np.empty(bins)
        grid_histogram(fine[c], v.min(), v.max(), bins, span == "tracked", centers, counts)
        c_ref, n_ref = window_histogram(v, bins, span)
        np.testing.assert_array_equal(counts, n_ref)
        np.testing.assert_array_equal(centers, c_ref)
        bin_window(v, v.min(), v.max(), bins, span == "tracked", centers, counts)
        np.testing.assert_array_equal(counts, n_ref)
        np.testing.assert_array_equal(centers, c_ref)


def test_grid_histogram_on_random_spans_and_bin_counts():
    for _ in range(300):
        bins = int(RNG.integers(8, 5000))
        lo, hi = np.sort(RNG.integers(-32768, 32768, 2))
        v = RNG.integers(lo, hi + 1, int(RNG.integers(1, 3000))) / 32768
        fine = np.zeros((1, 65536), dtype=np.int32)
        grid_fill(v[:, None], fine)
        centers, counts = np.empty(bins), np.empty(bins)
        grid_histogram(fine[0], v.min(), v.max(), bins, True, centers, counts)
        np.testing.assert_array_equal(counts, window_histogram(v, bins, "tracked")[1])


@pytest.mark.parametrize("W,H", [(400, 80), (400, 150), (7, 7), (1000, 1)])
def test_window_cuts_split_each_window_into_whole_pieces(W, H):
    """Pieces end at multiples of the hop and at window starts; every window
    [max(0, t - W), t) at a hop t is a run of them."""
    for t in range(H, 3000, H):
        have = min(W, t)
        cuts = window_cuts(t, have, W, H)
        assert cuts[0] == 0 and cuts[-1] == have and all(np.diff(cuts) > 0)
        for c in cuts[1:-1]:
            b = t - have + c
            assert b % H == 0 or (b + W) % H == 0


@pytest.mark.parametrize("grid", [True, False])
@pytest.mark.parametrize("W,H", [(400, 80), (400, 150)])
@pytest.mark.parametrize("block", [1, 97, 4096])
def test_node_snapshots_equal_snapshots_of_whole_windows(tmp_path, grid, W, H, block):
    """Offline, the node sums its windows hop by hop; live, the worker computes
    snapshot_job from a copy of each window: the same snapshots bit for bit
    (what makes a live run replay offline exactly), whatever the block size."""
    from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
    from streamq.engine.node import RunContext
    from streamq.nodes.estimator import EstimatorConfig, PdfEstimator
    rate = 8000
    x = RNG.laplace(size=(3000, 2)) * np.linspace(0.01, 0.3, 3000)[:, None]
    x = on_grid(x) if grid else x
    node = PdfEstimator("stats", EstimatorConfig(use="pdf-estimator", input="feed",
                                                 window=str(W), hop=str(H), fit="gamma"))
    spec = StreamSpec("signal", rate, 2, 0, 16 if grid else None, 3000)
    node.open({"input": spec}, RunContext(None, tmp_path, rate))
    node.ctx = RunContext(None, tmp_path, rate)
    assert node.grid == grid
    got = []
    for s in range(0, 3000, block):
        blk = x[s:s + block]
        got += node.step(blk.shape[0], {"input": Packet(SignalBlock(blk, s, rate), ())}).events
        if s == 2 * block:    # a state taken back continues exactly
            state = node.get_state()
            node.set_state(state)
    got += node.pending
    last = [None, None]
    for k, t in enumerate(range(H, 3001, H)):
        want = snapshot_job(t, x[max(0, t - W):t], node.params, last)
        last = want
        for ch in range(2):
            g, w = got[2 * k + ch], want[ch]
            assert (g.at_sample, g.channel, g.window_start) == (w.at_sample, w.channel,
                                                                w.window_start)
            np.testing.assert_array_equal(g.counts, w.counts)
            np.testing.assert_array_equal(g.centers, w.centers)
            assert g.stats == w.stats and g.model == w.model and g.drift == w.drift
            # and the histogram is the numpy one of the window's samples
            np.testing.assert_array_equal(
                g.counts, window_histogram(x[max(0, t - W):t, ch], 1024, "tracked")[1])
