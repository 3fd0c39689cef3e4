"""Rows scored by a fit they were not part of: flags, prediction residuals, no Cook's distance.

Oracle: statsmodels OLS on the fit's rows, its influence measures for rows in the fit and
`get_prediction(...).se_obs` (the standard error of a new observation, s·√(1 + h0)) for rows
outside it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm

from tests import tui_support
from triage._typing import ALL_ROWS
from triage.core.spec import build_spec, parse_terms
from triage.data.source import open_source
from triage.engine.export import rows_with_diagnostics
from triage.engine.passes import fit_model

demo_file = tui_support.demo_file

PREDICTORS = ["distance_km", "stops"]


def _oracle(frame: pl.DataFrame) -> tuple[object, list[int]]:
    used = frame.drop_nulls(["minutes", *PREDICTORS])
    x = sm.add_constant(used.select(PREDICTORS).to_numpy().astype(float))
    return sm.OLS(used["minutes"].to_numpy(), x).fit(), used["__row"].to_list()


def test_rows_outside_a_filter_and_marks_are_scored_as_new_observations(
    demo_file: Path,
) -> None:
    source = open_source(str(demo_file))
    spec = build_spec(
        source.schema(),
        target="minutes",
        terms=parse_terms(", ".join(PREDICTORS))[1],
        where="depot = 'north'",
    )
    frame = pl.read_parquet(demo_file).with_row_index("__row").cast({"__row": pl.Int64})
    north = frame.filter(pl.col("depot") == "north").drop_nulls(["minutes", *PREDICTORS])
    marked = north["__row"].head(2).to_list()
    outcome = fit_model(source, spec, rows=ALL_ROWS, exclude_rows=marked)
    fit_rows = north.filter(~pl.col("__row").is_in(marked))
    oracle, oracle_rows = _oracle(fit_rows)
    np.testing.assert_allclose(outcome.fit.coef, oracle.params, rtol=1e-9)

    outside = (
        frame.filter(pl.col("depot") != "north")
        .drop_nulls(["minutes", *PREDICTORS])["__row"]
        .head(3)
        .to_list()
    )
    inside = fit_rows["__row"].slice(10, 3).to_list()
    positions = [*inside, *outside, *marked]
    written = rows_with_diagnostics(source, outcome, positions, exclude_rows=marked, fit_number=4)
    assert written["row"].to_list() == positions
    assert written["fit"].to_list() == [4] * len(positions)
    assert written["in_fit"].to_list() == [True] * 3 + [False] * 5

    influence = oracle.get_influence()
    for record in written.head(3).iter_rows(named=True):
        i = oracle_rows.index(record["row"])
        assert record["studentized"] == pytest.approx(
            influence.resid_studentized_external[i], rel=1e-7
        )
        assert record["cooks"] == pytest.approx(influence.cooks_distance[0][i], rel=1e-7)
    new_rows = written.tail(5)
    x0 = sm.add_constant(new_rows.select(PREDICTORS).to_numpy().astype(float), has_constant="add")
    prediction = oracle.get_prediction(x0)
    expected_resid = new_rows["minutes"].to_numpy() - prediction.predicted_mean
    np.testing.assert_allclose(new_rows["resid"].to_numpy(), expected_resid, rtol=1e-9)
    np.testing.assert_allclose(
        new_rows["studentized"].to_numpy(), expected_resid / prediction.se_obs, rtol=1e-7
    )
    # leverage of a new row: x0ᵀ(XᵀX)⁻¹x0 (numpy on the fit's design as the oracle)
    design = sm.add_constant(fit_rows.select(PREDICTORS).to_numpy().astype(float))
    h0 = np.einsum("ij,jk,ik->i", x0, np.linalg.inv(design.T @ design), x0)
    np.testing.assert_allclose(new_rows["leverage"].to_numpy(), h0, rtol=1e-7)
    assert new_rows["cooks"].is_null().all()


def test_rows_outside_a_sample_fit_are_not_in_it(demo_file: Path) -> None:
    source = open_source(str(demo_file))
    spec = build_spec(
        source.schema(), target="minutes", terms=parse_terms(", ".join(PREDICTORS))[1]
    )
    outcome = fit_model(source, spec, rows=2_000, seed=1)  # two of six row groups
    assert not outcome.data.is_full_pass
    sampled = set(outcome.sample["__row"].to_list())
    positions = list(range(0, 6_000, 250))
    written = rows_with_diagnostics(source, outcome, positions)
    complete = written.filter(pl.col("fitted").is_not_null())
    assert complete["in_fit"].to_list() == [r in sampled for r in complete["row"].to_list()]
    assert complete.filter(~pl.col("in_fit"))["cooks"].is_null().all()
    assert complete.filter(pl.col("in_fit"))["cooks"].is_not_nan().all()
    # a row with a missing value is in no design: no diagnostics, and not in the fit
    assert not written.filter(pl.col("fitted").is_null())["in_fit"].any()
