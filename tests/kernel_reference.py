"""Plain numpy definitions of streamq's compiled kernels, for the tests.

Each compiled (numba) kernel in ``streamq/`` is checked against a definition
written here with numpy alone (or plain Python), in the most direct form: these
functions are the specification, the kernels and the fast routes of the package
the implementation. One section per kernel family, in this order; the tests
name the kernel and the definition side by side.

Sections
--------
* Lloyd-Max on a histogram (``streamq.design.lloyd_steps``,
  ``streamq.design.lloyd_kernels``)
* Forward gain adaptation (``streamq.nodes.schemes.gain``)
* Index files (``streamq.engine.indexio``)
* Rate-distortion sweep (``streamq.report.sweep``)
* The pdf-estimator's windows (``streamq.nodes.estimator_kernels``)
* The error meter's frame sums and spectrum segments (``streamq.nodes.metering``)
"""

from __future__ import annotations

import math

import numpy as np

from streamq.design import Codebook
from streamq.design.histogram import HistogramPrefix
from streamq.design.lloyd_steps import HUGE_DISTORTION, TINY_CELL, midpoint_thresholds
from streamq.design.sideinfo import level_bits, round_levels

# =============================================================================
# Lloyd-Max on a histogram: streamq.design.lloyd_steps, streamq.design.lloyd_kernels
# =============================================================================


def prefix_arrays(c, w):
    """The prefix sums of a histogram (compiled as
    :func:`streamq.design.lloyd_steps.prefix_sums`, which returns the same tuple).

    Works about the weighted mean ``ref``: the second-moment sums then hold
    the variance, the smallest possible, which keeps cancellation low.
    """
    n = c.size
    total = float(w.sum())
    ref = float(w.dot(c)) / total
    if not math.isfinite(ref):
        ref = 0.5 * (float(c[0]) + float(c[-1]))
    cs = c - ref
    inv = 1.0 / total
    # a subnormal total overflows 1/total: divide instead (never a NaN)
    wn = w * inv if inv < math.inf else w / total
    p01 = np.empty((n + 1, 2))
    p01[0] = 0.0
    np.cumsum(wn, out=p01[1:, 0])
    wc = wn * cs
    np.cumsum(wc, out=p01[1:, 1])
    total2 = float(wc.dot(cs))
    mean_s = float(p01[-1, 1])
    power = total2 + 2.0 * ref * mean_s + ref * ref
    single = bool(c[0] == c[-1] or np.count_nonzero(w) == 1)
    return cs, ref, p01, total2, max(power, 0.0), single, total


def numpy_histogram_prefix(c, w) -> HistogramPrefix:
    """:class:`HistogramPrefix` made from :func:`prefix_arrays` (no compiled code)."""
    cs, ref, p01, total2, power, single, total = prefix_arrays(c, w)
    return HistogramPrefix(c, cs, ref, p01, total2, power, 1 if single else -1, total)


def cube_root_start(pre: HistogramPrefix, count):
    """Levels at the quantiles of a p**(1/3) estimate (optimal compander rule).

    Compiled as :func:`streamq.design.lloyd_steps.cube_root_start`.

    The density is estimated on segments of equal probability (M = 4 L of
    them, at most half the number of occupied points), where it is
    ``(1/M) / width``; the mass of ``p**(1/3)`` on a segment is then
    proportional to ``width**(2/3)``. Equal-probability segments keep the
    estimate stable in sparse tails, where per-bin counts are too noisy.
    """
    w = pre.weights()
    keep = w > 0
    cs = pre.shifted[keep]
    if cs.size < 2 or cs[0] == cs[-1]:
        return np.full(count, cs[0] if cs.size else 0.0)
    mid = (pre.p0[:-1] + 0.5 * w)[keep]  # cumulative weight at each point
    segments = int(min(max(4 * count, 64), max(cs.size // 2, 2)))
    xq = np.interp(np.linspace(0.0, 1.0, segments + 1), mid, cs)
    mass = np.cbrt(np.diff(xq) ** 2)
    total = mass.sum()
    if not total > 0:
        return np.interp((np.arange(count) + 0.5) / count, mid, cs)
    g = np.concatenate(([0.0], np.cumsum(mass))) / total
    return np.interp((np.arange(count) + 0.5) / count, g, xq)


def split_worst(S, y, bounds, pre):
    """Reassign empty cells by splitting the cells with the largest distortion.

    ``S`` holds the cell moments (rows: cells), ``y`` the levels (centroids
    for occupied cells; changed in place and re-sorted) and ``bounds`` the
    bin index bounds of each cell. Each empty level takes the upper half of
    the worst cell, split at its centroid. Returns the total distortion of
    the resulting partition and whether some empty cells could not be used
    (all occupied cells are pure). Compiled as part of
    :func:`streamq.design.lloyd_steps.lloyd_iterate`.
    """
    s0 = S[:, 0]
    occ = s0 > 0.0
    yo = np.where(occ, y, 0.0)
    d = np.where(occ, S[:, 2] - 2.0 * yo * S[:, 1] + yo * yo * s0, 0.0)
    np.maximum(d, 0.0, out=d)
    empty = np.flatnonzero(~occ)
    stuck = False
    p0, p1, p2 = pre.p0, pre.p1, pre.p2
    shifted = pre.shifted
    lo_of = np.array(bounds[:-1], dtype=np.intp)  # bin range of each level's cell
    hi_of = np.array(bounds[1:], dtype=np.intp)
    cand = d.copy()  # split candidates; cells found unsplittable drop out
    filled = occ.copy()
    for e in empty:
        j = int(np.argmax(cand))
        while cand[j] > 0.0:
            lo, hi = int(lo_of[j]), int(hi_of[j])
            # split at the centroid: values below it go left, the rest right
            # (shifted[m-1] < y[j] <= shifted[m], so the halves hold distinct
            # values); a centroid at the edge of its cell means a pure cell
            m = int(np.searchsorted(shifted[lo:hi], y[j], side="left")) + lo
            if lo < m < hi:
                l0, r0 = p0[m] - p0[lo], p0[hi] - p0[m]
                if l0 > 0.0 and r0 > 0.0:
                    break
            cand[j] = 0.0  # this cell cannot be split; try the next worst
            j = int(np.argmax(cand))
        if not cand[j] > 0.0:
            stuck = True
            break
        l1, r1 = p1[m] - p1[lo], p1[hi] - p1[m]
        l2, r2 = p2[m] - p2[lo], p2[hi] - p2[m]
        yl, yr = l1 / l0, r1 / r0
        y[j], y[e] = yl, yr
        d[j] = cand[j] = max(l2 - l1 * yl, 0.0)
        d[e] = cand[e] = max(r2 - r1 * yr, 0.0)
        hi_of[j] = m
        lo_of[e], hi_of[e] = m, hi
        filled[e] = True
    order = np.argsort(y, kind="stable")
    y[:] = y[order]
    return float(d.sum()), stuck, filled[order]


def lloyd_core(pre: HistogramPrefix, y, tol, max_iter, record):
    """Plain Lloyd on prefix sums; ``y`` are levels in shifted coordinates.

    Compiled as :func:`streamq.design.lloyd_steps.lloyd_iterate`, which the
    designs run (see :func:`streamq.design.lloyd._lloyd_run`).

    The loop is written for low per-iteration overhead (a handful of numpy
    calls on arrays of length L): the thresholds are kept doubled
    (``y[i] + y[i+1]``) and searched among doubled centers, which is exact;
    the distortion is the total second moment minus ``sum(s1 * y)``. Empty
    cells show up as a NaN distortion (0/0) and are handled outside the
    fast path, by :func:`split_worst`.

    Returns (levels, iterations, converged, history, stuck) where ``stuck``
    is None or, when empty cells could not be used, the mask of levels that
    own data.
    """
    p01 = pre.p01
    cs2 = pre.shifted * 2.0
    L = y.size
    total2 = pre.total2
    # doubled thresholds with -inf/+inf ends: one searchsorted gives the
    # cell bounds [0, k_1, ..., k_{L-1}, bins] directly
    t2 = np.empty(L + 1)
    t2[0] = -np.inf
    t2[-1] = np.inf
    t2_inner = t2[1:-1]
    y = np.array(y, dtype=np.float64)
    history = [] if record else None
    D_prev = HUGE_DISTORTION
    converged = False
    stuck = False
    it = 0
    searchsorted = np.searchsorted
    add = np.add
    with np.errstate(divide="ignore", invalid="ignore"):
        for it in range(1, max_iter + 1):
            add(y[:-1], y[1:], out=t2_inner)
            b = searchsorted(cs2, t2)
            G = p01[b]
            S = G[1:] - G[:-1]
            s0 = S[:, 0]
            s1 = S[:, 1]
            y_new = s1 / s0
            D = total2 - s1.dot(y_new)
            if not -HUGE_DISTORTION < D < HUGE_DISTORTION or s0.min() < TINY_CELL:
                # some cell is empty (0/0) or nearly so: a centroid made of
                # prefix-sum differences is then unreliable, so keep every
                # level inside its own cell and re-use empty levels
                S = pre.moments(b)
                occ = s0 > 0.0
                y_new[~occ] = y[~occ]
                lo = b[:-1][occ]
                hi = b[1:][occ] - 1
                y_new[occ] = np.clip(y_new[occ], pre.shifted[lo], pre.shifted[hi])
                D, stuck, filled = split_worst(S, y_new, b, pre)
            y = y_new
            if D < 0.0:
                D = 0.0  # rounding of total2 - s1.y on an exact fit
            if record:
                history.append(D)
            if stuck or D_prev - D <= tol * D_prev:
                converged = True
                break
            D_prev = D
    return y, it, converged, history, (filled if stuck else None)


def warm_start(init, centers, counts, n_levels):
    """The warm-start rule in numpy (see ``lloyd_kernels._fits_window``): the
    codebook in force, or None for a cold start."""
    if init is None:
        return None
    lv = init.levels            # non-decreasing: the first and last are the extremes
    if lv.size < n_levels:
        return None
    occupied = np.flatnonzero(counts > 0)
    if occupied.size == 0:
        return None
    if lv[0] < centers[occupied[0]] or lv[-1] > centers[occupied[-1]]:
        return None
    if np.count_nonzero(lv[1:] > lv[:-1]) + 1 < n_levels:
        return None
    return init


def exact_codebook(occupied, centers, n_levels):
    """The exact codebook in numpy (see ``lloyd_kernels._exact_levels``): a
    level on each occupied value, the spare ones a bin width apart beyond the
    extremes."""
    spare = n_levels - occupied.size
    width = (centers[-1] - centers[0]) / max(len(centers) - 1, 1) or 1e-6
    below = spare // 2
    above = spare - below
    lv = np.concatenate([occupied[0] - width * np.arange(below, 0, -1), occupied,
                         occupied[-1] + width * np.arange(1, above + 1)])
    th, ok = midpoint_thresholds(lv, False)
    return Codebook._trusted(lv, th) if ok else Codebook(levels=lv)


def window_design(method, c, w, count, init, grid_bits):
    """What :func:`streamq.nodes.coding.window_codebook` computes, composed of
    the numpy definitions: the occupied bins, the warm-start rule, the exact
    codebook or the public design, the side-information code."""
    from streamq import design as d
    occupied = np.flatnonzero(w > 0)
    if occupied.size == 0:
        return None
    warm = warm_start(init, c, w, count)
    if method in ("lloyd-max", "optimal") and occupied.size <= count:
        cb = exact_codebook(c[occupied], c, count)
    else:
        cb, _ = d.design(method, count, centers=c, weights=w, init=warm)
    levels = round_levels(cb.levels, grid_bits)
    return levels, cb.thresholds, level_bits(levels, grid_bits), warm


# =============================================================================
# Forward gain adaptation: streamq.nodes.schemes.gain
# =============================================================================


def gain_grid_index(g, peak, top, step_db, count):
    """Gain indices on the grid (compiled as ``grid_step``): RMS gains rounded
    to the nearest grid point, peak gains over ``top`` rounded down; 0 at full
    scale, the last index (silence) for zero, NaN and gains below the grid."""
    g = np.asarray(g, dtype=np.float64)
    if peak:
        g = g / top
    with np.errstate(divide="ignore", invalid="ignore"):
        steps = -20.0 * np.log10(g) / step_db
    k = np.floor(steps) if peak else np.rint(steps)
    return np.clip(np.nan_to_num(k, nan=count - 1, posinf=count - 1), 0, count - 1).astype(np.int64)


def gain_encode(both, start, size, peak, top, step_db, count, thresholds, index):
    """One step of the gain encoder (compiled as ``gain_encode``).

    Output row ``i`` (sample ``start + i``) codes ``both[i]``; a block of
    ``size`` input samples starting at input sample ``b * size`` takes effect
    at output sample ``(b + 1) * size`` with the gain index of its own samples.
    Returns ``(indices, index in force at the end, new block indices)``.
    """
    frames = both.shape[0] - size
    channels = both.shape[1]
    at = np.arange(start, start + frames)
    first_block = [b for b in range(0, (start + frames) // size + 1)
                   if start <= (b + 1) * size < start + frames]
    ks = np.empty((len(first_block), channels), dtype=np.int64)
    out = np.empty((frames, channels), dtype=np.int64)
    index = np.array(index, dtype=np.int64)
    for c in range(channels):
        k_at = np.full(frames, index[c])
        for j, b in enumerate(first_block):
            rows = both[b * size - (start - size):(b + 1) * size - (start - size), c]
            # a NaN never raises a peak (it is no magnitude), and makes an RMS NaN
            g = np.max(np.abs(rows), initial=0.0, where=~np.isnan(rows)) if peak else \
                np.sqrt(np.mean(rows * rows))
            ks[j, c] = gain_grid_index(np.array([g]), peak, top, step_db, count)[0]
            k_at[at >= (b + 1) * size] = ks[j, c]
        for i in range(frames):
            out[i, c] = np.searchsorted(thresholds[k_at[i]], both[i, c], side="right")
        if len(first_block):
            index[c] = ks[-1, c]
    return out, index, ks


# =============================================================================
# Index files: streamq.engine.indexio
# =============================================================================


def index_versions(events, channels, s, e):
    """(from_sample, version) pairs in force in [s, e), written out plainly per
    channel: the definition of ``IndexBlock.versions`` that the writer checks and
    the reader rebuilds (:func:`streamq.engine.indexio.layout.versions_in_force`)."""
    out = []
    for c in range(channels):
        evc = [ev for ev in events if ev.channel == c]
        before = [ev for ev in evc if ev.at_sample <= s]
        pairs = [(before[-1].at_sample, before[-1].version)] if before else []
        for ev in evc:
            if s < ev.at_sample < e:
                if pairs and pairs[-1][0] == ev.at_sample:
                    pairs[-1] = (ev.at_sample, ev.version)
                else:
                    pairs.append((ev.at_sample, ev.version))
        out.append(tuple(pairs))
    return tuple(out)


# =============================================================================
# Rate-distortion sweep: streamq.report.sweep
# =============================================================================


def envelope_flags(points) -> list[bool]:
    """Whether each point lies on the sweep's upper envelope, written out
    plainly: its SNR is the best of all points at its total rate or below, and
    no cheaper point reaches the same SNR (the definition of
    :func:`streamq.report.sweep_files.envelope`)."""
    out = []
    for p in points:
        cheaper = [q["snr_db"] for q in points if q["bits_per_sample"] <= p["bits_per_sample"]]
        out.append(p["snr_db"] >= max(cheaper) and
                   not any(q["snr_db"] == p["snr_db"] and
                           q["bits_per_sample"] < p["bits_per_sample"] for q in points))
    return out


# =============================================================================
# The pdf-estimator's windows: streamq.nodes.estimator_kernels
# =============================================================================


def grid_code(v):
    """16-bit code of each value: ``v * 32768 + 32768`` for values on the grid;
    any value: the low 16 bits of ``v + 1.5 * 2**37`` (whose last mantissa bit
    is worth 2**-15) with the top one flipped, so always inside the table."""
    f = np.asarray(v, dtype=np.float64) + 1.5 * 2.0 ** 37
    return (f.view(np.int64) & 0xFFFF) ^ 0x8000


def code_counts(x):
    """Per channel, how many samples of ``x`` (frames, channels) have each code."""
    return np.stack([np.bincount(grid_code(x[:, c]), minlength=65536)
                     for c in range(x.shape[1])])


def piece_summary(x, clip_level):
    """A piece's summary per channel (columns n, sum, m2, m3, m4, min, max,
    peak, clipped): sums in sample order (cumsum's last entry), the central
    sums about the piece's own mean."""
    out = np.empty((x.shape[1], 9))
    for c in range(x.shape[1]):
        v = x[:, c]
        total = np.cumsum(v)[-1]
        d = v - total / v.size
        d2 = d * d
        out[c] = [v.size, total, np.cumsum(d2)[-1], np.cumsum(d2 * d)[-1],
                  np.cumsum(d2 * d2)[-1], v.min(), v.max(), np.abs(v).max(),
                  np.count_nonzero(np.abs(v) >= clip_level)]
    return out


def combined_summary(pieces):
    """The summary of consecutive pieces (oldest first) as one, added left to
    right with Pebay's (2008) pairwise update of the central sums (every
    channel at once)."""
    acc = pieces[0].copy()
    for p in pieces[1:]:
        na, nb = acc[:, 0], p[:, 0]
        n = na + nb
        delta = p[:, 1] / nb - acc[:, 1] / na
        d2 = delta * delta
        m2a, m3a, m4a = acc[:, 2], acc[:, 3], acc[:, 4]
        m2b, m3b, m4b = p[:, 2], p[:, 3], p[:, 4]
        m4 = (m4a + m4b + d2 * d2 * na * nb * (na * na - na * nb + nb * nb) / (n * n * n)
              + 6.0 * d2 * (na * na * m2b + nb * nb * m2a) / (n * n)
              + 4.0 * delta * (na * m3b - nb * m3a) / n)
        m3 = (m3a + m3b + d2 * delta * na * nb * (na - nb) / (n * n)
              + 3.0 * delta * (na * m2b - nb * m2a) / n)
        m2 = m2a + m2b + d2 * na * nb / n
        acc = np.stack([n, acc[:, 1] + p[:, 1], m2, m3, m4, np.minimum(acc[:, 5], p[:, 5]),
                        np.maximum(acc[:, 6], p[:, 6]), np.maximum(acc[:, 7], p[:, 7]),
                        acc[:, 8] + p[:, 8]], axis=1)
    return acc


# =============================================================================
# The error meter's frame sums and spectrum segments: streamq.nodes.metering
# =============================================================================


def meter_rows_reference(ref, x, bounds, versions, idx, active, L, F):
    """The definition of :func:`streamq.nodes.metering.frames.meter_rows` over
    a whole stream (``bounds`` and ``versions`` per sample): per-frame sums
    added in row order (cumsum), the rows left over, index counts and the
    peak error."""
    e = x - ref
    ov = ((ref < bounds[:, :, 0]) | (ref > bounds[:, :, 1])).astype(float)
    rows = np.concatenate([ref, e, ov, versions[:, None]], axis=1)
    C, K = ref.shape[1], ref.shape[0] // F
    terms = np.concatenate([ref * ref, e * e, e * e * ov, ov], axis=1)[:K * F]
    sums = np.cumsum(terms.reshape(K, F, 4 * C), axis=1)[:, -1]
    vers = versions[F - 1:K * F:F]
    counts = np.stack([np.bincount(idx[:, c], minlength=L) if active[c] else np.zeros(L, int)
                       for c in range(C)])
    return sums, vers, rows[K * F:], counts, np.abs(e).max()


def window_segments_reference(ref, x, window):
    """The definition of :func:`streamq.nodes.metering.spectrum.window_segments`
    over a whole stream: reference channels then error channels (``x - ref``)
    cut into windowed segments of ``N = len(window)``, shaped (2C, K, N), and
    the rest, windowed, shaped (2C, n - K N)."""
    N, C = window.shape[0], ref.shape[1]
    K = ref.shape[0] // N
    rows = np.concatenate([ref, x - ref], axis=1)
    segs = rows[:K * N].reshape(K, N, 2 * C).transpose(2, 0, 1) * window
    return segs, rows[K * N:].T * window[:rows.shape[0] - K * N]
