"""Full passes over tables shaped like real administrative ones: sorted, coded, messy.

The oracle for coefficients is statsmodels' OLS on the whole table in memory (pandas
dummies with the same reference); the tables come from `_claims_table`, a seeded generator
of our own: rows sorted by a region code, skewed level shares, a numeric month code used
as a category, and missing values.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import triage.engine.passes as passes
from triage._typing import ALL_ROWS
from triage.core.levels import ID_TABLE_CELLS, FoundLevels, LevelCounter, category_codes
from triage.core.spec import build_spec
from triage.data.source import open_source
from triage.engine.passes import fit_model
from triage.results.fit import FitOutcome

N_ROWS = 24_000
GROUP_ROWS = 500
"""Row groups far smaller than the file, so a sample of a few groups sees few regions."""


def _claims_table(n: int = N_ROWS, seed: int = 11) -> pl.DataFrame:
    """A claims-like table sorted by region: skewed regions and offices, months 1..12."""
    rng = np.random.default_rng(seed)
    shares = 1.0 / np.arange(1, 13) ** 1.2
    region = rng.choice(12, size=n, p=shares / shares.sum())
    office_shares = 1.0 / np.arange(1, 31) ** 0.8
    office = rng.choice(30, size=n, p=office_shares / office_shares.sum())
    month = rng.integers(1, 13, size=n)
    age = rng.normal(45.0, 12.0, size=n).round()
    effect = rng.normal(0.0, 4.0, size=12)
    cost = 50.0 + 0.4 * age + effect[region] + 0.3 * office + 0.8 * month + rng.normal(0, 6, n)
    frame = pl.DataFrame(
        {
            "region": [f"R{r:02d}" for r in region],
            "office": [f"OF{o:03d}" for o in office],
            "month": month.astype(np.int64),
            "age": age,
            "cost": cost,
        }
    )
    frame = frame.with_columns(
        pl.when(pl.Series(rng.random(n) < 0.03)).then(None).otherwise(pl.col("age")).alias("age")
    )
    return frame.sort("region", "office")


def _statsmodels_fit(frame: pl.DataFrame, references: dict[str, str]) -> pd.Series:
    """OLS of cost on age, region, office and month (as categories) with the given references."""
    import statsmodels.api as sm

    data = frame.drop_nulls().to_pandas()
    parts = [pd.Series(1.0, index=data.index, name="intercept"), data["age"]]
    for column in ("region", "office", "month"):
        values = data[column].astype(str)
        levels = sorted(values.unique(), key=lambda v: int(v) if column == "month" else v)
        for level in levels:
            if level != references[column]:
                parts.append((values == level).astype(float).rename(f"{column}={level}"))
    design = pd.concat(parts, axis=1)
    return sm.OLS(data["cost"], design).fit().params


def _most_rows(frame: pl.DataFrame, column: str) -> str:
    """The documented rule, computed independently: most rows, ties to the first level."""
    counts = frame.get_column(column).drop_nulls().cast(pl.String).value_counts(name="n")
    top = counts.filter(pl.col("n") == pl.col("n").max()).get_column(column).to_list()
    return sorted(top, key=lambda v: int(v) if column == "month" else v)[0]


@pytest.fixture
def small_learning_sample(monkeypatch: pytest.MonkeyPatch) -> None:
    """Make the full pass's learning sample a few row groups, as on a file of millions."""
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 2 * GROUP_ROWS)


def _fit(path: Path, **options: object) -> FitOutcome:
    source = open_source(path)
    spec = build_spec(
        source.schema(),
        target=None,
        terms="cost ~ age + region + office + cat(month)",
        **options,  # type: ignore[arg-type]
    )
    return fit_model(source, spec, rows=ALL_ROWS)


def test_sorted_table_full_pass_uses_every_row_and_matches_statsmodels(
    tmp_path: Path, small_learning_sample: None
) -> None:
    frame = _claims_table()
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    assert pq.ParquetFile(path).metadata.num_row_groups == N_ROWS // GROUP_ROWS

    outcome = _fit(path)

    data = outcome.data
    n_missing = frame.get_column("age").null_count()
    assert data.is_full_pass
    assert data.rows_dropped_unseen_level == 0
    assert data.rows_dropped_missing == n_missing
    assert data.rows_used == N_ROWS - n_missing
    builder = outcome.builder
    for column in ("region", "office", "month"):
        present = frame.get_column(column).cast(pl.String).unique().to_list()
        assert set(builder.levels[column]) == set(present)
        assert builder.reference_levels[column] == _most_rows(frame, column)
    # statsmodels on the whole table in memory, same references (relative 1e-9)
    expected = _statsmodels_fit(frame, dict(builder.reference_levels))
    assert list(expected.index) == list(outcome.fit.names)
    np.testing.assert_allclose(outcome.fit.coef, expected.to_numpy(), rtol=1e-9, atol=1e-9)


def test_numeric_codes_sort_numerically(tmp_path: Path, small_learning_sample: None) -> None:
    path = tmp_path / "claims.parquet"
    _claims_table().write_parquet(path, row_group_size=GROUP_ROWS)
    outcome = _fit(path)
    assert outcome.builder.levels["month"] == tuple(str(m) for m in range(1, 13))
    names = [n for n in outcome.fit.names if n.startswith("month=")]
    reference = outcome.builder.reference_levels["month"]
    assert names == [f"month={m}" for m in range(1, 13) if str(m) != reference]


def test_natural_order_of_booleans_dates_and_text() -> None:
    # order by value as stored: false before true, dates by date, text by its sort order
    frame = pl.DataFrame(
        {
            "flag": [True, False, None, True],
            "day": pl.Series(
                ["2024-10-02", "2024-02-09", "2023-12-31", "2024-10-02"]
            ).str.to_date(),
            "word": ["pear", "Apple", "apple", "fig"],
        }
    )
    tables = LevelCounter(frame.schema, ["flag", "day", "word"])
    tables.update(frame)
    result = tables.finalize()
    assert result["flag"].levels == ("false", "true")
    assert result["flag"].counts == (1, 2)
    assert result["day"].levels == ("2023-12-31", "2024-02-09", "2024-10-02")
    assert result["word"].levels == tuple(sorted(["pear", "Apple", "apple", "fig"]))


def test_level_counts_do_not_depend_on_batches_or_merge_order() -> None:
    frame = _claims_table(3_000)
    whole = LevelCounter(frame.schema, ["region", "month"])
    whole.update(frame)
    parts = []
    for start in (2_000, 0, 1_000):  # out of order
        part = LevelCounter(frame.schema, ["region", "month"])
        part.update(frame.slice(start, 1_000))
        parts.append(part)
    merged = parts[2].merge(parts[0]).merge(parts[1])
    assert merged.finalize() == whole.finalize()


@pytest.mark.parametrize("dtype", [pl.String, pl.Categorical])
def test_found_levels_number_levels_in_order_of_first_appearance_as_pandas_factorize(
    dtype: pl.DataType,
) -> None:
    """Levels found batch by batch are numbered as `pandas.factorize` numbers the rows.

    Text read dictionary-encoded (Categorical) is coded from polars' ids, plain text by
    value; both must give pandas' codes (-1 for a missing value) and levels in order.
    """
    rng = np.random.default_rng(12)
    names = [f"O{k:03d}" for k in range(60)]
    shares = 1.0 / np.arange(1, 61) ** 1.2  # skewed, as office codes are
    values = rng.choice(np.array(names, dtype=object), size=8_000, p=shares / shares.sum())
    values[rng.random(values.size) < 0.03] = None
    expected_codes, expected_levels = pd.factorize(pd.Series(values))
    found = FoundLevels("office", pl.String)
    codes = []
    for start in range(0, values.size, 1_000):
        batch = pl.DataFrame({"office": list(values[start : start + 1_000])})
        code, present = found.find(batch.with_columns(pl.col("office").cast(dtype)))
        found.count(code[present])
        codes.append(code)
    np.testing.assert_array_equal(np.concatenate(codes), expected_codes)
    assert found.names == list(expected_levels)
    expected_counts = pd.Series(values).value_counts()
    assert found.counts.tolist() == [int(expected_counts[name]) for name in found.names]
    # A part that took in another part's levels first codes its rows by those levels' names.
    later = FoundLevels("office", pl.String)
    later.absorb(found)
    batch = pl.DataFrame({"office": list(values[::-1])})
    code, present = later.find(batch.with_columns(pl.col("office").cast(dtype)))
    assert later.names == found.names
    assert [later.names[k] for k in code[present]] == [v for v in values[::-1] if v is not None]


def test_category_codes_of_ids_far_apart_equal_pandas_get_indexer() -> None:
    """Ids far apart (a process that has coded many texts) are matched by sorting.

    Codes must be what pandas finds for the same texts among the same labels
    (`Index.get_indexer`), with -1 for a missing value.
    """
    many = pl.Series("held", [f"t{k}" for k in range(ID_TABLE_CELLS + 10)], dtype=pl.Categorical)
    labels = ["z-new", f"t{ID_TABLE_CELLS + 5}", "t3"]
    values = ["t3", None, "z-new", f"t{ID_TABLE_CELLS + 5}", "t3", "z-new"]
    column = pl.Series("code", values, dtype=pl.Categorical)
    ids = column.drop_nulls().to_physical().to_numpy()
    assert int(ids.max()) - int(ids.min()) > ID_TABLE_CELLS  # the sorting path
    codes, present = category_codes(column, lambda names: [labels.index(n) for n in names])
    np.testing.assert_array_equal(codes, pd.Index(labels).get_indexer(values))
    np.testing.assert_array_equal(present, [v is not None for v in values])
    assert many.len() == ID_TABLE_CELLS + 10  # held alive, so the ids stay apart


def test_same_table_in_four_stores_gives_identical_coefficients(
    tmp_path: Path, small_learning_sample: None
) -> None:
    frame = _claims_table()
    parquet = tmp_path / "claims.parquet"
    frame.write_parquet(parquet, row_group_size=GROUP_ROWS)
    csv = tmp_path / "claims.csv"
    frame.write_csv(csv)
    ipc = tmp_path / "claims.arrow"
    with pa.OSFile(str(ipc), "wb") as sink:
        table = frame.to_arrow()
        with pa.ipc.new_file(sink, table.schema) as writer:
            for batch in table.to_batches(max_chunksize=GROUP_ROWS):
                writer.write_batch(batch)
    hive = tmp_path / "hive"
    # the partition column comes back from the folder names; other files in other orders
    for (office,), part in frame.group_by(["office"], maintain_order=False):
        folder = hive / f"office={office}"
        folder.mkdir(parents=True)
        part.drop("office").write_parquet(folder / "part.parquet", row_group_size=GROUP_ROWS)

    outcomes = [_fit(path) for path in (parquet, csv, ipc, hive)]
    first = outcomes[0]
    for outcome in outcomes[1:]:
        assert dict(outcome.builder.reference_levels) == dict(first.builder.reference_levels)
        assert outcome.builder.levels == first.builder.levels
        assert outcome.fit.names == first.fit.names
        assert outcome.data.rows_used == first.data.rows_used
        np.testing.assert_allclose(outcome.fit.coef, first.fit.coef, rtol=1e-9, atol=1e-10)


def test_reference_override_reparametrises_the_same_fit(
    tmp_path: Path, small_learning_sample: None
) -> None:
    path = tmp_path / "claims.parquet"
    frame = _claims_table()
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    default = _fit(path)
    chosen = _fit(path, reference={"region": "R07"})
    assert chosen.builder.reference_levels["region"] == "R07"
    assert chosen.fit.rss == pytest.approx(default.fit.rss, rel=1e-10)
    # statsmodels with R07 left out gives the same coefficients
    references = {**dict(default.builder.reference_levels), "region": "R07"}
    expected = _statsmodels_fit(frame, references)
    np.testing.assert_allclose(chosen.fit.coef, expected.to_numpy(), rtol=1e-9, atol=1e-9)


def test_fit_json_rebuilds_the_model(tmp_path: Path, small_learning_sample: None) -> None:
    """Rebuild the design from `model.term_coding` alone and refit with numpy's lstsq."""
    from triage.views.json import fit_to_json

    frame = _claims_table(6_000)
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms="cost ~ std(age) + region + cat(month)")
    document = json.loads(json.dumps(fit_to_json(fit_model(source, spec, rows=ALL_ROWS))))
    model = document["model"]
    data = frame.drop_nulls()
    columns = [np.ones(data.height)]
    for term in model["term_coding"]:
        values = data.get_column(term["column"])
        if term["kind"] == "categorical":
            text = values.cast(pl.String).to_numpy()
            levels = [entry["level"] for entry in term["levels"]]
            assert term["reference"] in levels
            columns += [
                (text == level).astype(float) for level in levels if level != term["reference"]
            ]
        else:
            assert term["transform"] == "std"
            columns.append((values.to_numpy() - term["mean"]) / term["sd"])
    design = np.column_stack(columns)
    coef = np.linalg.lstsq(design, data.get_column("cost").to_numpy(), rcond=None)[0]
    estimates = [entry["estimate"] for entry in document["coefficients"]]
    np.testing.assert_allclose(estimates, coef, rtol=1e-8, atol=1e-8)
    month = next(t for t in model["term_coding"] if t["column"] == "month")
    assert sum(entry["rows"] for entry in month["levels"]) == frame.height


# ── bad tables: each one line on stderr, exit 2, in a process held under 1 GiB ──────────

MEMORY_LIMIT = 1 << 30
"""The issue's bound: each bad case ends within 1 GiB of data memory (RLIMIT_DATA)."""


def _run_limited(args: list[str]) -> subprocess.CompletedProcess[str]:
    """Run the CLI in a child whose data memory is capped at `MEMORY_LIMIT`."""

    def cap_memory() -> None:
        resource.setrlimit(resource.RLIMIT_DATA, (MEMORY_LIMIT, MEMORY_LIMIT))

    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    return subprocess.run(
        [sys.executable, "-m", "triage", *args],
        preexec_fn=cap_memory,
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        check=False,
    )


def _stray_text_csv(path: Path) -> Path:
    rng = np.random.default_rng(5)
    x1 = [f"{v:.4f}" for v in rng.normal(size=200)]
    x1[17] = "oops"
    frame = pl.DataFrame({"y": rng.normal(size=200), "x1": x1, "x2": rng.normal(size=200)})
    frame.write_csv(path)
    return path


def _million_level_parquet(path: Path) -> Path:
    rng = np.random.default_rng(6)
    n = 1_000_000
    ids = pl.Series("person", rng.permutation(n)).cast(pl.String).str.zfill(7)
    frame = pl.DataFrame({"person": ids, "y": rng.normal(size=n), "x": rng.normal(size=n)})
    frame.write_parquet(path, row_group_size=100_000)
    return path


@pytest.mark.parametrize(
    ("case", "terms", "extra", "expected"),
    [
        (
            "stray",
            "y ~ x1 + x2",
            [],
            "column `x1` is text because 1 of 200 values is not a number (first at row 17: "
            "`oops`); mark it missing with `--null-value oops`, or use `cat(x1)` to treat it "
            "as a category",
        ),
        ("header", "y ~ x1", [], "the data has no rows (only a header line?), so the target `y`"),
        ("empty_target", "y ~ x1", [], "every value of the target `y` is missing (50 rows)"),
        (
            "million",
            "y ~ x + person",
            ["--rows", "all", "--max-levels", "2000000"],
            "the design would have at least",
        ),
    ],
)
def test_bad_tables_exit_2_with_one_line(
    tmp_path: Path, case: str, terms: str, extra: list[str], expected: str
) -> None:
    if case == "stray":
        path = _stray_text_csv(tmp_path / "stray.csv")
    elif case == "header":
        path = tmp_path / "header.csv"
        path.write_text("y,x1,x2\n")
    elif case == "empty_target":
        path = tmp_path / "empty.csv"
        frame = pl.DataFrame(
            {"y": [None] * 50, "x1": np.arange(50.0)}, schema_overrides={"y": pl.String}
        )
        frame.write_csv(path)
    else:
        path = _million_level_parquet(tmp_path / "people.parquet")
    result = _run_limited(["fit", str(path), "--terms", terms, *extra])
    assert result.returncode == 2, result.stderr[-2000:]
    # a slow machine may log a progress line of the pass before the error
    lines = [line for line in result.stderr.splitlines() if "rows/s" not in line]
    assert len(lines) == 1, result.stderr[-2000:]
    assert expected in lines[0]
    if case == "million":
        # names the column and its level count, the estimate, and what to do
        assert "`person` has at least" in lines[0]
        assert "--max-memory" in lines[0] and "leave the column out" in lines[0]


def test_cat_of_a_stray_text_column_still_fits_it_as_a_category(tmp_path: Path) -> None:
    path = tmp_path / "codes.csv"
    frame = pl.DataFrame({"y": np.arange(30.0) % 7, "code": [str(i % 3) for i in range(30)]})
    frame = frame.with_columns(pl.col("code").cast(pl.String))
    frame.write_csv(path)
    source = open_source(path)
    assert source.schema()["code"] == pl.Int64  # read as numbers: cat() makes a category
    spec = build_spec(source.schema(), target=None, terms="y ~ cat(code)")
    outcome = fit_model(source, spec, rows=ALL_ROWS)
    assert outcome.builder.levels["code"] == ("0", "1", "2")


def test_level_counter_stops_past_its_cap_and_says_so() -> None:
    frame = pl.DataFrame({"id": [f"p{i}" for i in range(5_000)]})
    counter = LevelCounter(frame.schema, ["id"], cap=100)
    for start in range(0, 5_000, 500):
        counter.update(frame.slice(start, 500))
    table = counter.finalize()["id"]
    assert table.is_partial
    assert 100 < len(table.levels) <= 1_000  # stopped after the batch that passed the cap


# ── exports account for every row ────────────────────────────────────────────────────


def test_export_all_holds_every_row_and_its_status_matches_the_fit(
    tmp_path: Path, small_learning_sample: None, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    frame = _claims_table()
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    terms = "cost ~ sqrt(age) + region + cat(month)"
    where = "office <> 'OF000'"
    out = tmp_path / "all.csv"
    assert (
        main(["export", str(path), "--terms", terms, "--where", where, "--all", "--out", str(out)])
        == 0
    )
    printed = capsys.readouterr().out
    written = pl.read_csv(out)
    # one line per source row, in source order
    assert written.get_column("row").to_list() == list(range(N_ROWS))
    statuses = dict(written.group_by("status").len().iter_rows())
    # the counts of the same model's full fit (and of the data, counted here independently)
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms=terms, where=where)
    data = fit_model(source, spec, rows=ALL_ROWS).data
    in_filter = frame.get_column("office") != "OF000"
    assert statuses["removed by the filter"] == data.rows_filtered_out == (~in_filter).sum()
    assert statuses["missing value"] == data.rows_dropped_missing
    assert statuses["missing value"] == frame.filter(in_filter).get_column("age").null_count()
    assert statuses["used"] == data.rows_used
    assert sum(statuses.values()) == data.rows_in_source == N_ROWS
    # diagnostics only where the row was used
    used = written.filter(pl.col("status") == "used")
    assert used.get_column("fitted").null_count() == 0
    assert written.filter(pl.col("status") != "used").get_column("fitted").null_count() == (
        N_ROWS - data.rows_used
    )
    assert f"wrote {N_ROWS:,} rows" in printed and f"{data.rows_used:,} used" in printed


def test_export_worst_ranks_every_row_by_default_and_names_a_sample(
    tmp_path: Path, small_learning_sample: None, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    path = tmp_path / "claims.parquet"
    _claims_table().write_parquet(path, row_group_size=GROUP_ROWS)
    args = ["export", str(path), "--terms", "cost ~ age + region", "--worst", "5"]
    assert main([*args, "--out", str(tmp_path / "a.csv")]) == 0
    assert "among every row" in capsys.readouterr().out
    assert main([*args, "--rows", "2000", "--out", str(tmp_path / "b.csv")]) == 0
    printed = capsys.readouterr().out
    assert "among a SAMPLE" in printed and "`--rows all` ranks every row" in printed


def test_segments_of_a_model_term_say_their_zero_is_by_construction(tmp_path: Path) -> None:
    from triage.engine.passes import run_report
    from triage.views.json import report_to_json
    from triage.views.text import render_full_report

    path = tmp_path / "claims.parquet"
    frame = _claims_table(4_000)
    frame.write_parquet(path)
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms="cost ~ age + region")
    report = run_report(source, spec, rows=ALL_ROWS, by=("region", "office"))
    # statsmodels' residuals average 0 within each region: the property the note states
    import statsmodels.formula.api as smf

    data = frame.drop_nulls("age").to_pandas()
    residuals = smf.ols("cost ~ age + C(region)", data=data).fit().resid
    assert residuals.groupby(data["region"]).mean().abs().max() < 1e-9
    text = render_full_report(report, charts=False)
    assert "`region` is a term of the model, so its mean residuals are 0 by construction" in (
        " ".join(text.split())
    )
    assert "`office` is a term" not in text
    assert report_to_json(report)["segments_zero_by_construction"] == ["region"]


# ── a transformed target ─────────────────────────────────────────────────────────────


@pytest.mark.parametrize("transform", ["log", "log1p", "sqrt"])
def test_transformed_target_matches_statsmodels_on_that_scale(
    tmp_path: Path, transform: str
) -> None:
    import statsmodels.api as sm

    from triage.views.json import fit_to_json
    from triage.views.text import render_fit_report

    frame = _claims_table(5_000)
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path)
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms=f"{transform}(cost) ~ age + month")
    assert spec.target == "cost" and spec.target_label == f"{transform}(cost)"
    outcome = fit_model(source, spec, rows=ALL_ROWS)
    data = frame.drop_nulls().to_pandas()
    scale = {"log": np.log, "log1p": np.log1p, "sqrt": np.sqrt}[transform]
    oracle = sm.OLS(scale(data["cost"]), sm.add_constant(data[["age", "month"]])).fit()
    np.testing.assert_allclose(outcome.fit.coef, oracle.params.to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(outcome.fit.resid_sd, np.sqrt(oracle.scale), rtol=1e-9)
    document = fit_to_json(outcome)
    assert document["model"]["target_transform"] == transform
    assert document["model"]["formula"].startswith(f"{transform}(cost) ~ ")
    text = " ".join(render_fit_report(outcome).split())
    assert f"the model fits {transform}(cost): residuals, fitted values" in text


def test_log_target_outside_its_domain_says_so(tmp_path: Path) -> None:
    from triage.errors import DataError

    frame = _claims_table(2_000).with_columns(
        pl.when(pl.int_range(pl.len()) == 7).then(0.0).otherwise(pl.col("cost")).alias("cost")
    )
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path)
    source = open_source(path)
    spec = build_spec(source.schema(), target=None, terms="log(cost) ~ age")
    with pytest.raises(DataError, match=r"log of a value <= 0 in `log\(cost\)` for 1 row"):
        fit_model(source, spec, rows=ALL_ROWS)
    kept = build_spec(source.schema(), target=None, terms="log(cost) ~ age", drop_invalid=True)
    assert fit_model(source, kept, rows=ALL_ROWS).data.rows_dropped_domain == 1


def test_compare_over_every_row_uses_every_level(
    tmp_path: Path, small_learning_sample: None
) -> None:
    from triage.engine.compare import compare_models

    frame = _claims_table()
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    source = open_source(path)
    specs = [
        build_spec(source.schema(), target=None, terms=terms)
        for terms in ("cost ~ age + region", "cost ~ age + region + office")
    ]
    comparison = compare_models(source, specs, ["a", "b"], rows=ALL_ROWS)
    assert comparison.data.rows_dropped_unseen_level == 0
    assert comparison.data.rows_used == frame.drop_nulls().height
    single = _fit(path).builder  # same table, one model: the same levels and reference
    builder = comparison.models[1].outcome.builder
    assert builder.levels["office"] == single.levels["office"]
    assert builder.reference_levels["region"] == single.reference_levels["region"]


def test_export_all_after_a_sample_fit_counts_rows_of_levels_the_sample_lacked(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    frame = _claims_table()
    path = tmp_path / "claims.parquet"
    frame.write_parquet(path, row_group_size=GROUP_ROWS)
    out = tmp_path / "all.parquet"
    args = ["export", str(path), "--terms", "cost ~ age + region", "--all", "--rows", "1000"]
    assert main([*args, "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    written = pl.read_parquet(out)
    assert written.height == N_ROWS
    statuses = dict(written.group_by("status").len().iter_rows())
    # a few row groups of a file sorted by region hold few regions: count those rows
    sampled = written.filter(pl.col("status") == "used").get_column("row").to_list()
    seen = set(frame[sampled].get_column("region").to_list())
    lacked = frame.filter(~pl.col("region").is_in(list(seen)) & pl.col("age").is_not_null())
    assert statuses["level not in the fit"] == lacked.height > 0
    assert f"{lacked.height:,} rows have a level the sample did not have" in printed
    assert "`--rows all` learns every level" in printed


def test_an_identifier_column_is_named_as_such_past_the_level_limit() -> None:
    from triage.core.design import DesignBuilder
    from triage.errors import SpecError

    frame = pl.DataFrame(
        {"__row": np.arange(300), "y": np.arange(300.0), "id": [f"p{i}" for i in range(300)]}
    )
    spec = build_spec(frame.schema, target="y", terms="id")
    with pytest.raises(SpecError, match=r"`id` has 300 levels in the sample.*like an identifier"):
        DesignBuilder.learn(spec, frame.schema, frame)
    codes = frame.with_columns((pl.col("__row") % 60).cast(pl.String).alias("id"))
    with pytest.raises(SpecError, match=r"has 60 levels .* raise the limit with `--max-levels`"):
        DesignBuilder.learn(spec, codes.schema, codes)


def test_a_full_pass_past_the_level_limit_counts_the_batch_before_naming_the_cause(
    tmp_path: Path,
) -> None:
    # A 60-level office code with skewed shares, every level in the first batch: the pass
    # refuses it mid-read, and the wording must come from the rows counted (3,000 rows, 60
    # levels: a code, not an identifier). It read "nearly one level per row" when the
    # refusal came before the batch's rows were counted.
    rng = np.random.default_rng(11)
    shares = 1.0 / np.arange(1, 61)
    office = rng.choice([f"o{k:02d}" for k in range(60)], size=3_000, p=shares / shares.sum())
    office[:60] = [f"o{k:02d}" for k in range(60)]
    frame = pl.DataFrame({"office": office, "x": rng.normal(size=3_000)}).with_columns(
        y=pl.col("x") * 2.0 + rng.normal(size=3_000)
    )
    path = tmp_path / "offices.parquet"
    frame.sort("office").write_parquet(path)
    result = _run_limited(["fit", str(path), "--terms", "y ~ x + office", "--rows", "all"])
    assert result.returncode == 2, result.stderr[-2000:]
    assert "`office` has at least 60 levels in the rows read" in result.stderr
    assert "raise the limit with `--max-levels`" in result.stderr
    assert "identifier" not in result.stderr


def test_max_memory_option_sets_the_guard(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    path = tmp_path / "claims.parquet"
    _claims_table(2_000).write_parquet(path)
    args = ["fit", str(path), "--terms", "cost ~ age + office"]
    assert main([*args, "--max-memory", "64K"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("triage: the design would have 31 columns (`office` has 30 levels)")
    assert "more than the limit of 64.0 KiB" in err and "--max-memory" in err
    assert main([*args, "--max-memory", "4G"]) == 0
    with pytest.raises(SystemExit, match="2"):
        main([*args, "--max-memory", "lots"])
    assert "`--max-memory` must be a size such as 4G" in capsys.readouterr().err


def test_parquet_with_no_rows_or_an_empty_target_says_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    empty = tmp_path / "empty.parquet"
    pl.DataFrame({"y": [], "x": []}, schema={"y": pl.Float64, "x": pl.Float64}).write_parquet(empty)
    no_target = tmp_path / "no_target.parquet"
    pl.DataFrame(
        {"y": [None] * 40, "x": np.arange(40.0)}, schema={"y": pl.Float64, "x": pl.Float64}
    ).write_parquet(no_target)
    assert main(["fit", str(empty), "--terms", "y ~ x", "--rows", "all"]) == 2
    assert "the data has no rows" in capsys.readouterr().err
    assert main(["fit", str(no_target), "--terms", "y ~ x"]) == 2
    assert "every value of `y` is missing (40 rows)" in capsys.readouterr().err


def test_a_thousand_level_code_fits_within_the_memory_guard(tmp_path: Path) -> None:
    # A table sorted by a 1,200-level office code with skewed shares, in small row groups:
    # the level codes keep the design's cost to counts and per-level sums, so the guard lets
    # it through at 1 GiB and the fit stays under a 1 GiB data limit.
    rng = np.random.default_rng(21)
    n, n_levels = 40_000, 1_200
    shares = 1.0 / np.arange(1, n_levels + 1) ** 0.8
    office = rng.choice(n_levels, size=n, p=shares / shares.sum())
    office[:n_levels] = np.arange(n_levels)  # every level present at least once
    x = rng.gamma(2.0, 3.0, size=n)
    y = 1.5 * x + 0.02 * office + rng.normal(size=n)
    frame = pl.DataFrame({"office": [f"o{k:04d}" for k in office], "x": x, "y": y})
    path = tmp_path / "offices.parquet"
    frame.sort("office").write_parquet(path, row_group_size=5_000)
    args = ["fit", str(path), "--terms", "y ~ x + office", "--rows", "all"]
    result = _run_limited([*args, "--max-levels", "2000", "--max-memory", "1G", "--json"])
    assert result.returncode == 0, result.stderr[-2000:]
    estimates = {c["term"]: c["estimate"] for c in json.loads(result.stdout)["coefficients"]}
    assert len(estimates) == 1 + 1 + n_levels - 1
    # Oracle: the Frisch-Waugh-Lovell theorem. With a full set of office indicators the slope
    # of x is the pooled within-office slope, computed here with pandas group means.
    table = frame.to_pandas()
    centred = table[["x", "y"]] - table.groupby("office")[["x", "y"]].transform("mean")
    slope = (centred["x"] * centred["y"]).sum() / (centred["x"] ** 2).sum()
    assert estimates["x"] == pytest.approx(slope, rel=1e-9)
