"""``streamq sweep``: a rate-distortion explorer over one recording.

Every scheme of ``streamq compare`` (same names, same encoder settings: see
:mod:`streamq.report.compare`) runs at every word length of a range and, for
the schemes that work on blocks (``SCHEMES[name].block_ms`` is not None), at
each of several block lengths. Each such *point* is one single-method graph
(file-source, the pdf-estimator if the scheme needs one, encoder, decoder,
error-meter), made by :func:`~streamq.report.compare.build_compare_toml` and
run by streamq's own scheduler, so a point's figures are those of a
``streamq run`` of its graph (kept as ``points/<id>/graph.toml``).

Points run in parallel on the batch engines (:mod:`streamq.batch.engines`):
a local process pool, or a Dask cluster. The output folder gets

``sweep.csv``
    one row per point: scheme, label, bits, block_ms, total bits/sample (side
    information included), side-information bits/sample, SNR, segmental SNR,
    codebook updates, status and error.
``sweep.json``
    the recording's facts, the sweep's settings, the Gaussian reference
    figures and ``points``, each with its encoder settings and figures.
``sweep.png``
    SNR and segmental SNR against total bits/sample, one marker and colour per
    scheme, the upper envelope over all schemes, and reference curves for a
    unit-variance memoryless Gaussian source (not the recording).
``points/<id>/``
    each point's run: graph.toml, report.json and the meter's CSV files.

The CSV and JSON files are rewritten (each atomically) after every finished
point, so an interrupted sweep leaves valid files with what was done and
``"complete": false``.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import queue
import re
import sys
import tempfile
import time
import uuid
from concurrent.futures import CancelledError
from pathlib import Path
from typing import Any, Callable

from streamq.batch.driver import BatchProgress, finished_jobs, stopped_by_request
from streamq.batch.engines import DaskCluster, LocalPool
from streamq.engine.scheduler import json_ready
from streamq.errors import StreamqError
from streamq.report.compare import (
    EXTRA_METHODS,
    METHODS,
    SCHEMES,
    available,
    build_compare_toml,
    encoder_settings,
    file_rms,
    label,
)

EXIT_OK, EXIT_SOME_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130
#: Block lengths (ms) tried for schemes that work on blocks, unless --blocks says otherwise.
DEFAULT_BLOCKS_MS = (8.0, 16.0, 32.0, 64.0)
MIN_BITS, MAX_BITS = 1, 16

# Fixed-rate Lloyd-Max quantizers of a unit-variance Gaussian at 1 to 5 bits
# (2 to 32 levels): mean squared error as printed in J. Max, "Quantizing for
# minimum distortion", IRE Trans. Information Theory 6(1), 1960, Table I,
# typed from memory. tests/test_sweep.py checks them against streamq.design's
# own Lloyd-Max design of the Gaussian (itself checked against the whole table
# in tests/design/test_design_tables.py).
MAX_GAUSSIAN_MSE = {1: 0.3634, 2: 0.1175, 3: 0.03454, 4: 0.009497, 5: 0.002499}

CSV_FIELDS = ("scheme", "label", "bits", "block_ms", "bits_per_sample",
              "side_info_bits_per_sample", "snr_db", "segsnr_db", "codebook_updates", "status",
              "error")
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
    items = list(text) if isinstance(text, (list, tuple)) else str(text).split(",")
    out: list[str] = []
    for raw in items:
        s = str(raw).strip().lower()
        if not s:
            continue
        if s not in METHODS + EXTRA_METHODS:
            raise StreamqError(f"--schemes: unknown scheme '{s}' (choose from "
                               f"{', '.join(METHODS + EXTRA_METHODS)})")
        if s not in out:
            out.append(s)
    if not out:
        raise StreamqError("--schemes: give at least one scheme")
    return out


def _runs_at(scheme: str, bits: int) -> bool:
    if scheme in EXTRA_METHODS:
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
        Scheme names; None: every one of :data:`METHODS` that runs at each
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
    names = schemes if schemes is not None else list(METHODS)
    if schemes is not None:
        for s in names:
            if not any(_runs_at(s, b) for b in bits):
                if s in EXTRA_METHODS:
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
    from streamq.engine.scheduler import build, run_offline

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
        built = build(graph, folder)
        result = run_offline(built, progress=_StopCheck(stop_file), handle_signals=False)
        meter = result.report.get("meters", {}).get(job["scheme"], {})
        out.update({k: meter.get(k) for k in FIGURES})
        if result.complete:
            out["status"] = "done"
        else:
            out.update(status="interrupted", error=f"stopped at sample {result.samples}")
    except Exception as exc:  # one bad point must not stop the sweep: record it
        out.update(status="failed", error=one_line(exc))
    out["seconds"] = time.perf_counter() - t0
    return out


class _PointPool(LocalPool):
    """The batch engine's local process pool, running sweep points."""

    def submit(self, job: dict, done: "queue.Queue") -> None:
        fut = self.executor.submit(run_point, job)
        self.futures.append(fut)
        fut.add_done_callback(lambda f, job=job: done.put((job, f)))


class _PointCluster(DaskCluster):
    """The batch engine's Dask cluster, running sweep points."""

    def submit(self, job: dict, done: "queue.Queue") -> None:
        key = f"streamq-sweep-{job['id']}-{job['run_id']}"
        fut = self.client.submit(run_point, job, key=key, pure=False)
        self.futures.append(fut)
        fut.add_done_callback(lambda f, job=job: done.put((job, f)))


def _make_engine(workers: int | None, cluster: str | None, points: int):
    if cluster:
        return _PointCluster(cluster)
    n = workers if workers is not None else (os.cpu_count() or 1)
    return _PointPool(max(1, min(n, points)))


class SweepProgress(BatchProgress):
    """Points finished out of all, as a tqdm bar on stderr; nothing when
    ``quiet`` or when stderr is not a terminal (as ``streamq batch``, whose
    ``note`` and ``close`` it shares)."""

    def __init__(self, total: int, quiet: bool, label_text: str):
        self.bar = None
        self.failed = 0
        if quiet or not sys.stderr.isatty():
            return
        from tqdm import tqdm
        self.bar = tqdm(total=total, desc=label_text, unit="point", leave=False,
                        dynamic_ncols=True,
                        bar_format="{desc}: {n_fmt}/{total_fmt} points{postfix} |{bar}| "
                                   "[{elapsed}, {remaining} left]")

    def point_done(self, failed: bool) -> None:
        self.failed += bool(failed)
        if self.bar is not None:
            if self.failed:
                self.bar.set_postfix_str(f"{self.failed} failed", refresh=False)
            self.bar.update(1)

class _NoSignals:
    """Stand-in for the batch's signal handling when the caller keeps its own."""

    def __init__(self):
        self.requests: list[int] = []
        self.hard = False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


# -- the sweep ----------------------------------------------------------------------------------

def sweep(audio: str | Path, bits: str | int | list[int], schemes: str | list[str] | None = None,
          *, blocks: str | list[float] | None = None, out_dir: str | Path | None = None,
          workers: int | None = None, cluster: str | None = None, quiet: bool = True,
          progress: Callable[[dict[str, Any]], None] | None = None,
          handle_signals: bool = True, plot: bool = True) -> dict[str, Any]:
    """Run every scheme at every word length (and block length) over ``audio``.

    Parameters
    ----------
    audio : str or Path
        The recording (any format libsndfile reads).
    bits : str, int or list of int
        Word lengths: ``4``, ``"2-6"``, ``"2,4,6"`` or a list.
    schemes : str, list of str or None
        Scheme names of ``streamq compare`` (comma-separated or a list);
        default: every one of :data:`~streamq.report.compare.METHODS` that
        runs at each word length. ``g711-mu``/``g711-a`` run at 8 bits only.
    blocks : str, list of float or None
        Block lengths in ms for the schemes that work on blocks (default
        :data:`DEFAULT_BLOCKS_MS`).
    out_dir : str, Path or None
        Write sweep.csv, sweep.json, sweep.png and the points' runs here;
        default: a temporary folder, removed afterwards (nothing written).
    workers : int or None
        Local worker processes (default: all cores).
    cluster : str or None
        Run on Dask instead: ``tcp://HOST:PORT`` or ``local:N`` (as ``streamq
        batch --cluster``).
    quiet : bool
        No progress bar (there is none anyway when stderr is not a terminal).
    progress : callable or None
        Called with each point's entry (see Returns) as it finishes.
    handle_signals : bool
        Turn SIGINT/SIGTERM into a clean stop: points not finished are
        dropped, the result has ``complete`` False. A second signal stops
        the workers at once.
    plot : bool
        Draw sweep.png (with ``out_dir``).

    Returns
    -------
    dict
        JSON-able: the file's facts, the settings of the sweep, ``complete``,
        ``counts`` by status, ``references`` (the Gaussian figures the plot
        draws) and ``points``, each with ``id``, ``scheme``, ``label``,
        ``bits``, ``block_ms``, ``settings`` (encoder fields), ``estimator``
        (the scheme's own estimator fields, or None), ``status``, ``error``,
        ``on_envelope`` and the figures (``bits_per_sample`` is the total,
        side information included).

    Raises
    ------
    StreamqError
        Bad input: a missing or unreadable file, a bad word-length range,
        block list or scheme name, bad engine options.
    """
    from streamq.batch.driver import _signals_held, _StopRequests
    from streamq.batch.engines import parse_cluster_address
    from streamq.batch.work import one_line

    audio = Path(audio).expanduser().resolve()
    bit_list = parse_bits(bits)
    block_list = parse_blocks(blocks)
    scheme_list = parse_schemes(schemes)
    if workers is not None and workers < 1:
        raise StreamqError(f"--workers {workers}: give at least 1")
    if cluster is not None:
        if workers is not None:
            raise StreamqError("give --workers (local pool) or --cluster, not both")
        parse_cluster_address(cluster)
    rms, info = file_rms(audio)
    if rms <= 0:
        raise StreamqError(f"{audio}: the recording is silent (RMS 0); nothing to sweep")
    points = plan_points(audio, rms, bit_list, scheme_list, block_list)

    with tempfile.TemporaryDirectory(prefix="streamq-sweep-") as tmp:
        if out_dir is not None:
            from streamq.runner import prepare_out_dir
            out = prepare_out_dir(Path(out_dir).expanduser()).resolve()
        else:
            out = Path(tmp)
        run_id = uuid.uuid4().hex[:10]
        stop_file = out / f".stop-{run_id}"
        entries = []
        for p in points:
            settings = dict(p["settings"])
            estimator = settings.pop("estimator", None)
            entries.append({"id": p["id"], "scheme": p["scheme"], "label": p["label"],
                            "bits": p["bits"], "block_ms": p["block_ms"], "settings": settings,
                            "estimator": estimator, "status": "not run", "error": None,
                            **{k: None for k in FIGURES}, "seconds": None, "on_envelope": False,
                            "folder": f"points/{p['id']}"})
        head = {"file": str(audio), "sample_rate": info.samplerate, "channels": info.channels,
                "frames": info.frames, "seconds": info.frames / info.samplerate, "rms": rms,
                "rms_dbfs": 20 * math.log10(rms), "bits": bit_list, "blocks_ms": block_list,
                "schemes": list(dict.fromkeys(p["scheme"] for p in points)),
                "complete": False, "engine": None, "wall_seconds": None,
                "out_dir": str(out) if out_dir is not None else None,
                "references": gaussian_references()}
        jobs = [{**p, "audio": str(audio), "folder": str(out / "points" / p["id"]),
                 "stop_file": str(stop_file), "run_id": run_id, "index": i}
                for i, p in enumerate(points)]

        def save(final: bool) -> None:
            if out_dir is None:
                return
            res = _result(head, entries)
            write_csv(out / "sweep.csv", res["points"])
            write_json(out / "sweep.json", res)
            if final and plot:
                try:
                    if plot_sweep(out / "sweep.png", res) is not None:
                        head["plot"] = "sweep.png"
                    else:  # no finished point: no plot, and none from an earlier sweep
                        (out / "sweep.png").unlink(missing_ok=True)
                except Exception as exc:  # the figures are on disk: only warn
                    print(f"streamq: warning: sweep.png not written ({one_line(exc)})",
                          file=sys.stderr)
                write_json(out / "sweep.json", _result(head, entries))

        bar = SweepProgress(len(jobs), quiet, f"sweep {audio.name}")
        engine = None
        killed = False
        t0 = time.perf_counter()
        stop = _StopRequests() if handle_signals else _NoSignals()
        with stop:
            try:
                done_q: queue.Queue = queue.Queue()
                submitted = 0
                # as `streamq batch`: workers start with Ctrl-C blocked, so only this
                # process hears it and stops them cleanly
                with _signals_held():
                    try:
                        engine = _make_engine(workers, cluster, len(jobs))
                        engine.check_workers([str(audio), str(out)])
                        head["engine"] = engine.describe()
                        for job in jobs:
                            engine.submit(job, done_q)
                            submitted += 1
                    except StreamqError:
                        raise
                    except Exception as exc:
                        raise StreamqError(f"cannot start the sweep workers: "
                                           f"{one_line(exc)}") from None
                for job, fut in finished_jobs(done_q, submitted, stop, stop_file, engine, bar,
                                              "points"):
                    res = stopped_by_request(_outcome(fut, one_line), stop)
                    entry = entries[job["index"]]
                    entry.update(res)
                    if res["status"] in ("done", "failed"):
                        bar.point_done(res["status"] == "failed")
                        save(final=False)
                        if progress is not None:
                            progress(dict(entry))
            except KeyboardInterrupt:  # asked twice: stop at once
                killed = True
                if engine is not None:
                    engine.kill()
            finally:
                bar.close()
                if engine is not None and not killed:
                    engine.close()
                try:
                    stop_file.unlink()
                except OSError:
                    pass
            stop.hard = False  # from here on a Ctrl-C changes nothing: write the results
            for e in entries:
                if e["status"] in ("not run", "interrupted") and (killed or stop.requests):
                    e["error"] = e["error"] or "stopped before it ran"
            head["complete"] = all(e["status"] in ("done", "failed") for e in entries)
            head["wall_seconds"] = time.perf_counter() - t0
            save(final=True)
            return _result(head, entries)


def _outcome(fut, one_line) -> dict[str, Any]:
    try:
        return fut.result()
    except CancelledError:
        return {"status": "not run", "error": None}
    except Exception as exc:  # the worker itself died
        return {"status": "failed", "error": f"worker failed: {one_line(exc)}"}


def _result(head: dict[str, Any], entries: list[dict[str, Any]]) -> dict[str, Any]:
    pts = [dict(e) for e in entries]
    for i in envelope(pts, "snr_db"):
        pts[i]["on_envelope"] = True
    counts: dict[str, int] = {}
    for e in pts:
        counts[e["status"]] = counts.get(e["status"], 0) + 1
    return {**head, "counts": counts, "points": pts}


def envelope(points: list[dict[str, Any]], key: str = "snr_db") -> list[int]:
    """Indices of the finished points on the upper envelope of ``key`` against
    total bits/sample: each has the highest ``key`` of all points at its rate
    or below (the least distortion reached for that many bits), in rising
    rate."""
    done = [(float(p["bits_per_sample"]), -float(p[key]), i) for i, p in enumerate(points)
            if p.get("status") == "done" and _finite(p.get(key))
            and _finite(p.get("bits_per_sample"))]
    done.sort()
    out: list[int] = []
    best = -math.inf
    for _, neg, i in done:
        if -neg > best:
            best = -neg
            out.append(i)
    return out


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def gaussian_references() -> dict[str, Any]:
    """The reference figures for a unit-variance memoryless Gaussian source."""
    from streamq.design.theory import ECSQ_GAP_BITS, ECSQ_GAP_DB
    return {
        "source": "unit-variance memoryless Gaussian (not the recording)",
        "rate_distortion": "D(R) = 2^(-2R), SNR = 6.02 R dB (Shannon 1959)",
        "lloyd_max_fixed_rate": [{"bits": b, "mse": m, "snr_db": -10 * math.log10(m)}
                                 for b, m in sorted(MAX_GAUSSIAN_MSE.items())],
        "lloyd_max_source": "Max 1960, Table I",
        "entropy_coded_uniform_gap_db": ECSQ_GAP_DB,
        "entropy_coded_uniform_gap_bits": ECSQ_GAP_BITS,
        "entropy_coded_uniform_source": "high-rate gap to the bound (Gish and Pierce 1968)",
    }


# -- output files ---------------------------------------------------------------------------------

def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf" if v < 0 else "")
    return str(v)


def _written(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically; a failure is a one-line StreamqError."""
    from streamq.engine.audiofile import replacing, unwritable
    try:
        with replacing(Path(path), newline="") as f:
            f.write(text)
    except OSError as exc:
        raise StreamqError(unwritable(Path(path), exc)) from None


def write_csv(path: Path, points: list[dict[str, Any]]) -> None:
    """sweep.csv: one row per point (:data:`CSV_FIELDS`), written atomically."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_FIELDS)
    for p in points:
        row = []
        for k in CSV_FIELDS:
            v = p.get(k)
            row.append(f"{v:g}" if k == "block_ms" and v is not None else _cell(v))
        w.writerow(row)
    _written(path, buf.getvalue())


def json_text(res: dict[str, Any]) -> str:
    """The sweep as JSON text (non-finite figures become null)."""
    return json.dumps(json_ready(res), indent=2) + "\n"


def write_json(path: Path, res: dict[str, Any]) -> None:
    """sweep.json, written atomically."""
    _written(path, json_text(res))


# Our own colour cycle for up to 15 schemes (then it repeats with other markers).
_COLOURS = ("#1f5f8b", "#d9822b", "#2e8b57", "#b23a48", "#7a4f9a", "#8c6d31", "#d45d9e",
            "#e6194b", "#3fa7b5", "#a6a13a", "#5a7bd8", "#e0a31b", "#1b8f7e", "#9b2f6b",
            "#6b8e23")
_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "*", "<", ">", "h", "p", "d", "8", "H")
REF_INK = "#55606a"
ENVELOPE = "#f2b01e"


def plot_sweep(path: Path, res: dict[str, Any]) -> Path | None:
    """sweep.png: SNR (left) and segmental SNR (right) against total
    bits/sample, one colour and marker per scheme (its own best points joined),
    the upper envelope over all schemes, and the Gaussian reference curves.
    Returns None (and writes nothing) when no point has figures."""
    import numpy as np

    from streamq.design.theory import ECSQ_GAP_DB
    from streamq.report.plots import INK, _figure, _save, _style

    pts = [p for p in res["points"] if p["status"] == "done"
           and _finite(p.get("bits_per_sample")) and _finite(p.get("snr_db"))]
    if not pts:
        return None
    rates = [float(p["bits_per_sample"]) for p in pts]
    lo, hi = max(0.0, min(rates) - 0.35), max(rates) + 0.35
    r = np.linspace(lo, hi, 200)
    per_bit = 20 * math.log10(2)  # 6.02 dB per bit
    fig = _figure(14.0, 6.6)
    grid = fig.add_gridspec(1, 3, width_ratios=[1, 1, 0.58])
    axes = [fig.add_subplot(grid[0, 0]), fig.add_subplot(grid[0, 1])]
    legend_ax = fig.add_subplot(grid[0, 2])
    legend_ax.axis("off")
    schemes = list(dict.fromkeys(p["scheme"] for p in pts))
    handles: dict[str, Any] = {}
    for ax, key, title in zip(axes, ("snr_db", "segsnr_db"), ("SNR", "segmental SNR")):
        _style(ax)
        ys = [float(p[key]) for p in pts if _finite(p.get(key))]
        # references: unit-variance memoryless Gaussian (the same for SNR and
        # segmental SNR, since such a source has the same variance in every frame)
        handles["bound"], = ax.plot(r, per_bit * r, color=REF_INK, lw=1.6, zorder=1,
                                    label="rate-distortion bound, SNR = 6.02 R dB "
                                          "(Shannon 1959)")
        handles["ecsq"], = ax.plot(r, per_bit * r - ECSQ_GAP_DB, color=REF_INK, lw=1.3,
                                   ls="--", zorder=1,
                                   label=f"entropy-coded uniform, high rate: bound - "
                                         f"{ECSQ_GAP_DB:.2f} dB (Gish & Pierce 1968)")
        mx = [(b, -10 * math.log10(m)) for b, m in sorted(MAX_GAUSSIAN_MSE.items())
              if lo <= b <= hi]
        if mx:
            handles["max"], = ax.plot([b for b, _ in mx], [s for _, s in mx], color=REF_INK,
                                      ls=":", lw=1.2, marker="x", ms=8, mew=1.8, zorder=4,
                                      label="Lloyd-Max, fixed rate (Max 1960)")
        for si, s in enumerate(schemes):
            mine = [i for i, p in enumerate(pts) if p["scheme"] == s and _finite(p.get(key))]
            if not mine:
                continue
            colour, marker = _COLOURS[si % len(_COLOURS)], _MARKERS[si % len(_MARKERS)]
            x = [rates[i] for i in mine]
            y = [float(pts[i][key]) for i in mine]
            h = ax.scatter(x, y, s=70 if marker == "*" else 32, color=colour, marker=marker, alpha=0.85, zorder=3,
                           linewidths=0.4, edgecolors="white", label=s)
            handles.setdefault(f"s:{s}", h)
            front = envelope([pts[i] for i in mine], key)
            ax.plot([x[i] for i in front], [y[i] for i in front], color=colour, lw=1.0,
                    alpha=0.7, zorder=2)
        env = envelope(pts, key)
        if env:
            ex = [rates[i] for i in env] + [hi]
            ey = [float(pts[i][key]) for i in env]
            ey.append(ey[-1])
            handles["env"], = ax.step(ex, ey, where="post", color=ENVELOPE, lw=5, alpha=0.45,
                                      zorder=1.5, solid_joinstyle="miter", label="upper envelope: best of all schemes at "
                                                      "this rate or below")
        all_y = ys + [float(v) for v in per_bit * np.array([lo, hi])]
        ymin, ymax = min(all_y), max(all_y)
        pad = 0.05 * (ymax - ymin) + 0.5
        ax.set_ylim(ymin - pad, ymax + pad)
        ax.set_xlim(lo, hi)
        ax.set_xlabel("total bits/sample (index bits + side information)", fontsize=9)
        ax.set_ylabel(f"{title} (dB)", fontsize=9)
        ax.set_title(f"{title} against rate", fontsize=10, color=INK)
    order = ([handles[k] for k in ("env",) if k in handles]
             + [handles[f"s:{s}"] for s in schemes if f"s:{s}" in handles])
    refs = [handles[k] for k in ("bound", "max", "ecsq") if k in handles]
    leg1 = legend_ax.legend(handles=order, labels=[_wrap(h.get_label(), 40) for h in order],
                            loc="upper left", fontsize=8.5, frameon=False,
                            title="this recording: one marker per point\n(word length x block)",
                            title_fontsize=8.5, alignment="left")
    legend_ax.add_artist(leg1)
    wrapped = [h.get_label() for h in refs]
    legend_ax.legend(handles=refs, labels=[_wrap(t, 40) for t in wrapped], loc="lower left",
                     fontsize=8, frameon=False, title="references: unit-variance Gaussian\n"
                     "source (not this recording)", title_fontsize=8.5, alignment="left")
    name = Path(res["file"]).name
    done = len(pts)
    state = "" if res.get("complete") else ", STOPPED EARLY (points done so far)"
    fig.suptitle(f"{name}: {done} points, {len(schemes)} schemes, {res['seconds']:.1f} s at "
                 f"{res['sample_rate']} Hz{state}\ngrey lines: theory for a Gaussian source, "
                 f"not for this recording", fontsize=10.5, color=INK)
    return _save(fig, path)


def _wrap(text: str, width: int) -> str:
    import textwrap
    return "\n".join(textwrap.wrap(text, width))


# -- the command ------------------------------------------------------------------------------------

HELP_EPILOG = """\
Each point is one single-method graph (the one `streamq compare` would build for that method),
run by streamq's scheduler: points/<id>/graph.toml reproduces it with `streamq run`.

DIR gets sweep.csv (one row per point), sweep.json (the file's facts, the settings and every
point's encoder settings and figures) and sweep.png (SNR and segmental SNR against total
bits/sample with the upper envelope over all schemes and reference curves for a unit-variance
Gaussian source). bits/sample is the total: index bits plus side information.

exit status: 0 every point done, 1 some points failed (their rows say why), 2 bad file or
options, 130 stopped by Ctrl-C or SIGTERM (finished points are kept, "complete": false).
"""


def add_parser(subparsers) -> None:
    import argparse
    p = subparsers.add_parser(
        "sweep", help="rate-distortion explorer: every scheme at every word length and block",
        description="Run the schemes of `streamq compare` over one recording at every word "
                    "length of a range and, for block-adaptive schemes, at several block "
                    "lengths; tabulate and plot SNR against total bits/sample.",
        epilog=HELP_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("audio", type=Path, metavar="AUDIOFILE", help="the recording to sweep over")
    p.add_argument("--bits", required=True, metavar="RANGE",
                   help="word lengths: 4, 2-6 or 2,4,6")
    p.add_argument("--schemes", default=None, metavar="A,B,...",
                   help=f"comma-separated (default: every one of {','.join(METHODS)} at the word "
                        f"lengths it runs at; also {','.join(EXTRA_METHODS)}, at 8 bits)")
    p.add_argument("--blocks", default=None, metavar="MS,MS,...",
                   help="block lengths in ms for the block-adaptive schemes (default: "
                        f"{','.join(f'{b:g}' for b in DEFAULT_BLOCKS_MS)})")
    p.add_argument("--out", type=Path, required=True, metavar="DIR",
                   help="output folder (sweep.csv, sweep.json, sweep.png, points/)")
    p.add_argument("--json", action="store_true", help="also print the sweep as JSON")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default: the number of CPUs)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="run on Dask: tcp://HOST:PORT of a scheduler, or local:N")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary lines")
    p.set_defaults(func=run)


def summary_lines(res: dict[str, Any]) -> list[str]:
    """A few lines: counts, where the files are, and the points on the envelope."""
    c = res["counts"]
    lines = [f"{Path(res['file']).name}: {c.get('done', 0)} of {len(res['points'])} points "
             f"done, {c.get('failed', 0)} failed"
             + ("" if res["complete"] else ", STOPPED EARLY")
             + (f" ({res['wall_seconds']:.1f} s on {res['engine']})"
                if res.get("wall_seconds") is not None and res.get("engine") else "")]
    env = sorted((p for p in res["points"] if p.get("on_envelope")),
                 key=lambda p: p["bits_per_sample"])
    if env:
        lines.append("  best SNR at or below each rate (the envelope):")
        lines.append(f"  {'bits/sample':>11}  {'SNR dB':>7}  {'seg SNR dB':>10}  scheme")
        for p in env:
            seg = p.get("segsnr_db")
            lines.append(f"  {p['bits_per_sample']:11.4f}  {p['snr_db']:7.2f}  "
                         f"{seg if seg is None else format(seg, '10.2f'):>10}  "
                         f"{p['scheme']} ({p['bits']} bits"
                         + (f", {p['block_ms']:g} ms" if p.get("block_ms") is not None else "")
                         + ")")
    if res.get("out_dir"):
        files = ["sweep.csv", "sweep.json"] + (["sweep.png"] if res.get("plot") else [])
        lines.append(f"  written: {', '.join(str(Path(res['out_dir']) / f) for f in files)}")
    return lines


def run(args) -> int:
    """``streamq sweep``, from parsed arguments; returns the exit status."""
    res = sweep(args.audio, args.bits, args.schemes, blocks=args.blocks, out_dir=args.out,
                workers=args.workers, cluster=args.cluster, quiet=args.quiet)
    if args.json:
        sys.stdout.write(json_text(res))
    elif not args.quiet:
        for line in summary_lines(res):
            print(line)
    failed = [p for p in res["points"] if p["status"] == "failed"]
    if failed:
        print(f"streamq: {len(failed)} point(s) failed:", file=sys.stderr)
        for p in failed[:20]:
            print(f"  {p['id']}: {p['error']}", file=sys.stderr)
        if len(failed) > 20:
            print(f"  ... and {len(failed) - 20} more (see sweep.csv)", file=sys.stderr)
    if not res["complete"]:
        print(f"streamq: interrupted; the {res['counts'].get('done', 0)} finished points are in "
              f"{Path(res['out_dir']) / 'sweep.csv'} (\"complete\": false)", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_SOME_FAILED if failed else EXIT_OK
