"""Companding quantizers: continuous mu-law and A-law, bit-exact G.711, optimal compander.

Continuous companders compress ``x`` (over a peak value ``V``), quantize the
result uniformly with ``L`` cells over ``[-V, V]`` and expand back; as a
:class:`Codebook` that is the expanded uniform thresholds and levels.

* mu-law: ``c(x) = V sgn(x) ln(1 + mu |x|/V) / ln(1 + mu)``;
* A-law: ``c(x) = V sgn(x) A|x|/V / (1 + ln A)`` for ``|x|/V < 1/A`` and
  ``V sgn(x) (1 + ln(A|x|/V)) / (1 + ln A)`` above.

G.711 (8-bit, 16-bit linear input) is implemented from the segment/step
structure of ITU-T Recommendation G.711 in vectorised numpy: mu-law works on
the top 14 bits with a bias of 33 and eight segments, A-law on the top 13
bits with even-bit inversion (0x55). Encoding uses a 65,536-entry table
built once per call site (cheap) and indexed by the raw 16-bit pattern.

The optimal compander for a PDF (Bennett 1948; Panter and Dite 1951) has a
compressor slope proportional to ``p(x)**(1/3)``: its thresholds are the
quantiles ``i/L`` and its levels the quantiles ``(i + 1/2)/L`` of the
normalised density proportional to ``p**(1/3)``.

References
----------
.. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
   frequencies", 1988.
.. [2] W. R. Bennett, "Spectra of quantized signals", Bell System Technical
   Journal 27, 1948.
.. [3] P. F. Panter and W. Dite, "Quantization distortion in pulse-count
   modulation with nonuniform spacing of levels", Proc. IRE 39, 1951.
.. [4] B. Smith, "Instantaneous companding of quantized signals", Bell
   System Technical Journal 36, 1957 (mu-law).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from streamq.design._validate import check_levels, check_number
from streamq.design.codebook import Codebook
from streamq.design.histogram import histogram_prefix
from streamq.design.pdfs import PdfModel, pdf_model
from streamq.design.report import evaluate_histogram, evaluate_pdf, make_report
from streamq.errors import StreamqError

__all__ = [
    "mu_law_compress",
    "mu_law_expand",
    "a_law_compress",
    "a_law_expand",
    "compander_codebook",
    "g711_encode",
    "g711_decode",
    "g711_codebook",
    "g711_code_map",
    "optimal_compander_pdf",
    "optimal_compander_histogram",
    "G711_LAWS",
]

G711_LAWS = ("mu", "a")


def _check_peak(peak):
    return check_number(peak, "compander peak", positive=True)


def _check_param(value, name, minimum):
    return check_number(value, name, minimum=minimum)


def mu_law_compress(x, mu: float = 255.0, peak: float = 1.0):
    """Continuous mu-law compressor ``V sgn(x) ln(1 + mu|x|/V) / ln(1 + mu)``.

    References
    ----------
    .. [1] B. Smith, "Instantaneous companding of quantized signals", Bell
       System Technical Journal 36, 1957.
    .. [2] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988 (mu = 255; its 8-bit code approximates this curve
       by segments).
    """
    peak = _check_peak(peak)
    mu = _check_param(mu, "mu", 1e-12)
    x = np.asarray(x, dtype=np.float64)
    return np.sign(x) * peak * np.log1p(mu * np.abs(x) / peak) / math.log1p(mu)


def mu_law_expand(y, mu: float = 255.0, peak: float = 1.0):
    """Inverse of :func:`mu_law_compress`.

    References
    ----------
    .. [1] B. Smith, "Instantaneous companding of quantized signals", Bell
       System Technical Journal 36, 1957.
    .. [2] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988.
    """
    peak = _check_peak(peak)
    mu = _check_param(mu, "mu", 1e-12)
    y = np.asarray(y, dtype=np.float64)
    return np.sign(y) * peak * np.expm1(np.abs(y) / peak * math.log1p(mu)) / mu


def a_law_compress(x, a: float = 87.6, peak: float = 1.0):
    """Continuous A-law compressor (linear below ``V/A``, logarithmic above).

    ``V sgn(x) A|x|/V / (1 + ln A)`` for ``|x|/V < 1/A``, else
    ``V sgn(x) (1 + ln(A|x|/V)) / (1 + ln A)``.

    References
    ----------
    .. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988 (A = 87.6; its 8-bit code approximates this curve
       by 13 segments).
    .. [2] N. S. Jayant and P. Noll, *Digital Coding of Waveforms*,
       Prentice-Hall, 1984 (logarithmic companding: mu-law and A-law).
    """
    peak = _check_peak(peak)
    a = _check_param(a, "A", 1.0)
    x = np.asarray(x, dtype=np.float64)
    u = np.abs(x) / peak
    den = 1.0 + math.log(a)
    with np.errstate(divide="ignore"):
        out = np.where(u < 1.0 / a, a * u / den, (1.0 + np.log(np.maximum(a * u, 1e-300))) / den)
    return np.sign(x) * peak * out


def a_law_expand(y, a: float = 87.6, peak: float = 1.0):
    """Inverse of :func:`a_law_compress`.

    References
    ----------
    .. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988.
    .. [2] N. S. Jayant and P. Noll, *Digital Coding of Waveforms*,
       Prentice-Hall, 1984 (logarithmic companding: mu-law and A-law).
    """
    peak = _check_peak(peak)
    a = _check_param(a, "A", 1.0)
    y = np.asarray(y, dtype=np.float64)
    v = np.abs(y) / peak
    den = 1.0 + math.log(a)
    knee = 1.0 / den
    out = np.where(v < knee, v * den / a, np.exp(v * den - 1.0) / a)
    return np.sign(y) * peak * out


def compander_codebook(law: str, levels: int, *, peak: float = 1.0, mu: float = 255.0,
                       a: float = 87.6, kind: str = "mid-rise", version: int = 0) -> Codebook:
    """Continuous mu-law or A-law compander at any level count, as a codebook.

    The compressed range ``[-peak, peak]`` is split into ``levels`` equal
    cells (mid-rise: no level at zero; mid-tread: a level at zero and one
    extra cell below for even counts); thresholds and levels are expanded.

    Parameters
    ----------
    law : {"mu-law", "a-law"} (also "mu", "a")
    levels : int
    peak : float
        Overload point V.
    mu, a : float
        Compression parameters (255 and 87.6 as in G.711).
    kind : {"mid-rise", "mid-tread"}

    References
    ----------
    .. [1] B. Smith, "Instantaneous companding of quantized signals", Bell
       System Technical Journal 36, 1957.
    .. [2] ITU-T Recommendation G.711, 1988.
    """
    count = check_levels(levels)
    peak = _check_peak(peak)
    key = _law(law)
    step = 2.0 * peak / count
    i = np.arange(count, dtype=np.float64)
    if kind == "mid-rise":
        yl = -peak + (i + 0.5) * step
    elif kind == "mid-tread":
        yl = (i - count // 2) * step
    else:
        raise StreamqError(f"unknown compander kind {kind!r}; known: mid-rise, mid-tread")
    yt = 0.5 * (yl[1:] + yl[:-1])
    if key == "mu":
        lv = mu_law_expand(yl, mu, peak)
        th = mu_law_expand(yt, mu, peak)
    else:
        lv = a_law_expand(yl, a, peak)
        th = a_law_expand(yt, a, peak)
    return Codebook(lv, th, version)


def _law(law) -> str:
    key = str(law).strip().lower().replace("_", "-")
    key = {"mu-law": "mu", "u-law": "mu", "ulaw": "mu", "mulaw": "mu", "u": "mu",
           "a-law": "a", "alaw": "a", "g711-mu": "mu", "g711-a": "a"}.get(key, key)
    if key not in G711_LAWS:
        raise StreamqError(f"unknown companding law {law!r}; known: mu-law, a-law")
    return key


# -- G.711 ----------------------------------------------------------------------

_MU_SEG_END = np.array([0x3F, 0x7F, 0xFF, 0x1FF, 0x3FF, 0x7FF, 0xFFF, 0x1FFF], dtype=np.int32)
_A_SEG_END = np.array([0x1F, 0x3F, 0x7F, 0xFF, 0x1FF, 0x3FF, 0x7FF, 0xFFF], dtype=np.int32)


def _mu_encode_values(pcm16: np.ndarray) -> np.ndarray:
    """G.711 mu-law bytes of int16 samples (vectorised, any int array)."""
    v = pcm16.astype(np.int32) >> 2  # 14-bit two's complement
    neg = v < 0
    mag = np.where(neg, -v, v) + 33  # bias 0x84 >> 2
    mask = np.where(neg, 0x7F, 0xFF)
    seg = np.searchsorted(_MU_SEG_END, mag, side="left")
    over = seg >= 8
    segc = np.minimum(seg, 7)
    code = (segc << 4) | ((mag >> (segc + 1)) & 0xF)
    code = np.where(over, 0x7F, code) ^ mask
    return code.astype(np.uint8)


def _a_encode_values(pcm16: np.ndarray) -> np.ndarray:
    """G.711 A-law bytes of int16 samples (vectorised, any int array)."""
    v = pcm16.astype(np.int32) >> 3  # 13-bit two's complement
    neg = v < 0
    mag = np.where(neg, -v - 1, v)
    mask = np.where(neg, 0x55, 0xD5)
    seg = np.searchsorted(_A_SEG_END, mag, side="left")
    over = seg >= 8
    segc = np.minimum(seg, 7)
    shift = np.where(segc < 2, 1, segc)
    code = (segc << 4) | ((mag >> shift) & 0xF)
    code = np.where(over, 0x7F, code) ^ mask
    return code.astype(np.uint8)


def _mu_decode_values(codes: np.ndarray) -> np.ndarray:
    u = (~codes.astype(np.int32)) & 0xFF
    t = (((u & 0x0F) << 3) + 0x84) << ((u & 0x70) >> 4)
    return np.where(u & 0x80, 0x84 - t, t - 0x84).astype(np.int16)


def _a_decode_values(codes: np.ndarray) -> np.ndarray:
    v = codes.astype(np.int32) ^ 0x55
    t = (v & 0x0F) << 4
    seg = (v & 0x70) >> 4
    t = np.where(seg == 0, t + 8, np.where(seg == 1, t + 0x108, (t + 0x108) << np.maximum(seg - 1, 0)))
    return np.where(v & 0x80, t, -t).astype(np.int16)


class _G711Tables:
    """Encode tables (indexed by the uint16 bit pattern) and decode tables."""

    __slots__ = ("encode", "decode")

    def __init__(self, law: str):
        pattern = np.arange(65536, dtype=np.uint16).view(np.int16)
        if law == "mu":
            self.encode = _mu_encode_values(pattern)
            self.decode = _mu_decode_values(np.arange(256))
        else:
            self.encode = _a_encode_values(pattern)
            self.decode = _a_decode_values(np.arange(256))
        self.encode.setflags(write=False)
        self.decode.setflags(write=False)


@functools.lru_cache(maxsize=None)
def _tables(law: str) -> _G711Tables:
    """Read-only lookup tables for one law, built on first use."""
    return _G711Tables(law)


def _integers(values, dtype, func: str, what: str) -> np.ndarray:
    """``values`` as an array of ``dtype``: any integer array whose values fit."""
    x = np.asarray(values)
    if x.dtype != dtype:
        info = np.iinfo(dtype)
        if x.dtype.kind not in "iu":
            raise StreamqError(f"{func} needs {info.dtype} {what}, got dtype {x.dtype}")
        if x.size and (x.min() < info.min or x.max() > info.max):
            raise StreamqError(f"{func} {what} must lie in {info.min}..{info.max}")
        x = x.astype(dtype)
    return x


def g711_encode(samples, law: str) -> np.ndarray:
    """G.711 8-bit encoding of 16-bit linear PCM samples.

    Bit-exact with ITU-T G.711 as implemented by Python's ``audioop``
    ``lin2ulaw``/``lin2alaw`` with width 2.

    Parameters
    ----------
    samples : array_like of int16
    law : {"mu", "a"} (also "mu-law", "a-law")

    Returns
    -------
    ndarray of uint8, same shape

    References
    ----------
    .. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988.
    """
    key = _law(law)
    x = _integers(samples, np.int16, "g711_encode", "samples")
    return _tables(key).encode[x.view(np.uint16)]


def g711_decode(codes, law: str) -> np.ndarray:
    """G.711 decoding of 8-bit codes to 16-bit linear PCM (int16).

    Bit-exact with ``audioop`` ``ulaw2lin``/``alaw2lin`` with width 2.

    Parameters
    ----------
    codes : array_like of uint8
    law : {"mu", "a"} (also "mu-law", "a-law")

    Returns
    -------
    ndarray of int16, same shape

    References
    ----------
    .. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988.
    """
    key = _law(law)
    c = _integers(codes, np.uint8, "g711_decode", "codes")
    return _tables(key).decode[c]


def g711_code_map(law: str):
    """Mapping between codebook rank and G.711 byte.

    Returns
    -------
    rank_to_code : ndarray of uint8, length L
        The G.711 byte of each codebook index (levels ascending).
    code_to_rank : ndarray of int32, length 256
        The codebook index of each byte (mu-law's unused negative zero 0x7F
        maps to the rank of zero, whose value it decodes to).
    """
    key = _law(law)
    tab = _tables(key)
    used = np.unique(tab.encode)
    values = tab.decode[used].astype(np.int64)
    order = np.argsort(values, kind="stable")
    rank_to_code = used[order].astype(np.uint8)
    sorted_values = values[order]
    code_to_rank = np.searchsorted(sorted_values, tab.decode.astype(np.int64)).astype(np.int32)
    return rank_to_code, code_to_rank


def g711_codebook(law: str, version: int = 0) -> Codebook:
    """G.711 as a codebook on the float scale ``x = k / 32768``.

    Levels are the distinct decoded values / 32768 in ascending order (255
    for mu-law, 256 for A-law); thresholds sit at ``(k - 0.5) / 32768``
    wherever the G.711 code changes between ``k - 1`` and ``k``. So
    ``encode(k / 32768)`` is the rank of G.711's code for ``k`` and
    ``decode`` gives its decoded value / 32768, for every int16 ``k``. Use
    :func:`g711_code_map` to translate ranks to bytes.

    References
    ----------
    .. [1] ITU-T Recommendation G.711, "Pulse code modulation (PCM) of voice
       frequencies", 1988.
    """
    key = _law(law)
    tab = _tables(key)
    k = np.arange(-32768, 32768)
    codes = tab.encode[k.astype(np.int16).view(np.uint16)]
    change = np.flatnonzero(codes[1:] != codes[:-1]) + 1
    thresholds = (k[change] - 0.5) / 32768.0
    rank_to_code, _ = g711_code_map(key)
    levels = tab.decode[rank_to_code].astype(np.float64) / 32768.0
    return Codebook(levels, thresholds, version)


# -- optimal compander ---------------------------------------------------------


def optimal_compander_pdf(pdf, levels: int, *, version: int = 0):
    """Asymptotically optimal compander for a PDF (slope proportional to p**(1/3)).

    Returns
    -------
    codebook : Codebook
        Thresholds at the quantiles ``i/L`` and levels at ``(i + 1/2)/L`` of
        the normalised ``p**(1/3)``.
    report : DesignReport
        Figures w.r.t. the PDF.

    References
    ----------
    .. [1] W. R. Bennett, "Spectra of quantized signals", Bell System
       Technical Journal 27, 1948.
    .. [2] P. F. Panter and W. Dite, "Quantization distortion in pulse-count
       modulation with nonuniform spacing of levels", Proc. IRE 39, 1951.
    """
    model = pdf if isinstance(pdf, PdfModel) else pdf_model(pdf)
    count = check_levels(levels)
    q = np.arange(1, 2 * count) / (2.0 * count)
    x = np.asarray(model.cube_root_ppf(q), dtype=np.float64)
    cb = Codebook(x[0::2], x[1::2], version)
    mse, probs = evaluate_pdf(cb.levels, cb.thresholds, model)
    return cb, make_report("compander", cb, 0, True, mse=mse, probs=probs, power=model.power,
                           reference=f"pdf:{model!r}")


def optimal_compander_histogram(centers, weights, levels: int, *, version: int = 0,
                                reference: str = "histogram"):
    """Optimal-compander rule applied to a histogram.

    The density is estimated per point as weight / local spacing; the
    cumulative sum of ``p**(1/3) dx`` (piecewise linear between the points)
    is inverted at ``i/L`` (thresholds) and ``(i + 1/2)/L`` (levels).

    Returns
    -------
    codebook : Codebook
    report : DesignReport
        Figures w.r.t. the weighted histogram.

    References
    ----------
    .. [1] W. R. Bennett, "Spectra of quantized signals", Bell System
       Technical Journal 27, 1948.
    .. [2] P. F. Panter and W. Dite, "Quantization distortion in pulse-count
       modulation with nonuniform spacing of levels", Proc. IRE 39, 1951.
    """
    pre = histogram_prefix(centers, weights)
    count = check_levels(levels)
    c, w = pre.centers, pre.weights()
    from streamq.design._levels import spread_levels

    keep = w > 0
    cu, wu = c[keep], w[keep]
    if cu.size < 2 or cu[0] == cu[-1]:
        cb = Codebook(spread_levels(cu[:1], count), None, version)
    else:
        edges = np.concatenate(([cu[0]], 0.5 * (cu[1:] + cu[:-1]), [cu[-1]]))
        width = np.diff(edges)
        width = np.where(width > 0, width, np.min(width[width > 0]) if np.any(width > 0) else 1.0)
        mass = np.cbrt(wu / width) * width
        cum = np.concatenate(([0.0], np.cumsum(mass)))
        cum /= cum[-1]
        q = np.arange(1, 2 * count) / (2.0 * count)
        x = np.interp(q, cum, edges)
        lv, th = x[0::2], x[1::2]
        if np.all(th[1:] > th[:-1]) and np.all(lv[1:] >= lv[:-1]):
            cb = Codebook(lv, th, version)
        else:
            cb = Codebook(spread_levels(lv, count), None, version)
    mse, probs = evaluate_histogram(cb.levels, cb.thresholds, c, w)
    return cb, make_report("compander", cb, 0, True, mse=mse, probs=probs, power=pre.power,
                           reference=reference)
