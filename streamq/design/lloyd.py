"""Lloyd-Max quantizer design on histograms and raw samples.

Lloyd's iteration alternates the two necessary conditions of an MSE-optimal
scalar quantizer: thresholds halfway between adjacent levels (nearest
neighbour) and levels at the centroids of their cells. On a histogram the
cell moments are differences of prefix sums of the weights and of their first
and second moments (:mod:`.histogram`), so one iteration costs a search of
``L - 1`` thresholds among the bin centers plus O(L) arithmetic: the number of
bins only enters once, when the prefix sums are formed (and they can be passed
in precomputed, see :func:`streamq.design.histogram.histogram_prefix`). The
steps are compiled (:mod:`.lloyd_steps`).

Raw samples are the special case of a histogram with one unit-weight point
per sorted sample; that design stops at the exact fixed point of Lloyd's
iteration (the partition no longer changes), which is the 1-D k-means result
that Lloyd's algorithm reaches from the given start.

The design on a parametric PDF is in :mod:`.lloyd_pdf`.

References
----------
.. [1] S. P. Lloyd, "Least squares quantization in PCM", Bell Labs memo 1957;
   IEEE Trans. Information Theory 28(2), 1982.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960.
.. [3] A. Gersho and R. M. Gray, *Vector Quantization and Signal
   Compression*, Kluwer, 1992, ch. 6.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from streamq.design._levels import codebook_from_levels, spread_levels
from streamq.design._validate import check_levels, check_stopping, finite_array
from streamq.design.codebook import Codebook
from streamq.design.histogram import HistogramPrefix, histogram_prefix
from streamq.design.lloyd_steps import cube_root_start, lloyd_iterate, midpoint_thresholds
from streamq.design.report import DesignReport, snr_db
from streamq.errors import StreamqError

__all__ = [
    "HISTOGRAM_TOL",
    "HISTOGRAM_MAX_ITER",
    "lloyd_max_histogram",
    "lloyd_max_samples",
]


def _lloyd_run(pre: HistogramPrefix, y, tol, max_iter, record):
    """Lloyd's iteration on prefix sums from the levels ``y`` (shifted
    coordinates): :func:`streamq.design.lloyd_steps.lloyd_iterate`, with its
    results as (levels, iterations, converged, history, stuck), ``stuck`` None
    or, when empty cells could not be used, the mask of levels that own data."""
    y, it, converged, stuck, filled, history = lloyd_iterate(
        pre.shifted, pre.p01, pre.total2, np.ascontiguousarray(y, dtype=np.float64),
        tol, max_iter, record)
    return y, it, converged, (history.tolist() if record else None), (filled if stuck else None)


def _levels_codebook(lv, count, version):
    """Codebook of levels with midpoint thresholds (``lv`` is taken over); a
    degenerate level set is repaired by :func:`codebook_from_levels`."""
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
    return cb, dataclasses.replace(rep, reference="samples", mse=mse, snr_db=snr_db(rep.power, mse))
