"""Codebook: validation, immutability, exact fast encoders, serialisation.

Every fast path is checked against ``numpy.searchsorted(thresholds, x,
side='right')``, the definition of the encoder (numpy documentation).
"""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamq.design import Codebook, index_dtype
from streamq.errors import StreamqError


def reference(th, x):
    return np.searchsorted(th, np.asarray(x, dtype=np.float64), side="right")


# -- validation ----------------------------------------------------------------


@pytest.mark.parametrize(
    "levels, thresholds, fragment",
    [
        ([1.0], None, "2 to 65536"),
        ([0.0, 1.0], [0.5, 0.6], "needs 1 thresholds"),
        ([0.0, 1.0, 2.0], [1.0, 1.0], "strictly increasing"),
        ([0.0, 1.0, 2.0], [1.5, 0.5], "strictly increasing"),
        ([0.0, np.nan], None, "not finite"),
        ([0.0, 1.0], [np.inf], "not finite"),
        ([2.0, 1.0], [1.5], "non-decreasing"),
    ],
)
def test_bad_codebooks_raise(levels, thresholds, fragment):
    with pytest.raises(StreamqError, match=fragment):
        Codebook(levels, thresholds)


def test_too_many_levels():
    with pytest.raises(StreamqError, match="65536"):
        Codebook(np.arange(65537.0))


def test_largest_codebook_and_dtypes():
    cb = Codebook(np.arange(65536.0))
    assert cb.dtype == np.uint16
    assert index_dtype(256) == np.uint8
    assert index_dtype(257) == np.uint16
    assert Codebook([0.0, 1.0]).encode([5.0]).dtype == np.uint8


def test_ties_in_levels_allowed_with_explicit_thresholds():
    cb = Codebook([0.0, 0.0, 1.0], [-1.0, 0.5])
    assert list(cb.decode([0, 1, 2])) == [0.0, 0.0, 1.0]


def test_immutable():
    cb = Codebook([0.0, 1.0, 3.0])
    with pytest.raises(AttributeError):
        cb.version = 3
    with pytest.raises(ValueError):
        cb.levels[0] = 5.0
    with pytest.raises(ValueError):
        cb.thresholds[0] = 5.0
    assert cb.with_version(7).version == 7 and cb.version == 0
    again = cb.with_version(8)   # shares the (read-only) arrays, still equal as a codebook
    assert again.levels is cb.levels and again == Codebook(cb.levels, cb.thresholds, version=8)
    with pytest.raises(StreamqError, match="version must be an integer"):
        cb.with_version("next")


def test_decode_rejects_out_of_range():
    cb = Codebook([0.0, 1.0, 3.0])
    with pytest.raises(StreamqError, match="out of range"):
        cb.decode([3])
    with pytest.raises(StreamqError, match="out of range"):
        cb.decode(np.array([-1]))


def test_distortion_is_mse_and_rejects_nan():
    cb = Codebook([-1.0, 1.0])
    x = np.array([-2.0, -0.5, 0.5, 3.0])
    assert cb.distortion(x) == pytest.approx(np.mean((x - np.array([-1, -1, 1, 1])) ** 2))
    with pytest.raises(StreamqError, match="non-finite"):
        cb.distortion([0.0, np.nan])
    with pytest.raises(StreamqError, match="empty"):
        cb.distortion([])


# -- encoders ------------------------------------------------------------------


def _edge_values(th):
    """Thresholds, their float neighbours and far values (exact edge cases)."""
    th = np.asarray(th)
    vals = [th, np.nextafter(th, -np.inf), np.nextafter(th, np.inf),
            np.array([-np.inf, np.inf, 0.0, -0.0, 1e308, -1e308, 5e-324, -5e-324])]
    return np.concatenate(vals)


def test_encode_is_searchsorted_at_edges():
    rng = np.random.default_rng(1)
    th = np.sort(rng.normal(size=255))
    cb = Codebook(np.concatenate(([th[0] - 1], 0.5 * (th[1:] + th[:-1]), [th[-1] + 1])), th)
    x = np.concatenate((_edge_values(th), rng.normal(size=10000)))
    assert np.array_equal(cb.encode(x), reference(th, x))
    assert np.array_equal(cb.encode_fast(x), reference(th, x))


def test_nan_follows_searchsorted():
    cb = Codebook([0.0, 1.0, 2.0])
    x = np.array([np.nan, 0.4])
    assert np.array_equal(cb.encode(x), reference(cb.thresholds, x))
    assert np.array_equal(cb.encode_fast(x), reference(cb.thresholds, x))


def test_int16_table_all_codes():
    k = np.arange(-32768, 32768).astype(np.int16)
    rng = np.random.default_rng(2)
    cases = [
        np.sort(rng.uniform(-1, 1, 255)),
        (np.arange(-100, 100) + 0.5) / 32768,  # half-integer edges
        np.arange(-100, 100) / 32768.0,  # thresholds exactly on codes
        np.array([-2.0, 2.0]),  # outside the int16 range
        np.array([-1.0, 32767 / 32768]),  # at the extreme codes
        np.nextafter(np.arange(-5, 5) / 32768.0, np.inf),
    ]
    for th in cases:
        th = np.unique(th)
        lv = np.concatenate(([th[0] - 1], 0.5 * (th[1:] + th[:-1]), [th[-1] + 1]))
        cb = Codebook(lv, th)
        assert np.array_equal(cb.encode_int16(k), reference(th, k / 32768.0))
        assert np.array_equal(cb.int16_table(), reference(th, k / 32768.0))


def test_encode_int16_accepts_wider_ints_and_rejects_floats():
    cb = Codebook([0.0, 0.5, 1.0])
    assert np.array_equal(cb.encode_int16(np.array([0, 16384, 32767])), [0, 1, 2])
    with pytest.raises(StreamqError):
        cb.encode_int16(np.array([0.5]))
    with pytest.raises(StreamqError):
        cb.encode_int16(np.array([40000]))


finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)


@st.composite
def thresholds_and_values(draw):
    th = draw(st.lists(finite, min_size=1, max_size=60, unique=True))
    th = np.sort(np.array(th, dtype=np.float64))
    extra = draw(st.lists(finite, max_size=40))
    scale = draw(st.sampled_from([1.0, 1e-3, 1e-9, 32768.0]))
    th = np.unique(th * scale)
    x = np.concatenate((_edge_values(th), np.array(extra, dtype=np.float64) * scale,
                        np.array([np.nan])))
    return th, x


@settings(max_examples=300, deadline=None)
@given(thresholds_and_values())
def test_property_fast_paths_equal_searchsorted(case):
    # numpy documentation: searchsorted(side='right') defines the encoder
    th, x = case
    lv = np.concatenate(([th[0] - 1.0], 0.5 * (th[1:] + th[:-1]), [th[-1] + 1.0]))
    if not (np.all(np.diff(lv) >= 0) and np.all(np.isfinite(lv))):
        return
    cb = Codebook(lv, th)
    want = reference(th, x)
    assert np.array_equal(cb.encode(x), want)
    assert np.array_equal(cb.encode_fast(x), want)
    near = np.round(np.clip(th, -2.0, 2.0) * 32768)
    k = np.concatenate((np.arange(-40, 40), [-32768, 32767], near - 1, near, near + 1))
    k = np.clip(k, -32768, 32767).astype(np.int16)
    assert np.array_equal(cb.encode_int16(k), reference(th, k / 32768.0))


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(min_value=-1.0, max_value=1.0), min_size=1, max_size=40, unique=True))
def test_property_int16_table_exhaustive(values):
    th = np.unique(np.array(values))
    lv = np.concatenate(([th[0] - 1.0], 0.5 * (th[1:] + th[:-1]), [th[-1] + 1.0]))
    cb = Codebook(lv, th)
    k = np.arange(-32768, 32768).astype(np.int16)
    assert np.array_equal(cb.encode_int16(k), reference(th, k / 32768.0))


# -- serialisation -------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=2,
             max_size=50, unique=True),
    st.integers(min_value=0, max_value=2**40),
)
def test_property_json_round_trip_exact(values, version):
    lv = np.sort(np.array(values))
    th = 0.5 * lv[:-1] + 0.5 * lv[1:]
    if not (np.all(np.isfinite(th)) and np.all(np.diff(th) > 0)):
        return
    cb = Codebook(lv, th, version)
    back = Codebook.from_json(cb.to_json())
    assert back == cb
    assert np.array_equal(back.levels, cb.levels) and np.array_equal(back.thresholds, cb.thresholds)
    assert Codebook.from_dict(json.loads(json.dumps(cb.to_dict()))) == cb


def test_from_dict_errors():
    with pytest.raises(StreamqError, match="lacks"):
        Codebook.from_dict({"levels": [0.0, 1.0]})
    with pytest.raises(StreamqError, match="format"):
        Codebook.from_dict({"format": "other", "levels": [0, 1], "thresholds": [0.5]})
    with pytest.raises(StreamqError, match="parse"):
        Codebook.from_json("{")
    with pytest.raises(StreamqError, match="size"):
        Codebook.from_dict({"levels": [0, 1], "thresholds": [0.5], "size": 3})


def test_pickle_round_trip():
    import pickle

    cb = Codebook([0.0, 1.0, 4.0], version=3)
    assert pickle.loads(pickle.dumps(cb)) == cb


def test_default_thresholds_are_midpoints():
    cb = Codebook([0.0, 1.0, 4.0])
    assert list(cb.thresholds) == [0.5, 2.5]
    assert math.isclose(cb.bits, math.log2(3))
