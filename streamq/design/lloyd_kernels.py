"""The streaming encoder's design on one window in one compiled call, and
putting levels on the side-information grid.

* :func:`grid_levels`: :func:`streamq.design.sideinfo.round_levels` and
  :func:`streamq.design.sideinfo.level_bits` in one pass;
* :func:`design_window`: the encoder's whole design on a window in one call
  (the Python calls between the steps cost as much as the steps): the occupied
  bins, the exact codebook of a window with few values (:func:`_exact_levels`),
  the warm-start rule (:func:`_fits_window`), then the Lloyd-Max steps of
  :mod:`streamq.design.lloyd_steps` in turn (re-exported here).

Each kernel is tested equal to its plain numpy definition
(``tests/kernel_reference.py``); :func:`warm_up` compiles or loads them all
before a live run's first design.

References
----------
.. [1] S. P. Lloyd, "Least squares quantization in PCM", Bell Labs memo 1957;
   IEEE Trans. Information Theory 28(2), 1982.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Trans. Information
   Theory 6(1), 1960.
.. [3] R. F. Rice, "Some practical universal noiseless coding techniques",
   JPL Publication 79-22, 1979.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from streamq.design.lloyd_steps import (
    cube_root_start,
    lloyd_iterate,
    midpoint_thresholds,
    prefix_sums,
)
from streamq.design.sideinfo import HEADER_K_BITS as _K_BITS

__all__ = [
    "prefix_sums", "cube_root_start", "lloyd_iterate", "midpoint_thresholds",
    "grid_levels", "design_window", "warm_up",
    "EMPTY", "DONE", "COLD", "WARM", "UNCHECKED", "NO_LEVELS",
]


@njit(cache=True, nogil=True)
def grid_levels(levels, grid_bits):  # pragma: no cover - compiled
    """Levels on the side-information grid and the bits that send them.

    Equal to ``(round_levels(levels, grid_bits), level_bits(rounded, grid_bits))``
    of :mod:`streamq.design.sideinfo` (the integer code lengths exactly); the
    bit count is -1 when the rounded levels decrease (``level_bits`` raises).
    """
    L = levels.shape[0]
    scale = float(2 ** (grid_bits - 1))
    out = np.empty(L)
    q = np.empty(L, dtype=np.int64)
    for i in range(L):
        v = np.rint(levels[i] * scale)
        if v < -scale:
            v = -scale
        elif v > scale - 1:
            v = scale - 1
        out[i] = v / scale
        q[i] = np.int64(np.rint(out[i] * scale))
    if L < 2:
        return out, grid_bits + _K_BITS
    dmax = 0
    for i in range(L - 1):
        d = q[i + 1] - q[i]
        if d < 0:
            return out, -1
        if d > dmax:
            dmax = d
    top = 0
    while dmax >> top:
        top += 1
    top = min(max(1, top), 2 ** _K_BITS - 1)
    best = -1
    for k in range(top + 1):
        bits = (L - 1) * (1 + k)
        for i in range(L - 1):
            bits += (q[i + 1] - q[i]) >> k
        if best < 0 or bits < best:
            best = bits
    return out, grid_bits + _K_BITS + best


# what design_window did with a window
EMPTY = 0       # no occupied bin: no design
DONE = 1        # the codebook is made (levels, thresholds, side bits)
COLD = 2        # the caller designs, from its method's cold start
WARM = 3        # the caller designs, from the levels given
UNCHECKED = 4   # exact levels that do not make a valid codebook (the caller's check says why)

#: ``init`` of :func:`design_window` without a codebook in force (read-only, as a
#: Codebook's levels are: one compiled form serves both)
NO_LEVELS = np.empty(0)
NO_LEVELS.setflags(write=False)


@njit(cache=True, nogil=True)
def _fits_window(levels, low, high, count):  # pragma: no cover - compiled
    """Whether ``levels`` (the codebook in force) may warm-start a design on a
    window whose occupied bin centers span ``[low, high]``; otherwise the
    design starts cold.

    Levels are counted without padded duplicates
    (:func:`streamq.nodes.coding.pad_levels`) or levels merged by the
    side-information grid. The codebook is used only if it has ``count``
    distinct levels and its outermost levels lie inside the window's occupied
    range. A codebook that has collapsed (an entropy-constrained design drops
    the cells that empty out, and a dropped cell never comes back from a warm
    start) or that is far wider than the window (the first model codebook on a
    quiet window) would leave cells empty and lose them for good; the cold
    start spreads all the levels over the data again.
    """
    L = levels.shape[0]
    if L < count:
        return False
    if levels[0] < low or levels[L - 1] > high:
        return False
    distinct = 1
    for i in range(1, L):
        if levels[i] > levels[i - 1]:
            distinct += 1
    return distinct >= count


@njit(cache=True, nogil=True)
def _exact_levels(centers, counts, occupied, count):  # pragma: no cover - compiled
    """A level on each occupied bin center, the ``count - occupied`` spare ones
    outside the extremes one bin width apart (half below, the rest above): zero
    error on a window with no more occupied bins than levels."""
    n = centers.shape[0]
    spare = count - occupied
    width = (centers[n - 1] - centers[0]) / max(n - 1, 1)
    if width == 0.0:
        width = 1e-6
    below = spare // 2
    above = spare - below
    lv = np.empty(count)
    k = below
    for i in range(n):
        if counts[i] > 0:
            lv[k] = centers[i]
            k += 1
    for j in range(below):
        lv[j] = lv[below] - width * float(below - j)
    top = lv[k - 1]
    for j in range(1, above + 1):
        lv[k - 1 + j] = top + width * float(j)
    return lv


@njit(cache=True, nogil=True, error_model="numpy")
def design_window(centers, counts, count, init, mode, grid_bits, tol,
                  max_iter):  # pragma: no cover - compiled
    """The streaming encoder's design on one window's histogram, in one call.

    Steps, each tested equal to a numpy definition: the occupied bins; with
    ``mode >= 1``, the exact codebook of a window with at most ``count``
    occupied bins (:func:`_exact_levels`); the warm-start rule
    (:func:`_fits_window`); with ``mode == 2``,
    Lloyd-Max: :func:`prefix_sums`, :func:`cube_root_start` or the levels
    ``init``, :func:`lloyd_iterate`, :func:`midpoint_thresholds` (the codebook
    of :func:`streamq.design.lloyd.lloyd_max_histogram`); then
    :func:`grid_levels` (none when ``grid_bits`` is 0).

    Parameters
    ----------
    centers, counts : numpy.ndarray
        The window's histogram (sorted float64 centers, non-negative weights).
    count : int
        Level count.
    init : numpy.ndarray
        Levels of the codebook in force (empty for none).
    mode : int
        0: only the occupied bins and the warm-start rule; 1: also the exact
        codebook (method ``optimal``); 2: also Lloyd-Max.
    grid_bits : int
        Side-information grid (0: levels stay as designed, no side bits).
    tol, max_iter
        Stopping rule of :func:`lloyd_iterate`.

    Returns
    -------
    (status, levels, thresholds, bits)
        ``status`` :data:`DONE` with the codebook and its side bits;
        :data:`EMPTY` for a window without data; :data:`COLD` or
        :data:`WARM` when the caller must design (``mode < 2``, or the rare
        Lloyd cases left to the general route: one value, cells that stay
        empty, levels that make no valid codebook); :data:`UNCHECKED` with
        exact levels that make no valid codebook.

    References
    ----------
    The design is Lloyd's iteration (Lloyd, IEEE Trans. Information Theory
    28(2), 1982; Max, IRE Trans. Information Theory 6(1), 1960): see the
    module's references and :func:`streamq.design.lloyd.lloyd_max_histogram`.
    """
    n = counts.shape[0]
    if centers.shape[0] != n:
        return COLD, np.empty(0), np.empty(0), 0     # the general route says what is wrong
    occupied = 0
    first = last = 0
    for i in range(n):
        if counts[i] > 0:
            if occupied == 0:
                first = i
            last = i
            occupied += 1
    if occupied == 0:
        return EMPTY, np.empty(0), np.empty(0), 0
    if mode >= 1 and occupied <= count:
        lv = _exact_levels(centers, counts, occupied, count)
        th, ok = midpoint_thresholds(lv, False)
        if not ok:
            return UNCHECKED, lv, np.empty(0), 0
        return _on_grid(lv, th, grid_bits, UNCHECKED)
    warm = _fits_window(init, centers[first], centers[last], count)
    retry = WARM if warm else COLD
    if mode < 2 or (warm and init.shape[0] != count):
        return retry, np.empty(0), np.empty(0), 0
    shifted, ref, p01, total2, _, single, _ = prefix_sums(centers, counts)
    if single:
        return retry, np.empty(0), np.empty(0), 0
    if warm:
        y = np.empty(count)
        for i in range(count):
            y[i] = init[i] - ref
    else:
        y = cube_root_start(shifted, p01[:, 0], count)
    y, _, _, stuck, _, _ = lloyd_iterate(shifted, p01, total2, y, tol, max_iter, False)
    if stuck:
        return retry, np.empty(0), np.empty(0), 0
    for i in range(count):
        y[i] += ref
    th, ok = midpoint_thresholds(y, True)
    if not ok:
        return retry, np.empty(0), np.empty(0), 0
    return _on_grid(y, th, grid_bits, retry)


@njit(cache=True, nogil=True)
def _on_grid(levels, thresholds, grid_bits, otherwise):  # pragma: no cover - compiled
    """(DONE, levels on the grid, thresholds, bits), or ``otherwise`` with the
    levels as designed when rounding would put them out of order."""
    if grid_bits == 0:
        return DONE, levels, thresholds, 0
    rounded, bits = grid_levels(levels, grid_bits)
    if bits < 0:
        return otherwise, levels, np.empty(0), 0
    return DONE, rounded, thresholds, bits


def warm_up() -> None:
    """Compile (or load from the disk cache) every kernel for the array types
    the design path passes: contiguous float64 histograms and levels."""
    c = np.array([-1.0, 0.0, 0.0, 1.0, 2.0])
    w = np.array([1.0, 0.0, 2.0, 1.0, 1.0])
    shifted, ref, p01, total2, _, _, _ = prefix_sums(c, w)
    y = cube_root_start(shifted, p01[:, 0], 3)
    lloyd_iterate(shifted, p01, total2, y, 1e-7, 5, False)
    lloyd_iterate(shifted, p01, total2, np.array([-9.0, -8.0, 0.0, 0.5]), 0.0, 5, True)
    midpoint_thresholds(y, True)
    grid_levels(y, 16)
    levels = np.array([-1.0, 0.0, 1.0])
    levels.setflags(write=False)     # as a Codebook holds them
    for init in (levels, NO_LEVELS):
        design_window(c, w, 3, init, 2, 16, 1e-7, 5)
