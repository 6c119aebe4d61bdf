"""Compiled loops (numba) of the ``pdf-estimator``: its windows summed hop by
hop instead of sample by sample.

A window of W samples slides by H samples, so each sample would be read
about W / H times if every window were summarised from its samples. Here each
sample is read a fixed number of times, whatever W / H:

- **Pieces.** The stream is cut at every multiple of the hop and at every
  window start (``k * hop - window``), so each window is a run of whole
  pieces. When a piece is complete, :func:`piece_stats` sums it once (count,
  sum, central moments 2..4 about the piece's mean, extremes, peak, clipped
  samples); a window's moments come from its pieces' by
  :func:`combine_pieces` (the pairwise update of Pebay), its extremes and
  peak from theirs.
- **A fixed fine grid** for input on the 16-bit grid (every sample
  ``k / 32768``): :func:`grid_push` keeps a count per 16-bit code of the
  window's samples (one increment for a sample coming in, one decrement for
  the one leaving); :func:`grid_histogram` moves those counts onto the
  window's own bins (over its tracked span, or -1..1) in O(bins + occupied
  codes). Every sample of a code has the code's value, so the counts equal
  binning the samples one by one. Other input is binned from its samples
  once per window (:func:`bin_window`), the span coming from the pieces.

Every kernel has a plain numpy definition in ``tests/kernel_reference.py``
it equals exactly. They release the interpreter lock (``nogil``): the
meter's thread runs meanwhile.

References
----------
.. [1] Pebay, P. (2008). Formulas for robust, one-pass parallel computation
   of covariances and arbitrary-order statistical moments. Sandia Report
   SAND2008-6212, Sandia National Laboratories.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: codes of the 16-bit grid: value ``(code - GRID_ZERO) / GRID_ZERO``
GRID_CODES = 65_536
GRID_ZERO = 32_768.0
GRID_STEP = 1.0 / GRID_ZERO   # (a power of two: multiplying by it is exact)
#: columns of a piece's (or a window's) summary, per channel
PIECE_COLUMNS = ("n", "sum", "m2", "m3", "m4", "min", "max", "peak", "clipped")


#: ``v + GRID_SHIFT`` holds ``v * 32768`` in the low bits of its mantissa (the
#: unit in its last place is 2**-15): 1.5 * 2**37
GRID_SHIFT = 1.5 * 2.0 ** 37


@njit(cache=True, nogil=True, inline="always")
def _code(v, scratch, bits):  # pragma: no cover - compiled
    """16-bit code of ``v``, ``v * 32768 + 32768`` for values on the grid: the
    low 16 bits of ``v + GRID_SHIFT`` (``scratch[0]``, read as an integer
    through ``bits``, its int64 view), top bit flipped. No branch, no
    conversion; any other value, NaN included, also lands inside the table."""
    scratch[0] = v + GRID_SHIFT
    return (bits[0] & 0xFFFF) ^ 0x8000


@njit(cache=True, nogil=True)
def span_of(lo, hi, bins, tracked):  # pragma: no cover - compiled
    """The bins' lowest edge and width: the tracked span [lo, hi] widened by
    half a bin each side (a constant window by 1e-6 first), or -1..1."""
    if tracked:
        if hi - lo < 1e-12:
            lo, hi = lo - 1e-6, hi + 1e-6
        pad = 0.5 * (hi - lo) / bins
        lo, hi = lo - pad, hi + pad
    else:
        lo, hi = -1.0, 1.0
    return lo, (hi - lo) / bins


@njit(cache=True, nogil=True, inline="always")
def _bin(v, lo, inv, bins):  # pragma: no cover - compiled
    k = int((v - lo) * inv)
    if k < 0:
        return 0
    if k > bins - 1:
        return bins - 1
    return k


@njit(cache=True, nogil=True, inline="always")
def _put(row, n, total, m2, m3, m4, lo, hi, peak, clipped):  # pragma: no cover - compiled
    """One channel's summary, in the order of PIECE_COLUMNS."""
    row[0] = n
    row[1] = total
    row[2] = m2
    row[3] = m3
    row[4] = m4
    row[5] = lo
    row[6] = hi
    row[7] = peak
    row[8] = clipped


@njit(cache=True, nogil=True)
def piece_stats(x, clip_level, out):  # pragma: no cover - compiled
    """Summary of one piece, per channel, in two passes over its samples.

    Equal to, per channel ``c`` with ``v = x[:, c]``: ``n = len(v)``,
    ``sum = cumsum(v)[-1]``, and with ``d = v - sum / n``, ``d2 = d * d``:
    ``m2, m3, m4 = cumsum(d2)[-1], cumsum(d2 * d)[-1], cumsum(d2 * d2)[-1]``;
    ``min``, ``max``, ``peak = max |v|`` and ``clipped = count(|v| >= clip_level)``
    (sums in sample order).

    Parameters
    ----------
    x : ndarray, shape (n, C), float64, n >= 1
    clip_level : float
    out : ndarray, shape (C, 9), float64; written (columns PIECE_COLUMNS)
    """
    n, C = x.shape
    for c in range(C):
        total = 0.0
        lo = x[0, c]
        hi = x[0, c]
        peak = 0.0
        clipped = 0
        for i in range(n):
            v = x[i, c]
            total += v
            if v < lo:
                lo = v
            if v > hi:
                hi = v
            a = abs(v)
            if a > peak:
                peak = a
            if a >= clip_level:
                clipped += 1
        mean = total / n
        m2 = 0.0
        m3 = 0.0
        m4 = 0.0
        for i in range(n):
            d = x[i, c] - mean
            d2 = d * d
            m2 += d2
            m3 += d2 * d
            m4 += d2 * d2
        _put(out[c], n, total, m2, m3, m4, lo, hi, peak, clipped)


@njit(cache=True, nogil=True)
def combine_pieces(pieces, out):  # pragma: no cover - compiled
    """Summary of consecutive pieces taken as one, adding them left to right.

    Counts, sums and clipped counts add; extremes and peaks take min/max.
    With ``a`` the pieces so far and ``b`` the next, ``N = na + nb`` and
    ``delta = sum_b / nb - sum_a / na`` (the difference of the means), the
    central sums follow Pebay's update [1]_::

        m4 = m4a + m4b + delta**4 * na * nb * (na**2 - na * nb + nb**2) / N**3
             + 6 * delta**2 * (na**2 * m2b + nb**2 * m2a) / N**2
             + 4 * delta * (na * m3b - nb * m3a) / N
        m3 = m3a + m3b + delta**3 * na * nb * (na - nb) / N**2
             + 3 * delta * (na * m2b - nb * m2a) / N
        m2 = m2a + m2b + delta**2 * na * nb / N

    Parameters
    ----------
    pieces : ndarray, shape (m, C, 9), float64, m >= 1, oldest first
    out : ndarray, shape (C, 9), float64; written

    References
    ----------
    .. [1] Pebay, P. (2008). Formulas for robust, one-pass parallel computation
       of covariances and arbitrary-order statistical moments. Sandia Report
       SAND2008-6212.
    """
    m, C, _ = pieces.shape
    for c in range(C):
        na = pieces[0, c, 0]
        sa = pieces[0, c, 1]
        m2 = pieces[0, c, 2]
        m3 = pieces[0, c, 3]
        m4 = pieces[0, c, 4]
        lo = pieces[0, c, 5]
        hi = pieces[0, c, 6]
        peak = pieces[0, c, 7]
        clipped = pieces[0, c, 8]
        for j in range(1, m):
            nb = pieces[j, c, 0]
            sb = pieces[j, c, 1]
            m2b = pieces[j, c, 2]
            m3b = pieces[j, c, 3]
            m4b = pieces[j, c, 4]
            n = na + nb
            delta = sb / nb - sa / na
            d2 = delta * delta
            m4 = (m4 + m4b + d2 * d2 * na * nb * (na * na - na * nb + nb * nb) / (n * n * n)
                  + 6.0 * d2 * (na * na * m2b + nb * nb * m2) / (n * n)
                  + 4.0 * delta * (na * m3b - nb * m3) / n)
            m3 = (m3 + m3b + d2 * delta * na * nb * (na - nb) / (n * n)
                  + 3.0 * delta * (na * m2b - nb * m2) / n)
            m2 = m2 + m2b + d2 * na * nb / n
            na = n
            sa = sa + sb
            lo = min(lo, pieces[j, c, 5])
            hi = max(hi, pieces[j, c, 6])
            peak = max(peak, pieces[j, c, 7])
            clipped += pieces[j, c, 8]
        _put(out[c], na, sa, m2, m3, m4, lo, hi, peak, clipped)


@njit(cache=True, nogil=True)
def grid_push(buf, written, data, fine, grid):  # pragma: no cover - compiled
    """Append ``data`` to the ring of the last W samples and, if ``grid``,
    keep ``fine`` the 16-bit code counts of the samples in it.

    ``buf`` holds the ring twice over (rows ``i`` and ``W + i`` the same
    sample, so any window is one contiguous stretch); stream sample ``p``
    sits at row ``p % W``. Equal to: the ring's rows then hold the last
    ``min(W, written + n)`` samples of the stream, and ``fine[c]`` is
    ``bincount(code(those samples of channel c), minlength=65536)`` with
    ``code(v) = v * 32768 + 32768`` on the grid (see ``_code`` for other values).

    Parameters
    ----------
    buf : ndarray, shape (2 W, C), float64; updated in place
    written : int
        Stream samples pushed before ``data``.
    data : ndarray, shape (n, C), float64
    fine : ndarray, shape (C, 65536), int32; updated in place (read only if ``grid``)
    grid : bool
    """
    n, C = data.shape
    W = buf.shape[0] // 2
    slot = written % W
    full = written >= W
    scratch = np.empty(1)
    bits = scratch.view(np.int64)
    for i in range(n):
        for c in range(C):
            v = data[i, c]
            if grid:
                if full:
                    fine[c, _code(buf[slot, c], scratch, bits)] -= 1
                fine[c, _code(v, scratch, bits)] += 1
            buf[slot, c] = v
            buf[slot + W, c] = v
        slot += 1
        if slot == W:
            slot = 0
            full = True


@njit(cache=True, nogil=True)
def grid_fill(x, fine):  # pragma: no cover - compiled
    """``fine[c] = bincount(code(x[:, c]), minlength=65536)`` for every channel
    (see :func:`grid_push` for ``code``)."""
    n, C = x.shape
    fine[:, :] = 0
    scratch = np.empty(1)
    bits = scratch.view(np.int64)
    for i in range(n):
        for c in range(C):
            fine[c, _code(x[i, c], scratch, bits)] += 1


@njit(cache=True, nogil=True)
def grid_histogram(fine, lo, hi, bins, tracked, centers, counts):  # pragma: no cover
    """The window's histogram from its 16-bit code counts.

    Equal to binning every sample of the window (values ``lo`` .. ``hi``, all
    on the 16-bit grid) as ``int((v - lo') / width)``, clamped to
    ``0 .. bins - 1``, where ``lo', width = span_of(lo, hi, bins, tracked)``;
    ``centers[k] = lo' + (k + 0.5) * width``.

    The cell of a code is a non-decreasing function of the code, so each bin
    holds a run of codes: the run's end is guessed from the bin's upper edge
    and corrected by evaluating the cell of the codes beside it, then the
    run's counts are added. O(bins + codes from lo to hi).

    Parameters
    ----------
    fine : ndarray, shape (65536,), int32 (one channel)
    lo, hi : float
        The window's smallest and largest sample.
    bins : int
    tracked : bool
    centers, counts : ndarray, shape (bins,), float64; written
    """
    lo2, width = span_of(lo, hi, bins, tracked)
    inv = 1.0 / width
    scratch = np.empty(1)
    bits = scratch.view(np.int64)
    first = _code(lo, scratch, bits)
    last = _code(hi, scratch, bits)
    cur = first
    for b in range(bins):
        centers[b] = lo2 + (b + 0.5) * width
        if b == bins - 1:
            end = last + 1
        else:
            # first code in cur .. last whose cell is above b (last + 1 if none)
            edge = (lo2 + (b + 1) * width) * GRID_ZERO + GRID_ZERO
            end = cur
            if edge > cur:
                end = int(min(edge, float(last))) + 1
            while end > cur and _bin((end - 1 - GRID_ZERO) * GRID_STEP, lo2, inv, bins) > b:
                end -= 1
            while end <= last and _bin((end - GRID_ZERO) * GRID_STEP, lo2, inv, bins) <= b:
                end += 1
        counts[b] = np.sum(fine[cur:end])   # (integers: exact in any order)
        cur = end


@njit(cache=True, nogil=True)
def bin_window(x, lo, hi, bins, tracked, centers, counts):  # pragma: no cover - compiled
    """The window's histogram from its samples, its extremes known: equal to
    :func:`grid_histogram`'s definition for any float64 input (one pass).

    Parameters
    ----------
    x : ndarray, shape (n,), float64 (a column view is fine)
    lo, hi : float
        The smallest and largest of ``x``.
    bins : int
    tracked : bool
    centers, counts : ndarray, shape (bins,), float64; written
    """
    lo2, width = span_of(lo, hi, bins, tracked)
    inv = 1.0 / width
    for b in range(bins):
        centers[b] = lo2 + (b + 0.5) * width
        counts[b] = 0.0
    for i in range(x.shape[0]):
        counts[_bin(x[i], lo2, inv, bins)] += 1.0


def warm_up() -> None:
    """Compile (or load from the disk cache) every kernel for the arrays the
    estimator passes: ring stretches, whole blocks and column views."""
    buf = np.zeros((4, 2))
    fine = np.zeros((2, GRID_CODES), dtype=np.int32)
    grid_push(buf, 0, np.zeros((1, 2)), fine, True)
    grid_push(buf, 0, np.zeros((2, 2))[:1], fine, True)
    grid_fill(buf[1:3], fine)
    out = np.empty((2, 9))
    piece_stats(buf[1:3], 1.0, out)
    combine_pieces(np.zeros((1, 2, 9)) + 1.0, out)
    centers, counts = np.empty(4), np.empty(4)
    grid_histogram(fine[0], 0.0, 0.0, 4, True, centers, counts)
    bin_window(buf[1:3, 0], 0.0, 0.0, 4, True, centers, counts)
