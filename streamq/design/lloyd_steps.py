"""Compiled steps (numba) of the histogram Lloyd-Max design.

A streaming encoder redesigns its codebook at every hop (ten times a second per
channel), on a histogram of about a thousand bins, for up to 65,536 levels.
Written with numpy, one such design is a few hundred numpy calls on short
arrays, and their per-call overhead, not the arithmetic, sets its cost. Here
each step is one compiled call:

* :func:`prefix_sums`: the prefix sums of :func:`streamq.design.histogram.histogram_prefix`;
* :func:`cube_root_start`: the cold start, levels at the quantiles of a
  ``p**(1/3)`` estimate (the optimal compander rule);
* :func:`lloyd_iterate`: Lloyd's iteration on the prefix sums, with the repair of
  empty cells (each takes the upper half of the cell of largest distortion);
* :func:`midpoint_thresholds`: the thresholds of a codebook made from levels,
  with the checks :class:`streamq.design.codebook.Codebook` would make.

Their plain numpy definitions live with the tests (``tests/kernel_reference.py``),
which check each kernel against its definition: exactly where the arithmetic is
done in the same order, otherwise to a stated tolerance (numpy's ``sum`` adds
pairwise and its ``dot`` goes through BLAS, while the kernels add in index
order). The kernels release the interpreter lock (``nogil``) and are cached on
disk (``cache=True``); :func:`streamq.design.lloyd_kernels.warm_up` compiles or
loads them before a live run's first design.

References
----------
.. [1] S. P. Lloyd, "Least squares quantization in PCM", Bell Labs memo 1957;
   IEEE Trans. Information Theory 28(2), 1982.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

#: Finite start value of the previous distortion, so that the first relative
#: change is large.
HUGE_DISTORTION = 1e308
#: Cells lighter than this (normalised weight) take the careful path: their
#: centroid from prefix-sum differences could stray out of the cell.
TINY_CELL = 1e-10


@njit(cache=True, nogil=True)
def prefix_sums(c, w):  # pragma: no cover - compiled
    """Prefix sums of a histogram about its weighted mean.

    Equal (to rounding: the totals are added in bin order) to the arrays of
    :func:`streamq.design.histogram.histogram_prefix` for sorted finite centers
    ``c`` and non-negative weights ``w`` of positive total.

    Returns
    -------
    (shifted, ref, p01, total2, power, single, total)
        ``shifted = c - ref``; ``p01`` the cumulative sums (leading zero row)
        of the normalised weights and of their first moments about ``ref``;
        ``total2`` the second moment about ``ref``; ``power`` the mean square
        of ``c``; ``single`` whether all the weight sits on one value.
    """
    n = c.shape[0]
    total = 0.0
    first = 0.0
    positive = 0
    for i in range(n):
        total += w[i]
        first += w[i] * c[i]
        if w[i] != 0.0:
            positive += 1
    ref = first / total
    if not math.isfinite(ref):
        ref = 0.5 * (c[0] + c[n - 1])
    inv = 1.0 / total
    shifted = np.empty(n)
    p01 = np.empty((n + 1, 2))
    p01[0, 0] = 0.0
    p01[0, 1] = 0.0
    a0 = 0.0
    a1 = 0.0
    total2 = 0.0
    for i in range(n):
        cs = c[i] - ref
        shifted[i] = cs
        # a subnormal total overflows 1/total: divide instead (never a NaN)
        wn = w[i] * inv if inv < math.inf else w[i] / total
        wc = wn * cs
        a0 += wn
        a1 += wc
        p01[i + 1, 0] = a0
        p01[i + 1, 1] = a1
        total2 += wc * cs
    power = total2 + 2.0 * ref * a1 + ref * ref
    single = c[0] == c[n - 1] or positive == 1
    return shifted, ref, p01, total2, max(power, 0.0), single, total


@njit(cache=True, nogil=True)
def cube_root_start(shifted, p0, count):  # pragma: no cover - compiled
    """Start levels at the quantiles of a ``p**(1/3)`` estimate.

    Equal (to rounding: the segment masses are added in order) to
    ``cube_root_start`` of ``tests/kernel_reference.py`` on the prefix sums
    ``p0`` (first column of ``p01``) and shifted centers.
    """
    n = shifted.shape[0]
    cs = np.empty(n)
    mid = np.empty(n)
    k = 0
    for i in range(n):
        wi = p0[i + 1] - p0[i]
        if wi > 0:
            cs[k] = shifted[i]
            mid[k] = p0[i] + 0.5 * wi    # cumulative weight at the point
            k += 1
    if k < 2 or cs[0] == cs[k - 1]:
        return np.full(count, cs[0] if k else 0.0)
    cs = cs[:k]
    mid = mid[:k]
    segments = min(max(4 * count, 64), max(k // 2, 2))
    step = 1.0 / segments           # numpy.linspace(0, 1, segments + 1)
    grid = np.empty(segments + 1)
    for i in range(segments):
        grid[i] = i * step + 0.0
    grid[segments] = 1.0
    xq = _interp_sorted(grid, mid, cs)
    g = np.empty(segments + 1)
    g[0] = 0.0
    acc = 0.0
    for i in range(segments):
        d = xq[i + 1] - xq[i]
        acc += np.cbrt(d * d)
        g[i + 1] = acc
    q = (np.arange(count) + 0.5) / count
    if not acc > 0:
        return _interp_sorted(q, mid, cs)
    return _interp_sorted(q, g / acc, xq)


@njit(cache=True, nogil=True)
def _interp_sorted(x, xp, fp):  # pragma: no cover - compiled
    """``numpy.interp(x, xp, fp)`` for ascending ``x`` and ``xp``: the same
    arithmetic (numpy's slope formula and its fallbacks), the cell of each
    point found by walking on from the previous one."""
    m = xp.shape[0]
    out = np.empty(x.shape[0])
    j = 0
    for i in range(x.shape[0]):
        v = x[i]
        if v > xp[m - 1]:
            out[i] = fp[m - 1]
            continue
        if v < xp[0]:
            out[i] = fp[0]
            continue
        while j + 1 < m and xp[j + 1] <= v:
            j += 1
        if j == m - 1 or xp[j] == v:
            out[i] = fp[j]
            continue
        slope = (fp[j + 1] - fp[j]) / (xp[j + 1] - xp[j])
        r = slope * (v - xp[j]) + fp[j]
        if r != r:
            r = slope * (v - xp[j + 1]) + fp[j + 1]
            if r != r and fp[j] == fp[j + 1]:
                r = fp[j]
        out[i] = r
    return out


@njit(cache=True, nogil=True)
def _first_not_below(a, lo, hi, v):  # pragma: no cover - compiled
    """``lo + numpy.searchsorted(a[lo:hi], v, side="left")`` (NaN sorts last)."""
    if v != v:
        return hi
    while lo < hi:
        mid = (lo + hi) >> 1
        if a[mid] < v:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True, nogil=True)
def _cell_bounds(shifted, y, b):  # pragma: no cover - compiled
    """Fill ``b[1:L]`` with ``numpy.searchsorted(2 * shifted, y[:-1] + y[1:], side="left")``
    (the doubled thresholds among the doubled sorted centers; exact; NaN sorts
    last). Thresholds in order, the usual case, are merged with the centers in
    one forward walk; one below its predecessor's bound is binary-searched."""
    n = shifted.shape[0]
    pos = 0
    for i in range(1, y.shape[0]):
        t2 = y[i - 1] + y[i]
        if t2 != t2:
            pos = n
        elif pos > 0 and not shifted[pos - 1] * 2.0 < t2:
            pos = _first_not_below_doubled(shifted, pos - 1, t2)
        else:
            while pos < n and shifted[pos] * 2.0 < t2:
                pos += 1
        b[i] = pos


@njit(cache=True, nogil=True)
def _first_not_below_doubled(shifted, hi, t2):  # pragma: no cover - compiled
    """``numpy.searchsorted(2 * shifted[:hi], t2, side="left")`` for a number ``t2``."""
    lo = 0
    while lo < hi:
        mid = (lo + hi) >> 1
        if shifted[mid] * 2.0 < t2:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True, nogil=True)
def _split_empty(S, y, b, shifted, p0, p1, p2):  # pragma: no cover - compiled
    """``split_worst`` of ``tests/kernel_reference.py``: each empty level takes the
    upper half of the cell of largest distortion, split at its centroid.
    ``y`` is changed in place and sorted. Returns (distortion, stuck, filled)."""
    L = y.shape[0]
    d = np.zeros(L)
    filled = np.empty(L, dtype=np.bool_)
    for i in range(L):
        s0 = S[i, 0]
        filled[i] = s0 > 0.0
        if filled[i]:
            yo = y[i]
            d[i] = max(S[i, 2] - 2.0 * yo * S[i, 1] + yo * yo * s0, 0.0)
    lo_of = b[:-1].copy()       # bin range of each level's cell
    hi_of = b[1:].copy()
    cand = d.copy()             # split candidates; unsplittable cells drop out
    stuck = False
    for e in range(L):
        if filled[e]:
            continue
        j = np.argmax(cand)
        m = lo = hi = 0
        l0 = r0 = 0.0
        while cand[j] > 0.0:
            lo = lo_of[j]
            hi = hi_of[j]
            m = _first_not_below(shifted, lo, hi, y[j])
            if lo < m < hi:
                l0 = p0[m] - p0[lo]
                r0 = p0[hi] - p0[m]
                if l0 > 0.0 and r0 > 0.0:
                    break
            cand[j] = 0.0
            j = np.argmax(cand)
        if not cand[j] > 0.0:
            stuck = True
            break
        l1 = p1[m] - p1[lo]
        r1 = p1[hi] - p1[m]
        l2 = p2[m] - p2[lo]
        r2 = p2[hi] - p2[m]
        yl = l1 / l0
        yr = r1 / r0
        y[j] = yl
        y[e] = yr
        d[j] = cand[j] = max(l2 - l1 * yl, 0.0)
        d[e] = cand[e] = max(r2 - r1 * yr, 0.0)
        hi_of[j] = m
        lo_of[e] = m
        hi_of[e] = hi
        filled[e] = True
    order = np.argsort(y, kind="mergesort")
    y[:] = y[order]
    D = 0.0
    for i in range(L):
        D += d[i]
    return D, stuck, filled[order]


@njit(cache=True, nogil=True, error_model="numpy")
def lloyd_iterate(shifted, p01, total2, y0, tol, max_iter, record):  # pragma: no cover
    """Lloyd's iteration on prefix sums from the levels ``y0`` (shifted coordinates).

    The compiled form of ``lloyd_core`` of ``tests/kernel_reference.py`` (see there
    for the stopping rule, the careful path of nearly empty cells and the
    empty-cell split); equal to it up to rounding (the distortion is added in
    cell order), with the same partitions.

    Returns
    -------
    (levels, iterations, converged, stuck, filled, history)
        ``filled`` (levels that own data) means something only if ``stuck``;
        ``history`` holds the distortion after each iteration when ``record``.
    """
    n = shifted.shape[0]
    L = y0.shape[0]
    y = y0.copy()
    y_new = np.empty(L)
    b = np.empty(L + 1, dtype=np.intp)
    b[0] = 0
    b[L] = n
    s0 = np.empty(L)
    s1 = np.empty(L)
    p2 = np.empty(0)
    history = np.empty(16 if record else 0)
    filled = np.ones(L, dtype=np.bool_)
    D_prev = HUGE_DISTORTION
    converged = False
    stuck = False
    it = 0
    for it in range(1, max_iter + 1):
        # cell bounds: doubled thresholds searched among doubled centers (exact)
        _cell_bounds(shifted, y, b)
        dot = 0.0
        smin = math.inf
        for i in range(L):
            a = s0[i] = p01[b[i + 1], 0] - p01[b[i], 0]
            s1[i] = p01[b[i + 1], 1] - p01[b[i], 1]
            y_new[i] = s1[i] / a
            dot += s1[i] * y_new[i]
            if a < smin:
                smin = a
        D = total2 - dot
        if not -HUGE_DISTORTION < D < HUGE_DISTORTION or smin < TINY_CELL:
            # some cell is empty or nearly so: keep every level inside its own
            # cell and re-use the empty ones
            if p2.shape[0] == 0:
                p2 = np.empty(n + 1)
                p2[0] = 0.0
                acc = 0.0
                for k in range(n):
                    acc += (p01[k + 1, 0] - p01[k, 0]) * shifted[k] * shifted[k]
                    p2[k + 1] = acc
            S = np.empty((L, 3))
            for i in range(L):
                S[i, 0] = p01[b[i + 1], 0] - p01[b[i], 0]
                S[i, 1] = p01[b[i + 1], 1] - p01[b[i], 1]
                S[i, 2] = p2[b[i + 1]] - p2[b[i]]
                if s0[i] > 0.0:
                    y_new[i] = min(max(y_new[i], shifted[b[i]]), shifted[b[i + 1] - 1])
                else:
                    y_new[i] = y[i]
            D, stuck, filled = _split_empty(S, y_new, b, shifted, p01[:, 0], p01[:, 1], p2)
        y, y_new = y_new, y
        if D < 0.0:
            D = 0.0  # rounding of total2 - s1.y on an exact fit
        if record:
            if it > history.shape[0]:
                grown = np.empty(2 * history.shape[0])
                grown[:it - 1] = history[:it - 1]
                history = grown
            history[it - 1] = D
        if stuck or D_prev - D <= tol * D_prev:
            converged = True
            break
        D_prev = D
    return y, it, converged, stuck, filled, history[:it if record else 0]


@njit(cache=True, nogil=True)
def midpoint_thresholds(levels, halfway):  # pragma: no cover - compiled
    """Thresholds halfway between adjacent levels, and whether they make a valid codebook.

    ``halfway`` True: ``lv[i] + 0.5 * (lv[i+1] - lv[i])`` (the Lloyd finish);
    False: ``0.5 * (lv[i] + lv[i+1])`` (the default of
    :class:`streamq.design.codebook.Codebook`). The flag is True when the
    levels are finite and strictly increasing and the thresholds finite and
    strictly increasing, so that ``Codebook._trusted`` may take them.
    """
    L = levels.shape[0]
    th = np.empty(max(L - 1, 0))
    ok = L >= 2
    for i in range(L - 1):
        a = levels[i]
        g = levels[i + 1] - a
        t = a + 0.5 * g if halfway else 0.5 * (a + levels[i + 1])
        th[i] = t
        if not (g > 0.0 and math.isfinite(t) and math.isfinite(a)) or (i > 0 and not t > th[i - 1]):
            ok = False
    if L and not math.isfinite(levels[L - 1]):
        ok = False
    return th, ok
