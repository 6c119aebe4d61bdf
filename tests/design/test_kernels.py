"""The compiled kernels against the numpy definitions they must equal exactly."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from streamq.design.kernels import decode_rows, encode_rows, encode_span, monitor_block


def reference(x, th):
    """numpy's searchsorted, channel by channel (the definition of an encoder)."""
    return np.stack([np.searchsorted(th[c], x[:, c], side="right") for c in range(x.shape[1])],
                    axis=1)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.uint32])
@pytest.mark.parametrize("channels", [1, 2, 3])
def test_encode_rows_equals_searchsorted(dtype, channels):
    rng = np.random.default_rng(7)
    L = 2 ** {np.uint8: 8, np.uint16: 12, np.uint32: 17}[dtype]
    th = np.sort(rng.laplace(size=(channels, L - 1)) * 0.1, axis=1)
    x = rng.laplace(size=(4096, channels)) * 0.1
    # ties: values exactly on thresholds land in the cell above (side="right")
    x[:100] = th[:, rng.integers(0, L - 1, 100)].T
    x[100:110] = np.array([np.nan, np.inf, -np.inf, 0.0, -0.0, 1e300, -1e300, 5e-324, 1.0, -1.0])[:, None]
    out = np.empty(x.shape, dtype=dtype)
    encode_rows(x, np.ascontiguousarray(th), out)
    np.testing.assert_array_equal(out, reference(x, th))


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 40).flatmap(lambda m: st.tuples(
    hnp.arrays(np.float64, (2, m), elements=st.floats(-2, 2, allow_nan=False)),
    hnp.arrays(np.float64, (16, 2), elements=st.floats(-3, 3) | st.just(np.nan)))))
def test_encode_rows_equals_searchsorted_any_thresholds(case):
    th, x = case
    th = np.ascontiguousarray(np.sort(th, axis=1))   # duplicates allowed
    out = np.empty(x.shape, dtype=np.uint8)
    encode_rows(x, th, out)
    np.testing.assert_array_equal(out, reference(x, th))


def _span_case(rng, m, bunched):
    """Thresholds (ascending, some tied or bunched) and values hitting them,
    their neighbours, the ends and the non-finite values."""
    th = np.sort(rng.laplace(size=m) * 0.1)
    if bunched:     # half of them within 1e-12 of each other: many to a grid cell
        th[: m // 2] = th[m // 2] + np.arange(m // 2) * 1e-14
        th.sort()
    if m > 4:
        th[2] = th[1]   # a tie
    x = np.concatenate([rng.laplace(size=20 * m + 300) * 0.12, th, np.nextafter(th, -np.inf),
                        np.nextafter(th, np.inf),
                        [np.nan, np.inf, -np.inf, 0.0, -0.0, 1e300, -1e300, 5e-324]])
    return th, x


@pytest.mark.parametrize("m", [1, 2, 3, 4, 15, 16, 17, 255, 4095])
@pytest.mark.parametrize("bunched", [False, True])
def test_encode_span_equals_searchsorted(m, bunched):
    """Both of its routes (grid for long stretches, search for short ones),
    with spread and bunched thresholds, against numpy's searchsorted, in
    column views."""
    rng = np.random.default_rng(m)
    th, x = _span_case(rng, m, bunched)
    for n in (x.size, min(3 * m, x.size), 5):     # long: grid; short: search
        block = np.stack([x[:n], x[:n][::-1]], axis=1)    # columns are strided views
        out = np.zeros((n, 2), dtype=np.uint16)
        encode_span(block[:, 1], th, out[:, 1])
        np.testing.assert_array_equal(out[:, 1], np.searchsorted(th, block[:, 1], side="right"))
        assert not out[:, 0].any()


def test_encode_span_bunched_thresholds_share_a_cell():
    # nine thresholds in the grid's first cell: searched within the cell
    th = np.concatenate([np.linspace(0.0, 1e-15, 9), [0.5, 1.0]])
    x = np.linspace(-0.1, 1.1, 5000)
    out = np.empty(x.size, dtype=np.uint8)
    encode_span(x, th, out)
    np.testing.assert_array_equal(out, np.searchsorted(th, x, side="right"))


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 40).flatmap(lambda m: st.tuples(
    hnp.arrays(np.float64, m, elements=st.floats(-2, 2, allow_nan=False)),
    hnp.arrays(np.float64, st.integers(0, 400), elements=st.floats(-3, 3) | st.just(np.nan)))))
def test_encode_span_equals_searchsorted_any_thresholds(case):
    th, x = case
    th = np.sort(th)   # duplicates allowed
    out = np.empty(x.shape, dtype=np.uint8)
    encode_span(x, th, out)
    np.testing.assert_array_equal(out, np.searchsorted(th, x, side="right"))


def test_decode_rows_equals_table_lookup_and_finds_bad_indices():
    rng = np.random.default_rng(3)
    table = np.ascontiguousarray(np.sort(rng.standard_normal((2, 16)), axis=1))
    idx = rng.integers(0, 16, size=(500, 2)).astype(np.uint8)
    out = np.empty((500, 2))
    assert decode_rows(idx, table, out) == -1
    np.testing.assert_array_equal(out, np.stack([table[c][idx[:, c]] for c in range(2)], axis=1))
    idx[123, 1] = 16
    assert decode_rows(idx, table, out) == 123 * 2 + 1


def monitor_reference(x, ref, g0_db, g1_db, limit_gain, release, ceiling):
    """The monitor's definition in plain numpy (see monitor_block's docstring)."""
    n = x.shape[0]
    g = 10.0 ** ((g0_db + (g1_db - g0_db) * np.arange(1, n + 1) / n) / 20.0)
    y = ((x - ref) if ref.shape[0] else x) * g[:, None]
    y[~np.isfinite(y)] = 0.0
    peak = np.abs(y).max()
    new = min(ceiling / peak if peak > ceiling else 1.0, limit_gain * release, 1.0)
    lg = (limit_gain + (new - limit_gain) * np.arange(1, n + 1) / n if new > limit_gain
          else np.full(n, new))
    out = np.clip(y * lg[:, None], -ceiling, ceiling)
    return new, peak, np.abs(out).max(), out


@pytest.mark.parametrize("case", ["steady", "fade", "loud", "recover", "nan"])
def test_monitor_block_equals_numpy_definition(case):
    rng = np.random.default_rng(11)
    x = rng.standard_normal((128, 2)) * 0.3
    ref = x + rng.standard_normal((128, 2)) * 0.01
    args = {"steady": (x, ref, -20.0, -20.0, 1.0, 1.0),
            "fade": (x, np.empty((0, 2)), -40.0, -39.5, 1.0, 1.0),
            "loud": (x * 10, np.empty((0, 2)), 6.0, 6.0, 1.0, 1.0),
            "recover": (x, ref, 0.0, 0.0, 0.2, 1.5),
            "nan": (np.where(rng.random((128, 2)) < 0.1, np.nan, x), np.empty((0, 2)), 0.0, 0.0,
                    1.0, 1.0)}[case]
    ceiling = 10 ** (-1 / 20)
    out = np.empty((128, 2))
    got = monitor_block(*args, ceiling, out)
    want = monitor_reference(*args, ceiling)
    np.testing.assert_allclose(got, want[:3], rtol=1e-12, atol=0)
    np.testing.assert_allclose(out, want[3], rtol=1e-12, atol=1e-300)
    assert np.all(np.isfinite(out)) and np.abs(out).max() <= ceiling


def test_js_drift_equals_scipy_on_a_shared_grid_and_is_bounded():
    """On one grid of exactly ``points`` bins the rebinning is the identity, so the
    drift is scipy's Jensen-Shannon distance (base 2) squared; in general it lies
    in [0, 1] bits, is symmetric and is 0 for identical histograms."""
    from scipy.spatial.distance import jensenshannon
    from streamq.nodes.estimator import js_drift
    rng = np.random.default_rng(4)
    centers = (np.arange(128) + 0.5) / 64 - 1.0
    a, b = rng.random(128) * 10, rng.random(128) * 10
    a[:10] = 0
    assert js_drift(centers, a, centers, b) == pytest.approx(jensenshannon(a, b, base=2) ** 2,
                                                             rel=1e-9)
    c2 = np.linspace(-0.3, 0.5, 1024)
    n2 = np.exp(-((c2 - 0.1) / 0.1) ** 2)
    d = js_drift(centers, a, c2, n2)
    assert 0 < d <= 1 and d == pytest.approx(js_drift(c2, n2, centers, a), rel=1e-12)
    assert js_drift(c2, n2, c2, n2) == pytest.approx(0, abs=1e-12)
    # disjoint supports: one full bit
    assert js_drift(centers[:64], np.ones(64), centers[64:], np.ones(64)) == pytest.approx(1.0)
