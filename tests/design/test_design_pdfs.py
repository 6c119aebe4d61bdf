"""PDF models against scipy.stats and numerical integration (scipy.integrate)."""

import math

import numpy as np
import pytest
import scipy.integrate as si
import scipy.stats as st

from streamq.design import PDF_NAMES, pdf_histogram, pdf_model
from streamq.errors import StreamqError

SQ2 = math.sqrt(2.0)

# scipy.stats equivalents of the unit-variance models (scipy documentation)
CASES = [
    ("gaussian", None, st.norm()),
    ("laplacian", None, st.laplace(scale=1 / SQ2)),
    ("gamma", None, st.dgamma(0.5, scale=1 / math.sqrt(0.5 * 1.5))),
    ("gamma", 2.0, st.dgamma(2.0, scale=1 / math.sqrt(2.0 * 3.0))),
    ("uniform", None, st.uniform(loc=-math.sqrt(3), scale=2 * math.sqrt(3))),
    ("generalized-gaussian", 0.8,
     st.gennorm(0.8, scale=math.sqrt(math.gamma(1 / 0.8) / math.gamma(3 / 0.8)))),
]


@pytest.mark.parametrize("name, shape, ref", CASES)
def test_pdf_cdf_match_scipy(name, shape, ref):
    m = pdf_model(name, mean=0.4, std=2.5, shape=shape)
    x = np.linspace(-9, 9, 401)
    z = (x - 0.4) / 2.5
    ok = np.abs(z) > 1e-9  # the two-sided gamma is infinite at its centre
    assert np.allclose(m.pdf(x)[ok], ref.pdf(z)[ok] / 2.5, rtol=1e-10, atol=1e-14)
    assert np.allclose(m.cdf(x), ref.cdf(z), rtol=1e-10, atol=1e-14)
    assert np.allclose(m.ppf([0.1, 0.5, 0.93]), 0.4 + 2.5 * ref.ppf([0.1, 0.5, 0.93]))
    assert ref.var() == pytest.approx(1.0)


@pytest.mark.parametrize("name, shape, ref", CASES)
def test_partial_moments_match_quadrature(name, shape, ref):
    m = pdf_model(name, mean=-0.3, std=1.7, shape=shape)
    intervals = [(-np.inf, np.inf), (-np.inf, -2.0), (-1.0, 0.6), (-0.3, 0.2), (0.5, 3.0),
                 (2.5, np.inf), (1.0, 1.0001)]
    lo, hi = m.support
    for a, b in intervals:
        got = m.partial_moments(a, b)
        a, b = max(a, lo), min(b, hi)  # quad needs the finite support of the uniform
        for k in range(3):
            if b <= a:
                assert got[k] == 0.0
                continue
            pts = [-0.3] if a < -0.3 < b and np.isfinite(a) and np.isfinite(b) else None
            # scipy.integrate.quad on x^k p(x); breakpoints at the centre
            want = si.quad(lambda x: x**k * m.pdf(x), a, b, points=pts, limit=400,
                           epsabs=1e-13, epsrel=1e-11)[0]
            tol = 1e-7 if name == "uniform" else 1e-9  # quad on a step edge
            assert got[k] == pytest.approx(want, abs=tol), (a, b, k)


@pytest.mark.parametrize("name, shape, ref", CASES)
def test_full_moments_and_cube_root_integral(name, shape, ref):
    m = pdf_model(name, mean=0.7, std=0.3, shape=shape)
    m0, m1, m2 = m.partial_moments(-np.inf, np.inf)
    assert m0 == pytest.approx(1.0, abs=1e-14)
    assert m1 == pytest.approx(0.7, abs=1e-14)
    assert m2 == pytest.approx(0.49 + 0.09, abs=1e-14)
    lo, hi = m.support
    # integral of p^(1/3) by quadrature, split at the centre (scipy.integrate)
    want = sum(si.quad(lambda x: m.pdf(x) ** (1 / 3), a, b, limit=400)[0]
               for a, b in ((max(lo, -np.inf), 0.7), (0.7, min(hi, np.inf))))
    assert m.cube_root_integral() == pytest.approx(want, rel=1e-7)


# (scipy.stats's own cube-root families: p**(1/3) of each model is the same
# family with the scale times 3**(1/beta) (3 for Laplace) or, for the two-sided
# gamma, shape (s + 2) / 3 and scale 3 theta)
CUBE_ROOT = {
    "gaussian": lambda m: st.norm(scale=math.sqrt(3)),
    "laplacian": lambda m: st.laplace(scale=3 / SQ2),
    "uniform": lambda m: st.uniform(loc=-math.sqrt(3), scale=2 * math.sqrt(3)),
    "gamma": lambda m: st.dgamma((m.shape + 2) / 3,
                                 scale=3 * (1 / math.sqrt(m.shape * (m.shape + 1)))),
    "generalized-gaussian": lambda m: st.gennorm(
        m.shape, scale=math.sqrt(math.gamma(1 / m.shape) / math.gamma(3 / m.shape))
        * 3 ** (1 / m.shape)),
}


@pytest.mark.parametrize("name, shape, ref", CASES)
def test_quantiles_equal_scipy_stats_exactly(name, shape, ref):
    """ppf and cube_root_ppf compute scipy.stats's quantile formulas without
    importing it: bit for bit the same, ends and bad probabilities included."""
    m = pdf_model(name, mean=0.0, std=1.0, shape=shape)
    q = np.concatenate([[0.0, 1.0, np.nan, -0.1, 1.1, 5e-324, 1e-300, 0.5, 1 - 1e-16],
                        np.linspace(0, 1, 1001), np.geomspace(1e-12, 0.5, 200)])
    np.testing.assert_array_equal(m.ppf(q), ref.ppf(q))
    np.testing.assert_array_equal(m.cube_root_ppf(q), CUBE_ROOT[name](m).ppf(q))
    assert m.ppf(0.25) == ref.ppf(0.25) and np.ndim(m.ppf(0.25)) == 0


def test_gaussian_cube_root_integral_closed_form():
    # (int p^(1/3))^3 = 6 sqrt(3) pi sigma^2 for a Gaussian (Panter & Dite 1951)
    m = pdf_model("gaussian", std=2.0)
    assert m.cube_root_integral() ** 3 == pytest.approx(6 * math.sqrt(3) * math.pi * 4.0)


def test_unknown_name_lists_known():
    with pytest.raises(StreamqError) as err:
        pdf_model("cauchy")
    for name in PDF_NAMES:
        assert name in str(err.value)


@pytest.mark.parametrize("kwargs", [dict(std=0.0), dict(std=-1.0), dict(std=np.nan),
                                    dict(mean=np.inf), dict(shape=2.0)])
def test_bad_parameters(kwargs):
    with pytest.raises(StreamqError):
        pdf_model("gaussian", **kwargs)
    if "shape" not in kwargs:
        return
    with pytest.raises(StreamqError):
        pdf_model("gamma", shape=-1.0)


def test_aliases():
    assert pdf_model("normal") == pdf_model("gaussian")
    assert pdf_model("Laplace").name == "laplacian"
    assert pdf_model("generalised-gaussian", shape=1.5).shape == 1.5


def test_pdf_histogram_keeps_mean_and_mass():
    m = pdf_model("laplacian", mean=0.25, std=0.5)
    c, w = pdf_histogram(m, 2048)
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.dot(c, w) == pytest.approx(0.25, abs=1e-12)
    assert np.all(np.diff(c) >= 0)
