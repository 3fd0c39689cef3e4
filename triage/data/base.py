"""What every data source shares: row positions, batches, samples and block-wise reading.

A source is read as a sequence of *blocks* (Parquet row groups, Arrow IPC record batches, fixed
runs of CSV rows). Sampling picks whole blocks, and fetching rows by position reads only the
blocks that hold them, so both stay cheap on a large file.
"""

from __future__ import annotations

import abc
import contextlib
import dataclasses
import functools
import os
from collections.abc import Callable, Collection, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, ClassVar, Final, Protocol

import numpy as np
import polars as pl
import pyarrow as pa

from triage.core.design import ROW_INDEX
from triage.core.filter import closest_names_hint
from triage.data import hooks
from triage.data.remote import FileName, file_name, is_url
from triage.data.snapshot import FileStamp, SourceSnapshot, being_read, changed_message
from triage.errors import SourceChanged, SourceError, SpecError, TriageError

if TYPE_CHECKING:
    from triage._typing import Sampling


_GOLDEN: Final[int] = 0x9E3779B97F4A7C15
"""Odd constant of the SplitMix64 generator (Steele, Lea and Flood 2014)."""


@dataclass(frozen=True)
class Batch:
    """One batch of a scan and how far the scan has got."""

    frame: pl.DataFrame
    """The rows kept by the filter: the requested columns plus `ROW_INDEX`."""
    rows_read: int
    """Rows read so far, before filtering (for progress): from the source's start, or from
    the part's start for a part of `Source.scan_parts`."""


@dataclass(frozen=True)
class Sample:
    """Rows read into memory for a quick fit, with an account of how they were chosen."""

    frame: pl.DataFrame
    """The sampled rows (requested columns plus `ROW_INDEX`), in source order."""
    description: str
    """How the rows were chosen, in words, for the screen and the report."""
    is_whole: bool
    """True when every row of the source (that passes the filter) is in the sample."""
    warning: str | None
    """Why the sample may be unrepresentative, or None."""
    rows_read: int
    """Rows read from the source to draw the sample, before filtering."""


class Source(Protocol):
    """A table on disk read in bounded batches; rows are named by their position."""

    @property
    def path(self) -> FileName:
        """The path (file, directory or glob) or the URL the source was opened from."""
        ...

    @property
    def description(self) -> str:
        """One line naming the source, its format and its layout."""
        ...

    @property
    def files(self) -> tuple[FileName, ...]:
        """The files read, in the order their rows are numbered."""
        ...

    @property
    def n_blocks(self) -> int | None:
        """Row groups, record batches or files, or None where that needs a scan (CSV)."""
        ...

    def schema(self) -> dict[str, pl.DataType]:
        """Column names and polars types, from metadata."""
        ...

    def row_count(self) -> int | None:
        """Rows in the source if metadata tells cheaply, else None."""
        ...

    def count_rows_exact(self) -> int:
        """Rows in the source, scanning it if needed."""
        ...

    def scan_batches(
        self, columns: Sequence[str], *, where: pl.Expr | None = None, batch_rows: int = 65_536
    ) -> Iterator[Batch]:
        """Yield the rows in bounded batches (frames with `ROW_INDEX`) and the rows read so far."""
        ...

    def scan_parts(
        self,
        columns: Sequence[str],
        *,
        where: pl.Expr | None = None,
        batch_rows: int = 65_536,
        part_rows: int | None = None,
    ) -> list[Callable[[], Iterator[Batch]]]:
        """Split the scan into parts that can be read at the same time (or elsewhere), in order."""
        ...

    def read_sample(
        self,
        columns: Sequence[str],
        *,
        n_rows: int,
        seed: int,
        sampling: Sampling = "groups",
        where: pl.Expr | None = None,
        spread_to: int | None = None,
    ) -> Sample:
        """Read a sample of about `n_rows` rows into memory (`spread_to`: fewer, spread)."""
        ...

    def read_rows(self, positions: Sequence[int] | np.ndarray) -> pl.DataFrame:
        """Read every column of the rows at `positions`, in the order given."""
        ...


@contextlib.contextmanager
def reading(path: FileName, kind: str) -> Iterator[None]:
    """Turn a reader's exception into a one-line `SourceError` naming `path`.

    Parameters
    ----------
    path : Path or str
        The file or folder (or URL) being read.
    kind : str
        The format in words (``"Parquet"``), for the advice in the message.

    Raises
    ------
    SourceError
        In place of any polars, pyarrow or operating-system error raised inside the block.
    """
    try:
        yield
    except TriageError:
        raise
    except (pl.exceptions.PolarsError, pa.ArrowException, OSError, ValueError) as exc:
        first_line = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        msg = (
            f"cannot read `{path}` as {kind}: {first_line}; "
            f"check that it is a complete {kind} file (not still being written)"
        )
        raise SourceError(msg) from exc


def collect_batches(frame: pl.LazyFrame, *, batch_rows: int) -> Iterator[pl.DataFrame]:
    """Run a lazy query in bounded batches of about `batch_rows` rows, in order.

    This is the one place triage calls polars' `collect_batches`, which polars marks
    unstable; a change in that API is fixed here.

    Parameters
    ----------
    frame : LazyFrame
        The query to run.
    batch_rows : int
        Rows per batch asked of polars.

    Yields
    ------
    DataFrame
        The results, in the query's row order.
    """
    yield from frame.collect_batches(chunk_size=batch_rows, maintain_order=True)


def with_positions(frame: pl.DataFrame, positions: np.ndarray | range) -> pl.DataFrame:
    """Put `ROW_INDEX` (int64 source positions) in front of `frame`.

    Parameters
    ----------
    frame : DataFrame
        One row per position, or no columns at all (a read of zero columns).
    positions : ndarray of int64, or range
        Source position of each row. A range is made by polars itself: the first frame
        polars builds from numpy loads `numpy.ma` (80 ms measured here), which a streamed
        pass need not wait for.

    Returns
    -------
    DataFrame
    """
    if isinstance(positions, range):
        values = pl.int_range(positions.start, positions.stop, dtype=pl.Int64, eager=True)
        index = values.alias(ROW_INDEX).to_frame()
    else:
        index = pl.DataFrame({ROW_INDEX: np.asarray(positions, dtype=np.int64)})
    return index if frame.width == 0 else index.hstack(frame)


def spread_positions(height: int, n_rows: int) -> np.ndarray:
    """Positions of `n_rows` rows spread evenly through `height` rows (all, when no more).

    They depend only on the two counts, so the same rows give the same spread.

    Examples
    --------
    >>> spread_positions(10, 4).tolist()
    [0, 2, 5, 7]
    """
    if height <= n_rows:
        return np.arange(height, dtype=np.int64)
    return np.arange(n_rows, dtype=np.int64) * height // n_rows


def spread_rows(frame: pl.DataFrame, n_rows: int) -> pl.DataFrame:
    """Keep `n_rows` rows of `frame` spread evenly through it (all of them when it has no more)."""
    if frame.height <= n_rows:
        return frame
    return frame[spread_positions(frame.height, n_rows)]


def arrow_schema_types(schema: pa.Schema) -> dict[str, pl.DataType]:
    """Return the polars types of the columns of an Arrow `schema` (as a read converts them)."""
    return dict(pl.DataFrame(schema.empty_table()).schema)


def block_positions(blocks: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Source positions of every row of the sorted `blocks`, in order.

    Parameters
    ----------
    blocks : ndarray of int
        Block numbers, increasing.
    offsets : ndarray of int64
        Start position of each block, then the total row count.

    Returns
    -------
    ndarray of int64
    """
    parts = [np.arange(offsets[b], offsets[b + 1], dtype=np.int64) for b in blocks]
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)


def conform(frame: pl.DataFrame, schema: dict[str, pl.DataType]) -> pl.DataFrame:
    """Cast the columns of `frame` whose type differs from `schema` (pyarrow vs polars reads).

    Parameters
    ----------
    frame : DataFrame
    schema : dict of str to DataType

    Returns
    -------
    DataFrame
    """
    casts = {
        name: schema[name]
        for name, dtype in frame.schema.items()
        if name in schema and dtype != schema[name]
    }
    return frame.cast(casts) if casts else frame  # type: ignore[arg-type]


def random_keys(positions: np.ndarray, seed: int) -> np.ndarray:
    """Pseudo-random uint64 keys of row positions, the same whatever the batching.

    SplitMix64's output function (Steele, Lea and Flood 2014) applied to
    ``position + (seed + 1) * golden``; keeping the rows with the smallest keys gives a
    uniform sample that does not depend on how the scan was cut into batches.

    Parameters
    ----------
    positions : ndarray of int64
    seed : int

    Returns
    -------
    ndarray of uint64
    """
    with np.errstate(over="ignore"):
        z = positions.astype(np.uint64) + np.uint64(((seed + 1) * _GOLDEN) % 2**64)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def check_count(
    name: str,
    value: object,
    *,
    minimum: int = 1,
    error: type[TriageError] = SpecError,
    advice: str = "",
) -> None:
    """Raise unless `value` is an integer (not a bool) of at least `minimum`.

    Parameters
    ----------
    name : str
        The parameter, as the message names it.
    value : object
        What was received.
    minimum : int, default=1
        Smallest allowed value: 1 reads "a positive integer", 0 "a non-negative integer".
    error : type of TriageError, default=SpecError
        The error raised.
    advice : str, optional
        Appended to the message, e.g. ``"; ask for at least one row"``.

    Raises
    ------
    TriageError
        Of type `error`, naming `name` and the value received.
    """
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        allowed = {0: "a non-negative integer", 1: "a positive integer"}.get(
            minimum, f"an integer of at least {minimum}"
        )
        msg = f"`{name}` must be {allowed}, got `{value!r}`{advice}"
        raise error(msg)


def offsets_from_sizes(sizes: Sequence[int] | np.ndarray) -> np.ndarray:
    """Start position of each block, then the total row count, from the blocks' sizes.

    Parameters
    ----------
    sizes : sequence of int
        Rows per block, in source order.

    Returns
    -------
    ndarray of int64
        ``len(sizes) + 1`` values starting at 0.
    """
    return np.concatenate([[0], np.cumsum(sizes, dtype=np.int64)]).astype(np.int64)


def number_record_batches(
    record_batches: Iterable[pa.RecordBatch],
    schema: dict[str, pl.DataType],
    *,
    start: int = 0,
    coded: Collection[str] = (),
) -> Iterator[pl.DataFrame]:
    """Turn consecutive record batches of a source into frames with positions.

    Parameters
    ----------
    record_batches : iterable of pyarrow.RecordBatch
        Consecutive rows of the source, in order, from position `start`.
    schema : dict of str to DataType
        The source's polars types (see `conform`).
    start : int, default=0
        Position of the first row.
    coded : collection of str, default=()
        Text columns read dictionary-encoded, left as polars Categorical columns.

    Yields
    ------
    DataFrame
        `ROW_INDEX` then the batch's columns.
    """
    for record_batch in record_batches:
        n = record_batch.num_rows
        types = {name: dtype for name, dtype in schema.items() if name not in coded}
        frame = conform(pl.DataFrame(record_batch), types)
        yield with_positions(frame, range(start, start + n))
        start += n


def apply_filter(frame: pl.DataFrame, where: pl.Expr | None, extra: Sequence[str]) -> pl.DataFrame:
    """Keep the rows of `frame` that match `where`, then drop the filter's own columns `extra`."""
    if where is None:
        return frame
    return frame.filter(where).drop(extra)


def filter_frames(
    frames: Iterable[pl.DataFrame], where: pl.Expr | None, extra: Sequence[str], *, path: FileName
) -> Iterator[Batch]:
    """Filter raw frames (dropping the filter's own columns), counting the rows read.

    Each frame is announced to `hooks.batch_read` with `path` (the file or source read).
    """
    rows_read = 0
    for frame in frames:
        hooks.batch_read(path)
        rows_read += frame.height
        yield Batch(apply_filter(frame, where, extra), rows_read)


def group_runs(sizes: Sequence[int], part_rows: int) -> list[tuple[int, int]]:
    """Split blocks of `sizes` rows into runs ``[first, stop)`` of `part_rows` rows or more.

    The last run may hold fewer.

    Examples
    --------
    >>> group_runs([2, 2, 2], 3)
    [(0, 2), (2, 3)]
    """
    runs: list[tuple[int, int]] = []
    first, rows = 0, 0
    for block, size in enumerate(sizes):
        rows += size
        if rows >= part_rows:
            runs.append((first, block + 1))
            first, rows = block + 1, 0
    if first < len(sizes):
        runs.append((first, len(sizes)))
    return runs


@dataclass(frozen=True, eq=False, kw_only=True)
class FilePart(abc.ABC):
    """One file, or a run of its blocks, that any thread or process reads alone.

    A part holds what its read needs and nothing of the source (a few hundred bytes
    pickled), so a cluster ships it to the worker that reads it; rows keep their positions
    in the whole source. Called, it yields the part's `Batch` es as `Source.scan_parts` says.
    """

    kind: ClassVar[str]
    """The format in words, for messages (``"Parquet"``)."""
    path: str
    """The file, as an absolute path (a worker's working folder may differ), or its URL."""
    start: int
    """Position in the source of the part's first row."""
    columns: tuple[str, ...]
    """Columns to return (then dropped: the filter's own `extra`), in order."""
    schema: dict[str, pl.DataType]
    """The source's polars types of `columns` (reads are cast to them)."""
    where: pl.Expr | None = None
    extra: tuple[str, ...] = ()
    batch_rows: int = 65_536
    stamp: tuple[int, int] | None = None
    """The file's size and modification time (ns) when the source was opened; None: unchecked.

    Not its device and inode, which differ between machines that mount the same storage.
    """

    @property
    def file(self) -> FileName:
        """The file: a `Path`, or the URL as text."""
        return self.path if is_url(self.path) else Path(self.path)

    @property
    @abc.abstractmethod
    def rows(self) -> int | None:
        """Rows the part reads, before filtering; None when only a read tells (CSV)."""

    @abc.abstractmethod
    def _frames(self) -> Iterator[pl.DataFrame]:
        """Yield the part's rows, unfiltered, with `ROW_INDEX`, in order."""

    def __call__(self) -> Iterator[Batch]:
        """Read the part: filtered batches with `ROW_INDEX`, ``rows_read`` from its start.

        Raises
        ------
        SourceChanged
            When the file differs from its stamp before, during or after the read, or the
            read ends with other than the part's rows (a file cut short).
        SourceError
            When the file cannot be read.
        """
        path = self.file
        self._check_unchanged(path)
        rows_read = 0
        try:
            for batch in filter_frames(self._frames(), self.where, self.extra, path=path):
                rows_read = batch.rows_read
                yield batch
        except SourceError as error:
            if not isinstance(error, SourceChanged):
                self._check_unchanged(path)  # a file cut short fails to decode: say so
            raise
        self._check_unchanged(path)
        if self.rows is not None and rows_read != self.rows:
            raise SourceChanged(changed_message(path))

    def _check_unchanged(self, path: FileName) -> None:
        if self.stamp is None:
            return
        now = FileStamp.of(path)
        if now is None or (now.size, now.mtime_ns) != self.stamp:
            raise SourceChanged(
                changed_message(path, how="was removed" if now is None else "changed")
            )


def part_fields(
    path: FileName,
    columns: Sequence[str],
    schema: dict[str, pl.DataType],
    *,
    where: pl.Expr | None,
    extra: Sequence[str],
    batch_rows: int,
    stamp: FileStamp | None,
) -> dict[str, Any]:
    """Return the fields every `FilePart` of the file at `path` shares, as keywords.

    `schema` is the source's (only `columns` are kept); of `stamp`, a part checks the size
    and modification time.
    """
    return {
        "path": path if isinstance(path, str) else os.path.abspath(path),
        "columns": tuple(columns),
        "schema": {name: schema[name] for name in columns},
        "where": where,
        "extra": tuple(extra),
        "batch_rows": batch_rows,
        "stamp": None if stamp is None else (stamp.size, stamp.mtime_ns),
    }


def _check_sample_args(n_rows: int, sampling: str) -> None:
    check_count("n_rows", n_rows)
    if sampling not in ("groups", "uniform"):
        msg = f"`sampling` must be `groups` or `uniform`, got `{sampling!r}`"
        raise SpecError(msg)


_GROUPS_WARNING: Final[str] = (
    "this sample is made of whole {unit} picked at random, not single rows: if the rows are "
    "stored sorted or grouped by some column, it may not represent the whole source; a uniform "
    "sample or a full pass avoids this"
)


class BlockSource(abc.ABC):
    """Shared logic of the concrete sources: scans, samples and row fetches over blocks.

    A subclass supplies the metadata, `_scan_raw` (batches with positions, unfiltered), the
    block layout (`_block_offsets`) and `_read_blocks` (whole blocks by number).
    """

    _kind: str
    """The format in words, e.g. ``"Parquet"``."""
    _block_unit: str
    """What a block is called in sample descriptions, plural, e.g. ``"row groups"``."""

    def __init__(self, path: FileName) -> None:
        self._path = path
        self._schema: dict[str, pl.DataType] | None = None
        self._snapshot = SourceSnapshot(self.files)
        """The files as they were when the source was opened (checked on every read)."""

    @property
    def snapshot(self) -> SourceSnapshot:
        """The files' sizes, times and identities as they were when the source was opened."""
        return self._snapshot

    @contextlib.contextmanager
    def _unchanged(self, files: Sequence[FileName]) -> Iterator[None]:
        """Check `files` against the snapshot before and after the block.

        A read that fails inside the block is reported as the file's change when one of
        `files` changed (a truncated file fails to decode), else as it was.
        """
        self._snapshot.check_files(files)
        try:
            with being_read(self._snapshot, files):
                yield
        except SourceError as error:
            if not isinstance(error, SourceChanged):
                self._snapshot.check_files(files)
            raise
        self._snapshot.check_files(files)

    @property
    def path(self) -> FileName:
        """The path (file, directory or glob) or the URL the source was opened from."""
        return self._path

    @property
    def files(self) -> tuple[FileName, ...]:
        """The files read, in the order their rows are numbered."""
        return (self._path,)

    @property
    @abc.abstractmethod
    def description(self) -> str:
        """One line naming the source, its format and its layout."""

    @property
    def n_blocks(self) -> int | None:
        """Row groups or record batches in the source, or None where that needs a scan."""
        offsets = self._block_offsets(None)
        return None if offsets is None else len(offsets) - 1

    def schema(self) -> dict[str, pl.DataType]:
        """Column names and polars types, read from metadata (cheap).

        Returns
        -------
        dict of str to DataType
            In the source's column order; `ROW_INDEX` is not included.
        """
        if self._schema is None:
            with reading(self._path, self._kind):
                schema = dict(self._read_schema())
            if ROW_INDEX in schema:
                msg = (
                    f"`{self._path}` has a column named `{ROW_INDEX}`, which triage uses for "
                    "row positions; rename that column in a copy of the data"
                )
                raise SourceError(msg)
            self._schema = schema
        return self._schema

    def row_count(self) -> int | None:
        """Rows in the source when metadata tells them cheaply, else None.

        Returns
        -------
        int or None
        """
        offsets = self._block_offsets(None)
        return None if offsets is None else int(offsets[-1])

    def count_rows_exact(self) -> int:
        """Rows in the source; may scan the whole source (CSV).

        Returns
        -------
        int
        """
        count = self.row_count()
        return count if count is not None else self._count_by_scan()

    def scan_batches(
        self, columns: Sequence[str], *, where: pl.Expr | None = None, batch_rows: int = 65_536
    ) -> Iterator[Batch]:
        """Yield the rows in bounded batches, reading only `columns`, with the rows read so far.

        Parameters
        ----------
        columns : sequence of str
            Columns to read; `ROW_INDEX` is always added in front.
        where : Expr, optional
            Filter applied after positions are attached, so `ROW_INDEX` stays the position
            in the source. Columns it needs are read for it and not returned unless asked.
        batch_rows : int, default=65_536
            Rows read per batch, before filtering.

        Yields
        ------
        Batch
            ``frame``: `ROW_INDEX` (int64) then `columns`, possibly empty after filtering;
            ``rows_read``: rows read from the source so far, before filtering (for progress).

        Raises
        ------
        SpecError
            If a column is not in the source.
        SourceError
            If the source cannot be read.
        """
        names = self._check_columns(columns)
        check_count("batch_rows", batch_rows)
        extra = self._filter_only_columns(names, where)
        rows_read = 0
        frames = self._scan_raw(names + extra, batch_rows)
        with self._unchanged(self.files):
            for batch in filter_frames(frames, where, extra, path=self._path):
                rows_read = batch.rows_read
                yield batch
        # A file cut short ends pyarrow's read early without an error: count the rows.
        self._snapshot.check_rows(rows_read, self.row_count(), self.files)

    def scan_parts(
        self,
        columns: Sequence[str],
        *,
        where: pl.Expr | None = None,
        batch_rows: int = 65_536,
        part_rows: int | None = None,
    ) -> list[Callable[[], Iterator[Batch]]]:
        """Split the scan into parts that can be read at the same time, in source order.

        Each part, called, yields what `scan_batches` would for its rows (maybe cut into
        other batches), with ``rows_read`` counted from the part's start. Parts are
        self-contained (`FilePart`: file, blocks, first position and columns, not the
        source), so another process (a cluster worker) can unpickle and read them: runs of
        Parquet row groups or of Arrow IPC record batches, never across files; a CSV file is
        one part.

        Parameters
        ----------
        columns, where, batch_rows
            As for `scan_batches`.
        part_rows : int, optional
            Least rows in a part (whole row groups; never across files); the source's own
            default when not given.

        Returns
        -------
        list of callables
            One per part; each reads its part on the thread that calls it.
        """
        names = self._check_columns(columns)
        check_count("batch_rows", batch_rows)
        extra = self._filter_only_columns(names, where)
        parts = self._parts(names + extra, where, extra, batch_rows, part_rows)
        if not parts:  # one stream, read through the source itself
            return [functools.partial(self.scan_batches, names, where=where, batch_rows=batch_rows)]
        return list(parts)

    def read_sample(
        self,
        columns: Sequence[str],
        *,
        n_rows: int,
        seed: int,
        sampling: Sampling = "groups",
        where: pl.Expr | None = None,
        spread_to: int | None = None,
    ) -> Sample:
        """Read a sample of about `n_rows` rows into memory, deterministically for `seed`.

        Parameters
        ----------
        columns : sequence of str
            Columns to read; `ROW_INDEX` is added in front.
        n_rows : int
            Rows wanted. With ``sampling="groups"`` whole blocks are added at random until they
            hold at least `n_rows` rows (counted before `where`); with ``"uniform"`` exactly
            `n_rows` rows are drawn from those that pass `where`.
        seed : int
            Seed of the random choice.
        sampling : {"groups", "uniform"}, default="groups"
            Whole row groups (record batches, CSV blocks) at random, cheap; or an exact
            uniform sample of rows, which reads the whole source.
        where : Expr, optional
            Filter applied after positions are attached.
        spread_to : int, optional
            Keep only this many of the sample's rows, spread evenly through it
            (`spread_rows`), when it is not the whole source. Whole blocks without a filter
            are then thinned as they are read, without holding them whole.

        Returns
        -------
        Sample
            The frame is in source order. When the source holds no more than `n_rows` rows
            every row is read and ``is_whole`` is True.
        """
        names = self._check_columns(columns)
        _check_sample_args(n_rows, sampling)
        if spread_to is not None:
            check_count("spread_to", spread_to)
        with self._unchanged(self.files):
            total = self.row_count()
            if total is not None and total <= n_rows:
                return self._read_whole(names, total, where)
            if sampling == "uniform":
                sample = self._read_uniform(names, n_rows, seed, where)
            else:
                sample = self._read_groups(names, n_rows, seed, where, spread_to)
        if spread_to is None or sample.is_whole:
            return sample
        return dataclasses.replace(sample, frame=spread_rows(sample.frame, spread_to))

    def read_rows(self, positions: Sequence[int] | np.ndarray) -> pl.DataFrame:
        """Read every column of the rows at `positions`, in the order given.

        Only the blocks holding those rows are read, so a handful of rows is cheap on a
        large file.

        Parameters
        ----------
        positions : sequence of int
            0-based source positions; repeats are allowed.

        Returns
        -------
        DataFrame
            `ROW_INDEX` then every column, one row per position.

        Raises
        ------
        SourceError
            If a position is outside the source.
        """
        wanted = np.asarray(positions, dtype=np.int64).reshape(-1)
        names = list(self.schema())
        if wanted.size == 0:
            return self._empty(names)
        unique = np.unique(wanted)
        total = self.row_count()
        in_range = (unique >= 0) if total is None else (unique >= 0) & (unique < total)
        with self._unchanged(self.files):
            found = self._read_positions(names, unique[in_range]) if in_range.all() else None
        if found is None or found.height < unique.size:
            got = found[ROW_INDEX].to_numpy() if found is not None else unique[in_range]
            bad = int(np.setdiff1d(unique, got)[0])
            total = self.count_rows_exact()
            msg = (
                f"row position {bad:,} is outside `{self._path}`, which has {total:,} rows "
                f"(positions 0 to {total - 1:,})"
            )
            raise SourceError(msg)
        return found[np.searchsorted(found[ROW_INDEX].to_numpy(), wanted)]

    # -- hooks for the concrete sources -------------------------------------------------------

    @abc.abstractmethod
    def _read_schema(self) -> dict[str, pl.DataType]:
        """Read the schema from metadata."""

    @abc.abstractmethod
    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        """Yield unfiltered batches with `ROW_INDEX`, in source order."""

    @abc.abstractmethod
    def _block_offsets(self, n_rows: int | None) -> np.ndarray | None:
        """Start position of each block plus the total, or None when unknown without a scan.

        `n_rows` is the sample size being drawn (None outside sampling); sources with no
        natural blocks (CSV) size theirs from it.
        """

    @abc.abstractmethod
    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        """Read the sorted `blocks` (numbers into `offsets`) with `ROW_INDEX`, in order."""

    def _read_block_rows(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray, rows: np.ndarray
    ) -> pl.DataFrame:
        """Read the `rows` (sorted positions among the rows of the sorted `blocks`)."""
        return self._read_blocks(columns, blocks, offsets)[rows]

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> Sequence[Callable[[], Iterator[Batch]]]:
        """Return self-contained parts of a split scan of `columns`; none here (one stream)."""
        return ()

    def _count_by_scan(self) -> int:
        return sum(frame.height for frame in self._scan_raw([], 65_536))

    def _read_positions(self, columns: list[str], positions: np.ndarray) -> pl.DataFrame:
        """Read the rows at sorted unique `positions` (block-wise by default)."""
        offsets = self._block_offsets(None)
        if offsets is None:  # pragma: no cover - sources without metadata override this
            msg = f"`{self._path}` cannot locate rows without a scan"
            raise SourceError(msg)
        blocks = np.unique(np.searchsorted(offsets, positions, side="right") - 1)
        frame = self._read_blocks(columns, blocks, offsets)
        return frame.filter(pl.col(ROW_INDEX).is_in(pl.Series(positions).implode()))

    # -- shared helpers -----------------------------------------------------------------------

    def _check_columns(self, columns: Sequence[str]) -> list[str]:
        if isinstance(columns, str):
            columns = [columns]
        schema = self.schema()
        names: list[str] = []
        for name in columns:
            if name == ROW_INDEX or name in names:
                continue
            if name not in schema:
                hint = closest_names_hint(name, schema)
                msg = f"unknown column `{name}` in `{file_name(self._path)}`{hint}"
                raise SpecError(msg)
            names.append(name)
        return names

    def _filter_only_columns(self, columns: list[str], where: pl.Expr | None) -> list[str]:
        """Columns the filter needs that were not asked for (read, then dropped)."""
        if where is None:
            return []
        needed = [c for c in where.meta.root_names() if c not in columns and c != ROW_INDEX]
        return self._check_columns(needed)

    def _empty(self, columns: list[str]) -> pl.DataFrame:
        schema = self.schema()
        return pl.DataFrame(schema={ROW_INDEX: pl.Int64, **{c: schema[c] for c in columns}})

    def _concat(self, frames: list[pl.DataFrame], columns: list[str]) -> pl.DataFrame:
        frames = [f for f in frames if f.height] or [self._empty(columns)]
        return pl.concat(frames, how="vertical")

    def _read_whole(self, columns: list[str], total: int, where: pl.Expr | None) -> Sample:
        frames = [b.frame for b in self.scan_batches(columns, where=where)]
        frame = self._concat(frames, columns)
        text = f"all {total:,} rows"
        if where is not None:
            text += f", {frame.height:,} of them kept by the filter"
        return Sample(frame, text, is_whole=True, warning=None, rows_read=total)

    def _read_groups(
        self,
        columns: list[str],
        n_rows: int,
        seed: int,
        where: pl.Expr | None,
        spread_to: int | None = None,
    ) -> Sample:
        offsets = self._block_offsets(n_rows)
        if offsets is None:  # pragma: no cover - every source cuts blocks given a sample size
            msg = f"`{self._path}` cannot be split into blocks for sampling"
            raise SourceError(msg)
        total = int(offsets[-1])
        if total <= n_rows:
            return self._read_whole(columns, total, where)
        sizes = np.diff(offsets)
        order = np.random.default_rng(seed).permutation(sizes.size)
        n_picked = int(np.searchsorted(np.cumsum(sizes[order]), n_rows) + 1)
        picked = np.sort(order[:n_picked])
        extra = self._filter_only_columns(columns, where)
        rows_read = int(sizes[picked].sum())
        is_whole = picked.size == sizes.size
        if spread_to is not None and where is None and not is_whole:
            # the rows `spread_rows` would keep of the whole blocks, read as they come
            frame = self._read_block_rows(
                columns, picked, offsets, spread_positions(rows_read, spread_to)
            )
        else:
            frame = self._read_blocks(columns + extra, picked, offsets)
            rows_read = frame.height
            frame = apply_filter(frame, where, extra)
        text = self._describe_groups(picked.size, sizes, seed, rows_read)
        if where is not None:
            text += f", {frame.height:,} of them kept by the filter"
        warning = None if is_whole else _GROUPS_WARNING.format(unit=self._block_unit)
        return Sample(frame, text, is_whole=is_whole, warning=warning, rows_read=rows_read)

    def _describe_groups(self, n_picked: int, sizes: np.ndarray, seed: int, rows: int) -> str:
        return (
            f"{n_picked:,} of {sizes.size:,} {self._block_unit} picked at random "
            f"(seed {seed}), {rows:,} rows"
        )

    def _read_uniform(
        self, columns: list[str], n_rows: int, seed: int, where: pl.Expr | None
    ) -> Sample:
        kept: pl.DataFrame | None = None
        kept_keys = np.empty(0, dtype=np.uint64)
        rows_read = 0
        n_passing = 0
        for batch in self.scan_batches(columns, where=where):
            rows_read = batch.rows_read
            frame = batch.frame
            n_passing += frame.height
            keys = random_keys(frame[ROW_INDEX].to_numpy(), seed)
            kept = frame if kept is None else pl.concat([kept, frame], how="vertical")
            kept_keys = np.concatenate([kept_keys, keys])
            if kept_keys.size > 2 * n_rows:  # prune now and then: memory stays O(n_rows)
                kept, kept_keys = _smallest(kept, kept_keys, n_rows)
        if kept is None:
            kept = self._empty(columns)
        kept, kept_keys = _smallest(kept, kept_keys, n_rows)
        frame = kept.sort(ROW_INDEX)
        population = (
            f"{n_passing:,} rows that pass the filter"
            if where is not None
            else (f"{rows_read:,} rows")
        )
        if n_passing <= n_rows:
            text = f"all {population} (uniform sampling; read the whole source)"
            return Sample(frame, text, is_whole=True, warning=None, rows_read=rows_read)
        text = (
            f"{frame.height:,} rows drawn uniformly at random (seed {seed}) from {population}; "
            "this reads the whole source"
        )
        return Sample(frame, text, is_whole=False, warning=None, rows_read=rows_read)


def _smallest(
    frame: pl.DataFrame, keys: np.ndarray, n_rows: int
) -> tuple[pl.DataFrame, np.ndarray]:
    if keys.size <= n_rows:
        return frame, keys
    keep = np.argpartition(keys, n_rows - 1)[:n_rows]
    return frame[keep], keys[keep]
