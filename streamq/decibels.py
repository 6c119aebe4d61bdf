"""Decibel conversions shared across streamq (one definition each)."""

from __future__ import annotations


def amplitude_from_db(db: float) -> float:
    """The amplitude factor of a level or gain in dB: ``10 ** (db / 20)``
    (0 dB = 1, e.g. 0 dBFS = full scale; common practice)."""
    return 10.0 ** (db / 20.0)
