"""Arrow IPC (Feather v2) file sources, read one record batch at a time with pyarrow."""

from __future__ import annotations

import functools
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.ipc as ipc

from triage.data.base import (
    BlockSource,
    FilePart,
    arrow_schema_types,
    block_positions,
    conform,
    group_runs,
    number_record_batches,
    offsets_from_sizes,
    part_fields,
    reading,
    with_positions,
)
from triage.data.remote import FileName, file_name, open_input

PART_ROWS: Final = 500_000
"""Rows, at least, in a part of a split scan: whole record batches (as for Parquet)."""

KIND: Final = "Arrow IPC"


def read_record_batches(
    path: FileName, batches: Iterable[int] | None, columns: Sequence[str]
) -> Iterator[pa.RecordBatch]:
    """Yield the record batches numbered `batches` (None: all) of the IPC file at `path`."""
    # pa.OSFile rather than a memory map: the batches own their memory, so frames built
    # from them stay valid after the file is closed.
    with reading(path, KIND), open_input(path) as file:
        reader = ipc.open_file(file)
        for i in range(reader.num_record_batches) if batches is None else batches:
            yield reader.get_batch(i).select(columns)


def number_pieces(
    record_batches: Iterable[pa.RecordBatch],
    schema: dict[str, pl.DataType],
    batch_rows: int,
    *,
    start: int = 0,
) -> Iterator[pl.DataFrame]:
    """Cut record batches into pieces of at most `batch_rows` rows, numbered from `start`."""
    pieces = (
        record_batch.slice(offset, batch_rows)
        for record_batch in record_batches
        for offset in range(0, record_batch.num_rows, batch_rows)
    )
    yield from number_record_batches(pieces, schema, start=start)


@dataclass(frozen=True, eq=False, kw_only=True)
class IpcPart(FilePart):
    """A run of whole record batches of one Arrow IPC file (see `FilePart`)."""

    kind = KIND
    batches: tuple[int, int]
    """Record batches ``[first, stop)`` of the file."""
    sizes: tuple[int, ...]
    """Rows of each of those record batches."""

    @property
    def rows(self) -> int:
        """Rows the part reads, before filtering."""
        return sum(self.sizes)

    def _frames(self) -> Iterator[pl.DataFrame]:
        record_batches = read_record_batches(self.file, range(*self.batches), self.columns)
        yield from number_pieces(record_batches, self.schema, self.batch_rows, start=self.start)


class IpcSource(BlockSource):
    """An Arrow IPC file; its record batches are the blocks.

    Parameters
    ----------
    path : Path
        An existing Arrow IPC file (``.arrow``, ``.feather``, ``.ipc``).

    Raises
    ------
    SourceError
        If the file footer cannot be read.
    """

    _kind = KIND
    _block_unit = "record batches"

    def __init__(self, path: FileName) -> None:
        super().__init__(path)
        with reading(path, self._kind), open_input(path) as file:
            self._arrow_schema = ipc.open_file(file).schema  # a damaged footer fails here
        self.schema()

    @property
    def description(self) -> str:
        """One line naming the file and its record batches."""
        return f"{file_name(self._path)}: Arrow IPC, {len(self._offsets) - 1:,} record batches"

    def _read_schema(self) -> dict[str, pl.DataType]:
        if isinstance(self._path, str):  # a URL: polars' types of pyarrow's schema
            return arrow_schema_types(self._arrow_schema)
        return dict(pl.scan_ipc(self._path).collect_schema())

    def _batches(self, blocks: list[int] | None, columns: list[str]) -> Iterator[pa.RecordBatch]:
        self.snapshot.check_file(self._path)
        yield from read_record_batches(self._path, blocks, columns)

    @functools.cached_property
    def _offsets(self) -> np.ndarray:
        # Mapped, a record batch's rows are read from its header without copying its data;
        # a URL's batches are fetched.
        self.snapshot.check_file(self._path)
        path = self._path
        with (
            reading(path, self._kind),
            pa.memory_map(str(path)) if isinstance(path, Path) else open_input(path) as file,
        ):
            reader = ipc.open_file(file)
            sizes = [reader.get_batch(i).num_rows for i in range(reader.num_record_batches)]
        return offsets_from_sizes(sizes)

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        yield from number_pieces(self._batches(None, columns), self.schema(), batch_rows)

    def _parts(
        self,
        columns: list[str],
        where: pl.Expr | None,
        extra: list[str],
        batch_rows: int,
        part_rows: int | None,
    ) -> list[IpcPart]:
        """Cut the file into runs of whole record batches, each knowing its first position."""
        offsets = self._offsets
        sizes = np.diff(offsets).tolist()
        fields = part_fields(
            self._path, columns, self.schema(), where=where, extra=extra,
            batch_rows=batch_rows, stamp=self.snapshot.stamp(self._path),
        )  # fmt: skip
        return [
            IpcPart(
                batches=(first, stop),
                sizes=tuple(int(n) for n in sizes[first:stop]),
                start=int(offsets[first]),
                **fields,
            )
            for first, stop in group_runs(sizes, PART_ROWS if part_rows is None else part_rows)
        ]

    def _block_offsets(self, n_rows: int | None) -> np.ndarray:
        return self._offsets

    def _read_blocks(
        self, columns: list[str], blocks: np.ndarray, offsets: np.ndarray
    ) -> pl.DataFrame:
        schema = self.schema()
        frames = [
            conform(pl.DataFrame(batch), schema)
            for batch in self._batches([int(b) for b in blocks], columns)
        ]
        frame = pl.concat(frames, how="vertical") if frames else pl.DataFrame()
        return with_positions(frame, block_positions(blocks, offsets))
