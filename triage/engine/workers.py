"""Split one pass over worker threads, each folding its batches into an accumulator of its own.

The accumulators of both passes merge (`QRAccumulator.merge`, `DiagnosticsAccumulator.merge`),
so a pass can deal its batches out to threads and merge what they gathered at the end. numpy,
BLAS and polars release the GIL for the work on a batch, so two workers use both cores while
the read-ahead thread decodes.
"""

from __future__ import annotations

import contextlib
import os
import queue
import threading
from collections.abc import Callable
from types import TracebackType
from typing import Final, Generic, Self, TypeVar

S = TypeVar("S")
T = TypeVar("T")

PASS_WORKERS: Final = min(2, os.cpu_count() or 1)
"""Worker threads of a pass: the machines this was measured on have two cores."""

_STOP: Final = object()


class BatchWorkers(Generic[S, T]):
    """Deal items out to `n_workers` threads in turn; each folds its items into its own state.

    Item ``i`` goes to worker ``i mod n_workers``, so the split does not depend on timing.
    Each worker holds at most one item waiting, so memory stays bounded. An error in a
    worker is raised again in the caller by the next `submit` or by `finish`.

    Parameters
    ----------
    make_state : callable
        Builds one worker's state (an accumulator, counters).
    fold : callable
        ``fold(state, item)``: adds one item to a state; runs in the worker's thread.
    n_workers : int, default=PASS_WORKERS
        Threads to use.

    Examples
    --------
    >>> with BatchWorkers(list, list.append, n_workers=2) as workers:
    ...     for item in range(5):
    ...         workers.submit(item)
    ...     states = workers.finish()
    >>> states
    [[0, 2, 4], [1, 3]]
    """

    def __init__(
        self,
        make_state: Callable[[], S],
        fold: Callable[[S, T], None],
        *,
        n_workers: int = PASS_WORKERS,
    ) -> None:
        self._fold = fold
        self._states = [make_state() for _ in range(max(n_workers, 1))]
        self._queues: list[queue.Queue[object]] = [queue.Queue(maxsize=1) for _ in self._states]
        self._error: BaseException | None = None
        self._failed = threading.Event()
        self._next = 0
        self._threads = [
            threading.Thread(target=self._work, args=(k,), name=f"triage-worker-{k}", daemon=True)
            for k in range(len(self._states))
        ]
        for thread in self._threads:
            thread.start()

    def _work(self, k: int) -> None:
        state, items = self._states[k], self._queues[k]
        while True:
            item = items.get()
            if item is _STOP:
                return
            try:
                self._fold(state, item)  # type: ignore[arg-type]
            except BaseException as error:  # handed to the caller, which raises it
                self._error = self._error or error
                self._failed.set()
                return

    def _raise_if_failed(self) -> None:
        if self._error is not None:
            raise self._error

    def submit(self, item: T) -> None:
        """Hand `item` to the next worker, waiting while that worker still has one queued."""
        items = self._queues[self._next % len(self._queues)]
        self._next += 1
        while True:
            self._raise_if_failed()
            try:
                items.put(item, timeout=0.1)
            except queue.Full:
                continue
            return

    def finish(self) -> list[S]:
        """Wait for every item to be folded; return the states in worker order."""
        self._stop()
        self._raise_if_failed()
        return self._states

    def _stop(self) -> None:
        for items, thread in zip(self._queues, self._threads, strict=True):
            while thread.is_alive():
                try:
                    items.put(_STOP, timeout=0.1)
                except queue.Full:
                    continue
                break
        for thread in self._threads:
            thread.join()

    def close(self) -> None:
        """Stop the workers without waiting for queued items (after an error or a cancel)."""
        for items in self._queues:
            with contextlib.suppress(queue.Empty):
                items.get_nowait()
        self._stop()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()


def fold_in_order(
    n_units: int,
    fold_unit: Callable[[int, threading.Event], S],
    merge: Callable[[S, S], S],
    *,
    wait: Callable[[], None],
    n_workers: int = PASS_WORKERS,
    wait_s: float = 0.05,
) -> S:
    """Fold units ``0 .. n_units - 1`` on worker threads and merge the results in unit order.

    A worker takes the next unit as soon as it is free, so the load balances itself; the
    results are merged in unit order whichever thread made them, so the outcome does not
    depend on timing.

    Parameters
    ----------
    n_units : int
        Units to fold, at least one.
    fold_unit : callable
        ``fold_unit(k, stopping)`` returns unit ``k``'s result; it runs in a worker thread
        and should return early once the event `stopping` is set (its result is then dropped).
    merge : callable
        ``merge(a, b)``: the result of units ``..k`` and unit ``k + 1`` combined.
    wait : callable
        Runs on the calling thread every `wait_s` seconds while the workers run (progress,
        cancel); an error it raises stops the workers and is raised here.
    n_workers : int, default=PASS_WORKERS
        Threads to use.
    wait_s : float, default=0.05
        Seconds between calls of `wait`.

    Examples
    --------
    >>> fold_in_order(5, lambda k, stopping: [k], lambda a, b: a + b, wait=lambda: None)
    [0, 1, 2, 3, 4]
    """
    stopping, all_done = threading.Event(), threading.Event()
    lock = threading.Lock()
    units = iter(range(n_units))
    finished: dict[int, S] = {}
    merged: list[S] = []  # the merge of units 0 .. n_merged - 1, once there is one
    n_merged = 0
    errors: list[BaseException] = []
    running = n_threads = max(1, min(n_workers, n_units))

    def fold_units() -> None:
        nonlocal n_merged
        while not stopping.is_set():
            with lock:
                k = next(units, None)
            if k is None:
                return
            result = fold_unit(k, stopping)
            with lock:
                finished[k] = result
                while n_merged in finished:
                    part = finished.pop(n_merged)
                    merged[:] = [merge(merged[0], part) if merged else part]
                    n_merged += 1

    def work() -> None:
        nonlocal running
        try:
            fold_units()
        except BaseException as error:  # handed to the caller, which raises it
            errors.append(error)
            stopping.set()
        finally:
            with lock:
                running -= 1
                if running == 0:
                    all_done.set()

    threads = [
        threading.Thread(target=work, name=f"triage-worker-{k}", daemon=True)
        for k in range(n_threads)
    ]
    for thread in threads:
        thread.start()
    try:
        while not all_done.wait(wait_s):
            wait()
    except BaseException:
        stopping.set()
        raise
    finally:
        for thread in threads:
            thread.join()
    if errors:
        raise errors[0]
    return merged[0]
