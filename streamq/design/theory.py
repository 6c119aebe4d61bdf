"""High-rate and rate-distortion reference figures.

References
----------
.. [1] P. F. Panter and W. Dite, "Quantization distortion in pulse-count
   modulation with nonuniform spacing of levels", Proc. IRE 39, 1951.
.. [2] C. E. Shannon, "Coding theorems for a discrete source with a fidelity
   criterion", IRE National Convention Record, 1959 (Gaussian
   rate-distortion function).
.. [3] H. Gish and J. N. Pierce, "Asymptotically efficient quantizing", IEEE
   Trans. Information Theory 14(5), 1968.
.. [4] W. R. Bennett, "Spectra of quantized signals", Bell System Technical
   Journal 27, 1948 (uniform quantization noise, 6 dB per bit).
"""

from __future__ import annotations

import math

from streamq.design.pdfs import PdfModel, pdf_model
from streamq.errors import StreamqError

__all__ = [
    "panter_dite_mse",
    "gaussian_rd_mse",
    "gaussian_rd_snr_db",
    "pcm_sine_snr_db",
    "pcm_sine_snr_rule_db",
    "ECSQ_GAP_DB",
    "ECSQ_GAP_BITS",
]

#: High-rate gap of an entropy-coded uniform quantizer to the Gaussian
#: rate-distortion bound, ``10 log10(pi e / 6)`` dB (Gish and Pierce 1968).
ECSQ_GAP_DB = 10.0 * math.log10(math.pi * math.e / 6.0)
#: The same gap in bits/sample, ``0.5 log2(pi e / 6)``.
ECSQ_GAP_BITS = 0.5 * math.log2(math.pi * math.e / 6.0)


def _rate(rate) -> float:
    r = float(rate)
    if not (math.isfinite(r) and r >= 0):
        raise StreamqError(f"rate must be finite and >= 0 bits/sample, got {rate!r}")
    return r


def panter_dite_mse(pdf, rate) -> float:
    """High-rate MSE of the optimal fixed-rate quantizer.

    ``D = (1/12) (integral p(x)**(1/3) dx)**3 2**(-2R)``; for a unit Gaussian
    this is ``(sqrt(3) pi / 2) 2**(-2R)``.

    Parameters
    ----------
    pdf : PdfModel or str
    rate : float
        Bits per sample (``log2 L``).

    References
    ----------
    .. [1] P. F. Panter and W. Dite, Proc. IRE 39, 1951.
    """
    model = pdf if isinstance(pdf, PdfModel) else pdf_model(pdf)
    r = _rate(rate)
    return model.cube_root_integral() ** 3 / 12.0 * 2.0 ** (-2.0 * r)


def gaussian_rd_mse(rate, variance: float = 1.0) -> float:
    """Gaussian rate-distortion bound ``sigma^2 2**(-2R)``.

    The least MSE any code at ``rate`` bits/sample can reach on a
    memoryless Gaussian source of the given variance.

    References
    ----------
    .. [1] C. E. Shannon, "Coding theorems for a discrete source with a
       fidelity criterion", IRE National Convention Record, 1959.
    """
    r = _rate(rate)
    v = float(variance)
    if not (math.isfinite(v) and v > 0):
        raise StreamqError(f"variance must be finite and > 0, got {variance!r}")
    return v * 2.0 ** (-2.0 * r)


def gaussian_rd_snr_db(rate) -> float:
    """SNR of the Gaussian rate-distortion bound, ``20 log10(2) R`` (6.02 dB/bit).

    References
    ----------
    .. [1] C. E. Shannon, "Coding theorems for a discrete source with a
       fidelity criterion", IRE National Convention Record, 1959.
    """
    return 20.0 * math.log10(2.0) * _rate(rate)


def pcm_sine_snr_db(bits) -> float:
    """Exact high-resolution SNR of N-bit uniform PCM on a full-scale sine.

    Power ``A^2/2`` over noise ``d^2/12`` with ``d = 2A / 2**N``:
    ``10 log10(1.5) + 20 log10(2) N``.

    References
    ----------
    .. [1] W. R. Bennett, "Spectra of quantized signals", Bell System
       Technical Journal 27, 1948 (uniform quantization noise ``d^2/12``).
    """
    n = _rate(bits)
    return 10.0 * math.log10(1.5) + 20.0 * math.log10(2.0) * n


def pcm_sine_snr_rule_db(bits) -> float:
    """The rule of thumb ``6.02 N + 1.76`` dB (common practice)."""
    return 6.02 * _rate(bits) + 1.76
