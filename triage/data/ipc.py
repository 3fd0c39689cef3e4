"""Arrow IPC (Feather v2) file sources, read one record batch at a time with pyarrow."""

from __future__ import annotations

import functools
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.ipc as ipc

from triage.data.base import (
    BlockSource,
    block_positions,
    conform,
    number_record_batches,
    offsets_from_sizes,
    reading,
    with_positions,
)


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

    _kind = "Arrow IPC"
    _block_unit = "record batches"

    def __init__(self, path: Path) -> None:
        super().__init__(path)
        with reading(path, self._kind), pa.OSFile(str(path), "rb") as file:
            ipc.open_file(file)  # reads the footer: a damaged file fails here
        self.schema()

    @property
    def description(self) -> str:
        """One line naming the file and its record batches."""
        return f"{self._path.name}: Arrow IPC, {len(self._offsets) - 1:,} record batches"

    def _read_schema(self) -> dict[str, pl.DataType]:
        return dict(pl.scan_ipc(self._path).collect_schema())

    def _batches(self, blocks: list[int] | None, columns: list[str]) -> Iterator[pa.RecordBatch]:
        # pa.OSFile rather than a memory map: the batches own their memory, so frames built
        # from them stay valid after the file is closed.
        self.snapshot.check_file(self._path)
        with reading(self._path, self._kind), pa.OSFile(str(self._path), "rb") as file:
            reader = ipc.open_file(file)
            for i in range(reader.num_record_batches) if blocks is None else blocks:
                yield reader.get_batch(i).select(columns)

    @functools.cached_property
    def _offsets(self) -> np.ndarray:
        return offsets_from_sizes([batch.num_rows for batch in self._batches(None, [])])

    def _scan_raw(self, columns: list[str], batch_rows: int) -> Iterator[pl.DataFrame]:
        pieces = (
            record_batch.slice(offset, batch_rows)
            for record_batch in self._batches(None, columns)
            for offset in range(0, record_batch.num_rows, batch_rows)
        )
        yield from number_record_batches(pieces, self.schema())

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
