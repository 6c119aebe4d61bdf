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
entropy does not exceed the target (within ``entropy_tol``).

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
from streamq.design._validate import check_levels, finite_array
from streamq.design.codebook import Codebook
from streamq.design.lloyd import HistogramPrefix, histogram_prefix
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


def _lagrangian_lloyd(pre: HistogramPrefix, y, lam, tol, max_iter):
    """Lagrangian Lloyd iterations for one multiplier (shifted coordinates).

    Returns (levels, lengths, thresholds, D, H, iterations, converged).
    """
    p0, p1, p2 = pre.p0, pre.p1, pre.p2
    cs = pre.shifted
    n = cs.size
    lengths = np.full(y.size, math.log2(y.size))
    J_prev = 1e308  # finite, so that the first relative change is large
    D = H = 0.0
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        y, lengths, t = _boundaries(y, lengths, lam)
        b = np.concatenate(([0], np.searchsorted(cs, t), [n]))
        s0 = p0[b[1:]] - p0[b[:-1]]
        s1 = p1[b[1:]] - p1[b[:-1]]
        s2 = p2[b[1:]] - p2[b[:-1]]
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
    else:
        t = np.zeros(0)
    return y, lengths, t, D, H, it, converged


def _start_levels(pre: HistogramPrefix, count, init):
    if init is not None:
        lv = init.levels if isinstance(init, Codebook) else finite_array(init, "init")
        if lv.size > count:
            raise StreamqError(f"init has {lv.size} levels but at most {count} were asked for")
        return np.sort(np.asarray(lv, dtype=np.float64)) - pre.ref
    w = pre.weights()
    nz = np.flatnonzero(w)
    lo, hi = float(pre.shifted[nz[0]]), float(pre.shifted[nz[-1]])
    step = (hi - lo) / count
    return lo + (np.arange(count) + 0.5) * step


def _to_codebook(pre, y, t, version):
    lv = y + pre.ref
    if lv.size >= 2:
        try:
            return Codebook(lv, t + pre.ref, version)
        except StreamqError:
            pass  # rounding merged two thresholds: fall back to midpoints
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
        multiplier, the target and the number of designs tried.

    References
    ----------
    .. [1] P. A. Chou, T. Lookabaugh and R. M. Gray, "Entropy-constrained
       vector quantization", IEEE Trans. ASSP 37(1), 1989.
    """
    pre = prefix if prefix is not None else histogram_prefix(centers, weights)
    count = check_levels(levels)
    if (entropy is None) == (multiplier is None):
        raise StreamqError("ecsq needs exactly one of entropy=BITS (target) or multiplier=LAMBDA")
    y0 = _start_levels(pre, count, init)
    if pre.occupied == 1:
        cb = Codebook(spread_levels([pre.shifted[np.argmax(pre.weights())] + pre.ref], count),
                      None, version)
        return _report(pre, cb, 0, True, {"multiplier": 0.0, "target_bits": entropy})
    designs = 0

    def run(lam):
        nonlocal designs
        designs += 1
        return _lagrangian_lloyd(pre, y0.copy(), lam, tol, max_iter)

    if multiplier is not None:
        lam = float(multiplier)
        if not (math.isfinite(lam) and lam >= 0):
            raise StreamqError(f"ecsq multiplier must be finite and >= 0, got {multiplier!r}")
        y, _, t, D, H, it, conv = run(lam)
        cb = _to_codebook(pre, y, t, version)
        return _report(pre, cb, it, conv, {"multiplier": lam, "designs": designs})

    target = float(entropy)
    if not (math.isfinite(target) and target > 0):
        raise StreamqError(f"ecsq target entropy must be positive bits/sample, got {entropy!r}")
    best = run(0.0)
    lam_lo, lam_best = 0.0, 0.0
    if best[4] > target + 1e-12:
        # bracket: H(lam) falls as lam grows; distortion-rate slope sets the scale
        lam_hi = max(best[3], 1e-300) * 2.0 * math.log(2.0)
        hi = run(lam_hi)
        while hi[4] > target and designs < max_bisect:
            lam_lo = lam_hi
            lam_hi *= 4.0
            hi = run(lam_hi)
        best, lam_best = hi, lam_hi
        while designs < max_bisect and target - best[4] > entropy_tol:
            lam = 0.5 * (lam_lo + lam_hi) if lam_lo == 0 else math.sqrt(lam_lo * lam_hi)
            if lam_hi - lam_lo <= 1e-12 * lam_hi:
                break
            trial = run(lam)
            if trial[4] <= target:
                lam_hi = lam
                if trial[3] < best[3] or best[4] > target:
                    best, lam_best = trial, lam
            else:
                lam_lo = lam
    y, _, t, D, H, it, conv = best
    cb = _to_codebook(pre, y, t, version)
    return _report(pre, cb, it, conv, {"multiplier": lam_best, "target_bits": target,
                                       "designs": designs})


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
