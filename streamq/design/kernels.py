"""Compiled inner loops (numba) for the few places where numpy's per-call
overhead or extra passes matter: the live audio callback's small blocks, and
the per-hop work of an adaptive chain (an encoder's stretch under one
codebook, the drift between two windows). The estimator's own loops are in
streamq.nodes.estimator_kernels.

On a shared machine the audio callback runs with cold caches after every
wait, and each numpy call then costs tens of microseconds; one compiled call
per node touches far less code. Every kernel here has a plain numpy
definition it must equal exactly; the tests check each against it. The
callback's kernels keep the interpreter lock (a kernel that let it go would
hand it to another thread for a whole switch interval). Compiled code is
cached on disk (``cache=True``); :func:`warm_up` compiles or loads it before
a live stream starts, never inside the callback.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True)
def _count_at_or_below(th, a, b, v):  # pragma: no cover - compiled
    """``a`` plus how many of the ascending ``th[a:b]`` are <= v (v not NaN),
    by a binary search whose loop trip count does not depend on ``v``."""
    k = b - a
    if k <= 0:
        return a
    base = a
    while k > 1:
        half = k >> 1
        if th[base + half] <= v:
            base += half
        k -= half
    if th[base] <= v:
        base += 1
    return base


@njit(cache=True)
def encode_rows(x, thresholds, out):  # pragma: no cover - compiled
    """Cell indices of a block, each channel with its own thresholds.

    Equal to ``out[:, c] = np.searchsorted(thresholds[c], x[:, c], side="right")``
    for every channel ``c`` (NaN goes past the last threshold, as numpy sorts it).

    Parameters
    ----------
    x : ndarray, shape (frames, channels), float64
    thresholds : ndarray, shape (channels, L - 1), float64, each row ascending
    out : ndarray, shape (frames, channels), unsigned integer; written in place
    """
    n, C = x.shape
    m = thresholds.shape[1]
    for i in range(n):
        for c in range(C):
            v = x[i, c]
            out[i, c] = m if v != v else _count_at_or_below(thresholds[c], 0, m, v)


@njit(cache=True)
def decode_rows(idx, table, out):  # pragma: no cover - compiled
    """Reconstruction levels of a block, each channel with its own levels.

    Equal to ``out[:, c] = table[c][idx[:, c]]`` for every channel ``c``.

    Returns
    -------
    int
        -1, or the first flat position ``i * channels + c`` whose index is not
        below ``table.shape[1]`` (``out`` is then incomplete).
    """
    n, C = idx.shape
    L = table.shape[1]
    for i in range(n):
        for c in range(C):
            k = idx[i, c]
            if k >= L:
                return i * C + c
            out[i, c] = table[c, k]
    return -1


@njit(cache=True)
def encode_span(x, thresholds, out):  # pragma: no cover - compiled
    """Cell indices of a stretch of one channel under one codebook.

    Equal to ``out[:] = np.searchsorted(thresholds, x, side="right")`` for
    every float64 value (NaN goes past the last threshold, as numpy sorts it).

    A stretch at least four times as long as the codebook goes through a
    uniform grid of ``4 (L - 1)`` cells over the thresholds' range, built per
    call in O(L): ``first[c]`` counts the thresholds in cells below ``c``, so
    a value in cell ``c`` has at least ``first[c]`` thresholds below it and
    searches only its own cell's few, ``thresholds[first[c]:first[c + 1]]``.
    The cell map is one monotone function applied to thresholds and values
    alike (a threshold in a lower cell is below the value, one in a higher
    cell above it), so the count is exact. Shorter stretches search all the
    thresholds.

    Parameters
    ----------
    x : ndarray, shape (n,), float64 (a column view is fine)
    thresholds : ndarray, shape (L - 1,), float64, ascending
    out : ndarray, shape (n,), integer; written in place
    """
    n = x.shape[0]
    m = thresholds.shape[0]
    size = max(4 * m, 64)
    grid = m >= 2 and n >= size
    lo = 0.0
    scale = 0.0
    if grid:
        lo = thresholds[0]
        span = thresholds[m - 1] - lo
        scale = (size - 1) / span if span > 0.0 else 0.0
        grid = 0.0 < scale < 1e300
    if not grid:
        for i in range(n):
            v = x[i]
            out[i] = m if v != v else _count_at_or_below(thresholds, 0, m, v)
        return
    top = size - 1.0
    first = np.empty(size + 1, np.int64)
    j = 0
    for c in range(size):
        first[c] = j
        while j < m:
            f = (thresholds[j] - lo) * scale
            if (size - 1 if f >= top else (int(f) if f > 0.0 else 0)) > c:
                break
            j += 1
    first[size] = m
    for i in range(n):
        v = x[i]
        if v != v:
            out[i] = m
            continue
        f = (v - lo) * scale
        c = size - 1 if f >= top else (int(f) if f > 0.0 else 0)
        out[i] = _count_at_or_below(thresholds, first[c], first[c + 1], v)


@njit(cache=True)
def monitor_block(x, ref, g0_db, g1_db, limit_gain, release, ceiling, out):  # pragma: no cover
    """The monitor output of one block: gain ramp, limiter and ceiling.

    ``out`` may be float32 (a device buffer): the limiting is done in float64
    and the clipped value stored.

    ``y = (x - ref) * g`` (``ref`` may have no rows: then ``y = x * g``), where
    the gain ``g`` moves linearly in dB from ``g0_db`` (before the block) to
    ``g1_db`` (at its last frame); non-finite samples become 0. The limiter
    gain is ``new = min(ceiling / peak(y), limit_gain * release, 1)``: it drops
    at once, and when it recovers it ramps linearly from ``limit_gain`` across
    the block. Finally every sample is clipped to ``[-ceiling, ceiling]``.

    Returns
    -------
    (new limiter gain, peak of y, peak of the output)
    """
    n, C = x.shape
    noise = ref.shape[0] > 0
    steady = g0_db == g1_db
    g = 10.0 ** (g1_db / 20.0)
    peak = 0.0
    for i in range(n):
        if not steady:
            g = 10.0 ** ((g0_db + (g1_db - g0_db) * (i + 1) / n) / 20.0)
        for c in range(C):
            v = x[i, c]
            if noise:
                v -= ref[i, c]
            v *= g
            if not np.isfinite(v):
                v = 0.0
            out[i, c] = v
            a = abs(v)
            if a > peak:
                peak = a
    need = ceiling / peak if peak > ceiling else 1.0
    new = min(need, limit_gain * release, 1.0)
    top = 0.0
    for i in range(n):
        lg = limit_gain + (new - limit_gain) * (i + 1) / n if new > limit_gain else new
        for c in range(C):
            v = out[i, c] * lg
            if v > ceiling:
                v = ceiling
            elif v < -ceiling:
                v = -ceiling
            out[i, c] = v
            a = abs(v)
            if a > top:
                top = a
    return new, peak, top


@njit(cache=True, nogil=True)
def _hist_edges(c):  # pragma: no cover - compiled
    n = c.shape[0]
    e = np.empty(n + 1)
    if n < 2:
        e[0] = c[0] - 0.5e-6
        e[1] = c[0] + 0.5e-6
        return e
    w = c[1] - c[0]
    for i in range(n):
        e[i] = c[i] - 0.5 * w
    e[n] = c[n - 1] + 0.5 * w
    return e


@njit(cache=True, nogil=True)
def js_divergence(c1, n1, c2, n2, points):  # pragma: no cover - compiled
    """Jensen-Shannon divergence (bits) of two histograms (bin centers, counts)
    that may sit on different uniform grids: both are moved onto one common
    grid of ``points`` cells by linear interpolation of their cumulative counts.
    """
    e1 = _hist_edges(c1)
    e2 = _hist_edges(c2)
    grid = np.linspace(min(e1[0], e2[0]), max(e1[-1], e2[-1]), points + 1)
    z1 = np.zeros(n1.shape[0] + 1)
    z1[1:] = np.cumsum(n1)
    z2 = np.zeros(n2.shape[0] + 1)
    z2[1:] = np.cumsum(n2)
    p = np.diff(np.interp(grid, e1, z1))
    q = np.diff(np.interp(grid, e2, z2))
    sp = p.sum()
    sq = q.sum()
    if sp > 0:
        p = p / sp
    if sq > 0:
        q = q / sq
    kp = 0.0
    kq = 0.0
    for i in range(points):
        m = 0.5 * (p[i] + q[i])
        if p[i] > 0:
            kp += p[i] * np.log2(p[i] / m)
        if q[i] > 0:
            kq += q[i] * np.log2(q[i] / m)
    return max(0.0, 0.5 * (kp + kq))


def warm_up() -> None:
    """Compile (or load from the disk cache) every kernel for the array types
    the live nodes pass, so no compilation happens inside an audio callback:
    whole blocks (contiguous) with the node's own tables, and column views
    with a codebook's read-only rows (a change inside a block)."""
    whole = np.zeros((2, 2))
    column = np.zeros((2, 4))[:, 1:2]
    row = np.zeros((1, 1))
    row.setflags(write=False)
    for dt in (np.uint8, np.uint16, np.uint32):
        idx = np.zeros((2, 2), dtype=dt)
        encode_rows(whole, np.zeros((2, 1)), idx)
        encode_rows(column, row, idx[:, 1:2])
        decode_rows(idx, np.zeros((2, 1)), whole.copy())
        decode_rows(idx[:, 1:2], row, np.zeros((2, 4))[:, 1:2])
        # an encoder's stretch: a column of a block, a codebook's read-only thresholds
        encode_span(whole[:, 1], row[0], idx[:, 1])
        encode_span(whole[:, 1], np.zeros(1), idx[:, 1])
    js_divergence(np.arange(2.0), np.ones(2), np.arange(2.0), np.ones(2), 4)
    for out in (np.empty((2, 2)), np.empty((2, 2), dtype=np.float32)):  # (device buffers)
        monitor_block(whole, whole, 0.0, -1.0, 1.0, 1.0, 0.5, out)
