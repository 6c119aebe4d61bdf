"""The ``streamq design`` sub-command.

Designs one quantizer from a named zero-mean, unit-variance PDF or from the
samples of an audio file (all channels pooled) and prints it as an aligned
table or as JSON; ``--export PREFIX`` also writes ``PREFIX.json``,
``PREFIX.csv`` and ``PREFIX.h`` (C arrays for firmware).

Examples
--------
::

    streamq design --pdf laplacian --bits 3
    streamq design --pdf gaussian --levels 16 --method optimal --json
    streamq design --from take3.wav --bits 4 --method ecsq --entropy 3.2
    streamq design --pdf gamma --levels 32 --export fw/gamma32
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import sys

import numpy as np

from streamq.design._validate import check_levels, first_bad_value
from streamq.design.optimal import MAX_DP_LEVELS
from streamq.errors import StreamqError

PDF_CHOICES = ("gaussian", "laplacian", "gamma", "uniform")
METHOD_CHOICES = ("lloyd-max", "optimal", "ecsq", "uniform", "mu-law", "a-law", "compander")


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``design`` sub-command to an argparse sub-parser set."""
    p = subparsers.add_parser(
        "design",
        help="design a scalar quantizer from a PDF or an audio file",
        description=(
            "Design a scalar quantizer for a zero-mean, unit-variance PDF (--pdf) or for the "
            "samples of an audio file (--from, all channels pooled), and print its thresholds "
            "and levels."
        ),
    )
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--pdf", choices=PDF_CHOICES, help="amplitude PDF (zero mean, unit variance)")
    src.add_argument("--from", dest="source", metavar="AUDIOFILE",
                     help="design on this file's samples instead (all channels pooled)")
    size = p.add_mutually_exclusive_group(required=True)
    size.add_argument("--levels", type=int, metavar="L", help="number of reconstruction levels")
    size.add_argument("--bits", type=int, metavar="B", help="bits per sample (L = 2**B)")
    p.add_argument("--method", choices=METHOD_CHOICES, default="lloyd-max",
                   help="design method (default: lloyd-max); optimal: globally optimal by "
                        f"dynamic programming, at most {MAX_DP_LEVELS} levels on a file (any "
                        "count for a PDF; for the log-concave gaussian, laplacian and uniform "
                        "PDFs it is the Lloyd-Max design)")
    p.add_argument("--entropy", type=float, metavar="BITS",
                   help="target index entropy in bits/sample (ecsq)")
    p.add_argument("--json", action="store_true",
                   help="print one JSON object instead of a table; snr_db is the string \"inf\" "
                        "when the MSE is zero (e.g. no more distinct values than levels) and "
                        "\"-inf\" when the signal power is zero but the MSE is not")
    p.add_argument("--export", metavar="PREFIX",
                   help="also write PREFIX.json, PREFIX.csv and PREFIX.h")
    p.set_defaults(func=run)
    return p


def _level_count(args) -> int:
    if args.levels is not None:
        return check_levels(args.levels, "--levels")
    bits = args.bits
    if bits < 1 or bits > 16:
        raise StreamqError(f"--bits must be between 1 and 16, got {bits}")
    return 1 << bits


def _read_samples(path: str) -> np.ndarray:
    import soundfile

    if not os.path.exists(path):
        raise StreamqError(f"{path}: no such file")
    try:
        data, _rate = soundfile.read(path, dtype="float64", always_2d=True)
    except Exception as exc:  # libsndfile reports unreadable files in many ways
        raise StreamqError(f"{path}: cannot read audio ({exc})") from None
    if data.size == 0:
        raise StreamqError(f"{path}: the file holds no samples")
    x = data.reshape(-1)
    found = first_bad_value(x)
    if found is not None:
        frame, channel = divmod(found[0], data.shape[1])
        raise StreamqError(f"{path}: sample at frame {frame}, channel {channel} is {found[1]}"
                           f"{found[2]}")
    return x


def _design(args):
    from streamq.design.api import design

    count = _level_count(args)
    options = {}
    if args.method == "ecsq":
        if args.entropy is None:
            raise StreamqError("--method ecsq needs --entropy BITS (the target index entropy)")
        options["entropy"] = args.entropy
    elif args.entropy is not None:
        raise StreamqError("--entropy only applies to --method ecsq")
    if args.pdf is not None:
        cb, rep = design(args.method, count, pdf=args.pdf, **options)
        source = {"pdf": args.pdf, "mean": 0.0, "std": 1.0}
    else:
        x = _read_samples(args.source)
        cb, rep = design(args.method, count, samples=x, **options)
        source = {"file": args.source, "samples": int(x.size)}
    return cb, rep, source


def result_dict(cb, rep, source) -> dict:
    """The JSON object printed by ``--json`` and written to ``PREFIX.json``."""
    r = rep.to_dict()
    return {
        "method": r["method"],
        "size": cb.size,
        "version": cb.version,
        "source": source,
        "thresholds": [float(v) for v in cb.thresholds],
        "levels": [float(v) for v in cb.levels],
        "mse": r["mse"],
        "snr_db": r["snr_db"],
        "entropy_bits": r["entropy_bits"],
        "iterations": r["iterations"],
        "converged": r["converged"],
        "reference": r["reference"],
        "details": r["details"],
    }


def _fmt(v: float) -> str:
    if math.isinf(v):
        return "-inf" if v < 0 else "+inf"
    return f"{v:.8g}"


def format_table(cb, rep, source) -> str:
    """Readable aligned table of the cells plus a summary line."""
    if "pdf" in source:
        what = f"{source['pdf']} PDF (mean 0, std 1)"
    else:
        what = f"{source['file']} ({source['samples']} samples, channels pooled)"
    lines = [f"{rep.method} quantizer, {cb.size} levels, designed for {what}"]
    lower = np.concatenate(([-np.inf], cb.thresholds))
    upper = np.concatenate((cb.thresholds, [np.inf]))
    rows = [("index", "from", "to", "level")]
    for i in range(cb.size):
        rows.append((str(i), _fmt(lower[i]), _fmt(upper[i]), _fmt(cb.levels[i])))
    widths = [max(len(r[k]) for r in rows) for k in range(4)]
    for r in rows:
        lines.append("  ".join(cell.rjust(widths[k]) for k, cell in enumerate(r)))
    snr = "inf" if math.isinf(rep.snr_db) else f"{rep.snr_db:.3f}"
    lines.append(
        f"mse {rep.mse:.6g}   snr {snr} dB   index entropy {rep.entropy_bits:.4f} bits   "
        f"iterations {rep.iterations}   {'converged' if rep.converged else 'NOT converged'}"
    )
    return "\n".join(lines)


def _c_name(prefix: str) -> str:
    base = os.path.basename(prefix) or "codebook"
    name = re.sub(r"[^0-9A-Za-z_]", "_", base)
    if name[0].isdigit():
        name = "q_" + name
    return name.lower()


def format_c_header(cb, rep, source, prefix: str) -> str:
    """C header with the thresholds and levels as const double and float arrays."""
    name = _c_name(prefix)
    guard = name.upper() + "_CODEBOOK_H"
    L = cb.size

    def arr(ctype, suffix, values, fmt):
        body = ",\n    ".join(
            ", ".join(fmt(v) for v in values[i:i + 4]) for i in range(0, len(values), 4)
        )
        return f"static const {ctype} {name}_{suffix}[{len(values)}] = {{\n    {body}\n}};"

    def dbl(v):
        return repr(float(v))

    def flt(v):
        s = f"{float(np.float32(v)):.9g}"
        if "e" not in s and "." not in s:
            s += ".0"
        return s + "f"

    src = source.get("pdf") or os.path.basename(source.get("file", ""))
    snr = "inf" if math.isinf(rep.snr_db) else f"{rep.snr_db:.3f}"
    return "\n".join([
        f"/* {rep.method} quantizer with {L} levels for {src}; written by streamq design.",
        f" * mse {rep.mse:.6g}, snr {snr} dB, index entropy {rep.entropy_bits:.4f} bits.",
        " * Index i covers [thresholds[i-1], thresholds[i]); a value equal to a",
        " * threshold belongs to the upper cell. */",
        f"#ifndef {guard}",
        f"#define {guard}",
        "",
        f"#define {name.upper()}_LEVEL_COUNT {L}",
        f"#define {name.upper()}_THRESHOLD_COUNT {L - 1}",
        "",
        arr("double", "thresholds", cb.thresholds, dbl),
        arr("double", "levels", cb.levels, dbl),
        arr("float", "thresholds_f", cb.thresholds, flt),
        arr("float", "levels_f", cb.levels, flt),
        "",
        f"#endif /* {guard} */",
        "",
    ])


def check_export_prefix(prefix: str) -> None:
    """Refuse an ``--export`` prefix that cannot name the three files.

    The prefix needs a file-name part (``fw/`` or ``.`` would write hidden
    ``.json``/``.csv``/``.h`` files) and an existing folder. Checked before
    designing, so that a long design is not lost to a typo.
    """
    folder, base = os.path.split(prefix)
    if base in ("", ".", ".."):
        raise StreamqError(f"--export {prefix!r}: give a file name prefix after the folder "
                           f"(e.g. {os.path.join(folder or '.', 'codebook')!r})")
    if folder and not os.path.isdir(folder):
        what = "is not a folder" if os.path.exists(folder) else "does not exist"
        raise StreamqError(f"--export: folder {folder} {what}")


def export(cb, rep, source, prefix: str) -> list:
    """Write PREFIX.json, PREFIX.csv and PREFIX.h; return their paths."""
    check_export_prefix(prefix)
    paths = [prefix + ".json", prefix + ".csv", prefix + ".h"]
    try:
        with open(paths[0], "w", encoding="utf-8") as fh:
            json.dump(result_dict(cb, rep, source), fh, indent=2)
            fh.write("\n")
        lower = np.concatenate(([-np.inf], cb.thresholds))
        upper = np.concatenate((cb.thresholds, [np.inf]))
        with open(paths[1], "w", encoding="utf-8") as fh:
            fh.write("index,from,to,level\n")
            for i in range(cb.size):
                fh.write(f"{i},{float(lower[i])!r},{float(upper[i])!r},{float(cb.levels[i])!r}\n")
        with open(paths[2], "w", encoding="utf-8") as fh:
            fh.write(format_c_header(cb, rep, source, prefix))
    except OSError as exc:
        raise StreamqError(f"--export: cannot write {exc.filename}: {exc.strerror}") from None
    return paths


def run(args) -> int:
    """Run ``streamq design``; returns the exit status (bad input raises StreamqError)."""
    if args.export is not None:
        check_export_prefix(args.export)
    cb, rep, source = _design(args)
    if rep.details.get("target_missed"):
        print(f"streamq: warning: ecsq {rep.details.get('target_note', 'missed the target')}",
              file=sys.stderr)
    if args.json:
        print(json.dumps(result_dict(cb, rep, source)))
    else:
        print(format_table(cb, rep, source))
    if args.export is not None:
        paths = export(cb, rep, source, args.export)
        if not args.json:
            print("wrote " + ", ".join(paths))
    return 0
