"""Tests of the demo scenario generator and `triage sample`.

The planted structure is checked with outside oracles: statsmodels OLS and
`het_breuschpagan`, numpy's QR for hat values, polars and pyarrow for the written files.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pyarrow.parquet as pq
import pytest
import statsmodels.formula.api as smf
from statsmodels.stats.diagnostic import het_breuschpagan

from triage.cli.commands import sample as sample_command
from triage.data.scenario import (
    BIASED_DEPOT,
    DEPOT_BIAS_MINUTES,
    FIRST_DELIVERY_ID,
    GROSS_ERRORS_PER_100K,
    LEVERAGE_PER_100K,
    MISSING_SHARE,
    PLANTED,
    SCENARIO_COLUMNS,
    SCENARIO_SCHEMA,
    expected_minutes,
    iter_scenario,
    planted_positions,
    write_scenario,
)
from triage.errors import DataError, ExportError

N_ROWS = 20_000
SEED = 7
REPO = Path(__file__).resolve().parents[1]


def read_all(n_rows: int, *, seed: int, block_rows: int) -> pl.DataFrame:
    return pl.concat(list(iter_scenario(n_rows, seed=seed, block_rows=block_rows)))


@pytest.fixture(scope="module")
def frame() -> pl.DataFrame:
    return read_all(N_ROWS, seed=SEED, block_rows=4_096).with_row_index("pos")


@pytest.fixture(scope="module")
def clean(frame: pl.DataFrame) -> pd.DataFrame:
    """Rows without missing values and without the planted gross errors and long-haul rows."""
    planted = planted_positions(N_ROWS, seed=SEED)
    skip = np.concatenate([planted.gross_errors, planted.leverage]).tolist()
    return frame.drop_nulls().filter(~pl.col("pos").is_in(skip)).to_pandas()


def test_scenario_schema_and_ids(frame: pl.DataFrame) -> None:
    assert frame.height == N_ROWS
    assert frame.drop("pos").schema == SCENARIO_SCHEMA
    assert tuple(frame.drop("pos").columns) == SCENARIO_COLUMNS
    ids = frame["delivery_id"].to_numpy()
    np.testing.assert_array_equal(ids, FIRST_DELIVERY_ID + np.arange(N_ROWS))
    assert frame["hour"].min() == 7
    assert frame["hour"].max() == 20


@pytest.mark.parametrize("block_rows", [1, 999, 65_536, 100_000])
def test_scenario_independent_of_block_size(block_rows: int) -> None:
    n_rows = 70_001 if block_rows > 1 else 1_500  # crosses a logical block boundary
    reference = read_all(n_rows, seed=3, block_rows=4_096)
    other = read_all(n_rows, seed=3, block_rows=block_rows)
    assert other.equals(reference)


def test_scenario_chunk_sizes() -> None:
    sizes = [chunk.height for chunk in iter_scenario(10_001, seed=0, block_rows=3_000)]
    assert sizes == [3_000, 3_000, 3_000, 1_001]


def test_scenario_seed_changes_rows(frame: pl.DataFrame) -> None:
    again = read_all(N_ROWS, seed=SEED, block_rows=N_ROWS)
    assert again.equals(frame.drop("pos"))
    other = read_all(N_ROWS, seed=SEED + 1, block_rows=N_ROWS)
    assert not other["minutes"].equals(frame["minutes"])


def test_scenario_planted_positions_spread_and_disjoint() -> None:
    n_rows = 200_000
    planted = planted_positions(n_rows, seed=SEED)
    errors, leverage = planted.gross_errors, planted.leverage
    assert errors.size == round(n_rows * GROSS_ERRORS_PER_100K / 100_000)
    assert leverage.size == round(n_rows * LEVERAGE_PER_100K / 100_000)
    assert np.all(np.diff(errors) > 0)
    assert np.all(np.diff(leverage) > 0)
    assert not set(errors.tolist()) & set(leverage.tolist())
    both = np.sort(np.concatenate([errors, leverage]))
    assert both[0] >= 0
    assert both[-1] < n_rows
    # one planted row per stretch of n_rows / k rows: some sit in the last stretch
    assert both[-1] >= n_rows - n_rows // both.size
    again = planted_positions(n_rows, seed=SEED)
    np.testing.assert_array_equal(again.gross_errors, errors)
    assert not np.array_equal(planted_positions(n_rows, seed=SEED + 1).gross_errors, errors)


def test_scenario_rejects_bad_sizes() -> None:
    with pytest.raises(DataError, match="`n_rows` must be a positive integer"):
        planted_positions(0)
    with pytest.raises(DataError, match="`seed` must be a non-negative integer"):
        next(iter_scenario(10, seed=-1))
    with pytest.raises(DataError, match="`block_rows`"):
        next(iter_scenario(10, block_rows=0))


def test_scenario_depot_bias(clean: pd.DataFrame) -> None:
    # statsmodels OLS (HC3 errors, as the noise grows with the mean) on the true form
    model = smf.ols(
        "minutes ~ stops + weight_kg + np.expm1(-distance_km / 25) + distance_km"
        " + C(vehicle) + C(depot, Treatment('north'))",
        clean,
    ).fit(cov_type="HC3")
    name = f"C(depot, Treatment('north'))[T.{BIASED_DEPOT}]"
    low, high = model.conf_int(alpha=0.001).loc[name]
    assert low < DEPOT_BIAS_MINUTES < high
    assert model.pvalues[name] < 1e-8
    for other in ("south", "west", "harbour"):
        assert abs(model.tvalues[f"C(depot, Treatment('north'))[T.{other}]"]) < 4


def test_scenario_distance_is_curved(clean: pd.DataFrame) -> None:
    # statsmodels OLS: a squared distance term is needed, with a negative (saturating) sign
    model = smf.ols(
        "minutes ~ distance_km + I(distance_km ** 2) + stops + weight_kg + C(vehicle) + C(depot)",
        clean,
    ).fit(cov_type="HC3")
    assert model.params["I(distance_km ** 2)"] < 0
    assert model.pvalues["I(distance_km ** 2)"] < 1e-10


def test_scenario_spread_grows_with_fit(clean: pd.DataFrame) -> None:
    model = smf.ols(
        "minutes ~ distance_km + stops + weight_kg + C(vehicle) + C(depot)", clean
    ).fit()
    # Breusch-Pagan (statsmodels het_breuschpagan, studentized form) rejects constant spread
    _, lm_p, _, _ = het_breuschpagan(model.resid, model.model.exog)
    assert lm_p < 1e-10
    fitted = model.fittedvalues.to_numpy()
    resid = model.resid.to_numpy()
    low = resid[fitted < np.quantile(fitted, 0.2)].std()
    high = resid[fitted > np.quantile(fitted, 0.8)].std()
    assert high > 1.5 * low


def test_scenario_gross_errors_have_largest_residuals(frame: pl.DataFrame) -> None:
    planted = planted_positions(N_ROWS, seed=SEED)
    rows = frame.drop_nulls()
    assert rows["pos"].is_in(planted.gross_errors.tolist()).sum() == planted.gross_errors.size
    # numpy lstsq of the straight-line model on every complete row
    x = np.column_stack(
        [np.ones(rows.height)]
        + [rows[c].cast(pl.Float64).to_numpy() for c in ("distance_km", "stops", "weight_kg")]
    )
    y = rows["minutes"].to_numpy()
    coef, *_ = np.linalg.lstsq(x, y, rcond=None)
    resid = y - x @ coef
    k = planted.gross_errors.size
    top = rows["pos"].to_numpy()[np.argsort(-np.abs(resid))[:k]]
    assert set(top.tolist()) == set(planted.gross_errors.tolist())
    # the recorded value is the true one in seconds: about 60 times the expected minutes
    ratio = frame[planted.gross_errors.tolist()]["minutes"].to_numpy() / expected_minutes(
        frame[planted.gross_errors.tolist()]
    )
    assert np.all((ratio > 20) & (ratio < 180))


def test_scenario_long_haul_rows_have_top_leverage(frame: pl.DataFrame) -> None:
    planted = planted_positions(N_ROWS, seed=SEED)
    rows = frame.drop_nulls()
    x = np.column_stack(
        [np.ones(rows.height)]
        + [rows[c].cast(pl.Float64).to_numpy() for c in ("distance_km", "stops", "weight_kg")]
    )
    # hat values as squared row norms of Q from numpy's QR (oracle)
    q, _ = np.linalg.qr(x)
    hat = np.sum(q * q, axis=1)
    k = planted.leverage.size
    top = rows["pos"].to_numpy()[np.argsort(-hat)[:k]]
    assert set(top.tolist()) == set(planted.leverage.tolist())
    # 3p/n cut-off for a high-leverage row: common practice
    assert np.all(hat[np.argsort(-hat)[:k]] > 3 * x.shape[1] / rows.height)
    # the rows are genuine: within 5 noise SDs of the true model
    long_haul = frame[planted.leverage.tolist()]
    mean = expected_minutes(long_haul)
    z = (long_haul["minutes"].to_numpy() - mean) / (1 + 0.12 * mean)
    assert np.all(np.abs(z) < 5)
    assert set(long_haul["vehicle"].to_list()) == {"truck"}


def test_scenario_rare_level_and_missing_share(frame: pl.DataFrame) -> None:
    shares = frame["depot"].value_counts(normalize=True)
    airport = shares.filter(pl.col("depot") == "airport")["proportion"].item()
    assert 0.001 < airport < 0.01
    assert shares["proportion"].min() == airport
    # binomial SD of the share at 20k rows is about 0.0005; allow 4 SDs
    for column in ("distance_km", "weight_kg"):
        share = frame[column].null_count() / frame.height
        assert abs(share - MISSING_SHARE) < 0.002
    planted = planted_positions(N_ROWS, seed=SEED)
    planted_rows = frame[np.concatenate([planted.gross_errors, planted.leverage]).tolist()]
    assert planted_rows.null_count().sum_horizontal().item() == 0


def test_write_scenario_parquet_and_csv_hold_same_rows(tmp_path: Path) -> None:
    n_rows = 5_000
    expected = read_all(n_rows, seed=1, block_rows=n_rows)
    progress: list[tuple[int, int]] = []
    parquet = write_scenario(
        tmp_path / "d.parquet",
        n_rows=n_rows,
        seed=1,
        row_group_rows=2_000,
        on_progress=lambda done, total: progress.append((done, total)),
    )
    csv = write_scenario(tmp_path / "d.csv", n_rows=n_rows, seed=1, row_group_rows=1_500)
    assert progress == [(2_000, n_rows), (4_000, n_rows), (5_000, n_rows)]
    # polars and pyarrow read the files back (oracles for the written bytes)
    from_parquet = pl.read_parquet(parquet)
    from_csv = pl.read_csv(csv, schema=SCENARIO_SCHEMA)
    assert from_parquet.equals(expected)
    assert from_csv.equals(expected)
    metadata = pq.ParquetFile(parquet).metadata
    assert [metadata.row_group(i).num_rows for i in range(metadata.num_row_groups)] == [
        2_000,
        2_000,
        1_000,
    ]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.csv", "d.parquet"]


def test_write_scenario_refuses_to_overwrite(tmp_path: Path) -> None:
    target = tmp_path / "d.parquet"
    target.write_bytes(b"keep me")
    with pytest.raises(ExportError, match="already exists"):
        write_scenario(target, n_rows=100)
    assert target.read_bytes() == b"keep me"
    write_scenario(target, n_rows=100, force=True)
    assert pl.read_parquet(target).height == 100
    assert [p.name for p in tmp_path.iterdir()] == ["d.parquet"]


def test_write_scenario_rejects_bad_targets(tmp_path: Path) -> None:
    with pytest.raises(ExportError, match=r"\.parquet"):
        write_scenario(tmp_path / "d.txt", n_rows=10)
    with pytest.raises(ExportError, match="does not exist"):
        write_scenario(tmp_path / "missing" / "d.csv", n_rows=10)
    with pytest.raises(DataError, match="`row_group_rows`"):
        write_scenario(tmp_path / "d.csv", n_rows=10, row_group_rows=0)
    assert list(tmp_path.iterdir()) == []


def test_write_scenario_leaves_no_file_when_stopped(tmp_path: Path) -> None:
    def stop(done: int, total: int) -> None:
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        write_scenario(tmp_path / "d.parquet", n_rows=3_000, row_group_rows=1_000, on_progress=stop)
    assert list(tmp_path.iterdir()) == []


def make_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="triage")
    sample_command.register(parser.add_subparsers(dest="command"))
    return parser


def test_sample_command_writes_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo.csv"
    args = make_parser().parse_args(["sample", "--rows", "2_500", "--out", str(out), "--seed", "4"])
    assert args.handler(args) == 0
    assert pl.read_csv(out, schema=SCENARIO_SCHEMA).equals(
        read_all(2_500, seed=4, block_rows=2_500)
    )
    printed = capsys.readouterr().out.strip().splitlines()
    assert len(printed) == 1
    assert "2,500" in printed[0]
    assert str(out) in printed[0]
    with pytest.raises(ExportError, match="--force"):
        args.handler(args)
    forced = make_parser().parse_args(["sample", "--out", str(out), "--rows", "10", "--force"])
    assert forced.handler(forced) == 0
    assert pl.read_csv(out).height == 10


@pytest.mark.parametrize("argv", [["--rows", "0"], ["--rows", "many"], ["--seed", "-2"]])
def test_sample_command_rejects_bad_options(tmp_path: Path, argv: list[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        make_parser().parse_args(["sample", "--out", str(tmp_path / "x.csv"), *argv])
    assert exit_info.value.code == 2


def test_sample_command_imports_only_stdlib() -> None:
    code = (
        "import sys, triage.cli.commands.sample; "
        "print(sorted({'polars', 'numpy', 'pyarrow', 'textual'} & set(sys.modules)))"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert result.stdout.strip() == "[]"


def test_bundled_demo_matches_generator() -> None:
    bundled = pl.read_parquet(REPO / "sample_parquet" / "deliveries.parquet")
    assert bundled.equals(read_all(100_000, seed=0, block_rows=100_000))


def test_bundled_readme_lists_every_planted_problem() -> None:
    readme = (REPO / "sample_parquet" / "README.md").read_text(encoding="utf-8")
    for problem in PLANTED:
        assert f"`{problem.name}`" in readme
    for column in SCENARIO_COLUMNS:
        assert f"`{column}`" in readme
    assert "triage sample --rows 100000 --seed 0" in readme
