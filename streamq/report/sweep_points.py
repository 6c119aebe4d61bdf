"""The points of ``streamq sweep``: reading its options, planning which scheme
runs at which word length and block length, and running one point's graph in a
worker (see :mod:`streamq.report.sweep`)."""

from __future__ import annotations

import math
import re
import time
from pathlib import Path
from typing import Any

from streamq.errors import StreamqError
from streamq.report.compare import (
    DEFAULT_COMPARED,
    EIGHT_BIT_TABLES,
    SCHEMES,
    available,
    build_compare_toml,
    checked_names,
    encoder_settings,
    label,
)


#: Block lengths (ms) tried for schemes that work on blocks, unless --blocks says otherwise.
DEFAULT_BLOCKS_MS = (8.0, 16.0, 32.0, 64.0)
MIN_BITS, MAX_BITS = 1, 16

#: The meter figures a point reports.
FIGURES = ("snr_db", "segsnr_db", "bits_per_sample", "fixed_rate_bits",
           "side_info_bits_per_sample", "entropy_bits", "entropy_bits_per_sample_with_side_info",
           "codebook_updates", "samples")


# -- what to run ---------------------------------------------------------------------------

def parse_bits(text: str | int | list[int]) -> list[int]:
    """Word lengths from ``4``, ``2-6`` or ``2,4,6`` (forms may be mixed:
    ``2-4,8``), each 1 to 16; sorted, duplicates dropped."""
    if isinstance(text, int):
        items = [str(text)]
    elif isinstance(text, (list, tuple)):
        items = [str(v) for v in text]
    else:
        items = str(text).split(",")
    out: set[int] = set()
    for raw in items:
        item = raw.strip()
        if not item:
            continue
        m = re.fullmatch(r"(\d+)\s*-\s*(\d+)", item) or re.fullmatch(r"(\d+)", item)
        if not m:
            raise StreamqError(f"--bits {text!s}: '{item}' is not a word length or a range "
                               f"like 2-6")
        lo = int(m.group(1))
        hi = int(m.group(2)) if m.lastindex == 2 else lo
        if lo > hi:
            raise StreamqError(f"--bits {text!s}: the range {item} runs downwards; write "
                               f"{hi}-{lo}")
        if lo < MIN_BITS or hi > MAX_BITS:
            raise StreamqError(f"--bits {text!s}: word lengths run from {MIN_BITS} to "
                               f"{MAX_BITS} bits")
        out.update(range(lo, hi + 1))
    if not out:
        raise StreamqError("--bits: give at least one word length")
    return sorted(out)


def parse_blocks(text: str | float | list[float] | None) -> list[float]:
    """Block lengths in ms from ``8,16,32`` (an ``ms`` after a number is
    allowed); sorted, duplicates dropped. None: :data:`DEFAULT_BLOCKS_MS`."""
    if text is None:
        return list(DEFAULT_BLOCKS_MS)
    items = [str(v) for v in text] if isinstance(text, (list, tuple)) else str(text).split(",")
    out: set[float] = set()
    for raw in items:
        item = raw.strip()
        if not item:
            continue
        num = item[:-2].strip() if item.lower().endswith("ms") else item
        try:
            v = float(num)
        except ValueError:
            raise StreamqError(f"--blocks {text!s}: '{item}' is not a length in ms") from None
        if not (math.isfinite(v) and 0 < v <= 60_000):
            raise StreamqError(f"--blocks {text!s}: block lengths must be above 0 and at most "
                               f"60000 ms, got '{item}'")
        out.add(v)
    if not out:
        raise StreamqError("--blocks: give at least one block length in ms")
    return sorted(out)


def parse_schemes(text: str | list[str] | None) -> list[str] | None:
    """Scheme names (those of ``streamq compare``), checked; None for the default."""
    if text is None:
        return None
    return checked_names(text, "--schemes", "scheme")


def _runs_at(scheme: str, bits: int) -> bool:
    if scheme in EIGHT_BIT_TABLES:
        return bits == 8
    return available(scheme, bits)


def plan_points(audio: Path, rms: float, bits: list[int], schemes: list[str] | None,
                blocks: list[float]) -> list[dict[str, Any]]:
    """Every (scheme, word length, block) to run, in scheme, bits, block order.

    Parameters
    ----------
    audio : Path
        The recording (fixed codebooks are trained on it).
    rms : float
        Its RMS over all samples (the uniform quantizer's scale).
    bits : list of int
        Word lengths.
    schemes : list of str or None
        Scheme names; None: every one of :data:`DEFAULT_COMPARED` that runs at each
        word length. A named scheme runs only at the word lengths it allows
        (G.711 at 8 bits only) and must allow at least one of ``bits``.
    blocks : list of float
        Block lengths (ms) for the schemes that work on blocks.

    Returns
    -------
    list of dict
        ``id``, ``scheme``, ``bits``, ``block_ms`` (None for schemes without a
        block), ``settings`` (as :func:`encoder_settings` gives them, the
        estimator's fields under ``"estimator"`` where the scheme has its own)
        and ``label``.
    """
    names = schemes if schemes is not None else list(DEFAULT_COMPARED)
    if schemes is not None:
        for s in names:
            if not any(_runs_at(s, b) for b in bits):
                if s in EIGHT_BIT_TABLES:
                    raise StreamqError(f"--schemes: {s} is the 8-bit G.711 table; include 8 in "
                                       f"--bits")
                sc = SCHEMES[s]
                raise StreamqError(f"--schemes: {s} runs at {sc.min_bits} to {sc.max_bits} bits "
                                   f"(its default multipliers), none of --bits "
                                   f"{','.join(map(str, bits))}")
    points = []
    for s in names:
        has_block = s in SCHEMES and SCHEMES[s].block_ms is not None
        for b in bits:
            if not _runs_at(s, b):
                continue
            for blk in (blocks if has_block else [None]):
                settings = encoder_settings(s, b, audio, rms, block_ms=blk)
                pid = f"{s}-{b}b" + (f"-{blk:g}ms" if blk is not None else "")
                points.append({"id": pid, "scheme": s, "bits": b, "block_ms": blk,
                               "settings": settings,
                               "label": label(s, settings, block_ms=blk)})
    if not points:
        raise StreamqError("--schemes: no scheme runs at these --bits")
    return points


def point_graph(audio: Path, point: dict[str, Any]) -> str:
    """The point's single-method graph as TOML text (``streamq compare``'s
    graph with this one method; the meter's id is the scheme name)."""
    return build_compare_toml(Path(audio), [point["scheme"]],
                              {point["scheme"]: point["settings"]})


# -- one point, in a worker ------------------------------------------------------------------

def run_point(job: dict[str, Any]) -> dict[str, Any]:
    """Run one point's graph into its folder; never raises for a bad point.

    Parameters
    ----------
    job : dict
        ``audio``, ``scheme``, ``settings``, ``folder`` (the point's output
        folder) and ``stop_file`` (when it exists, the point stops at its next
        step, or does not start).

    Returns
    -------
    dict
        ``status`` ("done", "failed", "interrupted" or "not run"), ``error``
        (one line, or None), ``seconds`` (wall time) and the meter's figures
        (:data:`FIGURES`).
    """
    from streamq.batch.work import _StopCheck, one_line
    from streamq.engine.audiofile import replacing
    from streamq.engine.graph import parse_graph
    from streamq.chain import Chain

    t0 = time.perf_counter()
    out: dict[str, Any] = {"status": "not run", "error": None, "seconds": 0.0}
    stop_file = Path(job["stop_file"])
    if stop_file.exists():
        return out
    folder = Path(job["folder"])
    try:
        text = point_graph(Path(job["audio"]), job)
        folder.mkdir(parents=True, exist_ok=True)
        try:  # an earlier sweep's report must not sit beside this run's graph
            (folder / "report.json").unlink()
        except FileNotFoundError:
            pass
        with replacing(folder / "graph.toml") as f:
            f.write(text)
        graph = parse_graph(text, folder / "graph.toml")
        report = Chain(graph, folder).open().run(progress=_StopCheck(stop_file))
        meter = report.get("meters", {}).get(job["scheme"], {})
        out.update({k: meter.get(k) for k in FIGURES})
        if report["complete"]:
            out["status"] = "done"
        else:
            out.update(status="interrupted", error=f"stopped at sample {report['samples']}")
    except Exception as exc:  # one bad point must not stop the sweep: record it
        out.update(status="failed", error=one_line(exc))
    out["seconds"] = time.perf_counter() - t0
    return out
