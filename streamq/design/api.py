"""One entry point for every design method: :func:`design`.

The streaming encoder and the ``streamq design`` command call this function;
it picks the right routine for the data it is given:

=================  ===========================================================
data               routes
=================  ===========================================================
``pdf=``           exact PDF routines (Lloyd-Max with Newton steps, optimal
                   compander, optimal uniform step); ``ecsq`` works on a
                   fine histogram of the PDF (``bins``, default 65,536).
                   ``optimal``: for a log-concave PDF the Lloyd-Max design
                   (the unique optimum, Fleischer 1964); otherwise dynamic
                   programming on a histogram of the PDF (``bins``, default
                   16 per level, 4,096 to ``MAX_DP_POINTS``) polished by
                   Lloyd-Max on the PDF, keeping the better of that and
                   plain Lloyd-Max
``centers=``,      histogram routines (figures w.r.t. the weighted histogram)
``weights=``
``samples=``       ``lloyd-max``: the sample-exact Lloyd iteration (exact
                   1-D k-means fixed point) for up to ``SAMPLE_EXACT_LIMIT``
                   samples, otherwise Lloyd on a fine histogram
                   (``bins``, default 65,536, bin centroids as centers);
                   ``optimal``: dynamic programming on the distinct sample
                   values (merged to ``MAX_DP_POINTS`` equal-width bins if
                   there are more; at most ``MAX_DP_LEVELS`` levels when
                   there are more values than levels); ``ecsq``, ``uniform``, ``compander``: on
                   a fine histogram. The report is always re-measured on the
                   samples themselves.
nothing            ``uniform`` (with ``step`` or ``loading``), ``mu-law``,
                   ``a-law``, ``g711-mu``, ``g711-a``: the report is
                   measured on a uniform density over ``+-peak``.
=================  ===========================================================
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from streamq.design._validate import (
    check_integer,
    check_levels,
    check_number,
    finite_array,
    histogram_arrays,
)
from streamq.design.codebook import Codebook
from streamq.design.compander import (
    compander_codebook,
    g711_codebook,
    optimal_compander_histogram,
    optimal_compander_pdf,
)
from streamq.design.ecsq import ecsq_histogram, ecsq_pdf
from streamq.design.histogram import sample_histogram
from streamq.design.lloyd import lloyd_max_histogram, lloyd_max_samples
from streamq.design.lloyd_pdf import lloyd_max_pdf
from streamq.design.optimal import MAX_DP_LEVELS, MAX_DP_POINTS, optimal_histogram
from streamq.design.pdfs import PdfModel, pdf_histogram, pdf_model
from streamq.design.report import (
    DesignReport,
    evaluate_histogram,
    evaluate_pdf,
    index_entropy,
    make_report,
    snr_db,
)
from streamq.design.uniform import uniform_histogram, uniform_pdf
from streamq.errors import StreamqError

__all__ = ["design", "METHODS", "SAMPLE_EXACT_LIMIT"]

#: Method names accepted by :func:`design`.
METHODS = ("lloyd-max", "optimal", "ecsq", "uniform", "mu-law", "a-law", "g711-mu", "g711-a",
           "compander")

#: Largest number of samples designed on exactly by ``lloyd-max``; more go
#: through a fine histogram.
SAMPLE_EXACT_LIMIT = 262144


def _samples_report(cb: Codebook, rep: DesignReport, x: np.ndarray) -> DesignReport:
    """Re-measure a report on the raw samples."""
    idx = np.searchsorted(cb.thresholds, x, side="right")
    err = x - cb.levels[idx]
    mse = float(np.dot(err, err) / x.size)
    power = float(np.dot(x, x) / x.size)
    probs = np.bincount(idx, minlength=cb.size) / x.size
    return dataclasses.replace(rep, mse=mse, snr_db=snr_db(power, mse),
                               entropy_bits=index_entropy(probs), power=power,
                               reference="samples")


def _full_scale_report(method, cb: Codebook, peak: float, details=None) -> DesignReport:
    model = pdf_model("uniform", 0.0, peak / math.sqrt(3.0))
    mse, probs = evaluate_pdf(cb.levels, cb.thresholds, model)
    return make_report(method, cb, 0, True, mse=mse, probs=probs, power=model.power,
                       reference=f"uniform over +-{peak:g}", details=details)


def _evaluate(method, cb, data, details=None) -> DesignReport:
    kind, payload = data
    if kind == "pdf":
        mse, probs = evaluate_pdf(cb.levels, cb.thresholds, payload)
        return make_report(method, cb, 0, True, mse=mse, probs=probs, power=payload.power,
                           reference=f"pdf:{payload!r}", details=details)
    if kind == "histogram":
        c, w = histogram_arrays(*payload)
        mse, probs = evaluate_histogram(cb.levels, cb.thresholds, c, w)
        power = float(np.dot(w, c * c) / w.sum())
        return make_report(method, cb, 0, True, mse=mse, probs=probs, power=power,
                           reference="histogram", details=details)
    rep = make_report(method, cb, 0, True, mse=0.0, probs=[1.0], power=0.0, reference="samples",
                      details=details)
    return _samples_report(cb, rep, payload)


def _method(method) -> str:
    key = str(method).strip().lower().replace("_", "-")
    key = {"lloydmax": "lloyd-max", "lloyd": "lloyd-max", "dp": "optimal",
           "mulaw": "mu-law", "alaw": "a-law"}.get(key, key)
    if key not in METHODS:
        raise StreamqError(f"unknown design method {method!r}; known methods: {', '.join(METHODS)}")
    return key


def _data(pdf, centers, weights, samples, options):
    given = [name for name, v in (("pdf", pdf), ("centers", centers), ("samples", samples))
             if v is not None]
    if weights is not None and centers is None:
        raise StreamqError("weights given without centers")
    if centers is not None and weights is None:
        raise StreamqError("centers given without weights")
    if len(given) > 1:
        raise StreamqError(f"give only one of pdf, centers/weights or samples (got {', '.join(given)})")
    if pdf is not None:
        if isinstance(pdf, PdfModel):
            return ("pdf", pdf)
        if isinstance(pdf, dict):
            return ("pdf", pdf_model(pdf.get("name"), pdf.get("mean", 0.0), pdf.get("std", 1.0),
                                     pdf.get("shape")))
        return ("pdf", pdf_model(pdf, options.pop("mean", 0.0), options.pop("std", 1.0),
                                 options.pop("shape", None)))
    if centers is not None:
        # checked by the routine that takes it (once: this is the hot path)
        return ("histogram", (centers, weights))
    if samples is not None:
        return ("samples", finite_array(samples, "samples"))
    return (None, None)


def _histogram_of(data, bins):
    kind, payload = data
    if kind == "histogram":
        return payload
    if kind == "pdf":
        return pdf_histogram(payload, bins)
    return sample_histogram(payload, bins)


def design(method: str, levels=None, *, pdf=None, centers=None, weights=None, samples=None,
           init=None, **options):
    """Design a scalar quantizer by name.

    Parameters
    ----------
    method : str
        One of ``lloyd-max``, ``optimal``, ``ecsq``, ``uniform``, ``mu-law``,
        ``a-law``, ``g711-mu``, ``g711-a``, ``compander``.
    levels : int, optional
        Number of levels L (2..65536). Optional only with ``init`` or for
        the G.711 methods (which have 255 or 256 levels).
    pdf : str, dict or PdfModel, optional
        Amplitude PDF; a name takes ``mean``, ``std`` and ``shape`` from
        the options.
    centers, weights : array_like, optional
        A histogram (sorted centers, non-negative weights).
    samples : array_like, optional
        Raw samples (pooled).
    init : Codebook, optional
        Warm start for ``lloyd-max`` (and ``ecsq``).
    **options
        Passed on: ``tol``, ``max_iter``, ``version``, ``record``, ``bins``
        (histogram resolution), ``max_points`` (optimal: most points of the
        dynamic programme, raised to the level count if smaller),
        ``entropy``/``multiplier`` (ecsq), ``step``,
        ``loading``, ``kind`` (uniform), ``peak``, ``mu``, ``a`` (companders).

    Returns
    -------
    codebook : Codebook
    report : DesignReport

    Raises
    ------
    StreamqError
        Unknown method or PDF, bad or missing data, bad options.
    """
    key = _method(method)
    options = dict(options)
    data = _data(pdf, centers, weights, samples, options)
    kind, payload = data
    version = check_integer(options.pop("version", 0), "version")
    if key in ("g711-mu", "g711-a"):
        law = "mu" if key == "g711-mu" else "a"
        allowed = (255, 256) if law == "mu" else (256,)
        if levels is not None and int(levels) not in allowed:
            raise StreamqError(f"{key} has {allowed[0]} levels (8-bit G.711); got levels={levels}")
        cb = g711_codebook(law, version)
        _reject(options, key)
        if kind is None:
            return cb, _full_scale_report(key, cb, 1.0)
        return cb, _evaluate(key, cb, data)
    if levels is None:
        if isinstance(init, Codebook):
            levels = init.size
        else:
            raise StreamqError(f"{key} needs the number of levels")
    count = check_levels(levels)
    if key == "lloyd-max":
        return _lloyd(count, data, init, version, options)
    if key == "optimal":
        return _optimal(count, data, version, options)
    if key == "ecsq":
        return _ecsq(count, data, init, version, options)
    if key == "uniform":
        return _uniform(count, data, version, options)
    if key in ("mu-law", "a-law"):
        return _compander_law(key, count, data, version, options)
    return _optimal_compander(count, data, version, options)


def _reject(options, key):
    if options:
        raise StreamqError(f"{key} does not take the option(s) {', '.join(sorted(options))}")


def _need_data(kind, key):
    if kind is None:
        raise StreamqError(f"{key} needs data: a pdf, a histogram (centers, weights) or samples")


def _lloyd(count, data, init, version, options):
    kind, payload = data
    _need_data(kind, "lloyd-max")
    if kind == "pdf":
        allowed = {"tol", "max_iter", "newton", "record"}
        _reject({k: v for k, v in options.items() if k not in allowed}, "lloyd-max (pdf)")
        return lloyd_max_pdf(payload, count, init=init, version=version, **options)
    allowed = {"tol", "max_iter", "record", "bins"}
    _reject({k: v for k, v in options.items() if k not in allowed}, "lloyd-max")
    bins = check_integer(options.pop("bins", 65536), "bins", 1)
    if kind == "histogram":
        c, w = payload
        return lloyd_max_histogram(c, w, count, init=init, version=version, **options)
    x = payload
    if x.size <= SAMPLE_EXACT_LIMIT:
        return lloyd_max_samples(x, count, init=init, version=version, **options)
    c, w = sample_histogram(x, bins)
    cb, rep = lloyd_max_histogram(c, w, count, init=init, version=version, **options)
    rep = dataclasses.replace(rep, details={"bins": bins, "route": "histogram"})
    return cb, _samples_report(cb, rep, x)


def _optimal_pdf_bins(count: int) -> int:
    """Default histogram resolution of ``optimal`` on a PDF: 16 bins a level
    (at least 4,096), at most :data:`MAX_DP_POINTS`."""
    return min(max(4096, 16 * int(count)), MAX_DP_POINTS)


def _optimal_pdf(model, count, version, bins, max_points):
    """``optimal`` on a PDF model: the best of several Lloyd-Max polishes.

    For a log-concave model the Lloyd-Max quantizer is the unique optimum
    (Fleischer 1964), so it is the answer and nothing else is tried.
    Otherwise (two-sided gamma, generalised Gaussian with shape < 1) the
    symmetric Lloyd-Max design need not be the optimum: e.g. for the gamma
    PDF an asymmetric design with a level near the peak is better at every
    even L we tried.
    The candidates, each polished by Lloyd-Max on the PDF itself, are: the
    symmetric design; an asymmetric start (the L-1 level design plus one
    level beyond its top); and, up to ``MAX_DP_LEVELS`` levels, the global
    optimum of a fine histogram of the PDF by dynamic programming, polished
    symmetrically and, if its partition is clearly asymmetric, freely. The
    lowest exact MSE wins.
    """
    lm_cb, lm_rep = lloyd_max_pdf(model, count, version=version)
    if model.log_concave:
        details = {"route": "lloyd-max", "log_concave": True}
        return lm_cb, dataclasses.replace(lm_rep, method="optimal", details=details)
    details = {"log_concave": False}
    candidates = [("lloyd-max", lm_cb, lm_rep)]

    def polish(name, init, symmetric):
        cb, rep = lloyd_max_pdf(model, count, init=init, symmetric=symmetric, max_iter=500,
                                version=version)
        candidates.append((name, cb, rep))

    if count > 2:
        y = lloyd_max_pdf(model, count - 1)[0].levels
        polish("asymmetric-polish", np.append(y, y[-1] + (y[-1] - y[-2])), False)
    if count <= MAX_DP_LEVELS:
        bins = _optimal_pdf_bins(count) if bins is None else bins
        c, w = pdf_histogram(model, bins)
        dp_cb, dp_rep = optimal_histogram(c, w, count, version=version, max_points=max_points)
        details.update(bins=bins, dp_mse=dp_rep.details["dp_mse"])
        polish("dp+symmetric-polish", dp_cb, True)
        z = dp_cb.levels - model.mean
        if float(np.max(np.abs(z + z[::-1]))) > 2.0 * float(np.median(np.diff(c))):
            polish("dp+polish", dp_cb, False)
    else:
        details["dp"] = f"skipped (more than {MAX_DP_LEVELS} levels)"
    # the first candidate unless another is better beyond rounding (ties keep
    # the symmetric design)
    route, cb, rep = candidates[0]
    for cand in candidates[1:]:
        if cand[2].mse < rep.mse * (1.0 - 1e-12):
            route, cb, rep = cand
    details["route"] = route
    details.update({f"mse_{name}": r.mse for name, _, r in candidates})
    return cb, dataclasses.replace(rep, method="optimal", details=details)


def _optimal(count, data, version, options):
    kind, payload = data
    _need_data(kind, "optimal")
    bins = options.pop("bins", None)
    bins = None if bins is None else check_integer(bins, "bins", 2)
    max_points = check_integer(options.pop("max_points", MAX_DP_POINTS), "max_points", 1)
    _reject(options, "optimal")
    # the merged histogram needs at least one point per level
    max_points = max(max_points, count)
    if kind == "histogram":
        return optimal_histogram(*payload, count, version=version, max_points=max_points)
    if kind == "pdf":
        return _optimal_pdf(payload, count, version, bins, max_points)
    x = payload
    values, counts = np.unique(x, return_counts=True)
    cb, rep = optimal_histogram(values, counts.astype(np.float64), count, version=version,
                                max_points=max_points)
    return cb, _samples_report(cb, rep, x)


def _ecsq(count, data, init, version, options):
    kind, payload = data
    _need_data(kind, "ecsq")
    bins = check_integer(options.pop("bins", 65536), "bins", 1)
    allowed = {"entropy", "multiplier", "tol", "max_iter", "entropy_tol", "max_bisect"}
    _reject({k: v for k, v in options.items() if k not in allowed}, "ecsq")
    if kind == "pdf":
        return ecsq_pdf(payload, count, bins=bins, init=init, version=version, **options)
    c, w = _histogram_of(data, bins)
    cb, rep = ecsq_histogram(c, w, count, init=init, version=version, **options)
    if kind == "samples":
        return cb, _samples_report(cb, rep, payload)
    return cb, rep


def _uniform(count, data, version, options):
    kind, payload = data
    step = options.pop("step", None)
    loading = options.pop("loading", None)
    qkind = options.pop("kind", "mid-rise")
    bins = check_integer(options.pop("bins", 65536), "bins", 1)
    if kind is None:
        std = check_number(options.pop("std", 1.0), "std", positive=True)
        center = check_number(options.pop("mean", 0.0), "mean")
        _reject(options, "uniform")
        if step is None and loading is None:
            raise StreamqError("uniform without data needs step= or loading=")
        from streamq.design.uniform import uniform_codebook

        cb = uniform_codebook(count, step, loading=loading, std=std, center=center, kind=qkind,
                              version=version)
        d = float(cb.levels[1] - cb.levels[0])
        peak = abs(center) + count * d / 2.0
        return cb, _full_scale_report("uniform", cb, peak, {"step": d, "kind": qkind})
    _reject(options, "uniform")
    if kind == "pdf":
        return uniform_pdf(payload, count, step=step, loading=loading, kind=qkind, version=version)
    c, w = _histogram_of(data, bins) if kind == "samples" else payload
    cb, rep = uniform_histogram(c, w, count, step=step, loading=loading, kind=qkind,
                                version=version)
    if kind == "samples":
        return cb, _samples_report(cb, rep, payload)
    return cb, rep


def _compander_law(key, count, data, version, options):
    kind, payload = data
    law = "mu" if key == "mu-law" else "a"
    if kind == "pdf":
        default_peak = abs(payload.mean) + 4.0 * payload.std
    else:
        default_peak = 1.0
    peak = check_number(options.pop("peak", default_peak), "peak", positive=True)
    mu = check_number(options.pop("mu", 255.0), "mu", positive=True)
    a = check_number(options.pop("a", 87.6), "a", minimum=1.0)
    qkind = options.pop("kind", "mid-rise")
    _reject(options, key)
    cb = compander_codebook(law, count, peak=peak, mu=mu, a=a, kind=qkind, version=version)
    details = {"peak": peak, "mu": mu} if law == "mu" else {"peak": peak, "a": a}
    if kind is None:
        return cb, _full_scale_report(key, cb, peak, details)
    return cb, _evaluate(key, cb, data, details)


def _optimal_compander(count, data, version, options):
    kind, payload = data
    _need_data(kind, "compander")
    bins = check_integer(options.pop("bins", 65536), "bins", 1)
    _reject(options, "compander")
    if kind == "pdf":
        return optimal_compander_pdf(payload, count, version=version)
    c, w = _histogram_of(data, bins)
    cb, rep = optimal_compander_histogram(c, w, count, version=version)
    if kind == "samples":
        return cb, _samples_report(cb, rep, payload)
    return cb, rep
