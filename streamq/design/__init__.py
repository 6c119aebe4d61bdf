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

# Names are imported from their modules on first use (PEP 562), so that
# ``import streamq.design.kernels`` or a command that needs one helper does not
# pay for the whole library and the scipy modules behind it (about a second).
_HOME = {
    "METHODS": "api",
    "SAMPLE_EXACT_LIMIT": "api",
    "design": "api",
    "CODEBOOK_FORMAT": "codebook",
    "Codebook": "codebook",
    "index_dtype": "codebook",
    "G711_LAWS": "compander",
    "a_law_compress": "compander",
    "a_law_expand": "compander",
    "compander_codebook": "compander",
    "g711_code_map": "compander",
    "g711_codebook": "compander",
    "g711_decode": "compander",
    "g711_encode": "compander",
    "mu_law_compress": "compander",
    "mu_law_expand": "compander",
    "optimal_compander_histogram": "compander",
    "optimal_compander_pdf": "compander",
    "ecsq_histogram": "ecsq",
    "ecsq_pdf": "ecsq",
    "HistogramPrefix": "histogram",
    "histogram_prefix": "histogram",
    "sample_histogram": "histogram",
    "lloyd_max_histogram": "lloyd",
    "lloyd_max_samples": "lloyd",
    "lloyd_max_pdf": "lloyd_pdf",
    "MAX_DP_LEVELS": "optimal",
    "MAX_DP_POINTS": "optimal",
    "optimal_histogram": "optimal",
    "PDF_NAMES": "pdfs",
    "PdfModel": "pdfs",
    "pdf_histogram": "pdfs",
    "pdf_model": "pdfs",
    "DesignReport": "report",
    "evaluate_histogram": "report",
    "evaluate_pdf": "report",
    "index_entropy": "report",
    "snr_db": "report",
    "ECSQ_GAP_BITS": "theory",
    "ECSQ_GAP_DB": "theory",
    "gaussian_rd_mse": "theory",
    "gaussian_rd_snr_db": "theory",
    "panter_dite_mse": "theory",
    "pcm_sine_snr_db": "theory",
    "pcm_sine_snr_rule_db": "theory",
    "UNIFORM_KINDS": "uniform",
    "uniform_codebook": "uniform",
    "uniform_histogram": "uniform",
    "uniform_pdf": "uniform",
}


def __getattr__(name: str):
    """Import a public name's module on first use and keep the name here."""
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib
    value = getattr(importlib.import_module(f"{__name__}.{home}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


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
