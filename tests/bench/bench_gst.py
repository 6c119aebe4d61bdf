"""Throughput of the ``streamq-chain`` GStreamer element in a file-to-file pipeline.

The same ``gst-launch-1.0`` pipeline (WAV file, parse, convert, X, convert,
WAV encoder, file) is timed with X = ``streamq-chain`` running a graph and
with X = ``identity`` (GStreamer's pass-through), on an invented stereo
signal. Each figure is printed as a multiple of real time, with the ratio.

Start-up (GStreamer's Python, numpy, the compiled kernels, the design
worker) is measured apart with a 1-second file and taken out of the
steady-state figure: ``(seconds - 1) / (time(seconds) - time(1 s))``.

Usage::

    .venv/bin/python tests/bench/bench_gst.py            # 60 s file
    .venv/bin/python tests/bench/bench_gst.py --seconds 20 --repeat 1
"""

from __future__ import annotations

import argparse
import os
import shlex
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

RATE = 48_000

GRAPH = f"""
[graph]
name = "bench-gst"
sample_rate = {RATE}

[nodes.mic]
use = "live-input"
channels = 2

[nodes.stats]
use = "pdf-estimator"
input = "mic"
window = "500 ms"
hop = "100 ms"

[nodes.enc]
use = "encoder"
input = "mic"
pdf = "stats"
method = "lloyd-max"
bits = 4
adapt = "trailing"
apply_after = "40 ms"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.mon]
use = "live-output"
input = "dec"
gain_db = 0
fade_in = 0
"""


def environment(tmp: Path) -> dict[str, str]:
    """``streamq gst-env``'s variables, with a registry in ``tmp``."""
    res = subprocess.run([sys.executable, "-m", "streamq.cli", "gst-env"], capture_output=True,
                         text=True, check=False)
    env = dict(os.environ)
    for line in res.stdout.splitlines():
        name, _, value = line.removeprefix("export ").partition("=")
        env[name] = shlex.split(value)[0]
    env["GST_REGISTRY"] = str(tmp / "registry.bin")
    return env


def write_input(path: Path, seconds: float) -> None:
    rng = np.random.default_rng(7)
    n = int(seconds * RATE)
    level = np.repeat(rng.choice([0.004, 0.08], size=n // 12000 + 1), 12000)[:n]
    x = np.clip(rng.laplace(size=(n, 2)) * level[:, None], -0.7, 0.7).astype(np.float32)
    sf.write(path, x, RATE, subtype="FLOAT")


def run(env: dict, wav: Path, out: Path, element: list[str]) -> float:
    """Wall time of one pipeline run (seconds)."""
    args = ["gst-launch-1.0", "-q", "filesrc", f"location={wav}", "!", "wavparse", "!",
            "audioconvert", "!", "audio/x-raw,format=F32LE", "!", *element, "!",
            "audioconvert", "!", "audio/x-raw,format=F32LE", "!", "wavenc", "!", "filesink",
            f"location={out}"]
    t0 = time.perf_counter()
    res = subprocess.run(args, env=env, capture_output=True, text=True)
    took = time.perf_counter() - t0
    if res.returncode != 0:
        sys.exit(f"bench_gst: pipeline failed: {res.stderr.strip()[-500:]}")
    return took


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--seconds", type=float, default=60.0, help="length of the test file")
    p.add_argument("--repeat", type=int, default=2, help="runs of each pipeline (best kept)")
    args = p.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="bench-gst-") as tmp:
        tmp = Path(tmp)
        env = environment(tmp)
        graph = tmp / "bench.toml"
        graph.write_text(GRAPH)
        long_wav, short_wav = tmp / "long.wav", tmp / "short.wav"
        write_input(long_wav, args.seconds)
        write_input(short_wav, 1.0)
        chain = ["streamq-chain", f"graph={graph}"]
        plain = ["identity"]
        run(env, short_wav, tmp / "warm.wav", chain)       # registry scan, numba cache
        best = {}
        for name, element in (("identity", plain), ("streamq-chain", chain)):
            for wav, tag in ((short_wav, "1 s"), (long_wav, "long")):
                best[name, tag] = min(run(env, wav, tmp / "out.wav", element)
                                      for _ in range(args.repeat))
    n = args.seconds
    print(f"pipeline: filesrc ! wavparse ! audioconvert ! X ! audioconvert ! wavenc ! "
          f"filesink; {n:g} s of 48 kHz stereo float; best of {args.repeat}")
    speeds = {}
    for name in ("identity", "streamq-chain"):
        whole = best[name, "long"]
        steady = max(whole - best[name, "1 s"], 1e-9)
        speeds[name] = ((n - 1) / steady, n / whole)
        print(f"  X = {name:14s} {whole:7.2f} s whole run ({n / whole:8.1f}x real time), "
              f"start-up {best[name, '1 s']:5.2f} s, steady {speeds[name][0]:8.1f}x real time")
    ratio = speeds["identity"][0] / speeds["streamq-chain"][0]
    print(f"streamq-chain: {speeds['streamq-chain'][0]:.1f}x real time steady, "
          f"{speeds['streamq-chain'][1]:.1f}x over the whole run; identity is {ratio:.1f}x "
          f"faster steady")
    return 0


if __name__ == "__main__":
    sys.exit(main())
