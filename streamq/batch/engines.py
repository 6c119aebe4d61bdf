"""Where the files of a batch run: a local process pool, or a Dask cluster.

Both engines run the same function (:func:`streamq.batch.work.process_file`)
on the same job descriptions, so the results do not depend on the engine.
Finished futures are handed to the caller through a queue, in completion
order, by ``add_done_callback``.

With Dask, every worker must see the graph, the inputs and the output folder
at the same paths as the machine that starts the batch (shared storage), and
must have streamq installed.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import queue
import re
from concurrent.futures import ProcessPoolExecutor
from typing import Any

from streamq.batch.work import ignore_sigint, missing_paths, one_line, process_file
from streamq.errors import StreamqError

CLUSTER_EXTRA = "streamq[cluster]"
_TCP = re.compile(r"^tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})$")
_LOCAL = re.compile(r"^local:(\d+)$")
#: Seconds to wait for a Dask scheduler to answer.
CONNECT_TIMEOUT = 10.0


def _start_method() -> str:
    # forkserver: workers start by forking a small clean server process (fast,
    # and safe with threads in the parent); spawn where it does not exist.
    return "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"


class LocalPool:
    """A pool of worker processes on this machine."""

    def __init__(self, workers: int):
        self.workers = workers
        ctx = mp.get_context(_start_method())
        if ctx.get_start_method() == "forkserver":
            ctx.set_forkserver_preload(["streamq.batch.preload"])
        self.executor = ProcessPoolExecutor(max_workers=workers, mp_context=ctx,
                                            initializer=ignore_sigint)
        self.futures: list[Any] = []

    def check_workers(self, paths: list[str]) -> int:
        return self.workers  # same machine: same files

    def describe(self) -> str:
        return f"local pool of {self.workers} worker process{'es' if self.workers != 1 else ''}"

    def submit(self, job: dict, done: "queue.Queue") -> None:
        fut = self.executor.submit(process_file, job)
        self.futures.append(fut)
        fut.add_done_callback(lambda f, job=job: done.put((job, f)))

    def cancel_pending(self) -> None:
        for f in self.futures:
            f.cancel()

    def close(self) -> None:
        self.executor.shutdown(wait=True, cancel_futures=True)

    def kill(self) -> None:
        """Stop at once (second Ctrl-C): end our worker processes."""
        procs = list(getattr(self.executor, "_processes", {}).values())
        self.executor.shutdown(wait=False, cancel_futures=True)
        for p in procs:
            if p.is_alive():
                p.terminate()
        for p in procs:
            p.join(timeout=5)


def parse_cluster_address(address: str) -> tuple[str, Any]:
    """("local", N) for ``local:N``, ("tcp", address) for ``tcp://host:port``."""
    a = address.strip()
    m = _LOCAL.match(a)
    if m:
        n = int(m.group(1))
        if not 1 <= n <= 1024:
            raise StreamqError(f"--cluster {address!r}: give local:N with N from 1 to 1024")
        return "local", n
    m = _TCP.match(a)
    if m and 0 < int(m.group(2)) < 65536:
        return "tcp", a
    raise StreamqError(f"--cluster {address!r}: expected a scheduler address tcp://HOST:PORT "
                       f"or local:N to start N local workers")


class DaskCluster:
    """The same work on a Dask distributed cluster (optional extra ``streamq[cluster]``)."""

    def __init__(self, address: str):
        kind, value = parse_cluster_address(address)
        try:
            import distributed
        except ImportError:
            raise StreamqError(f"--cluster needs Dask distributed, which is not installed: "
                               f"pip install '{CLUSTER_EXTRA}'") from None
        self.address = address
        self.cluster = None
        self.futures: list[Any] = []
        try:
            if kind == "local":
                self.cluster = distributed.LocalCluster(
                    n_workers=value, threads_per_worker=1, processes=True, host="127.0.0.1",
                    dashboard_address=None)
                self.client = distributed.Client(self.cluster, set_as_default=False)
            else:
                self.client = distributed.Client(value, timeout=CONNECT_TIMEOUT,
                                                 set_as_default=False)
        except Exception as exc:
            self.close()
            first = (str(exc).splitlines() or [type(exc).__name__])[0]
            raise StreamqError(f"--cluster {address}: cannot reach a Dask scheduler ({first})") from None

    def check_workers(self, paths: list[str]) -> int:
        """Make sure every worker has streamq and sees ``paths`` (graph, output
        folder: they must be on shared storage); returns the worker count."""
        try:
            seen = self.client.run(missing_paths, list(paths))
        except Exception as exc:
            raise StreamqError(f"--cluster {self.address}: the Dask workers cannot run streamq "
                               f"(is it installed on every worker?): {one_line(exc)}") from None
        for worker, missing in sorted(seen.items()):
            if missing:
                raise StreamqError(f"--cluster {self.address}: Dask worker {worker} cannot see "
                                   f"{missing[0]}; the graph, the inputs and --out must be on "
                                   f"storage every worker shares, at the same paths")
        return len(seen)

    def describe(self) -> str:
        try:
            n = len(self.client.scheduler_info().get("workers", {}))
        except Exception:
            n = "?"
        where = "local Dask cluster" if self.cluster is not None else f"Dask cluster {self.address}"
        return f"{where} ({n} workers)"

    def submit(self, job: dict, done: "queue.Queue") -> None:
        key = f"streamq-batch-{os.path.basename(job['folder'])}-{job['run_id']}"
        fut = self.client.submit(process_file, job, key=key, pure=False)
        self.futures.append(fut)
        fut.add_done_callback(lambda f, job=job: done.put((job, f)))

    def cancel_pending(self) -> None:
        # Tasks already running cannot be cut short by Dask; they see the stop
        # file instead, and the ones not yet started return at once.
        pass

    def close(self) -> None:
        for attr in ("client", "cluster"):
            obj = getattr(self, attr, None)
            if obj is not None:
                try:
                    obj.close()
                except Exception:
                    pass
                setattr(self, attr, None)

    def kill(self) -> None:
        try:
            if self.futures and getattr(self, "client", None) is not None:
                self.client.cancel(self.futures, force=True)
        except Exception:
            pass
        self.close()


def make_engine(workers: int | None, cluster: str | None, jobs: int):
    """The engine for a batch of ``jobs`` files."""
    if cluster:
        return DaskCluster(cluster)
    n = workers if workers is not None else (os.cpu_count() or 1)
    return LocalPool(max(1, min(n, jobs)))
