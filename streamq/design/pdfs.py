"""Parametric amplitude PDF models with exact partial moments.

Each model describes a random variable ``X = mean + std * Z`` where ``Z`` has
zero mean, unit variance and a density symmetric about zero. The design
routines need three things from a model, all in float64:

* ``pdf(x)`` and ``cdf(x)``;
* ``partial_moments(a, b)``: the integrals of ``x**k * p(x)`` over ``[a, b)``
  for ``k = 0, 1, 2``, with ``a`` and ``b`` possibly infinite;
* the normalised density proportional to ``p(x)**(1/3)`` (its quantiles give
  the optimal compander and the starting point of Lloyd-Max), together with
  the integral of ``p(x)**(1/3)`` (Panter-Dite distortion).

The partial moments are evaluated from upper-tail moments of ``|Z|`` in
closed form (Gaussian, Laplacian, uniform) or through the regularised
incomplete gamma function (two-sided gamma, generalised Gaussian), and each
interval is taken on the side of zero that avoids cancellation in the tails.

Known model names: ``gaussian``, ``laplacian``, ``gamma``, ``uniform`` and
``generalized-gaussian`` (aliases ``normal``, ``laplace``,
``generalised-gaussian``).

References
----------
.. [1] M. D. Paez and T. H. Glisson, "Minimum mean-squared-error quantization
   in speech PCM and DPCM systems", IEEE Trans. Communications 20(2), 1972
   (the unit-variance Laplacian and two-sided gamma of speech coding).
.. [2] N. S. Jayant and P. Noll, *Digital Coding of Waveforms*, Prentice-Hall,
   1984, ch. 4 (amplitude PDF models of speech).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.special as sc

from streamq.errors import StreamqError

__all__ = ["PdfModel", "pdf_model", "PDF_NAMES", "pdf_histogram"]

_SQRT2 = math.sqrt(2.0)
_SQRT3 = math.sqrt(3.0)


def _family_ppf(family: str, q: np.ndarray, shape: float | None) -> np.ndarray:
    """Standard quantiles (0 < q < 1) of the reference families, by the same
    formulas scipy.stats uses for norm, laplace, gennorm, dgamma and uniform
    (so the results equal scipy.stats's bit for bit; the tests check it),
    without importing scipy.stats (tens of megabytes) into every run."""
    if family == "norm":
        return sc.ndtri(q)
    if family == "laplace":
        return np.where(q > 0.5, -np.log(2 * (1 - q)), np.log(2 * q))
    if family == "gennorm":
        c = np.sign(q - 0.5)
        return c * sc.gammainccinv(1.0 / shape, (1.0 + c) - 2.0 * c * q) ** (1.0 / shape)
    if family == "dgamma":
        return np.where(q > 0.5, sc.gammaincinv(shape, 2 * q - 1), -sc.gammainccinv(shape, 2 * q))
    return q   # uniform on [0, 1]


def _quantiles(family: str, q, shape: float | None = None, scale: float = 1.0,
               loc: float = 0.0):
    """``scipy.stats.<family>(shape, loc=loc, scale=scale).ppf(q)``: the ends
    q = 0 and 1 give the support's ends, q outside [0, 1] or NaN gives NaN."""
    q = np.asarray(q, dtype=np.float64)
    out = np.full(q.shape, np.nan)
    low, high = (0.0, 1.0) if family == "uniform" else (-np.inf, np.inf)
    out[q == 0] = low * scale + loc
    out[q == 1] = high * scale + loc
    inside = (0 < q) & (q < 1)
    out[inside] = _family_ppf(family, q[inside], shape) * scale + loc
    return out[()] if out.ndim == 0 else out


class PdfModel:
    """A symmetric, location-scale amplitude PDF.

    Do not build directly: use :func:`pdf_model`.

    Attributes
    ----------
    name : str
        Canonical model name.
    mean, std : float
        Location and standard deviation of ``X``.
    shape : float or None
        Shape parameter (two-sided gamma and generalised Gaussian only).
    """

    name = "?"
    #: Whether the density of Z is zero outside a finite interval.
    bounded = False

    def __init__(self, mean: float, std: float, shape=None):
        self.mean = float(mean)
        self.std = float(std)
        self.shape = None if shape is None else float(shape)

    # -- to be provided by the families (standard scale, z >= 0 for tails) --
    def _pdf0(self, z):  # pragma: no cover - abstract
        raise NotImplementedError

    def _tails0(self, z):  # pragma: no cover - abstract
        """Upper-tail moments U_k(z) = int_z^inf u^k p(u) du for z >= 0."""
        raise NotImplementedError

    def _ppf0(self, q):  # pragma: no cover - abstract
        """Quantiles of Z (see :func:`_quantiles`)."""
        raise NotImplementedError

    def _cube_root_ppf0(self, q):  # pragma: no cover - abstract
        """Quantiles of the density proportional to p_Z**(1/3)."""
        raise NotImplementedError

    def _cube_root_integral0(self) -> float:  # pragma: no cover - abstract
        """Integral of p_Z(z)**(1/3) over the real line."""
        raise NotImplementedError

    def _half_width0(self) -> float:
        return math.inf

    # -- public interface ---------------------------------------------------
    @property
    def variance(self) -> float:
        """Variance of X."""
        return self.std * self.std

    @property
    def power(self) -> float:
        """Mean square E[X^2] (signal power including any DC)."""
        return self.mean * self.mean + self.std * self.std

    @property
    def log_concave(self) -> bool:
        """Whether the density is log-concave (``log p`` concave on its support).

        Gaussian, Laplacian, uniform and generalised Gaussian with shape >= 1
        are; the two-sided gamma is only at shape 1 (where it is the
        Laplacian). For a log-concave density the Lloyd-Max quantizer is the
        unique MSE optimum [1]_.

        References
        ----------
        .. [1] P. E. Fleischer, "Sufficient conditions for achieving minimum
           distortion in a quantizer", IEEE Int. Conv. Rec., 1964.
        """
        return False

    @property
    def support(self) -> tuple[float, float]:
        """Interval outside which the density is zero (may be infinite)."""
        h = self._half_width0()
        return (self.mean - self.std * h, self.mean + self.std * h)

    def _z(self, x):
        return (np.asarray(x, dtype=np.float64) - self.mean) / self.std

    def pdf(self, x):
        """Density of X at ``x``."""
        return self._pdf0(np.abs(self._z(x))) / self.std

    def cdf(self, x):
        """Distribution function P(X <= x)."""
        z = self._z(x)
        u0 = self._tails0(np.abs(z))[0]
        return np.where(z >= 0, 1.0 - u0, u0)

    def sf(self, x):
        """Survival function P(X > x), accurate in the upper tail."""
        z = self._z(x)
        u0 = self._tails0(np.abs(z))[0]
        return np.where(z >= 0, u0, 1.0 - u0)

    def ppf(self, q):
        """Quantile function (inverse of :meth:`cdf`)."""
        return self.mean + self.std * self._ppf0(np.asarray(q, dtype=np.float64))

    def partial_moments(self, a, b):
        """Integrals of ``x**k p(x)`` over ``[a, b)`` for k = 0, 1, 2.

        Parameters
        ----------
        a, b : array_like
            Interval ends (broadcast together); ``-inf`` and ``inf`` allowed.
            Intervals with ``b <= a`` give zeros.

        Returns
        -------
        m0, m1, m2 : ndarray
            Probability, first and second partial moments of X.
        """
        za = self._z(a)
        zb = self._z(b)
        za, zb = np.broadcast_arrays(za, zb)
        n0, n1, n2 = self._moments0(za, np.maximum(zb, za))
        mu, s = self.mean, self.std
        m0 = n0
        m1 = mu * n0 + s * n1
        m2 = mu * mu * n0 + 2.0 * mu * s * n1 + s * s * n2
        return m0, m1, m2

    def _moments0(self, za, zb):
        """Moments of Z over [za, zb), picking the cancellation-free side."""
        a0, a1, a2 = self._tails0(np.abs(za))
        b0, b1, b2 = self._tails0(np.abs(zb))
        pos = za >= 0  # both ends on the positive side
        neg = zb <= 0  # both ends on the negative side
        # interval straddling zero: full moment minus the two outer tails
        s0 = 1.0 - a0 - b0
        s1 = a1 - b1
        s2 = 1.0 - a2 - b2
        m0 = np.where(pos, a0 - b0, np.where(neg, b0 - a0, s0))
        m1 = np.where(pos, a1 - b1, np.where(neg, -(b1 - a1), s1))
        m2 = np.where(pos, a2 - b2, np.where(neg, b2 - a2, s2))
        return np.maximum(m0, 0.0), m1, np.maximum(m2, 0.0)

    def cube_root_ppf(self, q):
        """Quantiles of the normalised density proportional to ``p(x)**(1/3)``.

        These are the thresholds (at ``q = i/L``) and levels (at
        ``q = (i + 1/2)/L``) of the asymptotically optimal compander.
        """
        return self.mean + self.std * self._cube_root_ppf0(np.asarray(q, dtype=np.float64))

    def cube_root_integral(self) -> float:
        """Integral of ``p(x)**(1/3)`` over the real line (scales as std**(2/3))."""
        return self._cube_root_integral0() * self.std ** (2.0 / 3.0)

    def to_dict(self) -> dict:
        """Plain description (name, mean, std, shape)."""
        return {"name": self.name, "mean": self.mean, "std": self.std, "shape": self.shape}

    def __repr__(self) -> str:
        extra = "" if self.shape is None else f", shape={self.shape:g}"
        return f"pdf_model({self.name!r}, mean={self.mean:g}, std={self.std:g}{extra})"

    def __eq__(self, other):
        return isinstance(other, PdfModel) and self.to_dict() == other.to_dict()

    def __hash__(self):
        return hash(tuple(self.to_dict().items()))


def _fix_inf(z, values, limit=0.0):
    """Replace entries at z == inf (where 0 * inf gave NaN) by ``limit``."""
    return np.where(np.isposinf(z), limit, values)


class _GeneralizedGaussian(PdfModel):
    """p(z) proportional to exp(-(|z|/alpha)**beta), scaled to unit variance."""

    name = "generalized-gaussian"

    def __init__(self, mean, std, shape):
        super().__init__(mean, std, shape)
        beta = self._beta = float(shape)
        # log-gamma forms: Gamma(1/beta) overflows a float for beta below ~0.006
        lg1 = math.lgamma(1.0 / beta)
        self._log_alpha = 0.5 * (lg1 - math.lgamma(3.0 / beta))
        self._alpha = math.exp(self._log_alpha)
        if not self._alpha > 0.0:   # beta below about 0.006: the scale underflows a float
            raise StreamqError(f"PDF {self.name}: shape {beta!r} is too small to compute with")
        self._norm = math.exp(math.log(0.5 * beta) - self._log_alpha - lg1)

    @property
    def log_concave(self) -> bool:
        # log p = const - (|z|/alpha)**beta: concave iff beta >= 1
        return self._beta >= 1.0

    def _pdf0(self, z):
        return self._norm * np.exp(-((z / self._alpha) ** self._beta))

    def _tails0(self, z):
        beta, alpha = self._beta, self._alpha
        w = (z / alpha) ** beta
        lg1 = math.lgamma(1.0 / beta)
        out = []
        for k in range(3):
            p = (k + 1.0) / beta
            coef = 0.5 * math.exp(k * self._log_alpha + math.lgamma(p) - lg1)
            out.append(coef * sc.gammaincc(p, w))
        return out

    def _ppf0(self, q):
        return _quantiles("gennorm", q, self._beta, self._alpha)

    def _cube_root_ppf0(self, q):
        return _quantiles("gennorm", q, self._beta, self._alpha * 3.0 ** (1.0 / self._beta))

    def _cube_root_integral0(self):
        return 3.0 ** (1.0 / self._beta) * self._norm ** (-2.0 / 3.0)


class _Gaussian(_GeneralizedGaussian):
    name = "gaussian"

    def __init__(self, mean, std, shape=None):
        super().__init__(mean, std, 2.0)
        self.shape = None

    def _pdf0(self, z):
        return np.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)

    def _tails0(self, z):
        phi = np.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)
        u0 = 0.5 * sc.erfc(z / _SQRT2)
        with np.errstate(invalid="ignore"):
            u2 = _fix_inf(z, u0 + z * phi)
        return u0, phi, u2

    def _ppf0(self, q):
        return _quantiles("norm", q)

    def _cube_root_ppf0(self, q):
        return _quantiles("norm", q, scale=_SQRT3)


class _Laplacian(_GeneralizedGaussian):
    name = "laplacian"

    def __init__(self, mean, std, shape=None):
        super().__init__(mean, std, 1.0)
        self.shape = None

    def _pdf0(self, z):
        return np.exp(-_SQRT2 * z) / _SQRT2

    def _tails0(self, z):
        b = 1.0 / _SQRT2
        e = 0.5 * np.exp(-_SQRT2 * z)
        with np.errstate(invalid="ignore"):
            u1 = _fix_inf(z, e * (z + b))
            u2 = _fix_inf(z, e * (z * z + 2.0 * b * z + 2.0 * b * b))
        return e, u1, u2

    def _ppf0(self, q):
        return _quantiles("laplace", q, scale=1.0 / _SQRT2)

    def _cube_root_ppf0(self, q):
        return _quantiles("laplace", q, scale=3.0 / _SQRT2)


class _Gamma(PdfModel):
    """Two-sided gamma: |Z| ~ Gamma(shape s, scale theta), random sign, unit variance."""

    name = "gamma"

    def __init__(self, mean, std, shape):
        super().__init__(mean, std, shape)
        s = self._s = float(shape)
        self._theta = 1.0 / math.sqrt(s * (s + 1.0))
        # 1 / (2 Gamma(s) theta**s) in log form: Gamma(s) overflows and theta**s
        # underflows a float for large shapes
        self._log_norm = -math.log(2.0) - math.lgamma(s) - s * math.log(self._theta)

    @property
    def log_concave(self) -> bool:
        # log p = const + (s - 1) log|z| - |z|/theta: concave on the line only for s = 1
        return self._s == 1.0

    def _pdf0(self, z):
        # xlogy: 0 * log(0) = 0 at the centre when s = 1 (the Laplacian case)
        with np.errstate(divide="ignore", over="ignore"):
            return np.exp(self._log_norm + sc.xlogy(self._s - 1.0, z) - z / self._theta)

    def _tails0(self, z):
        s, th = self._s, self._theta
        w = z / th
        out = []
        for k in range(3):
            coef = 0.5 * th**k * math.exp(math.lgamma(s + k) - math.lgamma(s))
            out.append(coef * sc.gammaincc(s + k, w))
        return out

    def _ppf0(self, q):
        return _quantiles("dgamma", q, self._s, self._theta)

    def _cube_root_ppf0(self, q):
        return _quantiles("dgamma", q, (self._s + 2.0) / 3.0, 3.0 * self._theta)

    def _cube_root_integral0(self):
        s2 = (self._s + 2.0) / 3.0
        return math.exp(self._log_norm / 3.0 + math.log(2.0) + math.lgamma(s2)
                        + s2 * math.log(3.0 * self._theta))


class _Uniform(PdfModel):
    """Uniform on [-sqrt(3), sqrt(3)] (unit variance)."""

    name = "uniform"
    bounded = True

    @property
    def log_concave(self) -> bool:
        return True

    def _half_width0(self):
        return _SQRT3

    def _pdf0(self, z):
        return np.where(z <= _SQRT3, 1.0 / (2.0 * _SQRT3), 0.0)

    def _tails0(self, z):
        h = _SQRT3
        zc = np.minimum(z, h)
        return (h - zc) / (2 * h), (h * h - zc * zc) / (4 * h), (h**3 - zc**3) / (6 * h)

    def _ppf0(self, q):
        return _quantiles("uniform", q, scale=2 * _SQRT3, loc=-_SQRT3)

    def _cube_root_ppf0(self, q):
        return self._ppf0(q)

    def _cube_root_integral0(self):
        return (2.0 * _SQRT3) ** (2.0 / 3.0)


_FAMILIES = {
    "gaussian": (_Gaussian, None),
    "laplacian": (_Laplacian, None),
    "gamma": (_Gamma, 0.5),
    "uniform": (_Uniform, None),
    "generalized-gaussian": (_GeneralizedGaussian, 2.0),
}
_ALIASES = {
    "normal": "gaussian",
    "laplace": "laplacian",
    "generalised-gaussian": "generalized-gaussian",
}

#: Canonical names accepted by :func:`pdf_model`.
PDF_NAMES = tuple(_FAMILIES)


def pdf_model(name: str, mean: float = 0.0, std: float = 1.0, shape=None) -> PdfModel:
    """Build a named amplitude PDF model.

    Parameters
    ----------
    name : str
        One of ``gaussian``, ``laplacian``, ``gamma`` (two-sided, shape 1/2
        unless given), ``uniform``, ``generalized-gaussian`` (shape 2 unless
        given; 1 is Laplacian, 2 Gaussian). Aliases: ``normal``, ``laplace``,
        ``generalised-gaussian``.
    mean, std : float
        Location and standard deviation (std > 0).
    shape : float, optional
        Shape parameter (> 0) for ``gamma`` and ``generalized-gaussian``.

    Returns
    -------
    PdfModel
        Object with ``pdf``, ``cdf``, ``sf``, ``ppf``, ``partial_moments``,
        ``cube_root_ppf`` and ``cube_root_integral``.

    Raises
    ------
    StreamqError
        Unknown name (the message lists the known ones) or bad parameters.

    References
    ----------
    .. [1] M. D. Paez and T. H. Glisson, "Minimum mean-squared-error
       quantization in speech PCM and DPCM systems", IEEE Trans.
       Communications 20(2), 1972.
    """
    if isinstance(name, PdfModel):
        return name
    key = str(name).strip().lower().replace("_", "-")
    key = _ALIASES.get(key, key)
    if key not in _FAMILIES:
        known = ", ".join(PDF_NAMES)
        raise StreamqError(f"unknown PDF model {name!r}; known models: {known}")
    cls, default_shape = _FAMILIES[key]
    try:
        mean = float(mean)
        std = float(std)
    except (TypeError, ValueError):
        raise StreamqError(f"PDF {key}: mean and std must be numbers") from None
    if not math.isfinite(mean):
        raise StreamqError(f"PDF {key}: mean must be finite, got {mean!r}")
    if not (math.isfinite(std) and std > 0):
        raise StreamqError(f"PDF {key}: std must be finite and > 0, got {std!r}")
    if default_shape is None:
        if shape is not None:
            raise StreamqError(
                f"PDF {key} takes no shape parameter (only gamma and generalized-gaussian do)"
            )
        return cls(mean, std)
    if shape is None:
        shape = default_shape
    try:
        shape = float(shape)
    except (TypeError, ValueError):
        raise StreamqError(f"PDF {key}: shape must be a number, got {shape!r}") from None
    if not (math.isfinite(shape) and shape > 0):
        raise StreamqError(f"PDF {key}: shape must be finite and > 0, got {shape!r}")
    return cls(mean, std, shape)


def pdf_histogram(model: PdfModel, bins: int = 65536, tail: float = 1e-12):
    """Discretise a PDF into a fine histogram of point masses.

    The range covers all but ``tail`` of the probability on each side (or the
    support of a bounded model) in ``bins`` equal cells; the two outer cells
    extend to infinity so that the weights sum to one. Each point mass sits
    at its cell's centroid, so the histogram has the exact mean of the model.

    Returns
    -------
    centers, weights : ndarray
        Sorted centers and probabilities (float64).
    """
    bins = int(bins)
    if bins < 2:
        raise StreamqError(f"bins must be at least 2, got {bins}")
    if model.bounded:
        lo, hi = model.support
    else:
        lo, hi = (float(v) for v in model.ppf([tail, 1.0 - tail]))
    edges = np.linspace(lo, hi, bins + 1)
    a = edges[:-1].copy()
    b = edges[1:].copy()
    if not model.bounded:
        a[0] = -np.inf
        b[-1] = np.inf
    m0, m1, _ = model.partial_moments(a, b)
    mid = 0.5 * (edges[:-1] + edges[1:])
    with np.errstate(invalid="ignore", divide="ignore"):
        centers = np.where(m0 > 0, m1 / np.where(m0 > 0, m0, 1.0), mid)
    # keep the centers inside their cells and ordered despite rounding
    centers = np.clip(centers, a, b)
    centers = np.maximum.accumulate(centers)
    return centers, m0
