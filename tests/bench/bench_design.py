"""Benchmark of streamq.design against general-purpose baselines, measured in one run.

Run as a script::

    python tests/bench/bench_design.py            # full size (a few minutes)
    python tests/bench/bench_design.py --tiny     # seconds; what CI runs

The file is named ``bench_*.py`` so pytest does not collect it as a test
module; ``tests/design/test_design_bench_smoke.py`` runs :func:`main` at tiny
size so CI exercises the code. Speed targets are never asserted in unit
tests: this script prints each ratio against a baseline measured in the same
run, with PASS or MISS.

What is measured
----------------
1. Histogram Lloyd-Max (histogram build included) against scikit-learn
   ``KMeans(n_init=1)`` on Laplacian samples: 48,000 samples at L = 16 and
   1,000,000 samples at L = 256. Speed ratio (targets 50x and 100x) and MSE
   on the samples relative to KMeans (target: at most 0.5 % above). Both
   sides are timed as the best of the same number of runs (3 at full size:
   KMeans at 1,000,000 samples and L = 256 takes a while).
2. Encoding 10,000,000 int16 samples at L = 256: the codebook's int16 table
   against ``numpy.searchsorted`` on the float samples (target 5x), and the
   float grid encoder for reference.
3. G.711 encoding of 10,000,000 int16 samples: numpy against ``audioop``
   (target 1x; skipped when audioop is not importable); decoding of
   10,000,000 codes against ``audioop.ulaw2lin``/``alaw2lin`` for information
   (no target).
4. The streaming hot path: warm-started histogram Lloyd calls (prefix sums
   included) on a sliding 500 ms window with a 100 ms hop, at 1,024 and
   4,096 bins and L = 16 and 256, microseconds per call (aim: below 100).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import warnings

import numpy as np

from streamq.design import (
    Codebook,
    g711_decode,
    g711_encode,
    histogram_prefix,
    lloyd_max_histogram,
    sample_histogram,
)

SIZES = {
    "full": dict(small_n=48_000, large_n=1_000_000, encode_n=10_000_000, stream_seconds=20,
                 repeats=5, kmeans_repeats=3),
    "tiny": dict(small_n=4_000, large_n=20_000, encode_n=200_000, stream_seconds=2,
                 repeats=1, kmeans_repeats=1),
}


def _best(fn, repeats):
    """Best wall time of ``repeats`` runs (the machine is shared)."""
    best = math.inf
    out = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def _verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def _line(label, value, target, ok, unit="x"):
    print(f"  {label:<58s} {value:10.2f}{unit}  target {target:<10s} {_verdict(ok)}")


def bench_design_vs_kmeans(n, levels, bins, repeats, seed, results):
    from sklearn.cluster import KMeans

    rng = np.random.default_rng(seed)
    x = rng.laplace(scale=0.1 / math.sqrt(2), size=n)

    def ours():
        c, w = sample_histogram(x, bins)
        return lloyd_max_histogram(c, w, levels)

    t_ours, (cb, rep) = _best(ours, repeats)
    ours_mse = cb.distortion(x)

    def baseline():
        km = KMeans(n_clusters=levels, n_init=1, random_state=seed).fit(x.reshape(-1, 1))
        return km

    t_km, km = _best(baseline, repeats)  # same count as ours: a fair best-of
    km_mse = km.inertia_ / n
    ratio = t_km / t_ours
    excess = 100.0 * (ours_mse / km_mse - 1.0)
    target = 100.0 if n >= 1_000_000 else 50.0
    print(f"histogram Lloyd-Max vs KMeans, {n} Laplacian samples, L = {levels}, {bins} bins "
          f"(best of {repeats} each)")
    print(f"  ours {t_ours * 1e3:.2f} ms ({rep.iterations} iterations), "
          f"KMeans {t_km * 1e3:.1f} ms ({km.n_iter_} iterations)")
    _line("speed ratio KMeans / ours", ratio, f">= {target:g}x", ratio >= target)
    _line("MSE above KMeans (negative = better)", excess, "<= 0.5 %", excess <= 0.5, unit=" %")
    results.append(("kmeans", n, levels, ratio, excess))


def bench_encode(n, repeats, seed, results):
    rng = np.random.default_rng(seed)
    codes = np.clip(rng.laplace(scale=3000.0, size=n), -32768, 32767).astype(np.int16)
    x = codes / 32768.0
    lv = np.sort(rng.laplace(scale=0.1, size=256))
    cb = Codebook(lv)
    cb.int16_table()  # built once, as in a stream
    t_table, a = _best(lambda: cb.encode_int16(codes), repeats)
    t_ss, b = _best(lambda: np.searchsorted(cb.thresholds, x, side="right"), repeats)
    t_grid, g = _best(lambda: cb.encode_fast(x), repeats)
    assert np.array_equal(a, b) and np.array_equal(g, b)
    t_build, _ = _best(lambda: Codebook(lv).int16_table(), max(repeats, 20))
    print(f"encoding {n} samples, L = 256")
    print(f"  int16 table {t_table * 1e3:.1f} ms, float grid {t_grid * 1e3:.1f} ms, "
          f"searchsorted {t_ss * 1e3:.1f} ms; table build {t_build * 1e6:.0f} us")
    _line("int16 table vs searchsorted", t_ss / t_table, ">= 5x", t_ss / t_table >= 5)
    _line("float grid vs searchsorted (no target)", t_ss / t_grid, "-", True)
    results.append(("encode", n, 256, t_ss / t_table, t_build))


def bench_g711(n, repeats, seed, results):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            import audioop
        except ImportError:
            print("G.711: audioop not importable (Python >= 3.13 needs audioop-lts); skipped")
            return
    rng = np.random.default_rng(seed)
    codes = np.clip(rng.laplace(scale=3000.0, size=n), -32768, 32767).astype(np.int16)
    raw = codes.tobytes()
    g711_encode(codes[:10], "mu")  # tables built once
    g711_encode(codes[:10], "a")
    print(f"G.711 encoding {n} samples")
    for law, fn in (("mu", audioop.lin2ulaw), ("a", audioop.lin2alaw)):
        t_np, mine = _best(lambda: g711_encode(codes, law), repeats)
        t_ref, ref = _best(lambda: fn(raw, 2), repeats)
        assert np.array_equal(mine, np.frombuffer(ref, dtype=np.uint8))
        _line(f"{law}-law numpy vs audioop", t_ref / t_np, ">= 1x", t_ref / t_np >= 1)
        results.append(("g711", law, n, t_ref / t_np))
    codes8 = rng.integers(0, 256, size=n, dtype=np.uint8)
    raw8 = codes8.tobytes()
    print(f"G.711 decoding {n} codes (for information)")
    for law, fn in (("mu", audioop.ulaw2lin), ("a", audioop.alaw2lin)):
        t_np, mine = _best(lambda: g711_decode(codes8, law), repeats)
        t_ref, ref = _best(lambda: fn(raw8, 2), repeats)
        assert np.array_equal(mine, np.frombuffer(ref, dtype="<i2"))
        _line(f"{law}-law decode numpy vs audioop (no target)", t_ref / t_np, "-", True)
        results.append(("g711-decode", law, n, t_ref / t_np))


def bench_hot_path(seconds, seed, results, rate=48_000):
    rng = np.random.default_rng(seed)
    n = seconds * rate
    window, hop = rate // 2, rate // 10
    t = np.arange(n) / rate
    scenes = {
        "steady": np.full(n, 0.1),
        "drifting": 0.1 * np.exp(0.5 * np.sin(2 * np.pi * t / 3.0)),
    }
    print(f"hot path: warm-started histogram Lloyd, {window}-sample window, {hop}-sample hop "
          "(histogram given; prefix sums and report included)")
    for scene, env in scenes.items():
        x = np.clip(rng.laplace(size=n) * env / math.sqrt(2), -1, 1)
        for bins in (1024, 4096):
            centers = (np.arange(bins) + 0.5) * (2.0 / bins) - 1.0
            hists = []
            for s in range(0, n - window + 1, hop):
                idx = ((x[s:s + window] + 1.0) * (bins / 2.0)).astype(np.intp)
                hists.append(np.bincount(np.clip(idx, 0, bins - 1), minlength=bins)
                             .astype(np.float64))
            for levels in (16, 256):
                start, _ = lloyd_max_histogram(centers, hists[0], levels)

                def chain():
                    cb, its = start, []
                    for w in hists[1:]:
                        cb, rep = lloyd_max_histogram(centers, w, init=cb)
                        its.append(rep.iterations)
                    return cb, its

                # the same warm-start chain three times; best pass (shared
                # machine), in wall time and in this thread's CPU time
                t_chain, cpu_chain = math.inf, math.inf
                for _ in range(3):
                    c0, t0 = time.thread_time(), time.perf_counter()
                    cb, iters = chain()
                    t_chain = min(t_chain, time.perf_counter() - t0)
                    cpu_chain = min(cpu_chain, time.thread_time() - c0)
                per_call = t_chain / max(len(hists) - 1, 1)
                cpu_call = cpu_chain / max(len(hists) - 1, 1)
                pre = histogram_prefix(centers, hists[-1])
                t_pre, _ = _best(lambda: histogram_prefix(centers, hists[-1]), 20)
                t_same, _ = _best(lambda: lloyd_max_histogram(prefix=pre, init=cb), 20)
                label = f"{scene:8s} bins {bins:4d} L {levels:3d}:"
                print(f"  {label:<28s} {per_call * 1e6:6.0f} us/call wall, {cpu_call * 1e6:6.0f} cpu "
                      f"(iterations mean {np.mean(iters):4.1f}, max {max(iters):3d}; prefix sums "
                      f"{t_pre * 1e6:.0f} us; call at a fixed point {t_same * 1e6:.0f} us)  "
                      f"{_verdict(cpu_call < 100e-6)} (aim < 100 us)")
                results.append(("hot", scene, bins, levels, per_call * 1e6, cpu_call * 1e6,
                                float(np.mean(iters))))


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--tiny", action="store_true", help="tiny sizes (smoke run)")
    p.add_argument("--skip-kmeans", action="store_true", help="leave out the KMeans comparison")
    args = p.parse_args(argv)
    size = SIZES["tiny" if args.tiny else "full"]
    results = []
    print(f"streamq.design benchmark ({'tiny' if args.tiny else 'full'} size), numpy "
          f"{np.__version__}, Python {sys.version.split()[0]}")
    if not args.skip_kmeans:
        bench_design_vs_kmeans(size["small_n"], 16, 4096, size["kmeans_repeats"], 1, results)
        bench_design_vs_kmeans(size["large_n"], 256, 65536, size["kmeans_repeats"], 2, results)
    bench_encode(size["encode_n"], size["repeats"], 3, results)
    bench_g711(size["encode_n"], size["repeats"], 4, results)
    bench_hot_path(size["stream_seconds"], 5, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
