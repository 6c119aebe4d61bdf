"""Benchmark: offline replay speed and memory of the adaptive chain.

1. Speed. A 10-minute 48 kHz stereo 16-bit WAV (the invented drift scene of
   streamq.nodes.scenes: room tone, speech-like bursts, band) goes through the
   demo chain: 8-bit Lloyd-Max, trailing, estimator window 500 ms and hop
   100 ms (a retrain every 100 ms), error meter, decoded output written as a
   16-bit WAV. Baseline, measured in the same run: merely reading the same
   file with ``soundfile.blocks`` (65,536 frames, float64, as the file-source
   reads). Target: replay time <= 5 x read time. Both are best of ``--repeat``
   runs on a warm page cache; the replay is timed in-process from building
   the graph to report.json (plots are timed separately, for information).

   Whole process (``--process``, or by default without ``--quick``): a
   10-minute 48 kHz stereo 16-bit file of Laplacian noise at changing levels
   (see make_noise) through the same chain with ``python -m streamq.cli run``
   (start-up, plots and report.html included), against a whole Python process
   that merely reads the file with ``soundfile.blocks``. Target: <= 8 x.

2. Memory. A 2-hour stereo file (Laplacian noise whose level changes every
   10 s: fast to make; ~1.4 GB) goes through the same chain with
   ``python -m streamq.cli run`` in a subprocess (plots and report.html
   included); its peak RSS comes from ``resource.getrusage(RUSAGE_CHILDREN)``.
   Target: <= 300 MB. For scale, the same command on a 1-second file is
   measured first (interpreter + imports + plotting).

3. ``--profile``: time per node (each node's ``step`` wrapped with a clock)
   and the top functions by own time under cProfile, both as shares of the
   replay, over the speed file.

Usage::

    python tests/bench/bench_replay.py [--quick] [--minutes 10] [--hours 2]
                                       [--repeat 3] [--no-memory] [--no-speed]
                                       [--process | --no-process] [--profile] [--keep DIR]

``--quick`` uses a 1-minute file for speed and a 10-minute file for memory
and skips the whole-process measure unless ``--process`` is given (the
printout says so).
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

RATE = 48_000
READ_BLOCK = 65_536
SPEED_TARGET = 5.0      # replay time / read time, in-process
PROCESS_TARGET = 8.0    # whole `streamq run` process / whole reading process
MEMORY_TARGET_MB = 300.0

CHAIN = """\
[graph]
name = "replay-bench"

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
pdf = "stats"
method = "lloyd-max"
bits = 8
adapt = "trailing"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "feed"
input = "dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "PCM_16"
"""


# -- test material ---------------------------------------------------------------------------

def make_drift(path: Path, seconds: float, channels: int = 2) -> None:
    """The drift scene, rendered piece by piece (it is defined sample by sample)."""
    from streamq.nodes import scenes
    total = int(round(seconds * RATE))
    piece = RATE * 10
    scale = 32768.0
    with sf.SoundFile(str(path), "w", RATE, channels, "PCM_16") as f:
        for start in range(0, total, piece):
            stop = min(total, start + piece)
            data = np.empty((stop - start, channels))
            for ch in range(channels):
                data[:, ch] = scenes.render("drift", seed=1, channel=ch, start=start, stop=stop,
                                            rate=RATE, total=total, frequency=1000.0,
                                            level_dbfs=-20.0, pdf="gaussian")
            f.write(np.clip(np.round(data * scale), -scale, scale - 1).astype(np.int16))


def make_noise(path: Path, seconds: float, channels: int = 2) -> None:
    """Laplacian noise whose RMS steps between -40 and -12 dBFS every 10 s."""
    rng = np.random.default_rng(2024)
    total = int(round(seconds * RATE))
    piece = RATE * 10
    levels = 10 ** (np.array([-40.0, -26.0, -12.0, -20.0, -33.0]) / 20)
    with sf.SoundFile(str(path), "w", RATE, channels, "PCM_16") as f:
        for k, start in enumerate(range(0, total, piece)):
            n = min(total, start + piece) - start
            x = levels[k % len(levels)] / np.sqrt(2) * rng.laplace(size=(n, channels))
            f.write(np.clip(np.round(x * 32768), -32768, 32767).astype(np.int16))


# -- speed ------------------------------------------------------------------------------------

def time_read(path: Path) -> float:
    t0 = time.perf_counter()
    frames = 0
    for block in sf.blocks(str(path), blocksize=READ_BLOCK, dtype="float64", always_2d=True):
        frames += block.shape[0]
    dt = time.perf_counter() - t0
    assert frames == sf.info(str(path)).frames
    return dt


def build_chain(path: Path, out: Path):
    from streamq.engine.graph import parse_graph
    from streamq.engine.scheduler import build
    out.mkdir(parents=True, exist_ok=True)
    text = CHAIN.format(path=path)
    return build(parse_graph(text, out / "graph.toml"), out)


def time_replay(path: Path, out: Path) -> tuple[float, dict]:
    from streamq.engine.scheduler import run_offline
    if out.exists():
        shutil.rmtree(out)
    t0 = time.perf_counter()
    built = build_chain(path, out)
    result = run_offline(built, handle_signals=False)
    dt = time.perf_counter() - t0
    assert result.complete
    return dt, result.report


def speed(path: Path, work: Path, repeat: int) -> bool:
    seconds = sf.info(str(path)).duration
    time_read(path)  # warm the page cache
    reads, replays = [], []
    report = None
    for _ in range(repeat):
        reads.append(time_read(path))
        dt, report = time_replay(path, work / "replay")
        replays.append(dt)
    read, replay = min(reads), min(replays)
    ratio = replay / read
    from streamq.report import write_report_files
    t0 = time.perf_counter()
    write_report_files(work / "replay", report)
    plots = time.perf_counter() - t0
    m = report["meters"]["noise"]
    print(f"speed: {seconds / 60:.1f} min of 48 kHz stereo 16-bit ({path.name}), best of {repeat}")
    print(f"  read with soundfile.blocks({READ_BLOCK}): {read:8.2f} s   "
          f"({seconds / read:,.0f}x real time)")
    print(f"  replay through the adaptive chain:     {replay:8.2f} s   "
          f"({seconds / replay:,.0f}x real time)")
    print(f"  ratio replay/read: {ratio:.2f} (target <= {SPEED_TARGET:g}) -> "
          f"{'PASS' if ratio <= SPEED_TARGET else 'MISS'}")
    print(f"  (chain: SNR {m['snr_db']:.2f} dB, {m['codebook_updates']} codebook updates, "
          f"{m['bits_per_sample']:.4f} bits/sample; plots and report.html afterwards: "
          f"{plots:.2f} s)")
    return ratio <= SPEED_TARGET


# -- whole process ----------------------------------------------------------------------------

READ_SCRIPT = ("import sys\nimport soundfile as sf\nn = 0\n"
               "for b in sf.blocks(sys.argv[1], blocksize=%d, dtype='float64', always_2d=True):\n"
               "    n += b.shape[0]\n" % READ_BLOCK)


def timed_process(args: list[str]) -> float:
    env = dict(os.environ, PYTHONPATH=str(REPO))
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, *args], env=env, capture_output=True, text=True,
                          stdin=subprocess.DEVNULL)
    dt = time.perf_counter() - t0
    if proc.returncode:
        raise SystemExit(f"{args[:3]} failed:\n{proc.stderr[-3000:]}")
    return dt


def whole_process(work: Path, minutes: float, repeat: int) -> bool:
    """``streamq run`` of the chain on Laplacian noise, as a user runs it, against a
    process that only reads the file; best of ``repeat`` each, alternated."""
    path = work / f"laplacian-{minutes:g}min.wav"
    if not path.exists():
        make_noise(path, minutes * 60)
    graph = work / "process.toml"
    graph.write_text(CHAIN.format(path=path))
    out = work / "process-out"
    timed_process(["-c", READ_SCRIPT, str(path)])   # warm the page cache
    reads, runs = [], []
    for _ in range(repeat):
        reads.append(timed_process(["-c", READ_SCRIPT, str(path)]))
        shutil.rmtree(out, ignore_errors=True)
        runs.append(timed_process(["-m", "streamq.cli", "run", str(graph), "--out", str(out),
                                   "--quiet"]))
    read, run = min(reads), min(runs)
    ratio = run / read
    import json
    m = json.loads((out / "report.json").read_text())["meters"]["noise"]
    print(f"whole process: {minutes:g} min of 48 kHz stereo 16-bit Laplacian noise at changing "
          f"levels, best of {repeat}")
    print(f"  python process reading it:       {read:8.2f} s")
    print(f"  `streamq run` (plots included):  {run:8.2f} s")
    print(f"  ratio run/read: {ratio:.2f} (target <= {PROCESS_TARGET:g}) -> "
          f"{'PASS' if ratio <= PROCESS_TARGET else 'MISS'}")
    print(f"  (chain: SNR {m['snr_db']:.4f} dB, {m['codebook_updates']} codebook updates)")
    return ratio <= PROCESS_TARGET


# -- memory -----------------------------------------------------------------------------------

def child_peak_mb(path: Path, out: Path) -> tuple[float, float]:
    """Run the command line on ``path`` in a fresh child; return (wall seconds, peak RSS MB)
    of that child alone (RUSAGE_CHILDREN is a running maximum: run each in its own
    helper process so earlier children do not mask it)."""
    graph = out.parent / f"{out.name}.toml"
    graph.write_text(CHAIN.format(path=path))
    helper = ("import resource, subprocess, sys, time\n"
              "t = time.perf_counter()\n"
              "r = subprocess.run([sys.executable, '-m', 'streamq.cli', 'run', sys.argv[1], "
              "'--out', sys.argv[2], '--quiet'], stdin=subprocess.DEVNULL)\n"
              "dt = time.perf_counter() - t\n"
              "peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss\n"
              "print(r.returncode, dt, peak)\n")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.run([sys.executable, "-c", helper, str(graph), str(out)], env=env,
                          capture_output=True, text=True)
    code, dt, peak_kb = proc.stdout.split()
    if code != "0":
        raise SystemExit(f"the run failed:\n{proc.stderr}")
    return float(dt), int(peak_kb) / 1024.0


def memory(work: Path, seconds: float) -> bool:
    small = work / "one-second.wav"
    make_noise(small, 1.0)
    _, base_mb = child_peak_mb(small, work / "mem-small")
    big = work / "long.wav"
    t0 = time.perf_counter()
    make_noise(big, seconds)
    made = time.perf_counter() - t0
    size_gb = big.stat().st_size / 1e9
    dt, peak_mb = child_peak_mb(big, work / "mem-big")
    ok = peak_mb <= MEMORY_TARGET_MB
    print(f"memory: {seconds / 3600:.2f} h of 48 kHz stereo 16-bit ({size_gb:.2f} GB, made in "
          f"{made:.0f} s), `streamq run` in a subprocess, plots included")
    print(f"  peak RSS of the run: {peak_mb:7.1f} MB (target <= {MEMORY_TARGET_MB:g} MB) -> "
          f"{'PASS' if ok else 'MISS'}")
    print(f"  same command on a 1-second file: {base_mb:7.1f} MB; growth with length "
          f"{peak_mb - base_mb:+.1f} MB; replay took {dt:.0f} s "
          f"({seconds / dt:,.0f}x real time incl. start-up and plots)")
    return ok


# -- profile ----------------------------------------------------------------------------------

def profile(path: Path, work: Path, top: int = 25) -> None:
    from streamq.engine.scheduler import run_offline
    out = work / "profile"
    if out.exists():
        shutil.rmtree(out)
    built = build_chain(path, out)
    per_node: dict[str, float] = {}
    for nid, node in built.graph.nodes.items():
        inner = node.step

        def timed(frames, inputs, inner=inner, nid=nid):
            t = time.perf_counter()
            try:
                return inner(frames, inputs)
            finally:
                per_node[nid] = per_node.get(nid, 0.0) + time.perf_counter() - t
        node.step = timed
    t0 = time.perf_counter()
    run_offline(built, handle_signals=False)
    total = time.perf_counter() - t0
    print(f"profile: time per node over {sf.info(str(path)).duration / 60:.1f} min "
          f"(replay {total:.2f} s, node steps only, close/report excluded)")
    for nid, dt in sorted(per_node.items(), key=lambda kv: -kv[1]):
        kind = built.graph.nodes[nid].kind
        print(f"  {nid:6s} {kind:14s} {dt:7.2f} s  {100 * dt / total:5.1f} %")
    print(f"  {'other':21s} {total - sum(per_node.values()):7.2f} s  "
          f"{100 * (total - sum(per_node.values())) / total:5.1f} %  (scheduler, finish, close)")

    out2 = work / "profile2"
    if out2.exists():
        shutil.rmtree(out2)
    built = build_chain(path, out2)
    prof = cProfile.Profile()
    prof.enable()
    run_offline(built, handle_signals=False)
    prof.disable()
    stats = pstats.Stats(prof, stream=io.StringIO())
    total = sum(v[2] for v in stats.stats.values())  # own time of everything
    rows = sorted(stats.stats.items(), key=lambda kv: -kv[1][2])[:top]
    print(f"profile: top {top} functions by own time under cProfile (total {total:.2f} s)")
    print(f"  {'own s':>7} {'share':>6} {'cum s':>7} {'calls':>9}  function")
    for (fname, line, func), (cc, nc, tt, ct, _) in rows:
        where = fname.replace(str(REPO) + "/", "")
        if "site-packages" in where:
            where = where.split("site-packages/")[-1]
        print(f"  {tt:7.2f} {100 * tt / total:5.1f}% {ct:7.2f} {nc:9d}  {func} ({where}:{line})")
    mine = [(k, v) for k, v in stats.stats.items() if k[0].startswith(str(REPO / "streamq"))]
    rows = sorted(mine, key=lambda kv: -kv[1][3])[:top]
    print(f"profile: top {top} streamq functions by cumulative time (share of {total:.2f} s)")
    print(f"  {'cum s':>7} {'share':>6} {'calls':>9}  function")
    for (fname, line, func), (cc, nc, tt, ct, _) in rows:
        where = fname.replace(str(REPO) + "/", "")
        print(f"  {ct:7.2f} {100 * ct / total:5.1f}% {nc:9d}  {func} ({where}:{line})")


# -- main -------------------------------------------------------------------------------------

def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true",
                    help="1-minute speed file and 10-minute memory file")
    ap.add_argument("--minutes", type=float, help="length of the speed file (default 10)")
    ap.add_argument("--hours", type=float, help="length of the memory file (default 2)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs (best is kept)")
    ap.add_argument("--no-memory", action="store_true", help="skip the memory measurement")
    ap.add_argument("--no-speed", action="store_true", help="skip the speed measurement")
    ap.add_argument("--process", action=argparse.BooleanOptionalAction, default=None,
                    help="whole `streamq run` process against a reading process (default: on "
                         "unless --quick)")
    ap.add_argument("--profile", action="store_true", help="profile the replay too")
    ap.add_argument("--keep", type=Path, help="work here and keep the files")
    args = ap.parse_args(argv)
    minutes = args.minutes or (1.0 if args.quick else 10.0)
    hours = args.hours or (10 / 60 if args.quick else 2.0)
    if args.quick:
        print(f"--quick: speed on {minutes:g} min, memory on {hours * 60:g} min "
              f"(not the 10 min / 2 h of the targets)")
    work = args.keep or Path(tempfile.mkdtemp(prefix="streamq-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    results = []
    try:
        path = work / f"drift-{minutes:g}min.wav"
        if not args.no_speed or args.profile:
            if not path.exists():
                t0 = time.perf_counter()
                make_drift(path, minutes * 60)
                print(f"(made {path.name} in {time.perf_counter() - t0:.0f} s)")
        if not args.no_speed:
            results.append(speed(path, work, args.repeat))
        if args.process if args.process is not None else not args.quick:
            results.append(whole_process(work, args.minutes or 10.0, args.repeat))
        if not args.no_memory:
            results.append(memory(work, hours * 3600))
        if args.profile:
            profile(path, work)
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)
    print("overall:", "PASS" if all(results) else "MISS")
    return 0 if all(results) else 1


if __name__ == "__main__":
    sys.exit(main())
