"""The ``error-meter`` node: how far a decoded signal is from its reference.

Everything is accumulated on fixed frames counted in samples from the first
measured sample (segmental-SNR frames, series windows, spectrum frames), and
frame results are added in frame order, so the figures are bit-identical
whatever the block size (DESIGN.md rule 1). The reference is delayed by the
difference of the two streams' declared latencies before comparing.
"""

from __future__ import annotations

import copy

import csv
import math
from array import array
from typing import Literal

import numpy as np
from pydantic import Field

from streamq.engine.audiofile import replacing, unwritable
from streamq.engine.blocks import CodebookUpdate, StreamSpec
from streamq.engine.delay import DelayLine
from streamq.engine.node import Duration, Node, NodeConfig
from streamq.engine.registry import register


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


SERIES_COLUMNS = ("time_s", "samples", "snr_db", "segsnr_db", "signal_dbfs", "noise_dbfs",
                  "overload_fraction", "codebook_updates", "side_info_bits", "codebook_version")
_WHOLE = frozenset({"samples", "codebook_updates", "side_info_bits", "codebook_version"})


class Series:
    """A time series (one row per window or hop), kept as columns of floats:
    hours of audio make tens of thousands of rows, which as dicts of Python
    numbers would cost a kilobyte each. None is kept as NaN.

    Parameters
    ----------
    columns : sequence of str
        Column names, in CSV order (default: the meter's series).
    whole : set of str
        Columns that hold whole numbers (given back as int).
    """

    def __init__(self, columns=SERIES_COLUMNS, whole=_WHOLE):
        self.columns = tuple(columns)
        self.whole = frozenset(whole)
        self.cols = {c: array("d") for c in self.columns}
        self.n = 0

    def append(self, row: dict) -> None:
        for c in self.columns:
            v = row.get(c)
            self.cols[c].append(math.nan if v is None else v)
        self.n += 1      # last: a reader on another thread sees whole rows only

    def row(self, i: int) -> dict:
        out = {}
        for c in self.columns:
            v = self.cols[c][i]
            out[c] = None if v != v else (int(v) if c in self.whole else v)
        return out

    def __len__(self) -> int:
        return self.n

    def __iter__(self):
        return (self.row(i) for i in range(self.n))


def write_series_csv(path, series: Series) -> None:
    """Write a :class:`Series` as CSV: a header of its columns, then one line
    per row; floats with 6 significant digits, whole numbers as integers,
    None as an empty field.

    Parameters
    ----------
    path : str or Path
        The file to write. It is written whole under a temporary name, then
        renamed (:func:`streamq.engine.audiofile.replacing`): an older file
        under that name stays until the new one is complete.
    series : Series
        The rows.

    Raises
    ------
    OSError
        Left to the caller, which turns it into a one-line error naming the
        node and the file.
    """
    with replacing(path, newline="") as f:
        w = csv.DictWriter(f, fieldnames=series.columns)
        w.writeheader()
        for row in series:
            w.writerow({k: ("" if v is None else (f"{v:.6g}" if isinstance(v, float) else v))
                        for k, v in row.items()})


def _seq_sum(acc: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """acc + rows[0] + rows[1] + ..., added strictly in order (block-size proof)."""
    if rows.shape[0] == 0:
        return acc
    if acc.size < 64:       # a few columns: one cumsum
        return np.cumsum(np.concatenate([acc[None], rows]), axis=0)[-1]
    out = acc.copy()        # long rows (spectra): row by row, far faster than a cumsum
    for row in rows:        # along the outer axis, and the same additions
        out += row
    return out


def _db(num: float, den: float) -> float | None:
    if den <= 0:
        return math.inf if num > 0 else None
    if num <= 0:
        return -math.inf
    return 10.0 * math.log10(num / den)


@register
class ErrorMeter(Node):
    """Measures SNR, segmental SNR, noise split, bit rates and spectra of a decoded signal."""

    kind = "error-meter"
    Config = MeterConfig
    inputs = ("reference", "input")
    role = "meter"
    runs_behind = True

    def open(self, specs, ctx) -> StreamSpec | None:
        ref, inp = specs["reference"], specs["input"]
        for fld, sp in (("reference", ref), ("input", inp)):
            if sp.kind != "signal":
                raise self.fail(fld, f"node '{getattr(self.config, fld)}' gives indices; meter a "
                                     f"decoder's output")
        if ref.channels != inp.channels:
            raise self.fail("input", f"{inp.channels} channel(s) against a reference of "
                                     f"{ref.channels}")
        self.d = inp.latency - ref.latency
        if self.d < 0:
            raise self.fail("reference", "the reference is later than the input; swap them")
        self.C = inp.channels
        self.rate = inp.rate
        lo, hi = self.config.clamp
        if not lo < hi:
            raise self.fail("clamp", "give [low, high] with low < high")
        self.F = max(1, self.config.frame.samples(self.rate))
        if self.F > 60 * self.rate:  # a frame is buffered whole
            raise self.fail("frame", f"{self.config.frame!r} is longer than a minute; segmental "
                                     f"SNR frames are usually 10 to 30 ms")
        self.S = max(1, round(self.config.series.samples(self.rate) / self.F))
        self.N = self.config.spectrum_size
        self.total_frames = inp.frames
        self.L = int(inp.extra.get("n_levels", 0)) or None
        self.out_dir = ctx.out_dir
        self.csv_written: list[str] | None = None   # CSV names written by close()
        C = self.C
        self.refdelay = DelayLine(self.d, C)
        self.t = 0          # output frames seen
        self.m = 0          # measured samples (after the latency pre-roll)
        z = np.zeros(C)
        self.sig, self.noi, self.ovn, self.ovc = z.copy(), z.copy(), z.copy(), z.copy()
        self.seg_sum, self.seg_n = z.copy(), z.copy()
        self.peak = 0.0
        # the unfinished frame's rows: reference, error, overload flag per channel
        # and channel 0's codebook version (see kernels.meter_rows)
        self.pend = np.empty((self.F, 3 * C + 1))
        self.fill = 0
        # series
        self.rows = Series()
        self.win = {"sig": 0.0, "noi": 0.0, "ovc": 0.0, "seg": 0.0, "segn": 0, "frames": 0}
        self.win_events: dict[int, list[int]] = {}
        # spectra
        # periodic ("DFT-even") Hann window, as scipy.signal.welch's window="hann"
        self.spec_win = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(self.N) / self.N)
        self.spec_part = np.empty((2 * C, self.N))   # the unfinished segment, windowed
        self.spec_pos = 0
        self.spec_acc = np.zeros((2, self.N // 2 + 1))
        self.spec_frames = 0
        # codebooks in force (output time) and what they cost
        self.bounds = np.tile(np.array([-np.inf, np.inf]), (C, 1))
        self.version = [None] * C
        self.side_bits = 0
        self.updates = 0
        self.levels_seen: int | None = self.L
        # index counts per channel since its last codebook change (grown as needed)
        self.ent_counts = np.zeros((C, self.L or 0), dtype=np.int64)
        self.counting = np.zeros(C, dtype=np.bool_)   # channels with a codebook
        self.ent_acc = z.copy()
        self.ent_n = z.copy()
        self.spans: list[int] = []                 # channels of the finished count spans
        self.span_counts: list[np.ndarray] = []    # and their counts (see _add_spans)
        # codebook pictures for the report: first, middle, last (channel 0)
        self.picks: dict[str, dict] = {}
        self.cur_pick: dict | None = None
        self.tail = np.zeros(1 << 19)   # about 11 s at 48 kHz
        self.tail_n = 0
        self.live = bool(ctx.live and ctx.background is not None)
        if ctx.live:        # compiled now, not while the stream runs
            from streamq.design.kernels import warm_up
            warm_up()
        return None

    # -- codebooks -------------------------------------------------------------
    def _end_span(self, ch: int) -> None:
        """Channel ``ch``'s codebook changes: its index counts so far make one
        span, whose entropy :meth:`_add_spans` adds."""
        self.spans.append(ch)
        self.span_counts.append(self.ent_counts[ch].copy())
        self.ent_counts[ch] = 0

    def _add_spans(self) -> None:
        """Add ``n * H`` of each finished span to its channel, spans in order,
        where ``n`` is the span's index count and ``H`` the entropy (bits) of
        its index frequencies ``p = counts[counts > 0] / n``, summed as
        ``-(p * log2(p)).sum()``: the spans' ``p`` side by side, each summed alone."""
        if not self.spans:
            return
        counts = np.stack(self.span_counts)
        seen = counts > 0
        n = counts.sum(axis=1)
        m = seen.sum(axis=1)
        p = counts[seen] / np.repeat(n, m)
        plogp = p * np.log2(p)
        at = 0
        for ch, n_s, m_s in zip(self.spans, n.tolist(), m.tolist()):
            if n_s > 0:
                self.ent_acc[ch] += float(n_s) * float(-plogp[at:at + m_s].sum())
                self.ent_n[ch] += float(n_s)
            at += m_s
        self.spans, self.span_counts = [], []

    def _fit_counts(self, idx: np.ndarray) -> None:
        """Widen the index counts when ``idx`` may hold an index past them."""
        have = self.ent_counts.shape[1]
        if have >= np.iinfo(idx.dtype).max + 1 or idx.shape[0] == 0:
            return
        need = int(idx.max()) + 1
        if need > have:
            self._add_spans()            # (spans of one width at a time)
            wider = np.zeros((self.C, need), dtype=np.int64)
            wider[:, :have] = self.ent_counts
            self.ent_counts = wider

    def _pick_start(self, u: CodebookUpdate) -> None:
        if u.channel != 0:
            return
        self._pick_end(u.at_sample)
        lv = np.array(u.levels)     # (copies: report() makes them lists, for the kept few)
        span = max(lv[-1] - lv[0], 1e-9)
        self.cur_pick = {"version": u.version, "at_sample": u.at_sample, "method": u.method,
                         "thresholds": np.array(u.thresholds), "levels": lv,
                         "range": [float(lv[0] - 0.25 * span), float(lv[-1] + 0.25 * span)],
                         "counts": np.zeros(200, dtype=np.int64), "until": None,
                         "from_m": max(0, u.at_sample - self.d),
                         "accumulate": self._may_be_kept(u.at_sample)}

    def _may_be_kept(self, at: int) -> bool:
        """Only the first codebook's picture is summed as the run goes; the middle
        and last ones are pictured from the kept tail of the signal."""
        return "first" not in self.picks and self.cur_pick is None

    def _tail_counts(self, p: dict, end_m: int | None = None) -> None:
        """Picture codebook ``p`` from the kept tail: its span up to measured
        sample ``end_m`` (default: all kept), as far back as the tail reaches."""
        R = self.tail.shape[0]
        end_m = self.tail_n if end_m is None else end_m
        lo = max(p["from_m"], self.tail_n - R)
        n = end_m - lo
        if n <= 0:
            return
        end = end_m % R
        x = self.tail[end - n:end] if n <= end else np.concatenate([self.tail[R - (n - end):],
                                                                     self.tail[:end]])
        plo, phi = p["range"]
        k = ((x - plo) * (200 / (phi - plo))).astype(np.int64)
        p["counts"] = np.bincount(k[(k >= 0) & (k < 200)], minlength=200)
        p["pictured_from"] = lo + self.d

    def _pick_end(self, at: int) -> None:
        p = self.cur_pick
        if p is None:
            return
        p["until"] = at
        if "first" not in self.picks:
            self.picks["first"] = p
        self.picks["last"] = p
        mid = (self.total_frames or 0) // 2
        if self.total_frames and p["at_sample"] <= mid < at:
            self.picks["middle"] = p
        self.cur_pick = None

    def _picture_last(self) -> None:
        p = self.picks.get("last")
        if p is not None and not p["accumulate"]:
            self._tail_counts(p)

    def _apply(self, u: CodebookUpdate) -> None:
        ch = u.channel
        self._end_span(ch)
        self.bounds[ch] = (u.levels[0], u.levels[-1])
        self.version[ch] = u.version
        self.counting[ch] = True
        self.side_bits += int(u.side_info_bits)
        self.updates += 1
        if self.levels_seen is None:
            self.levels_seen = u.n_levels
        self._pick_start(u)
        w = (u.at_sample - self.d) // (self.F * self.S) if u.at_sample >= self.d else 0
        ev = self.win_events.setdefault(w, [0, 0])
        ev[0] += 1
        ev[1] += int(u.side_info_bits)

    # -- one step --------------------------------------------------------------
    def step(self, frames, inputs) -> None:
        from streamq.design.kernels import meter_rows, window_segments
        ref = np.ascontiguousarray(self.refdelay.push(inputs["reference"].block.data))
        pkt = inputs["input"]
        x = np.ascontiguousarray(pkt.block.data)
        s = pkt.block.start
        C, F = self.C, self.F
        updates = [u for u in pkt.events if isinstance(u, CodebookUpdate)]
        if pkt.indices is not None:
            idx = np.ascontiguousarray(pkt.indices.data)
            self._fit_counts(idx)
        else:
            idx = np.zeros((0, C), dtype=np.uint8)
        skip = min(frames, max(0, self.d - s))   # latency pre-roll: nothing to compare yet
        n = frames - skip
        if n:
            self._keep_tail(ref[skip:, 0])
        # per-frame sums of the frames this block finishes, and the version in
        # force at each frame's last sample (channel 0), made segment by segment
        sums = np.empty(((self.fill + n) // F, 4 * C))
        vers = np.empty(sums.shape[0])
        k, top = 0, 0.0
        mid = (self.total_frames or 0) // 2
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
            ver = -1.0 if self.version[0] is None else float(self.version[0])
            self.fill, k, top = meter_rows(rr, x[a2:b], self.bounds, ver,
                                           idx[a2:b] if idx.shape[0] else idx, self.counting,
                                           self.ent_counts, self.pend, self.fill, sums, vers, k,
                                           top)
            p = self.cur_pick
            if mid and p is not None and not p["accumulate"] and s + a2 <= mid < s + b:
                # the codebook in force at the middle of the run: picture it so
                # far from the kept tail, then keep summing until it is replaced
                self._tail_counts(p, self.m + b - skip)
                p["accumulate"] = True
            elif p is not None and p["accumulate"]:
                plo, phi = p["range"]
                k0 = ((rr[:, 0] - plo) * (200 / (phi - plo))).astype(np.int64)
                p["counts"] += np.bincount(k0[(k0 >= 0) & (k0 < 200)], minlength=200)
        while ui < len(updates):
            self._apply(updates[ui])
            ui += 1
        self._add_spans()
        self.t = s + frames
        if n == 0:
            return None
        self.peak = max(self.peak, float(top))
        self.m += n
        segs = np.empty((2 * C, (self.spec_pos + n) // self.N, self.N))
        self.spec_pos = window_segments(ref[skip:], x[skip:], self.spec_win, self.spec_part,
                                        self.spec_pos, segs)
        # live runs: frame statistics and spectra are summed on the worker, in order
        run = self.ctx.background if self.live else (lambda f, *a: f(*a))
        if sums.shape[0]:
            run(self._frames, sums, vers)
        if segs.shape[1]:
            run(self._spectrum, segs)
        return None

    def _keep_tail(self, r0: np.ndarray) -> None:
        """The last seconds of channel 0's reference, for the last codebook's picture."""
        R, n = self.tail.shape[0], r0.shape[0]
        if n >= R:
            r0, n = r0[-R:], R
        at = self.tail_n % R
        first = min(n, R - at)
        self.tail[at:at + first] = r0[:first]
        self.tail[:n - first] = r0[first:]
        self.tail_n += n

    def _frames(self, sums: np.ndarray, frame_ver: np.ndarray) -> None:
        """Add finished frames to the totals, segmental SNR and series rows.

        Parameters
        ----------
        sums : ndarray, shape (K, 4C)
            Per-frame sums (sum r^2, e^2, e^2 over overloads, overloads; see
            :func:`streamq.design.kernels.meter_rows`), frames in order.
        frame_ver : ndarray, shape (K,)
            Channel 0's codebook version at each frame's last sample.
        """
        C, F = self.C, self.F
        K = sums.shape[0]
        sig, noi, ovn, ovc = sums[:, :C], sums[:, C:2 * C], sums[:, 2 * C:3 * C], sums[:, 3 * C:]
        self.sig = _seq_sum(self.sig, sig)
        self.noi = _seq_sum(self.noi, noi)
        self.ovn = _seq_sum(self.ovn, ovn)
        self.ovc = _seq_sum(self.ovc, ovc)
        lo, hi = self.config.clamp
        with np.errstate(divide="ignore", invalid="ignore"):
            snr = 10.0 * np.log10(sig / noi)
        snr = np.where(noi == 0, hi, snr)
        valid = ~((sig == 0) & (noi == 0))
        snr = np.where(valid, np.clip(snr, lo, hi), 0.0)
        self.seg_sum = _seq_sum(self.seg_sum, snr)
        self.seg_n = self.seg_n + valid.sum(axis=0)
        # series rows, channels pooled. A row's sums add its frames in order from
        # zero, whichever blocks the frames came in (reduceat adds in order).
        per = np.stack([sig.sum(axis=1), noi.sum(axis=1), ovc.sum(axis=1), snr.sum(axis=1),
                        valid.sum(axis=1)], axis=1)
        S, k = self.S, 0
        while k < K and self.win["frames"] > 0:      # finish the open row frame by frame
            self._win_add(per[k], frame_ver[k], 1)
            k += 1
            if self.win["frames"] == S:
                self._row(F * S)
        full = (K - k) // S
        if full:
            sums = np.add.reduceat(per[k:k + full * S], np.arange(0, full * S, S), axis=0)
            for i in range(full):
                self._win_add(sums[i], frame_ver[k + i * S + S - 1], S)
                self._row(F * S)
            k += full * S
        if k < K:                                     # start the next row
            self._win_add(np.add.reduceat(per[k:], [0], axis=0)[0], frame_ver[K - 1], K - k)

    def _win_add(self, vec: np.ndarray, version: float, frames: int) -> None:
        w = self.win
        w["sig"] += float(vec[0])
        w["noi"] += float(vec[1])
        w["ovc"] += float(vec[2])
        w["seg"] += float(vec[3])
        w["segn"] += int(vec[4])
        w["frames"] += frames
        w["version"] = int(version)

    def _row(self, n: int) -> None:
        w = self.win
        idx = len(self.rows)
        ev = self.win_events.pop(idx, [0, 0])
        start = idx * self.F * self.S
        nn = n * self.C
        self.rows.append({
            "time_s": start / self.rate,
            "samples": n,
            "snr_db": _db(w["sig"], w["noi"]),
            "segsnr_db": w["seg"] / w["segn"] if w["segn"] else None,
            "signal_dbfs": _db(w["sig"] / nn, 1.0) if nn else None,
            "noise_dbfs": _db(w["noi"] / nn, 1.0) if nn else None,
            "overload_fraction": w["ovc"] / nn if nn else 0.0,
            "codebook_updates": ev[0],
            "side_info_bits": ev[1],
            "codebook_version": None if w.get("version", -1) < 0 else w["version"],
        })
        self.win = {"sig": 0.0, "noi": 0.0, "ovc": 0.0, "seg": 0.0, "segn": 0, "frames": 0}

    def _spectrum(self, segs: np.ndarray) -> None:
        """Add windowed Welch segments (no overlap) to the power spectra.

        Parameters
        ----------
        segs : ndarray, shape (2C, K, N)
            Reference channels then error channels, one windowed segment per
            row (see :func:`streamq.design.kernels.window_segments`).
        """
        C, K = self.C, segs.shape[1]
        spec = np.abs(np.fft.rfft(segs, axis=-1))
        np.square(spec, out=spec)                                   # (2C, K, f)
        sig, noi = spec[:C].sum(axis=0), spec[C:].sum(axis=0)   # (K, f), channels in order
        self.spec_acc = np.stack([_seq_sum(self.spec_acc[0], sig), _seq_sum(self.spec_acc[1], noi)])
        self.spec_frames += K

    # -- the end -----------------------------------------------------------------
    def finish(self) -> None:
        # the last partial frame counts towards the totals, not towards segmental SNR
        pend = self.pend[:self.fill]
        if pend.shape[0]:
            C = self.C
            r, e, ov = pend[:, :C], pend[:, C:2 * C], pend[:, 2 * C:3 * C]
            self.win["version"] = int(pend[-1, 3 * C])
            self.sig = self.sig + (r * r).sum(axis=0)
            self.noi = self.noi + (e * e).sum(axis=0)
            self.ovn = self.ovn + (e * e * ov).sum(axis=0)
            self.ovc = self.ovc + ov.sum(axis=0)
            w = self.win
            w["sig"] += float((r * r).sum())
            w["noi"] += float((e * e).sum())
            w["ovc"] += float(ov.sum())
            self.fill = 0
            self._row(r.shape[0] + w["frames"] * self.F)
        elif self.win["frames"]:
            self._row(self.win["frames"] * self.F)

    def close(self, complete: bool) -> None:
        if not complete and (self.fill or self.win["frames"]):
            self.finish()
        for ch in range(self.C):
            self._end_span(ch)
        self._add_spans()
        self._pick_end(self.t)
        self._picture_last()
        self._write_files()

    def _write_files(self) -> None:
        """The time series and the spectrum as CSV files, each written whole under
        a temporary name and then renamed (a full disk leaves nothing partial)."""
        self.csv_written = []
        if self.out_dir is None:     # an in-process chain without an output folder
            return
        path = self.out_dir / f"{self.id}-series.csv"
        try:
            write_series_csv(path, self.rows)
            self.csv_written.append(path.name)
            if self.spec_frames:
                path = self.out_dir / f"{self.id}-spectrum.csv"
                freqs = np.fft.rfftfreq(self.N, 1.0 / self.rate)
                scale = 1.0 / (self.rate * (self.spec_win ** 2).sum() * self.spec_frames * self.C)
                psd = self.spec_acc * scale
                psd[:, 1:-1] *= 2.0
                with replacing(path, newline="") as f:
                    w = csv.writer(f)
                    w.writerow(["frequency_hz", "signal_psd_db", "noise_psd_db"])
                    for fr, sp, npow in zip(freqs, psd[0], psd[1]):
                        w.writerow([f"{fr:.3f}", f"{10 * np.log10(max(sp, 1e-30)):.3f}",
                                    f"{10 * np.log10(max(npow, 1e-30)):.3f}"])
                self.csv_written.append(path.name)
        except OSError as exc:
            raise self.fail(None, unwritable(path, exc)) from None

    def _written(self, name: str) -> str | None:
        return name if self.csv_written is None or name in self.csv_written else None

    def live_stats(self) -> dict:
        """Running figures for the live terminal meter (read from another thread:
        only plain attribute reads)."""
        n = len(self.rows)
        last = self.rows.row(n - 1) if n else {}
        L = self.levels_seen
        fixed = math.ceil(math.log2(L)) if L else None
        side = self.side_bits / (self.t * self.C) if self.t else 0.0
        seg_n = float(self.seg_n.sum())
        return {"snr_db": _db(float(self.sig.sum()), float(self.noi.sum())),
                "segsnr_db": float(self.seg_sum.sum() / seg_n) if seg_n else None,
                "recent_snr_db": last.get("snr_db"), "recent_segsnr_db": last.get("segsnr_db"),
                "bits_per_sample": None if fixed is None else fixed + side,
                "side_info_bits_per_sample": side, "codebook_version": self.version[0],
                "codebook_updates": self.updates, "seconds": self.m / self.rate}

    #: everything the meter accumulates while it runs (its state; the rest is
    #: set up by ``open`` from the configuration and the input streams)
    RUNNING = ("t", "m", "sig", "noi", "ovn", "ovc", "seg_sum", "seg_n", "peak", "pend", "fill",
               "rows", "win", "win_events", "spec_part", "spec_pos", "spec_acc", "spec_frames",
               "bounds", "version", "side_bits", "updates", "levels_seen", "ent_counts",
               "counting", "ent_acc", "ent_n", "spans", "span_counts", "picks", "cur_pick",
               "tail", "tail_n")

    def get_state(self) -> dict:
        """Copies of everything in :data:`RUNNING`, and the reference delay line."""
        st = {name: copy.deepcopy(getattr(self, name)) for name in self.RUNNING}
        st["refdelay"] = self.refdelay.get_state()
        return st

    def set_state(self, st: dict) -> None:
        for name in self.RUNNING:
            setattr(self, name, copy.deepcopy(st[name]))
        self.refdelay.set_state(st["refdelay"])

    def report(self):
        C = self.C
        sig, noi = float(self.sig.sum()), float(self.noi.sum())
        frames_out = self.t
        rates = {}
        L = self.levels_seen
        if L:
            fixed = math.ceil(math.log2(L))
            side_ps = self.side_bits / (frames_out * C) if frames_out else 0.0
            ent = float(self.ent_acc.sum() / self.ent_n.sum()) if self.ent_n.sum() else None
            rates = {"levels": L, "fixed_rate_bits": fixed, "entropy_bits": ent,
                     "side_info_bits": self.side_bits, "side_info_bits_per_sample": side_ps,
                     "bits_per_sample": fixed + side_ps,
                     "entropy_bits_per_sample_with_side_info": None if ent is None else ent + side_ps}
        per_ch = []
        for ch in range(C):
            per_ch.append({"snr_db": _db(float(self.sig[ch]), float(self.noi[ch])),
                           "segsnr_db": float(self.seg_sum[ch] / self.seg_n[ch]) if self.seg_n[ch] else None})
        seg_n = float(self.seg_n.sum())
        picks = {}
        for key in ("first", "middle", "last"):
            p = self.picks.get(key)
            if p is not None:
                picks[key] = {k: (v.tolist() if isinstance(v, np.ndarray) else v)
                              for k, v in p.items() if k not in ("accumulate", "from_m")}
        out = {
            "snr_db": _db(sig, noi),
            "segsnr_db": float(self.seg_sum.sum() / seg_n) if seg_n else None,
            "samples": self.m,
            "frames": frames_out,
            "channels": C,
            "latency_frames": self.d,
            "signal_power": sig / (self.m * C) if self.m else None,
            "noise_power": noi / (self.m * C) if self.m else None,
            "granular_noise_power": (noi - float(self.ovn.sum())) / (self.m * C) if self.m else None,
            "overload_noise_power": float(self.ovn.sum()) / (self.m * C) if self.m else None,
            "overload_samples": int(self.ovc.sum()),
            "peak_abs_error": self.peak,
            "codebook_updates": self.updates,
            "per_channel": per_ch,
            # (None when the file could not be written: a live run goes on to its report)
            "series_csv": self._written(f"{self.id}-series.csv"),
            "spectrum_csv": self._written(f"{self.id}-spectrum.csv") if self.spec_frames else None,
            "codebooks": picks,
            **rates,
        }
        return out
