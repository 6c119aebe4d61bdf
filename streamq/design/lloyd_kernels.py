"""Compiled loops (numba) of the histogram Lloyd-Max design and of putting a
design on the side-information grid.

A streaming encoder redesigns its codebook at every hop (ten times a second per
channel), on a histogram of about a thousand bins, for up to 65,536 levels.
Written with numpy, one such design is a few hundred numpy calls on short
arrays, and their per-call overhead, not the arithmetic, sets its cost. Here
each step is one compiled call:

* :func:`prefix_sums`: the prefix sums of :func:`streamq.design.lloyd.histogram_prefix`;
* :func:`cube_root_start`: the cold start of :func:`streamq.design.lloyd._cube_root_start`;
* :func:`lloyd_iterate`: Lloyd's iteration of :func:`streamq.design.lloyd._lloyd_core`,
  with the empty-cell repair of :func:`streamq.design.lloyd._split_worst`;
* :func:`midpoint_thresholds`: the thresholds of a codebook made from levels,
  with the checks :class:`streamq.design.codebook.Codebook` would make;
* :func:`grid_levels`: :func:`streamq.engine.sideinfo.round_levels` and
  :func:`streamq.engine.sideinfo.level_bits` in one pass;
* :func:`design_window`: the encoder's whole design on a window in one call
  (the Python calls between the steps above cost as much as the steps): the
  occupied bins, the exact codebook of a window with few values
  (:func:`_exact_levels`), the warm-start rule (:func:`_fits_window`), then the
  kernels above in turn.

The numpy functions named are the definitions (those of :func:`_exact_levels`
and :func:`_fits_window` live in the tests); the tests check each kernel
against its definition: exactly where the arithmetic is done in the same order,
otherwise to a stated tolerance (numpy's ``sum`` adds pairwise and its ``dot``
goes through BLAS, while the kernels add in index order). The kernels release
the interpreter lock (``nogil``) and are cached on disk (``cache=True``);
:func:`warm_up` compiles or loads them before a live run's first design.

References
----------
.. [1] S. P. Lloyd, "Least squares quantization in PCM", Bell Labs memo 1957;
   IEEE Trans. Information Theory 28(2), 1982.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960.
.. [3] R. F. Rice, "Some practical universal noiseless coding techniques",
   JPL Publication 79-22, 1979.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from streamq.design.lloyd import _HUGE, _TINY
from streamq.engine.sideinfo import HEADER_K_BITS as _K_BITS


@njit(cache=True, nogil=True)
def prefix_sums(c, w):  # pragma: no cover - compiled
    """Prefix sums of a histogram about its weighted mean.

    Equal (to rounding: the totals are added in bin order) to the arrays of
    :func:`streamq.design.lloyd.histogram_prefix` for sorted finite centers
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
    :func:`streamq.design.lloyd._cube_root_start` on the prefix sums
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
    """:func:`streamq.design.lloyd._split_worst`: each empty level takes the
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

    The compiled form of :func:`streamq.design.lloyd._lloyd_core` (see there
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
    D_prev = _HUGE
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
        if not -_HUGE < D < _HUGE or smin < _TINY:
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


@njit(cache=True, nogil=True)
def grid_levels(levels, grid_bits):  # pragma: no cover - compiled
    """Levels on the side-information grid and the bits that send them.

    Equal to ``(round_levels(levels, grid_bits), level_bits(rounded, grid_bits))``
    of :mod:`streamq.engine.sideinfo` (the integer code lengths exactly); the
    bit count is -1 when the rounded levels decrease (``level_bits`` raises).
    """
    L = levels.shape[0]
    scale = float(2 ** (grid_bits - 1))
    out = np.empty(L)
    q = np.empty(L, dtype=np.int64)
    for i in range(L):
        v = np.rint(levels[i] * scale)
        if v < -scale:
            v = -scale
        elif v > scale - 1:
            v = scale - 1
        out[i] = v / scale
        q[i] = np.int64(np.rint(out[i] * scale))
    if L < 2:
        return out, grid_bits + _K_BITS
    dmax = 0
    for i in range(L - 1):
        d = q[i + 1] - q[i]
        if d < 0:
            return out, -1
        if d > dmax:
            dmax = d
    top = 0
    while dmax >> top:
        top += 1
    top = min(max(1, top), 2 ** _K_BITS - 1)
    best = -1
    for k in range(top + 1):
        bits = (L - 1) * (1 + k)
        for i in range(L - 1):
            bits += (q[i + 1] - q[i]) >> k
        if best < 0 or bits < best:
            best = bits
    return out, grid_bits + _K_BITS + best


# what design_window did with a window
EMPTY = 0       # no occupied bin: no design
DONE = 1        # the codebook is made (levels, thresholds, side bits)
COLD = 2        # the caller designs, from its method's cold start
WARM = 3        # the caller designs, from the levels given
UNCHECKED = 4   # exact levels that do not make a valid codebook (the caller's check says why)

#: ``init`` of :func:`design_window` without a codebook in force (read-only, as a
#: Codebook's levels are: one compiled form serves both)
NO_LEVELS = np.empty(0)
NO_LEVELS.setflags(write=False)


@njit(cache=True, nogil=True)
def _fits_window(levels, low, high, count):  # pragma: no cover - compiled
    """Whether ``levels`` (the codebook in force) may warm-start a design on a
    window whose occupied bin centers span ``[low, high]``; otherwise the
    design starts cold.

    Levels are counted without padded duplicates
    (:func:`streamq.nodes.coding.pad_levels`) or levels merged by the
    side-information grid. The codebook is used only if it has ``count``
    distinct levels and its outermost levels lie inside the window's occupied
    range. A codebook that has collapsed (an entropy-constrained design drops
    the cells that empty out, and a dropped cell never comes back from a warm
    start) or that is far wider than the window (the first model codebook on a
    quiet window) would leave cells empty and lose them for good; the cold
    start spreads all the levels over the data again.
    """
    L = levels.shape[0]
    if L < count:
        return False
    if levels[0] < low or levels[L - 1] > high:
        return False
    distinct = 1
    for i in range(1, L):
        if levels[i] > levels[i - 1]:
            distinct += 1
    return distinct >= count


@njit(cache=True, nogil=True)
def _exact_levels(centers, counts, occupied, count):  # pragma: no cover - compiled
    """A level on each occupied bin center, the ``count - occupied`` spare ones
    outside the extremes one bin width apart (half below, the rest above): zero
    error on a window with no more occupied bins than levels."""
    n = centers.shape[0]
    spare = count - occupied
    width = (centers[n - 1] - centers[0]) / max(n - 1, 1)
    if width == 0.0:
        width = 1e-6
    below = spare // 2
    above = spare - below
    lv = np.empty(count)
    k = below
    for i in range(n):
        if counts[i] > 0:
            lv[k] = centers[i]
            k += 1
    for j in range(below):
        lv[j] = lv[below] - width * float(below - j)
    top = lv[k - 1]
    for j in range(1, above + 1):
        lv[k - 1 + j] = top + width * float(j)
    return lv


@njit(cache=True, nogil=True, error_model="numpy")
def design_window(centers, counts, count, init, mode, grid_bits, tol,
                  max_iter):  # pragma: no cover - compiled
    """The streaming encoder's design on one window's histogram, in one call.

    Steps, each tested equal to a numpy definition: the occupied bins; with
    ``mode >= 1``, the exact codebook of a window with at most ``count``
    occupied bins (:func:`_exact_levels`); the warm-start rule
    (:func:`_fits_window`); with ``mode == 2``,
    Lloyd-Max: :func:`prefix_sums`, :func:`cube_root_start` or the levels
    ``init``, :func:`lloyd_iterate`, :func:`midpoint_thresholds` (the codebook
    of :func:`streamq.design.lloyd.lloyd_max_histogram`); then
    :func:`grid_levels` (none when ``grid_bits`` is 0).

    Parameters
    ----------
    centers, counts : numpy.ndarray
        The window's histogram (sorted float64 centers, non-negative weights).
    count : int
        Level count.
    init : numpy.ndarray
        Levels of the codebook in force (empty for none).
    mode : int
        0: only the occupied bins and the warm-start rule; 1: also the exact
        codebook (method ``optimal``); 2: also Lloyd-Max.
    grid_bits : int
        Side-information grid (0: levels stay as designed, no side bits).
    tol, max_iter
        Stopping rule of :func:`lloyd_iterate`.

    Returns
    -------
    (status, levels, thresholds, bits)
        ``status`` :data:`DONE` with the codebook and its side bits;
        :data:`EMPTY` for a window without data; :data:`COLD` or
        :data:`WARM` when the caller must design (``mode < 2``, or the rare
        Lloyd cases left to the general route: one value, cells that stay
        empty, levels that make no valid codebook); :data:`UNCHECKED` with
        exact levels that make no valid codebook.

    References
    ----------
    The design is Lloyd's iteration (Lloyd, IEEE Trans. Information Theory
    28(2), 1982; Max, IRE Trans. Information Theory 6(1), 1960): see the
    module's references and :func:`streamq.design.lloyd.lloyd_max_histogram`.
    """
    n = counts.shape[0]
    if centers.shape[0] != n:
        return COLD, np.empty(0), np.empty(0), 0     # the general route says what is wrong
    occupied = 0
    first = last = 0
    for i in range(n):
        if counts[i] > 0:
            if occupied == 0:
                first = i
            last = i
            occupied += 1
    if occupied == 0:
        return EMPTY, np.empty(0), np.empty(0), 0
    if mode >= 1 and occupied <= count:
        lv = _exact_levels(centers, counts, occupied, count)
        th, ok = midpoint_thresholds(lv, False)
        if not ok:
            return UNCHECKED, lv, np.empty(0), 0
        return _on_grid(lv, th, grid_bits, UNCHECKED)
    warm = _fits_window(init, centers[first], centers[last], count)
    retry = WARM if warm else COLD
    if mode < 2 or (warm and init.shape[0] != count):
        return retry, np.empty(0), np.empty(0), 0
    shifted, ref, p01, total2, _, single, _ = prefix_sums(centers, counts)
    if single:
        return retry, np.empty(0), np.empty(0), 0
    if warm:
        y = np.empty(count)
        for i in range(count):
            y[i] = init[i] - ref
    else:
        y = cube_root_start(shifted, p01[:, 0], count)
    y, _, _, stuck, _, _ = lloyd_iterate(shifted, p01, total2, y, tol, max_iter, False)
    if stuck:
        return retry, np.empty(0), np.empty(0), 0
    for i in range(count):
        y[i] += ref
    th, ok = midpoint_thresholds(y, True)
    if not ok:
        return retry, np.empty(0), np.empty(0), 0
    return _on_grid(y, th, grid_bits, retry)


@njit(cache=True, nogil=True)
def _on_grid(levels, thresholds, grid_bits, otherwise):  # pragma: no cover - compiled
    """(DONE, levels on the grid, thresholds, bits), or ``otherwise`` with the
    levels as designed when rounding would put them out of order."""
    if grid_bits == 0:
        return DONE, levels, thresholds, 0
    rounded, bits = grid_levels(levels, grid_bits)
    if bits < 0:
        return otherwise, levels, np.empty(0), 0
    return DONE, rounded, thresholds, bits


def warm_up() -> None:
    """Compile (or load from the disk cache) every kernel for the array types
    the design path passes: contiguous float64 histograms and levels."""
    c = np.array([-1.0, 0.0, 0.0, 1.0, 2.0])
    w = np.array([1.0, 0.0, 2.0, 1.0, 1.0])
    shifted, ref, p01, total2, _, _, _ = prefix_sums(c, w)
    y = cube_root_start(shifted, p01[:, 0], 3)
    lloyd_iterate(shifted, p01, total2, y, 1e-7, 5, False)
    lloyd_iterate(shifted, p01, total2, np.array([-9.0, -8.0, 0.0, 0.5]), 0.0, 5, True)
    midpoint_thresholds(y, True)
    grid_levels(y, 16)
    levels = np.array([-1.0, 0.0, 1.0])
    levels.setflags(write=False)     # as a Codebook holds them
    for init in (levels, NO_LEVELS):
        design_window(c, w, 3, init, 2, 16, 1e-7, 5)
