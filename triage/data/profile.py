"""A quick profile of a source's columns from a sample: type, share missing, a few numbers."""

from __future__ import annotations

from collections.abc import Mapping

import polars as pl


def profile_columns(schema: Mapping[str, pl.DataType], sample: pl.DataFrame) -> pl.DataFrame:
    """Profile every column from a sample: type, share missing and a few summary numbers.

    Parameters
    ----------
    schema : mapping of str to polars data type
        Every column of the source.
    sample : polars.DataFrame
        Rows read from the source (a sample; the numbers describe it, not the whole file).

    Returns
    -------
    polars.DataFrame
        One row per column: `name`, `dtype`, `missing` (share of values no fit can use:
        null, NaN or ±inf),
        `distinct` (distinct values in the sample), `low`, `mean`, `high` (numeric columns;
        null otherwise) and `top` (most frequent value, for other columns).
    """
    rows = []
    n = max(sample.height, 1)
    for name, dtype in schema.items():
        series = sample[name] if name in sample.columns else pl.Series(name, [], dtype=dtype)
        missing = series.null_count()
        if dtype.is_float():
            missing += int((~series.is_finite()).sum())
        low = mean = high = None
        top = None
        if dtype.is_numeric() and series.len() > missing:
            values = series.cast(pl.Float64)
            values = values.filter(values.is_finite())
            low, mean, high = values.min(), values.mean(), values.max()
        elif series.len() > missing:
            counts = series.drop_nulls().value_counts(sort=True)
            top = str(counts[name][0])
        rows.append(
            {
                "name": name,
                "dtype": str(dtype),
                "missing": missing / n,
                "distinct": series.n_unique(),
                "low": low,
                "mean": mean,
                "high": high,
                "top": top,
            }
        )
    return pl.DataFrame(
        rows,
        schema={
            "name": pl.String,
            "dtype": pl.String,
            "missing": pl.Float64,
            "distinct": pl.Int64,
            "low": pl.Float64,
            "mean": pl.Float64,
            "high": pl.Float64,
            "top": pl.String,
        },
    )
