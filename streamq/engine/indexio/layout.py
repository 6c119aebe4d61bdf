"""The index file's byte layout (``docs/index-file.md``) and the checks that
writer and reader share: record structs, limits, the header's StreamSpec
fields, codebook records, index ranges and the versions in force per block."""

from __future__ import annotations

import struct
import zlib
from typing import Any

import numpy as np

from streamq.engine.blocks import CodebookUpdate, StreamSpec


MAGIC = b"SQ-INDEX"
FORMAT_VERSION = 1

#: magic, format version, header length
PREAMBLE = struct.Struct("<8sII")
#: record type, body length
RECORD_HEAD = struct.Struct("<II")
CRC = struct.Struct("<I")
#: at_sample, version, side_info_bits, channel, L, method length, reserved
CODEBOOK_HEAD = struct.Struct("<qqqIIHH")
#: start, frames, channels, bytes per index, reserved
CHUNK_HEAD = struct.Struct("<QIHBB")
#: total frames, codebook records, complete flag, 7 reserved bytes
END_BODY = struct.Struct("<QQB7x")

REC_CODEBOOK, REC_CHUNK, REC_END = 1, 2, 3
RECORD_NAMES = {REC_CODEBOOK: "codebook", REC_CHUNK: "index chunk", REC_END: "end"}
END_RECORD_SIZE = RECORD_HEAD.size + END_BODY.size + CRC.size  # 36 bytes

MAX_HEADER = 1 << 20        # bytes of header JSON
MAX_BODY = 1 << 26          # bytes of one record body (64 MiB)
CHUNK_DATA_BYTES = 1 << 20  # the writer's target bytes of index data per chunk
CHUNK_FRAMES = 65_536       # ... and at most this many frames per chunk
MAX_METHOD = 1024           # bytes of a codebook's method name
MAX_LEVEL = 1000.0          # |reconstruction level| (full scale = 1), as for float audio input

INDEX_DTYPE_BYTES = {"uint8": 1, "uint16": 2, "uint32": 4, "uint64": 8}
INT64_RANGE = (-(1 << 63), (1 << 63) - 1)


def record_crc(*parts: bytes) -> int:
    c = 0
    for p in parts:
        c = zlib.crc32(p, c)
    return c & 0xFFFFFFFF


def is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def json_default(o: Any) -> Any:
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.bool_):
        return bool(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"{type(o).__name__} is not JSON-able")


def reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def spec_problem(h: Any) -> str | None:
    """Problems with a header dict (or a StreamSpec turned into one), else None."""
    if not isinstance(h, dict):
        return "the header is not a JSON object"
    for key in ("kind", "rate", "channels", "latency", "int_bits", "frames", "extra"):
        if key not in h:
            return f"field '{key}' is missing"
    if h["kind"] != "index":
        return f"kind is {h['kind']!r}, expected 'index' (only index streams go in this file)"
    if not is_int(h["rate"]) or not 1 <= h["rate"] <= 100_000_000:
        return f"rate {h['rate']!r} is not a sample rate in Hz"
    if not is_int(h["channels"]) or not 1 <= h["channels"] <= 65_535:
        return f"channels {h['channels']!r} is not a channel count (1..65535)"
    if not is_int(h["latency"]) or not 0 <= h["latency"] <= INT64_RANGE[1]:
        return f"latency {h['latency']!r} is not a frame count"
    if h["int_bits"] is not None and (not is_int(h["int_bits"]) or not 1 <= h["int_bits"] <= 64):
        return f"int_bits {h['int_bits']!r} is neither null nor a word length 1..64"
    if h["frames"] is not None and (not is_int(h["frames"]) or not 0 <= h["frames"] <= INT64_RANGE[1]):
        return f"frames {h['frames']!r} is neither null nor a frame count"
    extra = h["extra"]
    if not isinstance(extra, dict):
        return "extra is not a JSON object"
    if not isinstance(extra.get("coding"), dict):
        return "extra.coding is missing or not a JSON object (the encoder sets it)"
    n = extra.get("n_levels")
    if not is_int(n) or not 1 <= n <= 0xFFFFFFFF:
        return f"extra.n_levels {n!r} is not a level count (1..4294967295)"
    dt = extra.get("index_dtype")
    if dt not in INDEX_DTYPE_BYTES:
        return f"extra.index_dtype {dt!r} is not one of {', '.join(INDEX_DTYPE_BYTES)}"
    if n - 1 > np.iinfo(np.dtype(dt)).max:
        return f"extra.index_dtype {dt} cannot hold indices up to {n - 1}"
    return None


def spec_to_header(spec: StreamSpec) -> dict[str, Any]:
    return {"kind": spec.kind, "rate": spec.rate, "channels": spec.channels,
            "latency": spec.latency, "int_bits": spec.int_bits, "frames": spec.frames,
            "extra": spec.extra}


def codebook_problem(cb: CodebookUpdate, channels: int, n_levels: int) -> str | None:
    """Problems with one codebook update, else None (shared by writer and reader)."""
    if not is_int(cb.channel) or not 0 <= cb.channel < channels:
        return f"codebook for channel {cb.channel} but the stream has {channels} channel(s)"
    if not is_int(cb.at_sample) or not 0 <= cb.at_sample <= INT64_RANGE[1]:
        return f"codebook at_sample {cb.at_sample!r} is not a sample position"
    if not is_int(cb.version) or not INT64_RANGE[0] <= cb.version <= INT64_RANGE[1]:
        return f"codebook version {cb.version!r} is not a 64-bit integer"
    if not is_int(cb.side_info_bits) or not 0 <= cb.side_info_bits <= INT64_RANGE[1]:
        return f"codebook side_info_bits {cb.side_info_bits!r} is not a bit count"
    lev, thr = cb.levels, cb.thresholds
    if lev.ndim != 1 or thr.ndim != 1:
        return "codebook levels and thresholds must be 1-D arrays"
    L = lev.shape[0]
    if L != n_levels:
        return f"codebook has L={L} levels but the stream has n_levels={n_levels}"
    if thr.shape[0] != L - 1:
        return f"codebook has {thr.shape[0]} thresholds for L={L} levels (expected {L - 1})"
    if not (np.all(np.isfinite(lev)) and np.all(np.isfinite(thr))):
        return "codebook has a non-finite threshold or level"
    if L and float(np.max(np.abs(lev))) > MAX_LEVEL:
        return (f"codebook level {float(lev[np.argmax(np.abs(lev))]):.6g} is more than 60 dB "
                f"above full scale (1.0)")
    if L > 2 and not np.all(np.diff(thr) > 0):
        k = int(np.flatnonzero(~(np.diff(thr) > 0))[0])
        return (f"codebook thresholds are not increasing (threshold {k + 1} = "
                f"{float(thr[k + 1])!r} after {float(thr[k])!r})")
    return None


def first_bad_index(data: np.ndarray, n_levels: int, start: int) -> str | None:
    """'index out of range at sample N, channel C' for the first index >= n_levels."""
    if data.size == 0:
        return None
    if data.dtype.kind == "i" and int(data.min()) < 0:
        bad = data < 0
    elif int(data.max()) >= n_levels:
        bad = data >= n_levels
    else:
        return None
    flat = int(np.flatnonzero(bad.ravel())[0])
    frame, ch = divmod(flat, data.shape[1])
    value = int(data.ravel()[flat])
    return (f"index out of range at sample {start + frame}, channel {ch} "
            f"(index {value}; the stream has {n_levels} levels)")


def versions_in_force(in_force: list, start: int, events: list[CodebookUpdate], channels: int) -> tuple:
    """Per channel, the (from_sample, version) pairs in force in a block starting at ``start``.

    Canonical form: the first pair is the latest codebook starting at or before
    ``start``; then one pair per later update inside the block (a second update at
    the same sample replaces the first). Updates ``in_force`` to the block's end.
    """
    out = [[in_force[c]] if in_force[c] is not None else [] for c in range(channels)]
    for ev in events:
        lst = out[ev.channel]
        pair = (ev.at_sample, ev.version)
        if lst and (lst[-1][0] == ev.at_sample or (len(lst) == 1 and ev.at_sample <= start)):
            lst[-1] = pair
        else:
            lst.append(pair)
    for c in range(channels):
        if out[c]:
            in_force[c] = out[c][-1]
    return tuple(tuple(lst) for lst in out)


def plain_int(v: Any) -> Any:
    return int(v) if isinstance(v, np.integer) else v


def as_float_codebook(ev: CodebookUpdate) -> CodebookUpdate:
    """The update with float64 arrays and plain-int fields (numpy scalars accepted)."""
    thr = np.asarray(ev.thresholds, dtype=np.float64)
    lev = np.asarray(ev.levels, dtype=np.float64)
    ints = [plain_int(v) for v in (ev.version, ev.at_sample, ev.channel, ev.side_info_bits)]
    if (thr is ev.thresholds and lev is ev.levels and isinstance(ev.method, str)
            and all(type(v) is int for v in ints)):
        return ev
    version, at, channel, bits = ints
    return CodebookUpdate(version, at, channel, thr, lev, bits, str(ev.method))


def codebook_body(cb: CodebookUpdate) -> bytes:
    method = cb.method.encode("utf-8")
    L = cb.levels.shape[0]
    head = CODEBOOK_HEAD.pack(cb.at_sample, cb.version, cb.side_info_bits, cb.channel, L,
                              len(method), 0)
    return b"".join((head, method, cb.thresholds.astype("<f8").tobytes(),
                     cb.levels.astype("<f8").tobytes()))
