"""Index-stream file nodes: store an encoder's output, and play it back.

``index-sink`` writes an index stream (indices and codebook updates) to a
streamq index file; ``index-source`` reads one back, so encoding and decoding
can run in separate processes. The file format is in ``docs/index-file.md``
and the reading/writing code in :mod:`streamq.engine.indexio`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field

from streamq.engine.background import BackgroundWriter
from streamq.engine.blocks import IndexBlock, Packet, StreamSpec
from streamq.engine.indexio import IndexReader, IndexWriter
from streamq.engine.node import Node, NodeConfig, RunContext, SourceNode, input_path
from streamq.engine.registry import register
from streamq.errors import StreamqError


class IndexSinkConfig(NodeConfig):
    use: Literal["index-sink"]
    input: str = Field(description="node whose quantizer indices are stored (an encoder)")
    path: str = Field(min_length=1, description="index file to write; relative paths land in "
                                                 "the run's output folder")


@register
class IndexSink(Node):
    """Stores an encoder's indices and codebook updates in a streamq index file."""

    kind = "index-sink"
    Config = IndexSinkConfig
    inputs = ("input",)
    role = "sink"

    def __init__(self, node_id, config):
        super().__init__(node_id, config)
        self.writer: IndexWriter | None = None
        self.path: Path | None = None
        self.latency = 0
        self.stepped = False
        self.background = None

    def open(self, specs, ctx: RunContext):
        spec = specs["input"]
        if spec.kind != "index":
            raise self.fail("input", f"node '{self.config.input}' gives a signal, not quantizer "
                                     f"indices; an index-sink stores an encoder's output")
        for key in ("coding", "n_levels", "index_dtype"):
            if key not in spec.extra:
                raise self.fail("input", f"node '{self.config.input}' does not say its {key} "
                                         f"(StreamSpec.extra['{key}']); cannot store its indices")
        try:
            self.path = ctx.resolve_path(self.config.path)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        self.latency = spec.latency
        if ctx.options.get("check_only"):
            return None  # `streamq check` must not create or replace files
        try:
            self.writer = IndexWriter(self.path, spec)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        # live runs: the audio callback only queues the packet; a thread writes
        self.background = BackgroundWriter(self.writer.write) if ctx.live else None
        return None

    def step(self, frames, inputs):
        self.stepped = True
        try:
            if self.background is not None:
                pkt = inputs["input"]
                self.background.put(Packet(IndexBlock(pkt.block.data.copy(), pkt.block.start,
                                                      pkt.block.rate, pkt.block.versions),
                                           pkt.events))
            else:
                self.writer.write(inputs["input"])
        except StreamqError as exc:
            raise self.fail("input", str(exc)) from None
        return None

    def close(self, complete):
        if getattr(self, "background", None) is not None:
            bg, self.background = self.background, None
            try:
                bg.close()
            except StreamqError as exc:
                raise self.fail("input", str(exc)) from None
        if self.writer is None:
            return
        if not complete and not self.stepped:
            # the run never started (another node failed to open): leave no file,
            # and do not replace an earlier one
            self.writer.discard()
            self.writer = None
            return
        try:
            self.writer.close(complete)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None

    def checkpoint(self):
        if self.background is not None:
            self.background.drain()
        return {"stepped": self.stepped, "writer": self.writer.checkpoint()}

    def resume(self, state, earlier=None):
        if earlier is None:
            raise self.fail("path", f"{self.writer.path}: the interrupted run's file is gone; "
                                    f"run again without --resume")
        try:
            self.writer.resume(state["writer"], earlier)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        self.stepped = state["stepped"]

    def output_files(self):
        return [self.writer.path, self.writer.tmp] if self.writer is not None else []

    def report(self):
        w = self.writer
        if w is None:
            return None
        return {"path": str(w.path), "frames": w.frames, "bytes": w.bytes,
                "codebook_updates": w.codebook_updates, "complete": w.complete,
                "latency_frames": self.latency, "events_not_stored": w.skipped_events}


class IndexSourceConfig(NodeConfig):
    use: Literal["index-source"]
    path: str = Field(min_length=1, description="streamq index file (written by an index-sink); "
                                                 "relative paths are taken from the graph "
                                                 "file's folder")


@register
class IndexSource(SourceNode):
    """Plays back a streamq index file: indices and codebook updates, as the encoder sent them."""

    kind = "index-source"
    Config = IndexSourceConfig
    role = "source"

    def __init__(self, node_id, config):
        super().__init__(node_id, config)
        self.reader: IndexReader | None = None
        self.path: Path | None = None

    def natural_rate(self, graph) -> int | None:
        p = input_path(self.config.path, graph.source)
        try:
            with IndexReader(p) as r:
                return r.spec.rate
        except Exception:
            return None

    def open(self, specs, ctx: RunContext) -> StreamSpec:
        self.path = ctx.resolve_input(self.config.path)
        try:
            reader = IndexReader(self.path)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        spec = reader.spec
        if spec.rate != ctx.sample_rate:
            reader.close()
            raise self.fail("path", f"{self.path} holds a {spec.rate} Hz stream but the graph "
                                    f"runs at {ctx.sample_rate} Hz (set graph.sample_rate = "
                                    f"{spec.rate})")
        self.reader = reader
        self.length = reader.total_frames
        if spec.frames != reader.total_frames:
            # an interrupted or live recording: the file's own length wins
            spec = StreamSpec(spec.kind, spec.rate, spec.channels, spec.latency, spec.int_bits,
                              reader.total_frames, spec.extra)
        return spec

    def step(self, frames, inputs):
        start = self.reader.position
        try:
            packet = self.reader.read(frames)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        got = 0 if packet is None else packet.frames
        if got != frames:
            raise self.fail("path", f"{self.path}: asked for samples {start}..{start + frames} "
                                    f"but the file holds {self.reader.total_frames} frames")
        return packet

    def close(self, complete):
        if self.reader is not None:
            self.reader.close()

    def report(self):
        r = self.reader
        if r is None:
            return None
        return {"path": str(self.path), "frames_read": r.position, "frames": r.total_frames,
                "codebook_updates": r.codebook_updates, "file_complete": r.complete}

    def get_state(self):
        return {"position": 0 if self.reader is None else self.reader.position}

    def set_state(self, state):
        pos = int(state["position"])
        if self.reader is None:
            return
        if pos < self.reader.position:
            self.reader.close()
            self.reader = IndexReader(self.path)
        try:
            self.reader.skip(pos - self.reader.position)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None


__all__ = ["IndexSink", "IndexSource"]
