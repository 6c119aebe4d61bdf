"""Input checks shared by the design functions.

Every check raises :class:`streamq.errors.StreamqError` with a one-line
message that names the argument at fault, so that bad input never turns into
a silent NaN further down.
"""

from __future__ import annotations

import numpy as np

from streamq.errors import StreamqError

#: Smallest and largest number of reconstruction levels a codebook may have.
MIN_LEVELS = 2
MAX_LEVELS = 65536

#: Largest magnitude of a value designed on: squared errors and their sums
#: over up to ~1e8 values must stay finite in float64 (max ~1.8e308).
MAX_MAGNITUDE = 1e150

_INF = float("inf")


def check_levels(levels, name: str = "levels") -> int:
    """Return ``levels`` as an int after checking 2 <= levels <= 65536."""
    if isinstance(levels, bool) or not isinstance(levels, (int, np.integer, float, np.floating)):
        raise StreamqError(f"{name} must be an integer, got {levels!r}")
    if isinstance(levels, (float, np.floating)) and not float(levels).is_integer():
        raise StreamqError(f"{name} must be an integer, got {levels!r}")
    count = int(levels)
    if count < MIN_LEVELS or count > MAX_LEVELS:
        raise StreamqError(
            f"{name} must be between {MIN_LEVELS} and {MAX_LEVELS}, got {count}"
        )
    return count


def check_integer(value, name: str, minimum: int | None = None) -> int:
    """Return ``value`` as an int (an integral float is accepted), at least ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer, float, np.floating)):
        raise StreamqError(f"{name} must be an integer, got {value!r}")
    if isinstance(value, (float, np.floating)) and not float(value).is_integer():
        raise StreamqError(f"{name} must be an integer, got {value!r}")
    out = int(value)
    if minimum is not None and out < minimum:
        raise StreamqError(f"{name} must be at least {minimum}, got {out}")
    return out


def check_number(value, name: str, *, minimum: float | None = None,
                 positive: bool = False) -> float:
    """Return ``value`` as a finite float (``>= minimum``, or ``> 0`` if ``positive``)."""
    if isinstance(value, bool):
        raise StreamqError(f"{name} must be a number, got {value!r}")
    try:
        out = float(value)
    except (TypeError, ValueError, OverflowError):
        raise StreamqError(f"{name} must be a number, got {value!r}") from None
    if not np.isfinite(out):
        raise StreamqError(f"{name} must be finite, got {value!r}")
    if positive and not out > 0:
        raise StreamqError(f"{name} must be positive, got {value!r}")
    if minimum is not None and out < minimum:
        raise StreamqError(f"{name} must be at least {minimum:g}, got {value!r}")
    return out


def check_stopping(tol, max_iter) -> tuple[float, int]:
    """Check an iteration's stopping rule: ``tol`` finite and >= 0, ``max_iter`` an int >= 0."""
    # the common case first: this runs on every streaming design call
    if type(tol) is float and type(max_iter) is int and 0.0 <= tol < _INF and max_iter >= 0:
        return tol, max_iter
    return check_number(tol, "tol", minimum=0.0), check_integer(max_iter, "max_iter", 0)


def first_bad_value(arr: np.ndarray):
    """First value of a float64 array that cannot be designed on.

    Returns None if every value is finite with magnitude at most
    :data:`MAX_MAGNITUDE`, else ``(position, what, why)``: ``what`` names
    the value (``"a non-finite value (nan)"``, ``"a value too large to
    design on (1e+200)"``) and ``why`` is an explanation to append (empty
    or starting with ``"; "``).
    """
    with np.errstate(invalid="ignore"):
        ok = np.abs(arr) <= MAX_MAGNITUDE  # False for NaN and inf too
    if ok.all():
        return None
    bad = int(np.flatnonzero(~ok)[0])
    v = float(arr.flat[bad])
    if not np.isfinite(v):
        return bad, f"a non-finite value ({v!r})", ""
    return (bad, f"a value too large to design on ({v:g})",
            f"; magnitudes above {MAX_MAGNITUDE:g} overflow the squared errors")


def finite_array(values, name: str, *, allow_empty: bool = False) -> np.ndarray:
    """Return ``values`` as a 1-D float64 array.

    Rejects empty input, NaN and inf, and magnitudes above
    :data:`MAX_MAGNITUDE` (whose squares overflow), naming the position.
    """
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError, OverflowError):
        raise StreamqError(f"{name} must be numeric") from None
    arr = arr.reshape(-1)
    if arr.size == 0 and not allow_empty:
        raise StreamqError(f"{name} is empty")
    found = first_bad_value(arr)
    if found is not None:
        raise StreamqError(f"{name} has {found[1]} at position {found[0]}{found[2]}")
    return arr


def histogram_arrays(centers, weights):
    """Check a histogram (bin centers, weights) and return float64 copies.

    Centers must be finite and non-decreasing, weights finite and
    non-negative with a positive total, and both of the same length.
    """
    c = finite_array(centers, "centers")
    w = finite_array(weights, "weights")
    if c.shape != w.shape:
        raise StreamqError(
            f"centers and weights differ in length ({c.size} and {w.size})"
        )
    if c.size > 1 and np.any(c[1:] < c[:-1]):
        bad = int(np.flatnonzero(c[1:] < c[:-1])[0]) + 1
        raise StreamqError(f"centers must be sorted ascending; position {bad} is not")
    if np.any(w < 0):
        bad = int(np.flatnonzero(w < 0)[0])
        raise StreamqError(f"weights must be non-negative; position {bad} is {w[bad]!r}")
    if not w.sum() > 0:
        raise StreamqError("weights sum to zero: the histogram is empty")
    return c, w
