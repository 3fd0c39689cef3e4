"""Indicator terms: ``depot=north`` typed as a term, one 0/1 column of the design.

The column is 1 where `depot` holds `north`, 0 where it holds another level, and
missing where `depot` is missing (so the row is left out like any missing predictor).
The level is read in the column's type (`triage.core.spec.indicator_value`). Before a
design is built, `IndicatorRows` counts the rows holding each indicator's level (in the
sample; a full pass whose learning sample lacks a level counts every row, mergeable like
`LevelCounter`), so a level the column does not hold is refused by name instead of giving
a column of zeros.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Final

import polars as pl

from triage.core.levels import LevelCounter, present_value
from triage.core.spec import indicator_value
from triage.errors import SpecError

if TYPE_CHECKING:
    from collections.abc import Mapping, Sequence

    from triage.core.spec import ModelSpec, SchemaLike, Term

SHOWN_LEVELS: Final = 10
"""How many of a column's levels an error message lists."""


def indicator_parts(specs: Sequence[ModelSpec]) -> list[Term]:
    """List the indicator terms of some models, alone or inside an interaction, once each."""
    found: dict[str, Term] = {}
    for spec in specs:
        for term in spec.terms:
            for part in term.factors or (term,):
                if part.kind == "indicator":
                    found.setdefault(part.label, part)
    return list(found.values())


def indicator_match(term: Term, dtype: pl.DataType | type[pl.DataType]) -> pl.Expr:
    """Return the indicator's design column: 1.0 at its level, 0.0 elsewhere, NaN if missing.

    A null, NaN or infinite value of the column gives NaN, so the row is left out (and
    counted) as a row with a missing value, never read as "another level".
    """
    assert term.column is not None  # indicator terms have one
    return (
        pl.when(present_value(term.column, dtype))
        .then(holds_level(term, dtype).cast(pl.Float64))
        .otherwise(pl.lit(float("nan")))
    )


def holds_level(term: Term, dtype: pl.DataType | type[pl.DataType]) -> pl.Expr:
    """Return True where the indicator's column holds its level, null where it is missing."""
    column, level = term.column, term.level
    assert column is not None and level is not None  # indicator terms have both
    value, _ = indicator_value(column, dtype, level)
    values = pl.col(column).cast(pl.Float64) if dtype.is_decimal() else pl.col(column)
    return values == pl.lit(value)


@dataclass(frozen=True)
class IndicatorLevel:
    """What a read found for one indicator term.

    Attributes
    ----------
    term : Term
        The indicator.
    n_rows : int
        Rows holding the indicator's level.
    levels : tuple of str
        Some levels of the column in natural order (the first that were counted).
    more_levels : bool
        Whether the column has more levels than `levels`.
    """

    term: Term
    n_rows: int
    levels: tuple[str, ...]
    more_levels: bool


class IndicatorRows:
    """Counts the rows holding each indicator term's level; mergeable in any order.

    While some indicator has no row yet, it also keeps a few levels of each column
    (`LevelCounter` capped at `SHOWN_LEVELS`), for the message that refuses a level no row
    holds; once every indicator has a row, batches are only counted.

    Parameters
    ----------
    schema : mapping of str to polars data type
        The source's column types.
    terms : sequence of Term
        The indicator terms (`indicator_parts`).
    """

    def __init__(self, schema: SchemaLike, terms: Sequence[Term]) -> None:
        self._terms = tuple(terms)
        self._dtypes = tuple(schema[term.column or ""] for term in self._terms)
        self._rows = [0] * len(self._terms)
        columns = list(dict.fromkeys(term.column or "" for term in self._terms))
        self._levels = LevelCounter(schema, columns, cap=SHOWN_LEVELS)

    def update(self, frame: pl.DataFrame) -> None:
        """Count one batch."""
        if not self._terms:
            return
        found = frame.select(
            holds_level(term, dtype).sum().alias(f"__rows{k}")
            for k, (term, dtype) in enumerate(zip(self._terms, self._dtypes, strict=True))
        ).row(0)
        self._rows = [total + int(n) for total, n in zip(self._rows, found, strict=True)]
        if not all(self._rows):
            self._levels.update(frame)

    def merge(self, other: IndicatorRows) -> IndicatorRows:
        """Add another counter's counts into this one; return this one."""
        self._rows = [a + b for a, b in zip(self._rows, other._rows, strict=True)]
        if not all(self._rows):
            self._levels.merge(other._levels)
        return self

    def finalize(self) -> dict[str, IndicatorLevel]:
        """Return what was found for each indicator, by term label.

        The levels are complete only for an indicator that no row holds (the only one a
        message names them for).
        """
        tables = self._levels.finalize()
        found: dict[str, IndicatorLevel] = {}
        for term, n_rows in zip(self._terms, self._rows, strict=True):
            table = tables[term.column or ""]
            shown = table.levels[:SHOWN_LEVELS]
            more = table.is_partial or len(table.levels) > SHOWN_LEVELS
            found[term.label] = IndicatorLevel(term, n_rows, shown, more)
        return found


def count_indicator_rows(
    schema: SchemaLike, terms: Sequence[Term], frame: pl.DataFrame
) -> dict[str, IndicatorLevel]:
    """Count the rows holding each indicator's level in one in-memory frame (a sample)."""
    counter = IndicatorRows(schema, terms)
    counter.update(frame)
    return counter.finalize()


def check_indicator_levels(found: Mapping[str, IndicatorLevel], basis: str) -> None:
    """Refuse an indicator whose level no row holds, naming the column and some of its levels.

    Parameters
    ----------
    found : mapping of str to IndicatorLevel
        What `IndicatorRows` found, by term label.
    basis : str
        The rows counted, for the message: ``the sample`` or ``the rows read``.

    Raises
    ------
    SpecError
        For the first indicator whose level no counted row holds.
    """
    for held in found.values():
        if held.n_rows:
            continue
        column = held.term.column
        if not held.levels:
            listed = "it has no value there"
        else:
            more = " and more" if held.more_levels else ""
            listed = "its levels there: " + ", ".join(f"`{v}`" for v in held.levels) + more
        msg = (
            f"`{column}` has no level `{held.term.level}` in {basis} (the term "
            f"`{held.term.label}`); {listed}"
        )
        raise SpecError(msg)
