"""Benchmark: offline speed of the adaptive schemes on 48 kHz stereo.

A 48 kHz stereo 16-bit WAV (invented: Laplacian noise whose level jumps every
250 ms, with silences) goes through file-source -> encoder -> decoder ->
error-meter for each scheme (4 bits): sample-by-sample step adaptation
(Lloyd-Max and uniform shapes), forward gain adaptation (16 ms blocks), and
for scale the trailing Lloyd-Max (500 ms / 100 ms) and a fixed mu-law. The
baseline, measured in the same run, is reading the same file with
``soundfile.blocks`` (65,536 frames, float64, as the file-source reads).
Printed: each chain's time as a multiple of reading, and as a multiple of real
time. Target for the step and gain modes: at least 100x real time. Best of
``--repeat`` runs, in-process, from building the graph to report.json.

Usage::

    python tests/bench/bench_schemes.py [--seconds 60] [--repeat 3]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

RATE = 48_000
TARGET_X_REALTIME = 100.0
SCHEMES = {
    "lloyd-max-step": ('method = "lloyd-max"\nbits = 4\nadapt = "step"', True),
    "uniform-step": ('method = "uniform"\nbits = 4\nadapt = "step"', True),
    "lloyd-max-gain": ('method = "lloyd-max"\nbits = 4\nadapt = "gain"', True),
    "lloyd-max-trailing": ('pdf = "stats"\nmethod = "lloyd-max"\nbits = 4\nadapt = "trailing"', False),
    "mu-law": ('method = "mu-law"\nbits = 4\nscale = 0.25', False),
}


def material(path: Path, seconds: float) -> None:
    rng = np.random.default_rng(7)
    part = RATE // 4
    n = int(seconds * 4)
    levels = np.where(np.arange(n) % 4 == 3, 0.0, np.where(np.arange(n) % 2 == 0, 0.1, 0.003))
    x = rng.laplace(size=(n * part, 2)) * np.repeat(levels, part)[:, None] / np.sqrt(2)
    sf.write(path, np.clip(x, -1, 1), RATE, subtype="PCM_16")


def read_time(path: Path) -> float:
    t0 = time.perf_counter()
    for _ in sf.blocks(str(path), blocksize=65_536, dtype="float64", always_2d=True):
        pass
    return time.perf_counter() - t0


def chain_time(path: Path, fields: str, out: Path) -> tuple[float, float]:
    from streamq.engine.graph import parse_graph
    from streamq.engine.scheduler import build, run_offline
    text = f"""
[graph]
name = "bench-schemes"
[nodes.feed]
use = "file-source"
path = "{path}"
[nodes.stats]
use = "pdf-estimator"
input = "feed"
window = "500 ms"
hop = "100 ms"
[nodes.enc]
use = "encoder"
input = "feed"
{fields}
[nodes.dec]
use = "decoder"
input = "enc"
[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"
"""
    if 'pdf = "stats"' not in fields:
        text = text.replace('[nodes.stats]\nuse = "pdf-estimator"\ninput = "feed"\n'
                            'window = "500 ms"\nhop = "100 ms"\n', "")
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    res = run_offline(build(parse_graph(text, out / "g.toml"), out), handle_signals=False)
    return time.perf_counter() - t0, float(res.report["meters"]["noise"]["snr_db"])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0, help="length of the file (default 60)")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs (default 3)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="streamq-bench-schemes-") as tmp:
        path = Path(tmp) / "material.wav"
        material(path, args.seconds)
        base = min(read_time(path) for _ in range(args.repeat))
        print(f"{args.seconds:g} s of 48 kHz stereo 16-bit; reading it: {base:.3f} s "
              f"({args.seconds / base:.0f}x real time)")
        chain_time(path, SCHEMES["lloyd-max-step"][0], Path(tmp) / "warm")   # compile/load kernels
        ok = True
        for name, (fields, targeted) in SCHEMES.items():
            best, snr = min(chain_time(path, fields, Path(tmp) / f"{name}-{i}")
                            for i in range(args.repeat))
            xrt = args.seconds / best
            mark = ""
            if targeted:
                hit = xrt >= TARGET_X_REALTIME
                ok &= hit
                mark = f"  target >= {TARGET_X_REALTIME:.0f}x real time: {'PASS' if hit else 'MISS'}"
            print(f"  {name:<20} {best:7.3f} s = {best / base:6.1f}x reading, {xrt:7.1f}x real "
                  f"time, SNR {snr:6.2f} dB{mark}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
