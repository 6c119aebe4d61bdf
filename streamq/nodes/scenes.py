"""Invented test scenes, generated deterministically sample by sample.

Every scene is a function of the absolute sample index and the seed: the
samples of ``[start, stop)`` are the same whichever way the range is cut into
blocks. Noise is made in fixed chunks, each seeded from ``(seed, chunk)``.
"""

from __future__ import annotations

import numpy as np

from streamq.decibels import amplitude_from_db

CHUNK = 8192
SCENES = ("tone", "noise", "drift")


def _chunk_rng(seed: int, channel: int, chunk: int, stream: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, channel, chunk, stream])))


def _noise(seed: int, channel: int, start: int, stop: int, pdf: str, stream: int = 0) -> np.ndarray:
    """Unit-variance noise with the given amplitude PDF for samples [start, stop)."""
    out = np.empty(stop - start)
    c0, c1 = start // CHUNK, (stop - 1) // CHUNK
    pos = 0
    for c in range(c0, c1 + 1):
        rng = _chunk_rng(seed, channel, c, stream)
        if pdf == "gaussian":
            chunk = rng.standard_normal(CHUNK)
        elif pdf == "laplacian":
            chunk = rng.laplace(0.0, 1.0 / np.sqrt(2.0), CHUNK)
        elif pdf == "uniform":
            chunk = rng.uniform(-np.sqrt(3.0), np.sqrt(3.0), CHUNK)
        else:
            raise ValueError(pdf)
        a = max(start, c * CHUNK) - c * CHUNK
        b = min(stop, (c + 1) * CHUNK) - c * CHUNK
        out[pos:pos + b - a] = chunk[a:b]
        pos += b - a
    return out


def _filtered_noise(seed: int, channel: int, start: int, stop: int, taps: np.ndarray,
                    stream: int) -> np.ndarray:
    """Gaussian noise through an FIR filter; the filter's history comes from the
    same deterministic noise, so the result does not depend on block cuts."""
    pad = len(taps) - 1
    raw = _noise(seed, channel, max(0, start - pad), stop, "gaussian", stream)
    if start - pad < 0:
        raw = np.concatenate([np.zeros(pad - start), raw])
    return np.convolve(raw, taps, mode="valid")


def windowed_sinc(numtaps: int, left: float, right: float) -> np.ndarray:
    """A linear-phase FIR filter passing ``(left, right)`` (fractions of the
    Nyquist frequency; ``left = 0`` makes a low-pass), by the window method.

    The ideal band's impulse response is cut to ``numtaps`` taps, weighted by a
    symmetric Hamming window (0.54 - 0.46 cos) and scaled to unit gain at the
    band's center (at 0 for a low-pass). The arithmetic follows
    ``scipy.signal.firwin(numtaps, ...)`` with its defaults step by step, so the
    taps are the same to the last bit (``tests/test_scenes.py`` checks); it is
    written out here because importing ``scipy.signal`` costs about a second.

    Parameters
    ----------
    numtaps : int
        Filter length (odd).
    left, right : float
        Band edges, ``0 <= left < right < 1``.

    Returns
    -------
    numpy.ndarray
        The ``numtaps`` taps, float64, read-only.
    """
    alpha = 0.5 * (numtaps - 1)
    m = np.arange(0, numtaps, dtype=np.float64) - alpha
    h = np.zeros(numtaps)
    h += right * np.sinc(right * m)
    h -= left * np.sinc(left * m)
    fac = np.linspace(-np.pi, np.pi, numtaps)
    win = np.zeros(numtaps)
    win += 0.54 * np.cos(0 * fac)
    win += (1.0 - 0.54) * np.cos(1 * fac)
    h *= win
    center = 0.0 if left == 0 else 0.5 * (left + right)
    h /= np.sum(h * np.cos(np.pi * m * center))
    h.setflags(write=False)
    return h


# the drift scene's two filters (constants: made once, never written)
_ROOM_TAPS = windowed_sinc(31, 0.0, 0.25)
_VOICE_TAPS = windowed_sinc(63, 0.012, 0.16)


def tone(t: np.ndarray, frequency: float, level_dbfs: float) -> np.ndarray:
    """A sine whose peak is at ``level_dbfs`` (0 dBFS = full scale)."""
    return amplitude_from_db(level_dbfs) * np.sin(2.0 * np.pi * frequency * t)


def drift_scene(seed: int, channel: int, start: int, stop: int, rate: int, total: int) -> np.ndarray:
    """Quiet room tone, then speech-like bursts, then dense loud band material.

    An invented three-part program: the first third is low hiss with mains hum
    at about -61 dBFS RMS; the middle third is syllable-like bursts of shaped
    noise in phrases with breathing pauses (peaky amplitudes, kurtosis about
    10) at about -30 dBFS RMS over the part, its 100 ms levels ranging from
    the room tone up to about -26 dBFS; the last third is a dense chord of
    harmonic tones plus noise at about -15 dBFS RMS. (Measured over each part
    without its cross-fades, 12 s at 48 kHz, seeds 1 and 2; checked in
    tests/test_scenes.py.) Parts cross-fade over 1.5 s, as a presenter or a
    band would come in.

    Parameters
    ----------
    seed, channel : int
        Select the noise; the tones are the same for every seed.
    start, stop : int
        The absolute sample range to render, ``[start, stop)``.
    rate : int
        Sample rate in Hz.
    total : int
        Length of the whole program in samples (sets the three parts).

    Returns
    -------
    numpy.ndarray
        ``stop - start`` float64 samples, clipped to ``[-1, 1 - 2**-15]``.
    """
    n = np.arange(start, stop)
    t = n / rate
    third = total / 3.0
    fade = 1.5 * rate

    def weight(center_lo: float, center_hi: float) -> np.ndarray:
        up = np.clip((n - center_lo) / fade + 0.5, 0.0, 1.0) if center_lo > 0 else np.ones(len(n))
        down = np.clip((center_hi - n) / fade + 0.5, 0.0, 1.0) if center_hi < total else np.ones(len(n))
        return np.minimum(up, down)

    def part(make, w: np.ndarray) -> np.ndarray:
        """``make(i, j) * w[i:j]`` where the part's weight is above zero (one
        stretch: the weights rise, hold and fall), zeros elsewhere; each sample
        is a function of its index alone, so only the heard stretch is made."""
        on = np.flatnonzero(w)
        term = np.zeros(len(n))
        if on.size:
            i, j = int(on[0]), int(on[-1]) + 1
            term[i:j] = make(i, j) * w[i:j]
        return term

    # Part 1: room tone: filtered hiss plus 50 Hz hum and its 3rd harmonic.
    lp = _ROOM_TAPS
    room = 0.0008 * _filtered_noise(seed, channel, start, stop, lp, 1) / np.sqrt(np.sum(lp ** 2))
    room += tone(t, 50.0, -66.0) + tone(t, 150.0, -74.0)

    # Part 2: speech-like bursts: band-passed noise under a 4-5 Hz syllable
    # envelope, in phrases separated by short breaths (about 0.3 s every 2.6 s,
    # with 20 ms ramps), giving a peaky amplitude distribution.
    def speech(i: int, j: int) -> np.ndarray:
        tt = t[i:j]
        bp = _VOICE_TAPS
        voiced = _filtered_noise(seed, channel, start + i, start + j, bp, 2) / np.sqrt(np.sum(bp ** 2))
        syll = 0.15 + 0.85 * np.maximum(0.0, np.sin(2 * np.pi * 4.3 * tt + 0.7 * np.sin(2 * np.pi * 0.37 * tt))) ** 2
        cycle = np.mod(tt + 0.4 * channel, 2.6)
        phrase = np.clip(np.minimum(cycle - 0.3, 2.6 - cycle) / 0.02, 0.0, 1.0)
        pitch = 0.5 * tone(tt, 140.0 + 20.0 * np.sin(2 * np.pi * 0.5 * tt), 0.0)
        return 0.07 * syll * phrase * (voiced + pitch)

    # Part 3: band: a major chord with harmonics, slow tremolo, and a noise bed.
    def band(i: int, j: int) -> np.ndarray:
        tt = t[i:j]
        out = np.zeros(j - i)
        for f0 in (110.0, 138.6, 164.8, 220.0):
            for h, a in ((1, 1.0), (2, 0.5), (3, 0.33), (5, 0.2)):
                out += a * np.sin(2 * np.pi * f0 * h * tt + f0 * 0.01 * h)
        out *= 0.085 * (1.0 + 0.3 * np.sin(2 * np.pi * 1.7 * tt))
        out += 0.09 * _noise(seed, channel, start + i, start + j, "laplacian", 3)
        return out

    # the room tone stays under everything: no part of the program is digital silence
    out = room + part(speech, weight(third, 2 * third)) + part(band, weight(2 * third, total))
    return np.clip(out, -1.0, 1.0 - 2.0 ** -15)


def render(scene: str, *, seed: int, channel: int, start: int, stop: int, rate: int, total: int,
           frequency: float, level_dbfs: float, pdf: str) -> np.ndarray:
    """Samples [start, stop) of one channel of a scene, float64."""
    if stop <= start:
        return np.zeros(0)
    if scene == "tone":
        t = np.arange(start, stop) / rate
        return tone(t, frequency * (1.0 + 0.001 * channel), level_dbfs)
    if scene == "noise":
        # level_dbfs is the RMS level here; clip to full scale.
        x = amplitude_from_db(level_dbfs) * _noise(seed, channel, start, stop, pdf)
        return np.clip(x, -1.0, 1.0 - 2.0 ** -15)
    if scene == "drift":
        return drift_scene(seed, channel, start, stop, rate, total)
    raise ValueError(scene)
