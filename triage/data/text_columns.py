"""Read a text column to tell numbers written as text (with a stray value) from real text."""

from __future__ import annotations

from typing import TYPE_CHECKING, Final

import polars as pl

from triage.core.spec import TextColumnFacts
from triage.data.source import ROW_INDEX

if TYPE_CHECKING:
    from triage.data.source import Source

_BATCH_ROWS: Final = 65_536
_NUMBER: Final = "__number"


def text_column_facts(source: Source, column: str) -> TextColumnFacts:
    """Count a text column's values and those that do not read as numbers.

    The first batch decides most columns: when under half of its values are numbers the
    column is plain text and the read stops there (its counts then cover that batch only);
    otherwise the whole column is read, so the message can say how many values are not
    numbers and where the first one is.

    Parameters
    ----------
    source : Source
        Where the column is.
    column : str
        A column of text.

    Returns
    -------
    TextColumnFacts
    """
    n_rows = n_values = n_bad = 0
    first_row: int | None = None
    first_text: str | None = None
    number = pl.col(column).str.strip_chars().cast(pl.Float64, strict=False)
    for batch in source.scan_batches([column], batch_rows=_BATCH_ROWS):
        frame = batch.frame.with_columns(number.alias(_NUMBER))
        bad = frame.filter(pl.col(column).is_not_null() & pl.col(_NUMBER).is_null())
        n_rows += frame.height
        n_values += frame.height - frame.get_column(column).null_count()
        n_bad += bad.height
        if first_row is None and bad.height:
            first_row = int(bad.get_column(ROW_INDEX)[0])
            first_text = str(bad.get_column(column)[0])
        if 2 * n_bad > n_values:
            break  # plain text: no need to read on
    return TextColumnFacts(column, n_rows, n_values, n_bad, first_row, first_text)
