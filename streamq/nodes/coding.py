"""Codebook making shared by the encoder and decoder nodes: one place that
turns a method + a PDF description into a codebook (the adaptive schemes
built on it live in :mod:`streamq.nodes.schemes`).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np

from streamq.errors import StreamqError

PARAMETRIC = ("gaussian", "laplacian", "gamma", "uniform", "generalized-gaussian")
G711 = {"g711-mu": "mu", "g711-a": "a"}


def _design():
    import streamq.design as d
    return d


def _opts(method: str, opts: dict[str, Any]) -> dict[str, Any]:
    """The design options that apply to ``method``."""
    keep = {"ecsq": ("entropy",), "uniform": ("loading",), "mu-law": ("mu",), "a-law": ("a",)}
    return {k: opts[k] for k in keep.get(method, ()) if opts.get(k) is not None}


@lru_cache(maxsize=256)
def unit_design(method: str, n_levels: int, model: str, shape: float | None, extra: tuple):
    """A design for the zero-mean, unit-variance model (cached: location-scale
    families scale exactly, so adaptive model designs cost a multiply)."""
    d = _design()
    pdf = d.pdf_model(model, 0.0, 1.0, shape)
    cb, rep = d.design(method, n_levels, pdf=pdf, **dict(extra))
    return np.asarray(cb.thresholds), np.asarray(cb.levels), float(rep.mse)


def model_codebook(method: str, n_levels: int, model: str, mean: float, std: float,
                   shape: float | None, opts: dict[str, Any]):
    """Codebook for a parametric PDF with the given mean and standard deviation."""
    d = _design()
    std = max(float(std), 2.0 ** -24)
    if shape is not None:
        shape = round(float(shape), 2)
    extra = tuple(sorted(_opts(method, opts).items()))
    th, lv, _ = unit_design(method, n_levels, model, shape, extra)
    return pad_levels(d.Codebook(levels=lv * std + mean, thresholds=th * std + mean), n_levels)


#: what design_window does beyond the warm-start rule: 1 the exact codebook, 2 also Lloyd-Max
_WINDOW_MODES = {"optimal": 1, "lloyd-max": 2}


@lru_cache(maxsize=1)
def _window_kernel():
    """design_window's module and the histogram designs' stopping rule (loaded
    on first use: the design library loads lazily; looked up once, as the
    imports cost a microsecond a design)."""
    from streamq.design import lloyd_kernels
    from streamq.design.lloyd import HISTOGRAM_MAX_ITER, HISTOGRAM_TOL
    return lloyd_kernels, HISTOGRAM_TOL, HISTOGRAM_MAX_ITER


def window_codebook(method: str, n_levels: int, centers: np.ndarray, counts: np.ndarray, init,
                    opts: dict[str, Any], grid_bits: int | None, standard: bool):
    """The finished codebook of ``method`` for a window's histogram, on the
    side-information grid, with its cost in bits; None when the window is empty.

    One compiled call (:func:`streamq.design.lloyd_kernels.design_window`)
    finds the occupied bins, makes the exact codebook of a window with no more
    occupied bins than levels (``lloyd-max``, ``optimal``), applies the
    warm-start rule (``encoder.warm_start`` option; see the kernel) and, for
    ``lloyd-max``, designs and puts the levels on the grid. Other methods, and the rare Lloyd-Max
    windows it leaves to the general route (one value, cells that stay empty),
    are designed by :func:`histogram_codebook`.

    Parameters
    ----------
    method : str
        Design method.
    n_levels : int
        Level count.
    centers, counts : numpy.ndarray
        The window's histogram.
    init : Codebook or None
        The newest design of the channel (the warm start, if it fits).
    opts : dict
        The encoder's design options.
    grid_bits : int or None
        Side-information grid (see :func:`finish_levels`).
    standard : bool
        A standard table (no side information).

    Returns
    -------
    (Codebook, int) or None
    """
    K, tol, max_iter = _window_kernel()
    status, levels, thresholds, bits = K.design_window(
        np.ascontiguousarray(centers, dtype=np.float64),
        np.ascontiguousarray(counts, dtype=np.float64), n_levels,
        K.NO_LEVELS if init is None else init.levels, _WINDOW_MODES.get(method, 0),
        0 if standard or grid_bits is None else grid_bits, tol, max_iter)
    if status == K.DONE:
        return _design().Codebook._trusted(levels, thresholds), bits
    if status == K.EMPTY:
        return None
    if status == K.UNCHECKED:
        cb = _design().Codebook(levels=levels)
    else:
        cb = histogram_codebook(method, n_levels, centers, counts,
                                init if status == K.WARM else None, opts)
    return finish_levels(cb, grid_bits, standard)


def histogram_codebook(method: str, n_levels: int, centers: np.ndarray, counts: np.ndarray,
                       init, opts: dict[str, Any]):
    """The codebook of ``method`` for a histogram, by the general design route
    (:func:`streamq.design.design`), padded to ``n_levels``."""
    cb, _ = _design().design(method, n_levels, centers=centers, weights=counts, init=init,
                             **_opts(method, opts))
    return pad_levels(cb, n_levels)


def pad_levels(cb, n_levels: int):
    """Keep a stream's level count fixed when a design (e.g. ECSQ) drops cells:
    the top level is repeated behind thresholds a hair above the last one, so
    every decoded value is unchanged."""
    L = len(cb.levels)
    if L >= n_levels:
        return cb
    d = _design()
    th, lv = np.asarray(cb.thresholds), np.asarray(cb.levels)
    top = th[-1] if th.size else lv[-1]
    eps = max(abs(top), 1.0) * 1e-12
    extra = n_levels - L
    th = np.concatenate([th, top + eps * np.arange(1, extra + 1)])
    lv = np.concatenate([lv, np.repeat(lv[-1], extra)])
    return d.Codebook(levels=lv, thresholds=th)


def fixed_codebook(method: str, n_levels: int, opts: dict[str, Any], samples: np.ndarray | None):
    """The codebook of a fixed (non-adaptive) encoder."""
    d = _design()
    if method in G711:
        return d.g711_codebook(G711[method])
    if samples is not None:
        cb, _ = d.design(method, n_levels, samples=samples, **_opts(method, opts))
        return pad_levels(cb, n_levels)
    return model_codebook(method, n_levels, opts["model"], 0.0, opts["scale"], opts.get("shape"), opts)


def finish_levels(cb, grid_bits: int | None, standard: bool):
    """Put levels on the side-information grid; return (codebook, side bits).

    Standard tables (G.711) are known at both ends and cost nothing.
    """
    if standard or grid_bits is None:
        return cb, 0
    from streamq.design.lloyd_kernels import grid_levels
    # round_levels and level_bits in one compiled pass; rounding keeps the levels in
    # order, so they stay valid with the codebook's thresholds
    levels, bits = grid_levels(np.ascontiguousarray(cb.levels), grid_bits)
    if bits < 0:
        raise ValueError("levels must be non-decreasing")
    return _design().Codebook._trusted(levels, cb.thresholds), bits


def check_method(method: str, adapt: str) -> str | None:
    """Why a method cannot run in an adaptation mode (None when it can)."""
    if method in G711 and adapt != "fixed":
        return f"{method} is a fixed standard quantizer; use adapt = \"fixed\""
    if adapt == "backward" and method not in ("lloyd-max", "uniform"):
        return "backward adaptation supports method \"lloyd-max\" or \"uniform\""
    return None


def require(cond: bool, message: str) -> None:
    if not cond:
        raise StreamqError(message)
