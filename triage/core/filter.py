"""Row filters typed by the user, read as SQL expressions by polars (never as Python)."""

from __future__ import annotations

import difflib
import re
from typing import TYPE_CHECKING

import polars as pl

from triage.errors import SpecError

if TYPE_CHECKING:
    from collections.abc import Iterable, Mapping

_MAX_SHOWN = 3
"""How many close column names a hint lists."""

_FORBIDDEN_WORDS = frozenset({"select"})
"""SQL keywords that start a subquery; polars 2.1 accepts `x IN (SELECT ...)` in an expression."""

_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def closest_names_hint(name: str, known: Iterable[str]) -> str:
    """Describe the known names closest to a misspelt one, for the end of an error message.

    Parameters
    ----------
    name : str
        The name the user typed.
    known : iterable of str
        The valid names (for example the columns of the source).

    Returns
    -------
    str
        ``"; closest: `a`, `b`"`` with up to three names ranked by `difflib`, or
        ``"; no similar column names"`` when none is close.

    Examples
    --------
    >>> closest_names_hint("dpeot", ["depot", "minutes"])
    '; closest: `depot`'
    """
    candidates = list(known)
    close = difflib.get_close_matches(name, candidates, n=_MAX_SHOWN)
    if not close:
        lowered = {c.lower(): c for c in candidates}
        close = [lowered[c] for c in difflib.get_close_matches(name.lower(), lowered, n=_MAX_SHOWN)]
    if not close:
        return "; no similar column names"
    return "; closest: " + ", ".join(f"`{c}`" for c in close)


def _check_text(text: str) -> None:
    """Reject what must never reach the SQL parser: `;` and subqueries outside quotes."""
    outside: list[str] = []
    quote: str | None = None
    for char in text:
        if quote is None:
            if char in "'\"":
                quote = char
                outside.append(" ")
            else:
                outside.append(char)
        elif char == quote:
            # a doubled quote ('' or "") closes and reopens, which is the same as staying inside
            quote = None
            outside.append(" ")
    bare = "".join(outside)
    if ";" in bare:
        msg = (
            f"`;` is not allowed in the filter `{text}`; give one condition, "
            "for example `depot = 'north' AND minutes > 0`"
        )
        raise SpecError(msg)
    words = {w.lower() for w in _WORD.findall(bare)}
    if words & _FORBIDDEN_WORDS:
        msg = (
            f"subqueries are not allowed in the filter `{text}`; "
            "compare columns with values, for example `depot IN ('north', 'south')`"
        )
        raise SpecError(msg)


def _parse_sql(text: str) -> pl.Expr:
    """Check the text and parse it with `pl.sql_expr`, wrapping polars errors."""
    if not text.strip():
        msg = "the filter is empty; give a condition such as `depot = 'north'`, or leave it out"
        raise SpecError(msg)
    _check_text(text)
    try:
        return pl.sql_expr(text)
    except pl.exceptions.PolarsError as exc:
        # The parser's own wording ("unable to parse ... as Expr") names its internals, not
        # what the user wrote wrong: say what a condition looks like instead.
        msg = (
            f"the filter `{text}` is not a complete condition; write one such as "
            "`minutes > 0 AND depot = 'north'` (text values in single quotes)"
        )
        raise SpecError(msg) from exc


def _kind_of(dtype: pl.DataType | type[pl.DataType]) -> str:
    """Name a column type as a user thinks of it: number, text, true/false or date/time."""
    if dtype.is_numeric():
        return "a number"
    if dtype == pl.Boolean:
        return "true/false"
    if dtype.is_temporal():
        return "a date or time"
    return "text"


def filter_columns(expr: pl.Expr | str) -> tuple[str, ...]:
    """List the columns a filter reads, in order of first use.

    Parameters
    ----------
    expr : polars.Expr or str
        A filter from `parse_filter`, or filter text (checked and parsed without a schema).

    Returns
    -------
    tuple of str
        Column names, without repeats.

    Raises
    ------
    SpecError
        If `expr` is text that is not a valid filter.
    """
    parsed = _parse_sql(expr) if isinstance(expr, str) else expr
    return tuple(dict.fromkeys(parsed.meta.root_names()))


def parse_filter(text: str, schema: Mapping[str, pl.DataType | type[pl.DataType]]) -> pl.Expr:
    """Read a row filter written as an SQL expression, checked against a schema.

    The text goes to `polars.sql_expr`, which parses SQL and never evaluates Python.
    Before that, `;` and subqueries outside quotes are rejected; after it, every column
    the filter reads must exist in `schema`, and the condition must give a boolean on an
    empty frame of that schema (this also surfaces most type errors without reading data).

    Parameters
    ----------
    text : str
        The condition, e.g. ``"depot = 'north' AND minutes > 0"``. In SQL, double quotes
        name a column and single quotes hold text.
    schema : mapping of str to polars data type
        The columns of the source.

    Returns
    -------
    polars.Expr
        A boolean expression to pass to `filter`.

    Raises
    ------
    SpecError
        If the text is empty, contains `;` or a subquery, does not parse, names an unknown
        column, or is not a boolean condition.

    See Also
    --------
    filter_columns : the columns a filter reads.
    """
    expr = _parse_sql(text)
    for name in filter_columns(expr):
        if name not in schema:
            msg = f"unknown column `{name}` in filter `{text}`{closest_names_hint(name, schema)}"
            if f'"{name}"' in text:
                msg += "; in SQL double quotes name a column, so put text values in single quotes"
            else:
                msg += f"; if `{name}` is a value, put it in single quotes: '{name}'"
            raise SpecError(msg)
    empty = pl.DataFrame(schema=dict(schema))
    try:
        dtype = empty.select(expr.alias("__keep")).schema["__keep"]
    except pl.exceptions.PolarsError as exc:
        kinds = ", ".join(f"`{name}` is {_kind_of(schema[name])}" for name in filter_columns(expr))
        msg = (
            f"the filter `{text}` compares values of different kinds ({kinds}); compare "
            "numbers with numbers (`minutes > 30`) and text with text in single quotes "
            "(`depot = 'north'`)"
        )
        raise SpecError(msg) from exc
    if dtype != pl.Boolean:
        msg = (
            f"the filter `{text}` gives {dtype} values, not true/false; "
            "write a condition such as `minutes > 0`"
        )
        raise SpecError(msg)
    return expr
