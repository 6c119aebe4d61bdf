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

import math
import os
import queue
import sys
import tempfile
import time
import uuid
from concurrent.futures import CancelledError
from pathlib import Path
from typing import Any, Callable

from streamq.batch.driver import BatchProgress, finished_jobs, stopped_by_request
from streamq.batch.engines import DaskCluster, LocalPool
from streamq.errors import StreamqError
from streamq.report.compare import DEFAULT_COMPARED, EIGHT_BIT_TABLES, file_rms
from streamq.report.sweep_files import (
    CSV_FIELDS,
    MAX_GAUSSIAN_MSE,
    envelope,
    gaussian_references,
    json_text,
    plot_sweep,
    write_csv,
    write_json,
)
from streamq.report.sweep_points import (
    DEFAULT_BLOCKS_MS,
    FIGURES,
    parse_bits,
    parse_blocks,
    parse_schemes,
    plan_points,
    run_point,
)

__all__ = ["sweep", "add_parser", "run", "summary_lines", "CSV_FIELDS", "DEFAULT_BLOCKS_MS",
           "FIGURES", "MAX_GAUSSIAN_MSE", "envelope", "parse_bits", "parse_blocks",
           "plan_points"]

EXIT_OK, EXIT_SOME_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


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
        default: every one of :data:`~streamq.report.compare.DEFAULT_COMPARED` that
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
                   help=f"comma-separated (default: every one of {','.join(DEFAULT_COMPARED)} "
                        f"at the word lengths it runs at; also {','.join(EIGHT_BIT_TABLES)}, at 8 bits)")
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
