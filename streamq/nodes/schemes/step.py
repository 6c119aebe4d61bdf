"""Backward step adaptation, sample by sample (``adapt = "step"``).

After every sample the step is multiplied by a factor chosen by the
magnitude of the index just sent: inner cells shrink it, outer cells grow it.
Encoder and decoder see the same indices, so both ends run the same step
sequence with no side information, and a burst onset is followed within a
few samples (the outer multipliers compound per sample).

The codebook at step ``d`` is a fixed *shape* scaled by ``d``: the uniform
shape (levels ``(k - L/2 + 1/2) d``, thresholds at multiples of ``d``), or the
unit-variance Lloyd-Max codebook of the encoder's ``model`` expressed in
units of that model's MSE-optimal uniform step, so that for either shape a
step ``d`` suits a source of standard deviation ``d / step_opt``, and one
multiplier table serves both.

The core is scipy-shaped: ``indices, steps = encode(x, steps)`` and
``y, steps = decode(indices, steps)``, where ``steps`` (one float per
channel) is the whole state; cutting a signal anywhere gives the same output.

References
----------
.. [1] N. S. Jayant, "Adaptive quantization with a one-word memory", Bell
   System Technical Journal 52(7), 1119-1144, 1973.
.. [2] J. Max, "Quantizing for minimum distortion", IRE Transactions on
   Information Theory 6(1), 7-12, 1960 (optimal uniform steps).
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: Default step multipliers per word length, innermost magnitude cell first.
#: 2, 3 and 4 bits: the PCM column of Jayant's table [1] for speech, as we
#: remember it (from memory; no copy of the paper was at hand). 5 bits: not in
#: that table as we remember it; ours, following the 4-bit pattern (inner half
#: shrinks, outer half grows faster the further out), checked on a unit
#: Gaussian in tests/test_schemes.py.
MULTIPLIERS = {
    2: (0.60, 2.20),
    3: (0.85, 1.00, 1.00, 1.50),
    4: (0.80, 0.80, 0.80, 0.80, 1.20, 1.60, 2.00, 2.40),
    5: (0.85, 0.85, 0.85, 0.85, 0.85, 0.85, 0.85, 0.85,
        1.20, 1.40, 1.60, 1.80, 2.00, 2.20, 2.40, 2.60),
}


@njit(cache=True, error_model="numpy")   # a division never raises (callback)
def step_encode(x, th, mult, lo, hi, steps, out):  # pragma: no cover - compiled
    """Indices of a block under the step-adapted codebook; updates ``steps``.

    For each channel ``c`` and sample ``n`` in order: ``out[n, c]`` is the
    number of shape thresholds ``th`` at or below ``x[n, c] / steps[c]`` (NaN
    goes past the last one), then ``steps[c] = min(max(steps[c] *
    mult[out[n, c]], lo), hi)``.

    Parameters
    ----------
    x : ndarray, shape (frames, channels), float64
    th : ndarray, shape (L - 1,), float64, ascending: the shape's thresholds
    mult : ndarray, shape (L,), float64: the multiplier of each index
    lo, hi : float: the step's range
    steps : ndarray, shape (channels,), float64; updated in place
    out : ndarray, shape (frames, channels), unsigned integer; written in place
    """
    n, C = x.shape
    m = th.shape[0]
    for c in range(C):
        d = steps[c]
        for i in range(n):
            v = x[i, c] / d
            if v != v:
                k = m
            else:
                a = 0
                b = m
                while a < b:            # count of th <= v
                    h = (a + b) >> 1
                    if th[h] <= v:
                        a = h + 1
                    else:
                        b = h
                k = a
            out[i, c] = k
            d = d * mult[k]
            if d < lo:
                d = lo
            elif d > hi:
                d = hi
        steps[c] = d


@njit(cache=True, error_model="numpy")
def step_decode(idx, lv, mult, lo, hi, steps, out):  # pragma: no cover - compiled
    """Decoded samples of a block of indices; updates ``steps`` as
    :func:`step_encode` does.

    ``out[n, c] = lv[idx[n, c]] * steps[c]`` before the step update.

    Returns
    -------
    int
        -1, or the position ``c * frames + n`` (channel-major) of the first
        index not below ``len(lv)`` (``out`` and ``steps`` are then incomplete).
    """
    n, C = idx.shape
    L = lv.shape[0]
    for c in range(C):
        d = steps[c]
        for i in range(n):
            k = idx[i, c]
            if k >= L:
                return c * n + i
            out[i, c] = lv[k] * d
            d = d * mult[k]
            if d < lo:
                d = lo
            elif d > hi:
                d = hi
        steps[c] = d
    return -1


def magnitude_multipliers(multipliers, levels: int) -> np.ndarray:
    """The multiplier of every index of an ``levels``-level midrise code, from
    the per-magnitude list (innermost first): index ``L/2 + m`` and
    ``L/2 - 1 - m`` share magnitude ``m``."""
    half = np.asarray(multipliers, dtype=np.float64)
    return np.concatenate([half[::-1], half])


def shape_arrays(method: str, levels: int, model: str, shape: float | None):
    """(thresholds, levels, optimal step) of the shape in units of one step.

    ``optimal step``: the MSE-optimal uniform step of the unit-variance
    ``model`` at ``levels`` levels (Max 1960 tabulates it for the Gaussian),
    the step suited to a unit source."""
    from streamq.design import pdf_model, uniform_pdf
    from streamq.nodes.coding import unit_design
    opt = float(uniform_pdf(pdf_model(model, 0.0, 1.0, shape), levels)[1].details["step"])
    if method == "uniform":
        k = np.arange(levels, dtype=np.float64) - levels / 2
        return k[1:].copy(), k + 0.5, opt
    th, lv, _ = unit_design("lloyd-max", levels, model, None if shape is None else round(shape, 2),
                            ())
    return np.asarray(th) / opt, np.asarray(lv) / opt, opt


def coding_info(method: str, levels: int, model: str, shape: float | None, scale: float,
                multipliers, min_step_db: float, max_step_db: float | None) -> dict:
    """Everything a decoder needs, as JSON-able values (index files carry it):
    the shape, the per-index multipliers, the step range and the first step."""
    th, lv, opt = shape_arrays(method, levels, model, shape)
    lo = 10.0 ** (min_step_db / 20.0)
    hi = 1.0 / float(lv[-1]) if max_step_db is None else 10.0 ** (max_step_db / 20.0)
    first = min(max(scale * opt, lo), hi)
    return {"adapt": "step", "method": method, "levels": levels, "model": model,
            "shape_thresholds": th.tolist(), "shape_levels": lv.tolist(),
            "multipliers": magnitude_multipliers(multipliers, levels).tolist(),
            "min_step": lo, "max_step": hi, "first_step": first}


class StepScheme:
    """Both ends of the sample-by-sample step adaptation, built from the
    stream's ``coding`` description (see :func:`coding_info`)."""

    def __init__(self, info: dict):
        self.th = np.ascontiguousarray(info["shape_thresholds"], dtype=np.float64)
        self.lv = np.ascontiguousarray(info["shape_levels"], dtype=np.float64)
        self.mult = np.ascontiguousarray(info["multipliers"], dtype=np.float64)
        self.lo, self.hi = float(info["min_step"]), float(info["max_step"])
        self.first = float(info["first_step"])
        if not (self.mult.shape == self.lv.shape and self.th.size == self.lv.size - 1
                and 0 < self.lo <= self.first <= self.hi):
            raise ValueError("step coding description is inconsistent")

    def initial_state(self, channels: int) -> np.ndarray:
        return np.full(channels, self.first)

    def encode(self, x: np.ndarray, steps: np.ndarray, dtype) -> tuple[np.ndarray, np.ndarray]:
        """``indices, steps = encode(x, steps)``; ``steps`` is not changed."""
        steps = steps.copy()
        out = np.empty(x.shape, dtype=dtype)
        step_encode(np.ascontiguousarray(x, dtype=np.float64), self.th, self.mult, self.lo,
                    self.hi, steps, out)
        return out, steps

    def decode(self, idx: np.ndarray, steps: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
        """``y, steps, bad = decode(indices, steps)``; ``bad`` is -1 or the
        (frame, channel) flat position ``c * frames + n`` of an index out of range."""
        steps = steps.copy()
        out = np.empty(idx.shape)
        bad = step_decode(idx, self.lv, self.mult, self.lo, self.hi, steps, out)
        return out, steps, bad

    def widest(self):
        """The codebook at the largest step: the reach of the quantizer (what
        the meter counts as overload beyond)."""
        from streamq.design import Codebook
        return Codebook(levels=self.lv * self.hi, thresholds=self.th * self.hi)
