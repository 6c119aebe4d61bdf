"""Quantizer design math for streamq, usable on its own.

>>> from streamq.design import design, pdf_model
>>> codebook, report = design("lloyd-max", 8, pdf="gaussian")
>>> round(report.mse, 4)
0.0345

Main pieces
-----------
* :class:`Codebook` -- thresholds, levels, version; exact fast encoders
  (int16 lookup table, float grid), JSON round trip.
* :func:`design` -- one dispatcher for every method below.
* :func:`pdf_model` -- Gaussian, Laplacian, two-sided gamma, uniform,
  generalised Gaussian, with exact partial moments.
* Lloyd-Max on a PDF (:func:`lloyd_max_pdf`), a histogram
  (:func:`lloyd_max_histogram`, the streaming hot path; see
  :func:`histogram_prefix`) and raw samples (:func:`lloyd_max_samples`).
* Globally optimal quantizer of a histogram (:func:`optimal_histogram`).
* Entropy-constrained quantizer (:func:`ecsq_histogram`, :func:`ecsq_pdf`).
* Uniform quantizers (:func:`uniform_codebook`, :func:`uniform_pdf`,
  :func:`uniform_histogram`).
* Companders: continuous mu-law/A-law (:func:`compander_codebook`), bit-exact
  G.711 (:func:`g711_encode`, :func:`g711_decode`, :func:`g711_codebook`,
  :func:`g711_code_map`), optimal compander (:func:`optimal_compander_pdf`).
* Theory: :func:`panter_dite_mse`, :func:`gaussian_rd_mse`,
  :func:`pcm_sine_snr_db`.
"""

from streamq.design.api import METHODS, SAMPLE_EXACT_LIMIT, design
from streamq.design.codebook import CODEBOOK_FORMAT, Codebook, index_dtype
from streamq.design.compander import (
    G711_LAWS,
    a_law_compress,
    a_law_expand,
    compander_codebook,
    g711_code_map,
    g711_codebook,
    g711_decode,
    g711_encode,
    mu_law_compress,
    mu_law_expand,
    optimal_compander_histogram,
    optimal_compander_pdf,
)
from streamq.design.ecsq import ecsq_histogram, ecsq_pdf
from streamq.design.lloyd import (
    HistogramPrefix,
    histogram_prefix,
    lloyd_max_histogram,
    lloyd_max_pdf,
    lloyd_max_samples,
    sample_histogram,
)
from streamq.design.optimal import MAX_DP_LEVELS, MAX_DP_POINTS, optimal_histogram
from streamq.design.pdfs import PDF_NAMES, PdfModel, pdf_histogram, pdf_model
from streamq.design.report import (
    DesignReport,
    evaluate_histogram,
    evaluate_pdf,
    index_entropy,
    snr_db,
)
from streamq.design.theory import (
    ECSQ_GAP_BITS,
    ECSQ_GAP_DB,
    gaussian_rd_mse,
    gaussian_rd_snr_db,
    panter_dite_mse,
    pcm_sine_snr_db,
    pcm_sine_snr_rule_db,
)
from streamq.design.uniform import UNIFORM_KINDS, uniform_codebook, uniform_histogram, uniform_pdf

__all__ = [
    "METHODS",
    "SAMPLE_EXACT_LIMIT",
    "design",
    "CODEBOOK_FORMAT",
    "Codebook",
    "index_dtype",
    "G711_LAWS",
    "a_law_compress",
    "a_law_expand",
    "compander_codebook",
    "g711_code_map",
    "g711_codebook",
    "g711_decode",
    "g711_encode",
    "mu_law_compress",
    "mu_law_expand",
    "optimal_compander_histogram",
    "optimal_compander_pdf",
    "ecsq_histogram",
    "ecsq_pdf",
    "HistogramPrefix",
    "histogram_prefix",
    "lloyd_max_histogram",
    "lloyd_max_pdf",
    "lloyd_max_samples",
    "sample_histogram",
    "MAX_DP_LEVELS",
    "MAX_DP_POINTS",
    "optimal_histogram",
    "PDF_NAMES",
    "PdfModel",
    "pdf_histogram",
    "pdf_model",
    "DesignReport",
    "evaluate_histogram",
    "evaluate_pdf",
    "index_entropy",
    "snr_db",
    "ECSQ_GAP_BITS",
    "ECSQ_GAP_DB",
    "gaussian_rd_mse",
    "gaussian_rd_snr_db",
    "panter_dite_mse",
    "pcm_sine_snr_db",
    "pcm_sine_snr_rule_db",
    "UNIFORM_KINDS",
    "uniform_codebook",
    "uniform_histogram",
    "uniform_pdf",
]
