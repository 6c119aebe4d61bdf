"""How codebook updates are coded on the link, and what they cost.

The decoder needs only the reconstruction levels (thresholds are the
encoder's business). A level set is sent as:

* the lowest level as a ``grid_bits``-bit two's-complement number on the grid
  of step ``2**-(grid_bits-1)`` (full scale = 1.0);
* a 5-bit Rice parameter ``k``;
* each of the L-1 differences between neighbouring levels (non-negative
  integers on the same grid) as a Rice code with parameter ``k``: the
  quotient ``d >> k`` in unary (that many 1s and a 0), then ``k`` low bits.

``k`` is chosen per update to make the message shortest. The codebook
length L is fixed for a stream and its position in the stream says when it
applies, so neither costs bits. The encoder rounds its levels onto the grid
before use, so encoder and decoder agree to the bit.

References
----------
.. [1] Rice, R. F. (1979). Some practical universal noiseless coding
   techniques. JPL Publication 79-22.
"""

from __future__ import annotations

import numpy as np

HEADER_K_BITS = 5


def round_levels(levels: np.ndarray, grid_bits: int = 16) -> np.ndarray:
    """Levels moved onto the side-information grid (and clipped to its range)."""
    scale = float(2 ** (grid_bits - 1))
    q = np.clip(np.round(np.asarray(levels, dtype=np.float64) * scale), -scale, scale - 1)
    return q / scale


def _codes(levels: np.ndarray, grid_bits: int) -> np.ndarray:
    scale = float(2 ** (grid_bits - 1))
    return np.round(np.asarray(levels) * scale).astype(np.int64)


def _rice_choice(d: np.ndarray) -> tuple[int, int]:
    """(k, bits) of the shortest Rice code of the differences ``d``."""
    if d.size == 0:
        return 0, 0
    top = min(int(max(1, int(d.max()).bit_length())), 2 ** HEADER_K_BITS - 1)
    ks = np.arange(top + 1)
    bits = (d[None, :] >> ks[:, None]).sum(axis=1) + d.size * (1 + ks)
    k = int(np.argmin(bits))
    return k, int(bits[k])


def level_bits(levels: np.ndarray, grid_bits: int = 16) -> int:
    """Bits needed to send ``levels`` (already on the grid) with the code above."""
    d = np.diff(_codes(levels, grid_bits))
    if np.any(d < 0):
        raise ValueError("levels must be non-decreasing")
    return grid_bits + HEADER_K_BITS + _rice_choice(d)[1]


def encode_levels(levels: np.ndarray, grid_bits: int = 16) -> tuple[bytes, int]:
    """The actual bit string (packed, MSB first) and its length in bits."""
    q = _codes(levels, grid_bits)
    d = np.diff(q)
    nbits = level_bits(levels, grid_bits)
    k_best = _rice_choice(d)[0]
    bits: list[int] = []
    first = int(q[0]) & ((1 << grid_bits) - 1)
    bits += [(first >> (grid_bits - 1 - i)) & 1 for i in range(grid_bits)]
    bits += [(k_best >> (HEADER_K_BITS - 1 - i)) & 1 for i in range(HEADER_K_BITS)]
    for v in d.tolist():
        bits += [1] * (v >> k_best) + [0]
        bits += [(v >> (k_best - 1 - i)) & 1 for i in range(k_best)]
    assert len(bits) == nbits
    return np.packbits(np.array(bits, dtype=np.uint8)).tobytes(), nbits


def decode_levels(payload: bytes, n_levels: int, grid_bits: int = 16) -> np.ndarray:
    """Inverse of :func:`encode_levels`."""
    bits = np.unpackbits(np.frombuffer(payload, dtype=np.uint8)).tolist()
    pos = 0

    def take(n):
        nonlocal pos
        v = 0
        for _ in range(n):
            v = (v << 1) | bits[pos]
            pos += 1
        return v

    first = take(grid_bits)
    if first >= 1 << (grid_bits - 1):
        first -= 1 << grid_bits
    k = take(HEADER_K_BITS)
    q = [first]
    for _ in range(n_levels - 1):
        u = 0
        while bits[pos] == 1:
            u += 1
            pos += 1
        pos += 1
        q.append(q[-1] + ((u << k) | take(k)))
    return np.asarray(q, dtype=np.float64) / float(2 ** (grid_bits - 1))
