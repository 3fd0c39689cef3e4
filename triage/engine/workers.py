"""Split one pass over worker threads and merge what they gathered in a fixed order.

The accumulators of both passes merge (`QRAccumulator.merge`, `DiagnosticsAccumulator.merge`),
so a pass can hand its units (parts of a file, or batches) to threads, fold each unit into an
accumulator of its own, and merge the accumulators in unit order. numpy, BLAS, pyarrow and
polars release the GIL for the work on a unit, so the workers use every core they are given.
The order of the merges depends only on the units, never on the number of workers or on which
was quicker, so a result is the same, bit for bit, for any worker count.
"""

from __future__ import annotations

import os
import threading
import time
from collections import deque
from collections.abc import Callable, Generator, Iterable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import TypeVar

S = TypeVar("S")
U = TypeVar("U")

_chosen_workers: int | None = None


def available_cpus() -> int:
    """Return the number of CPUs this process may run on (its affinity mask, where known)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # no affinity call on this platform (macOS, Windows)
        return max(1, os.cpu_count() or 1)


def set_pass_workers(n_workers: int | None) -> None:
    """Set the worker threads of every later pass in this process; None restores the default.

    The command line's `--workers` and the app's setting of the same name call this.
    """
    global _chosen_workers  # one process-wide setting, like a thread pool's size
    if n_workers is not None and n_workers < 1:
        msg = f"a pass needs at least one worker, got {n_workers}"
        raise ValueError(msg)
    _chosen_workers = n_workers


def pass_workers() -> int:
    """Return the worker threads of a pass: as set, else the CPUs the process may use."""
    return _chosen_workers if _chosen_workers is not None else available_cpus()


def fold_in_order(
    units: Iterable[U],
    fold_unit: Callable[[U, threading.Event], S],
    merge: Callable[[S, S], S],
    *,
    wait: Callable[[], None],
    n_workers: int | None = None,
    wait_s: float = 0.05,
) -> S | None:
    """Fold every unit on worker threads and merge the results in unit order, pairwise.

    A worker takes the next unit as soon as it is free, so the load balances itself; the
    results are merged in unit order whichever thread made them, so the outcome does not
    depend on timing or on the number of workers. Merges pair neighbours (units 0 and 1,
    2 and 3, then those pairs, ...: the tree `triage.engine.cluster` builds on a cluster),
    so a pass over the same parts gives the same bits on either engine. `units` is read
    under a lock, one unit at a time, so it may be a generator (say, frames read ahead on
    another thread).

    Parameters
    ----------
    units : iterable
        The units to fold, in order.
    fold_unit : callable
        ``fold_unit(unit, stopping)`` returns the unit's result; it runs in a worker thread
        and should return early once the event `stopping` is set (its result is then dropped).
    merge : callable
        ``merge(a, b)``: the results of two neighbouring runs of units combined (`a` first).
    wait : callable
        Runs on the calling thread every `wait_s` seconds while the workers run (progress,
        cancel); an error it raises stops the workers and is raised here.
    n_workers : int, optional
        Threads to use; `pass_workers()` when not given.
    wait_s : float, default=0.05
        Seconds between calls of `wait`.

    Returns
    -------
    The merged result, or None when there were no units.

    Examples
    --------
    >>> fold_in_order(range(5), lambda k, stopping: [k], lambda a, b: a + b, wait=lambda: None)
    [0, 1, 2, 3, 4]
    """
    stopping, all_done = threading.Event(), threading.Event()
    # One lock for taking units (a generator may block while it reads) and one for merging,
    # so a worker that has finished a unit never waits for the next unit to be read.
    taking, lock = threading.Lock(), threading.Lock()
    numbered = enumerate(units)
    finished: dict[int, S] = {}
    # Merged runs of units 0 .. n_merged - 1, longest first: (units in the run, its result).
    # Like a binary counter, two runs of equal length merge as soon as both exist.
    runs: list[tuple[int, S]] = []
    n_merged = 0
    errors: list[BaseException] = []
    n_threads = max(1, n_workers if n_workers is not None else pass_workers())
    if isinstance(units, range | list | tuple):
        n_threads = max(1, min(n_threads, len(units)))
    running = n_threads

    def fold_units() -> None:
        nonlocal n_merged
        while not stopping.is_set():
            with taking:
                k, unit = next(numbered, (-1, None))
            if k < 0:
                return
            result = fold_unit(unit, stopping)  # type: ignore[arg-type]
            with lock:
                finished[k] = result
                while n_merged in finished:
                    runs.append((1, finished.pop(n_merged)))
                    n_merged += 1
                    while len(runs) > 1 and runs[-1][0] == runs[-2][0]:
                        (size, left), (_, right) = runs[-2], runs[-1]
                        runs[-2:] = [(2 * size, merge(left, right))]

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

    launched: list[threading.Thread] = []
    try:
        # A signal's exception may come while a thread starts, one already reading `units`:
        # every thread launched is joined, so none is left reading a generator its caller
        # then closes ("generator already executing").
        _start_workers(work, n_threads, launched)
        while not all_done.wait(wait_s):
            wait()
    except BaseException:
        stopping.set()
        raise
    finally:
        for thread in launched:
            _join_launched(thread)
    if errors:
        raise errors[0]
    while len(runs) > 1:  # the shorter runs at the end join from the right
        (size, left), (_, right) = runs[-2], runs[-1]
        runs[-2:] = [(size, merge(left, right))]
    return runs[0][1] if runs else None


def map_in_order(
    items: Iterable[U], func: Callable[[U], S], *, n_workers: int | None = None
) -> Iterator[S]:
    """Apply `func` to every item on worker threads and yield the results in item order.

    At most one item more than there are workers is in flight, so memory stays bounded by
    a few items whatever the length of `items` (a generator is read on the calling thread,
    one item at a time). When the caller stops early, the items not yet started are
    dropped and the ones running are waited for.

    Examples
    --------
    >>> list(map_in_order(range(5), lambda k: k * k, n_workers=2))
    [0, 1, 4, 9, 16]
    """
    n_threads = max(1, n_workers if n_workers is not None else pass_workers())
    if n_threads == 1:
        yield from map(func, items)
        return
    pool = ThreadPoolExecutor(n_threads, thread_name_prefix="triage-worker")
    try:
        pending: deque[Future[S]] = deque()
        for item in items:
            pending.append(pool.submit(func, item))
            if len(pending) > n_threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def stream_parts_in_order(
    parts: Sequence[Callable[[], Generator[S, None, None]]],
    *,
    ahead: int,
    wait: Callable[[], None],
    n_workers: int | None = None,
    wait_s: float = 0.05,
) -> Iterator[S]:
    """Run the parts on worker threads and yield their items in order: part 0's, then 1's, ....

    A worker takes the next part as soon as it is free and runs it through (reading and
    working on its items there), so the calling thread only hands the items on. The parts
    after the one being yielded hold at most `ahead` items in all, the one being yielded two;
    their workers wait beyond that, so memory stays bounded whatever a part's size. The items
    and their order depend only on the parts, never on the number of workers.

    Parameters
    ----------
    parts : sequence of callables
        Each, called on a worker, returns a generator of its part's items.
    ahead : int
        Items the parts after the one being yielded may hold, all together.
    wait : callable
        Runs on the calling thread while it waits for an item, at least every `wait_s`
        seconds (progress, cancel); an error it raises, or one raised in a part, stops the
        workers and is raised here. Closing the iterator early stops them too.
    n_workers : int, optional
        Threads to use; `pass_workers()` when not given.
    wait_s : float, default=0.05
        Longest wait between calls of `wait`.

    Examples
    --------
    >>> parts = [lambda k=k: (n for n in range(3 * k, 3 * k + 3)) for k in range(3)]
    >>> list(stream_parts_in_order(parts, ahead=1, wait=lambda: None, n_workers=2))
    [0, 1, 2, 3, 4, 5, 6, 7, 8]
    """
    changed = threading.Condition()
    queued: list[deque[S]] = [deque() for _ in parts]
    finished = [False] * len(parts)
    errors: list[BaseException] = []
    stopping = threading.Event()
    taken, current = 0, 0

    def may_queue(k: int) -> bool:  # called holding `changed`
        if k == current:
            return len(queued[k]) < 2
        return sum(len(items) for items in queued[current + 1 :]) < ahead

    def run_part(k: int) -> None:
        items = parts[k]()
        try:
            for item in items:
                with changed:
                    while not stopping.is_set() and not may_queue(k):
                        changed.wait()
                    if stopping.is_set():
                        return
                    queued[k].append(item)
                    changed.notify_all()
        finally:
            items.close()
        with changed:
            finished[k] = True
            changed.notify_all()

    def work() -> None:
        nonlocal taken
        try:
            while True:
                with changed:
                    if stopping.is_set() or taken == len(parts):
                        return
                    k, taken = taken, taken + 1
                run_part(k)
        except BaseException as error:  # handed to the caller, which raises it
            with changed:
                errors.append(error)
                stopping.set()
                changed.notify_all()

    n_threads = max(1, min(len(parts), n_workers if n_workers is not None else pass_workers()))
    launched: list[threading.Thread] = []
    try:
        _start_workers(work, n_threads, launched)
        for k in range(len(parts)):
            with changed:
                current = k
                changed.notify_all()
            while True:
                with changed:
                    if errors:
                        raise errors[0]
                    is_ready = bool(queued[k])
                    if is_ready:
                        item = queued[k].popleft()
                        changed.notify_all()
                    elif finished[k]:
                        break
                    else:
                        changed.wait(wait_s)
                if is_ready:
                    yield item
                else:
                    wait()
    finally:
        with changed:
            stopping.set()
            changed.notify_all()
        for thread in launched:
            _join_launched(thread)


def _start_workers(
    work: Callable[[], None], n_threads: int, launched: list[threading.Thread]
) -> None:
    """Start `n_threads` threads running `work`, each added to `launched` before its start."""
    for k in range(n_threads):
        thread = threading.Thread(target=work, name=f"triage-worker-{k}", daemon=True)
        launched.append(thread)
        thread.start()


def _join_launched(thread: threading.Thread, *, start_s: float = 1.0) -> None:
    """Join `thread`, whose `start` was called but may have been cut short by an exception.

    A thread whose start was interrupted runs all the same, a moment later; one that never
    got going (the exception came first) is given up after `start_s` seconds.
    """
    deadline = time.monotonic() + start_s
    while True:
        try:
            thread.join()
            return
        except RuntimeError:  # "cannot join thread before it is started": not running yet
            if time.monotonic() > deadline:
                return
            time.sleep(0.001)
