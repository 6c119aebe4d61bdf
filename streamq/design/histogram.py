"""Histograms prepared for repeated quantizer designs.

A histogram (sorted bin centers, non-negative weights) is turned once into
prefix sums of its weights and of their first and second moments about the
weighted mean (:class:`HistogramPrefix`, built by :func:`histogram_prefix`);
every design on it then finds the moments of any cell as differences of two
prefix sums, so the number of bins enters only once. Raw samples become such
a histogram through :func:`sample_histogram` (a fine one) or one point per
sorted sample (the exact designs).

References
----------
.. [1] A. Gersho and R. M. Gray, *Vector Quantization and Signal
   Compression*, Kluwer, 1992, ch. 6.
"""

from __future__ import annotations

import math

import numpy as np

from streamq.design._validate import MAX_MAGNITUDE, finite_array, histogram_arrays
from streamq.design.lloyd_steps import prefix_sums
from streamq.errors import StreamqError

__all__ = ["HistogramPrefix", "histogram_prefix", "sample_histogram"]


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
    """Precompute the prefix sums used by the histogram designs
    (:func:`streamq.design.lloyd.lloyd_max_histogram` and the others).

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
    c = np.ascontiguousarray(c)
    shifted, ref, p01, total2, power, single, total = prefix_sums(c, np.ascontiguousarray(w))
    return HistogramPrefix(c, shifted, ref, p01, total2, power, 1 if single else -1, total)

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
