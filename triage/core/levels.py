"""Levels of categorical columns: counted over rows, in natural order, with one reference rule.

`LevelCounter` counts the rows of each level of some columns, batch by batch, and merges
with another counter in any order (a full pass counts every row this way before it builds
a design; a sample fit counts its sample). `LevelTable` holds one column's levels in
natural order (numbers numerically, booleans false before true, dates by date, text by its
sort order) with their row counts, and applies the reference rule: the level with the most
rows, ties going to the first in natural order, unless the user names one. The result
depends only on which rows are counted, never on storage, batch order or threads.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping, Sequence

    from numpy.typing import NDArray

    from triage.core.spec import SchemaLike

_COUNT = "__n"


def level_text(column: str) -> pl.Expr:
    """Read a column's values as level names (text; booleans read `true`/`false`)."""
    return pl.col(column).cast(pl.String)


def level_code(column: str, dtype: pl.DataType | type[pl.DataType], levels: pl.Enum) -> pl.Expr:
    """Each row's position among `levels` (null when missing or not among them).

    A text column is cast as it is: read dictionary-encoded it is a Categorical, and
    casting it to text first would decode every row.
    """
    source = pl.col(column) if dtype in (pl.String, pl.Categorical) else level_text(column)
    return source.cast(levels, strict=False).to_physical()


def present_value(column: str, dtype: pl.DataType | type[pl.DataType]) -> pl.Expr:
    """Mark usable values: not null and, for a float or decimal, finite."""
    if dtype.is_float() or dtype.is_decimal():
        return pl.col(column).cast(pl.Float64).is_finite().fill_null(value=False)
    return pl.col(column).is_not_null()


ID_TABLE_CELLS: Final = 65_536
"""Most cells of a look-up table from a batch's category ids to codes, unless the batch has
more than a quarter as many distinct ids (ids spread further apart are matched by sorting)."""


def category_codes(
    column: pl.Series,
    codes_of: Callable[[list[str]], Sequence[int]],
    add_new: Callable[[list[str]], Sequence[int]] | None = None,
) -> tuple[NDArray[np.int64], NDArray[np.bool_]]:
    """Code each row of a Categorical `column` through its physical ids.

    `codes_of` gets the batch's distinct texts, in no particular order, and returns one code
    each (-1 for a text it does not know); `add_new`, when given, gets the texts `codes_of`
    did not know, in order of first appearance, and returns their codes. A row gets its
    text's code, or -1 when it has no value. Only the distinct ids are looked at as text.
    polars numbers its categories anew once no data holds them, so an id names the same
    text only within one batch: the table is made per batch.

    Returns
    -------
    codes : ndarray of int64
    present : ndarray of bool
        The rows with a value.
    """
    physical = column.to_physical()
    n_nulls = physical.null_count()
    present = physical.is_not_null().to_numpy() if n_nulls else np.ones(len(column), np.bool_)
    row_ids = (physical.fill_null(0) if n_nulls else physical).to_numpy()
    if n_nulls == len(column):
        return np.full(len(column), -1, dtype=np.int64), present
    high = int(row_ids.max())
    if high < ID_TABLE_CELLS:
        # distinct ids by counting, their texts from the ids: a hashing `unique` cost
        # twice as much (measured here); rows are ordered only in a batch with new texts
        seen = np.bincount(row_ids)
        seen[0] -= n_nulls
        ids = np.flatnonzero(seen)
        met = pl.Series(ids).cast(physical.dtype).cat.to(column.dtype, strict=False)
    else:  # ids far apart (a process that coded many texts)
        met = (column.drop_nulls() if n_nulls else column).unique(maintain_order=True)
        ids = met.to_physical().to_numpy()
    names = met.cast(pl.String).to_list()
    targets = np.asarray(codes_of(names), dtype=np.int64)
    if add_new is not None and (targets < 0).any():
        unknown = {name for name, target in zip(names, targets, strict=True) if target < 0}
        in_order = column.drop_nulls().unique(maintain_order=True).cast(pl.String).to_list()
        new = [name for name in in_order if name in unknown]
        added = dict(zip(new, add_new(new), strict=True))
        targets = np.array([added.get(name, t) for name, t in zip(names, targets, strict=True)])
    if high < max(ID_TABLE_CELLS, 4 * ids.size):
        table = np.full(high + 1, -1, dtype=np.int64)
        table[ids] = targets
        codes = np.take(table, row_ids)
    else:
        order = np.argsort(ids)
        codes = targets[order][np.searchsorted(ids[order], row_ids)]
    if n_nulls:
        codes[~present] = -1
    return codes, present


def positions_in(index: Mapping[str, int], names: list[str]) -> list[int]:
    """Return each name's position in `index`, -1 for a name not in it."""
    return [index.get(name, -1) for name in names]


def _sortable(column: str, dtype: pl.DataType | type[pl.DataType]) -> pl.Expr:
    """Sort key of a column in natural order: Categorical by its text, anything else as it is."""
    if dtype == pl.Categorical:
        return pl.col(column).cast(pl.String)
    return pl.col(column)


@dataclass(frozen=True)
class LevelTable:
    """One categorical column's levels in natural order, with the rows counted for each.

    Attributes
    ----------
    column : str
        The source column.
    levels : tuple of str
        Level names (the values as text), in natural order.
    counts : tuple of int
        Rows counted for each level.
    is_partial : bool, default=False
        True when counting stopped past the counter's cap: the column has more levels
        than these, and the counts are those of the rows read until then.
    """

    column: str
    levels: tuple[str, ...]
    counts: tuple[int, ...]
    is_partial: bool = False

    @property
    def n_rows(self) -> int:
        """Rows counted over every level."""
        return sum(self.counts)

    def most_frequent(self) -> str:
        """Return the level with the most rows; a tie goes to the one first in natural order."""
        best = max(range(len(self.levels)), key=lambda i: (self.counts[i], -i))
        return self.levels[best]


class LevelCounter:
    """Counts the rows of each level of some columns; mergeable in any order.

    Only rows with a usable value (not null, finite for floats) are counted.

    Parameters
    ----------
    schema : mapping of str to polars data type
        Types of the columns to count (they decide the natural order).
    columns : sequence of str
        The categorical columns.
    cap : int or None, default=None
        Stop counting a column once it has more levels than this (a column past the cap
        is refused anyway, and a million distinct values would cost memory to count).
    """

    def __init__(
        self, schema: SchemaLike, columns: Sequence[str], *, cap: int | None = None
    ) -> None:
        self._dtypes = {c: schema[c] for c in columns}
        self._tables: dict[str, pl.DataFrame | None] = dict.fromkeys(columns)
        self._cap = cap

    def _is_full(self, column: str) -> bool:
        table = self._tables[column]
        return self._cap is not None and table is not None and table.height > self._cap

    def update(self, frame: pl.DataFrame) -> None:
        """Count the levels of one batch."""
        for column, dtype in self._dtypes.items():
            if self._is_full(column):
                continue
            counted = (
                frame.lazy()
                .filter(present_value(column, dtype))
                .group_by(_sortable(column, dtype).alias(column))
                .agg(pl.len().cast(pl.Int64).alias(_COUNT))
                .collect()
            )
            self._tables[column] = _add(self._tables[column], counted, column)

    def merge(self, other: LevelCounter) -> LevelCounter:
        """Add another counter's counts into this one; return this one."""
        for column, table in other._tables.items():
            if table is not None and not self._is_full(column):
                self._tables[column] = _add(self._tables[column], table, column)
        return self

    def finalize(self) -> dict[str, LevelTable]:
        """Each column's levels in natural order with their row counts."""
        result: dict[str, LevelTable] = {}
        for column, table in self._tables.items():
            if table is None:
                result[column] = LevelTable(column, (), ())
                continue
            ordered = table.sort(column, nulls_last=True)
            names = ordered.select(level_text(column)).to_series().to_list()
            counts = ordered.get_column(_COUNT).to_list()
            result[column] = LevelTable(
                column, tuple(names), tuple(int(n) for n in counts), self._is_full(column)
            )
        return result


def _add(total: pl.DataFrame | None, more: pl.DataFrame, column: str) -> pl.DataFrame:
    if total is None:
        return more
    return pl.concat([total, more]).group_by(column).agg(pl.col(_COUNT).sum())


def count_levels(
    schema: SchemaLike, columns: Sequence[str], frame: pl.DataFrame
) -> Mapping[str, LevelTable]:
    """Count the levels of `columns` in one in-memory frame (a sample)."""
    counter = LevelCounter(schema, columns)
    counter.update(frame)
    return counter.finalize()


class FoundLevels:
    """One categorical column's levels in the order a pass met them, with the rows of each.

    A full pass codes each batch against the levels found so far (`code`) and adds the levels
    it meets for the first time (`add_new`); parts of a pass join with `absorb`, and
    `table` puts the levels in natural order at the end, as `LevelCounter` would have
    counted them. The rows counted are those with a usable value in the column.

    Parameters
    ----------
    column : str
        The categorical column.
    dtype : polars data type
        Its type (it decides the natural order and which values are usable).
    """

    def __init__(self, column: str, dtype: pl.DataType | type[pl.DataType]) -> None:
        self.column = column
        self.dtype = dtype
        self.names: list[str] = []
        self.counts = np.zeros(0, dtype=np.int64)
        self._values = pl.Series(column, [], dtype=pl.String if dtype == pl.Categorical else dtype)
        self._index: dict[str, int] = {}
        self._code: pl.Expr | None = None

    def __len__(self) -> int:
        return len(self.names)

    def present(self) -> pl.Expr:
        """Mark the rows with a usable value in the column."""
        return present_value(self.column, self.dtype)

    def code(self) -> pl.Expr:
        """Each row's level among those found so far (0, 1, ...), or -1 (missing or new)."""
        if self._code is None:
            self._code = (
                level_code(self.column, self.dtype, pl.Enum(self.names))
                .cast(pl.Int64)
                .fill_null(-1)
            )
        return self._code

    def find(self, frame: pl.DataFrame) -> tuple[NDArray[np.int64], NDArray[np.bool_]]:
        """Code each row of `frame` among the levels, adding the new ones in row order.

        Returns each row's code (-1 where the row has no usable value) and whether it has
        one. Text read dictionary-encoded (a polars Categorical) is coded through its ids
        (`category_codes`): 2,000,000 rows of three code columns cost about 0.06 CPU-s so,
        against 0.16 casting every row to the levels found (measured here).
        """
        column = frame.get_column(self.column)
        if column.dtype == pl.Categorical and self._values.dtype == pl.String:
            return category_codes(column, self._index_of, self._codes_adding_new)
        selected = frame.select(self.code(), self.present().alias("__present")).get_columns()
        codes, present = selected[0].to_numpy(), selected[1].to_numpy()
        new = present & (codes < 0)
        if new.any():
            codes = codes.copy()
            codes[new] = self.add_new(frame, new)
        return codes, present

    def _index_of(self, names: list[str]) -> list[int]:
        """Return the code of each of `names`, -1 for one not found yet."""
        return positions_in(self._index, names)

    def _codes_adding_new(self, names: list[str]) -> list[int]:
        """Add `names` (distinct texts not found yet), in order; return their codes."""
        self._append(pl.Series(self.column, names, dtype=pl.String))
        return [self._index[name] for name in names]

    def add_new(self, frame: pl.DataFrame, rows: NDArray[np.bool_]) -> NDArray[np.int64]:
        """Add the levels of `frame`'s marked `rows` (present, not found yet), in row order.

        Returns the codes of those rows (the new levels come last), so the rest of the
        frame need not be coded again.
        """
        picked = frame.select(pl.col(self.column).cast(self._values.dtype)).filter(pl.Series(rows))
        new = picked.select(
            _sortable(self.column, self.dtype).unique(maintain_order=True).alias(self.column)
        ).to_series()
        first = len(self.names)
        self._append(new)
        enum = pl.Enum(self.names[first:])
        codes = picked.select(level_text(self.column).cast(enum).to_physical().cast(pl.Int64))
        return codes.to_series().to_numpy() + first

    def _append(self, values: pl.Series) -> None:
        names = values.to_frame().select(level_text(self.column)).to_series().to_list()
        for name in names:
            self._index[name] = len(self.names)
            self.names.append(name)
        self._values = pl.concat([self._values, values])
        self.counts = np.concatenate([self.counts, np.zeros(len(names), dtype=np.int64)])
        self._code = None

    def count(self, codes: NDArray[np.int64]) -> None:
        """Add one row to the level of each code (all found, none missing)."""
        self.counts += np.bincount(codes, minlength=len(self.names))

    def absorb(self, other: FoundLevels) -> NDArray[np.intp]:
        """Add another part's levels and counts; return where each of its levels is here."""
        new = [k for k, name in enumerate(other.names) if name not in self._index]
        if new:
            self._append(other._values.gather(new))
        where = np.array([self._index[name] for name in other.names], dtype=np.intp)
        self.counts[where] += other.counts
        return where

    def table(self, *, is_partial: bool = False) -> tuple[LevelTable, NDArray[np.intp]]:
        """Return the levels in natural order, and the natural position of each level as found."""
        order = (
            pl.DataFrame({self.column: self._values, _COUNT: np.arange(len(self.names))})
            .sort(self.column, nulls_last=True)
            .get_column(_COUNT)
            .to_numpy()
        )
        position = np.empty(len(order), dtype=np.intp)
        position[order] = np.arange(len(order))
        table = LevelTable(
            self.column,
            tuple(self.names[k] for k in order),
            tuple(int(self.counts[k]) for k in order),
            is_partial,
        )
        return table, position
