"""Benchmark: the JACK host's process callback, and Chain's own overhead.

Setting: 48 kHz, stereo, 128-frame periods (2.667 ms), the adaptive chain of
the live tests (4-bit Lloyd-Max retrained every 100 ms, decoder, meter,
noise-free monitor) as ``[graph] host = "jack"`` on a private ``jackd -d
dummy`` (tests/live_util.py), its ports connected to the dummy system ports.

1. The callback: ``streamq run`` for ``--seconds``; the report's ``live``
   section gives the callback's work time per period. Printed: p99 / block
   period, target at most 0.10 (PASS/MISS).
2. Chain overhead: ``Chain.process`` and ``Chain.process_into`` on 128-frame
   blocks of a chain whose only node is a live-input feeding a live-output
   (so nearly all the time is the chain's own bookkeeping), median per call,
   as a ratio to the block period.

Usage::

    python tests/bench/bench_jack.py [--seconds 10]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "tests"))

RATE = 48_000
BLOCK = 128
TARGET = 0.10
PERIOD_MS = 1000.0 * BLOCK / RATE

GRAPH = """
[graph]
name = "bench-jack"
sample_rate = 48000
host = "jack"

[nodes.mic]
use = "live-input"
channels = 2
connect = ["system:capture_1", "system:capture_2"]

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
connect = ["system:playback_1", "system:playback_2"]
"""

PASS_THROUGH = """
[graph]
name = "bench-chain"
sample_rate = 48000
[nodes.mic]
use = "live-input"
channels = 2
[nodes.mon]
use = "live-output"
input = "mic"
"""


def verdict(ratio: float) -> str:
    return "PASS" if ratio <= TARGET else "MISS"


def callback(seconds: float) -> None:
    from live_util import JackServer, streamq_cmd
    with tempfile.TemporaryDirectory() as tmp, JackServer(period=BLOCK) as server:
        graph = Path(tmp) / "g.toml"
        graph.write_text(GRAPH)
        res = subprocess.run(streamq_cmd("run", graph, "--out", Path(tmp) / "out", "--seconds",
                                         seconds, "--quiet"), env=server.env(),
                             capture_output=True, text=True, timeout=seconds + 180)
        if res.returncode != 0:
            print(f"streamq run failed: {res.stderr[-2000:]}")
            return
        live = json.loads((Path(tmp) / "out" / "report.json").read_text())["live"]
    t = live["callback_ms"]
    ratio = t["p99"] / PERIOD_MS
    print(f"JACK host callback, {live['callbacks']} periods of {BLOCK} frames: p50 "
          f"{t['p50']:.3f} ms, p99 {t['p99']:.3f} ms, max {t['max']:.2f} ms; server xruns "
          f"{live['xruns']}")
    print(f"  p99 / block period = {ratio:.3f} (target <= {TARGET:.2f}): {verdict(ratio)}")


def chain_overhead(calls: int = 20_000) -> None:
    import streamq
    rng = np.random.default_rng(3)
    x = (0.1 * rng.standard_normal((BLOCK, 2))).astype(np.float32)
    out = [np.zeros(BLOCK, np.float32), np.zeros(BLOCK, np.float32)]
    with streamq.Chain.from_toml(PASS_THROUGH, realtime=True) as chain:
        for label, call in (("process", lambda: chain.process(x)),
                            ("process_into", lambda: chain.process_into(BLOCK, [x], [out]))):
            for _ in range(500):
                call()
            t = np.empty(calls)
            for k in range(calls):
                t0 = time.perf_counter()
                call()
                t[k] = time.perf_counter() - t0
            med = float(np.median(t)) * 1e6
            print(f"Chain.{label} at {BLOCK} frames (live-input -> live-output only): median "
                  f"{med:.1f} us a call, {med / 1000 / PERIOD_MS:.4f} of the block period "
                  f"(p99 {float(np.percentile(t, 99)) * 1e6:.1f} us)")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    args = ap.parse_args()
    chain_overhead()
    callback(args.seconds)
    return 0


if __name__ == "__main__":
    sys.exit(main())
