"""Sink nodes: audio files."""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field

from streamq.engine.audiofile import SafeWriter, format_for
from streamq.engine.background import BackgroundWriter
from streamq.engine.node import Node, NodeConfig
from streamq.engine.registry import register
from streamq.errors import StreamqError

#: blocks an offline file-sink may hold for its writing thread (memory bound)
OFFLINE_QUEUE = 4


class FileSinkConfig(NodeConfig):
    use: Literal["file-sink"]
    input: str = Field(description="node whose signal is written")
    path: str = Field(min_length=1, description="output file; relative paths land in the run's "
                                                 "output folder; format from the extension")
    subtype: str | None = Field(None, description="libsndfile subtype (PCM_16, PCM_24, FLOAT, "
                                                  "DOUBLE, ...); default: the format's usual one")


@register
class FileSink(Node):
    """Writes a signal to an audio file (any format libsndfile writes), safely."""

    kind = "file-sink"
    Config = FileSinkConfig
    inputs = ("input",)
    role = "sink"

    def __init__(self, node_id, config):
        super().__init__(node_id, config)
        self.writer: SafeWriter | None = None
        self.latency = 0

    def _check_format(self, path) -> None:
        """Refuse an output format libsndfile cannot write: an unknown extension
        (field 'path') or a subtype the format lacks (field 'subtype')."""
        import soundfile as sf
        try:
            fmt = format_for(Path(path))
        except ValueError as exc:
            raise self.fail("path", str(exc)) from None
        subtype = self.config.subtype
        if subtype is not None and not sf.check_format(fmt, subtype):
            raise self.fail("subtype", f"{path}: subtype {subtype} is not available for {fmt} "
                                       f"files (available: {', '.join(sf.available_subtypes(fmt))})")

    def precheck(self, graph_file, sample_rate) -> list[str]:
        return self.problems_of(self._check_format, self.config.path)

    def open(self, specs, ctx):
        spec = specs["input"]
        if spec.kind != "signal":
            raise self.fail("input", f"node '{self.config.input}' gives quantizer indices; "
                                     f"put a decoder before a file-sink (or use an index-sink)")
        try:
            path = ctx.resolve_path(self.config.path)
        except StreamqError as exc:
            raise self.fail("path", str(exc)) from None
        self._check_format(path)
        self.latency = spec.latency
        self.writer = SafeWriter(path, spec.rate, spec.channels, self.config.subtype,
                                 lambda m: self.fail("path", m))
        # a thread writes: live, the audio callback only queues a copy; offline,
        # the disk works while the chain computes the next block
        self.background = BackgroundWriter(self.writer.write,
                                           limit=None if ctx.live else OFFLINE_QUEUE)
        return None

    def step(self, frames, inputs):
        data = inputs["input"].block.data
        if self.background is not None:
            self.background.put(data.copy())
        else:
            self.writer.write(data)
        return None

    def close(self, complete):
        if getattr(self, "background", None) is not None:
            try:
                self.background.close()
            finally:
                self.background = None
        if self.writer is not None:
            if complete or self.writer.frames:
                self.writer.close()
            else:
                # Nothing was written (`streamq check`, a failed build, a stop
                # before the first step): leave no file, and do not replace
                # one that is already there with an empty one.
                self.writer.discard()

    def checkpoint(self):
        if self.background is not None:
            self.background.drain()
        return self.writer.checkpoint()

    def resume(self, state, earlier=None):
        if earlier is None:
            raise self.fail("path", f"{self.writer.path}: the interrupted run's file is gone; "
                                    f"run again without --resume")
        self.writer.resume(state, earlier)

    def output_files(self):
        return [self.writer.path, self.writer.tmp] if self.writer is not None else []

    def report(self):
        if self.writer is None:
            return None
        return {"path": str(self.writer.path), "frames": self.writer.frames,
                "subtype": self.writer.subtype, "clipped_samples": self.writer.clipped,
                "latency_frames": self.latency}
