"""Live device nodes: ``live-input`` (a sound card or audio server input) and
``live-output`` (a monitor output). The live runner opens one PortAudio
stream for both and feeds/drains them from its callback; these nodes only
hold the block and do O(block) vectorised work."""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from streamq.decibels import amplitude_from_db
from streamq.engine.blocks import Packet, SignalBlock, StreamSpec
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig, SourceNode
from streamq.engine.registry import register


class LiveInputConfig(NodeConfig):
    use: Literal["live-input"]
    device: str | int | None = Field(None, description="device name (or part of it) or index; "
                                                       "default: the system's default input")
    channels: int = Field(1, ge=1, le=64, description="input channels")
    nonfinite: Literal["refuse", "zero"] = Field(
        "refuse", description="NaN or infinite samples from the host (streamq.Chain, the JACK "
                              "and GStreamer hosts): refuse the block, or replace them with "
                              "0 (a PortAudio device's samples go in as they come)")
    connect: list[str] = Field(
        [], description="host = \"jack\": ports to take each channel from when the run starts, "
                        "in channel order (e.g. [\"system:capture_1\"]); our own input ports are "
                        "<node id>_1, <node id>_2 ...")

    @model_validator(mode="after")
    def _check_connect(self):
        if len(self.connect) > self.channels:
            raise ValueError(f"connect: {len(self.connect)} ports for {self.channels} channel(s)")
        if any(not p.strip() for p in self.connect):
            raise ValueError("connect: a port name is empty")
        return self


@register
class LiveInput(SourceNode):
    """Audio from a live input device (through PortAudio)."""

    kind = "live-input"
    Config = LiveInputConfig
    role = "source"
    live_only = True

    def open(self, specs, ctx) -> StreamSpec:
        self.length = None
        self.position = 0
        self.block: np.ndarray | None = None
        return StreamSpec("signal", ctx.sample_rate, self.config.channels, 0, None, None,
                          {"device": self.config.device})

    def feed(self, data: np.ndarray) -> None:
        """Called by the live runner with the device's block (float32)."""
        self.block = data.astype(np.float64)

    def step(self, frames, inputs) -> Packet:
        block = SignalBlock(self.block, self.position, self.spec.rate)
        self.position += frames
        return Packet(block)


class LiveOutputConfig(NodeConfig):
    use: Literal["live-output"]
    input: str = Field(description="signal to monitor (e.g. a decoder)")
    reference: str | None = Field(None, description="original signal; needed by monitor = \"noise\"")
    monitor: Literal["input", "noise"] = Field(
        "input", description="what to hear: the input, or the noise alone (input - reference)")
    gain_db: float = Field(-20.0, le=0, description="monitor gain once faded in (dB)")
    makeup_db: float = Field(0.0, ge=0, le=40, description="extra gain for the quiet noise monitor")
    fade_in: Duration = Field(Duration(2, "s"), description="the output starts 40 dB down and "
                                                            "ramps to gain_db over this time")
    limit_dbfs: float = Field(-1.0, le=-1.0, ge=-60.0, description="peak ceiling of the output")
    device: str | int | None = Field(None, description="device name or index; default: system default")
    connect: list[str] = Field(
        [], description="host = \"jack\": ports to send each channel to when the run starts, "
                        "in channel order (e.g. [\"system:playback_1\"]); our own output ports "
                        "are <node id>_1, <node id>_2 ...")

    @model_validator(mode="after")
    def _check(self):
        if any(not p.strip() for p in self.connect):
            raise ValueError("connect: a port name is empty")
        if self.monitor == "noise" and self.reference is None:
            raise ValueError("reference: monitor = \"noise\" needs this field (the original signal)")
        return self


@register
class LiveOutput(Node):
    """Monitor output to a live device: starts quiet, ramps gain changes, limits peaks."""

    kind = "live-output"
    Config = LiveOutputConfig
    inputs = ("input", "reference")
    optional_inputs = ("reference",)
    role = "sink"
    live_only = True
    START_DB = -40.0

    def open(self, specs, ctx):
        spec = specs["input"]
        if spec.kind != "signal":
            raise self.fail("input", f"node '{self.config.input}' gives indices; decode them first")
        self.C = spec.channels
        self.delay = None
        if self.config.monitor == "noise":
            ref = specs["reference"]
            if ref.channels != self.C:
                raise self.fail("reference", f"{ref.channels} channel(s) against {self.C}")
            d = spec.latency - ref.latency
            if d < 0:
                raise self.fail("reference", "the reference is later than the input; swap them")
            self.delay = DelayLine(d, self.C)
        self.rate = spec.rate
        # start quiet whatever the make-up gain: -40 dB at most, then ramp up
        self.gain = amplitude_from_db(min(self.START_DB,
                                          self.config.gain_db + self.config.makeup_db))
        self.target = amplitude_from_db(self.config.gain_db + self.config.makeup_db)
        # ramp speed: the fade-in's 40 dB (or less) in `fade_in`; later changes use the same rate
        fade = max(1, self.config.fade_in.samples(self.rate))
        self.db_per_sample = 40.0 / fade
        self.ceiling = amplitude_from_db(self.config.limit_dbfs)
        self.limit_gain = 1.0
        self.release = 10.0 ** (1.0 / self.rate)  # limiter recovery: 20 dB per second
        self.limited_blocks = 0
        self.peak_out = 0.0
        self.block: np.ndarray | None = None
        self.no_ref = np.empty((0, self.C))
        from streamq.design.kernels import monitor_block, warm_up
        warm_up()          # compiled now, not in the audio callback
        self.kernel = monitor_block
        return None

    def set_gain(self, gain_db: float) -> None:
        """Ask for a new monitor gain; it is reached by a ramp, never a jump."""
        self.target = amplitude_from_db(min(gain_db, 0.0) + self.config.makeup_db)

    def step(self, frames, inputs):
        x = inputs["input"].block.data
        ref = self.no_ref
        if self.delay is not None:
            ref = self.delay.push(inputs["reference"].block.data)
        g0 = g1 = 20.0 * math.log10(self.gain)
        if self.gain != self.target:   # ramp in dB at db_per_sample, linear across the block
            most = self.db_per_sample * frames
            to = 20.0 * math.log10(self.target)
            if abs(to - g0) <= most:
                g1, self.gain = to, self.target
            else:
                g1 = g0 + (most if to > g0 else -most)
                self.gain = 10.0 ** (g1 / 20.0)
        y = np.empty((frames, self.C))     # (the host copies it where it goes)
        # limiter: instant attack per block, release at `release`, hard ceiling last
        new, peak, top = self.kernel(x, ref, g0, g1, self.limit_gain, self.release ** frames,
                                     self.ceiling, y)
        if new < 1.0:
            self.limited_blocks += 1
        self.limit_gain = new
        if top > self.peak_out:
            self.peak_out = top
        self.block = y
        return None

    def report(self):
        return {"monitor": self.config.monitor, "peak_dbfs": 20 * np.log10(self.peak_out)
                if self.peak_out > 0 else None, "limited_blocks": self.limited_blocks,
                "gain_db": 20 * np.log10(self.gain)}
