"""Delimited text sources (CSV, TSV, optionally gzip-compressed), read through polars."""

from __future__ import annotations

import functools
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np
import polars as pl

from triage.core.design import ROW_INDEX
from triage.data.base import (
    BlockSource,
    FilePart,
    block_positions,
    collect_batches,
    offsets_from_sizes,
    part_fields,
    reading,
)
from triage.errors import SourceError

_INFER_ROWS: Final[int] = 10_000
"""Rows polars looks at to guess column types (its default of 100 misses late decimals)."""

_MIN_BLOCKS: Final[int] = 8
"""A block sample of a CSV file is cut into at least this many blocks."""

_MAX_BLOCK_ROWS: Final[int] = 65_536
"""Largest block of CSV rows picked as one unit when sampling."""


@dataclass(frozen=True)
class CsvOptions:
    """How to parse a delimited text file."""

    separator: str | None = None
    """Field separator; None means a tab for ``.tsv`` files and a comma otherwise."""
    has_header: bool = True
    """Whether the first line names the columns."""
    quote_char: str | None = '"'
    """Character that quotes fields holding the separator, or None for no quoting."""
    null_values: tuple[str, ...] = ("", "NA", "NaN", "null")
    """Field texts read as missing values."""
    encoding: str = "utf8"
    """``"utf8"``, or ``"utf8-lossy"`` to replace invalid bytes instead of failing."""


def _separator_for(path: Path, options: CsvOptions) -> str:
    if options.separator is not None:
        return options.separator
    suffixes = [s.lower() for s in path.suffixes]
    return "\t" if ".tsv" in suffixes else ","


def scan_delimited(
    path: Path,
    separator: str,
    options: CsvOptions,
    types: dict[str, pl.DataType] | None = None,
) -> pl.LazyFrame:
    """Scan the delimited text file at `path` with `options`, typing columns as triage does.

    `types` overrides the types inferred from the file's first rows (the types of a folder's
    first file, which every file of it is read with).
    """
    return pl.scan_csv(
        path,
        separator=separator,
        has_header=options.has_header,
        quote_char=options.quote_char,
        null_values=list(options.null_values),
        encoding=options.encoding,  # type: ignore[arg-type]
        infer_schema_length=_INFER_ROWS,
        schema_overrides=types,
    )


def numbered(frame: pl.LazyFrame, start: int = 0) -> pl.LazyFrame:
    """Put `ROW_INDEX` (int64 positions from `start`) in front of `frame`."""
    indexed = frame.with_row_index(ROW_INDEX, offset=start)
    return indexed.with_columns(pl.col(ROW_INDEX).cast(pl.Int64))


@dataclass(frozen=True, eq=False, kw_only=True)
class CsvPart(FilePart):
    """One whole delimited text file (see `FilePart`).

    A file is not cut into byte ranges: a quoted field may hold a line break, so only a
    read from the file's start knows where a row begins.
    """

    kind = "CSV"
    separator: str
    options: CsvOptions
    counted: int | None = None
    """The file's rows as the source counted them (for its sample, or a folder's positions);
    None when they were not counted."""

    @property
    def rows(self) -> int | None:
        """The rows counted, if they were: a read of other than these says the file changed."""
        return self.counted

    def _frames(self) -> Iterator[pl.DataFrame]:
        path = Path(self.path)
        scan = scan_delimited(path, self.separator, self.options, self.schema)
        query = numbered(scan, self.start)
        with reading(path, self.kind):
            yield from collect_batches(
                query.select(ROW_INDEX, *self.columns), batch_rows=self.batch_rows
            )


class CsvSource(BlockSource):
    """Delimited text files read as one table; the row count needs a scan.

    Blocks are cut at sampling time. Many files (a folder or a glob) are read in sorted order,
    each with the column types of the first; their headers must name the same columns.

    Parameters
    ----------
    path : Path
        An existing file, or the folder or glob the files were found in.
    options : CsvOptions
        Parsing options.
    files : sequence of Path, optional
        The files, sorted; `path` alone when not given.

    Raises
    ------
    SourceError
        If the header and first rows cannot be parsed, or the files' headers differ.
    """

    _kind = "CSV"
    _block_unit = "blocks of rows"

    def __init__(self, path: Path, options: CsvOptions, files: Sequence[Path] = ()) -> None:
        self._files = tuple(files) or (path,)
        super().__init__(path)
        self._options = options
        self._separator = _separator_for(self._files[0], options)
        self.schema()

    @property
    def files(self) -> tuple[Path, ...]:
        """The files read, in the order their rows are numbered."""
        return self._files

    @property
    def description(self) -> str:
        """One line naming the file (or folder and files), its separator and the row-count cost."""
        shown = "tab" if self._separator == "\t" else f"`{self._separator}`"
        if len(self._files) == 1:
            return f"{self._files[0].name}: CSV, separator {shown}, rows counted by a scan"
        return (
            f"{self._path}: CSV, {len(self._files):,} files, separator {shown}, "
            "rows counted by a scan"
        )

    def _scan(self, file: Path) -> pl.LazyFrame:
        """Scan one of the files with the source's column types."""
        self.snapshot.check_file(file)
        types = self.schema() if len(self._files) > 1 else None
        return scan_delimited(file, self._separator, self._options, types)

    def _read_schema(self) -> dict[str, pl.DataType]:
        first, *others = self._files
        schema = dict(scan_delimited(first, self._separator, self._options).collect_schema())
        for file in others:
            with reading(file, self._kind):
                names = scan_delimited(file, self._separator, self._options).collect_schema()
            if list(names) != list(schema):
                msg = (
                    f"`{file}` has other columns than `{first.name}` ({', '.join(names)} "
                    f"against {', '.join(schema)}); the files of a CSV folder must share a header"
                )
                raise SourceError(msg)
        return schema

    @functools.cached_property
    def _file_rows(self) -> list[int]:
        """Rows of each file, counted by a scan (polars' count, which follows quoted fields)."""
        rows = []
        for file in self._files:
            with self._unchanged([file]), reading(file, self._kind):
                rows.append(int(self._scan(file).select(pl.len()).collect().item()))
        return rows

    @property
    def _starts(self) -> list[int]:
        """Position of each file's first row: a single file starts at 0, many are counted."""
        if len(self._files) == 1:
            return [0]
        return [int(start) for start in offsets_from_sizes(self._file_rows)[:-1]]

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> list[CsvPart]:
        """Return each file as one part (a worker reads it where it sees it)."""
        schema = self.schema()
        starts = self._starts
        # a single file's rows are known once its sample was drawn (which counts them)
        is_counted = len(self._files) > 1 or "_file_rows" in self.__dict__
        counts: list[int | None] = list(self._file_rows) if is_counted else [None]
        parts = []
        for file, start, counted in zip(self._files, starts, counts, strict=True):
            fields = part_fields(
                file, columns, schema, where=where, extra=extra, batch_rows=batch_rows,
                stamp=self.snapshot.stamp(file),
            )  # fmt: skip
            parts.append(
                CsvPart(
                    start=start,
                    separator=self._separator,
                    options=self._options,
                    counted=counted,
                    **fields,
                )
            )
        return parts

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        start = 0
        for file in self._files:
            query = numbered(self._scan(file), start).select(ROW_INDEX, *columns)
            with reading(file, self._kind):
                for frame in collect_batches(query, batch_rows=batch_rows):
                    start += frame.height
                    yield frame

    def _count_by_scan(self) -> int:
        return sum(self._file_rows)

    def _block_offsets(self, n_rows: int | None) -> np.ndarray | None:
        if n_rows is None:
            return None
        total = sum(self._file_rows)
        block_rows = max(1, min(_MAX_BLOCK_ROWS, math.ceil(n_rows / _MIN_BLOCKS)))
        return np.append(np.arange(0, total, block_rows, dtype=np.int64), np.int64(total))

    def _describe_groups(self, n_picked: int, sizes: np.ndarray, seed: int, rows: int) -> str:
        return (
            f"{n_picked:,} blocks of {int(sizes[0]):,} consecutive rows picked at random from "
            f"{int(sizes.sum()):,} CSV rows (seed {seed}), {rows:,} rows"
        )

    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        return self._read_positions(columns, block_positions(blocks, offsets))

    def _read_positions(self, columns: list[str], positions: np.ndarray) -> pl.DataFrame:
        if positions.size == 0:
            return self._empty(columns)
        # Per file, one pass that stops after its last wanted row (polars pushes the slice
        # into the reader); files before the first wanted row and after the last are skipped.
        starts = self._starts
        owners = np.searchsorted(starts, positions, side="right") - 1
        frames = []
        for k in np.unique(owners):
            wanted = positions[owners == k]
            file, start = self._files[k], starts[k]
            query = (
                numbered(self._scan(file), start)
                .slice(0, int(wanted[-1]) - start + 1)
                .filter(pl.col(ROW_INDEX).is_in(pl.Series(wanted).implode()))
                .select(ROW_INDEX, *columns)
            )
            with reading(file, self._kind):
                frames.append(query.collect())
        return self._concat(frames, columns)
