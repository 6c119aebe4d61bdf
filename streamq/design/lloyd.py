"""Lloyd-Max quantizer design on histograms, raw samples and parametric PDFs.

Lloyd's iteration alternates the two necessary conditions of an MSE-optimal
scalar quantizer: thresholds halfway between adjacent levels (nearest
neighbour) and levels at the centroids of their cells. On a histogram the
cell moments are differences of prefix sums of the weights and of their first
and second moments, so one iteration costs a ``searchsorted`` of ``L - 1``
thresholds into the bin centers plus O(L) arithmetic: the number of bins
only enters once, when the prefix sums are formed (and they can be passed in
precomputed, see :func:`histogram_prefix`).

Raw samples are the special case of a histogram with one unit-weight point
per sorted sample; that design stops at the exact fixed point of Lloyd's
iteration (the partition no longer changes), which is the 1-D k-means result
that Lloyd's algorithm reaches from the given start.

For a parametric PDF the cell moments are exact (see :mod:`.pdfs`) and the
iteration starts from the asymptotically optimal compander (levels at the
quantiles of the density proportional to ``p**(1/3)``); each step tries a
safeguarded Newton step on the levels (the Hessian of the distortion is
tridiagonal) and falls back to the plain Lloyd step when that does not lower
the distortion, so the published tables are reached to full float precision
in tens of iterations instead of thousands.

References
----------
.. [1] S. P. Lloyd, "Least squares quantization in PCM", Bell Labs memo 1957;
   IEEE Trans. Information Theory 28(2), 1982.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960.
.. [3] P. E. Fleischer, "Sufficient conditions for achieving minimum
   distortion in a quantizer", IEEE Int. Conv. Rec., 1964.
.. [4] A. Gersho and R. M. Gray, *Vector Quantization and Signal
   Compression*, Kluwer, 1992, ch. 6.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg as sla

from streamq.design._levels import codebook_from_levels, spread_levels
from streamq.design._validate import (
    MAX_MAGNITUDE,
    check_levels,
    check_stopping,
    finite_array,
    histogram_arrays,
)
from streamq.design.codebook import Codebook
from streamq.design.pdfs import PdfModel, pdf_model
from streamq.design.report import (
    DesignReport,
    evaluate_pdf,
    make_report,
    snr_db,
)
from streamq.errors import StreamqError

__all__ = [
    "HistogramPrefix",
    "histogram_prefix",
    "sample_histogram",
    "lloyd_max_histogram",
    "lloyd_max_samples",
    "lloyd_max_pdf",
]


class HistogramPrefix:
    """Prefix sums of a histogram, ready for repeated Lloyd designs.

    Build with :func:`histogram_prefix`. The centers are stored shifted by
    ``ref`` (the weighted mean) and the weights normalised to sum to one,
    which keeps the moment sums well conditioned.

    Attributes
    ----------
    centers : ndarray
        Original bin centers (sorted).
    shifted : ndarray
        ``centers - ref``.
    ref : float
        Shift applied to the centers.
    p01 : ndarray, shape (bins + 1, 2)
        Cumulative sums (leading row of zeros) of the normalised weights
        ``w`` and of ``w * (c - ref)``, interleaved so that one gather fetches
        both; ``p0`` and ``p1`` are its two columns.
    total2 : float
        ``sum w (c - ref)**2`` (normalised weights).
    power : float
        Weighted mean square of the original centers.
    occupied : int
        1 if all the weight sits on one value (a constant signal), else -1
        (more than one value; not counted).
    total : float
        Sum of the original weights.
    """

    __slots__ = ("centers", "shifted", "ref", "p01", "p0", "p1", "_p2", "total2", "power",
                 "occupied", "total")

    def __init__(self, centers, shifted, ref, p01, total2, power, occupied, total):
        self.centers = centers
        self.shifted = shifted
        self.ref = ref
        self.p01 = p01
        self.p0 = p01[:, 0]
        self.p1 = p01[:, 1]
        self._p2 = None
        self.total2 = total2
        self.power = power
        self.occupied = occupied
        self.total = total

    @property
    def bins(self) -> int:
        """Number of bins."""
        return self.centers.size

    @property
    def p2(self) -> np.ndarray:
        """Cumulative sums of ``w (c - ref)**2`` (computed on first use)."""
        if self._p2 is None:
            p2 = np.empty_like(self.p0)
            p2[0] = 0.0
            np.cumsum(self.weights() * self.shifted * self.shifted, out=p2[1:])
            self._p2 = p2
        return self._p2

    def weights(self) -> np.ndarray:
        """Normalised weights recovered from the prefix sums."""
        return np.diff(self.p0)

    def moments(self, bounds) -> np.ndarray:
        """Cell moments (rows: cells; columns: sum w, sum w c, sum w c^2).

        ``bounds`` are bin indices, ``bounds[i]:bounds[i+1]`` being cell i
        (shifted coordinates).
        """
        b = np.asarray(bounds, dtype=np.intp)
        out = np.empty((b.size - 1, 3))
        for col, p in enumerate((self.p0, self.p1, self.p2)):
            g = p[b]
            out[:, col] = g[1:] - g[:-1]
        return out


def histogram_prefix(centers, weights, *, validate: bool = True) -> HistogramPrefix:
    """Precompute the prefix sums used by :func:`lloyd_max_histogram`.

    Parameters
    ----------
    centers : array_like
        Bin centers, sorted ascending (ties allowed).
    weights : array_like
        Non-negative bin weights (counts or probabilities), positive total.
    validate : bool
        Check the inputs (finite, sorted, non-negative). Turn off only for
        arrays already checked.

    Returns
    -------
    HistogramPrefix

    Raises
    ------
    StreamqError
        Empty input, NaN or infinite values, unsorted centers, negative
        weights or a zero total.
    """
    c = np.asarray(centers, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if c.ndim != 1 or w.ndim != 1:
        c = c.reshape(-1)
        w = w.reshape(-1)
    if validate:
        total = float(w.sum()) if w.size else 0.0
        # cheap checks first; the detailed ones only name the culprit
        ok = (
            c.size > 0
            and c.shape == w.shape
            and math.isfinite(total)
            and total > 0.0
            and abs(c[0]) <= MAX_MAGNITUDE
            and abs(c[-1]) <= MAX_MAGNITUDE
            and (c.size == 1 or bool((c[1:] >= c[:-1]).all()))
            and w.min() >= 0.0
        )
        if not ok:
            c, w = histogram_arrays(c, w)
    if c.size == 0 or c.shape != w.shape:
        c, w = histogram_arrays(c, w)   # raises: the compiled sums need matching, non-empty arrays
    from streamq.design.lloyd_kernels import prefix_sums
    c = np.ascontiguousarray(c)
    shifted, ref, p01, total2, power, single, total = prefix_sums(c, np.ascontiguousarray(w))
    return HistogramPrefix(c, shifted, ref, p01, total2, power, 1 if single else -1, total)


def _prefix_arrays(c, w):
    """The definition of the prefix sums (compiled as
    :func:`streamq.design.lloyd_kernels.prefix_sums`, which returns the same tuple).

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


def sample_histogram(samples, bins: int = 4096, *, value_range=None):
    """Fine histogram of raw samples with bin centroids as centers.

    Uniform bins over the samples' range (or ``value_range``); each
    occupied bin is represented by the mean of its samples, so the
    histogram keeps the exact mean of the data. Empty bins get their
    midpoint and zero weight.

    Parameters
    ----------
    samples : array_like
        Finite samples (any shape, pooled).
    bins : int
        Number of bins (>= 1).
    value_range : (float, float), optional
        Range to bin over; samples outside are clipped into the end bins.

    Returns
    -------
    centers, weights : ndarray
    """
    x = finite_array(samples, "samples")
    bins = int(bins)
    if bins < 1:
        raise StreamqError(f"bins must be at least 1, got {bins}")
    if value_range is None:
        lo, hi = float(x.min()), float(x.max())
    else:
        lo, hi = (float(v) for v in value_range)
        if not (math.isfinite(lo) and math.isfinite(hi) and hi >= lo):
            raise StreamqError(f"bad histogram range {value_range!r}")
    if hi <= lo:
        return np.array([lo]), np.array([float(x.size)])
    scale = bins / (hi - lo)
    idx = ((x - lo) * scale).astype(np.intp)
    np.clip(idx, 0, bins - 1, out=idx)
    counts = np.bincount(idx, minlength=bins).astype(np.float64)
    sums = np.bincount(idx, weights=x, minlength=bins)
    mid = lo + (np.arange(bins) + 0.5) / scale
    occupied = counts > 0
    centers = np.where(occupied, sums / np.where(occupied, counts, 1.0), mid)
    # rounding can push a centroid just outside its bin; keep order
    centers = np.maximum.accumulate(centers)
    return centers, counts


def _cube_root_start(pre: "HistogramPrefix", count):
    """Levels at the quantiles of a p**(1/3) estimate (optimal compander rule).

    The definition of :func:`streamq.design.lloyd_kernels.cube_root_start`,
    which the designs run.

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


def _split_worst(S, y, bounds, pre):
    """Reassign empty cells by splitting the cells with the largest distortion.

    ``S`` holds the cell moments (rows: cells), ``y`` the levels (centroids
    for occupied cells; changed in place and re-sorted) and ``bounds`` the
    bin index bounds of each cell. Each empty level takes the upper half of
    the worst cell, split at its centroid. Returns the total distortion of
    the resulting partition and whether some empty cells could not be used
    (all occupied cells are pure). Compiled as part of
    :func:`streamq.design.lloyd_kernels.lloyd_iterate`.
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


_HUGE = 1e308  # finite start value, so that the first relative change is large
# cells lighter than this (normalised weight) take the careful path: their
# centroid from prefix-sum differences could stray out of the cell
_TINY = 1e-10


def _lloyd_core(pre: HistogramPrefix, y, tol, max_iter, record):
    """Plain Lloyd on prefix sums; ``y`` are levels in shifted coordinates.

    The definition of :func:`streamq.design.lloyd_kernels.lloyd_iterate`,
    which the designs run (see :func:`_lloyd_run`).

    The loop is written for low per-iteration overhead (a handful of numpy
    calls on arrays of length L): the thresholds are kept doubled
    (``y[i] + y[i+1]``) and searched among doubled centers, which is exact;
    the distortion is the total second moment minus ``sum(s1 * y)``. Empty
    cells show up as a NaN distortion (0/0) and are handled outside the
    fast path, by :func:`_split_worst`.

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
    D_prev = _HUGE
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
            if not -_HUGE < D < _HUGE or s0.min() < _TINY:
                # some cell is empty (0/0) or nearly so: a centroid made of
                # prefix-sum differences is then unreliable, so keep every
                # level inside its own cell and re-use empty levels
                S = pre.moments(b)
                occ = s0 > 0.0
                y_new[~occ] = y[~occ]
                lo = b[:-1][occ]
                hi = b[1:][occ] - 1
                y_new[occ] = np.clip(y_new[occ], pre.shifted[lo], pre.shifted[hi])
                D, stuck, filled = _split_worst(S, y_new, b, pre)
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


def _lloyd_run(pre: HistogramPrefix, y, tol, max_iter, record):
    """:func:`_lloyd_core`, compiled: the same arguments and results."""
    from streamq.design.lloyd_kernels import lloyd_iterate
    y, it, converged, stuck, filled, history = lloyd_iterate(
        pre.shifted, pre.p01, pre.total2, np.ascontiguousarray(y, dtype=np.float64),
        tol, max_iter, record)
    return y, it, converged, (history.tolist() if record else None), (filled if stuck else None)


def _levels_codebook(lv, count, version):
    """Codebook of levels with midpoint thresholds (``lv`` is taken over); a
    degenerate level set is repaired by :func:`codebook_from_levels`."""
    from streamq.design.lloyd_kernels import midpoint_thresholds
    if lv.size == count:
        th, ok = midpoint_thresholds(lv, True)
        if ok:
            return Codebook._trusted(lv, th, version)
    return codebook_from_levels(lv, count, version)


def _finish_histogram(pre: HistogramPrefix, lv, count, version):
    """Codebook from levels, with its exact MSE and cell probabilities.

    The figures are those of the returned codebook (its own nearest-
    neighbour partition of the histogram), computed from the prefix sums.
    """
    cb = _levels_codebook(lv, count, version)
    lv = cb.levels - pre.ref
    t = np.empty(count + 1)
    t[0] = -np.inf
    t[-1] = np.inf
    np.subtract(cb.thresholds, pre.ref, out=t[1:-1])
    b = np.searchsorted(pre.shifted, t)
    G = pre.p01[b]
    S = G[1:] - G[:-1]
    s0 = S[:, 0]
    s1 = S[:, 1]
    mse = pre.total2 - 2.0 * float(lv.dot(s1)) + float((lv * lv).dot(s0))
    if mse < 1e-13 * pre.total2:
        # at the rounding level of the prefix sums (a near-exact fit): measure
        # directly, so that an exact reproduction reports exactly zero
        idx = np.repeat(np.arange(count), np.diff(b))
        err = pre.centers - cb.levels[idx]
        mse = float(pre.weights().dot(err * err))
    return cb, max(mse, 0.0), s0


def _initial_levels(pre, count, init):
    if init is None:
        from streamq.design.lloyd_kernels import cube_root_start
        return cube_root_start(pre.shifted, pre.p0, count)
    lv = init.levels if isinstance(init, Codebook) else finite_array(init, "init")
    if lv.size != count:
        raise StreamqError(
            f"init has {lv.size} levels but {count} were asked for"
        )
    y = lv - pre.ref
    if not isinstance(init, Codebook):
        y.sort()
    return y


def _design_levels(pre: HistogramPrefix, count, init, tol, max_iter, record):
    """Lloyd-Max levels (original coordinates) for a histogram's prefix sums:
    (levels, iterations, converged, history). See :func:`lloyd_max_histogram`."""
    y = _initial_levels(pre, count, init)
    if pre.occupied == 1:
        # constant signal: one value, spare levels spread around it
        return pre.centers[np.argmax(pre.weights())].reshape(1), 0, True, None
    if max_iter == 0:
        return y + pre.ref, 0, False, None
    y, it, converged, history, stuck = _lloyd_run(pre, y, tol, max_iter, record)
    lv = y + pre.ref
    if stuck is not None:
        # every occupied cell is pure: keep the levels that own data and
        # spread the spare ones between them
        kept = lv[stuck]
        # a pure cell's level is its value: snap to the exact data value
        vals = np.unique(pre.centers[pre.weights() > 0])
        i = np.clip(np.searchsorted(vals, kept), 1, max(vals.size - 1, 1))
        lower = vals[i - 1]
        upper = vals[np.minimum(i, vals.size - 1)]
        kept = np.where(np.abs(kept - lower) <= np.abs(upper - kept), lower, upper)
        lv = spread_levels(kept, count)
    return lv, it, converged, history


#: Stopping rule of the histogram designs (:func:`lloyd_max_histogram`).
HISTOGRAM_TOL = 1e-7
HISTOGRAM_MAX_ITER = 1000


def lloyd_max_histogram(
    centers=None,
    weights=None,
    levels=None,
    *,
    init=None,
    prefix: HistogramPrefix | None = None,
    tol: float = HISTOGRAM_TOL,
    max_iter: int = HISTOGRAM_MAX_ITER,
    record: bool = False,
    version: int = 0,
    method: str = "lloyd-max",
):
    """Lloyd-Max quantizer for a histogram (weighted point masses).

    Parameters
    ----------
    centers, weights : array_like
        Sorted bin centers and non-negative weights. Not needed when
        ``prefix`` is given.
    levels : int, optional
        Number of levels L (2..65536). Defaults to the size of ``init``.
    init : Codebook or array_like, optional
        Warm start: the levels to start from (e.g. the codebook in force).
        Without it the start is the p**(1/3) quantile rule.
    prefix : HistogramPrefix, optional
        Precomputed prefix sums (from :func:`histogram_prefix`); saves the
        O(bins) set-up when the same histogram is designed for repeatedly.
    tol : float
        Stop when the distortion falls by less than ``tol`` relative to its
        previous value (or when the partition stops changing).
    max_iter : int
        Iteration cap.
    record : bool
        Keep the distortion after every iteration in ``report.history``.
    version : int
        Version number of the returned codebook.

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the weighted histogram.

    Notes
    -----
    Empty cells never produce NaN: an empty level is moved to split the cell
    with the largest distortion contribution. If the histogram has fewer
    occupied values than levels, the spare levels are spread between them
    (see :func:`streamq.design._levels.spread_levels`), so each occupied
    value is reproduced exactly.

    References
    ----------
    .. [1] S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans.
       Information Theory 28(2), 1982.
    .. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
       Theory 6(1), 1960.
    """
    pre = prefix if prefix is not None else histogram_prefix(centers, weights)
    if levels is None:
        if init is None:
            raise StreamqError("give the number of levels or an init codebook")
        levels = init.size if isinstance(init, Codebook) else np.asarray(init).size
    count = check_levels(levels)
    tol, max_iter = check_stopping(tol, max_iter)
    lv, it, converged, history = _design_levels(pre, count, init, tol, max_iter, record)
    cb, mse, probs = _finish_histogram(pre, lv, count, version)
    p = probs[probs > 0.0]
    entropy = max(-float(p.dot(np.log2(p))), 0.0) + 0.0  # never -0.0
    rep = DesignReport(
        method=method,
        size=count,
        iterations=it,
        mse=mse,
        snr_db=snr_db(pre.power, mse),
        entropy_bits=entropy,
        converged=converged,
        power=pre.power,
        reference="histogram",
        history=history or (),
    )
    return cb, rep


def lloyd_max_samples(
    samples,
    levels=None,
    *,
    init=None,
    max_iter: int = 10000,
    tol: float = 0.0,
    record: bool = False,
    version: int = 0,
):
    """Sample-exact Lloyd design (1-D k-means) on raw samples.

    The samples are sorted once and Lloyd's iteration runs on their prefix
    sums (O(L log N) per iteration) until the partition of the samples
    stops changing: the exact fixed point that Lloyd's algorithm reaches
    from the given start (with ``tol > 0`` it may stop earlier, on the
    relative distortion change).

    Parameters
    ----------
    samples : array_like
        Finite samples (any shape, pooled).
    levels : int, optional
        Number of levels (defaults to the size of ``init``).
    init : Codebook or array_like, optional
        Starting levels; default: the p**(1/3) quantile rule on the samples.
    max_iter, tol, record, version
        As for :func:`lloyd_max_histogram`.

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the samples.

    References
    ----------
    .. [1] S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans.
       Information Theory 28(2), 1982.
    """
    x = np.sort(finite_array(samples, "samples"))
    pre = histogram_prefix(x, np.ones(x.size), validate=False)
    cb, rep = lloyd_max_histogram(
        levels=levels, init=init, prefix=pre, tol=tol, max_iter=max_iter,
        record=record, version=version, method="lloyd-max",
    )
    # measure on the samples themselves (exact, O(N))
    err = x - cb.levels[np.searchsorted(cb.thresholds, x, side="right")]
    mse = float(np.dot(err, err) / x.size)
    return cb, _replace(rep, reference="samples", mse=mse, snr_db=snr_db(rep.power, mse))


def _replace(rep: DesignReport, **changes) -> DesignReport:
    from dataclasses import replace

    return replace(rep, **changes)


# -- parametric PDF -----------------------------------------------------------


def _pdf_cells(model: PdfModel, y):
    t = 0.5 * (y[:-1] + y[1:])
    a = np.concatenate(([-np.inf], t))
    b = np.concatenate((t, [np.inf]))
    m0, m1, m2 = model.partial_moments(a, b)
    return t, m0, m1, m2


def _pdf_distortion(y, m0, m1, m2):
    return float(np.sum(np.maximum(m2 - 2.0 * y * m1 + y * y * m0, 0.0)))


def _symmetrize(y, mean):
    z = y - mean
    z = 0.5 * (z - z[::-1])
    return z + mean


def _newton_step(model, y, t, m0, m1, symmetric=False):
    """Newton step on the levels for the NN-centroid distortion D(y).

    With ``symmetric`` the step is taken in the subspace of level sets
    symmetric about the mean: only the upper half of the levels is free
    (the middle level, for odd L, stays at the mean; for even L the middle
    threshold stays at the mean and its coupling drops out). That removes
    the flat direction of a common shift, which makes the full Hessian
    singular at the optimum for densities with exponential tails
    (Laplacian).
    """
    g = 2.0 * (y * m0 - m1)
    p = model.pdf(t)
    # an infinite density at a threshold (two-sided gamma at its centre):
    # treat that threshold as fixed, which symmetry makes it anyway
    p = np.where(np.isfinite(p), p, 0.0)
    c = p * (y[1:] - y[:-1]) * 0.5  # coupling through each threshold
    n = y.size
    lo = 0
    if symmetric:
        lo = (n + 1) // 2
        if n % 2 == 0:
            c[lo - 1] = 0.0  # the middle threshold does not move
    diag = 2.0 * m0
    diag[:-1] -= c
    diag[1:] -= c
    ab = np.zeros((2, n - lo))
    ab[0, 1:] = -c[lo:]  # upper diagonal, solveh_banded "upper" layout
    ab[1] = diag[lo:]
    if not np.all(np.isfinite(ab)):
        return None
    try:
        delta = sla.solveh_banded(ab, -g[lo:], check_finite=False)
    except (np.linalg.LinAlgError, ValueError):
        return None
    yn = y.copy()
    yn[lo:] += delta
    if symmetric:
        yn = _symmetrize_from_upper(yn, model.mean)
    if not (np.all(np.isfinite(yn)) and np.all(yn[1:] > yn[:-1])):
        return None
    return yn


def _symmetrize_from_upper(y, mean):
    """Mirror the upper half of the levels about the mean."""
    n = y.size
    z = y - mean
    h = n // 2
    z[:h] = -z[n - h:][::-1]
    if n % 2:
        z[h] = 0.0
    return z + mean


def lloyd_max_pdf(
    pdf,
    levels: int,
    *,
    init=None,
    tol: float = 1e-12,
    max_iter: int = 5000,
    newton: bool = True,
    symmetric: bool | None = None,
    record: bool = False,
    version: int = 0,
):
    """Lloyd-Max quantizer for a parametric PDF, to float precision.

    Parameters
    ----------
    pdf : PdfModel or str
        Model (see :func:`streamq.design.pdf_model`) or a model name
        (zero mean, unit variance).
    levels : int
        Number of levels L (2..65536).
    init : Codebook or array_like, optional
        Starting levels; default: quantiles of p**(1/3) (the optimal
        compander), already close to the optimum.
    tol : float
        Stop when the distortion falls by less than ``tol`` relative
        (default 1e-12), or when no step lowers it any more.
    max_iter : int
        Iteration cap.
    newton : bool
        Try a Newton step on the levels at each iteration (accepted only if
        it lowers the distortion; otherwise the Lloyd step is taken).
    symmetric : bool, optional
        Keep the levels symmetric about the model's mean (the start is
        symmetrised first). Default: True without ``init``, False with one
        (a warm start is followed wherever it leads). Every model here is
        symmetric, and the symmetric iteration also removes the flat
        common-shift direction that stalls Newton steps on exponential
        tails.
    record : bool
        Keep the distortion after every iteration in ``report.history``.

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the PDF (exact partial moments).

    Notes
    -----
    The distortion minimised is ``D(y) = sum_i int_{cell i} (x - y_i)^2
    p(x) dx`` with cells bounded by the midpoints of the levels. Its
    gradient is ``2 (y_i m0_i - m1_i)`` and its Hessian is tridiagonal with
    diagonal ``2 m0_i - c_{i-1} - c_i`` and off-diagonal ``-c_i``, where
    ``c_i = p(t_i) (y_{i+1} - y_i) / 2``. For symmetric models the levels
    are kept exactly symmetric about the mean.

    References
    ----------
    .. [1] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
       Theory 6(1), 1960.
    .. [2] S. P. Lloyd, "Least squares quantization in PCM", IEEE Trans.
       Information Theory 28(2), 1982.
    .. [3] P. E. Fleischer, "Sufficient conditions for achieving minimum
       distortion in a quantizer", IEEE Int. Conv. Rec., 1964.
    """
    model = pdf if isinstance(pdf, PdfModel) else pdf_model(pdf)
    count = check_levels(levels)
    tol, max_iter = check_stopping(tol, max_iter)
    if init is None:
        y = np.asarray(model.cube_root_ppf((np.arange(count) + 0.5) / count), dtype=np.float64)
    else:
        lv = init.levels if isinstance(init, Codebook) else finite_array(init, "init")
        if lv.size != count:
            raise StreamqError(f"init has {lv.size} levels but {count} were asked for")
        y = np.sort(np.array(lv, dtype=np.float64))
    symmetric = init is None if symmetric is None else bool(symmetric)
    if symmetric:
        y = _symmetrize(y, model.mean)
    t, m0, m1, m2 = _pdf_cells(model, y)
    D = _pdf_distortion(y, m0, m1, m2)
    history = [D] if record else []
    converged = False
    it = 0
    use_newton = bool(newton)
    for it in range(1, int(max_iter) + 1):
        best = None
        if use_newton:
            yn = _newton_step(model, y, t, m0, m1, symmetric)
            if yn is not None:
                cells = _pdf_cells(model, yn)
                Dn = _pdf_distortion(yn, *cells[1:])
                if Dn < D:
                    best = (yn, cells, Dn)
        if best is None:
            occ = m0 > 0
            yl = np.where(occ, m1 / np.where(occ, m0, 1.0), y)
            if symmetric:
                yl = _symmetrize(yl, model.mean)
            if np.all(yl[1:] > yl[:-1]):
                cells = _pdf_cells(model, yl)
                Dl = _pdf_distortion(yl, *cells[1:])
                if Dl <= D:
                    best = (yl, cells, Dl)
        if best is None:
            converged = True  # nothing lowers the distortion at float precision
            it -= 1
            break
        y, (t, m0, m1, m2), Dn = best
        if record:
            history.append(Dn)
        small = D - Dn <= tol * D
        D = Dn
        if small:
            converged = True
            break
    cb = codebook_from_levels(y, count, version)
    mse, probs = evaluate_pdf(cb.levels, cb.thresholds, model)
    rep = make_report(
        "lloyd-max", cb, it, converged, mse=mse, probs=probs, power=model.power,
        reference=f"pdf:{model!r}", history=history,
    )
    return cb, rep
