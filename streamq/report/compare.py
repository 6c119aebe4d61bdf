"""``streamq compare``: several quantizers over one recording in a single pass,
ranked by SNR.

The command builds one fan-out graph (one file-source, one pdf-estimator when
an adaptive method is asked for, and an encoder, decoder and error-meter per
method), runs it once, and prints a table sorted by SNR with segmental SNR,
total bits per sample including side information, index entropy and the
number of codebook updates.

What each method name means here (all at ``--bits`` bits, i.e. 2**bits levels):

``uniform``
    fixed uniform quantizer over +-``loading`` times the file's RMS (default
    +-4 RMS, the usual loading for Gaussian-like material), never wider than
    full scale: designs with ``scale = min(rms, 1/loading)``.
``mu-law``, ``a-law``
    continuous compander over full scale (mu = 255, A = 87.6): the encoder
    loads a compander at 4 times its ``scale``, so ``scale = 0.25``.
``lloyd-max``
    fixed Lloyd-Max codebook trained on the file itself (encoder field ``train``).
``lloyd-max-adaptive``
    Lloyd-Max redesigned every hop from the trailing window (default 500 ms
    window, 100 ms hop); side information counted.
``optimal``
    fixed, globally optimal (dynamic programming), trained on the file itself.
``ecsq``
    fixed, entropy-constrained, trained on the file itself, aiming at
    ``--entropy`` bits/sample (default ``bits - 0.5``).
``g711-mu``, ``g711-a``
    the 8-bit G.711 tables (only with ``--bits 8``).

Adaptive schemes on short blocks (the ``block`` length, default in
:data:`SCHEMES`, is what ``streamq sweep`` varies):

``lloyd-max-trailing``
    Lloyd-Max redesigned from the trailing window, window = hop = block
    (32 ms); side information counted.
``lloyd-max-lookahead``
    Lloyd-Max designed on the very window it codes (one window of latency),
    window = hop = block (32 ms); side information counted.
``lloyd-max-gain``
    forward gain adaptation: a unit-variance Gaussian Lloyd-Max codebook
    scaled per block (16 ms) by the block's RMS on a 1.5 dB grid, 6 bits of
    side information per block.
``lloyd-max-step``, ``uniform-step``
    backward step adaptation sample by sample (Lloyd-Max or uniform shape),
    no side information (2 to 5 bits, where the default multipliers exist).
``lloyd-max-backward``
    the model-fit backward mode: a Gaussian fitted to the decoded past every
    hop (block, 5 ms), on a window of four hops; no side information.
"""

from __future__ import annotations

import json
import math
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from streamq.engine.scheduler import json_ready
from streamq.errors import StreamqError


@dataclass(frozen=True)
class Scheme:
    """One adaptive scheme of the comparison: its default block (None: no
    block), what the block is (``window`` of the estimator, ``gain_block``,
    ``hop`` of the backward fit) and the word lengths it runs at."""

    label: str
    block_ms: float | None = None
    min_bits: int = 1
    max_bits: int = 16


SCHEMES = {
    "lloyd-max-trailing": Scheme("Lloyd-Max, trailing window, window = hop = {block} ms", 32.0),
    "lloyd-max-lookahead": Scheme("Lloyd-Max, lookahead, window = hop = {block} ms", 32.0),
    "lloyd-max-gain": Scheme("Gaussian Lloyd-Max x block RMS, {block} ms blocks, 1.5 dB "
                             "grid, 6 bits/block", 16.0),
    "lloyd-max-step": Scheme("Gaussian Lloyd-Max shape, step adapted every sample", None, 2, 5),
    "uniform-step": Scheme("uniform, step adapted every sample", None, 2, 5),
    "lloyd-max-backward": Scheme("Gaussian fitted to the decoded past, {block} ms hop, "
                                 "window = 4 hops", 5.0),
}
FIXED_LABELS = {
    "uniform": "fixed uniform, +-{loading:g} RMS",
    "mu-law": "fixed mu-law compander, mu = 255",
    "a-law": "fixed A-law compander, A = 87.6",
    "lloyd-max": "fixed Lloyd-Max trained on the file",
    "lloyd-max-adaptive": "Lloyd-Max, trailing window, {window} window, {hop} hop",
    "optimal": "fixed globally optimal (DP) trained on the file",
    "ecsq": "fixed entropy-constrained, trained on the file",
    "g711-mu": "G.711 mu-law table",
    "g711-a": "G.711 A-law table",
}
#: What ``compare`` and ``sweep`` run when not told: the fixed methods and every
#: adaptive scheme of :data:`SCHEMES` (each where it runs at the word length).
DEFAULT_COMPARED = ("uniform", "mu-law", "a-law", "lloyd-max", "lloyd-max-adaptive", "optimal",
                    "ecsq", *SCHEMES)
#: The G.711 tables: run only when asked for by name, and only at 8 bits.
EIGHT_BIT_TABLES = ("g711-mu", "g711-a")
EXIT_OK, EXIT_INTERRUPTED = 0, 130


def available(method: str, bits: int) -> bool:
    """Whether ``method`` runs at ``bits`` (step adaptation has default
    multipliers for 2 to 5 bits only)."""
    sc = SCHEMES.get(method)
    return sc is None or sc.min_bits <= bits <= sc.max_bits


def label(method: str, settings: dict[str, Any], *, loading: float = 4.0,
          window: str = "500 ms", hop: str = "100 ms", block_ms: float | None = None) -> str:
    """What a row is, with its settings, in words."""
    if method in SCHEMES:
        b = block_ms if block_ms is not None else SCHEMES[method].block_ms
        return SCHEMES[method].label.format(block=f"{b:g}" if b is not None else "")
    return FIXED_LABELS[method].format(loading=loading, window=window, hop=hop)


# -- the graph -------------------------------------------------------------------------

def toml_string(text: str) -> str:
    """A TOML basic string holding ``text`` exactly."""
    out = ['"']
    for ch in text:
        o = ord(ch)
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif o < 0x20 or o == 0x7F:
            out.append(f"\\u{o:04X}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    return toml_string(str(v))


def checked_names(text: str | list[str], option: str, noun: str,
                  check: Callable[[str], None] | None = None) -> list[str]:
    """Method or scheme names from a comma-separated text or a list, lower-cased,
    each known to ``compare`` (and passing ``check``), duplicates dropped; a bad
    one is a one-line StreamqError naming ``option``."""
    items = list(text) if isinstance(text, (list, tuple)) else str(text).split(",")
    out: list[str] = []
    for raw in items:
        name = str(raw).strip().lower()
        if not name:
            continue
        if name not in DEFAULT_COMPARED + EIGHT_BIT_TABLES:
            raise StreamqError(f"{option}: unknown {noun} '{name}' (choose from "
                               f"{', '.join(DEFAULT_COMPARED + EIGHT_BIT_TABLES)})")
        if check is not None:
            check(name)
        if name not in out:
            out.append(name)
    if not out:
        raise StreamqError(f"{option}: give at least one {noun}")
    return out


def parse_methods(text: str, bits: int) -> list[str]:
    """The comma-separated method list, checked (each must run at ``bits``);
    duplicates dropped."""

    def runs_at_bits(m: str) -> None:
        if m in EIGHT_BIT_TABLES and bits != 8:
            raise StreamqError(f"--methods: {m} is the 8-bit G.711 table; use --bits 8")
        if not available(m, bits):
            sc = SCHEMES[m]
            raise StreamqError(f"--methods: {m} runs at {sc.min_bits} to {sc.max_bits} bits "
                               f"(its default multipliers), not {bits}")

    return checked_names(text, "--methods", "method", runs_at_bits)


def _ms(v: float) -> str:
    return f"{v:g} ms"


def encoder_settings(method: str, bits: int, audio: Path, rms: float, *,
                     entropy: float | None = None, loading: float = 4.0,
                     block_ms: float | None = None) -> dict[str, Any]:
    """The encoder node's fields for one compared method (besides use/input/pdf).

    Adaptive schemes on a block of their own (``lloyd-max-trailing``,
    ``-lookahead``) carry their estimator's fields under the key
    ``"estimator"`` (window and hop), which is not an encoder field."""
    if method == "uniform":
        return {"method": "uniform", "bits": bits, "loading": float(loading),
                "scale": min(float(rms), 1.0 / float(loading))}
    if method in ("mu-law", "a-law"):
        # the encoder loads a compander at 4 x scale; scale 0.25 puts its peak at full scale
        return {"method": method, "bits": bits, "scale": 0.25}
    if method in EIGHT_BIT_TABLES:
        return {"method": method, "bits": 8}
    if method == "lloyd-max-adaptive":
        return {"method": "lloyd-max", "bits": bits, "adapt": "trailing"}
    if method in SCHEMES:
        b = _ms(block_ms if block_ms is not None else SCHEMES[method].block_ms or 0.0)
        if method in ("lloyd-max-trailing", "lloyd-max-lookahead"):
            return {"method": "lloyd-max", "bits": bits, "adapt": method.rsplit("-", 1)[1],
                    "estimator": {"window": b, "hop": b}}
        if method == "lloyd-max-gain":
            return {"method": "lloyd-max", "bits": bits, "adapt": "gain", "gain_block": b}
        if method == "lloyd-max-backward":
            w = _ms(4 * (block_ms if block_ms is not None else SCHEMES[method].block_ms))
            return {"method": "lloyd-max", "bits": bits, "adapt": "backward", "window": w,
                    "hop": b}
        return {"method": method.split("-step")[0], "bits": bits, "adapt": "step"}
    s: dict[str, Any] = {"method": method, "bits": bits, "train": str(audio)}
    if method == "ecsq":
        s["entropy"] = float(entropy if entropy is not None else bits - 0.5)
    return s


def needs_estimator(settings: dict[str, Any]) -> bool:
    return settings.get("adapt", "fixed") in ("trailing", "lookahead")


def build_compare_toml(audio: Path, methods: list[str], settings: dict[str, dict[str, Any]], *,
                       window: str = "500 ms", hop: str = "100 ms") -> str:
    """The fan-out graph as TOML text: one source, the estimators the methods
    need (one shared at ``window``/``hop``, and one per method that brings
    its own), and an encoder, decoder and meter per method (the meter's id is
    the method name)."""
    lines = ["# made by `streamq compare`", "[graph]", 'name = "compare"', "",
             "[nodes.feed]", 'use = "file-source"', f"path = {toml_string(str(audio))}", ""]
    if any(needs_estimator(s) and "estimator" not in s for s in settings.values()):
        lines += ["[nodes.stats]", 'use = "pdf-estimator"', 'input = "feed"',
                  f"window = {toml_string(window)}", f"hop = {toml_string(hop)}", ""]
    for m in methods:
        s = dict(settings[m])
        own = s.pop("estimator", None)
        if own is not None:
            lines += [f"[nodes.{m}-stats]", 'use = "pdf-estimator"', 'input = "feed"']
            lines += [f"{k} = {toml_value(v)}" for k, v in own.items()]
            lines.append("")
        lines += [f"[nodes.{m}-enc]", 'use = "encoder"', 'input = "feed"']
        if needs_estimator(s):
            lines.append(f'pdf = "{m}-stats"' if own is not None else 'pdf = "stats"')
        lines += [f"{k} = {toml_value(v)}" for k, v in s.items()]
        lines += ["", f"[nodes.{m}-dec]", 'use = "decoder"', f'input = "{m}-enc"', "",
                  f"[nodes.{m}]", 'use = "error-meter"', 'reference = "feed"',
                  f'input = "{m}-dec"', ""]
    return "\n".join(lines)


def file_rms(path: Path) -> tuple[float, Any]:
    """RMS over every sample of every channel (full scale = 1), and the file's info."""
    import numpy as np

    from streamq.engine.audiofile import open_for_reading
    f, info = open_for_reading(path, StreamqError)
    total = 0.0
    n = 0
    with f:
        for block in f.blocks(blocksize=65_536, dtype="float64", always_2d=True):
            if not np.all(np.isfinite(block)):
                raise StreamqError(f"{path}: holds NaN or infinite samples")
            total += float(np.einsum("ij,ij->", block, block))
            n += block.size
    return (math.sqrt(total / n) if n else 0.0), info


# -- running -----------------------------------------------------------------------------

def compare(audio: str | Path, bits: int, methods: list[str] | str | None = None, *,
            out_dir: str | Path | None = None, entropy: float | None = None,
            loading: float = 4.0, window: str = "500 ms", hop: str = "100 ms",
            max_rate: float | None = None,
            progress: Callable[[int, int | None], None] | None = None,
            handle_signals: bool = True, plots: bool = True) -> dict[str, Any]:
    """Run every method over ``audio`` in one pass and return the comparison.

    Parameters
    ----------
    audio : the recording (any format libsndfile reads).
    bits : index word length of every method.
    methods : method names (see the module docstring) or a comma-separated string;
        default: every one of :data:`DEFAULT_COMPARED` that runs at ``bits``.
    out_dir : keep the run here (graph.toml, report.json, CSV files, plots,
        report.html); default: a temporary folder that is removed afterwards.
    entropy : ecsq target in bits/sample (default ``bits - 0.5``).
    loading : uniform range in multiples of the file's RMS.
    max_rate : total-rate budget in bits/sample, side information included
        (default ``bits + 0.25``); each row says whether it stays within it.

    Returns
    -------
    A JSON-able dict: the file's facts, ``complete`` and ``methods``, a list
    sorted by SNR (best first) of per-method figures and encoder settings.
    """
    from streamq.engine.graph import parse_graph
    from streamq.chain import Chain

    audio = Path(audio).expanduser().resolve()
    if not 1 <= int(bits) <= 16:
        raise StreamqError(f"--bits: give 1 to 16 bits, got {bits}")
    bits = int(bits)
    if methods is None:
        methods = [m for m in DEFAULT_COMPARED if available(m, bits)]
    if max_rate is None:
        max_rate = bits + 0.25
    if not max_rate > 0:
        raise StreamqError(f"--max-rate: must be above 0 bits/sample, got {max_rate}")
    if isinstance(methods, str):
        methods = parse_methods(methods, bits)
    else:
        methods = parse_methods(",".join(methods), bits)
    if entropy is not None and not 0 < entropy <= bits:
        raise StreamqError(f"--entropy: give a target above 0 and at most --bits ({bits}), "
                           f"got {entropy}")
    if "ecsq" in methods and entropy is None and bits - 0.5 <= 0:
        raise StreamqError("--entropy: needed for ecsq at this word length")
    if not loading > 0:
        raise StreamqError(f"--loading: must be above 0, got {loading}")
    from streamq.engine.node import Duration
    for name, value in (("--window", window), ("--hop", hop)):
        try:
            Duration.parse(value)
        except ValueError as exc:
            raise StreamqError(f"{name}: {exc}") from None
    rms, info = file_rms(audio)
    if rms <= 0:
        raise StreamqError(f"{audio}: the recording is silent (RMS 0); nothing to compare")
    settings = {m: encoder_settings(m, bits, audio, rms, entropy=entropy, loading=loading)
                for m in methods}
    text = build_compare_toml(audio, methods, settings, window=window, hop=hop)

    with tempfile.TemporaryDirectory(prefix="streamq-compare-") as tmp:
        out = Path(out_dir) if out_dir is not None else Path(tmp)
        if out_dir is not None:
            from streamq.runner import prepare_out_dir
            prepare_out_dir(out)
        (out / "graph.toml").write_text(text, encoding="utf-8")
        graph = parse_graph(text, out / "graph.toml")
        chain = Chain(graph, out).open()
        report = chain.run(progress=progress, handle_signals=handle_signals)
        if out_dir is not None and plots:
            from streamq.runner import write_report_pages
            write_report_pages(out, report)

    from streamq.report.page import overload_share
    rows = []
    for m in methods:
        r = report["meters"].get(m, {})
        rate = r.get("bits_per_sample")
        rows.append({
            "method": m,
            "label": label(m, settings[m], loading=loading, window=window, hop=hop),
            "within_rate": rate is not None and rate <= max_rate + 1e-12,
            "snr_db": r.get("snr_db"),
            "segsnr_db": r.get("segsnr_db"),
            "bits_per_sample": r.get("bits_per_sample"),
            "fixed_rate_bits": r.get("fixed_rate_bits"),
            "side_info_bits_per_sample": r.get("side_info_bits_per_sample"),
            "entropy_bits": r.get("entropy_bits"),
            "entropy_bits_per_sample_with_side_info": r.get("entropy_bits_per_sample_with_side_info"),
            "codebook_updates": r.get("codebook_updates"),
            "overload_share": overload_share(r),
            "samples": r.get("samples"),
            "settings": settings[m],
        })
    rows.sort(key=lambda row: -_num(row["snr_db"]))
    return {
        "file": str(audio),
        "bits": bits,
        "sample_rate": info.samplerate,
        "channels": info.channels,
        "frames": info.frames,
        "seconds": info.frames / info.samplerate,
        "rms": rms,
        "max_rate": max_rate,
        "complete": report["complete"],
        "last_sample": report["samples"],
        "run_seconds": chain.wall_seconds,
        "out_dir": str(out_dir) if out_dir is not None else None,
        "methods": rows,
    }


def _num(v) -> float:
    if v is None:
        return -math.inf
    return float(v)


def table_lines(res: dict[str, Any]) -> list[str]:
    """The comparison as a fixed-width text table, best SNR first."""
    head = (f"{Path(res['file']).name}: {res['bits']} bits, {res['seconds']:.2f} s, "
            f"{res['sample_rate']} Hz, {res['channels']} channel(s), RMS "
            f"{20 * math.log10(res['rms']):.1f} dBFS")
    if not res["complete"]:
        head += f"; STOPPED EARLY at sample {res['last_sample']} (figures cover that much)"
    cols = [("method", 20, "<"), ("SNR dB", 8, ">"), ("seg SNR dB", 11, ">"),
            ("bits/sample", 12, ">"), ("in budget", 9, ">"), ("entropy+side", 13, ">"),
            ("updates", 8, ">"), ("overload", 9, ">"), ("settings", 0, "<")]
    lines = [head, "  ".join(f"{name:{al}{w}}" for name, w, al in cols),
             "  ".join("-" * w for _, w, _ in cols)]

    def f(v, fmt):
        if v is None or (isinstance(v, float) and not math.isfinite(v)):
            return "inf" if v == math.inf else "n/a"
        return fmt.format(v)

    for r in res["methods"]:
        vals = [r["method"], f(r["snr_db"], "{:.2f}"), f(r["segsnr_db"], "{:.2f}"),
                f(r["bits_per_sample"], "{:.4f}"), "yes" if r.get("within_rate") else "NO",
                f(r["entropy_bits_per_sample_with_side_info"], "{:.4f}"),
                f(r["codebook_updates"], "{:d}"),
                f(None if r["overload_share"] is None else 100 * r["overload_share"], "{:.3f}%"),
                r.get("label", "")]
        lines.append("  ".join(f"{v:{al}{w}}" for v, (_, w, al) in zip(vals, cols)).rstrip())
    lines.append("bits/sample = fixed-rate index bits + side information; entropy+side = index "
                 "entropy + side information")
    if "max_rate" in res:
        lines.append(f"in budget: total bits/sample at most {res['max_rate']:g} (--max-rate)")
    return lines


# -- the command -----------------------------------------------------------------------------

def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "compare", help="run several quantizers over one recording in one pass, ranked by SNR",
        description="Quantize one recording with several methods at the same word length in a "
                    "single pass and print them ranked by SNR. uniform spans +-LOADING times the "
                    "file's RMS (never beyond full scale); lloyd-max, optimal and ecsq are fixed "
                    "codebooks trained on the file itself; lloyd-max-adaptive is retrained every "
                    "hop from the trailing window.")
    p.add_argument("audio", type=Path, metavar="AUDIOFILE", help="the recording to compare on")
    p.add_argument("--bits", type=int, required=True, help="index word length of every method")
    p.add_argument("--methods", default=None,
                   help=f"comma-separated (default: {','.join(DEFAULT_COMPARED)}, those that "
                        f"run at --bits; also {','.join(EIGHT_BIT_TABLES)} with --bits 8)")
    p.add_argument("--max-rate", type=float, default=None, dest="max_rate",
                   help="total-rate budget, bits/sample with side information (default: "
                        "bits + 0.25); rows above it are marked")
    p.add_argument("--entropy", type=float, help="ecsq target, bits/sample (default: bits - 0.5)")
    p.add_argument("--loading", type=float, default=4.0,
                   help="uniform: half-range in multiples of the file's RMS (default 4)")
    p.add_argument("--window", default="500 ms", help="adaptive: estimator window (default 500 ms)")
    p.add_argument("--hop", default="100 ms", help="adaptive: time between redesigns "
                                                  "(default 100 ms)")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--out", type=Path, help="keep the run (graph.toml, report.json, CSV files, "
                                            "plots, report.html) in this folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args) -> int:
    import soundfile as sf

    from streamq.runner import Progress
    bar = None
    try:
        info = sf.info(str(args.audio))
        bar = Progress(info.frames, info.samplerate, args.quiet or args.json, "compare")
    except Exception:
        pass  # compare() names the problem with the file
    try:
        res = compare(args.audio, args.bits, args.methods, out_dir=args.out, entropy=args.entropy,
                      loading=args.loading, window=args.window, hop=args.hop,
                      max_rate=args.max_rate, progress=bar)
    finally:
        if bar is not None:
            bar.close()
    if args.json:
        print(json.dumps(json_ready(res), indent=2))
    else:
        for line in table_lines(res):
            print(line)
        if res["out_dir"]:
            print(f"run kept in {res['out_dir']}/ (report.html, report.json, graph.toml)")
    if not res["complete"]:
        print(f"streamq: interrupted at sample {res['last_sample']}; the table covers the audio "
              f"up to there", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_OK
