"""Parquet sources: one file (read with pyarrow) and many files (a folder or a glob)."""

from __future__ import annotations

import dataclasses
import functools
import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Final
from urllib.parse import unquote

import numpy as np
import polars as pl
import pyarrow.parquet as pq

from triage.core.design import ROW_INDEX
from triage.core.filter import filter_columns
from triage.data.base import (
    BlockSource,
    FilePart,
    arrow_schema_types,
    block_positions,
    collect_batches,
    conform,
    group_runs,
    number_record_batches,
    offsets_from_sizes,
    part_fields,
    reading,
    with_positions,
)
from triage.data.remote import FileName, file_name, open_input
from triage.data.snapshot import FileStamp
from triage.wording import counted

PART_ROWS: Final = 500_000
"""Rows, at least, in a part of a split scan (`scan_parts`): whole row groups, so each part
folds in one thread while others read theirs."""

SAMPLE_BATCH_ROWS: Final = 131_072
"""Most rows decoded at a time while a sample's row groups are thinned (`_read_block_rows`)."""

HIVE_NULL: Final = "__HIVE_DEFAULT_PARTITION__"
"""A partition folder's value that stands for a missing value (as polars reads it)."""

READ_BUFFER_BYTES: Final = 1 << 20
"""Bytes pyarrow reads at a time from a column chunk.

Unbuffered, it reads each column chunk whole into fresh memory. Decoding 20 million rows
of 9 float64 columns measured 1.55 s, 2.4 CPU-s and 309 MiB peak that way, and 0.76-0.93 s,
1.4-1.6 CPU-s and 217-221 MiB with 1 MiB pieces; of 31 columns, 3.8 s and 560 MiB against
2.7-3.3 s and 286-292 MiB. 256 KiB, 4 MiB and 16 MiB pieces were slower.
"""


def even_batch_rows(group_rows: int, batch_rows: int) -> int:
    """Rows per batch that split a row group into equal batches of at most `batch_rows`.

    pyarrow decodes a row group in equal batches for less: 20 million rows of 9 columns in
    row groups of 1,000,000 took 0.65-0.73 user CPU-s in batches of 250,000 and 0.97-1.15
    in batches of 262,144 (measured here, three runs each).
    """
    n_batches = -(-group_rows // max(batch_rows, 1))
    return max(1, -(-group_rows // max(n_batches, 1)))


def open_parquet(path: FileName, **options: object) -> pq.ParquetFile:
    """Open a Parquet file (a local path or a URL) for reading in bounded memory.

    `pre_buffer=False`: the default buffered about the whole file (4.7 GB measured);
    `buffer_size`: read column chunks in pieces instead of whole (see `READ_BUFFER_BYTES`).
    A URL is opened through fsspec; pyarrow asks it for the byte ranges it reads.
    """
    source = os.fspath(path) if isinstance(path, Path) else open_input(path)
    return pq.ParquetFile(source, pre_buffer=False, buffer_size=READ_BUFFER_BYTES, **options)


@dataclass(frozen=True, eq=False, kw_only=True)
class ParquetPart(FilePart):
    """A run of whole row groups of one Parquet file (see `FilePart`)."""

    kind = "Parquet"
    groups: tuple[int, int]
    """Row groups ``[first, stop)`` of the file."""
    sizes: tuple[int, ...]
    """Rows of each of those row groups."""
    constants: tuple[tuple[str, str | None], ...] = ()
    """Columns taken from the file's partition folders (``key=value``), with their values."""
    text_as_categorical: bool = True
    """Read text columns as polars Categorical (see `_frames`); False: as the schema's text."""

    @property
    def rows(self) -> int:
        """Rows the part reads, before filtering."""
        return sum(self.sizes)

    def _frames(self) -> Iterator[pl.DataFrame]:
        # One thread per part: pyarrow's own threads cost 1.4-1.6 CPU-s against 1.3 alone
        # for 20 million rows of 9 columns (measured here), and the parts keep both cores busy.
        path = self.file
        constant = dict(self.constants)
        in_file = [c for c in self.columns if c not in constant]
        values = partition_frame([c for c in self.constants if c[0] in self.columns], self.schema)
        literals = [
            pl.lit(values[name][0], dtype=values[name].dtype).alias(name) for name in values.columns
        ]
        # Text read dictionary-encoded stays a polars Categorical: decoding and coding its
        # levels skip the strings (2M rows of three code columns: 0.23 -> 0.15 CPU-s to
        # decode). The filter's columns stay text, for its text functions.
        filtered = () if self.where is None else filter_columns(self.where)
        coded = [
            c
            for c in in_file
            if self.text_as_categorical and self.schema[c] == pl.String and c not in filtered
        ]
        with reading(path, "Parquet"):
            reader = open_parquet(path, read_dictionary=coded)
        start = self.start
        for group, size in zip(range(*self.groups), self.sizes, strict=True):
            with reading(path, "Parquet"):
                record_batches = reader.iter_batches(
                    batch_size=even_batch_rows(size, self.batch_rows),
                    row_groups=[group],
                    columns=in_file,
                    use_threads=False,
                )
                for frame in number_record_batches(
                    record_batches, self.schema, start=start, coded=coded
                ):
                    if literals:
                        frame = frame.with_columns(literals).select(ROW_INDEX, *self.columns)
                    yield frame
            start += size


def file_parts(
    path: FileName,
    sizes: Sequence[int],
    start: int,
    columns: list[str],
    schema: dict[str, pl.DataType],
    *,
    where: pl.Expr | None,
    extra: list[str],
    batch_rows: int,
    part_rows: int | None,
    constants: tuple[tuple[str, str | None], ...] = (),
    stamp: FileStamp | None = None,
) -> list[ParquetPart]:
    """Cut one file of row groups of `sizes` rows, its first row at `start`, into parts.

    Each part holds `part_rows` rows or more (`PART_ROWS` when not given), the last maybe fewer.
    """
    offsets = offsets_from_sizes(sizes) + start
    fields = part_fields(
        path, columns, schema, where=where, extra=extra, batch_rows=batch_rows, stamp=stamp
    )
    return [
        ParquetPart(
            groups=(first, stop),
            sizes=tuple(int(n) for n in sizes[first:stop]),
            start=int(offsets[first]),
            constants=constants,
            **fields,
        )
        for first, stop in group_runs(sizes, PART_ROWS if part_rows is None else part_rows)
    ]


def partition_frame(
    constants: Sequence[tuple[str, str | None]], types: dict[str, pl.DataType] | None = None
) -> pl.DataFrame:
    """Parse partition folders' text values as polars reads a text column: one row per value.

    With `types`, each column is read as that type; without, its type is inferred (booleans,
    integers, floats, dates, else text), as polars types the values of hive folders.
    """
    names = list(dict.fromkeys(name for name, _ in constants))
    if not names:
        return pl.DataFrame()
    columns: dict[str, list[str | None]] = {name: [] for name in names}
    for name, value in constants:
        columns[name].append(value)
    text = pl.DataFrame(columns, schema=dict.fromkeys(names, pl.String)).write_csv()
    if types is None:
        return pl.read_csv(text.encode(), infer_schema_length=None, try_parse_dates=True)
    return pl.read_csv(text.encode(), schema_overrides={name: types[name] for name in names})


def partition_values(file: FileName, base: FileName) -> tuple[tuple[str, str | None], ...]:
    """Return the ``key=value`` folders between `base` and `file` (URL-decoded, as polars does).

    Both are paths, or both URLs (`file` then starts with `base`).
    """
    if isinstance(file, str):
        folders: tuple[str, ...] = tuple(file[len(str(base)) :].strip("/").split("/")[:-1])
    else:
        folders = file.resolve().relative_to(Path(base).resolve()).parts[:-1]
    pairs = (unquote(folder).split("=", 1) for folder in folders if "=" in folder)
    return tuple((key, None if value == HIVE_NULL else value) for key, value in pairs)


class ParquetFileSource(BlockSource):
    """One Parquet file; batches and blocks come from pyarrow, one row group at a time.

    Parameters
    ----------
    path : Path
        An existing Parquet file. Its footer is read here, so a damaged file fails at once.

    Raises
    ------
    SourceError
        If the footer cannot be read.
    """

    _kind = "Parquet"
    _block_unit = "row groups"

    def __init__(self, path: FileName) -> None:
        super().__init__(path)
        with reading(path, self._kind):
            self._metadata = open_parquet(path).metadata
        sizes = [self._metadata.row_group(i).num_rows for i in range(self._metadata.num_row_groups)]
        self._offsets = offsets_from_sizes(sizes)
        self.schema()  # fail now, not in the middle of a pass, if polars cannot type it

    @property
    def description(self) -> str:
        """One line naming the file and its row groups."""
        n_groups = len(self._offsets) - 1
        return f"{file_name(self._path)}: Parquet, 1 file, {counted(n_groups, 'row group')}"

    def _read_schema(self) -> dict[str, pl.DataType]:
        if isinstance(self._path, str):  # a URL: polars' types of pyarrow's schema
            return arrow_schema_types(self._metadata.schema.to_arrow_schema())
        return dict(pl.scan_parquet(self._path).collect_schema())

    def _open(self, **options: object) -> pq.ParquetFile:
        # A fresh reader per operation: a read-ahead thread and a drill-down can overlap.
        # The footer read at opening is reused, so the file must still be the one it describes.
        self.snapshot.check_file(self._path)
        return open_parquet(self._path, metadata=self._metadata, **options)

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        schema = self.schema()
        with reading(self._path, self._kind):
            record_batches = self._open().iter_batches(batch_size=batch_rows, columns=columns)
            yield from number_record_batches(record_batches, schema)

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> list[ParquetPart]:
        sizes = np.diff(self._offsets).tolist()
        return file_parts(
            self._path, sizes, int(self._offsets[0]), columns, self.schema(),
            where=where, extra=extra, batch_rows=batch_rows, part_rows=part_rows,
            stamp=self.snapshot.stamp(self._path),
        )  # fmt: skip

    def _block_offsets(self, n_rows: int | None) -> np.ndarray:
        return self._offsets

    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        with reading(self._path, self._kind):
            table = self._open().read_row_groups([int(b) for b in blocks], columns=columns)
        frame = conform(pl.DataFrame(table), self.schema())
        return with_positions(frame, block_positions(blocks, offsets))

    def _read_block_rows(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray, rows: np.ndarray
    ) -> pl.DataFrame:
        """Read the `rows` of the `blocks` batch by batch, keeping only those rows.

        Text is read dictionary-encoded and made text once thinned. A learning sample's
        200,000 rows of one 1,000,000-row group (6 numbers, 3 text codes) took 0.12-0.13
        CPU-s so, against 0.15-0.16 reading the group whole (measured here), and the group
        is never held whole.
        """
        schema = self.schema()
        text = [c for c in columns if schema[c] == pl.String]
        frames: list[pl.DataFrame] = []
        seen = 0
        with reading(self._path, self._kind):
            reader = self._open(read_dictionary=text)
            for block in blocks:
                size = int(offsets[block + 1] - offsets[block])
                record_batches = reader.iter_batches(
                    batch_size=even_batch_rows(size, SAMPLE_BATCH_ROWS),
                    row_groups=[int(block)],
                    columns=columns,
                    use_threads=False,
                )
                start = int(offsets[block])
                for frame in number_record_batches(record_batches, schema, start=start, coded=text):
                    first, stop = np.searchsorted(rows, [seen, seen + frame.height])
                    frames.append(frame[rows[first:stop] - seen])
                    seen += frame.height
        return conform(self._concat(frames, columns), schema)


class ParquetDatasetSource(BlockSource):
    """Many Parquet files read as one table, rows numbered across files in sorted order.

    Hive-style folder names below `base` (``year=2024/region=north/``) become columns.

    Parameters
    ----------
    path : Path or str
        The folder or glob the user gave (a URL: see `ParquetUrlDatasetSource`).
    files : list of Path or str
        The files, already sorted.
    base : Path or str
        The folder partition names are read below (the folder, or a glob's fixed part).
    """

    _kind = "Parquet"
    _block_unit = "row groups"

    def __init__(self, path: FileName, files: Sequence[FileName], base: FileName) -> None:
        self._files = tuple(files)
        self._base = base
        super().__init__(path)
        self.schema()

    @property
    def files(self) -> tuple[FileName, ...]:
        """The files read, in the order their rows are numbered."""
        return self._files

    @property
    def description(self) -> str:
        """One line naming the folder or glob, its files, row groups and partition columns."""
        offsets = self._offsets
        groups = counted(len(offsets) - 1, "row group")
        text = f"{self._path}: Parquet, {counted(len(self._files), 'file')}, {groups}"
        with reading(self._files[0], self._kind):
            in_file = set(open_parquet(self._files[0]).schema_arrow.names)
        partitions = [name for name in self.schema() if name not in in_file]
        if partitions:
            text += f", partitioned by {', '.join(partitions)}"
        return text

    def _lazy(self) -> pl.LazyFrame:
        frame = pl.scan_parquet([str(f) for f in self._files], hive_partitioning=True)
        # Polars reads `key=value` folder names along the whole path; drop those above `base`.
        base = Path(self._base).resolve()  # local files only: a URL's are read otherwise
        above = [part.split("=", 1)[0] for part in base.parts if "=" in part]
        names = frame.collect_schema().names()
        return frame.drop([key for key in above if key in names])

    def _read_schema(self) -> dict[str, pl.DataType]:
        return dict(self._lazy().collect_schema())

    @functools.cached_property
    def _footer_rows(self) -> list[list[int]]:
        """Rows of each row group of each file, from the footers."""
        rows: list[list[int]] = []
        for file in self._files:
            with reading(file, self._kind):
                metadata = open_parquet(file).metadata
            rows.append([metadata.row_group(i).num_rows for i in range(metadata.num_row_groups)])
        return rows

    @functools.cached_property
    def _offsets(self) -> np.ndarray:
        return offsets_from_sizes([n for groups in self._footer_rows for n in groups])

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> list[ParquetPart]:
        """One part per file at least, each knowing its offset in the source."""
        parts: list[ParquetPart] = []
        start = 0
        for file, sizes in zip(self._files, self._footer_rows, strict=True):
            parts += file_parts(
                file, sizes, start, columns, self.schema(),
                where=where, extra=extra, batch_rows=batch_rows, part_rows=part_rows,
                constants=partition_values(file, self._base),
                stamp=self.snapshot.stamp(file),
            )  # fmt: skip
            start += sum(sizes)
        return parts

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        query = (
            self._lazy()
            .with_row_index(ROW_INDEX)
            .select(pl.col(ROW_INDEX).cast(pl.Int64), *columns)
        )
        # Each file is checked against the snapshot as the scan reaches its rows.
        file_starts = offsets_from_sizes([sum(groups) for groups in self._footer_rows])[:-1]
        n_checked = 0
        with reading(self._path, self._kind):
            for frame in collect_batches(query, batch_rows=batch_rows):
                if frame.height:
                    last = int(frame[ROW_INDEX][-1])
                    n_reached = int(np.searchsorted(file_starts, last, side="right"))
                    self.snapshot.check_files(self._files[n_checked:n_reached])
                    n_checked = max(n_checked, n_reached)
                yield frame

    def _block_offsets(self, n_rows: int | None) -> np.ndarray:
        return self._offsets

    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        # One slice per run of consecutive blocks; polars skips the row groups before it.
        runs = np.split(blocks, np.flatnonzero(np.diff(blocks) != 1) + 1) if blocks.size else []
        frames = []
        lazy = self._lazy().select(columns)
        for run in runs:
            start, stop = int(offsets[run[0]]), int(offsets[run[-1] + 1])
            with reading(self._path, self._kind):
                frame = lazy.slice(start, stop - start).collect()
            frames.append(with_positions(frame, np.arange(start, stop, dtype=np.int64)))
        return self._concat(frames, columns)


class ParquetUrlDatasetSource(ParquetDatasetSource):
    """Many Parquet files named by URLs (a folder or a glob in a store), read through fsspec.

    Read as `ParquetDatasetSource` reads local files, with pyarrow in place of polars' own
    reader: every read goes through the files' parts (`ParquetPart`), which open a URL
    through fsspec. Partition columns are typed as polars types them (its inference of
    text values: booleans, integers, floats, dates, else text).
    """

    def _read_schema(self) -> dict[str, pl.DataType]:
        with reading(self._files[0], self._kind):
            schema = arrow_schema_types(open_parquet(self._files[0]).schema_arrow)
        constants = [pair for file in self._files for pair in partition_values(file, self._base)]
        return {**schema, **partition_frame(constants).schema}

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        for part in self._parts(columns, None, [], batch_rows, None):
            self.snapshot.check_file(part.file)
            yield from dataclasses.replace(part, text_as_categorical=False)._frames()

    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        # A part of each row group (blocks are the row groups of every file, in order).
        parts = self._parts(columns, None, [], 1 << 62, 1)
        frames = [
            frame
            for block in blocks
            for frame in dataclasses.replace(parts[int(block)], text_as_categorical=False)._frames()
        ]
        return self._concat(frames, columns)
