"""The error meter's power spectra: signal and noise, Welch's method.

The measured stream is cut into segments of ``N`` samples (no overlap), each
windowed with a periodic Hann window; their periodograms are added in segment
order, so the spectra do not depend on the block size. One compiled pass
(:func:`window_segments`) cuts and windows a block; :meth:`Spectrum.add`
(possibly later, on another thread, in order) transforms and sums.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of
   power spectra: a method based on time averaging over short, modified
   periodograms", IEEE Transactions on Audio and Electroacoustics 15(2),
   70-73, 1967.
"""

from __future__ import annotations

import copy
import csv
from dataclasses import dataclass

import numpy as np
from numba import njit

from streamq.engine.audiofile import replacing
from streamq.nodes.metering.frames import in_order_sum


@njit(cache=True, nogil=True)
def window_segments(ref, x, window, part, pos, out):  # pragma: no cover - compiled
    """Cut reference and error into windowed segments, one contiguous row
    per segment and signal, ready for an FFT along the last axis.

    Signal ``s`` is reference channel ``s`` for ``s < C`` and error channel
    ``s - C`` (``x - ref``) above. The unfinished segment waits in ``part``
    (its first ``pos`` samples, already windowed).

    Equal to: ``rows = concat(unwindowed part[:, :pos].T, concat([ref, x - ref], axis=1))``;
    ``out[:] = rows[:K * N].reshape(K, N, 2C).transpose(2, 0, 1) * window``
    with ``N = window.shape[0]`` and ``K = out.shape[1] = len(rows) // N``;
    the rest, windowed, in ``part[:, :pos_new]``.

    Parameters
    ----------
    ref, x : ndarray, shape (n, C), float64
    window : ndarray, shape (N,), float64
    part : ndarray, shape (2C, N), float64; updated in place
    pos : int
        Samples already in ``part``.
    out : ndarray, shape (2C, K, N), float64; written whole

    Returns
    -------
    int
        The samples now in ``part``.
    """
    n, C = ref.shape
    N = window.shape[0]
    K = out.shape[1]
    if K > 0:
        # element by element: a slice assignment here would compile numba's
        # shape-mismatch error message (string formatting), several seconds
        # of compiling on a first run for a copy of a few rows
        for s in range(part.shape[0]):
            for j in range(pos):
                out[s, 0, j] = part[s, j]
    for c in range(C):
        i = 0
        g = 0
        p = pos
        while i < n:
            take = min(N - p, n - i)
            if g < K:
                dr = out[c, g]
                de = out[C + c, g]
            else:
                dr = part[c]
                de = part[C + c]
            for j in range(take):
                r = ref[i + j, c]
                w = window[p + j]
                dr[p + j] = r * w
                de[p + j] = (x[i + j, c] - r) * w
            i += take
            p += take
            if p == N:
                p = 0
                g += 1
    return (pos + n) % N



@dataclass
class SpectrumState:
    """Everything the spectra carry between blocks."""

    part: np.ndarray           # (2C, N): the unfinished segment, windowed
    acc: np.ndarray            # (2, N // 2 + 1): signal and noise power, summed
    pos: int = 0               # samples in ``part``
    frames: int = 0            # segments summed


class Spectrum:
    """Signal and noise power spectra of one meter.

    Parameters
    ----------
    channels : int
    size : int
        Segment length ``N``, samples.
    rate : int
        Sample rate (frequencies and density scale).
    """

    def __init__(self, channels: int, size: int, rate: int):
        self.C, self.N, self.rate = channels, size, rate
        # periodic ("DFT-even") Hann window, as scipy.signal.welch's window="hann"
        self.window = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(size) / size)
        self.state = SpectrumState(np.empty((2 * channels, size)), np.zeros((2, size // 2 + 1)))

    def segments(self, ref: np.ndarray, x: np.ndarray) -> np.ndarray:
        """The windowed segments this stretch finishes, shaped (2C, K, N):
        reference channels, then error channels (see :func:`window_segments`)."""
        st = self.state
        segs = np.empty((2 * self.C, (st.pos + ref.shape[0]) // self.N, self.N))
        st.pos = window_segments(ref, x, self.window, st.part, st.pos, segs)
        return segs

    def add(self, segs: np.ndarray) -> None:
        """Add windowed segments (no overlap) to the power spectra.

        Parameters
        ----------
        segs : ndarray, shape (2C, K, N)
            Reference channels then error channels, one windowed segment per
            row, as :meth:`segments` gives them.
        """
        st, C, K = self.state, self.C, segs.shape[1]
        spec = np.abs(np.fft.rfft(segs, axis=-1))
        np.square(spec, out=spec)                                   # (2C, K, f)
        sig, noi = spec[:C].sum(axis=0), spec[C:].sum(axis=0)   # (K, f), channels in order
        st.acc = np.stack([in_order_sum(st.acc[0], sig), in_order_sum(st.acc[1], noi)])
        st.frames += K

    def write_csv(self, path) -> None:
        """The one-sided power spectral densities (dB) as CSV, written whole
        under a temporary name, then renamed; OSError is left to the caller."""
        st = self.state
        freqs = np.fft.rfftfreq(self.N, 1.0 / self.rate)
        scale = 1.0 / (self.rate * (self.window ** 2).sum() * st.frames * self.C)
        psd = st.acc * scale
        psd[:, 1:-1] *= 2.0
        with replacing(path, newline="") as f:
            w = csv.writer(f)
            w.writerow(["frequency_hz", "signal_psd_db", "noise_psd_db"])
            for fr, sp, npow in zip(freqs, psd[0], psd[1]):
                w.writerow([f"{fr:.3f}", f"{10 * np.log10(max(sp, 1e-30)):.3f}",
                            f"{10 * np.log10(max(npow, 1e-30)):.3f}"])

    def get_state(self) -> SpectrumState:
        return copy.deepcopy(self.state)

    def set_state(self, st: SpectrumState) -> None:
        self.state = copy.deepcopy(st)


def warm_up() -> None:
    """Compile (or load from the disk cache) :func:`window_segments` before a
    live stream starts."""
    two = np.zeros((1, 2))
    window_segments(two, two, np.ones(2), np.zeros((4, 2)), 0, np.zeros((4, 0, 2)))
