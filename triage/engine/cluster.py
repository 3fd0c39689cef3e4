"""Full passes on a Dask cluster: a part of the source in, its accumulators out, on a worker.

Each task reads one part of the source (`Source.scan_parts`: a run of Parquet row groups or
of Arrow IPC record batches, or a whole CSV file) on a worker, from storage that worker
sees, folds it into the pass's accumulators and keeps them there; merge tasks join
neighbouring parts in a tree on the cluster, so only accumulators move between workers and
only the root comes back. A task carries its part (file, blocks, first position: a few
hundred bytes) and the pass's job (the design builder, and in pass 2 the fit: kilobytes),
never rows. A source of one part is folded frame by frame in the local engine's tree.

Dask is optional (``pip install 'triage[cluster]'``); this module imports it only when a
pass first needs the cluster, so a sample fit never contacts the scheduler.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import copy
import logging
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import TYPE_CHECKING, Any, Final, Generic, Self, TypeVar

from triage.data.base import FilePart
from triage.data.remote import is_url, url_info
from triage.engine.passes import RowCounts, counted_frames, fold_each_frame, fold_part
from triage.errors import ClusterError, SourceError, TriageError

if TYPE_CHECKING:
    import numpy as np
    import polars as pl
    from numpy.typing import NDArray

    from triage.data.source import Batch
    from triage.engine.progress import ProgressTracker

S = TypeVar("S")
T = TypeVar("T")

SCHEDULER_VARIABLE: Final = "TRIAGE_SCHEDULER"
"""Environment variable naming the scheduler's address when `--scheduler` is not given."""

INSTALL_HINT: Final = "install it with `pip install 'triage[cluster]'`"

POLL_S: Final = 0.1
"""Seconds between looks at the finished tasks (progress and cancel)."""


@dataclass(frozen=True)
class PassJob(Generic[S]):
    """What every task of one pass needs besides its part: shipped once, a few kilobytes."""

    new_part: Callable[[], S]
    fold: Callable[[S, pl.DataFrame], None]
    merge: Callable[[S, S], S]
    marked: NDArray[np.int64] | None


def fold_part_task(
    read_part: Callable[[], Iterator[Batch]], job: PassJob[S]
) -> tuple[S, RowCounts]:
    """Read and fold one part on a cluster worker; return its accumulators and row counts."""
    counts = RowCounts()
    state = fold_part(read_part, job.new_part(), job.fold, counts, marked=job.marked)
    return state, counts


def fold_lone_part_task(
    read_part: Callable[[], Iterator[Batch]], job: PassJob[S]
) -> tuple[S, RowCounts]:
    """Fold a source's only part on a cluster worker, frame by frame, as the local engine does.

    The local engine folds a source of one part one frame per accumulator, merged in frame
    order (`fold_each_frame`); the same tree here gives the same bits.
    """
    counts = RowCounts()
    frames = counted_frames(read_part(), counts, job.marked)
    state = fold_each_frame(
        frames, job.new_part, job.fold, job.merge, wait=lambda: None, n_workers=1
    )
    return state, counts


def merge_task(
    job: PassJob[S], left: tuple[S, RowCounts], right: tuple[S, RowCounts]
) -> tuple[S, RowCounts]:
    """Merge two neighbouring results on a cluster worker (left holds the earlier rows).

    The left result is copied first: merges work in place, and a worker may still hold it
    as the result of the task that made it.
    """
    state, counts = copy.deepcopy(left)
    counts.absorb(right[1])
    return job.merge(state, right[0]), counts


def pass_job_task(job: PassJob[S]) -> PassJob[S]:
    """Hold the pass's job on a worker, so tasks fetch it once per worker; recomputed if lost."""
    return job


def unseen_file(paths: Sequence[str]) -> str | None:
    """Say why this process cannot read the first of `paths` it cannot, or None (on every worker).

    A local path must exist; a URL must open through fsspec (its store is asked for it).
    """
    for path in paths:
        if not is_url(path):
            if not os.path.exists(path):
                return f"cannot see `{path}`"
            continue
        try:
            if url_info(path) is None:
                return f"cannot find `{path}`"
        except SourceError as error:
            return str(error)
    return None


def merge_tree(leaves: Sequence[T], merge_pair: Callable[[T, T], T]) -> T:
    """Join `leaves` pairwise, level by level, in order; return the root.

    Level one joins leaves 0 and 1, 2 and 3, ...; an odd last one moves up a level as it
    is. This is the tree `fold_in_order` merges a local pass's parts in, so both engines
    give the same bits.

    Examples
    --------
    >>> merge_tree("abcde", lambda a, b: f"({a}{b})")
    '(((ab)(cd))e)'
    """
    level = list(leaves)
    while len(level) > 1:
        pairs = [level[i : i + 2] for i in range(0, len(level), 2)]
        level = [merge_pair(*pair) if len(pair) == 2 else pair[0] for pair in pairs]
    return level[0]


def tree_levels(n_parts: int) -> int:
    """Levels of pairwise merges that join `n_parts` results into one."""
    return max(n_parts - 1, 0).bit_length()


class ClusterEngine:
    """Runs the full passes of triage on a Dask cluster; connects on the first one.

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://10.0.0.5:8786``.
    part_rows : int, optional
        Least rows in a task's part; by default the source's own (`PART_ROWS` for Parquet,
        as the local engine splits it), so the parts are the local engine's.

    Examples
    --------
    Nothing is contacted until a pass over every row needs the cluster:

    >>> engine = ClusterEngine("tcp://10.0.0.5:8786")
    >>> engine.is_connected
    False
    """

    def __init__(self, address: str, *, part_rows: int | None = None) -> None:
        self.address = address.strip()
        self.part_rows = part_rows
        self._client: Any = None
        self._lock = threading.Lock()

    @property
    def is_connected(self) -> bool:
        """True once a pass has connected to the scheduler."""
        return self._client is not None

    def client(self) -> Any:
        """Return the connection to the scheduler, connecting on first use.

        Raises
        ------
        ClusterError
            When Dask is not installed, the address is malformed, or no scheduler answers.
        """
        with self._lock:
            if self._client is None:
                self._client = _connect(self.address)
            return self._client

    def fold_parts(
        self,
        parts: Sequence[Callable[[], Iterator[Batch]]],
        new_part: Callable[[], S],
        fold: Callable[[S, pl.DataFrame], None],
        merge: Callable[[S, S], S],
        *,
        marked: NDArray[np.int64] | None,
        tracker: ProgressTracker,
    ) -> tuple[S, RowCounts]:
        """Fold each part on a worker and merge the results in a tree on the cluster.

        Progress counts the rows of the parts whose tasks have finished; a cancel (or any
        error) cancels every task of the pass, so the cluster keeps nothing of it. A worker
        that dies has its tasks run again elsewhere by Dask.

        Returns
        -------
        tuple
            The merged accumulators and the row counts of every part.

        Raises
        ------
        ClusterError
            When the cluster cannot be reached, a worker cannot see the source, or the pass
            cannot finish (one line saying why).
        PassCancelled
            When the tracker's cancel event is set.
        """
        file_parts = [part for part in parts if isinstance(part, FilePart)]
        if len(file_parts) < len(parts):  # an IPC file without record batches
            msg = "`--engine dask` cannot split this source into parts: use `--engine local`"
            raise ClusterError(msg)
        client = self.client()
        self._check_workers_see(client, file_parts)
        job = client.submit(pass_job_task, PassJob(new_part, fold, merge, marked), pure=False)
        task = fold_part_task if len(file_parts) > 1 else fold_lone_part_task
        pending = {k: client.submit(task, part, job, pure=False) for k, part in enumerate(parts)}
        root = merge_tree(
            list(pending.values()),
            lambda left, right: client.submit(merge_task, job, left, right, pure=False),
        )
        finished = threading.Event()
        root.add_done_callback(lambda _: finished.set())
        sizes = [part.rows or 0 for part in file_parts]  # a CSV file not counted: 0
        rows_done = 0
        try:
            while not finished.wait(POLL_S):
                for k in [k for k, future in pending.items() if future.done()]:
                    rows_done += sizes[k]
                    # dropped here, the part's result lives on the cluster only until merged
                    del pending[k]
                tracker.advance(rows_done)
            result: tuple[S, RowCounts] = _result(root, self.address)
        except BaseException:
            client.cancel([root, job, *pending.values()], force=True)
            raise
        return result

    def _check_workers_see(self, client: Any, parts: Sequence[FilePart]) -> None:
        """Raise `ClusterError` when a worker cannot see a file of the parts."""
        paths = sorted({part.path for part in parts})
        if not paths:
            return
        try:
            answers = client.run(unseen_file, paths)
        except Exception as error:  # the scheduler or a worker went away: one line
            msg = f"the cluster at `{self.address}` did not answer ({_first_line(error)})"
            raise ClusterError(msg) from None
        if not answers:
            msg = (
                f"the cluster at `{self.address}` has no workers; "
                f"start some with `dask worker {self.address}`"
            )
            raise ClusterError(msg)
        for worker, why in sorted(answers.items()):
            if why is not None:
                msg = (
                    f"the cluster's worker {worker} {why}; a pass on a cluster reads the data "
                    "where the workers run: put it on storage every worker mounts at the same "
                    "path, or give a URL every worker can open"
                )
                raise ClusterError(msg)

    def close(self) -> None:
        """Close the connection to the scheduler (the cluster itself keeps running)."""
        with self._lock:
            client, self._client = self._client, None
        if client is not None:
            with contextlib.suppress(Exception):
                client.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()


def _result(root: Any, address: str) -> Any:
    """Return the root task's result, or raise one `TriageError` saying why there is none.

    A worker's own `TriageError` (a file it cannot read, a file that changed) is raised
    again as it is; anything else that stops the pass becomes a `ClusterError`.
    """
    from distributed import KilledWorker

    try:
        return root.result()
    except TriageError:
        raise
    except KilledWorker as error:
        msg = (
            f"the pass cannot finish: workers died in turn while running one of its tasks "
            f"({error.task}); check the workers' memory and logs"
        )
        raise ClusterError(msg) from None
    except (concurrent.futures.CancelledError, OSError) as error:
        msg = f"the pass cannot finish: lost the cluster at `{address}` ({_first_line(error)})"
        raise ClusterError(msg) from None
    except Exception as error:  # a task's unexpected failure, said in one line
        why = f"{type(error).__name__}: {_first_line(error)}"
        msg = f"the pass cannot finish: a task failed with {why}"
        raise ClusterError(msg) from error


def _first_line(error: BaseException) -> str:
    return (str(error).strip().splitlines() or [type(error).__name__])[0]


def _connect(address: str) -> Any:
    """Connect to the scheduler at `address`, turning every failure into one `ClusterError`.

    The scheduler is first asked who it is, within the connect timeout (Dask's
    ``distributed.comm.timeouts.connect``): a client alone would wait for ever on a port
    that accepts connections and never answers.
    """
    if not address:
        msg = (
            "`--engine dask` needs a scheduler: give `--scheduler ADDRESS` "
            f"or set `{SCHEDULER_VARIABLE}`"
        )
        raise ClusterError(msg)
    try:
        import dask
        from dask.utils import parse_timedelta
        from distributed import Client
    except ImportError:
        msg = f"`--engine dask` needs Dask distributed, which is not installed; {INSTALL_HINT}"
        raise ClusterError(msg) from None
    # Our messages say what went wrong; distributed's own log lines would repeat it.
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    seconds = parse_timedelta(dask.config.get("distributed.comm.timeouts.connect"), "s")
    try:
        identity = asyncio.run(_identify(address, seconds))
    except (ValueError, TypeError) as error:
        msg = (
            f"`{address}` is not a scheduler address ({_first_line(error)}); "
            "give one like `tcp://HOST:8786`"
        )
        raise ClusterError(msg) from None
    except Exception as error:
        why = _first_line(error) if str(error).strip() else "no answer"
        msg = (
            f"no Dask scheduler answered at `{address}` within {seconds:g} s ({why}); "
            "check the address and that the scheduler runs"
        )
        raise ClusterError(msg) from None
    kind = identity.get("type") if isinstance(identity, dict) else None
    if kind != "Scheduler":
        msg = f"`{address}` answered as a Dask {kind or 'server'}, not a scheduler; check the port"
        raise ClusterError(msg)
    return Client(address, set_as_default=False, timeout=seconds)  # type: ignore[no-untyped-call]


async def _identify(address: str, seconds: float) -> Any:
    """Ask the server at `address` who it is, giving up after `seconds` at each step."""
    from distributed.core import rpc

    async with rpc(address, timeout=seconds) as server:  # type: ignore[no-untyped-call]
        return await asyncio.wait_for(server.identity(), seconds)
