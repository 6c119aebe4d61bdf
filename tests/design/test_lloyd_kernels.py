"""The compiled Lloyd-Max design kernels against their numpy definitions
(``tests/kernel_reference.py``, section Lloyd-Max on a histogram).

Tolerances: where a kernel adds a sum in index order while the definition uses
numpy's pairwise ``sum`` or a BLAS ``dot``, the two differ by rounding only;
those results are compared to 1e-12 relative to the data's scale (a few
hundred ulps), everything else (partitions, iteration counts, stuck masks,
integer code lengths) exactly.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

import kernel_reference as ref
from streamq.design import Codebook, histogram_prefix, lloyd_max_histogram
from streamq.design import lloyd as ll
from streamq.design import lloyd_kernels as K
from streamq.design import lloyd_steps as steps
from streamq.design.sideinfo import level_bits, round_levels
from streamq.errors import StreamqError

RTOL = 1e-12


def _histograms():
    """Many random and edge-case histograms: (name, centers, weights)."""
    rng = np.random.default_rng(2024)
    out = []
    for i in range(60):
        n = int(rng.integers(2, 1500))
        c = np.sort(rng.standard_normal(n)) * 10.0 ** rng.uniform(-6, 3)
        w = np.floor(rng.laplace(size=n) ** 2 * rng.uniform(0, 20))   # many empty bins
        if not w.sum() > 0:
            w[rng.integers(n)] = 1.0
        out.append((f"random-{i}", c, w))
    # estimator-like windows: uniform bins, Laplacian counts, tracked span
    for i, scale in enumerate([1e-5, 0.01, 0.3]):
        x = rng.laplace(size=24_000) * scale
        lo, hi = x.min(), x.max()
        width = (hi - lo) / 1024
        c = lo + (np.arange(1024) + 0.5) * width
        w = np.bincount(np.clip(((x - lo) / width).astype(int), 0, 1023), minlength=1024) * 1.0
        out.append((f"window-{i}", c, w))
    c = np.linspace(-1, 1, 64)
    ties = np.repeat(np.linspace(-1, 1, 16), 4)               # equal centers
    out += [
        ("one-occupied", c, np.where(np.arange(64) == 40, 3.0, 0.0)),
        ("two-occupied", c, np.where(np.isin(np.arange(64), [3, 50]), 1.0, 0.0)),
        ("few-occupied", c, np.where(np.arange(64) % 9 == 0, 2.0, 0.0)),
        ("ties", ties, np.arange(64) % 3 + 0.0),
        ("huge", c * 1e149, np.ones(64)),
        ("tiny", c * 1e-149, np.ones(64)),
        ("offset", 1e6 + c, np.ones(64)),
        ("lopsided", c, np.r_[np.full(63, 1e-9), 1e9]),
        ("one-bin", np.array([0.25]), np.array([2.0])),
    ]
    return out


HISTOGRAMS = _histograms()
IDS = [h[0] for h in HISTOGRAMS]


def _close(a, b, scale):
    np.testing.assert_allclose(a, b, rtol=RTOL, atol=RTOL * scale)


def _span(c):
    return max(float(np.max(np.abs(c))), 1e-300)


@pytest.mark.parametrize("name,c,w", HISTOGRAMS, ids=IDS)
def test_prefix_sums_equal_numpy_definition(name, c, w):
    got = K.prefix_sums(c, w)
    want = ref.prefix_arrays(c, w)
    s = _span(c)
    _close(got[1], want[1], s)                 # ref
    _close(got[0], want[0], s)                 # shifted
    _close(got[2][:, 0], want[2][:, 0], 1.0)   # cumulative weights
    _close(got[2][:, 1], want[2][:, 1], s)
    _close(got[3], want[3], s * s)             # total2
    _close(got[4], want[4], s * s)             # power
    assert got[5] == want[5]                   # single value
    _close(got[6], want[6], float(w.max()))


def _prefix(c, w):
    return histogram_prefix(c, w)


@pytest.mark.parametrize("count", [2, 5, 64, 256])
@pytest.mark.parametrize("name,c,w", HISTOGRAMS, ids=IDS)
def test_cube_root_start_equals_numpy_definition(name, c, w, count):
    pre = _prefix(c, w)
    got = K.cube_root_start(pre.shifted, pre.p0, count)
    _close(got, ref.cube_root_start(pre, count), _span(pre.shifted))


def test_interp_walk_equals_numpy_interp():
    rng = np.random.default_rng(1)
    for _ in range(200):
        xp = np.sort(rng.standard_normal(int(rng.integers(1, 50))))
        xp[rng.random(xp.size) < 0.2] = xp[0]          # repeated points
        xp.sort()
        fp = rng.standard_normal(xp.size)
        x = np.sort(np.r_[rng.standard_normal(40) * 2, xp[:3]])
        np.testing.assert_array_equal(steps._interp_sorted(x, xp, fp), np.interp(x, xp, fp))


def test_cell_bounds_equal_searchsorted_on_doubled_centers():
    """Sorted, unsorted and NaN thresholds, ties among the centers, and
    thresholds beyond both ends."""
    rng = np.random.default_rng(3)
    for _ in range(300):
        n = int(rng.integers(1, 200))
        shifted = np.sort(np.round(rng.standard_normal(n), int(rng.integers(0, 3))))
        y = np.sort(rng.standard_normal(int(rng.integers(2, 60))) * 2)
        if rng.random() < 0.3:                       # out of order
            y[rng.integers(y.size)] = rng.standard_normal() * 3
        if rng.random() < 0.1:
            y[rng.integers(y.size)] = np.nan
        b = np.zeros(y.size + 1, dtype=np.intp)
        steps._cell_bounds(shifted, y, b)
        np.testing.assert_array_equal(b[1:-1], np.searchsorted(2 * shifted, y[:-1] + y[1:]))


def _starts(pre, count, rng):
    """A cold start, a random warm start and one far too wide (empty cells)."""
    s = _span(pre.shifted)
    yield ref.cube_root_start(pre, count)
    yield np.sort(rng.choice(pre.shifted, count)) + rng.standard_normal(count) * 1e-3 * s
    yield np.linspace(-3 * s, 3 * s, count)


@pytest.mark.parametrize("count", [2, 7, 64, 256])
@pytest.mark.parametrize("name,c,w", HISTOGRAMS, ids=IDS)
def test_lloyd_iterate_equals_numpy_definition(name, c, w, count):
    """Same partitions, stopping and stuck masks; levels and distortions to
    rounding (the distortion is added in cell order). At a fixed point the
    distortion repeats up to that rounding, and the rule ``D_prev - D <= tol *
    D_prev`` with ``tol = 0`` may then stop one iteration apart, on the same
    levels."""
    pre = _prefix(c, w)
    if pre.occupied == 1:
        pytest.skip("a single value never reaches the iteration")
    rng = np.random.default_rng(count)
    s = _span(pre.shifted)
    for y0 in _starts(pre, count, rng):
        for tol, max_iter in ((1e-7, 1000), (0.0, 300), (1e-3, 2)):
            y, it, conv, stuck, filled, hist = K.lloyd_iterate(
                pre.shifted, pre.p01, pre.total2, np.ascontiguousarray(y0), tol, max_iter, True)
            ry, rit, rconv, rhist, rfilled = ref.lloyd_core(pre, y0.copy(), tol, max_iter, True)
            assert conv == rconv
            if it != rit:
                assert tol == 0.0 and abs(it - rit) == 1
                longer = hist if it > rit else rhist
                assert abs(longer[-1] - longer[-2]) <= RTOL * s * s
            n = min(it, rit)
            _close(hist[:n], rhist[:n], s * s)
            assert stuck == (rfilled is not None)
            if stuck:
                np.testing.assert_array_equal(filled, rfilled)
            _close(y, ry, s)


@pytest.mark.parametrize("name,c,w", HISTOGRAMS, ids=IDS)
def test_lloyd_max_histogram_equals_numpy_composition(name, c, w):
    """The public design (compiled) against the numpy definitions end to end."""
    for count in (4, 100):
        cb, rep = lloyd_max_histogram(c, w, count, record=True)
        pre = ref.numpy_histogram_prefix(c, w)
        if pre.occupied == 1:
            continue
        y, it, conv, hist, stuck = ref.lloyd_core(pre, ref.cube_root_start(pre, count),
                                                  1e-7, 1000, True)
        assert (rep.iterations, rep.converged) == (it, conv)
        if stuck is None:
            _close(cb.levels, y + pre.ref, _span(c))


def _inits(c, w, count):
    """No codebook, one that fits the window, one too wide, one collapsed."""
    occupied = c[w > 0]
    lo, hi = occupied[0], occupied[-1]
    fits = Codebook(levels=np.linspace(lo, hi, count)) if hi > lo else None
    wide = Codebook(levels=np.linspace(lo - 1.0, hi + 1.0, count))
    lv = np.linspace(lo, hi, count)
    lv[1:count // 2] = lv[0]
    collapsed = Codebook(levels=lv, thresholds=np.r_[lv[:-1] + np.arange(1, count) * 1e-9 * (hi - lo)])\
        if hi > lo and count > 3 else None
    return [None, fits, wide, collapsed]


@pytest.mark.parametrize("count", [3, 20, 64])
@pytest.mark.parametrize("name,c,w", HISTOGRAMS + [("empty", np.linspace(-1, 1, 9), np.zeros(9))],
                         ids=IDS + ["empty"])
def test_design_window_equals_the_numpy_composition(name, c, w, count):
    """The encoder's one-call design (exact windows, warm-start rule, Lloyd-Max,
    side-information grid), bit for bit, and the statuses it hands back for
    the other methods' designs."""
    from streamq.nodes import coding
    for init in _inits(c, w, count) if w.sum() > 0 else [None]:
        try:
            want = ref.window_design("lloyd-max", c, w, count, init, 16)
        except StreamqError as exc:   # equal centers of occupied bins: no exact codebook
            with pytest.raises(StreamqError, match=re.escape(str(exc))):
                coding.window_codebook("lloyd-max", count, c, w, init, {}, 16, False)
            continue
        got = coding.window_codebook("lloyd-max", count, c, w, init, {}, 16, False)
        if want is None:
            assert got is None
            continue
        np.testing.assert_array_equal(got[0].levels, want[0])
        np.testing.assert_array_equal(got[0].thresholds, want[1])
        assert got[1] == want[2]
        lv = K.NO_LEVELS if init is None else init.levels
        status = K.design_window(c, w, count, lv, 2, 16, ll.HISTOGRAM_TOL, ll.HISTOGRAM_MAX_ITER)[0]
        if status != K.DONE:          # the rare route: one value or cells that stay empty
            assert status == (K.WARM if want[3] is not None else K.COLD)
            pre = histogram_prefix(c, w)
            y0 = ll._initial_levels(pre, count, want[3])
            assert pre.occupied == 1 or ll._lloyd_run(pre, y0, ll.HISTOGRAM_TOL,
                                                      ll.HISTOGRAM_MAX_ITER, False)[4] is not None
        # the other methods: the exact codebook (optimal) or the warm-start decision
        n_occupied = np.count_nonzero(w > 0)
        for mode in (0, 1):
            status, levels, thresholds, bits = K.design_window(c, w, count, lv, mode, 16, 0.0, 0)
            if mode == 1 and n_occupied <= count:
                assert status == K.DONE
                np.testing.assert_array_equal(levels, want[0])
                np.testing.assert_array_equal(thresholds, want[1])
                assert bits == want[2]
            else:
                assert status == (K.WARM if want[3] is not None else K.COLD)


def test_midpoint_thresholds_equal_numpy_and_flag_valid_codebooks():
    rng = np.random.default_rng(5)
    cases = [np.sort(rng.standard_normal(n)) for n in (2, 3, 17, 256)]
    cases += [np.array([0.0, 0.0, 1.0]), np.array([1.0, 0.5]), np.array([0.0, np.inf]),
              np.array([1.0, np.nextafter(1.0, 2.0), np.nextafter(np.nextafter(1.0, 2.0), 2.0)]),
              np.array([-1e308, 1e308]), np.array([0.5])]
    for lv in cases:
        with np.errstate(over="ignore", invalid="ignore"):
            halfway = lv[:-1] + 0.5 * (lv[1:] - lv[:-1])
            mean = 0.5 * (lv[:-1] + lv[1:])
            steps = np.diff(lv)
        for flag, want in ((True, halfway), (False, mean)):
            th, ok = K.midpoint_thresholds(lv, flag)
            np.testing.assert_array_equal(th, want)
            valid = bool(lv.size >= 2 and np.all(np.isfinite(lv)) and np.all(steps > 0)
                         and np.all(np.isfinite(want)) and np.all(np.diff(want) > 0))
            assert ok == valid
            if ok:   # what the validating constructor accepts
                Codebook(lv, th)


@pytest.mark.parametrize("grid_bits", [8, 12, 16, 24, 32])
def test_grid_levels_equal_round_levels_and_level_bits(grid_bits):
    rng = np.random.default_rng(grid_bits)
    step = 2.0 ** -(grid_bits - 1)
    cases = [np.sort(rng.laplace(size=n) * s) for n in (2, 16, 256, 4096)
             for s in (1e-4, 0.05, 0.5, 3.0)]
    cases += [np.zeros(8), np.full(4, 2.0), np.array([-1.0, 1.0 - step]),
              np.sort(np.r_[np.arange(-3, 4) * step * 0.5, 0.37]),   # halfway cases
              np.array([0.1]), np.array([-7.0, -7.0, 0.0, 5.0])]
    for lv in cases:
        got, bits = K.grid_levels(lv, grid_bits)
        want = round_levels(lv, grid_bits)
        np.testing.assert_array_equal(got, want)
        assert bits == level_bits(want, grid_bits)
    _, bits = K.grid_levels(np.array([0.5, 0.25]), grid_bits)
    assert bits == -1                             # level_bits raises: not in order
