"""Keep the store's disk commits off the asyncio loop.

A commit with `synchronous=FULL` waits for the disk; on a busy disk that took over 100 ms
here, and every box's closed loop stalled with it. The lab therefore hands records to one
writer thread, which commits a trial the moment it arrives (milliseconds later than inline)
and flushes buffered events at least every quarter second, so the durability promises hold:
events on disk within a second, each trial as soon as it ends. The store itself is used from
one thread at a time, under a lock.
"""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from functools import partial

from server.engine.records import Record
from server.store.errors import StoreError
from server.store.writer import Store

FLUSH_EVERY_S = 0.25
_STOP = object()


class BackgroundWriter:
    def __init__(self, store: Store, say: Callable[[str], None] = print):
        self.store = store
        self.say = say
        self._lock = threading.Lock()
        self._queue: queue.Queue = queue.Queue()
        self._thread = threading.Thread(target=self._run, name="vigil-store", daemon=True)
        self._last_problem: str | None = None

    def start(self) -> None:
        self._thread.start()

    def write(self, session_id: int, record: Record) -> None:
        """Queue one record; never blocks the caller on the disk."""
        self._queue.put((session_id, record))

    def drain(self) -> None:
        """Wait until every queued record has been handed to the store."""
        if self._thread.is_alive():
            self._queue.join()

    @contextmanager
    def direct(self) -> Iterator[Store]:
        """Use the store from this thread (queries, rare writes) without racing the writer."""
        with self._lock:
            yield self.store

    def close(self) -> None:
        """Hand over everything queued, stop the thread, and commit what is buffered."""
        if self._thread.is_alive():
            self._queue.put(_STOP)
            self._thread.join()
        with self._lock:
            self.store.flush()

    def _run(self) -> None:
        while True:
            try:
                item = self._queue.get(timeout=FLUSH_EVERY_S)
            except queue.Empty:
                item = None
            try:
                if item is _STOP:
                    return
                with self._lock:
                    if item is not None:
                        self._guard(partial(self.store.write, *item))
                    self._guard(lambda: self.store.flush_due(time.monotonic()))
            finally:
                if item is not None:
                    self._queue.task_done()

    def _guard(self, action: Callable[[], object]) -> None:
        # A full disk or a refused record must not stop the lab: the store keeps what it
        # could not write and retries at the next flush; say so once per distinct problem.
        try:
            action()
        except StoreError as exc:
            if str(exc) != self._last_problem:
                self._last_problem = str(exc)
                self.say(f"warning: {exc}")
        except Exception as exc:  # a bug in one record must not lose every later one
            self.say(f"warning: store: {type(exc).__name__}: {exc}")
