"""Turning a set of reconstruction levels into a valid codebook.

Design iterations can end with fewer distinct useful levels than asked for
(a constant signal, a histogram with fewer occupied bins than levels). The
rules here give a documented, deterministic codebook in those cases:

* a single distinct value ``v`` (constant signal): levels
  ``v + eps * (i - i0)`` with ``i0 = (L - 1) // 2`` and
  ``eps = 1e-9 * max(1, |v|)``, so that ``v`` itself is level ``i0`` exactly
  and the error on the constant is zero;
* ``K`` distinct values with ``1 < K < L``: the ``L - K`` spare levels are
  spread evenly inside the gaps between the values, each gap getting a share
  proportional to its width; every original value keeps a cell of its own
  and is reproduced exactly.
"""

from __future__ import annotations

import numpy as np

from streamq.design.codebook import Codebook

#: Relative spacing used to spread levels around a constant.
CONSTANT_SPREAD = 1e-9


def _strict(levels: np.ndarray) -> bool:
    if levels.size < 2:
        return False
    if not np.all(levels[1:] > levels[:-1]):
        return False
    th = 0.5 * (levels[:-1] + levels[1:])
    return bool(np.all(th[1:] > th[:-1])) and bool(np.all(np.isfinite(th)))


def _enforce_spacing(levels: np.ndarray) -> np.ndarray:
    """Push levels apart so that adjacent ones differ by at least a tiny step."""
    scale = max(float(np.max(np.abs(levels))), 1.0)
    eps = CONSTANT_SPREAD * scale
    i = np.arange(levels.size) * eps
    return np.maximum.accumulate(levels - i) + i


def spread_levels(values, count: int) -> np.ndarray:
    """Strictly increasing levels of length ``count`` containing ``values``.

    Parameters
    ----------
    values : array_like
        Distinct useful levels (any order, duplicates removed here).
    count : int
        Number of levels wanted (at least the number of distinct values).
    """
    v = np.unique(np.asarray(values, dtype=np.float64))
    k = v.size
    if k == 0:
        v = np.zeros(1)
        k = 1
    if k >= count:
        # more values than levels (callers avoid this): keep a spread subset
        out = v[np.round(np.linspace(0, k - 1, count)).astype(np.intp)] if k > count else v
    elif k == 1:
        c = float(v[0])
        eps = CONSTANT_SPREAD * max(1.0, abs(c))
        i0 = (count - 1) // 2
        out = c + eps * (np.arange(count) - i0)
        out[i0] = c
    else:
        extra = count - k
        gaps = np.diff(v)
        share = extra * gaps / gaps.sum()
        n = np.floor(share).astype(np.int64)
        left = extra - int(n.sum())
        if left:
            order = np.argsort(-(share - n), kind="stable")
            n[order[:left]] += 1
        # positions v[g] + gap * j / (n+1), j = 1..n for each gap g
        g = np.repeat(np.arange(gaps.size), n)
        starts = np.cumsum(n) - n
        j = np.arange(g.size) - np.repeat(starts, n) + 1
        inserted = v[g] + gaps[g] * j / (n[g] + 1)
        out = np.sort(np.concatenate((v, inserted)))
    if not _strict(out):
        out = _enforce_spacing(np.sort(out))
    return out


def codebook_from_levels(levels, count=None, version: int = 0) -> Codebook:
    """Codebook with midpoint thresholds, repairing degenerate level sets.

    If the levels are strictly increasing (with strictly increasing
    midpoints) they are used as they are; otherwise their distinct values
    are spread with :func:`spread_levels`.
    """
    lv = np.asarray(levels, dtype=np.float64)
    count = lv.size if count is None else int(count)
    if lv.size != count or not _strict(lv):
        lv = spread_levels(lv, count)
    return Codebook(lv, None, version)
