"""Arrow IPC (Feather v2) file sources, read one record batch at a time with pyarrow."""

from __future__ import annotations

import functools
import struct
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
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
        if columns:  # only these columns' buffers are read (a URL fetches only them)
            names = reader.schema.names
            fields = sorted(names.index(name) for name in columns)
            reader = ipc.open_file(file, options=ipc.IpcReadOptions(included_fields=fields))
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


_MAGIC: Final = b"ARROW1"
_BLOCK: Final = struct.Struct("<qi4xq")
"""A footer's `Block`: offset (int64), metadata length (int32, then padding), body length."""


def record_batch_rows(file: pa.NativeFile) -> list[int]:
    """Rows of each record batch of an Arrow IPC file, from its footer and message headers.

    Only the footer and each record batch's header (a few hundred bytes) are read, never
    the batches' data, so a remote file gives its row positions cheaply. The layout is the
    Arrow columnar format's (File.fbs, Message.fbs): the footer's `recordBatches` blocks
    point at messages whose `RecordBatch` header holds `length`, its rows.

    Raises
    ------
    ValueError
        When the file does not end as an Arrow IPC file does.
    """
    size = file.size()
    tail = file.read_at(10, size - 10) if size >= 10 else b""
    if tail[4:] != _MAGIC:
        msg = "not an Arrow IPC file (no `ARROW1` at its end)"
        raise ValueError(msg)
    footer_size = int.from_bytes(tail[:4], "little", signed=True)
    footer = file.read_at(footer_size, size - 10 - footer_size)
    blocks = _table_field(footer, _reference(footer, 0), 3)  # Footer.recordBatches
    if blocks is None:
        return []
    vector = _reference(footer, blocks)
    rows = []
    for k in range(int.from_bytes(footer[vector : vector + 4], "little")):
        offset, metadata_size, _ = _BLOCK.unpack_from(footer, vector + 4 + _BLOCK.size * k)
        metadata = file.read_at(metadata_size, offset)
        # an encapsulated message: 0xFFFFFFFF (since format 0.15), its size, the flatbuffer
        message = metadata[8:] if metadata[:4] == b"\xff\xff\xff\xff" else metadata[4:]
        header = _table_field(message, _reference(message, 0), 2)  # Message.header
        if header is None:
            msg = f"record batch {k} has no header"
            raise ValueError(msg)
        length = _table_field(message, _reference(message, header), 0)  # RecordBatch.length
        rows.append(0 if length is None else int.from_bytes(message[length : length + 8], "little"))
    return rows


def _reference(buffer: bytes, at: int) -> int:
    """Follow the flatbuffer offset stored at `at` (uint32, relative to `at`)."""
    return at + int.from_bytes(buffer[at : at + 4], "little")


def _table_field(buffer: bytes, table: int, index: int) -> int | None:
    """Return where field `index` of the flatbuffer table at `table` is, or None when unset."""
    vtable = table - int.from_bytes(buffer[table : table + 4], "little", signed=True)
    slot = 4 + 2 * index
    if slot >= int.from_bytes(buffer[vtable : vtable + 2], "little"):
        return None
    offset = int.from_bytes(buffer[vtable + slot : vtable + slot + 2], "little")
    return table + offset if offset else None


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
        self.snapshot.check_file(self._path)
        with reading(self._path, self._kind), open_input(self._path) as file:
            return offsets_from_sizes(record_batch_rows(file))

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
