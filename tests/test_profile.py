"""Column profile from a sample (the app's Columns pane); polars itself is the oracle."""

from __future__ import annotations

import math

import numpy as np
import polars as pl

from triage.data.profile import profile_columns


def test_profile_columns_matches_polars_summaries(rng: np.random.Generator) -> None:
    values = rng.normal(10.0, 2.0, size=500)
    values[:7] = np.nan
    frame = pl.DataFrame(
        {
            "x": values,
            "k": rng.integers(0, 5, size=500),
            "g": rng.choice(["a", "b", "c"], size=500, p=[0.6, 0.3, 0.1]),
        }
    ).with_columns(pl.when(pl.int_range(pl.len()) < 3).then(None).otherwise(pl.col("g")).alias("g"))
    profile = profile_columns(frame.schema, frame).rows_by_key("name", named=True, unique=True)
    finite = frame["x"].fill_nan(None).drop_nulls()
    assert math.isclose(profile["x"]["missing"], 7 / 500)
    assert math.isclose(profile["x"]["mean"], finite.mean(), rel_tol=1e-12)
    assert profile["x"]["low"] == finite.min() and profile["x"]["high"] == finite.max()
    assert profile["k"]["distinct"] == frame["k"].n_unique()
    assert math.isclose(profile["g"]["missing"], 3 / 500)
    assert profile["g"]["top"] == frame["g"].drop_nulls().mode().item()
    assert profile["g"]["mean"] is None
