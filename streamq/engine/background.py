"""Writing files off the main path: sinks hand their blocks to a thread that
does the I/O. In live runs the audio callback then only copies (DESIGN.md
rule 4); in an offline replay the disk works while the chain computes the
next block."""

from __future__ import annotations

import queue
import threading
from typing import Any, Callable

_STOP = object()


class BackgroundWriter:
    """Calls ``write(item)`` on a thread, in order. A failure is kept and
    raised by the next :meth:`put` or by :meth:`close` (after which nothing
    more is written).

    ``limit``: at most this many items wait; :meth:`put` then waits for the
    thread. An offline replay sets it (its blocks come faster than a slow disk
    takes them, and memory must not grow with the recording); a live run does
    not (the audio callback never waits).
    """

    def __init__(self, write: Callable[[Any], None], name: str = "streamq-writer",
                 limit: int | None = None):
        self._write = write
        self._q = queue.SimpleQueue() if limit is None else queue.Queue(maxsize=limit)
        self.error: BaseException | None = None
        self._t = threading.Thread(target=self._run, name=name, daemon=True)
        self._t.start()

    def _run(self) -> None:
        while True:
            item = self._q.get()
            if item is _STOP:
                return
            if isinstance(item, threading.Event):   # drain(): all before it is written
                item.set()
                continue
            if self.error is not None:
                continue
            try:
                self._write(item)
            except BaseException as exc:  # kept for the main thread
                self.error = exc

    def put(self, item: Any) -> None:
        if self.error is not None:
            raise self.error
        self._q.put(item)

    def drain(self) -> None:
        """Wait until everything queued so far is written; raise a kept failure."""
        if self._t.is_alive():
            mark = threading.Event()
            self._q.put(mark)
            while not mark.wait(0.5):
                if not self._t.is_alive():
                    break
        if self.error is not None:
            raise self.error

    def close(self) -> None:
        """Write what is queued, stop the thread, raise a kept failure."""
        if self._t.is_alive():
            self._q.put(_STOP)
            self._t.join()
        if self.error is not None:
            raise self.error
