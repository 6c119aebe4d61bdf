"""Writing index files: :class:`IndexWriter` (see :mod:`streamq.engine.indexio`)."""

from __future__ import annotations

import json
import os
from collections import deque
from pathlib import Path

import numpy as np

from streamq.engine.blocks import CodebookUpdate, IndexBlock, Packet, StreamSpec
from streamq.engine.indexio.layout import (
    CHUNK_DATA_BYTES,
    CHUNK_FRAMES,
    CHUNK_HEAD,
    CODEBOOK_HEAD,
    CRC,
    END_BODY,
    FORMAT_VERSION,
    MAGIC,
    MAX_BODY,
    MAX_HEADER,
    MAX_METHOD,
    PREAMBLE,
    RECORD_HEAD,
    REC_CHUNK,
    REC_CODEBOOK,
    REC_END,
    as_float_codebook,
    codebook_body,
    codebook_problem,
    first_bad_index,
    is_int,
    json_default,
    plain_int,
    record_crc,
    spec_problem,
    spec_to_header,
)
from streamq.errors import StreamqError


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
        header = dict(spec_to_header(spec), written_by=f"streamq {__version__}")
        try:
            text = json.dumps(header, default=json_default, allow_nan=False, sort_keys=True)
        except (TypeError, ValueError) as exc:
            raise self._fail(f"the stream's spec is not JSON-able ({exc}); extra must hold "
                             f"plain finite numbers, strings, lists and dicts") from None
        # check what a reader will see
        problem = spec_problem(json.loads(text))
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
        self._write(pre, payload, CRC.pack(record_crc(pre[8:], payload)))

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
        self._write(head, body, CRC.pack(record_crc(head, body)))

    # -- packets --------------------------------------------------------------
    def write(self, packet: Packet) -> None:
        """Check one packet of the index stream and store it (O(block))."""
        if self._f is None:
            raise self._fail("the index file is already closed")
        block = packet.block
        if not isinstance(block, IndexBlock):
            raise self._fail(f"packet at sample {block.start} holds a signal block, not indices")
        data = np.asarray(block.data)
        start, C = plain_int(block.start), self.channels
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
        problem = first_bad_index(data, self.n_levels, start)
        if problem:
            raise self._fail(problem)
        cbs: list[CodebookUpdate] = []
        skipped = 0
        last = self._last_at
        for ev in packet.events:
            if not isinstance(ev, CodebookUpdate):
                skipped += 1
                continue
            ev = as_float_codebook(ev)
            if not (is_int(ev.at_sample) and start <= ev.at_sample < stop):
                raise self._fail(f"codebook update at sample {ev.at_sample} travels with the "
                                 f"packet [{start}, {stop}); it must fall inside it")
            if ev.at_sample < last:
                raise self._fail(f"codebook update at sample {ev.at_sample} comes after one at "
                                 f"sample {last}; events must be in sample order")
            problem = codebook_problem(ev, C, self.n_levels)
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
            self._record(REC_CODEBOOK, codebook_body(ev.popleft()))
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
