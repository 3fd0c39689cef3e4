"""Columns' figures over every row (rows, missing, low, mean, sd, high), folded in pass 1.

Oracles: numpy (`min`, `max`, `mean`, two-pass `std` with ddof=1, on the finite values) and
polars, both on the whole table in memory. Null, NaN and ±inf count as missing.
"""

from __future__ import annotations

import itertools
import warnings
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tests.tables import administrative_table
from triage._typing import ALL_ROWS
from triage.core.column_figures import ColumnFiguresAccumulator
from triage.core.spec import build_spec
from triage.data import parquet as parquet_module
from triage.data.scenario import write_scenario
from triage.data.source import open_source
from triage.engine import passes
from triage.engine.workers import set_pass_workers
from triage.results.fit import ColumnFigures


def _table(n_rows: int) -> pl.DataFrame:
    """An administrative extract with NaN and inf incomes and a code near 1e9 varying by 1."""
    rng = np.random.default_rng(11)
    frame = administrative_table(rng, n_rows)
    broken = rng.random(n_rows)
    return frame.with_columns(
        pl.when(pl.Series(broken < 0.01))
        .then(float("nan"))
        .when(pl.Series(broken > 0.999))
        .then(float("inf"))
        .otherwise(pl.col("income"))
        .alias("income"),
        # A large offset with a small spread: Σx² - n·mean² would lose every digit of the sd.
        pl.Series("stamp", 1e9 + rng.normal(0.0, 1.0, size=n_rows)),
    )


def _numpy_figures(frame: pl.DataFrame, name: str) -> ColumnFigures:
    """The oracle: numpy on the whole column (null and NaN are missing)."""
    series = frame[name]
    if not series.dtype.is_numeric():
        return ColumnFigures(name, frame.height, series.null_count(), None, None, None, None)
    values = series.cast(pl.Float64).to_numpy()  # null -> NaN
    usable = values[np.isfinite(values)]
    return ColumnFigures(
        name=name,
        rows=frame.height,
        missing=frame.height - usable.size,
        low=float(np.min(usable)),
        mean=float(np.mean(usable)),
        sd=float(np.std(usable, ddof=1)),
        high=float(np.max(usable)),
    )


def _assert_figures(got: ColumnFigures, want: ColumnFigures, *, rel: float = 1e-11) -> None:
    assert (got.name, got.rows, got.missing) == (want.name, want.rows, want.missing)
    assert (got.low, got.high) == (want.low, want.high)
    for field in ("mean", "sd"):
        a, b = getattr(got, field), getattr(want, field)
        assert (a is None) == (b is None), field
        if a is not None:
            assert a == pytest.approx(b, rel=rel), (got.name, field)


@pytest.mark.parametrize("cuts", [(0, 50_000), (0, 1, 2, 17, 4_000, 31_337, 50_000)])
def test_figures_merged_from_any_parts_match_numpy_on_the_whole_table(
    cuts: tuple[int, ...],
) -> None:
    frame = _table(50_000)
    columns = ("region", "channel", "age", "income", "weight", "y", "stamp")
    parts = []
    for start, end in itertools.pairwise(cuts):
        part = ColumnFiguresAccumulator(frame.schema, columns)
        part.update(frame.slice(start, end - start))
        parts.append(part)
    # merge as a tree of neighbours, as the pass's workers and the cluster do
    while len(parts) > 1:
        merged = []
        for k in range(0, len(parts) - 1, 2):
            parts[k].merge(parts[k + 1])
            merged.append(parts[k])
        parts = merged + ([parts[-1]] if len(parts) % 2 else [])
    figures = parts[0].finalize()
    assert [f.name for f in figures] == list(columns)
    for got in figures:
        # A part's mean near 1e9 is held to one ulp (1.2e-7), which bounds the merged sd of
        # `stamp` near 1e-10 relative; Σx² - n·mean² would keep no digit of it at all.
        rel = 1e-9 if got.name == "stamp" else 1e-11
        _assert_figures(got, _numpy_figures(frame, got.name), rel=rel)
    stamp = next(f for f in figures if f.name == "stamp")
    assert stamp.sd is not None and 0.95 < stamp.sd < 1.05  # the spread survives the offset


def test_a_column_with_no_value_has_no_low_mean_or_high() -> None:
    frame = pl.DataFrame({"x": [None, float("-inf"), float("nan")], "code": ["a", None, "b"]})
    accumulator = ColumnFiguresAccumulator(frame.schema, ("x", "code"))
    accumulator.update(frame)
    accumulator.update(frame.head(0))
    x, code = accumulator.finalize()
    assert x == ColumnFigures("x", 3, 3, None, None, None, None)
    assert code == ColumnFigures("code", 3, 1, None, None, None, None)


@pytest.fixture(scope="module")
def deliveries(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo scenario (our own invented deliveries) in several row groups."""
    path = tmp_path_factory.mktemp("figures") / "deliveries.parquet"
    return write_scenario(path, n_rows=30_000, seed=5, row_group_rows=2_500)


@pytest.mark.parametrize("n_workers", [1, 3])
def test_full_pass_figures_of_the_model_columns_match_polars_on_the_whole_file(
    deliveries: Path, monkeypatch: pytest.MonkeyPatch, n_workers: int
) -> None:
    monkeypatch.setattr(parquet_module, "PART_ROWS", 5_000)  # six parts over the workers
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 3_000)  # a full pass, not the sample
    source = open_source(deliveries)
    spec = build_spec(
        source.schema(), target="minutes", terms="distance_km, log(stops), depot, weight_kg"
    )
    set_pass_workers(n_workers)
    try:
        outcome = passes.fit_model(source, spec, rows=ALL_ROWS, column_figures=True)
    finally:
        set_pass_workers(None)
    whole = pl.read_parquet(deliveries)
    assert outcome.data.is_full_pass
    assert [f.name for f in outcome.column_figures] == list(spec.source_columns())
    for got in outcome.column_figures:
        _assert_figures(got, _numpy_figures(whole, got.name))
    minutes = next(f for f in outcome.column_figures if f.name == "minutes")
    assert minutes.high == whole["minutes"].max()  # polars agrees on the extreme


def test_no_figures_unless_asked_or_from_a_sample_a_filter_or_rows_left_out(
    deliveries: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 3_000)
    source = open_source(deliveries)
    schema = source.schema()
    spec = build_spec(schema, target="minutes", terms="distance_km, stops")
    filtered = build_spec(schema, target="minutes", terms="distance_km, stops", where="hour < 12")
    wanted = {"rows": ALL_ROWS, "column_figures": True}
    assert passes.fit_model(source, spec, **wanted).column_figures
    # the command line's fit shows no figures, so it folds none (a fifth of a numeric fit)
    assert passes.fit_model(source, spec, rows=ALL_ROWS).column_figures == ()
    assert passes.fit_model(source, spec, rows=3_000, column_figures=True).column_figures == ()
    assert passes.fit_model(source, filtered, **wanted).column_figures == ()
    assert passes.fit_model(source, spec, exclude_rows=[4], **wanted).column_figures == ()


def test_values_near_the_float_limit_give_figures_without_a_warning() -> None:
    # The command line turns numpy's warnings into errors: a column of 1e200 beside small
    # values must not stop a fit through its figures (the fit refuses it by name instead).
    frame = pl.DataFrame({"y": [-1e200, -5.36, 3.0, 1e200], "a": [1.0, 2.0, 3.0, 4.0]})
    accumulator = ColumnFiguresAccumulator(frame.schema, ("y", "a"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for start in range(4):  # one row per part: merges square the gap between means
            part = ColumnFiguresAccumulator(frame.schema, ("y", "a"))
            part.update(frame.slice(start, 1))
            accumulator.merge(part)
        accumulator.update(frame)
        y, a = accumulator.finalize()
    assert (y.low, y.high, y.missing) == (-1e200, 1e200, 0)
    assert a == ColumnFigures(
        "a", 8, 0, 1.0, 2.5, pytest.approx(np.std([1, 2, 3, 4] * 2, ddof=1)), 4.0
    )
