"""Entropy-constrained scalar quantizer (ECSQ) design.

The design minimises the Lagrangian ``J = D + lambda * H`` where ``D`` is the
MSE and ``H = -sum p_i log2 p_i`` the entropy of the index. Each iteration
(a Lagrangian Lloyd step) assigns every value to the level that minimises
``(x - y_i)**2 + lambda * l_i`` with ``l_i = -log2 p_i``, then moves levels
to the centroids and recomputes the probabilities. On the real line the
cells are intervals: the cost curves are parabolas of equal curvature, whose
lower envelope is found by pruning every level whose two neighbour
boundaries cross. Cells that empty out are dropped, so the codebook may
end with fewer levels than it started with.

A target entropy (bits/sample) is met by bisection on ``lambda``: ``H``
falls as ``lambda`` grows. The result is the lowest-distortion design whose
entropy does not exceed the target (within ``entropy_tol``); if the
bisection cannot get there from the default start, other starts are tried
(see :func:`ecsq_histogram`) and a remaining miss is flagged in the report.

References
----------
.. [1] P. A. Chou, T. Lookabaugh and R. M. Gray, "Entropy-constrained vector
   quantization", IEEE Trans. Acoustics, Speech and Signal Processing 37(1),
   1989.
.. [2] H. Gish and J. N. Pierce, "Asymptotically efficient quantizing", IEEE
   Trans. Information Theory 14(5), 1968.
"""

from __future__ import annotations

import math

import numpy as np

from streamq.design._levels import spread_levels
from streamq.design._validate import (
    check_integer,
    check_levels,
    check_number,
    check_stopping,
    finite_array,
)
from streamq.design.codebook import Codebook
from streamq.design.histogram import HistogramPrefix, histogram_prefix
from streamq.design.pdfs import PdfModel, pdf_histogram, pdf_model
from streamq.design.report import evaluate_histogram, evaluate_pdf, make_report
from streamq.errors import StreamqError

__all__ = ["ecsq_histogram", "ecsq_pdf"]


def _boundaries(y, lengths, lam):
    """Lower envelope of the costs (x - y_i)^2 + lam * l_i.

    Returns the surviving levels, their code lengths and the thresholds
    between them (strictly increasing).
    """
    while True:
        gap = y[1:] - y[:-1]
        t = 0.5 * (y[1:] + y[:-1]) + lam * (lengths[1:] - lengths[:-1]) / (2.0 * gap)
        if t.size < 2:
            return y, lengths, t
        bad = t[1:] <= t[:-1]  # level i+1 owns an empty interval
        if not bad.any():
            return y, lengths, t
        keep = np.concatenate(([True], ~bad, [True]))
        y = y[keep]
        lengths = lengths[keep]


def _cell_sums(pre: HistogramPrefix, t):
    """Weight, first and second moment sums of the cells that the thresholds
    ``t`` (shifted coordinates, ascending) cut the histogram into."""
    b = np.concatenate(([0], np.searchsorted(pre.shifted, t), [pre.shifted.size]))
    return (pre.p0[b[1:]] - pre.p0[b[:-1]], pre.p1[b[1:]] - pre.p1[b[:-1]],
            pre.p2[b[1:]] - pre.p2[b[:-1]])


def _lagrangian_lloyd(pre: HistogramPrefix, y, lam, tol, max_iter):
    """Lagrangian Lloyd iterations for one multiplier (shifted coordinates).

    Returns (levels, lengths, thresholds, D, H, iterations, converged).
    """
    lengths = np.full(y.size, math.log2(y.size))
    J_prev = 1e308  # finite, so that the first relative change is large
    D = H = 0.0
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        y, lengths, t = _boundaries(y, lengths, lam)
        s0, s1, s2 = _cell_sums(pre, t)
        occ = s0 > 0.0
        if not occ.all():
            s0, s1, s2 = s0[occ], s1[occ], s2[occ]
        y = s1 / s0
        lengths = -np.log2(s0)
        D = float(np.maximum(s2 - s1 * y, 0.0).sum())
        H = float(np.dot(s0, lengths))
        J = D + lam * H
        if y.size < 2:
            break
        if J_prev - J <= tol * J_prev:
            converged = True
            break
        J_prev = J
    if y.size >= 2:
        y, lengths, t = _boundaries(y, lengths, lam)
        # the figures of the partition actually returned (the final
        # boundaries moved since D and H were last measured)
        s0, s1, s2 = _cell_sums(pre, t)
        D = float(np.maximum(s2 - 2.0 * y * s1 + y * y * s0, 0.0).sum())
        q = s0[s0 > 0.0]
        H = max(-float(np.dot(q, np.log2(q))), 0.0) + 0.0
    else:
        t = np.zeros(0)
    return y, lengths, t, D, H, it, converged


def _start_levels(pre: HistogramPrefix, count, init, skew=0.0):
    if init is not None:
        lv = init.levels if isinstance(init, Codebook) else finite_array(init, "init")
        if lv.size > count:
            raise StreamqError(f"init has {lv.size} levels but at most {count} were asked for")
        # unique: a padded codebook repeats its top level (equal levels would
        # give 0/0 thresholds)
        return np.unique(np.asarray(lv, dtype=np.float64)) - pre.ref
    w = pre.weights()
    nz = np.flatnonzero(w)
    lo, hi = float(pre.shifted[nz[0]]), float(pre.shifted[nz[-1]])
    step = (hi - lo) / count
    # skew shifts the levels by a fraction of a step: the end cells then
    # differ in probability, which lets the multiplier break a symmetric start
    return lo + (np.arange(count) + 0.5 + skew) * step


def _to_codebook(pre, y, t, version):
    lv = y + pre.ref
    if lv.size >= 2:
        try:
            return Codebook(lv, t + pre.ref, version)
        except StreamqError:
            pass  # rounding merged two thresholds: fall back to midpoints
    if lv.size == 1:
        # one cell holds everything (zero rate): the second level a codebook
        # needs goes beyond the data, so that the index entropy stays zero
        w = pre.weights()
        occ = pre.centers[w > 0]
        v, top = float(lv[0]), float(occ[-1])
        span = max(top - float(occ[0]), 1e-9 * max(1.0, abs(v)))
        return Codebook([v, top + 2.0 * span], None, version)
    return Codebook(spread_levels(lv, max(2, lv.size)), None, version)


def ecsq_histogram(
    centers=None,
    weights=None,
    levels: int = 256,
    *,
    entropy: float | None = None,
    multiplier: float | None = None,
    init=None,
    prefix: HistogramPrefix | None = None,
    tol: float = 1e-9,
    max_iter: int = 500,
    entropy_tol: float = 1e-3,
    max_bisect: int = 60,
    version: int = 0,
):
    """Entropy-constrained scalar quantizer for a histogram.

    Parameters
    ----------
    centers, weights : array_like
        Sorted bin centers and non-negative weights (or ``prefix``).
    levels : int
        Most levels to use (cells that empty out are dropped).
    entropy : float, optional
        Target index entropy in bits/sample, met by bisection on the
        multiplier (the result's entropy does not exceed it).
    multiplier : float, optional
        Fixed Lagrange multiplier instead of a target (``lambda >= 0``).
    init : Codebook or array_like, optional
        Starting levels (default: ``levels`` uniform levels over the
        occupied range).
    tol, max_iter
        Stopping rule of the Lagrangian Lloyd iteration (relative change of
        ``J``) and its cap.
    entropy_tol : float
        Accept a design whose entropy is within this many bits below the
        target.
    max_bisect : int
        Cap on bisection steps.

    Returns
    -------
    codebook : Codebook
        With the surviving levels and the Lagrangian thresholds (not the
        midpoints).
    report : DesignReport
        Figures w.r.t. the weighted histogram; ``details`` holds the
        multiplier, the target, the number of designs tried and the level
        count of the start that won (``start_levels``). When the entropy
        ends more than ``entropy_tol`` below the target (or, if nothing
        reaches it, above), ``details["target_missed"]`` is True and
        ``details["target_note"]`` says by how much and why.

    Notes
    -----
    The Lagrangian iteration cannot always leave its start: on cells of
    equal probability (a uniform PDF on the uniform start) every code
    length is the same and the multiplier moves nothing, so the bisection
    ends on a collapsed design. When the target is missed from the default
    start, the design is retried from uniform starts with fewer levels
    (``2**target`` rounded down and up, then powers of two up to ``levels``,
    each with its neighbour of the other parity), then from skewed starts,
    and the lowest-distortion design with entropy <= target is kept. A
    target above the entropy of the least-distortion design (multiplier 0)
    cannot be reached with ``levels`` levels; that design is returned.

    References
    ----------
    .. [1] P. A. Chou, T. Lookabaugh and R. M. Gray, "Entropy-constrained
       vector quantization", IEEE Trans. ASSP 37(1), 1989.
    """
    pre = prefix if prefix is not None else histogram_prefix(centers, weights)
    count = check_levels(levels)
    tol, max_iter = check_stopping(tol, max_iter)
    if (entropy is None) == (multiplier is None):
        raise StreamqError("ecsq needs exactly one of entropy=BITS (target) or multiplier=LAMBDA")
    y0 = _start_levels(pre, count, init)
    if pre.occupied == 1:
        cb = Codebook(spread_levels([pre.shifted[np.argmax(pre.weights())] + pre.ref], count),
                      None, version)
        return _report(pre, cb, 0, True, {"multiplier": 0.0, "target_bits": entropy})
    designs = 0

    def run(lam, start):
        nonlocal designs
        designs += 1
        return _lagrangian_lloyd(pre, start.copy(), lam, tol, max_iter)

    if multiplier is not None:
        lam = check_number(multiplier, "ecsq multiplier", minimum=0.0)
        y, _, t, D, H, it, conv = run(lam, y0)
        cb = _to_codebook(pre, y, t, version)
        return _report(pre, cb, it, conv, {"multiplier": lam, "designs": designs})

    target = check_number(entropy, "ecsq target entropy (bits/sample)", positive=True)
    entropy_tol = check_number(entropy_tol, "ecsq entropy_tol", minimum=0.0)
    max_bisect = check_integer(max_bisect, "ecsq max_bisect", 1)

    def feasible(res):
        return res[4] <= target + 1e-12

    def bisect(start):
        """Lowest-distortion design from ``start`` with H <= target (bisection on lambda)."""
        used = 1
        best = run(0.0, start)
        h0 = best[4]
        lam_lo, lam_best = 0.0, 0.0
        if feasible(best):
            return best, lam_best, h0
        # bracket: H(lam) falls as lam grows; distortion-rate slope sets the scale
        lam_hi = max(best[3], 1e-300) * 2.0 * math.log(2.0)
        hi = run(lam_hi, start)
        used += 1
        while not feasible(hi) and used < max_bisect:
            lam_lo = lam_hi
            lam_hi *= 4.0
            hi = run(lam_hi, start)
            used += 1
        best, lam_best = hi, lam_hi
        while used < max_bisect and target - best[4] > entropy_tol:
            lam = 0.5 * (lam_lo + lam_hi) if lam_lo == 0 else math.sqrt(lam_lo * lam_hi)
            if lam_hi - lam_lo <= 1e-12 * lam_hi:
                break
            trial = run(lam, start)
            used += 1
            if feasible(trial):
                lam_hi = lam
                if trial[3] < best[3] or not feasible(best):
                    best, lam_best = trial, lam
            else:
                lam_lo = lam
        return best, lam_best, h0

    def on_target(res):
        return feasible(res) and target - res[4] <= entropy_tol

    best, lam_best, h0 = bisect(y0)
    start_levels = int(y0.size)
    if not on_target(best) and h0 > target:
        # The Lagrangian iteration cannot always leave its start: with cells
        # of equal probability (a uniform PDF on a uniform start) every code
        # length is the same, lambda moves nothing, and the bisection ends on
        # a collapsed design. Retry from uniform starts with fewer levels
        # (2**target rounded down and up, then powers of two up to L, each
        # with its neighbour of the other parity), then, if none is on target,
        # from skewed starts; keep the lowest-distortion design with
        # H <= target.
        starts = [(k, 0.0) for k in _retry_counts(target, count, start_levels)]
        skewed = [(k, 0.25) for k in [count] + [k for k, _ in starts]]
        for k, skew in starts + skewed:
            if skew and on_target(best):
                break  # skewed starts only when the centred ones did not do
            if designs >= 8 * max_bisect:
                break  # bounded work: the result is then flagged below
            res, lam, _ = bisect(_start_levels(pre, k, None, skew))
            if feasible(res) and (not feasible(best) or res[3] < best[3]):
                best, lam_best, start_levels = res, lam, k
    y, _, t, D, H, it, conv = best
    cb = _to_codebook(pre, y, t, version)
    details = {"multiplier": lam_best, "target_bits": target, "designs": designs,
               "start_levels": start_levels}
    if not on_target(best):
        if h0 <= target:
            why = (f"the {y0.size}-level design of least distortion has only {h0:.4f} bits "
                   f"(more levels are needed to reach the target)")
        else:
            why = "no design closer below the target was found"
        details["target_missed"] = True
        details["target_note"] = (f"index entropy {H:.4f} bits misses the {target:g}-bit target "
                                  f"by more than {entropy_tol:g} bits: {why}")
    return _report(pre, cb, it, conv, details)


def _retry_counts(target, count, tried):
    """Start level counts to retry with: floor and ceil of 2**target, then
    powers of two above it, each with its odd or even neighbour (a symmetric
    start keeps its parity: below one bit a symmetric source wants an odd,
    dead-zone design), all below ``count`` and other than ``tried``."""
    ks = []
    if target < math.log2(count):
        base = 2.0 ** target
        ks = [math.floor(base), math.ceil(base)]
        p = 1 << max(math.ceil(target), 1)
        while p < count:
            ks.append(p)
            p <<= 1
        ks += [k + 1 for k in ks]
    return sorted({k for k in ks if 2 <= k < count and k != tried})


def _report(pre, cb, it, conv, details):
    w = pre.weights()
    mse, probs = evaluate_histogram(cb.levels, cb.thresholds, pre.centers, w)
    return cb, make_report("ecsq", cb, it, conv, mse=mse, probs=probs, power=pre.power,
                           reference="histogram", details=details)


def ecsq_pdf(pdf, levels: int = 256, *, entropy=None, multiplier=None, bins: int = 65536,
             **options):
    """Entropy-constrained scalar quantizer for a parametric PDF.

    The PDF is discretised into a fine histogram (:func:`pdf_histogram`,
    ``bins`` cells) for the design; the report's MSE and entropy are then
    evaluated exactly on the PDF for the resulting codebook.

    Parameters
    ----------
    pdf : PdfModel or str
    levels, entropy, multiplier
        As for :func:`ecsq_histogram`.
    bins : int
        Cells of the discretisation.
    **options
        Passed to :func:`ecsq_histogram`.

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the PDF.

    References
    ----------
    .. [1] P. A. Chou, T. Lookabaugh and R. M. Gray, "Entropy-constrained
       vector quantization", IEEE Trans. ASSP 37(1), 1989.
    .. [2] H. Gish and J. N. Pierce, "Asymptotically efficient quantizing",
       IEEE Trans. Information Theory 14(5), 1968.
    """
    model = pdf if isinstance(pdf, PdfModel) else pdf_model(pdf)
    c, w = pdf_histogram(model, bins)
    cb, rep = ecsq_histogram(c, w, levels, entropy=entropy, multiplier=multiplier, **options)
    mse, probs = evaluate_pdf(cb.levels, cb.thresholds, model)
    rep2 = make_report("ecsq", cb, rep.iterations, rep.converged, mse=mse, probs=probs,
                       power=model.power, reference=f"pdf:{model!r}",
                       details=dict(rep.details, bins=int(bins)))
    return cb, rep2
