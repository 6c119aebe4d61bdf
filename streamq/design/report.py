"""Design reports and the exact evaluation of a codebook on a PDF or histogram.

Every design function returns ``(Codebook, DesignReport)``. The report's
figures are measured against the data the design was made for:

* for a PDF model, exactly through the model's partial moments;
* for a histogram, against the weighted point masses at the bin centers;
* for raw samples, against the samples themselves.

``snr_db`` is ``10 log10(power / mse)`` with ``power`` the mean square of the
signal (its variance plus the square of its mean; for the zero-mean PDFs of
the published tables this is the variance). A zero MSE gives ``inf`` dB and
a zero power with a non-zero MSE ``-inf`` dB (in :meth:`DesignReport.to_dict`
and the JSON of ``streamq design``: the strings ``"inf"`` and ``"-inf"``).
``entropy_bits`` is the entropy of the index, ``-sum p_i log2 p_i`` over the
cells' probabilities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

__all__ = ["DesignReport", "snr_db", "index_entropy", "evaluate_pdf", "evaluate_histogram"]


@dataclass(frozen=True)
class DesignReport:
    """What a design run produced and how good it is.

    Attributes
    ----------
    method : str
        Design method (``lloyd-max``, ``optimal``, ``ecsq``, ``uniform``,
        ``mu-law``, ``a-law``, ``g711-mu``, ``g711-a``, ``compander``,
        ``samples``...).
    size : int
        Number of reconstruction levels in the codebook.
    iterations : int
        Iterations used (0 for closed-form designs).
    mse : float
        Mean squared error against the reference data.
    snr_db : float
        ``10 log10(power / mse)`` in dB.
    entropy_bits : float
        Entropy of the index in bits per sample.
    converged : bool
        Whether the stopping rule was met (always True for closed forms).
    power : float
        Mean square of the reference data.
    reference : str
        What the figures were measured on (``pdf:...``, ``histogram``,
        ``samples``, ``uniform full scale``).
    history : tuple of float
        Distortion after each iteration, when recorded.
    details : mapping
        Method-specific extras (e.g. the Lagrange multiplier of ECSQ, the
        uniform step size).
    """

    method: str
    size: int
    iterations: int
    mse: float
    snr_db: float
    entropy_bits: float
    converged: bool
    power: float = float("nan")
    reference: str = ""
    history: tuple = ()
    details: "MappingProxyType | dict" = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "details", MappingProxyType(dict(self.details)))
        object.__setattr__(self, "history", tuple(float(v) for v in self.history))

    def to_dict(self) -> dict:
        """Plain dict (JSON-ready; infinities become strings ``inf``/``-inf``)."""

        def clean(v):
            if isinstance(v, (float, np.floating)):
                v = float(v) + 0.0  # never a negative zero ("-0.0") in JSON
                if math.isinf(v):
                    return "inf" if v > 0 else "-inf"
                if math.isnan(v):
                    return None
                return v
            if isinstance(v, np.integer):
                return int(v)
            if isinstance(v, (list, tuple)):
                return [clean(u) for u in v]
            if isinstance(v, np.ndarray):
                return [clean(u) for u in v.tolist()]
            return v

        return {
            "method": self.method,
            "size": int(self.size),
            "iterations": int(self.iterations),
            "mse": clean(self.mse),
            "snr_db": clean(self.snr_db),
            "entropy_bits": clean(self.entropy_bits),
            "converged": bool(self.converged),
            "power": clean(self.power),
            "reference": self.reference,
            "details": {k: clean(v) for k, v in self.details.items()},
        }


def snr_db(power: float, mse: float) -> float:
    """``10 log10(power / mse)``; ``inf`` for zero MSE, never NaN."""
    power = float(power)
    mse = float(mse)
    if mse <= 0.0:
        return math.inf
    if power <= 0.0:
        return -math.inf
    return 10.0 * math.log10(power / mse)


def index_entropy(probabilities) -> float:
    """Entropy in bits of a discrete distribution (zeros ignored, renormalised)."""
    p = np.asarray(probabilities, dtype=np.float64)
    total = p.sum()
    if not total > 0:
        return 0.0
    p = p[p > 0] / total
    # max(-0.0, 0.0) is -0.0; adding 0.0 turns a negative zero into 0.0
    return float(max(-np.dot(p, np.log2(p)), 0.0)) + 0.0


def evaluate_pdf(levels, thresholds, model):
    """Exact MSE and index probabilities of a quantizer on a PDF model.

    Returns
    -------
    mse : float
    probabilities : ndarray
    """
    levels = np.asarray(levels, dtype=np.float64)
    th = np.asarray(thresholds, dtype=np.float64)
    a = np.concatenate(([-np.inf], th))
    b = np.concatenate((th, [np.inf]))
    m0, m1, m2 = model.partial_moments(a, b)
    # expand around the level: sum m2 - 2 y m1 + y^2 m0, cell by cell
    d = m2 - 2.0 * levels * m1 + levels * levels * m0
    mse = float(max(np.sum(np.maximum(d, 0.0)), 0.0))
    return mse, m0


def evaluate_histogram(levels, thresholds, centers, weights):
    """MSE and index probabilities of a quantizer on weighted point masses.

    The weights are normalised to sum to one.

    Returns
    -------
    mse : float
    probabilities : ndarray
    """
    levels = np.asarray(levels, dtype=np.float64)
    c = np.asarray(centers, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    total = w.sum()
    idx = np.searchsorted(thresholds, c, side="right")
    err = c - levels[idx]
    mse = float(np.dot(w, err * err) / total)
    probs = np.bincount(idx, weights=w, minlength=levels.size) / total
    return mse, probs


def make_report(method, codebook, iterations, converged, *, mse, probs, power,
                reference, history=(), details=None):
    """Assemble a :class:`DesignReport` from evaluated figures."""
    return DesignReport(
        method=method,
        size=codebook.size,
        iterations=int(iterations),
        mse=float(mse),
        snr_db=snr_db(power, mse),
        entropy_bits=index_entropy(probs),
        converged=bool(converged),
        power=float(power),
        reference=reference,
        history=tuple(history),
        details=details or {},
    )
