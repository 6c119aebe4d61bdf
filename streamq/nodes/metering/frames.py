"""Frame sums of the error meter: SNR, segmental SNR and the series rows.

The stream is cut into frames of ``F`` samples counted from the first
measured sample; one compiled pass (:func:`meter_rows`) gives each finished
frame's sums, and :meth:`FrameSums.add` adds frames to the totals in frame
order, so every figure is bit-identical whatever the block size (DESIGN.md
rule 1). A series row pools ``S`` frames.

Threads: :meth:`FrameSums.cut` runs where the meter steps;
:meth:`FrameSums.add` may run later on another thread (live runs sum there,
in order). The two halves share only ``row_events`` (a dict: one writer adds
a row's codebook changes, the other takes them when the row closes).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field

import numpy as np
from numba import njit

from streamq.nodes.metering.series import Series

SERIES_COLUMNS = ("time_s", "samples", "snr_db", "segsnr_db", "signal_dbfs", "noise_dbfs",
                  "overload_fraction", "codebook_updates", "side_info_bits", "codebook_version")
_WHOLE = frozenset({"samples", "codebook_updates", "side_info_bits", "codebook_version"})


@njit(cache=True, nogil=True)
def meter_rows(ref, x, bounds, version, idx, active, counts, pend, fill, sums, vers, k,
               peak):  # pragma: no cover - compiled
    """One pass of a meter over a stretch with one codebook per channel.

    Each sample makes one meter row: the reference (C columns), the error
    ``x - ref`` (C), the overload flag (C; 1.0 where the reference lies below
    ``bounds[c, 0]`` or above ``bounds[c, 1]``, else 0.0) and ``version`` (one
    column). Rows are cut into frames of ``F = pend.shape[0]`` rows, counted
    on from the ``fill`` rows of the unfinished frame in ``pend``. For each
    frame this call finishes, ``sums[k]`` gets, per channel ``c``, sum r^2,
    sum e^2, sum e^2 * overload and sum overload (columns ``c``, ``C + c``,
    ``2C + c``, ``3C + c``), each added in row order from zero, so a frame's
    sums never depend on where the stream was cut into calls; ``vers[k]``
    gets ``version`` and ``k`` moves on. The rows of a frame left unfinished
    are kept in ``pend``.

    Equal to: ``rows = concat(pend[:fill], new rows)``, ``K = len(rows) // F``;
    ``sums[k:k + K]`` = ``cumsum`` of ``[r*r, e*e, e*e*ov, ov]`` over each
    frame's rows, last entry; ``vers[k:k + K] = version``;
    ``pend[:len(rows) - K * F] = rows[K * F:]``; for every channel ``c`` with
    ``active[c]``, ``counts[c] += bincount(idx[:, c], minlength=counts.shape[1])``
    (``idx`` may have no rows: nothing is counted); the peak is
    ``max(peak, abs(x - ref).max())``, NaN when either is NaN.

    Parameters
    ----------
    ref, x : ndarray, shape (n, C), float64
        Reference and measured signal.
    bounds : ndarray, shape (C, 2), float64
        Lowest and highest level of each channel's codebook.
    version : float
        Codebook version in force (channel 0; -1 for none).
    idx : ndarray, shape (n, C) or (0, C), unsigned integer
        Cell indices (each below ``counts.shape[1]``), or no rows.
    active : ndarray, shape (C,), bool
        Channels whose indices are counted.
    counts : ndarray, shape (C, L), int64; updated in place
    pend : ndarray, shape (F, 3C + 1), float64; updated in place
    fill : int
        Rows already in ``pend``.
    sums : ndarray, shape (K_max, 4C), float64; written from row ``k``
    vers : ndarray, shape (K_max,), float64; written from ``k``
    k : int
        Frames already written.
    peak : float
        Largest absolute error so far (NaN once any error was NaN).

    Returns
    -------
    (fill, k, peak)
        The rows now in ``pend``, the frames now written, the new peak.
    """
    n, C = ref.shape
    F = pend.shape[0]
    if idx.shape[0] > 0:
        for c in range(C):
            if active[c]:
                for i in range(n):
                    counts[c, idx[i, c]] += 1
    top = 0.0
    nan = peak != peak
    pos = 0
    while pos < n:
        take = min(F - fill, n - pos)
        if fill + take < F:                  # the frame stays unfinished: keep its rows
            for i in range(take):
                row = fill + i
                for c in range(C):
                    r = ref[pos + i, c]
                    e = x[pos + i, c] - r
                    pend[row, c] = r
                    pend[row, C + c] = e
                    pend[row, 2 * C + c] = 1.0 if (r < bounds[c, 0] or r > bounds[c, 1]) else 0.0
                    a = abs(e)
                    if a > top:
                        top = a
                    elif a != a:
                        nan = True
                pend[row, 3 * C] = version
            fill += take
        else:                                # the frame ends here: its sums, in row order
            for c in range(C):
                lo = bounds[c, 0]
                hi = bounds[c, 1]
                sr = 0.0
                se = 0.0
                so = 0.0
                sn = 0.0
                for i in range(fill):
                    r = pend[i, c]
                    e = pend[i, C + c]
                    ov = pend[i, 2 * C + c]
                    e2 = e * e
                    sr += r * r
                    se += e2
                    so += e2 * ov
                    sn += ov
                for i in range(pos, pos + take):
                    r = ref[i, c]
                    e = x[i, c] - r
                    ov = 1.0 if (r < lo or r > hi) else 0.0
                    e2 = e * e
                    sr += r * r
                    se += e2
                    so += e2 * ov
                    sn += ov
                    a = abs(e)
                    if a > top:
                        top = a
                    elif a != a:
                        nan = True
                sums[k, c] = sr
                sums[k, C + c] = se
                sums[k, 2 * C + c] = so
                sums[k, 3 * C + c] = sn
            vers[k] = version
            k += 1
            fill = 0
        pos += take
    return fill, k, (np.nan if nan else max(peak, top))


def in_order_sum(acc: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """``acc + rows[0] + rows[1] + ...``, added strictly in order (block-size proof)."""
    if rows.shape[0] == 0:
        return acc
    if acc.size < 64:       # a few columns: one cumsum
        return np.cumsum(np.concatenate([acc[None], rows]), axis=0)[-1]
    out = acc.copy()        # long rows (spectra): row by row, far faster than a cumsum
    for row in rows:        # along the outer axis, and the same additions
        out += row
    return out


def ratio_db(num: float, den: float) -> float | None:
    """``10 log10(num / den)``; +inf for a zero ``den`` under a positive
    ``num``, None when both are zero, -inf for a zero ``num``."""
    if den <= 0:
        return math.inf if num > 0 else None
    if num <= 0:
        return -math.inf
    return 10.0 * math.log10(num / den)


@dataclass
class RowSums:
    """The open series row: its frames' sums, channels pooled."""

    sig: float = 0.0
    noi: float = 0.0
    ovc: float = 0.0
    seg: float = 0.0           # clamped per-frame SNRs, summed
    segn: int = 0              # frames counted in ``seg``
    frames: int = 0
    version: int = -1          # channel 0's codebook version at the row's last frame (-1: none)


@dataclass
class FrameState:
    """Everything the frame sums carry between blocks."""

    pend: np.ndarray           # the unfinished frame's rows (see meter_rows)
    sig: np.ndarray            # per channel: sum r^2, e^2, e^2 over overloads, overloads
    noi: np.ndarray
    ovn: np.ndarray
    ovc: np.ndarray
    seg_sum: np.ndarray        # per channel: clamped frame SNRs, summed, and their count
    seg_n: np.ndarray
    rows: Series
    fill: int = 0              # rows in ``pend``
    peak: float = 0.0          # largest absolute error
    row: RowSums = field(default_factory=RowSums)
    row_events: dict[int, list[int]] = field(default_factory=dict)   # row -> [updates, bits]


class FrameSums:
    """Frame sums of one meter.

    Parameters
    ----------
    channels : int
    frame : int
        Segmental-SNR frame length ``F``, samples.
    row_frames : int
        Frames per series row ``S``.
    rate : int
        Sample rate (series times).
    clamp : (float, float)
        Per-frame SNR clamp, dB.
    delay : int
        Samples of latency pre-roll before the first measured sample.
    """

    def __init__(self, channels: int, frame: int, row_frames: int, rate: int, clamp, delay: int):
        self.C, self.F, self.S = channels, frame, row_frames
        self.rate, self.clamp, self.delay = rate, tuple(clamp), delay
        z = np.zeros(channels)
        self.state = FrameState(np.empty((frame, 3 * channels + 1)), z.copy(), z.copy(),
                                z.copy(), z.copy(), z.copy(), z.copy(),
                                Series(SERIES_COLUMNS, _WHOLE))

    # -- where the meter steps -------------------------------------------------------
    def buffers(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Room for the sums and versions of the frames ``n`` more samples finish."""
        K = (self.state.fill + n) // self.F
        return np.empty((K, 4 * self.C)), np.empty(K)

    def cut(self, ref, x, bounds, version, idx, active, counts, sums, vers, k, top):
        """:func:`meter_rows` on a stretch under one codebook per channel, from
        the unfinished frame on; returns the frames written and the stretch's
        peak error so far (see :func:`meter_rows` for the arguments)."""
        st = self.state
        st.fill, k, top = meter_rows(ref, x, bounds, version, idx, active, counts, st.pend,
                                     st.fill, sums, vers, k, top)
        return k, top

    def count_update(self, at_sample: int, bits: int) -> None:
        """A codebook change at ``at_sample`` (output time), in its series row."""
        d = self.delay
        w = (at_sample - d) // (self.F * self.S) if at_sample >= d else 0
        ev = self.state.row_events.setdefault(w, [0, 0])
        ev[0] += 1
        ev[1] += int(bits)

    # -- possibly on another thread, in order ------------------------------------------
    def add(self, sums: np.ndarray, frame_ver: np.ndarray) -> None:
        """Add finished frames to the totals, segmental SNR and series rows.

        Parameters
        ----------
        sums : ndarray, shape (K, 4C)
            Per-frame sums (sum r^2, e^2, e^2 over overloads, overloads; see
            :func:`meter_rows`), frames in order.
        frame_ver : ndarray, shape (K,)
            Channel 0's codebook version at each frame's last sample.
        """
        st, C, F = self.state, self.C, self.F
        K = sums.shape[0]
        sig, noi, ovn, ovc = sums[:, :C], sums[:, C:2 * C], sums[:, 2 * C:3 * C], sums[:, 3 * C:]
        st.sig = in_order_sum(st.sig, sig)
        st.noi = in_order_sum(st.noi, noi)
        st.ovn = in_order_sum(st.ovn, ovn)
        st.ovc = in_order_sum(st.ovc, ovc)
        lo, hi = self.clamp
        with np.errstate(divide="ignore", invalid="ignore"):
            snr = 10.0 * np.log10(sig / noi)
        snr = np.where(noi == 0, hi, snr)
        valid = ~((sig == 0) & (noi == 0))
        snr = np.where(valid, np.clip(snr, lo, hi), 0.0)
        st.seg_sum = in_order_sum(st.seg_sum, snr)
        st.seg_n = st.seg_n + valid.sum(axis=0)
        # series rows, channels pooled. A row's sums add its frames in order from
        # zero, whichever blocks the frames came in (reduceat adds in order).
        per = np.stack([sig.sum(axis=1), noi.sum(axis=1), ovc.sum(axis=1), snr.sum(axis=1),
                        valid.sum(axis=1)], axis=1)
        S, k = self.S, 0
        while k < K and st.row.frames > 0:       # finish the open row frame by frame
            self._row_add(per[k], frame_ver[k], 1)
            k += 1
            if st.row.frames == S:
                self._close_row(F * S)
        full = (K - k) // S
        if full:
            sums = np.add.reduceat(per[k:k + full * S], np.arange(0, full * S, S), axis=0)
            for i in range(full):
                self._row_add(sums[i], frame_ver[k + i * S + S - 1], S)
                self._close_row(F * S)
            k += full * S
        if k < K:                                 # start the next row
            self._row_add(np.add.reduceat(per[k:], [0], axis=0)[0], frame_ver[K - 1], K - k)

    def _row_add(self, vec: np.ndarray, version: float, frames: int) -> None:
        w = self.state.row
        w.sig += float(vec[0])
        w.noi += float(vec[1])
        w.ovc += float(vec[2])
        w.seg += float(vec[3])
        w.segn += int(vec[4])
        w.frames += frames
        w.version = int(version)

    def _close_row(self, n: int) -> None:
        """The open row, of ``n`` samples per channel, becomes a series row."""
        st = self.state
        w = st.row
        idx = len(st.rows)
        ev = st.row_events.pop(idx, [0, 0])
        start = idx * self.F * self.S
        nn = n * self.C
        st.rows.append({
            "time_s": start / self.rate,
            "samples": n,
            "snr_db": ratio_db(w.sig, w.noi),
            "segsnr_db": w.seg / w.segn if w.segn else None,
            "signal_dbfs": ratio_db(w.sig / nn, 1.0) if nn else None,
            "noise_dbfs": ratio_db(w.noi / nn, 1.0) if nn else None,
            "overload_fraction": w.ovc / nn if nn else 0.0,
            "codebook_updates": ev[0],
            "side_info_bits": ev[1],
            "codebook_version": None if w.version < 0 else w.version,
        })
        st.row = RowSums()

    # -- the end -----------------------------------------------------------------------
    def unfinished(self) -> bool:
        """Whether a partial frame or an open row is left."""
        return bool(self.state.fill or self.state.row.frames)

    def finish(self) -> None:
        """The last partial frame counts towards the totals, not towards
        segmental SNR; the open row is closed."""
        st = self.state
        pend = st.pend[:st.fill]
        if pend.shape[0]:
            C = self.C
            r, e, ov = pend[:, :C], pend[:, C:2 * C], pend[:, 2 * C:3 * C]
            st.row.version = int(pend[-1, 3 * C])
            st.sig = st.sig + (r * r).sum(axis=0)
            st.noi = st.noi + (e * e).sum(axis=0)
            st.ovn = st.ovn + (e * e * ov).sum(axis=0)
            st.ovc = st.ovc + ov.sum(axis=0)
            w = st.row
            w.sig += float((r * r).sum())
            w.noi += float((e * e).sum())
            w.ovc += float(ov.sum())
            st.fill = 0
            self._close_row(r.shape[0] + w.frames * self.F)
        elif st.row.frames:
            self._close_row(st.row.frames * self.F)

    # -- figures -----------------------------------------------------------------------
    def snr_db(self, ch: int | None = None) -> float | None:
        """SNR over the whole run, of one channel or (None) all pooled."""
        st = self.state
        if ch is None:
            return ratio_db(float(st.sig.sum()), float(st.noi.sum()))
        return ratio_db(float(st.sig[ch]), float(st.noi[ch]))

    def segsnr_db(self, ch: int | None = None) -> float | None:
        """Segmental SNR (mean of the clamped frame SNRs), of one channel or all."""
        st = self.state
        if ch is None:
            n = float(st.seg_n.sum())
            return float(st.seg_sum.sum() / n) if n else None
        return float(st.seg_sum[ch] / st.seg_n[ch]) if st.seg_n[ch] else None

    # -- state -------------------------------------------------------------------------
    def get_state(self) -> FrameState:
        return copy.deepcopy(self.state)

    def set_state(self, st: FrameState) -> None:
        self.state = copy.deepcopy(st)


def warm_up() -> None:
    """Compile (or load from the disk cache) :func:`meter_rows` for the index
    types a meter meets, before a live stream starts."""
    two = np.zeros((1, 2))
    for idx in (np.zeros((1, 2), dtype=np.uint8), np.zeros((1, 2), dtype=np.uint16),
                np.zeros((1, 2), dtype=np.uint32), np.zeros((0, 2), dtype=np.uint8)):
        meter_rows(two, two, np.zeros((2, 2)), 0.0, idx, np.ones(2, dtype=np.bool_),
                   np.zeros((2, 1), dtype=np.int64), np.zeros((2, 7)), 0, np.zeros((1, 8)),
                   np.zeros(1), 0, 0.0)
