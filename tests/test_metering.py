"""The error meter's parts (streamq.nodes.metering): the compiled loops against
the plain numpy definitions in tests/kernel_reference.py, however the stream is
cut, and each part's state handed out and taken back."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from kernel_reference import meter_rows_reference, window_segments_reference
from streamq.nodes.metering.frames import meter_rows
from streamq.nodes.metering.spectrum import Spectrum, window_segments


@pytest.mark.parametrize("channels", [1, 2, 3])
def test_meter_rows_equals_numpy_definition_however_the_stream_is_cut(channels):
    rng = np.random.default_rng(9 + channels)
    C, F, n, L = channels, 50, 1234, 16
    ref = rng.standard_normal((n, C))
    x = ref + rng.standard_normal((n, C)) * 0.1
    idx = rng.integers(0, L, (n, C)).astype(np.uint8)
    active = np.arange(C) != 1
    cuts = np.unique(np.concatenate([[0, n], rng.integers(0, n, 40), [49, 50, 51, 100]]))
    bounds = np.empty((n, C, 2))
    versions = np.empty(n)
    pend, fill, k, peak = np.empty((F, 3 * C + 1)), 0, 0, 0.0
    sums, vers = np.full((n // F, 4 * C), np.nan), np.full(n // F, np.nan)
    counts = np.zeros((C, L), dtype=np.int64)
    for i, (a, b) in enumerate(zip(cuts[:-1], cuts[1:])):   # a codebook change at every cut
        bd = np.sort(rng.standard_normal((C, 2)), axis=1) * 2
        bounds[a:b], versions[a:b] = bd, float(i)
        fill, k, peak = meter_rows(ref[a:b], x[a:b], bd, float(i), idx[a:b], active, counts,
                                   pend, fill, sums, vers, k, peak)
    want_sums, want_vers, want_rest, want_counts, want_peak = meter_rows_reference(
        ref, x, bounds, versions, idx, active, L, F)
    assert k == n // F and fill == n % F
    np.testing.assert_array_equal(sums, want_sums)
    np.testing.assert_array_equal(vers, want_vers)
    np.testing.assert_array_equal(pend[:fill], want_rest)
    np.testing.assert_array_equal(counts, want_counts)
    assert peak == want_peak


def test_meter_rows_counts_nothing_without_indices_and_keeps_a_nan_peak():
    ref = np.zeros((10, 2))
    x = np.ones((10, 2))
    x[3, 1] = np.nan
    counts = np.zeros((2, 4), dtype=np.int64)
    out = meter_rows(ref, x, np.zeros((2, 2)), -1.0, np.zeros((0, 2), dtype=np.uint8),
                     np.ones(2, dtype=bool), counts, np.empty((4, 7)), 0, np.empty((2, 8)),
                     np.empty(2), 0, 0.0)
    assert out[:2] == (2, 2) and np.isnan(out[2])
    assert not counts.any()
    assert np.isnan(meter_rows(ref, ref, np.zeros((2, 2)), -1.0, np.zeros((0, 2), np.uint8),
                               np.ones(2, dtype=bool), counts, np.empty((4, 7)), 0,
                               np.empty((2, 8)), np.empty(2), 0, np.nan)[2])


@pytest.mark.parametrize("channels", [1, 2])
def test_window_segments_equal_numpy_definition_however_the_stream_is_cut(channels):
    rng = np.random.default_rng(5)
    C, N, n = channels, 64, 1000
    ref, x = rng.standard_normal((n, C)), rng.standard_normal((n, C))
    window = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(N) / N)
    cuts = np.unique(np.concatenate([[0, n], rng.integers(0, n, 30), [63, 64, 65, 128]]))
    part, pos, got = np.empty((2 * C, N)), 0, []
    for a, b in zip(cuts[:-1], cuts[1:]):
        out = np.empty((2 * C, (pos + b - a) // N, N))
        pos = window_segments(ref[a:b], x[a:b], window, part, pos, out)
        got.append(out)
    want, rest = window_segments_reference(ref, x, window)
    np.testing.assert_array_equal(np.concatenate(got, axis=1), want)
    assert pos == n % N
    np.testing.assert_array_equal(part[:, :pos], rest)


def test_spectrum_window_is_scipys_periodic_hann_and_state_continues_a_cut_stream():
    """The window: scipy.signal.get_window("hann", N) (periodic, as scipy.signal.welch
    uses it). A saved state (pickled, as a checkpoint holds it) continues the
    stream to the same sums as one uninterrupted pass."""
    from scipy.signal import get_window
    rng = np.random.default_rng(2)
    ref, x = rng.standard_normal((900, 2)), rng.standard_normal((900, 2))
    whole = Spectrum(2, 128, 8000)
    np.testing.assert_allclose(whole.window, get_window("hann", 128), rtol=0, atol=1e-15)
    whole.add(whole.segments(ref, x))
    first = Spectrum(2, 128, 8000)
    first.add(first.segments(ref[:301], x[:301]))
    second = Spectrum(2, 128, 8000)
    second.set_state(pickle.loads(pickle.dumps(first.get_state())))
    second.add(second.segments(ref[301:], x[301:]))
    assert second.state.frames == whole.state.frames == 900 // 128
    np.testing.assert_array_equal(second.state.acc, whole.state.acc)
