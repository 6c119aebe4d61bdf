"""Uniform quantizers: mid-rise and mid-tread, loading factor, MSE-optimal step.

With ``L`` levels and step ``d`` around a centre ``m``:

* **mid-rise**: levels ``m + (i - (L - 1)/2) d``, symmetric about ``m``
  (for even ``L`` there is a threshold at ``m``, for odd ``L`` a level);
* **mid-tread**: levels ``m + (i - floor(L/2)) d``, always with a level at
  ``m`` (for even ``L`` one more level below than above, as in
  two's-complement PCM).

Thresholds are halfway between adjacent levels. The loading factor ``k``
sets the step from the standard deviation, ``d = 2 k std / L`` (the
quantizer's range covers ``+-k std``). The MSE-optimal step for a PDF or a
histogram minimises the exact distortion with
``scipy.optimize.minimize_scalar`` (bounded Brent).

References
----------
.. [1] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960 (optimum uniform step sizes for the Gaussian).
.. [2] N. S. Jayant and P. Noll, *Digital Coding of Waveforms*,
   Prentice-Hall, 1984, ch. 4.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import minimize_scalar

from streamq.design._validate import check_levels
from streamq.design.codebook import Codebook
from streamq.design.histogram import histogram_prefix
from streamq.design.pdfs import PdfModel, pdf_model
from streamq.design.report import evaluate_histogram, evaluate_pdf, make_report
from streamq.errors import StreamqError

__all__ = ["uniform_codebook", "uniform_pdf", "uniform_histogram", "UNIFORM_KINDS"]

UNIFORM_KINDS = ("mid-rise", "mid-tread")


def _kind(kind: str) -> str:
    k = str(kind).strip().lower().replace("_", "-")
    if k not in UNIFORM_KINDS:
        raise StreamqError(f"unknown uniform quantizer kind {kind!r}; known: {', '.join(UNIFORM_KINDS)}")
    return k


def _levels(count: int, step: float, center: float, kind: str) -> np.ndarray:
    i = np.arange(count, dtype=np.float64)
    if kind == "mid-rise":
        return center + (i - (count - 1) / 2.0) * step
    return center + (i - count // 2) * step


def uniform_codebook(levels: int, step: float | None = None, *, loading: float | None = None,
                     std: float = 1.0, center: float = 0.0, kind: str = "mid-rise",
                     version: int = 0) -> Codebook:
    """Uniform quantizer codebook from a step or a loading factor.

    Parameters
    ----------
    levels : int
        Number of levels L.
    step : float, optional
        Step size (> 0). Give either ``step`` or ``loading``.
    loading : float, optional
        Loading factor k: ``step = 2 k std / L``.
    std : float
        Standard deviation used with ``loading``.
    center : float
        Value the quantizer is centred on (the mean).
    kind : {"mid-rise", "mid-tread"}

    Returns
    -------
    Codebook
    """
    count = check_levels(levels)
    kind = _kind(kind)
    if (step is None) == (loading is None):
        raise StreamqError("give exactly one of step or loading for a uniform quantizer")
    if step is None:
        loading = float(loading)
        if not (math.isfinite(loading) and loading > 0):
            raise StreamqError(f"loading factor must be finite and > 0, got {loading!r}")
        if not (math.isfinite(std) and std > 0):
            raise StreamqError(f"std must be finite and > 0, got {std!r}")
        step = 2.0 * loading * float(std) / count
    step = float(step)
    if not (math.isfinite(step) and step > 0):
        raise StreamqError(f"uniform step must be finite and > 0, got {step!r}")
    if not math.isfinite(center):
        raise StreamqError(f"uniform center must be finite, got {center!r}")
    return Codebook(_levels(count, step, float(center), kind), None, version)


def _optimal_step(distortion, scale, count):
    """Minimise distortion(step) over a bracket of plausible loadings."""
    lo = 0.25 * scale / count
    hi = 40.0 * scale / count
    res = minimize_scalar(distortion, bounds=(lo, hi), method="bounded",
                          options={"xatol": 1e-12 * scale})
    return float(res.x), float(res.fun), int(res.nfev)


def uniform_pdf(pdf, levels: int, *, step=None, loading=None, kind: str = "mid-rise",
                version: int = 0):
    """Uniform quantizer for a PDF, MSE-optimal step unless one is given.

    Parameters
    ----------
    pdf : PdfModel or str
    levels : int
    step, loading : float, optional
        Fix the step (or the loading factor w.r.t. the PDF's std) instead of
        optimising it.
    kind : {"mid-rise", "mid-tread"}

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the PDF; ``details["step"]`` and ``details["loading"]``.

    References
    ----------
    .. [1] J. Max, "Quantizing for minimum distortion", IRE Trans.
       Information Theory 6(1), 1960.
    """
    model = pdf if isinstance(pdf, PdfModel) else pdf_model(pdf)
    count = check_levels(levels)
    kind = _kind(kind)
    evals = 0
    if step is None and loading is None:
        def dist(s):
            lv = _levels(count, s, model.mean, kind)
            return evaluate_pdf(lv, 0.5 * (lv[1:] + lv[:-1]), model)[0]

        step, _, evals = _optimal_step(dist, model.std, count)
        cb = uniform_codebook(count, step, center=model.mean, kind=kind, version=version)
    else:
        cb = uniform_codebook(count, step, loading=loading, std=model.std, center=model.mean,
                              kind=kind, version=version)
        step = float(cb.levels[1] - cb.levels[0])
    mse, probs = evaluate_pdf(cb.levels, cb.thresholds, model)
    details = {"step": step, "loading": step * count / (2.0 * model.std), "kind": kind}
    return cb, make_report("uniform", cb, evals, True, mse=mse, probs=probs, power=model.power,
                           reference=f"pdf:{model!r}", details=details)


def uniform_histogram(centers, weights, levels: int, *, step=None, loading=None,
                      kind: str = "mid-rise", version: int = 0, reference: str = "histogram"):
    """Uniform quantizer for a histogram, MSE-optimal step unless one is given.

    The quantizer is centred on the weighted mean; ``loading`` refers to the
    weighted standard deviation.

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the weighted histogram; ``details["step"]`` and
        ``details["loading"]``.

    References
    ----------
    .. [1] J. Max, "Quantizing for minimum distortion", IRE Trans.
       Information Theory 6(1), 1960 (the MSE-optimal uniform step).
    """
    pre = histogram_prefix(centers, weights)
    count = check_levels(levels)
    kind = _kind(kind)
    c, w = pre.centers, pre.weights()
    mean = float(pre.p1[-1]) + pre.ref
    std = math.sqrt(max(pre.total2 - float(pre.p1[-1]) ** 2, 0.0))
    evals = 0
    if std <= 0.0:
        scale = max(abs(mean), 1.0) * 1e-9
        cb = uniform_codebook(count, scale, center=mean, kind="mid-tread", version=version)
        step = scale
    elif step is None and loading is None:
        def dist(s):
            lv = _levels(count, s, mean, kind)
            return evaluate_histogram(lv, 0.5 * (lv[1:] + lv[:-1]), c, w)[0]

        step, _, evals = _optimal_step(dist, std, count)
        cb = uniform_codebook(count, step, center=mean, kind=kind, version=version)
    else:
        cb = uniform_codebook(count, step, loading=loading, std=std, center=mean, kind=kind,
                              version=version)
        step = float(cb.levels[1] - cb.levels[0])
    mse, probs = evaluate_histogram(cb.levels, cb.thresholds, c, w)
    details = {"step": step, "loading": step * count / (2.0 * std) if std > 0 else math.inf,
               "kind": kind}
    return cb, make_report("uniform", cb, evals, True, mse=mse, probs=probs, power=pre.power,
                           reference=reference, details=details)
