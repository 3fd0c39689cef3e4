"""Indicator terms (``channel=web`` typed as a term) and columns left with no rows.

The oracle of every fit is statsmodels' WLS on the same usable rows with the same
indicator built by hand (numpy ``==``); true aliasing is checked against numpy's matrix
rank. Tables look like administrative extracts (`tests.tables`): sorted by a region
code, skewed channel shares, missing values, case weights.
"""

from __future__ import annotations

import datetime
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm

from tests.tables import administrative_table
from triage._typing import ALL_ROWS
from triage.cli.main import main
from triage.core.holdout import HoldoutRule
from triage.core.indicator_terms import IndicatorRows
from triage.core.lsq import fit_arrays
from triage.core.spec import build_spec, parse_terms
from triage.data import parquet as parquet_module
from triage.data.source import ROW_INDEX, open_source
from triage.engine import passes
from triage.engine.compare import compare_models
from triage.errors import SpecError
from triage.views.compare import comparison_to_json, render_comparison
from triage.views.json import fit_to_json
from triage.views.text import render_aliased

RTOL = 1e-8
FIRST_DAY = datetime.date(2026, 3, 2)
TERMS = (
    "y ~ age + log(income) + channel=web + month=03 + flag=TRUE + region=R07 "
    "+ age:channel=web + day=2026-03-04"
)
"""Indicators on a text, an integer, a boolean, a sorted code and a date column."""
NAMES = (
    "intercept",
    "age",
    "log(income)",
    "channel=web",
    "month=3",
    "flag=true",
    "region=R07",
    "age:channel=web",
    "day=2026-03-04",
)


def _table(rng: np.random.Generator, n_rows: int) -> pl.DataFrame:
    """The administrative table plus month, flag and day; 1% of channels missing."""
    table = administrative_table(rng, n_rows, channel_shares=(0.55, 0.25, 0.12, 0.08))
    month = rng.integers(1, 13, n_rows)
    flag = rng.random(n_rows) < 0.15
    day = rng.integers(0, 5, n_rows)
    effect = 0.8 * (month == 3) - 0.6 * flag + 0.4 * (day == 2)
    gaps = pl.Series(rng.random(n_rows) < 0.01)
    return table.with_columns(
        pl.Series("month", month),
        pl.Series("flag", flag),
        pl.Series("day", [FIRST_DAY + datetime.timedelta(days=int(d)) for d in day]),
        pl.col("y") + pl.Series(effect),
        pl.when(gaps).then(None).otherwise(pl.col("channel")).alias("channel"),
    )


def _hand_made(rows: pl.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The design of `NAMES` built by hand on the rows with no missing value; y; weights."""
    used = rows.drop_nulls(["y", "age", "income", "channel", "month", "flag", "region", "day"])
    age = used["age"].to_numpy()
    web = (used["channel"].to_numpy() == "web").astype(float)
    x = np.column_stack(
        [
            np.ones(used.height),
            age,
            np.log(used["income"].to_numpy()),
            web,
            (used["month"].to_numpy() == 3).astype(float),
            used["flag"].to_numpy().astype(float),
            (used["region"].to_numpy() == "R07").astype(float),
            age * web,
            (used["day"].to_numpy() == np.datetime64("2026-03-04")).astype(float),
        ]
    )
    return x, used["y"].to_numpy(), used["weight"].to_numpy()


@pytest.fixture
def table_source(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> tuple[pl.DataFrame, Path]:
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 5_000)
    monkeypatch.setattr(parquet_module, "PART_ROWS", 5_000)
    table = _table(rng, 30_000)
    path = tmp_path / "admin.parquet"
    table.write_parquet(path, row_group_size=2_500)
    return table, path


def test_indicator_terms_parse_in_either_form_and_labels_read_back() -> None:
    _, terms = parse_terms("y ~ x + depot=north + vehicle[truck] + x:depot = `north east`")
    assert [t.label for t in terms] == [
        "x",
        "depot=north",
        "vehicle=truck",
        "x:depot=`north east`",
    ]
    assert [(t.kind, t.column, t.level) for t in terms[1:3]] == [
        ("indicator", "depot", "north"),
        ("indicator", "vehicle", "truck"),
    ]
    text = ", ".join(t.label for t in terms)
    assert parse_terms(text)[1] == terms


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("x, depot=", r"expected a level after `depot=`"),
        ("log(x)=3", r"unexpected `=` .* such as `depot=north`"),
        ("depot=north^2", r"`\^` applies to a numeric column, not to the indicator"),
        ("depot=north, depot[north]", r"term `depot=north` appears twice"),
    ],
)
def test_indicator_term_typing_mistakes_are_refused(text: str, pattern: str) -> None:
    with pytest.raises(SpecError, match=pattern):
        parse_terms(text)


SCHEMA = {
    "y": pl.Float64,
    "depot": pl.String,
    "month": pl.Int64,
    "small": pl.Int8,
    "flag": pl.Boolean,
    "km": pl.Float64,
    "day": pl.Date,
    "kind": pl.Enum(["a", "b"]),
    "wait": pl.Duration("us"),
}


@pytest.mark.parametrize(
    ("typed", "label"),
    [
        ("depot=north", "depot=north"),
        ("month=03", "month=3"),
        ("month=3.0", "month=3"),
        ("flag=TRUE", "flag=true"),
        ("km=2", "km=2.0"),
        ("day=2026-03-04", "day=2026-03-04"),
        ("kind=b", "kind=b"),
    ],
)
def test_indicator_level_is_read_in_the_columns_type(typed: str, label: str) -> None:
    spec = build_spec(SCHEMA, target="y", terms=typed)
    assert [t.label for t in spec.terms] == [label]


@pytest.mark.parametrize(
    ("typed", "pattern"),
    [
        ("month=march", r"the level in `month=march` must be a whole number"),
        ("month=3.5", r"must be a whole number, as `month` has type Int64"),
        ("small=300", r"outside the range of `small`, of type Int8"),
        ("flag=yes", r"`flag` is true or false"),
        ("day=04/03/2026", r"must be a date such as 2024-03-01"),
        ("kind=c", r"`kind` has no level `c` .* its levels are `a`, `b`"),
        ("wait=3", r"`wait` has type Duration.* holds no levels"),
        ("depot, depot=north", r"`depot=north` is one of the indicators the categorical"),
        ("y=3", r"target `y` is also used in the term `y=3`"),
        ("lorry=van", r"unknown column `lorry` in term `lorry=van`"),
    ],
)
def test_indicator_levels_the_column_cannot_hold_are_refused(typed: str, pattern: str) -> None:
    with pytest.raises(SpecError, match=pattern):
        build_spec(SCHEMA, target="y", terms=typed)


def _check_against_statsmodels(fit: object, rows: pl.DataFrame) -> None:
    """Oracle: statsmodels WLS on `rows` (usable rows only) with hand-made indicators."""
    x, y, w = _hand_made(rows)
    result = sm.WLS(y, x, weights=w).fit()
    assert fit.names == NAMES  # type: ignore[attr-defined]
    assert fit.n == result.nobs  # type: ignore[attr-defined]
    np.testing.assert_allclose(fit.coef, result.params, rtol=RTOL)  # type: ignore[attr-defined]
    np.testing.assert_allclose(fit.std_error, result.bse, rtol=RTOL)  # type: ignore[attr-defined]


def test_indicator_terms_match_statsmodels_on_a_sample_and_on_every_row(
    table_source: tuple[pl.DataFrame, Path],
) -> None:
    table, path = table_source
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms=TERMS, weights="weight")
    sample = passes.fit_model(source, spec, rows=6_000, sampling="uniform", seed=3)
    assert not sample.data.is_full_pass and sample.sample.height < table.height
    _check_against_statsmodels(sample.fit, sample.sample)
    every = passes.fit_model(source, spec, rows=ALL_ROWS)
    _check_against_statsmodels(every.fit, table)
    # Rows with `channel` missing are left out like any missing predictor.
    assert every.data.rows_dropped_missing == table.height - every.fit.n


def test_report_pass_two_scores_indicator_terms_as_statsmodels(
    table_source: tuple[pl.DataFrame, Path],
) -> None:
    # Oracle: statsmodels WLS HC3 standard errors on the same usable rows.
    table, path = table_source
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms=TERMS, weights="weight")
    report = passes.run_report(source, spec, rows=ALL_ROWS, top_k=5)
    x, y, w = _hand_made(table)
    result = sm.WLS(y, x, weights=w).fit()
    ours = [report.diagnostics.robust_se[name].hc3 for name in NAMES]
    np.testing.assert_allclose(ours, result.HC3_se, rtol=RTOL)


def test_compare_with_a_held_out_cut_fits_indicator_terms_as_statsmodels(
    table_source: tuple[pl.DataFrame, Path],
) -> None:
    # Oracle: statsmodels WLS on the rows before the cut (month < 10), the rest held out.
    table, path = table_source
    source = open_source(path)
    specs = [
        build_spec(source.schema(), target=None, terms=terms, weights="weight")
        for terms in ("y ~ age + log(income)", TERMS)
    ]
    outcome = compare_models(
        source,
        specs,
        ["small", "with indicators"],
        rows=ALL_ROWS,
        holdout=HoldoutRule(column="month", cut=10),
    )
    larger = outcome.models[1].outcome
    _check_against_statsmodels(larger.fit, table.filter(pl.col("month") < 10))
    held_out, _, _ = _hand_made(table.filter(pl.col("month") >= 10))
    assert outcome.rows_held_out == held_out.shape[0]


def test_a_full_pass_finds_a_level_its_learning_sample_lacks(
    table_source: tuple[pl.DataFrame, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    # The file is sorted by region: the last region lies in its last row group only, and the
    # learning sample is one row group of twelve. Where the sample lacks the level, every
    # row is counted, so the level is found wherever it lies.
    table, path = table_source
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 2_500)
    counted: list[int] = []
    update = IndicatorRows.update

    def count(counter: IndicatorRows, frame: pl.DataFrame) -> None:
        counted.append(frame.height)
        update(counter, frame)

    monkeypatch.setattr(IndicatorRows, "update", count)
    source = open_source(path)
    last = table["region"].max()
    spec = build_spec(source.schema(), target="y", terms=f"age, region={last}")
    full_counts = 0
    for seed in range(4):
        counted.clear()
        fit = passes.fit_model(source, spec, rows=ALL_ROWS, seed=seed).fit
        assert fit.names[-1] == f"region={last}"
        full_counts += sum(counted) == 2_500 + table.height  # the sample, then every row
    assert full_counts >= 1


def test_a_level_the_column_does_not_hold_is_refused_naming_some_levels(
    table_source: tuple[pl.DataFrame, Path],
) -> None:
    _, path = table_source
    source = open_source(path)
    for rows, basis in ((ALL_ROWS, "the rows read"), (6_000, "the sample")):
        spec = build_spec(source.schema(), target="y", terms="age, channel=fax")
        with pytest.raises(SpecError) as error:
            passes.fit_model(source, spec, rows=rows)
        assert str(error.value) == (
            f"`channel` has no level `fax` in {basis} (the term `channel=fax`); "
            "its levels there: `desk`, `phone`, `post`, `web`"
        )


def test_cli_outputs_and_export_name_the_indicator_as_typed(
    table_source: tuple[pl.DataFrame, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    table, path = table_source
    model = ["-y", "y", "-x", "age, channel[web]", "--weights", "weight"]
    assert main(["fit", str(path), *model, "--rows", "all", "--json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert [c["term"] for c in document["coefficients"]] == ["intercept", "age", "channel=web"]
    coding = document["model"]["term_coding"][1]
    assert (coding["kind"], coding["column"], coding["level"]) == ("indicator", "channel", "web")
    out = tmp_path / "all.parquet"
    assert main(["export", str(path), *model, "--all", "--out", str(out)]) == 0
    capsys.readouterr()
    status = pl.read_parquet(out)["status"]
    missing = table.select(pl.col("age").is_null() | pl.col("channel").is_null()).to_series()
    assert (status == "missing value").sum() == missing.sum()
    assert (status == "used").sum() == table.height - missing.sum()


def _airport_table(rng: np.random.Generator) -> pl.DataFrame:
    """The administrative table with a rare `airport` channel whose rows all lack `age`."""
    table = administrative_table(rng, 20_000)
    airport = pl.Series(rng.random(table.height) < 0.005)
    return table.with_columns(
        pl.when(airport).then(pl.lit("airport")).otherwise(pl.col("channel")).alias("channel"),
        pl.when(airport).then(None).otherwise(pl.col("age")).alias("age"),
    )


@pytest.mark.parametrize("terms", ["age, channel", "age, channel=airport, channel=web"])
def test_a_level_with_no_rows_left_is_worded_apart_from_aliasing(
    tmp_path: Path, rng: np.random.Generator, terms: str
) -> None:
    table = _airport_table(rng).with_columns((2.0 * pl.col("income")).alias("income_twice"))
    path = tmp_path / "airport.parquet"
    table.write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    spec = build_spec(source.schema(), target="y", terms=f"{terms}, income, income_twice")
    outcome = passes.fit_model(source, spec, rows=ALL_ROWS)
    fit = outcome.fit
    assert fit.no_rows == ("channel=airport",)
    assert fit.collinear == ("income_twice",)
    assert set(fit.aliased) == {"channel=airport", "income_twice"}
    # Oracle: numpy's matrix rank of the design on the rows used. Without the airport column
    # (all zeros there) one more column still drops the rank by one: income_twice.
    used = table.with_row_index(ROW_INDEX).drop_nulls(["age", "channel", "y", "income"])
    design = outcome.builder.build(used).x
    airport = fit.names.index("channel=airport")
    assert not design[:, airport].any()
    kept = np.delete(design, airport, axis=1)
    assert np.linalg.matrix_rank(kept) == kept.shape[1] - 1
    text = render_aliased(fit, width=80)
    aliased_part, no_rows_part = text.split("terms with no rows left")
    assert "income_twice" in aliased_part and "channel=airport" not in aliased_part
    assert "no rows left after missing values" in no_rows_part
    assert "channel=airport" in no_rows_part and "income_twice" not in no_rows_part
    document = fit_to_json(outcome)
    assert document["aliased"] == ["income_twice"]
    assert document["no_rows_left"] == ["channel=airport"]
    # compare: the indicator of the level (a comparison codes a categorical from the rows
    # every model can use, so there `channel` alone has no airport column)
    indicators = "age, channel=airport, channel=web, income, income_twice"
    with_indicators = build_spec(source.schema(), target="y", terms=indicators)
    smaller = build_spec(source.schema(), target="y", terms="age, income")
    compared = compare_models(
        source, [smaller, with_indicators], ["age, income", indicators], rows=ALL_ROWS
    )
    model = comparison_to_json(compared)["models"][1]
    assert (model["aliased"], model["no_rows_left"]) == (["income_twice"], ["channel=airport"])
    lines = render_comparison(compared, width=80).split("\n")
    assert "#2: no estimate (aliased) for income_twice" in lines
    assert "#2: no estimate (no rows left after missing values) for channel=airport" in lines


def test_true_aliasing_matches_numpys_rank_and_has_no_rows_left(rng: np.random.Generator) -> None:
    # Oracle: numpy's matrix rank. A sum of two columns and a constant are aliased (each
    # lies in the span of earlier columns); neither is a column without rows.
    n = 2_000
    a, b = rng.gamma(3.0, 2.0, n), rng.lognormal(1.0, 0.5, n)
    x = np.column_stack([np.ones(n), a, b, a + b, np.full(n, 4.0), (a > 8).astype(float)])
    y = 1.0 + 0.5 * a - b + rng.standard_t(5, n)
    fit = fit_arrays(x, y, ["intercept", "a", "b", "a+b", "four", "high_a"], has_intercept=True)
    assert np.linalg.matrix_rank(x) == x.shape[1] - len(fit.aliased)
    assert fit.aliased == ("a+b", "four") == fit.collinear
    assert fit.no_rows == ()
    assert "terms with no rows left" not in render_aliased(fit)
