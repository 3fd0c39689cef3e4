"""Tables that look like real administrative extracts, generated for the tests.

Sorted by a region code, categoricals with skewed level shares, a few missing values and
case weights, as real tables have (not ``normal(size=(n, p))``).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl

CHANNELS = ("post", "phone", "web", "desk")


def administrative_table(
    rng: np.random.Generator,
    n_rows: int,
    *,
    channel_shares: Sequence[float] = (0.6, 0.25, 0.1, 0.05),
) -> pl.DataFrame:
    """Region (12 levels, sorted), channel (4 levels), age with 2% missing, income, weight, y."""
    region = np.sort(rng.choice(12, size=n_rows, p=np.arange(12, 0, -1) / 78.0))
    channel = rng.choice(CHANNELS, size=n_rows, p=list(channel_shares))
    age = rng.gamma(4.0, 10.0, size=n_rows)
    income = rng.lognormal(10.0, 0.6, size=n_rows)
    y = 3.0 + 0.02 * age + 0.4 * np.log(income) + 0.3 * region + rng.standard_t(5, size=n_rows)
    y += (channel == "web") * 0.5
    frame = pl.DataFrame(
        {
            "region": [f"R{r:02d}" for r in region],
            "channel": channel,
            "age": age,
            "income": income,
            "weight": rng.uniform(0.5, 2.0, size=n_rows),
            "y": y,
        }
    )
    gaps = pl.Series(rng.random(n_rows) < 0.02)
    return frame.with_columns(pl.when(gaps).then(None).otherwise(pl.col("age")).alias("age"))
