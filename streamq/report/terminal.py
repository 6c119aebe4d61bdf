"""The live terminal meter: a few lines redrawn in place while a live graph runs.

Layout (our own)::

    live 01:23.4 | audio load   4.1% [..........] | dropouts 0 | codebook v812, drift 0.013
      noise      SNR  20.12 dB | seg  18.40 dB | 4.012 bits/sample (side 0.0120)

The first line is the run: time since the start, the audio callback's load
(its 99th-percentile work time over the block period, as a bar of ten
cells; ``OVER`` once it reaches 100 %), the dropouts (buffer under/overruns)
counted so far and, when the stats give them for the whole chain, the
codebook version in force and the drift statistic. Then one line per meter.

Where it draws
--------------
* On a terminal the lines are redrawn in place: carriage return, cursor up
  (``ESC [ n A``) and erase-to-end-of-line (``ESC [ K``); no colours. Lines
  are cut to the terminal's width so that none wraps (a wrapped line would
  break the cursor-up count).
* Not on a terminal (a pipe, a log file, CI): nothing is printed by default;
  the live run prints its summary at the end anyway. With ``enabled=True``
  a plain one-line summary is printed at most every ``log_every`` seconds
  (default 5 s) instead, for logs of unattended runs.
* ``enabled=False`` prints nothing anywhere (``--quiet``).

:meth:`LiveMeter.update` is meant to be called a few times a second from the
main thread (never from the audio callback); it does no throttling itself.
"""

from __future__ import annotations

import math
import os
import sys
import time
from typing import Any, TextIO

CSI = "\x1b["
BAR_CELLS = 10


def _num(v: Any, fmt: str, none: str = "--") -> str:
    """Format a number; None/NaN as ``none``, infinities as ``inf``/``-inf``."""
    if v is None:
        return none
    if isinstance(v, (list, tuple)):
        vals = [x for x in v if x is not None]
        if not vals:
            return none
        v = max(vals)
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    if math.isnan(f):
        return none
    if math.isinf(f):
        return "inf" if f > 0 else "-inf"
    return fmt.format(f)


def _version(v: Any) -> str:
    if v is None:
        return "--"
    if isinstance(v, (list, tuple)):
        vals = [str(int(x)) for x in v if x is not None]
        if not vals:
            return "--"
        uniq = list(dict.fromkeys(vals))
        return "v" + "/".join(uniq[:4]) + ("/..." if len(uniq) > 4 else "")
    try:
        return f"v{int(v)}"
    except (TypeError, ValueError):
        return str(v)


def _clock(seconds: Any) -> str:
    try:
        s = max(0.0, float(seconds))
    except (TypeError, ValueError):
        return "--:--.-"
    m, s = divmod(s, 60.0)
    h, m = divmod(int(m), 60)
    return (f"{h}:{m:02d}:{s:04.1f}" if h else f"{m:02d}:{s:04.1f}")


def _load(load: Any) -> str:
    if load is None:
        return "audio load   --"
    try:
        f = float(load)
    except (TypeError, ValueError):
        return "audio load   --"
    if not math.isfinite(f):
        return "audio load   --"
    full = min(BAR_CELLS, max(0, int(round(f * BAR_CELLS))))
    bar = "#" * full + "." * (BAR_CELLS - full)
    text = f"audio load {100.0 * f:5.1f}% [{bar}]"
    if f >= 1.0:
        text += " OVER"
    return text


def header_line(stats: dict[str, Any]) -> str:
    """The run line: time, audio load, dropouts, chain-wide codebook and drift."""
    parts = [f"live {_clock(stats.get('seconds'))}", _load(stats.get("load"))]
    xr = stats.get("xruns")
    if xr is not None:
        parts.append(f"dropouts {int(xr)}" + (" (!)" if int(xr) > 0 else ""))
    tail = []
    if stats.get("codebook_version") is not None:
        tail.append(f"codebook {_version(stats.get('codebook_version'))}")
    if stats.get("drift") is not None:
        tail.append(f"drift {_num(stats.get('drift'), '{:.3f}')}")
    if tail:
        parts.append(", ".join(tail))
    return " | ".join(parts)


def meter_line(name: str, m: dict[str, Any], width: int = 10) -> str:
    """One meter: SNR, segmental SNR, bit rate with side information, codebook, drift."""
    parts = [f"  {name:<{width}} SNR {_num(m.get('snr_db'), '{:6.2f}').rjust(6)} dB",
             f"seg {_num(m.get('segsnr_db'), '{:6.2f}').rjust(6)} dB"]
    if m.get("bits_per_sample") is not None or m.get("side_info_bits_per_sample") is not None:
        parts.append(f"{_num(m.get('bits_per_sample'), '{:.3f}')} bits/sample "
                     f"(side {_num(m.get('side_info_bits_per_sample'), '{:.4f}')})")
    if m.get("codebook_version") is not None:
        parts.append(_version(m.get("codebook_version")))
    if m.get("drift") is not None:
        parts.append(f"drift {_num(m.get('drift'), '{:.3f}')}")
    return " | ".join(parts)


_METER_KEYS = ("snr_db", "segsnr_db", "bits_per_sample", "side_info_bits_per_sample")


def render(stats: dict[str, Any]) -> list[str]:
    """The meter's lines for one stats dict (no escape codes)."""
    lines = [header_line(stats)]
    meters = stats.get("meters") or {}
    if meters:
        width = max(10, *(len(str(k)) for k in meters))
        for name, m in meters.items():
            lines.append(meter_line(str(name), m or {}, width))
    elif any(stats.get(k) is not None for k in _METER_KEYS):
        lines.append(meter_line("chain", {k: stats.get(k) for k in _METER_KEYS}))
    return lines


class LiveMeter:
    """A few status lines kept up to date on the terminal during a live run.

    Parameters
    ----------
    stream : text stream, default ``sys.stderr``
    enabled : bool or None
        None: draw only when ``stream`` is a terminal. True: draw on a
        terminal, or print one plain line every ``log_every`` seconds on
        anything else. False: print nothing.
    log_every : float
        Seconds between plain lines when not on a terminal (``enabled=True``).
    """

    def __init__(self, stream: TextIO | None = None, enabled: bool | None = None,
                 log_every: float = 5.0):
        self.stream = stream if stream is not None else sys.stderr
        try:
            self.tty = bool(self.stream.isatty())
        except (AttributeError, ValueError, OSError):
            self.tty = False
        if enabled is None:
            enabled = self.tty
        self.enabled = bool(enabled)
        self.log_every = float(log_every)
        self.height = 0            # lines on screen from the last redraw
        self.last_log = -math.inf  # monotonic time of the last plain line
        self.closed = False
        self.last_lines: list[str] = []

    def _columns(self) -> int:
        try:
            return max(20, os.get_terminal_size(self.stream.fileno()).columns)
        except (AttributeError, ValueError, OSError):
            return 100

    def update(self, stats: dict[str, Any]) -> None:
        """Redraw with new figures (see the module docstring for the keys)."""
        if not self.enabled or self.closed:
            return
        lines = render(stats)
        self.last_lines = lines
        try:
            if self.tty:
                self._redraw(lines)
            else:
                now = time.monotonic()
                if now - self.last_log >= self.log_every:
                    self.last_log = now
                    self.stream.write(" | ".join(x.strip() for x in lines) + "\n")
                    self.stream.flush()
        except (OSError, ValueError):
            self.enabled = False  # the terminal went away: keep the run going, stop drawing

    def _redraw(self, lines: list[str]) -> None:
        cols = self._columns() - 1
        out = ["\r"]
        if self.height > 1:
            out.append(f"{CSI}{self.height - 1}A")
        n = max(len(lines), self.height)
        for i in range(n):
            text = lines[i][:cols] if i < len(lines) else ""
            out.append(text + f"{CSI}K")
            if i < n - 1:
                out.append("\n")
        self.height = n
        self.stream.write("".join(out))
        self.stream.flush()

    def close(self) -> None:
        """Leave the last figures on screen and move below them."""
        if self.closed:
            return
        self.closed = True
        if self.enabled and self.tty and self.height:
            try:
                self.stream.write("\n")
                self.stream.flush()
            except (OSError, ValueError):
                pass

    def __enter__(self) -> "LiveMeter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
