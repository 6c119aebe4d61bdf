"""The scalar quantizer codebook: decision thresholds, reconstruction levels, fast encoders.

A :class:`Codebook` with ``L`` reconstruction levels has ``L - 1`` strictly
increasing finite decision thresholds. Index ``i`` stands for the cell
``[t[i-1], t[i])`` (with ``t[-1] = -inf`` and ``t[L-1] = +inf``), so encoding
is exactly ``numpy.searchsorted(thresholds, x, side="right")``: a value equal
to a threshold goes to the upper cell. NaN follows the same rule as
``searchsorted`` and lands in the top cell; callers that must reject NaN check
their input first (the design functions do).

Two fast paths give results identical to ``searchsorted``:

* :meth:`Codebook.encode_int16` for 16-bit PCM codes ``k`` (value ``k/32768``)
  through a 65,536-entry table built with one ``np.repeat`` over the
  per-cell code counts (tens of microseconds) and cached on the instance;
* :meth:`Codebook.encode_fast` for float input through a uniform grid of
  cells: the grid cell of ``x`` is computed with monotone floating-point
  operations, the table holds the index at the bottom of each grid cell, and
  one comparison per threshold that shares the grid cell corrects the index.
  Because the cell map is monotone in ``x`` the correction is exact for every
  float, including values at or next to a threshold.
"""

from __future__ import annotations

import json
import math

import numpy as np

from streamq.design._validate import MAX_LEVELS, MIN_LEVELS
from streamq.errors import StreamqError

__all__ = ["Codebook", "index_dtype", "CODEBOOK_FORMAT"]

#: Tag stored in serialised codebooks.
CODEBOOK_FORMAT = "streamq-codebook/1"

_INT16_SCALE = 32768.0
# Largest number of thresholds allowed to share one grid cell of the float
# fast path; beyond it encode_fast falls back to searchsorted.
_MAX_PER_CELL = 4
_MAX_GRID = 1 << 18
_CHUNK = 1 << 16


def index_dtype(levels: int) -> np.dtype:
    """Smallest unsigned integer dtype that holds ``levels - 1``."""
    if levels - 1 <= 0xFF:
        return np.dtype(np.uint8)
    if levels - 1 <= 0xFFFF:
        return np.dtype(np.uint16)
    return np.dtype(np.uint32)


def _as_vector(values, name: str) -> np.ndarray:
    try:
        arr = np.array(values, dtype=np.float64, copy=True)
    except (TypeError, ValueError):
        raise StreamqError(f"codebook {name} must be numeric") from None
    if arr.ndim != 1:
        arr = arr.reshape(-1)
    if not np.isfinite(arr).all():
        bad = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise StreamqError(f"codebook {name}[{bad}] is not finite ({arr[bad]!r})")
    return arr


def _version_number(version) -> int:
    """A codebook version as an int, or a one-line StreamqError."""
    try:
        return int(version)
    except (TypeError, ValueError):
        raise StreamqError(f"codebook version must be an integer, got {version!r}") from None


class Codebook:
    """Immutable scalar quantizer: thresholds, levels and a version number.

    Parameters
    ----------
    levels : array_like
        ``L`` reconstruction levels, non-decreasing (ties allowed), finite,
        ``2 <= L <= 65536``.
    thresholds : array_like, optional
        ``L - 1`` strictly increasing finite decision thresholds. Defaults to
        the midpoints of adjacent levels (then the levels must be strictly
        increasing).
    version : int, optional
        Version number carried along (the streaming encoder counts updates).

    Raises
    ------
    StreamqError
        Wrong counts, non-finite values, non-increasing thresholds or
        decreasing levels.
    """

    __slots__ = ("_levels", "_thresholds", "_version", "_dtype", "_int16", "_grid")

    def __init__(self, levels, thresholds=None, version: int = 0):
        lv = _as_vector(levels, "levels")
        n = lv.size
        if n < MIN_LEVELS or n > MAX_LEVELS:
            raise StreamqError(
                f"a codebook needs {MIN_LEVELS} to {MAX_LEVELS} levels, got {n}"
            )
        if np.any(lv[1:] < lv[:-1]):
            bad = int(np.flatnonzero(lv[1:] < lv[:-1])[0]) + 1
            raise StreamqError(
                f"codebook levels must be non-decreasing; levels[{bad}] = {lv[bad]!r} "
                f"is below levels[{bad - 1}] = {lv[bad - 1]!r}"
            )
        if thresholds is None:
            th = 0.5 * (lv[:-1] + lv[1:])
        else:
            th = _as_vector(thresholds, "thresholds")
        if th.size != n - 1:
            raise StreamqError(
                f"a codebook with {n} levels needs {n - 1} thresholds, got {th.size}"
            )
        if th.size > 1 and not np.all(th[1:] > th[:-1]):
            bad = int(np.flatnonzero(~(th[1:] > th[:-1]))[0]) + 1
            raise StreamqError(
                f"codebook thresholds must be strictly increasing; thresholds[{bad}] = "
                f"{th[bad]!r} is not above thresholds[{bad - 1}] = {th[bad - 1]!r}"
            )
        version = _version_number(version)
        lv.setflags(write=False)
        th.setflags(write=False)
        object.__setattr__(self, "_levels", lv)
        object.__setattr__(self, "_thresholds", th)
        object.__setattr__(self, "_version", version)
        object.__setattr__(self, "_dtype", index_dtype(n))
        object.__setattr__(self, "_int16", None)
        object.__setattr__(self, "_grid", None)

    @classmethod
    def _trusted(cls, levels: np.ndarray, thresholds: np.ndarray, version: int = 0) -> "Codebook":
        """Build without validation from fresh float64 arrays already known valid.

        For the design routines' hot paths, which have checked ordering and
        finiteness themselves. The arrays are taken over (made read-only).
        """
        self = object.__new__(cls)
        levels.setflags(write=False)
        thresholds.setflags(write=False)
        object.__setattr__(self, "_levels", levels)
        object.__setattr__(self, "_thresholds", thresholds)
        object.__setattr__(self, "_version", int(version))
        object.__setattr__(self, "_dtype", index_dtype(levels.size))
        object.__setattr__(self, "_int16", None)
        object.__setattr__(self, "_grid", None)
        return self

    # -- immutability ------------------------------------------------------
    def __setattr__(self, name, value):
        raise AttributeError("Codebook is immutable; use with_version() for a new version")

    def __delattr__(self, name):
        raise AttributeError("Codebook is immutable")

    def __reduce__(self):
        return (Codebook, (self._levels, self._thresholds, self._version))

    # -- properties ---------------------------------------------------------
    @property
    def levels(self) -> np.ndarray:
        """Reconstruction levels (read-only float64 array of length L)."""
        return self._levels

    @property
    def thresholds(self) -> np.ndarray:
        """Decision thresholds (read-only float64 array of length L - 1)."""
        return self._thresholds

    @property
    def version(self) -> int:
        """Version number."""
        return self._version

    @property
    def size(self) -> int:
        """Number of reconstruction levels L."""
        return self._levels.size

    def __len__(self) -> int:
        return self._levels.size

    @property
    def dtype(self) -> np.dtype:
        """Index dtype: the smallest unsigned type holding L - 1."""
        return self._dtype

    @property
    def bits(self) -> float:
        """Fixed-rate bits per index, log2(L)."""
        return math.log2(self._levels.size)

    def with_version(self, version: int) -> "Codebook":
        """Same thresholds and levels under another version number (the
        read-only arrays are shared, not checked again)."""
        return Codebook._trusted(self._levels, self._thresholds, _version_number(version))

    def __eq__(self, other):
        if not isinstance(other, Codebook):
            return NotImplemented
        return (
            self._version == other._version
            and np.array_equal(self._levels, other._levels)
            and np.array_equal(self._thresholds, other._thresholds)
        )

    def __hash__(self):
        return hash((self._version, self._levels.tobytes(), self._thresholds.tobytes()))

    def __repr__(self) -> str:
        lv = self._levels
        return (
            f"Codebook(L={lv.size}, version={self._version}, "
            f"levels=[{lv[0]:.6g} .. {lv[-1]:.6g}])"
        )

    # -- encode / decode ---------------------------------------------------
    def encode(self, x) -> np.ndarray:
        """Cell index of each value: ``searchsorted(thresholds, x, side='right')``.

        Parameters
        ----------
        x : array_like
            Values of any shape (converted to float64).

        Returns
        -------
        ndarray
            Indices of the same shape, dtype :attr:`dtype`.
        """
        idx = np.searchsorted(self._thresholds, np.asarray(x, dtype=np.float64), side="right")
        return idx.astype(self._dtype, copy=False)

    def decode(self, idx) -> np.ndarray:
        """Reconstruction level of each index (float64, same shape).

        Raises
        ------
        StreamqError
            If an index is negative or not below L.
        """
        idx = np.asarray(idx)
        if idx.dtype.kind not in "ui":
            if idx.dtype.kind == "f" and idx.size and np.all(np.isfinite(idx)) and np.all(idx == np.round(idx)):
                idx = idx.astype(np.int64)
            elif idx.size:
                raise StreamqError(f"codebook indices must be integers, got dtype {idx.dtype}")
            else:
                idx = idx.astype(np.int64)
        if idx.size and (idx.min() < 0 or idx.max() >= self._levels.size):
            raise StreamqError(
                f"codebook index out of range 0..{self._levels.size - 1} "
                f"(found {int(idx.min())}..{int(idx.max())})"
            )
        return self._levels[idx]

    def quantize(self, x) -> np.ndarray:
        """Encode then decode: the reconstructed values of ``x``."""
        return self._levels[self.encode(x)]

    def distortion(self, x, weights=None) -> float:
        """Mean squared error of quantizing ``x`` (optionally weighted).

        Raises
        ------
        StreamqError
            On empty input or non-finite values.
        """
        from streamq.design._validate import finite_array

        xs = finite_array(x, "samples")
        err = xs - self._levels[np.searchsorted(self._thresholds, xs, side="right")]
        if weights is None:
            return float(np.dot(err, err) / xs.size)
        w = finite_array(weights, "weights")
        if w.shape != xs.shape:
            raise StreamqError("samples and weights differ in length")
        total = w.sum()
        if not total > 0:
            raise StreamqError("weights sum to zero")
        return float(np.dot(w, err * err) / total)

    # -- int16 table -------------------------------------------------------
    def int16_table(self) -> np.ndarray:
        """The 65,536-entry index table for int16 codes (cached).

        Entry ``k + 32768`` is the index of ``k / 32768``. The table is built
        from the number of codes below each threshold, ``ceil(32768 t)``
        shifted and clipped, with one ``np.repeat``; multiplying by a power of
        two is exact, so the table agrees with ``searchsorted`` everywhere.
        """
        table = self._int16
        if table is None:
            table = self._build_int16_table()
        return table[1]

    def _build_int16_table(self):
        th = self._thresholds
        # number of codes k in [-32768, 32767] with k / 32768 < t
        below = np.ceil(th * _INT16_SCALE)
        below = np.clip(below + 32768.0, 0.0, 65536.0).astype(np.int64)
        counts = np.diff(below, prepend=0, append=65536)
        table = np.repeat(np.arange(self._levels.size, dtype=self._dtype), counts)
        # rotated copy indexed by the raw uint16 bit pattern of an int16
        rotated = np.concatenate((table[32768:], table[:32768]))
        table.setflags(write=False)
        rotated.setflags(write=False)
        pair = (rotated, table)
        object.__setattr__(self, "_int16", pair)
        return pair

    def encode_int16(self, codes) -> np.ndarray:
        """Indices of 16-bit PCM codes ``k`` standing for ``k / 32768``.

        Equal to ``encode(codes / 32768)``, through the cached table.

        Parameters
        ----------
        codes : array_like of int16

        Returns
        -------
        ndarray
            Indices of the same shape, dtype :attr:`dtype`.
        """
        pair = self._int16
        if pair is None:
            pair = self._build_int16_table()
        codes = np.asarray(codes)
        if codes.dtype != np.int16:
            if codes.dtype.kind not in "iu":
                raise StreamqError(f"encode_int16 needs int16 codes, got dtype {codes.dtype}")
            if codes.size and (codes.min() < -32768 or codes.max() > 32767):
                raise StreamqError("encode_int16 codes must lie in -32768..32767")
            codes = codes.astype(np.int16)
        return pair[0][codes.view(np.uint16)]

    # -- float grid --------------------------------------------------------
    def _build_grid(self):
        th = self._thresholds
        n = th.size
        lo = float(th[0])
        span = float(th[-1]) - lo
        if n == 1 or not span > 0:
            grid = (lo, 1.0, 2, np.array([0, 1], dtype=np.intp), np.array([th[0], np.nan]), 1)
            object.__setattr__(self, "_grid", grid)
            return grid
        gaps = np.diff(th)
        # cells no wider than the smallest gap hold at most one threshold each
        # (up to rounding); cap the grid size and accept a few per cell then
        want = span / float(gaps.min()) + 2.0
        size = int(min(max(want, 4.0 * n, 1024.0), _MAX_GRID))
        scale = (size - 2) / span
        if not math.isfinite(scale) or scale <= 0:
            grid = None
        else:
            cell = self._cells(th, lo, scale, size)
            # the top cell must hold no threshold (so NaN and +inf land right)
            if cell[-1] >= size - 1:
                grid = None
            else:
                first = np.searchsorted(cell, np.arange(size), side="left")
                per_cell = int(np.max(np.diff(np.append(first, n))))
                if per_cell > _MAX_PER_CELL:
                    grid = None
                else:
                    # NaN sentinel: no value compares >= it, not even +inf
                    ext = np.append(th, np.nan)
                    grid = (lo, scale, size, first.astype(np.intp), ext[first], per_cell)
        if grid is None:
            grid = (0.0, 0.0, 0, None, None, 0)
        object.__setattr__(self, "_grid", grid)
        return grid

    @staticmethod
    def _cells(x, lo, scale, size):
        """Monotone map from values to grid cells (NaN to the top cell)."""
        with np.errstate(over="ignore", invalid="ignore"):
            v = (x - lo) * scale
        v = np.maximum(v, 0.0)  # keeps NaN
        v = np.fmin(v, size - 1.0)  # NaN -> top cell
        return v.astype(np.intp)

    def encode_fast(self, x) -> np.ndarray:
        """Float encoder through a uniform grid with exact edge correction.

        Same result as :meth:`encode` (``searchsorted`` on the thresholds)
        for every float64 value, including NaN and infinities.
        """
        grid = self._grid
        if grid is None:
            grid = self._build_grid()
        lo, scale, size, first, first_t, per_cell = grid
        x = np.asarray(x, dtype=np.float64)
        if first is None:
            return self.encode(x)
        flat = x.reshape(-1)
        out = np.empty(flat.size, dtype=self._dtype)
        ext = np.append(self._thresholds, np.nan)
        for start in range(0, flat.size, _CHUNK):
            xs = flat[start:start + _CHUNK]
            cell = self._cells(xs, lo, scale, size)
            idx = first[cell]
            idx += xs >= first_t[cell]
            for _ in range(per_cell - 1):
                idx += xs >= ext[idx]
            out[start:start + _CHUNK] = idx
        return out.reshape(x.shape)

    # -- serialisation -----------------------------------------------------
    def to_dict(self) -> dict:
        """Plain dict (JSON-ready): format tag, version, thresholds, levels.

        Floats are stored as Python floats, whose ``repr`` round-trips
        exactly through JSON.
        """
        return {
            "format": CODEBOOK_FORMAT,
            "version": self._version,
            "size": int(self._levels.size),
            "thresholds": [float(v) for v in self._thresholds],
            "levels": [float(v) for v in self._levels],
        }

    @classmethod
    def from_dict(cls, data) -> "Codebook":
        """Inverse of :meth:`to_dict` (validates everything again)."""
        if not isinstance(data, dict):
            raise StreamqError("a serialised codebook must be a JSON object")
        fmt = data.get("format", CODEBOOK_FORMAT)
        if fmt != CODEBOOK_FORMAT:
            raise StreamqError(f"unsupported codebook format {fmt!r} (expected {CODEBOOK_FORMAT})")
        for key in ("levels", "thresholds"):
            if key not in data:
                raise StreamqError(f"serialised codebook lacks the field {key!r}")
        cb = cls(data["levels"], data["thresholds"], data.get("version", 0))
        if "size" in data and int(data["size"]) != cb.size:
            raise StreamqError(
                f"serialised codebook says size {data['size']} but has {cb.size} levels"
            )
        return cb

    def to_json(self, **kwargs) -> str:
        """JSON text of :meth:`to_dict`."""
        return json.dumps(self.to_dict(), **kwargs)

    @classmethod
    def from_json(cls, text: str) -> "Codebook":
        """Inverse of :meth:`to_json`."""
        try:
            data = json.loads(text)
        except (TypeError, ValueError) as exc:
            raise StreamqError(f"codebook JSON does not parse: {exc}") from None
        return cls.from_dict(data)
