"""Histogram and sample-exact Lloyd designs.

Reference checks: scikit-learn's KMeans (Lloyd's algorithm from a given
start) and the defining properties of Lloyd's iteration (Lloyd 1957/1982:
the distortion never increases; fixed points meet the centroid and
nearest-neighbour conditions).
"""

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from streamq.design import (
    Codebook,
    histogram_prefix,
    lloyd_max_histogram,
    lloyd_max_samples,
    sample_histogram,
)
from streamq.errors import StreamqError


@st.composite
def histograms(draw):
    n = draw(st.integers(min_value=1, max_value=300))
    centers = np.sort(np.array(draw(st.lists(
        st.floats(min_value=-50, max_value=50, allow_nan=False), min_size=n, max_size=n))))
    weights = np.array(draw(st.lists(
        st.one_of(st.just(0.0), st.floats(min_value=0.0, max_value=1e3)), min_size=n,
        max_size=n)))
    if not weights.sum() > 0:
        weights[draw(st.integers(0, n - 1))] = 1.0
    L = draw(st.integers(min_value=2, max_value=40))
    warm = draw(st.booleans())
    return centers, weights, L, warm


@settings(max_examples=150, deadline=None)
@given(histograms())
# found by CI: a subnormal weight next to a weight of 1 is below the running
# sums' resolution, so the iteration sees zero distortion and the direct
# measure of the returned codebook does not
@example((np.arange(8.0) * 0 + np.eye(8)[7], np.eye(8)[6] + 2.22507386e-311 * np.eye(8)[7],
          2, False))
def test_property_distortion_never_increases_never_nan(case):
    # Lloyd (1982): each step can only lower the distortion
    c, w, L, warm = case
    init = None
    if warm:
        init = Codebook(np.linspace(-60, 60, L))  # often leaves cells empty
    cb, rep = lloyd_max_histogram(c, w, L, init=init, record=True, tol=0.0, max_iter=100)
    h = np.array(rep.history)
    assert np.all(np.isfinite(h))
    mean = float(np.dot(w, c) / w.sum())
    scale = float(np.dot(w, (c - mean) ** 2) / w.sum()) + 1e-300  # variance
    # float64 resolves a distortion only to about eps * power: for data far
    # from zero compared with its spread, the mean enters the rounding
    slack = 1e-11 * scale + 1e-12 * mean * mean
    # a weight below eps * total vanishes from the running sums the iteration
    # uses, while the final figure is measured directly: the two differ by up
    # to eps * (that weight's distance from the mean)^2 (common practice:
    # float64 rounding of cumulative sums)
    slack += 1e-13 * float(np.max((c[w > 0] - mean) ** 2))
    assert np.all(np.diff(h) <= slack)
    if h.size:
        assert rep.mse <= h[-1] + slack
    assert np.all(np.isfinite(cb.levels)) and np.all(np.isfinite(cb.thresholds))
    assert np.isfinite(rep.mse) and np.isfinite(rep.entropy_bits) and not np.isnan(rep.snr_db)
    assert cb.size == L
    # the reported figures are those of the returned codebook
    idx = np.searchsorted(cb.thresholds, c, side="right")
    mse = float(np.dot(w, (c - cb.levels[idx]) ** 2) / w.sum())
    # prefix sums about the mean: absolute error of order eps * power
    assert rep.mse == pytest.approx(mse, rel=1e-9, abs=slack)


def test_fixed_point_meets_lloyd_conditions():
    rng = np.random.default_rng(5)
    x = rng.laplace(size=20000)
    c, w = sample_histogram(x, 2048)
    cb, rep = lloyd_max_histogram(c, w, 12, tol=0.0, max_iter=100000)
    assert rep.converged
    idx = np.searchsorted(cb.thresholds, c, side="right")
    s0 = np.bincount(idx, weights=w, minlength=12)
    s1 = np.bincount(idx, weights=w * c, minlength=12)
    assert np.allclose(s1 / s0, cb.levels, rtol=0, atol=1e-12)  # centroid condition
    assert np.allclose(cb.thresholds, 0.5 * (cb.levels[1:] + cb.levels[:-1]))


def test_prefix_variant_and_warm_start_match():
    rng = np.random.default_rng(6)
    c, w = sample_histogram(rng.normal(size=5000), 1024)
    cold, _ = lloyd_max_histogram(c, w, 16)
    pre = histogram_prefix(c, w)
    a, ra = lloyd_max_histogram(c, w, init=cold)
    b, rb = lloyd_max_histogram(prefix=pre, init=cold)
    assert a == b and ra == rb
    assert ra.iterations <= 2  # already a fixed point


def test_empty_cells_split_the_worst_cell():
    c = np.linspace(-1, 1, 201)
    w = np.ones_like(c)
    init = Codebook([-1.0, 5.0, 6.0, 7.0])  # three levels with no data at all
    cb, rep = lloyd_max_histogram(c, w, init=init, tol=0.0, max_iter=1000)
    assert np.all(np.isfinite(cb.levels))
    assert cb.levels.max() < 1.0  # every level moved into the data
    assert rep.mse < np.var(c) / 4


def test_constant_signal_documented_codebook():
    x = np.full(1000, 0.3)
    cb, rep = lloyd_max_samples(x, 8)
    assert cb.size == 8 and np.all(np.diff(cb.thresholds) > 0)
    assert rep.mse == 0.0 and rep.entropy_bits == 0.0 and rep.snr_db == np.inf
    assert cb.decode(cb.encode([0.3]))[0] == 0.3
    # levels spread by 1e-9 * max(1, |v|) around the constant
    assert np.allclose(np.diff(cb.levels), 1e-9)
    zero, rz = lloyd_max_histogram([0.0], [5.0], 4)
    assert rz.mse == 0.0 and zero.decode(zero.encode([0.0]))[0] == 0.0


def test_fewer_values_than_levels_each_kept_exactly():
    x = np.repeat([-0.5, 0.1, 0.7], [10, 20, 30])
    cb, rep = lloyd_max_samples(x, 16)
    assert rep.mse == 0.0
    assert np.array_equal(cb.decode(cb.encode(x)), x)


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        (dict(centers=[0.0, 1.0], weights=[1.0, np.nan], levels=4), "non-finite"),
        (dict(centers=[0.0, np.inf], weights=[1.0, 1.0], levels=4), "non-finite"),
        (dict(centers=[1.0, 0.0], weights=[1.0, 1.0], levels=4), "sorted"),
        (dict(centers=[0.0, 1.0], weights=[1.0, -1.0], levels=4), "non-negative"),
        (dict(centers=[0.0, 1.0], weights=[0.0, 0.0], levels=4), "zero"),
        (dict(centers=[], weights=[], levels=4), "empty"),
        (dict(centers=[0.0, 1.0], weights=[1.0, 1.0], levels=1), "between 2 and 65536"),
        (dict(centers=[0.0, 1.0], weights=[1.0, 1.0], levels=65537), "between 2 and 65536"),
    ],
)
def test_bad_histograms(kwargs, fragment):
    with pytest.raises(StreamqError, match=fragment):
        lloyd_max_histogram(**kwargs)


def test_bad_samples():
    with pytest.raises(StreamqError, match="non-finite"):
        lloyd_max_samples([0.0, np.inf, 1.0], 2)
    with pytest.raises(StreamqError, match="empty"):
        lloyd_max_samples([], 2)
    with pytest.raises(StreamqError, match="init has"):
        lloyd_max_samples([0.0, 1.0, 2.0], 4, init=Codebook([0.0, 1.0]))


def _kmeans():
    return pytest.importorskip("sklearn.cluster").KMeans


@pytest.mark.parametrize("seed, L", [(0, 4), (1, 8), (2, 16), (3, 32)])
def test_sample_lloyd_reaches_kmeans_or_better(seed, L):
    # scikit-learn KMeans (Lloyd's algorithm) from the same start, n_init=1
    KMeans = _kmeans()
    rng = np.random.default_rng(seed)
    x = np.concatenate((rng.laplace(size=3000), rng.normal(3.0, 0.3, size=1000)))
    start = np.sort(rng.choice(x, L, replace=False))
    km = KMeans(n_clusters=L, init=start.reshape(-1, 1), n_init=1, algorithm="lloyd",
                tol=1e-10, max_iter=3000).fit(x.reshape(-1, 1))
    km_mse = km.inertia_ / x.size
    cb, rep = lloyd_max_samples(x, L, init=start)
    assert rep.converged
    assert rep.mse <= km_mse * (1 + 1e-9)
    assert rep.mse == pytest.approx(cb.distortion(x), rel=1e-9)


def test_sample_histogram_keeps_counts_and_mean():
    rng = np.random.default_rng(9)
    x = rng.normal(size=10000)
    c, w = sample_histogram(x, 512)
    assert w.sum() == 10000
    assert np.dot(c, w) / w.sum() == pytest.approx(x.mean(), abs=1e-12)
    with pytest.raises(StreamqError):
        sample_histogram([np.nan], 4)
