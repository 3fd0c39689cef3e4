"""Tests for triage.core.filter: SQL-expression row filters."""

from __future__ import annotations

import polars as pl
import pytest

from triage.core.filter import closest_names_hint, filter_columns, parse_filter
from triage.errors import SpecError

SCHEMA = {"depot": pl.String, "minutes": pl.Float64, "stops": pl.Int64}
FRAME = pl.DataFrame(
    {
        "depot": ["north", "south", "north", "east"],
        "minutes": [10.0, 25.0, -1.0, 40.0],
        "stops": [1, 3, 2, 5],
    }
)


def test_filter_selects_the_rows_a_plain_polars_expression_selects() -> None:
    expr = parse_filter("depot = 'north' AND minutes > 0", SCHEMA)
    # oracle: the same condition written directly with the polars expression API
    expected = FRAME.filter((pl.col("depot") == "north") & (pl.col("minutes") > 0))
    assert FRAME.filter(expr).equals(expected)
    assert FRAME.filter(expr).height == 1


def test_filter_in_list_and_or() -> None:
    expr = parse_filter("depot IN ('south', 'east') OR stops < 2", SCHEMA)
    # oracle: polars expression API
    expected = FRAME.filter(pl.col("depot").is_in(["south", "east"]) | (pl.col("stops") < 2))
    assert FRAME.filter(expr).equals(expected)


def test_filter_columns_lists_each_column_once_in_order() -> None:
    expr = parse_filter("minutes > 0 AND depot = 'north' AND minutes < 30", SCHEMA)
    assert filter_columns(expr) == ("minutes", "depot")
    assert filter_columns("stops > 1 OR depot = 'x'") == ("stops", "depot")


def test_filter_rejects_python_and_runs_nothing(tmp_path) -> None:
    marker = tmp_path / "ran"
    text = f"__import__('os').system('touch {marker}')"
    with pytest.raises(SpecError, match="filter"):
        parse_filter(text, SCHEMA)
    assert not marker.exists()


@pytest.mark.parametrize("text", ["1; drop table x", "minutes > 0; select 1", "minutes > 0 ;"])
def test_filter_rejects_semicolon(text: str) -> None:
    with pytest.raises(SpecError, match="`;` is not allowed"):
        parse_filter(text, SCHEMA)


def test_filter_allows_semicolon_inside_a_text_value() -> None:
    expr = parse_filter("depot <> 'a;b'", SCHEMA)
    assert FRAME.filter(expr).height == FRAME.height


def test_filter_rejects_subquery() -> None:
    # polars 2.1 parses `IN (SELECT ...)` (checked on this machine), so we reject it ourselves
    with pytest.raises(SpecError, match="subqueries are not allowed"):
        parse_filter("stops IN (SELECT 1)", SCHEMA)


@pytest.mark.parametrize("text", ["", "   "])
def test_filter_rejects_empty_text(text: str) -> None:
    with pytest.raises(SpecError, match="the filter is empty"):
        parse_filter(text, SCHEMA)


def test_filter_unknown_column_names_closest() -> None:
    with pytest.raises(SpecError, match=r"unknown column `dpeot` in filter .*closest: `depot`"):
        parse_filter("dpeot = 'north'", SCHEMA)


def test_filter_double_quoted_value_gets_a_hint() -> None:
    with pytest.raises(SpecError, match="single quotes"):
        parse_filter('depot = "north"', SCHEMA)


def test_filter_type_error_is_a_spec_error() -> None:
    with pytest.raises(SpecError) as error:
        parse_filter("depot > 3", SCHEMA)
    # in the user's terms: which column is what kind, and how to compare; no parser wording
    assert "the filter `depot > 3` compares values of different kinds (`depot` is text)" in str(
        error.value
    )
    assert "dtype" not in str(error.value) and "str" not in str(error.value).split(";")[0]


def test_filter_bare_word_value_gets_a_quote_hint() -> None:
    with pytest.raises(SpecError, match=r"if `north` is a value, put it in single quotes"):
        parse_filter("depot = north", SCHEMA)


def test_filter_must_be_boolean() -> None:
    with pytest.raises(SpecError, match="not true/false"):
        parse_filter("minutes + 1", SCHEMA)


def test_filter_syntax_error_names_the_text() -> None:
    with pytest.raises(SpecError) as error:
        parse_filter("minutes >", SCHEMA)
    assert "the filter `minutes >` is not a complete condition" in str(error.value)
    assert "Expr" not in str(error.value) and "parse" not in str(error.value)


def test_closest_names_hint_ranks_and_caps_at_three() -> None:
    names = ["stop", "stops", "stops2", "stops3", "depot"]
    hint = closest_names_hint("stopz", names)
    assert hint.startswith("; closest: ")
    assert hint.count("`") == 6  # three names, each in backticks
    assert closest_names_hint("zzzzzz", names) == "; no similar column names"
