"""Reading index files back: :class:`IndexReader` and :func:`read_spec`
(see :mod:`streamq.engine.indexio`)."""

from __future__ import annotations

import json
import os
from collections import deque
from pathlib import Path
from typing import Iterator

import numpy as np

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec
from streamq.engine.indexio.layout import (
    CHUNK_FRAMES,
    CHUNK_HEAD,
    CODEBOOK_HEAD,
    CRC,
    END_BODY,
    END_RECORD_SIZE,
    FORMAT_VERSION,
    INT64_RANGE,
    MAGIC,
    MAX_BODY,
    MAX_HEADER,
    PREAMBLE,
    RECORD_HEAD,
    RECORD_NAMES,
    REC_CHUNK,
    REC_CODEBOOK,
    REC_END,
    codebook_problem,
    first_bad_index,
    record_crc,
    reject_constant,
    spec_problem,
    versions_in_force,
)
from streamq.errors import StreamqError


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
        if crc != record_crc(head[8:], payload):
            raise self._fail(f"header CRC mismatch at byte {PREAMBLE.size + hlen} "
                             f"(the header is damaged)")
        try:
            header = json.loads(payload.decode("utf-8"), parse_constant=reject_constant)
        except (ValueError, RecursionError) as exc:
            raise self._fail(f"bad header at byte {PREAMBLE.size}: not valid JSON "
                             f"({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})") \
                from None
        problem = spec_problem(header)
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
        if crc != record_crc(raw[:RECORD_HEAD.size], body):
            raise self._fail(f"record CRC mismatch at byte {offset} (end record)")
        total, codebooks, complete = END_BODY.unpack(body)
        if complete not in (0, 1):
            raise self._fail(f"bad end record at byte {offset}: complete flag {complete}")
        if total > INT64_RANGE[1]:
            raise self._fail(f"bad end record at byte {offset}: {total} frames")
        return total, codebooks, bool(complete)

    # -- records --------------------------------------------------------------
    def _next_record(self) -> tuple[int, bytes, int]:
        off = self._pos
        if off + RECORD_HEAD.size > self._size:
            raise self._fail(f"truncated file: partial record at byte {off}")
        head = self._read_at(off, RECORD_HEAD.size, "record")
        rtype, length = RECORD_HEAD.unpack(head)
        if rtype not in RECORD_NAMES:
            raise self._fail(f"unknown record type {rtype} at byte {off} (damaged file?)")
        if length > MAX_BODY:
            raise self._fail(f"{RECORD_NAMES[rtype]} record at byte {off} claims {length} bytes "
                             f"(at most {MAX_BODY}; damaged file?)")
        total = RECORD_HEAD.size + length + CRC.size
        if off + total > self._size:
            raise self._fail(f"truncated file: {RECORD_NAMES[rtype]} record at byte {off} "
                             f"claims {length} bytes but the file ends at byte {self._size}")
        rest = self._read_at(off + RECORD_HEAD.size, length + CRC.size, "record")
        body = rest[:length]
        (crc,) = CRC.unpack_from(rest, length)
        if crc != record_crc(head, body):
            raise self._fail(f"record CRC mismatch at byte {off} ({RECORD_NAMES[rtype]} record)")
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
        problem = codebook_problem(cb, self.channels, self.n_levels)
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
        problem = first_bad_index(data, self.n_levels, start)
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
        versions = versions_in_force(self._in_force, start, events, self.channels)
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
