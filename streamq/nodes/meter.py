"""The ``error-meter`` node: how far a decoded signal is from its reference.

Everything is accumulated on fixed frames counted in samples from the first
measured sample (segmental-SNR frames, series windows, spectrum frames), and
frame results are added in frame order, so the figures are bit-identical
whatever the block size (DESIGN.md rule 1). The reference is delayed by the
difference of the two streams' declared latencies before comparing.

The node cuts each block at its codebook changes and hands the pieces to its
parts (``streamq.nodes.metering``): frame sums, spectrum, rates and codebook
pictures, each with its own state.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from streamq.engine.audiofile import unwritable
from streamq.engine.blocks import CodebookUpdate, StreamSpec
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register
from streamq.nodes.metering.pictures import Pictures
from streamq.nodes.metering.rates import Rates
from streamq.nodes.metering.series import Series, write_series_csv

__all__ = ["ErrorMeter", "MeterConfig", "Series", "write_series_csv"]


class MeterConfig(NodeConfig):
    use: Literal["error-meter"]
    reference: str = Field(description="the original signal")
    input: str = Field(description="the signal to measure against it (e.g. a decoder)")
    frame: Duration = Field(Duration(20, "ms"), description="segmental SNR frame length")
    clamp: tuple[float, float] = Field((-10.0, 35.0), description="per-frame SNR clamp, dB "
                                                                  "(segmental SNR)")
    series: Duration = Field(Duration(100, "ms"), description="time-series row length "
                                                              "(rounded to whole frames)")
    spectrum_size: int = Field(2048, ge=64, le=65_536, description="Welch segment length, samples "
                                                                   "(periodic Hann window, no overlap)")


@register
class ErrorMeter(Node):
    """Measures SNR, segmental SNR, noise split, bit rates and spectra of a decoded signal."""

    kind = "error-meter"
    Config = MeterConfig
    inputs = ("reference", "input")
    role = "meter"
    runs_behind = True

    def open(self, specs, ctx) -> StreamSpec | None:
        # the compiled parts load numba: only when a meter opens
        from streamq.nodes.metering import frames, spectrum
        ref, inp = specs["reference"], specs["input"]
        for fld, sp in (("reference", ref), ("input", inp)):
            if sp.kind != "signal":
                raise self.fail(fld, f"node '{getattr(self.config, fld)}' gives indices; meter a "
                                     f"decoder's output")
        if ref.channels != inp.channels:
            raise self.fail("input", f"{inp.channels} channel(s) against a reference of "
                                     f"{ref.channels}")
        self.delay = inp.latency - ref.latency
        if self.delay < 0:
            raise self.fail("reference", "the reference is later than the input; swap them")
        self.channels = inp.channels
        self.rate = inp.rate
        lo, hi = self.config.clamp
        if not lo < hi:
            raise self.fail("clamp", "give [low, high] with low < high")
        frame = max(1, self.config.frame.samples(self.rate))
        if frame > 60 * self.rate:  # a frame is buffered whole
            raise self.fail("frame", f"{self.config.frame!r} is longer than a minute; segmental "
                                     f"SNR frames are usually 10 to 30 ms")
        row_frames = max(1, round(self.config.series.samples(self.rate) / frame))
        self.out_dir = ctx.out_dir
        self.csv_written: list[str] | None = None   # CSV names written by close()
        self.refdelay = DelayLine(self.delay, self.channels)
        self.t = 0          # output frames seen
        self.m = 0          # measured samples (after the latency pre-roll)
        self.frame_sums = frames.FrameSums(self.channels, frame, row_frames, self.rate,
                                           self.config.clamp, self.delay)
        self.spectrum = spectrum.Spectrum(self.channels, self.config.spectrum_size, self.rate)
        self.rates = Rates(self.channels, int(inp.extra.get("n_levels", 0)) or None)
        self.pictures = Pictures(self.delay, inp.frames)
        self.live = bool(ctx.live and ctx.background is not None)
        if ctx.live:        # compiled now, not while the stream runs
            frames.warm_up()
            spectrum.warm_up()
        return None

    def _apply(self, u: CodebookUpdate) -> None:
        self.rates.apply(u)
        self.pictures.start(u)
        self.frame_sums.count_update(u.at_sample, u.side_info_bits)

    # -- one step --------------------------------------------------------------
    def step(self, frames, inputs) -> None:
        ref = np.ascontiguousarray(self.refdelay.push(inputs["reference"].block.data))
        pkt = inputs["input"]
        x = np.ascontiguousarray(pkt.block.data)
        s = pkt.block.start
        rates = self.rates.state
        updates = [u for u in pkt.events if isinstance(u, CodebookUpdate)]
        if pkt.indices is not None:
            idx = np.ascontiguousarray(pkt.indices.data)
            self.rates.fit(idx)
        else:
            idx = np.zeros((0, self.channels), dtype=np.uint8)
        skip = min(frames, max(0, self.delay - s))   # latency pre-roll: nothing to compare yet
        n = frames - skip
        if n:
            self.pictures.keep_tail(ref[skip:, 0])
        # per-frame sums of the frames this block finishes, and the version in
        # force at each frame's last sample (channel 0), made segment by segment
        sums, vers = self.frame_sums.buffers(n)
        k, top = 0, 0.0
        if updates:
            updates.sort(key=lambda u: u.at_sample)
            cuts = sorted({u.at_sample - s for u in updates} | {0, frames})
        else:
            cuts = (0, frames)
        ui = 0
        for a, b in zip(cuts[:-1], cuts[1:]):
            while ui < len(updates) and updates[ui].at_sample - s <= a:
                self._apply(updates[ui])
                ui += 1
            a2 = max(a, skip)
            if a2 >= b:
                continue
            rr = ref[a2:b]
            ver = -1.0 if rates.version[0] is None else float(rates.version[0])
            k, top = self.frame_sums.cut(rr, x[a2:b], rates.bounds, ver,
                                     idx[a2:b] if idx.shape[0] else idx, rates.counting,
                                     rates.counts, sums, vers, k, top)
            self.pictures.add(rr[:, 0], s + a2, s + b, self.m + b - skip)
        while ui < len(updates):
            self._apply(updates[ui])
            ui += 1
        self.rates.add_spans()
        self.t = s + frames
        if n == 0:
            return None
        fs = self.frame_sums.state
        fs.peak = max(fs.peak, float(top))
        self.m += n
        segs = self.spectrum.segments(ref[skip:], x[skip:])
        # live runs: frame statistics and spectra are summed on the worker, in order
        run = self.ctx.background if self.live else (lambda f, *a: f(*a))
        if sums.shape[0]:
            run(self.frame_sums.add, sums, vers)
        if segs.shape[1]:
            run(self.spectrum.add, segs)
        return None

    # -- the end -----------------------------------------------------------------
    def finish(self) -> None:
        self.frame_sums.finish()

    def close(self, complete: bool) -> None:
        if not complete and self.frame_sums.unfinished():
            self.frame_sums.finish()
        self.rates.close()
        self.pictures.close(self.t)
        self._write_files()

    def _write_files(self) -> None:
        """The time series and the spectrum as CSV files, each written whole under
        a temporary name and then renamed (a full disk leaves nothing partial)."""
        self.csv_written = []
        if self.out_dir is None:     # an in-process chain without an output folder
            return
        path = self.out_dir / f"{self.id}-series.csv"
        try:
            write_series_csv(path, self.frame_sums.state.rows)
            self.csv_written.append(path.name)
            if self.spectrum.state.frames:
                path = self.out_dir / f"{self.id}-spectrum.csv"
                self.spectrum.write_csv(path)
                self.csv_written.append(path.name)
        except OSError as exc:
            raise self.fail(None, unwritable(path, exc)) from None

    def _written(self, name: str) -> str | None:
        return name if self.csv_written is None or name in self.csv_written else None

    def live_stats(self) -> dict:
        """Running figures for the live terminal meter (read from another thread:
        only plain attribute reads)."""
        rows = self.frame_sums.state.rows
        n = len(rows)
        last = rows.row(n - 1) if n else {}
        fixed = self.rates.fixed_bits()
        side = self.rates.side_per_sample(self.t)
        rates = self.rates.state
        return {"snr_db": self.frame_sums.snr_db(), "segsnr_db": self.frame_sums.segsnr_db(),
                "recent_snr_db": last.get("snr_db"), "recent_segsnr_db": last.get("segsnr_db"),
                "bits_per_sample": None if fixed is None else fixed + side,
                "side_info_bits_per_sample": side, "codebook_version": rates.version[0],
                "codebook_updates": rates.updates, "seconds": self.m / self.rate}

    def get_state(self) -> dict:
        """Everything the meter accumulates while it runs, each part's state a
        copy (the rest is set up by ``open`` from the configuration and the
        input streams)."""
        return {"t": self.t, "m": self.m, "refdelay": self.refdelay.get_state(),
                "frames": self.frame_sums.get_state(), "spectrum": self.spectrum.get_state(),
                "rates": self.rates.get_state(), "pictures": self.pictures.get_state()}

    def set_state(self, st: dict) -> None:
        self.t, self.m = st["t"], st["m"]
        self.refdelay.set_state(st["refdelay"])
        self.frame_sums.set_state(st["frames"])
        self.spectrum.set_state(st["spectrum"])
        self.rates.set_state(st["rates"])
        self.pictures.set_state(st["pictures"])

    def report(self):
        C, fs = self.channels, self.frame_sums.state
        sig, noi = float(fs.sig.sum()), float(fs.noi.sum())
        m = self.m
        return {
            "snr_db": self.frame_sums.snr_db(),
            "segsnr_db": self.frame_sums.segsnr_db(),
            "samples": m,
            "frames": self.t,
            "channels": C,
            "latency_frames": self.delay,
            "signal_power": sig / (m * C) if m else None,
            "noise_power": noi / (m * C) if m else None,
            "granular_noise_power": (noi - float(fs.ovn.sum())) / (m * C) if m else None,
            "overload_noise_power": float(fs.ovn.sum()) / (m * C) if m else None,
            "overload_samples": int(fs.ovc.sum()),
            "peak_abs_error": fs.peak,
            "codebook_updates": self.rates.state.updates,
            "per_channel": [{"snr_db": self.frame_sums.snr_db(ch),
                             "segsnr_db": self.frame_sums.segsnr_db(ch)} for ch in range(C)],
            # (None when the file could not be written: a live run goes on to its report)
            "series_csv": self._written(f"{self.id}-series.csv"),
            "spectrum_csv": (self._written(f"{self.id}-spectrum.csv")
                             if self.spectrum.state.frames else None),
            "codebooks": self.pictures.report(),
            **self.rates.report(self.t),
        }
