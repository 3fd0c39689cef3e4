"""Delimited text sources (CSV, TSV, optionally gzip-compressed), read through polars."""

from __future__ import annotations

import functools
import math
from collections.abc import Iterator
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
    part_fields,
    reading,
)

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


def scan_delimited(path: Path, separator: str, options: CsvOptions) -> pl.LazyFrame:
    """Scan the delimited text file at `path` with `options`, typing columns as triage does."""
    return pl.scan_csv(
        path,
        separator=separator,
        has_header=options.has_header,
        quote_char=options.quote_char,
        null_values=list(options.null_values),
        encoding=options.encoding,  # type: ignore[arg-type]
        infer_schema_length=_INFER_ROWS,
    )


def numbered(frame: pl.LazyFrame, start: int = 0) -> pl.LazyFrame:
    """Put `ROW_INDEX` (int64 positions from `start`) in front of `frame`."""
    indexed = frame.with_row_index(ROW_INDEX, offset=start)
    return indexed.with_columns(pl.col(ROW_INDEX).cast(pl.Int64))


@dataclass(frozen=True, eq=False, kw_only=True)
class CsvPart(FilePart):
    """One whole delimited text file (see `FilePart`); its rows are known only once read.

    A file is not cut into byte ranges: a quoted field may hold a line break, so only a
    read from the file's start knows where a row begins.
    """

    kind = "CSV"
    separator: str
    options: CsvOptions

    @property
    def rows(self) -> None:
        """Unknown until the file is read."""
        return None

    def _frames(self) -> Iterator[pl.DataFrame]:
        path = Path(self.path)
        query = numbered(scan_delimited(path, self.separator, self.options), self.start)
        with reading(path, self.kind):
            yield from collect_batches(
                query.select(ROW_INDEX, *self.columns), batch_rows=self.batch_rows
            )


class CsvSource(BlockSource):
    """A delimited text file; the row count needs a scan, so blocks are cut at sampling time.

    Parameters
    ----------
    path : Path
        An existing file.
    options : CsvOptions
        Parsing options.

    Raises
    ------
    SourceError
        If the header and first rows cannot be parsed.
    """

    _kind = "CSV"
    _block_unit = "blocks of rows"

    def __init__(self, path: Path, options: CsvOptions) -> None:
        super().__init__(path)
        self._file = path
        self._options = options
        self._separator = _separator_for(path, options)
        self.schema()

    @property
    def description(self) -> str:
        """One line naming the file, its separator and the row-count cost."""
        shown = "tab" if self._separator == "\t" else f"`{self._separator}`"
        return f"{self._file.name}: CSV, separator {shown}, rows counted by a scan"

    def _lazy(self) -> pl.LazyFrame:
        self.snapshot.check_file(self._path)
        return scan_delimited(self._file, self._separator, self._options)

    def _read_schema(self) -> dict[str, pl.DataType]:
        return dict(self._lazy().collect_schema())

    def _indexed(self) -> pl.LazyFrame:
        return numbered(self._lazy())

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> list[CsvPart]:
        """Return the whole file as one part (a worker can read it where it sees it)."""
        fields = part_fields(
            self._path, columns, self.schema(), where=where, extra=extra,
            batch_rows=batch_rows, stamp=self.snapshot.stamp(self._path),
        )  # fmt: skip
        part = CsvPart(start=0, separator=self._separator, options=self._options, **fields)
        return [part]

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        query = self._indexed().select(ROW_INDEX, *columns)
        with reading(self._path, self._kind):
            yield from collect_batches(query, batch_rows=batch_rows)

    @functools.cached_property
    def _exact_count(self) -> int:
        with self._unchanged(self.files), reading(self._path, self._kind):
            return int(self._lazy().select(pl.len()).collect().item())

    def _count_by_scan(self) -> int:
        return self._exact_count

    def _block_offsets(self, n_rows: int | None) -> np.ndarray | None:
        if n_rows is None:
            return None
        total = self._exact_count
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
        # One pass that stops after the last wanted row (polars pushes the slice into the reader).
        query = (
            self._indexed()
            .slice(0, int(positions[-1]) + 1)
            .filter(pl.col(ROW_INDEX).is_in(pl.Series(positions).implode()))
            .select(ROW_INDEX, *columns)
        )
        with reading(self._path, self._kind):
            return query.collect()
