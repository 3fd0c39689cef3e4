"""Progress reporting and cancel checks shared by every pass."""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Callable, Iterator
from typing import Generic, TypeVar

from triage.errors import PassCancelled
from triage.results.progress import PassProgress

T = TypeVar("T")


ProgressCallback = Callable[[PassProgress], None]

PROGRESS_INTERVAL_S = 0.25
"""Least time between two progress reports: about four a second keeps a slow screen current."""


class ProgressTracker:
    """Turn row counts into `PassProgress` reports, at most one per `interval_s`.

    Parameters
    ----------
    rows_total : int or None
        Rows the pass will read, if known.
    on_progress : callable or None
        Receives each report; None disables reporting.
    cancel : threading.Event or None
        When set, `check` raises `PassCancelled`.
    interval_s : float, optional
        Least time between reports; `PROGRESS_INTERVAL_S` when not given (tests set 0).
    """

    def __init__(
        self,
        rows_total: int | None,
        *,
        on_progress: ProgressCallback | None = None,
        cancel: threading.Event | None = None,
        interval_s: float | None = None,
    ) -> None:
        self.rows_total = rows_total
        self.on_progress = on_progress
        self.cancel = cancel
        self.interval_s = PROGRESS_INTERVAL_S if interval_s is None else interval_s
        self.rows_done = 0
        self._start = time.perf_counter()
        self._last_report = float("-inf")

    def check(self) -> None:
        """Raise `PassCancelled` if the cancel event is set."""
        if self.cancel is not None and self.cancel.is_set():
            msg = "the pass was stopped before it finished"
            raise PassCancelled(msg)

    def advance(self, rows_done: int, *, force: bool = False) -> None:
        """Record that `rows_done` rows have been read in all, report if due, then check cancel."""
        self.rows_done = max(self.rows_done, rows_done)
        now = time.perf_counter()
        if self.on_progress is not None and (force or now - self._last_report >= self.interval_s):
            self._last_report = now
            self.on_progress(self.snapshot(now))
        self.check()

    def snapshot(self, now: float | None = None) -> PassProgress:
        """Return the progress as of now."""
        elapsed = (time.perf_counter() if now is None else now) - self._start
        speed = self.rows_done / elapsed if elapsed > 0 else 0.0
        eta = None
        if self.rows_total is not None and speed > 0:
            eta = max(0.0, (self.rows_total - self.rows_done) / speed)
        return PassProgress(self.rows_done, self.rows_total, elapsed, speed, eta)


_DONE = object()


class ReadAhead(Generic[T]):
    """Iterate over `items` while a background thread produces the next ones.

    Decoding a batch (polars/pyarrow, which release the GIL) overlaps with factoring the
    previous one; DESIGN.md measured 1.4x the floor without read-ahead and 1.1x with it.
    Closing the iterator early (break, exception, cancel) stops the producer.
    """

    def __init__(self, items: Iterator[T], *, depth: int = 2) -> None:
        self._items = items
        self._queue: queue.Queue[object] = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._produce, name="triage-read-ahead", daemon=True)
        self._thread.start()

    def _produce(self) -> None:
        try:
            for item in self._items:
                if not self._put(item):
                    return
        except BaseException as error:  # handed to the consumer, which re-raises it
            self._put(error)
            return
        self._put(_DONE)

    def _put(self, item: object) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.1)
            except queue.Full:
                continue
            return True
        return False

    def __iter__(self) -> Iterator[T]:
        try:
            while True:
                item = self._queue.get()
                if item is _DONE:
                    return
                if isinstance(item, BaseException):
                    raise item
                yield item  # type: ignore[misc]
        finally:
            self.close()

    def close(self) -> None:
        """Stop the producer and wait for it."""
        self._stop.set()
        self._thread.join(timeout=5)
