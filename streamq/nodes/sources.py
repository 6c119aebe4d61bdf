"""Source nodes: audio files and invented test scenes."""

from __future__ import annotations

from pathlib import Path
from typing import Literal

import numpy as np
from pydantic import Field, field_validator

from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
from streamq.engine.node import NodeConfig, RunContext, SourceNode, input_path
from streamq.engine.registry import register
from streamq.nodes import scenes
from streamq.engine.audiofile import far_beyond_full_scale, open_for_reading, subtype_bits


class FileSourceConfig(NodeConfig):
    use: Literal["file-source"]
    path: str = Field(min_length=1, description="audio file (any format libsndfile reads)")
    channels: list[int] | None = Field(
        None, description="channels to keep, numbered from 1 (default: all)")
    nonfinite: Literal["refuse", "zero"] = Field(
        "refuse", description="NaN/Inf samples: refuse (stop with an error) or replace with 0 and count")

    @field_validator("channels")
    @classmethod
    def _positive(cls, v):
        if v is not None:
            if not v:
                raise ValueError("give at least one channel")
            if any(c < 1 for c in v):
                raise ValueError("channels are numbered from 1")
        return v


@register
class FileSource(SourceNode):
    """Reads an audio file (WAV, FLAC, OGG, AIFF, ... anything libsndfile reads)."""

    kind = "file-source"
    Config = FileSourceConfig
    role = "source"

    def __init__(self, node_id, config):
        super().__init__(node_id, config)
        self._file = None
        self.path: Path | None = None
        self.position = 0
        self.replaced = 0

    def natural_rate(self, graph) -> int | None:
        import soundfile as sf
        p = input_path(self.config.path, graph.source)
        try:
            return sf.info(str(p)).samplerate
        except Exception:
            return None

    def _open_checked(self, path: Path, rate: int):
        """Open ``path`` for reading; refuse it (one line naming node and field) when
        it is missing or unreadable, not at ``rate`` Hz, or lacks a picked channel."""
        f, info = open_for_reading(path, lambda m: self.fail("path", m))
        if info.samplerate != rate:
            f.close()
            raise self.fail("path", f"{path} is {info.samplerate} Hz but the graph runs at "
                                    f"{rate} Hz; streamq does not resample (convert "
                                    f"the file, or set graph.sample_rate = {info.samplerate})")
        picks = self.config.channels
        if picks is not None and max(picks) > info.channels:
            f.close()
            raise self.fail("channels", f"{path} has {info.channels} channel(s); "
                                        f"cannot pick channel {max(picks)}")
        return f, info

    def precheck(self, graph_file, sample_rate) -> list[str]:
        def check():
            f, _ = self._open_checked(input_path(self.config.path, graph_file), sample_rate)
            f.close()
        return self.problems_of(check)

    def open(self, specs, ctx: RunContext) -> StreamSpec:
        self.path = ctx.resolve_input(self.config.path)
        f, info = self._open_checked(self.path, ctx.sample_rate)
        picks = self.config.channels
        self._file = f
        self.floats = subtype_bits(info.subtype) is None  # integer PCM cannot exceed full scale
        self._pick = None if picks is None else np.asarray(picks) - 1
        self.length = info.frames
        nch = info.channels if picks is None else len(picks)
        return StreamSpec("signal", ctx.sample_rate, nch, 0, subtype_bits(info.subtype),
                          info.frames, {"path": str(self.path), "subtype": info.subtype})

    def step(self, frames, inputs) -> Packet:
        try:
            data = self._file.read(frames, dtype="float64", always_2d=True)
        except (RuntimeError, OSError) as exc:  # soundfile.LibsndfileError is a RuntimeError
            raise self.fail("path", f"{self.path}: cannot read past sample {self.position} "
                                    f"({str(exc).strip() or type(exc).__name__}); is the file "
                                    f"damaged or cut short?") from None
        if data.shape[0] < frames:
            raise self.fail("path", f"{self.path}: file ended early at sample "
                                    f"{self.position + data.shape[0]} (expected {self.length}); "
                                    f"was it truncated or changed during the run?")
        if self._pick is not None:
            data = np.ascontiguousarray(data[:, self._pick])
        bad = ~np.isfinite(data)
        if bad.any():
            first = self.position + int(np.argwhere(bad)[0][0])
            if self.config.nonfinite == "refuse":
                raise self.fail("path", f"{self.path}: NaN or infinite sample at sample {first} "
                                        f"(set nonfinite = \"zero\" to replace such samples with 0)")
            self.replaced += int(bad.sum())
            data = np.where(bad, 0.0, data)
        if self.floats:
            problem = far_beyond_full_scale(data, self.position, self.path)
            if problem:
                raise self.fail("path", problem)
        block = SignalBlock(data, self.position, self.spec.rate)
        self.position += frames
        return Packet(block)

    def close(self, complete):
        if self._file is not None:
            self._file.close()
            self._file = None

    def report(self):
        return {"path": str(self.path), "frames_read": self.position, "nonfinite_replaced": self.replaced}

    def get_state(self):
        return {"position": self.position, "replaced": self.replaced}

    def set_state(self, state):
        self.position = int(state["position"])
        self.replaced = int(state.get("replaced", 0))
        if self._file is not None:
            self._file.seek(self.position)


class SceneSignalConfig(NodeConfig):
    use: Literal["test-signal"]
    scene: Literal["tone", "noise", "drift"] = Field(
        "drift", description="tone; noise (amplitude PDF set by `pdf`); drift (room tone, then "
                             "speech-like bursts, then dense loud band material)")
    seconds: float = Field(10.0, gt=0, le=86_400, description="length in seconds")
    channels: int = Field(1, ge=1, le=64, description="channel count (channels differ slightly)")
    seed: int = Field(1, ge=0, description="random seed; same seed, same samples")
    pdf: Literal["gaussian", "laplacian", "uniform"] = Field(
        "gaussian", description="amplitude PDF of the noise scene")
    level: float = Field(-20.0, le=0, description="dBFS: RMS level for noise, peak level for tone")
    frequency: float = Field(1000.0, gt=0, description="Hz, for the tone scene")
    bits: Literal[16, 24] | None = Field(
        None, description="round samples to this PCM word length (default: keep float64)")


@register
class SceneSignal(SourceNode):
    """Invented test material: tones, noise with a chosen amplitude PDF, or a drifting program."""

    kind = "test-signal"
    Config = SceneSignalConfig
    role = "source"

    def __init__(self, node_id, config):
        super().__init__(node_id, config)
        self.position = 0

    def _check_rate(self, rate: int) -> None:
        """Refuse settings that do not fit the sample rate ``rate``."""
        c = self.config
        if round(c.seconds * rate) < 1:
            raise self.fail("seconds", f"{c.seconds:g} s rounds to 0 samples at {rate} Hz "
                                       f"(one sample lasts {1 / rate:.3g} s)")
        if c.scene == "tone" and c.frequency >= rate / 2:
            raise self.fail("frequency", f"{c.frequency} Hz is at or above half the sample rate "
                                         f"({rate / 2:g} Hz)")

    def precheck(self, graph_file, sample_rate) -> list[str]:
        return self.problems_of(self._check_rate, sample_rate)

    def open(self, specs, ctx) -> StreamSpec:
        c = self.config
        self.length = int(round(c.seconds * ctx.sample_rate))
        self._check_rate(ctx.sample_rate)
        return StreamSpec("signal", ctx.sample_rate, c.channels, 0, c.bits, self.length,
                          {"scene": c.scene})

    def step(self, frames, inputs) -> Packet:
        c = self.config
        start, stop = self.position, self.position + frames
        data = np.empty((frames, c.channels))
        for ch in range(c.channels):
            data[:, ch] = scenes.render(c.scene, seed=c.seed, channel=ch, start=start, stop=stop,
                                        rate=self.spec.rate, total=self.length,
                                        frequency=c.frequency, level_dbfs=c.level, pdf=c.pdf)
        if c.bits:
            scale = float(2 ** (c.bits - 1))
            data = np.clip(np.round(data * scale), -scale, scale - 1) / scale
        self.position = stop
        return Packet(SignalBlock(data, start, self.spec.rate))

    def get_state(self):
        return {"position": self.position}

    def set_state(self, state):
        self.position = int(state["position"])
