"""Globally MSE-optimal scalar quantizer for a histogram, by dynamic programming.

On the real line every optimal partition is made of contiguous runs of the
sorted points, so the best ``L``-level quantizer of ``K`` weighted points
solves the recursion

    D_m(j) = min_{i < j} D_{m-1}(i) + cost(i, j),

where ``D_m(j)`` is the least distortion of the first ``j`` points with ``m``
cells and ``cost(i, j)`` the weighted squared error of points ``i..j-1``
about their centroid (O(1) from prefix sums). The cost satisfies the
quadrangle inequality, so the best split ``i*(j)`` is non-decreasing in
``j`` and each layer can be solved by divide and conquer in O(K log K).
Here the divide and conquer runs breadth first: at every depth all the open
segments are evaluated together as one ragged numpy array, so a layer takes
about ``log2 K`` vectorised steps and the whole design O(L K log K) work
with O(L log K) numpy calls.

References
----------
.. [1] X. Wu, "Optimal quantization by matrix searching", Journal of
   Algorithms 12(4), 1991.
.. [2] H. Wang and M. Song, "Ckmeans.1d.dp: optimal k-means clustering in one
   dimension by dynamic programming", The R Journal 3(2), 2011.
.. [3] A. Aggarwal, M. Klawe, S. Moran, P. Shor and R. Wilber, "Geometric
   applications of a matrix-searching algorithm", Algorithmica 2, 1987.
"""

from __future__ import annotations

import numpy as np

from streamq.design._levels import codebook_from_levels
from streamq.design._validate import check_levels, histogram_arrays
from streamq.design.report import evaluate_histogram, make_report
from streamq.errors import StreamqError

__all__ = ["optimal_histogram", "MAX_DP_POINTS", "MAX_DP_LEVELS"]

#: Histograms with more occupied points than this are merged into this many
#: equal-width bins (with centroid centers) before the dynamic programme.
MAX_DP_POINTS = 16384

#: Most levels the dynamic programme is run for (its time grows as
#: L * K * log K: about half a minute at 4,096 levels on 16,384 points).
#: Histograms with no more occupied values than levels need no programme and
#: have no limit.
MAX_DP_LEVELS = 4096


def _compress(c, w, max_points):
    """Drop empty bins, merge equal centers, and re-bin if too many points."""
    keep = w > 0
    c = c[keep]
    w = w[keep]
    if c.size > 1:
        new = np.concatenate(([True], c[1:] != c[:-1]))
        if not new.all():
            starts = np.flatnonzero(new)
            w = np.add.reduceat(w, starts)
            c = c[starts]
    if c.size > max_points:
        lo, hi = float(c[0]), float(c[-1])
        idx = ((c - lo) * (max_points / (hi - lo))).astype(np.intp)
        np.clip(idx, 0, max_points - 1, out=idx)
        ww = np.bincount(idx, weights=w, minlength=max_points)
        cw = np.bincount(idx, weights=w * c, minlength=max_points)
        occ = ww > 0
        c = np.maximum.accumulate(cw[occ] / ww[occ])
        w = ww[occ]
    return c, w


def _cell_cost(s0, s1, s2):
    """Squared error of cells about their centroids from their moment sums
    (weight, first, second): ``s2 - s1**2 / s0``, never below 0. A cell of
    zero-weight points costs nothing (0/0 would poison the minimum)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(s0 > 0.0, np.maximum(s2 - s1 * s1 / s0, 0.0), 0.0)


def _layer(prev, jlo, jhi, p0, p1, p2):
    """One DP layer by breadth-first divide and conquer.

    ``prev[i]`` is the best distortion of the first ``i`` points with one
    cell fewer (``inf`` where impossible). Returns (cur, arg) over
    ``j = jlo..jhi`` stored at index ``j`` of arrays of the same length as
    ``prev``.
    """
    n = prev.size
    cur = np.full(n, np.inf)
    arg = np.zeros(n, dtype=np.int32)
    seg_jlo = np.array([jlo], dtype=np.intp)
    seg_jhi = np.array([jhi], dtype=np.intp)
    seg_ilo = np.array([max(jlo - 1, 0)], dtype=np.intp)
    seg_ihi = np.array([jhi - 1], dtype=np.intp)
    while seg_jlo.size:
        mid = (seg_jlo + seg_jhi) >> 1
        hi = np.minimum(seg_ihi, mid - 1)
        lo = np.minimum(seg_ilo, hi)
        counts = hi - lo + 1
        starts = np.cumsum(counts) - counts
        total = int(counts.sum())
        rep = np.repeat(np.arange(mid.size), counts)
        i = np.arange(total) - starts[rep] + lo[rep]
        j = mid[rep]
        s0 = p0[j] - p0[i]
        s1 = p1[j] - p1[i]
        s2 = p2[j] - p2[i]
        cost = _cell_cost(s0, s1, s2)
        val = prev[i] + cost
        best = np.minimum.reduceat(val, starts)
        hit = np.flatnonzero(val == best[rep])
        first = np.concatenate(([True], rep[hit][1:] != rep[hit][:-1]))
        opt = i[hit[first]]
        cur[mid] = best
        arg[mid] = opt
        left = seg_jlo <= mid - 1
        right = mid + 1 <= seg_jhi
        seg_jlo, seg_jhi, seg_ilo, seg_ihi = (
            np.concatenate((seg_jlo[left], mid[right] + 1)),
            np.concatenate((mid[left] - 1, seg_jhi[right])),
            np.concatenate((seg_ilo[left], opt[right])),
            np.concatenate((opt[left], seg_ihi[right])),
        )
    return cur, arg


def _dp_partition(c, w, count):
    """Bounds (point indices) of the optimal ``count`` cells of points c, w."""
    k = c.size
    ref = 0.5 * (c[0] + c[-1])
    cs = c - ref
    wn = w / w.sum()
    p0 = np.concatenate(([0.0], np.cumsum(wn)))
    p1 = np.concatenate(([0.0], np.cumsum(wn * cs)))
    p2 = np.concatenate(([0.0], np.cumsum(wn * cs * cs)))
    j = np.arange(k + 1)
    prev = np.where(j > 0, _cell_cost(p0, p1, p2), np.inf)
    prev[0] = np.inf
    args = []
    for m in range(2, count + 1):
        jlo = m
        jhi = k - (count - m)
        cur, arg = _layer(prev, jlo, jhi, p0, p1, p2)
        args.append(arg)
        prev = cur
    bounds = [k]
    idx = k
    for arg in reversed(args):
        idx = int(arg[idx])
        bounds.append(idx)
    bounds.append(0)
    bounds = np.array(bounds[::-1], dtype=np.intp)
    return bounds, float(prev[k])


def optimal_histogram(centers, weights, levels, *, version: int = 0,
                      max_points: int = MAX_DP_POINTS, max_levels: int = MAX_DP_LEVELS):
    """Globally MSE-optimal L-level quantizer of a histogram (dynamic programming).

    Parameters
    ----------
    centers, weights : array_like
        Sorted bin centers and non-negative weights.
    levels : int
        Number of levels L (2..65536).
    version : int
        Version number of the returned codebook.
    max_points : int
        Histograms with more occupied bins are first merged into this many
        equal-width bins (centroid centers); the result is then optimal for
        the merged histogram. Must be at least ``levels``.
    max_levels : int
        Refuse to run the programme for more levels than this (default
        :data:`MAX_DP_LEVELS`; the time grows as L * K * log K).

    Returns
    -------
    codebook : Codebook
        Levels at the centroids of the optimal cells, thresholds halfway
        between adjacent levels (an optimal quantizer meets both Lloyd
        conditions).
    report : DesignReport
        Figures w.r.t. the weighted histogram; ``details["dp_mse"]`` is the
        optimum found by the recursion.

    Notes
    -----
    If the histogram has no more occupied values than levels, every value
    gets a level of its own (zero distortion) and the spare levels are
    spread between them.

    References
    ----------
    .. [1] X. Wu, "Optimal quantization by matrix searching", Journal of
       Algorithms 12(4), 1991.
    .. [2] H. Wang and M. Song, "Ckmeans.1d.dp: optimal k-means clustering in
       one dimension by dynamic programming", The R Journal 3(2), 2011.
    """
    c0, w0 = histogram_arrays(centers, weights)
    count = check_levels(levels)
    max_points = int(max_points)
    if max_points < count:
        raise StreamqError(f"max_points ({max_points}) must be at least the level count ({count})")
    c, w = _compress(c0, w0, max_points)
    if c.size > count > int(max_levels):
        raise StreamqError(
            f"optimal: the dynamic programme is limited to {int(max_levels)} levels "
            f"(its time grows as levels * points * log points); got {count} levels for "
            f"{c.size} histogram points: use lloyd-max for more levels"
        )
    if c.size <= count:
        cb = codebook_from_levels(c, count, version)
        dp_mse = 0.0
    else:
        bounds, dp_mse = _dp_partition(c, w, count)
        cw = np.concatenate(([0.0], np.cumsum(w)))
        cwc = np.concatenate(([0.0], np.cumsum(w * c)))
        s0 = cw[bounds[1:]] - cw[bounds[:-1]]
        s1 = cwc[bounds[1:]] - cwc[bounds[:-1]]
        cb = codebook_from_levels(s1 / s0, count, version)
    mse, probs = evaluate_histogram(cb.levels, cb.thresholds, c0, w0)
    power = float(np.dot(w0, c0 * c0) / w0.sum())
    rep = make_report("optimal", cb, count - 1, True, mse=mse, probs=probs, power=power,
                      reference="histogram", details={"dp_mse": dp_mse, "points": int(c.size)})
    return cb, rep
