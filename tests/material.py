"""Real test material: recorded human speech with pauses.

Debian's alsa-utils package ships eight short recordings of a voice naming
loudspeaker positions (48 kHz, 16-bit mono, about 1.4 s each). Chained with
pauses between them they make a speech file with the pattern backward
adaptation finds hard: loud onsets right after digital silence, and quiet
stretches that pull a scale estimate down.

Tests that use this material call :func:`have_speech` and skip, naming the
package, when the recordings are missing.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf

SOUNDS = Path("/usr/share/sounds/alsa")
#: the spoken clips (Noise.wav in the same folder is not speech and is left out)
CLIPS = ("Front_Center", "Front_Left", "Front_Right", "Rear_Center",
         "Rear_Left", "Rear_Right", "Side_Left", "Side_Right")
RATE = 48_000
SKIP_REASON = ("needs the speech recordings of Debian's alsa-utils package in "
               f"{SOUNDS} (apt-get install alsa-utils)")

# what follows each clip: (seconds, RMS of the pause); RMS 0 is digital silence,
# the others are low-level noise stretches (about -66, -60 and -54 dBFS), as a
# room or a line hum would leave between words
_PAUSES = ((0.5, 0.0), (0.3, 5e-4), (0.8, 0.0), (0.4, 0.0),
           (0.6, 1e-3), (0.3, 0.0), (0.7, 2e-3), (0.5, 0.0))


def clip_paths() -> list[Path]:
    return [SOUNDS / f"{name}.wav" for name in CLIPS]


def have_speech() -> bool:
    """Whether the alsa-utils speech recordings are installed."""
    return all(p.is_file() for p in clip_paths())


def speech_signal(seconds: float | None = None) -> np.ndarray:
    """The speech-with-pauses signal as float64 samples on the 16-bit grid.

    Parameters
    ----------
    seconds : float, optional
        Cut (or extend, by repeating the sequence) to this length.

    Returns
    -------
    numpy.ndarray
        Mono samples at 48 kHz, full scale 1, every value a multiple of 2**-15.
    """
    rng = np.random.default_rng(20260)   # the low-level stretches: same every run
    parts = [np.zeros(int(0.25 * RATE))]  # start in silence, as after a call is opened
    for path, (pause, rms) in zip(clip_paths(), _PAUSES):
        x, rate = sf.read(path, dtype="float64", always_2d=True)
        if rate != RATE:
            raise ValueError(f"{path}: expected {RATE} Hz, got {rate}")
        parts.append(x[:, 0])
        n = int(round(pause * RATE))
        parts.append(rms * rng.standard_normal(n) if rms > 0 else np.zeros(n))
    x = np.concatenate(parts)
    if seconds is not None:
        n = int(round(seconds * RATE))
        x = np.resize(x, n)
    # on the 16-bit grid, as the file will hold it
    return np.clip(np.round(x * 32768.0), -32768, 32767) / 32768.0


def speech_with_pauses(path, seconds: float | None = None) -> Path:
    """Write the alsa-utils speech clips, with pauses, to a 48 kHz 16-bit WAV.

    Parameters
    ----------
    path : str or Path
        File to write.
    seconds : float, optional
        Length of the file (the sequence is cut or repeated); by default the
        whole sequence, about 15 s.

    Returns
    -------
    Path
        ``path``.
    """
    path = Path(path)
    sf.write(path, speech_signal(seconds), RATE, subtype="PCM_16")
    return path
