"""Index-stream files: an encoder's output (indices and codebook updates) on disk.

One file holds one index stream, so encoding and decoding can run in separate
processes. The byte layout is documented in ``docs/index-file.md``; in short,
everything is little-endian::

    preamble   magic "SQ-INDEX", format version (u32), header length (u32)
    header     UTF-8 JSON: the whole StreamSpec of the index stream
    header CRC CRC-32 of version, length and header bytes
    records    type (u32), body length (u32), body, CRC-32 of type+length+body
               1 = codebook, 2 = index chunk, 3 = end (always last, fixed size)

Writing is O(block) and never leaves a half-written file under the final
name (:class:`IndexWriter`); reading is streaming with memory bounded by one
record, and every record is checked as it is read (:class:`IndexReader`).
Both raise :class:`~streamq.errors.StreamqError` with a one-line message that
names the file and the byte offset or sample at fault.

Channels are numbered from 0 in the file and in messages, as on the wire.
"""

from __future__ import annotations

import json
import os
import struct
import zlib
from collections import deque
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec
from streamq.errors import StreamqError

__all__ = ["IndexWriter", "IndexReader", "read_spec", "MAGIC", "FORMAT_VERSION"]

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
_REC_NAMES = {REC_CODEBOOK: "codebook", REC_CHUNK: "index chunk", REC_END: "end"}
END_RECORD_SIZE = RECORD_HEAD.size + END_BODY.size + CRC.size  # 36 bytes

MAX_HEADER = 1 << 20        # bytes of header JSON
MAX_BODY = 1 << 26          # bytes of one record body (64 MiB)
CHUNK_DATA_BYTES = 1 << 20  # the writer's target bytes of index data per chunk
CHUNK_FRAMES = 65_536       # ... and at most this many frames per chunk
MAX_METHOD = 1024           # bytes of a codebook's method name
MAX_LEVEL = 1000.0          # |reconstruction level| (full scale = 1), as for float audio input

_DTYPES = {"uint8": 1, "uint16": 2, "uint32": 4, "uint64": 8}
_INT64 = (-(1 << 63), (1 << 63) - 1)


def _crc(*parts: bytes) -> int:
    c = 0
    for p in parts:
        c = zlib.crc32(p, c)
    return c & 0xFFFFFFFF


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.bool_):
        return bool(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"{type(o).__name__} is not JSON-able")


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def _check_spec_fields(h: Any) -> str | None:
    """Problems with a header dict (or a StreamSpec turned into one), else None."""
    if not isinstance(h, dict):
        return "the header is not a JSON object"
    for key in ("kind", "rate", "channels", "latency", "int_bits", "frames", "extra"):
        if key not in h:
            return f"field '{key}' is missing"
    if h["kind"] != "index":
        return f"kind is {h['kind']!r}, expected 'index' (only index streams go in this file)"
    if not _is_int(h["rate"]) or not 1 <= h["rate"] <= 100_000_000:
        return f"rate {h['rate']!r} is not a sample rate in Hz"
    if not _is_int(h["channels"]) or not 1 <= h["channels"] <= 65_535:
        return f"channels {h['channels']!r} is not a channel count (1..65535)"
    if not _is_int(h["latency"]) or not 0 <= h["latency"] <= _INT64[1]:
        return f"latency {h['latency']!r} is not a frame count"
    if h["int_bits"] is not None and (not _is_int(h["int_bits"]) or not 1 <= h["int_bits"] <= 64):
        return f"int_bits {h['int_bits']!r} is neither null nor a word length 1..64"
    if h["frames"] is not None and (not _is_int(h["frames"]) or not 0 <= h["frames"] <= _INT64[1]):
        return f"frames {h['frames']!r} is neither null nor a frame count"
    extra = h["extra"]
    if not isinstance(extra, dict):
        return "extra is not a JSON object"
    if not isinstance(extra.get("coding"), dict):
        return "extra.coding is missing or not a JSON object (the encoder sets it)"
    n = extra.get("n_levels")
    if not _is_int(n) or not 1 <= n <= 0xFFFFFFFF:
        return f"extra.n_levels {n!r} is not a level count (1..4294967295)"
    dt = extra.get("index_dtype")
    if dt not in _DTYPES:
        return f"extra.index_dtype {dt!r} is not one of {', '.join(_DTYPES)}"
    if n - 1 > np.iinfo(np.dtype(dt)).max:
        return f"extra.index_dtype {dt} cannot hold indices up to {n - 1}"
    return None


def _spec_to_header(spec: StreamSpec) -> dict[str, Any]:
    return {"kind": spec.kind, "rate": spec.rate, "channels": spec.channels,
            "latency": spec.latency, "int_bits": spec.int_bits, "frames": spec.frames,
            "extra": spec.extra}


def _check_codebook(cb: CodebookUpdate, channels: int, n_levels: int) -> str | None:
    """Problems with one codebook update, else None (shared by writer and reader)."""
    if not _is_int(cb.channel) or not 0 <= cb.channel < channels:
        return f"codebook for channel {cb.channel} but the stream has {channels} channel(s)"
    if not _is_int(cb.at_sample) or not 0 <= cb.at_sample <= _INT64[1]:
        return f"codebook at_sample {cb.at_sample!r} is not a sample position"
    if not _is_int(cb.version) or not _INT64[0] <= cb.version <= _INT64[1]:
        return f"codebook version {cb.version!r} is not a 64-bit integer"
    if not _is_int(cb.side_info_bits) or not 0 <= cb.side_info_bits <= _INT64[1]:
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


def _first_bad_index(data: np.ndarray, n_levels: int, start: int) -> str | None:
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


def _versions(in_force: list, start: int, events: list[CodebookUpdate], channels: int) -> tuple:
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


# ---------------------------------------------------------------------------- writing


class IndexWriter:
    """Writes one index stream to ``path``, safely.

    The file is written under a temporary name beside ``path`` (``.NAME.part``)
    and renamed on :meth:`close`; ``close(complete=False)`` (an interrupted
    run) still closes the file properly, with the end record's complete flag
    off. If writing fails, the temporary file is removed and nothing is left
    under either name.

    Packets must be contiguous from sample 0 and follow the wire conventions
    (see ``streamq.engine.blocks``); each is checked before anything of it is
    written, with the same rules the reader applies, so a file this class
    writes always reads back. Data is stored in chunks on a fixed grid of
    absolute samples, so the bytes of a complete file do not depend on the
    block size of the packets given.

    Parameters
    ----------
    path : output file
    spec : StreamSpec of the index stream (kind "index", ``extra`` with
        ``coding``, ``n_levels`` and ``index_dtype``)
    chunk_frames : frames per stored chunk (default: 65,536 or fewer so that
        a chunk holds about 1 MiB of indices)
    """

    def __init__(self, path: str | Path, spec: StreamSpec, *, chunk_frames: int | None = None):
        self.path = Path(path)
        self.tmp = self.path.with_name(f".{self.path.name}.part")
        from streamq import __version__
        header = dict(_spec_to_header(spec), written_by=f"streamq {__version__}")
        try:
            text = json.dumps(header, default=_json_default, allow_nan=False, sort_keys=True)
        except (TypeError, ValueError) as exc:
            raise self._fail(f"the stream's spec is not JSON-able ({exc}); extra must hold "
                             f"plain finite numbers, strings, lists and dicts") from None
        # check what a reader will see
        problem = _check_spec_fields(json.loads(text))
        if problem:
            raise self._fail(f"cannot store this stream: {problem}")
        payload = text.encode("utf-8")
        if len(payload) > MAX_HEADER:
            raise self._fail(f"the stream's spec takes {len(payload)} bytes as JSON "
                             f"(at most {MAX_HEADER})")
        self.spec = spec
        self.channels = spec.channels
        self.n_levels = int(spec.extra["n_levels"])
        if CODEBOOK_HEAD.size + MAX_METHOD + 8 * (2 * self.n_levels - 1) > MAX_BODY:
            raise self._fail(f"cannot store this stream: {self.n_levels} levels is more than "
                             f"a codebook record holds")
        self.dtype = np.dtype(spec.extra["index_dtype"]).newbyteorder("<")
        itemsize = self.dtype.itemsize
        if chunk_frames is None:
            chunk_frames = max(1, min(CHUNK_FRAMES, CHUNK_DATA_BYTES // (self.channels * itemsize)))
        self.chunk_frames = int(chunk_frames)
        if not 1 <= self.chunk_frames or self.chunk_frames * self.channels * itemsize \
                + CHUNK_HEAD.size > MAX_BODY or self.chunk_frames > 0xFFFFFFFF:
            raise self._fail(f"chunk_frames {chunk_frames} is out of range")
        self.frames = 0             # frames accepted
        self.bytes = 0              # bytes written so far
        self.codebook_updates = 0   # codebook records accepted
        self.skipped_events = 0     # non-codebook events (not stored)
        self.complete: bool | None = None
        self._stored = 0            # frames written to chunk records
        self._pending: list[np.ndarray] = []
        self._pending_frames = 0
        self._pending_events: deque[CodebookUpdate] = deque()
        self._has_codebook = [False] * self.channels
        self._last_at = 0
        self._f = None
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._f = open(self.tmp, "wb")
        except OSError as exc:
            raise self._fail(f"cannot create ({exc.strerror or exc})") from None
        pre = PREAMBLE.pack(MAGIC, FORMAT_VERSION, len(payload))
        self._write(pre, payload, CRC.pack(_crc(pre[8:], payload)))

    def _fail(self, msg: str) -> StreamqError:
        return StreamqError(f"{self.path}: {msg}")

    def _write(self, *parts: bytes) -> None:
        try:
            for p in parts:
                self._f.write(p)
                self.bytes += len(p)
        except OSError as exc:
            self.discard()
            raise self._fail(f"write failed after {self.frames} frames "
                             f"({exc.strerror or exc}); nothing was left under that name") from None

    def _record(self, rtype: int, body: bytes) -> None:
        head = RECORD_HEAD.pack(rtype, len(body))
        self._write(head, body, CRC.pack(_crc(head, body)))

    # -- packets --------------------------------------------------------------
    def write(self, packet: Packet) -> None:
        """Check one packet of the index stream and store it (O(block))."""
        if self._f is None:
            raise self._fail("the index file is already closed")
        block = packet.block
        if not isinstance(block, IndexBlock):
            raise self._fail(f"packet at sample {block.start} holds a signal block, not indices")
        data = np.asarray(block.data)
        start, C = _plain_int(block.start), self.channels
        if data.ndim != 2 or data.shape[1] != C:
            raise self._fail(f"packet at sample {start} has shape {data.shape}; "
                             f"expected (frames, {C})")
        if data.dtype.kind not in "ui":
            raise self._fail(f"packet at sample {start} holds {data.dtype} values, not indices")
        if start != self.frames:
            raise self._fail(f"packet starts at sample {start} but the stream is at sample "
                             f"{self.frames} (packets must be contiguous from sample 0)")
        if block.rate != self.spec.rate:
            raise self._fail(f"packet at sample {start} has rate {block.rate} Hz; the stream "
                             f"is {self.spec.rate} Hz")
        frames = data.shape[0]
        stop = start + frames
        problem = _first_bad_index(data, self.n_levels, start)
        if problem:
            raise self._fail(problem)
        cbs: list[CodebookUpdate] = []
        skipped = 0
        last = self._last_at
        for ev in packet.events:
            if not isinstance(ev, CodebookUpdate):
                skipped += 1
                continue
            ev = _as_float_codebook(ev)
            if not (_is_int(ev.at_sample) and start <= ev.at_sample < stop):
                raise self._fail(f"codebook update at sample {ev.at_sample} travels with the "
                                 f"packet [{start}, {stop}); it must fall inside it")
            if ev.at_sample < last:
                raise self._fail(f"codebook update at sample {ev.at_sample} comes after one at "
                                 f"sample {last}; events must be in sample order")
            problem = _check_codebook(ev, C, self.n_levels)
            if problem:
                raise self._fail(f"{problem} (update at sample {ev.at_sample})")
            if len(ev.method.encode("utf-8")) > MAX_METHOD:
                raise self._fail(f"codebook method name longer than {MAX_METHOD} bytes")
            last = ev.at_sample
            cbs.append(ev)
        if frames:
            for c in range(C):
                if not self._has_codebook[c]:
                    first = next((ev.at_sample for ev in cbs if ev.channel == c), None)
                    if first is None or first > start:
                        raise self._fail(f"indices before any codebook for channel {c} "
                                         f"at sample {start}")
        # accepted: update state, then store
        for ev in cbs:
            self._has_codebook[ev.channel] = True
        self._last_at = last
        self.skipped_events += skipped
        self.codebook_updates += len(cbs)
        self._pending_events.extend(cbs)
        if frames:
            self._pending.append(np.ascontiguousarray(data, dtype=self.dtype))
            self._pending_frames += frames
        self.frames = stop
        self._flush(final=False)

    def _flush(self, final: bool) -> None:
        """Write every full grid chunk pending (and the rest when ``final``)."""
        end = self._stored + self._pending_frames
        boundary = (self._stored // self.chunk_frames + 1) * self.chunk_frames
        if end < boundary and not (final and self._pending_frames):
            return
        data = self._pending[0] if len(self._pending) == 1 else np.concatenate(self._pending)
        self._pending, self._pending_frames = [], 0
        pos = 0
        while self._stored < end:
            boundary = (self._stored // self.chunk_frames + 1) * self.chunk_frames
            if boundary > end:
                if not final:
                    self._pending, self._pending_frames = [data[pos:]], end - self._stored
                    return
                boundary = end
            n = boundary - self._stored
            self._write_chunk(self._stored, data[pos:pos + n])
            pos += n
            self._stored = boundary

    def _write_chunk(self, start: int, data: np.ndarray) -> None:
        stop = start + data.shape[0]
        ev = self._pending_events
        while ev and ev[0].at_sample < stop:
            self._record(REC_CODEBOOK, _codebook_body(ev.popleft()))
        head = CHUNK_HEAD.pack(start, data.shape[0], self.channels, self.dtype.itemsize, 0)
        self._record(REC_CHUNK, head + data.tobytes())

    # -- checkpoints ------------------------------------------------------------
    _CARRIED = ("frames", "bytes", "codebook_updates", "skipped_events", "_stored",
                "_pending", "_pending_frames", "_pending_events", "_has_codebook", "_last_at")

    def checkpoint(self) -> dict:
        """Make the bytes written so far durable; what :meth:`resume` needs (the
        records not yet written travel in the checkpoint)."""
        try:
            self._f.flush()
        except OSError as exc:
            raise self._fail(f"could not make a checkpoint ({exc.strerror or exc})") from None
        return {k: (list(v) if isinstance(v, (list, deque)) else v)
                for k, v in ((k, getattr(self, k)) for k in self._CARRIED)}

    def resume(self, info: dict, earlier: Path) -> None:
        """Continue the file ``earlier`` (written by an interrupted run) from the
        checkpoint ``info``, in place of the new file this writer opened."""
        self._f.close()
        try:
            os.replace(earlier, self.tmp)
            self._f = open(self.tmp, "r+b")
            if os.path.getsize(self.tmp) < info["bytes"]:
                raise OSError(f"it holds fewer bytes than the checkpoint ({info['bytes']})")
            self._f.truncate(info["bytes"])
            self._f.seek(0, os.SEEK_END)
        except OSError as exc:
            self._f = None
            raise self._fail(f"cannot continue the earlier file ({exc})") from None
        for k in self._CARRIED:
            v = info[k]
            setattr(self, k, deque(v) if k == "_pending_events" else
                    list(v) if isinstance(v, list) else v)

    # -- closing --------------------------------------------------------------
    def close(self, complete: bool = True) -> None:
        """Write what is pending and the end record, then move the file into place."""
        if self._f is None:
            return
        self._flush(final=True)
        self._record(REC_END, END_BODY.pack(self.frames, self.codebook_updates, int(bool(complete))))
        f, self._f = self._f, None
        try:
            f.close()
            os.replace(self.tmp, self.path)
        except OSError as exc:
            try:
                self.tmp.unlink()
            except OSError:
                pass
            raise self._fail(f"could not finish the file ({exc.strerror or exc}); "
                             f"nothing was left under that name") from None
        self.complete = bool(complete)

    def discard(self) -> None:
        """Drop the file being written (nothing is left under either name)."""
        if self._f is not None:
            f, self._f = self._f, None
            try:
                f.close()
            except OSError:
                pass
        try:
            self.tmp.unlink()
        except OSError:
            pass

    def __enter__(self) -> "IndexWriter":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._f is not None:
            self.close(complete=exc_type is None)


def _plain_int(v: Any) -> Any:
    return int(v) if isinstance(v, np.integer) else v


def _as_float_codebook(ev: CodebookUpdate) -> CodebookUpdate:
    """The update with float64 arrays and plain-int fields (numpy scalars accepted)."""
    thr = np.asarray(ev.thresholds, dtype=np.float64)
    lev = np.asarray(ev.levels, dtype=np.float64)
    ints = [_plain_int(v) for v in (ev.version, ev.at_sample, ev.channel, ev.side_info_bits)]
    if (thr is ev.thresholds and lev is ev.levels and isinstance(ev.method, str)
            and all(type(v) is int for v in ints)):
        return ev
    version, at, channel, bits = ints
    return CodebookUpdate(version, at, channel, thr, lev, bits, str(ev.method))


def _codebook_body(cb: CodebookUpdate) -> bytes:
    method = cb.method.encode("utf-8")
    L = cb.levels.shape[0]
    head = CODEBOOK_HEAD.pack(cb.at_sample, cb.version, cb.side_info_bits, cb.channel, L,
                              len(method), 0)
    return b"".join((head, method, cb.thresholds.astype("<f8").tobytes(),
                     cb.levels.astype("<f8").tobytes()))


# ---------------------------------------------------------------------------- reading


class IndexReader:
    """Reads an index-stream file back, checking each record as it comes.

    Opening reads the preamble and header and the fixed-size end record at
    the end of the file, so ``spec``, ``total_frames`` and ``complete`` are
    known at once; the records in between are checked as they are read.
    Memory stays bounded by one record, whatever the file size.

    Use it either by iterating (packets as stored, one per index chunk) or
    with :meth:`read` (any number of frames per call; the output does not
    depend on the frame counts asked for nor on how the file was written).
    ``IndexBlock.versions`` is rebuilt from the codebook records (the first
    pair is the codebook in force at the block start, then one pair per
    update inside the block).

    Attributes
    ----------
    spec : StreamSpec equal to the one the writer was given
    total_frames : frames in the file (from the end record)
    complete : False if the writing run was interrupted
    position : next frame :meth:`read` returns
    codebook_updates : codebook records read so far
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self._f = None
        try:
            if self.path.is_dir():
                raise self._fail("is a folder, not an index file")
            self._f = open(self.path, "rb")
            self._size = os.fstat(self._f.fileno()).st_size
        except FileNotFoundError:
            raise self._fail("no such file") from None
        except OSError as exc:
            raise self._fail(f"cannot open ({exc.strerror or exc})") from None
        try:
            self._open()
        except BaseException:
            self.close()
            raise

    def _fail(self, msg: str) -> StreamqError:
        return StreamqError(f"{self.path}: {msg}")

    def _read_at(self, offset: int, n: int, what: str) -> bytes:
        try:
            self._f.seek(offset)
            data = self._f.read(n)
        except OSError as exc:
            raise self._fail(f"read failed at byte {offset} ({exc.strerror or exc})") from None
        if len(data) != n:
            raise self._fail(f"truncated file: {what} at byte {offset} is cut short")
        return data

    def _open(self) -> None:
        size = self._size
        if size == 0:
            raise self._fail("the file is empty, not an index file")
        head = self._read_at(0, min(size, PREAMBLE.size), "preamble")
        if head[:8] != MAGIC[:len(head)]:
            raise self._fail("not a streamq index file (bad magic at byte 0)")
        if len(head) < PREAMBLE.size:
            raise self._fail("truncated file: preamble at byte 0 is cut short")
        _, version, hlen = PREAMBLE.unpack(head)
        if version != FORMAT_VERSION:
            raise self._fail(f"unsupported index file format version {version} at byte 8 "
                             f"(this streamq reads version {FORMAT_VERSION})")
        if hlen > MAX_HEADER:
            raise self._fail(f"header length {hlen} at byte 12 is over the limit of {MAX_HEADER}")
        if PREAMBLE.size + hlen + CRC.size > size:
            raise self._fail(f"truncated file: header at byte {PREAMBLE.size} is cut short")
        payload = self._read_at(PREAMBLE.size, hlen + CRC.size, "header")
        payload, (crc,) = payload[:hlen], CRC.unpack(payload[hlen:])
        if crc != _crc(head[8:], payload):
            raise self._fail(f"header CRC mismatch at byte {PREAMBLE.size + hlen} "
                             f"(the header is damaged)")
        try:
            header = json.loads(payload.decode("utf-8"), parse_constant=_reject_constant)
        except (ValueError, RecursionError) as exc:
            raise self._fail(f"bad header at byte {PREAMBLE.size}: not valid JSON "
                             f"({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})") \
                from None
        problem = _check_spec_fields(header)
        if problem:
            raise self._fail(f"bad header at byte {PREAMBLE.size}: {problem}")
        self.spec = StreamSpec(header["kind"], header["rate"], header["channels"],
                               header["latency"], header["int_bits"], header["frames"],
                               header["extra"])
        self.header = header
        self.channels = header["channels"]
        self.n_levels = header["extra"]["n_levels"]
        self.dtype = np.dtype(header["extra"]["index_dtype"])
        self._records_start = PREAMBLE.size + hlen + CRC.size
        # the end record has a fixed size and is always last
        self._end_offset = size - END_RECORD_SIZE
        if self._end_offset < self._records_start:
            raise self._fail(f"truncated file: no end record after the header "
                             f"(file ends at byte {size}; was the writer stopped?)")
        end = self._parse_end(self._read_at(self._end_offset, END_RECORD_SIZE, "end record"),
                              self._end_offset, tail=True)
        self.total_frames, self._end_codebooks, self.complete = end
        # streaming state
        self._pos = self._records_start   # byte offset of the next record
        self._stored = 0                  # frames in the index chunks read so far
        self._done = False                # the end record was read and checked
        self._last_at = 0
        self._pending: list[CodebookUpdate] = []   # codebooks read, chunk not yet
        self._has_codebook = [False] * self.channels
        self.codebook_updates = 0
        self._buf: np.ndarray | None = None
        self._buf_start = 0
        self._buf_off = 0
        self._buf_events: deque[CodebookUpdate] = deque()
        self._in_force: list = [None] * self.channels
        self.position = 0

    def _parse_end(self, raw: bytes, offset: int, tail: bool) -> tuple[int, int, bool]:
        rtype, length = RECORD_HEAD.unpack_from(raw)
        if rtype != REC_END or length != END_BODY.size:
            if tail:
                raise self._fail(f"truncated file: no end record at byte {offset} "
                                 f"(was the writer stopped?)")
            raise self._fail(f"bad end record at byte {offset}")
        body = raw[RECORD_HEAD.size:RECORD_HEAD.size + END_BODY.size]
        (crc,) = CRC.unpack_from(raw, RECORD_HEAD.size + END_BODY.size)
        if crc != _crc(raw[:RECORD_HEAD.size], body):
            raise self._fail(f"record CRC mismatch at byte {offset} (end record)")
        total, codebooks, complete = END_BODY.unpack(body)
        if complete not in (0, 1):
            raise self._fail(f"bad end record at byte {offset}: complete flag {complete}")
        if total > _INT64[1]:
            raise self._fail(f"bad end record at byte {offset}: {total} frames")
        return total, codebooks, bool(complete)

    # -- records --------------------------------------------------------------
    def _next_record(self) -> tuple[int, bytes, int]:
        off = self._pos
        if off + RECORD_HEAD.size > self._size:
            raise self._fail(f"truncated file: partial record at byte {off}")
        head = self._read_at(off, RECORD_HEAD.size, "record")
        rtype, length = RECORD_HEAD.unpack(head)
        if rtype not in _REC_NAMES:
            raise self._fail(f"unknown record type {rtype} at byte {off} (damaged file?)")
        if length > MAX_BODY:
            raise self._fail(f"{_REC_NAMES[rtype]} record at byte {off} claims {length} bytes "
                             f"(at most {MAX_BODY}; damaged file?)")
        total = RECORD_HEAD.size + length + CRC.size
        if off + total > self._size:
            raise self._fail(f"truncated file: {_REC_NAMES[rtype]} record at byte {off} "
                             f"claims {length} bytes but the file ends at byte {self._size}")
        rest = self._read_at(off + RECORD_HEAD.size, length + CRC.size, "record")
        body = rest[:length]
        (crc,) = CRC.unpack_from(rest, length)
        if crc != _crc(head, body):
            raise self._fail(f"record CRC mismatch at byte {off} ({_REC_NAMES[rtype]} record)")
        self._pos = off + total
        return rtype, body, off

    def _load_chunk(self) -> bool:
        """Read records up to the next index chunk into the buffer; False at the end."""
        if self._done:
            return False
        while True:
            rtype, body, off = self._next_record()
            if rtype == REC_CODEBOOK:
                self._codebook(body, off)
            elif rtype == REC_CHUNK:
                self._chunk(body, off)
                return True
            else:
                self._end(body, off)
                return False

    def _codebook(self, body: bytes, off: int) -> None:
        where = f"codebook record at byte {off}"
        if len(body) < CODEBOOK_HEAD.size:
            raise self._fail(f"bad {where}: {len(body)} bytes is too short")
        at, version, bits, ch, L, mlen, _ = CODEBOOK_HEAD.unpack_from(body)
        if L != self.n_levels:
            raise self._fail(f"bad {where}: codebook has L={L} levels but the stream has "
                             f"n_levels={self.n_levels}")
        expect = CODEBOOK_HEAD.size + mlen + 8 * (2 * L - 1)
        if len(body) != expect:
            raise self._fail(f"bad {where}: {len(body)} bytes, expected {expect} for L={L}")
        try:
            method = body[CODEBOOK_HEAD.size:CODEBOOK_HEAD.size + mlen].decode("utf-8")
        except UnicodeDecodeError:
            raise self._fail(f"bad {where}: method name is not UTF-8") from None
        p = CODEBOOK_HEAD.size + mlen
        thr = np.frombuffer(body, "<f8", L - 1, p).astype(np.float64)
        lev = np.frombuffer(body, "<f8", L, p + 8 * (L - 1)).astype(np.float64)
        cb = CodebookUpdate(version, at, ch, thr, lev, bits, method)
        problem = _check_codebook(cb, self.channels, self.n_levels)
        if problem:
            raise self._fail(f"bad {where}: {problem}")
        if at < self._stored:
            raise self._fail(f"bad {where}: update at sample {at} is for frames already "
                             f"stored (the stream is at sample {self._stored})")
        if at < self._last_at:
            raise self._fail(f"bad {where}: update at sample {at} comes after one at sample "
                             f"{self._last_at}; updates must be in sample order")
        if at >= self.total_frames:
            raise self._fail(f"bad {where}: update at sample {at} is past the last frame "
                             f"({self.total_frames} frames in the file)")
        self._last_at = at
        self._pending.append(cb)
        self.codebook_updates += 1

    def _chunk(self, body: bytes, off: int) -> None:
        where = f"index chunk at byte {off}"
        if len(body) < CHUNK_HEAD.size:
            raise self._fail(f"bad {where}: {len(body)} bytes is too short")
        start, frames, channels, itemsize, _ = CHUNK_HEAD.unpack_from(body)
        if start != self._stored:
            raise self._fail(f"bad {where}: starts at sample {start}, not contiguous with "
                             f"the previous chunk (which ends at sample {self._stored})")
        if frames < 1:
            raise self._fail(f"bad {where}: holds no frames")
        stop = start + frames
        if stop > self.total_frames:
            raise self._fail(f"bad {where}: goes to sample {stop}, past the "
                             f"{self.total_frames} frames the end record declares")
        if channels != self.channels:
            raise self._fail(f"bad {where}: {channels} channel(s), the stream has {self.channels}")
        if itemsize != self.dtype.itemsize:
            raise self._fail(f"bad {where}: {itemsize}-byte indices, the stream's "
                             f"index_dtype is {self.dtype.name}")
        expect = CHUNK_HEAD.size + frames * channels * itemsize
        if len(body) != expect:
            raise self._fail(f"bad {where}: {len(body)} bytes, expected {expect} for "
                             f"{frames} frames x {channels} channel(s)")
        late = [cb for cb in self._pending if cb.at_sample >= stop]
        if late:
            raise self._fail(f"bad codebook record before {where}: update at sample "
                             f"{late[0].at_sample} is not inside the chunk [{start}, {stop})")
        for c in range(self.channels):
            if not self._has_codebook[c]:
                first = next((cb.at_sample for cb in self._pending if cb.channel == c), None)
                if first is None or first > start:
                    raise self._fail(f"indices before any codebook for channel {c} at "
                                     f"sample {start} ({where})")
                self._has_codebook[c] = True
        data = np.frombuffer(body, self.dtype.newbyteorder("<"), frames * channels,
                             CHUNK_HEAD.size).reshape(frames, channels).astype(self.dtype)
        problem = _first_bad_index(data, self.n_levels, start)
        if problem:
            raise self._fail(f"{problem} ({where})")
        self._stored = stop
        self._buf, self._buf_start, self._buf_off = data, start, 0
        self._buf_events = deque(self._pending)
        self._pending = []

    def _end(self, body: bytes, off: int) -> None:
        if off != self._end_offset:
            raise self._fail(f"end record at byte {off} but the file goes on to byte {self._size}")
        total, codebooks, _ = END_BODY.unpack(body)
        if self._pending:
            raise self._fail(f"bad codebook record: update at sample "
                             f"{self._pending[0].at_sample} has no index chunk after it")
        if self._stored != total:
            raise self._fail(f"truncated data: the index chunks hold {self._stored} frames "
                             f"but the end record at byte {off} declares {total}")
        if codebooks != self.codebook_updates:
            raise self._fail(f"the file holds {self.codebook_updates} codebook records but the "
                             f"end record at byte {off} declares {codebooks}")
        self._done = True

    # -- packets --------------------------------------------------------------
    def _packet(self, data: np.ndarray, start: int, events: list[CodebookUpdate]) -> Packet:
        versions = _versions(self._in_force, start, events, self.channels)
        self.position = start + data.shape[0]
        return Packet(IndexBlock(data, start, self.spec.rate, versions), tuple(events))

    def _take(self, n: int) -> tuple[np.ndarray, list[CodebookUpdate]]:
        off = self._buf_off
        piece = self._buf[off:off + n]
        self._buf_off = off + piece.shape[0]
        stop = self._buf_start + self._buf_off
        ev = self._buf_events
        out = []
        while ev and ev[0].at_sample < stop:
            out.append(ev.popleft())
        return piece, out

    def _buffered(self) -> int:
        return 0 if self._buf is None else self._buf.shape[0] - self._buf_off

    def _check_end(self) -> None:
        """At the last frame, read the end record so the whole file gets checked."""
        if self.position >= self.total_frames and not self._buffered() and not self._done:
            if self._load_chunk():  # pragma: no cover - _chunk refuses data past the end
                raise self._fail("index data past the end record's frame count")

    def read(self, frames: int) -> Packet | None:
        """The next ``frames`` frames (fewer at the end of the file; None past it),
        with exactly the codebook updates whose ``at_sample`` falls inside."""
        if self._f is None:
            raise self._fail("the index file is closed")
        frames = int(frames)
        if frames < 1:
            raise ValueError("read() needs frames >= 1")
        start = self.position
        pieces: list[np.ndarray] = []
        events: list[CodebookUpdate] = []
        need = frames
        while need:
            if not self._buffered():
                if not self._load_chunk():
                    break
            piece, ev = self._take(need)
            pieces.append(piece)
            events.extend(ev)
            need -= piece.shape[0]
        if not pieces:
            return None
        data = pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
        packet = self._packet(data, start, events)
        self._check_end()
        return packet

    def __iter__(self) -> Iterator[Packet]:
        """Packets as stored: one per index chunk, with the updates before it."""
        while True:
            if self._f is None:
                raise self._fail("the index file is closed")
            if not self._buffered() and not self._load_chunk():
                return
            start = self._buf_start + self._buf_off
            piece, ev = self._take(self._buffered())
            packet = self._packet(piece, start, ev)
            self._check_end()
            yield packet

    def skip(self, frames: int) -> None:
        """Move ``frames`` frames ahead (reading and checking what is skipped)."""
        left = int(frames)
        while left > 0:
            p = self.read(min(left, CHUNK_FRAMES))
            if p is None:
                raise self._fail(f"cannot skip to sample {self.position + left}: the file "
                                 f"holds {self.total_frames} frames")
            left -= p.frames

    def close(self) -> None:
        if self._f is not None:
            f, self._f = self._f, None
            f.close()

    def __enter__(self) -> "IndexReader":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def read_spec(path: str | Path) -> tuple[StreamSpec, int, bool]:
    """(spec, total frames, complete flag) of an index file, reading only its ends."""
    with IndexReader(path) as r:
        return r.spec, r.total_frames, r.complete
