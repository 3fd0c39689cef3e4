"""Categoricals as level codes: Gram matrices, fits and full passes against written-out oracles.

Oracles: numpy (the Gram matrix of the written-out design, `numpy.linalg.lstsq`) and
statsmodels WLS on the same usable rows of a table that looks real (skewed level shares,
missing values, weights, sorted by a code).
"""

from __future__ import annotations

import pickle
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from statsmodels.stats.diagnostic import het_breuschpagan
from statsmodels.stats.outliers_influence import OLSInfluence

from tests.tables import administrative_table
from triage._typing import ALL_ROWS
from triage.core.indicators import (
    CodedDesign,
    IndicatorCodes,
    SummedBlock,
    coded_gram,
    level_grams,
)
from triage.core.lsq import QRAccumulator, UncertifiedGram
from triage.core.residual_tests import BreuschPaganAccumulator
from triage.core.spec import build_spec
from triage.data import parquet as parquet_module
from triage.data.source import open_source
from triage.engine import passes
from triage.errors import DataError, SpecError

RTOL = 1e-8


def _coded(rng: np.random.Generator, n_rows: int) -> tuple[CodedDesign, np.ndarray]:
    """Intercept, a, five-level f (reference 0), b, twelve-level g (reference 3); and y."""
    a = rng.normal(5.0, 2.0, n_rows)
    b = rng.gamma(2.0, 3.0, n_rows)
    f = rng.choice(5, n_rows, p=[0.4, 0.3, 0.15, 0.1, 0.05])
    g = rng.choice(12, n_rows, p=np.arange(12, 0, -1) / 78.0)
    design = CodedDesign(
        dense=[a, b],
        dense_positions=np.array([1, 6]),
        factors=[
            IndicatorCodes(f, np.array([-1, 2, 3, 4, 5])),
            IndicatorCodes(g, np.array([7, 8, 9, -1, 10, 11, 12, 13, 14, 15, 16, 17])),
        ],
        n_cols=18,
        has_intercept=True,
    )
    y = 1.0 + 0.5 * a - 0.2 * b + 0.3 * f + 0.1 * (g % 3) + rng.normal(size=n_rows)
    return design, y


def _rows(design: CodedDesign, rows: slice) -> CodedDesign:
    return CodedDesign(
        dense=[c[rows] for c in design.dense],
        dense_positions=design.dense_positions,
        factors=[IndicatorCodes(f.codes[rows], f.positions) for f in design.factors],
        n_cols=design.n_cols,
        has_intercept=design.has_intercept,
    )


def test_coded_gram_equals_the_written_out_product(rng: np.random.Generator) -> None:
    # Oracle: numpy's Z'WZ of the written-out design with the target appended.
    design, y = _coded(rng, 3_000)
    w = rng.uniform(0.5, 2.0, y.size)
    gram = coded_gram(design, [*design.dense, y], np.array([5.0, 6.0, 4.0]), w, np.sqrt(w))
    z = design.to_dense()
    z[:, 1] -= 5.0
    z[:, 6] -= 6.0
    z = np.column_stack([z, y - 4.0])
    np.testing.assert_allclose(gram, z.T @ (z * w[:, np.newaxis]), rtol=1e-12, atol=1e-9)


def _one_hot(codes: np.ndarray, n_levels: int) -> np.ndarray:
    return (codes[:, np.newaxis] == np.arange(n_levels)).astype(np.float64)


@pytest.mark.parametrize("has_intercept", [True, False])
def test_level_grams_equal_the_written_out_products(
    rng: np.random.Generator, has_intercept: bool
) -> None:
    # Oracle: numpy's Z'WZ of [1 | columns - shifts | one indicator per level] written out,
    # for each block's weights. Three categoricals: 5 x 12 level pairs are summed together,
    # the 400-level one alone, and its pairs with the others (over 4,096 cells) as tables.
    # Rows sorted by the first code, levels skewed, one 400-level level without rows.
    n = 6_000
    n_levels = [5, 12, 400]
    codes = [
        np.sort(rng.choice(5, n, p=[0.4, 0.3, 0.15, 0.1, 0.05])),
        rng.choice(12, n, p=np.arange(12, 0, -1) / 78.0),
        np.minimum(rng.zipf(1.3, n) - 1, 398),
    ]
    columns = [rng.gamma(2.0, 3.0, n), rng.normal(40.0, 9.0, n), rng.lognormal(1.0, 0.5, n)]
    shifts = np.array([6.0, 40.0, 3.0])
    w = rng.uniform(0.5, 2.0, n)
    hc = rng.exponential(1.0, n)
    blocks = [SummedBlock(2, hc * hc, hc), SummedBlock(3), SummedBlock(3, w)]
    grams = level_grams(codes, n_levels, columns, shifts, blocks, has_intercept=has_intercept)
    first = 0 if has_intercept else 1
    for block, gram in zip(blocks, grams, strict=True):
        k = block.n_columns
        dense = np.column_stack([np.ones(n), *columns[:k]]) - np.append(0.0, shifts[:k])
        z = np.column_stack([dense[:, first:], *map(_one_hot, codes, n_levels)])
        weights = np.ones(n) if block.row_weights is None else block.row_weights
        oracle = z.T @ (z * weights[:, np.newaxis])
        starts = np.cumsum([k + 1 - first, *n_levels])
        written = gram.assemble(
            np.arange(1, k + 1) - first,
            [np.arange(a, a + m) for a, m in zip(starts[:-1], n_levels, strict=True)],
            oracle.shape[0],
        )
        np.testing.assert_allclose(written, oracle, rtol=1e-12, atol=1e-9)


def test_breusch_pagan_from_level_sums_and_written_out_rows_matches_statsmodels(
    rng: np.random.Generator,
) -> None:
    # Oracle: statsmodels het_breuschpagan (robust=True, Koenker's form) on the written-out
    # design. Two parts: one gets coded rows as their sums by level in two batches (in the
    # shift a fit would give them), the other rows written out; the first goes through
    # pickle, as to a cluster's worker and back, before the parts merge.
    design, y = _coded(rng, 12_000)
    x = design.to_dense()
    e = (y - x @ np.linalg.lstsq(x, y, rcond=None)[0]) * (1.0 + 0.3 * (design.factors[0].codes))
    coded = BreuschPaganAccumulator(18, has_intercept=True, unshifted=design.indicator_positions())
    shift = np.array([5.0, 6.0, float(np.mean(e * e))])
    for rows in (slice(0, 3_000), slice(3_000, 8_000)):
        part = _rows(design, rows)
        (sums,) = level_grams(
            [f.codes for f in part.factors],
            [f.n_levels for f in part.factors],
            [*part.dense, e[rows] ** 2],
            shift,
            [SummedBlock(3)],
            has_intercept=True,
        )
        coded.add_coded(part, sums, shift)
    written = BreuschPaganAccumulator(18, has_intercept=True)
    written.update(x[8_000:], e[8_000:])
    merged = pickle.loads(pickle.dumps(coded))
    merged.merge(written)
    lm, p_value, _, _ = het_breuschpagan(e, x, robust=True)
    test = merged.finalize()
    assert test.statistic == pytest.approx(lm, rel=1e-9)
    assert test.p_value == pytest.approx(p_value, rel=1e-6)


@pytest.mark.parametrize("weighted", [False, True])
def test_coded_fit_in_merged_parts_matches_lstsq(rng: np.random.Generator, weighted: bool) -> None:
    # Oracle: numpy.linalg.lstsq on the written-out, weighted design. The parts take their
    # shifts from their own first batch, so the merge moves Gram matrices between shifts.
    design, y = _coded(rng, 20_000)
    w = rng.uniform(0.5, 2.0, y.size) if weighted else None
    unshifted = design.indicator_positions()
    parts = []
    for rows in (slice(0, 3_000), slice(3_000, 11_000), slice(11_000, None)):
        part = QRAccumulator(18, has_intercept=True, unshifted=unshifted)
        assert part.update_coded(_rows(design, rows), y[rows], None if w is None else w[rows])
        parts.append(part)
    accumulator = parts[0].merge(parts[1]).merge(parts[2])
    fit = accumulator.finalize([f"c{j}" for j in range(18)])
    root = np.ones(y.size) if w is None else np.sqrt(w)
    x = design.to_dense()
    oracle = np.linalg.lstsq(x * root[:, np.newaxis], y * root, rcond=None)[0]
    np.testing.assert_allclose(fit.coef, oracle, rtol=1e-10)
    dense = QRAccumulator(18, has_intercept=True)
    dense.update(x, y, w)
    written_out = dense.finalize([f"c{j}" for j in range(18)])
    np.testing.assert_allclose(fit.std_error, written_out.std_error, rtol=1e-12)
    assert fit.rss == pytest.approx(written_out.rss, rel=1e-12)


@pytest.mark.parametrize(("n_dense", "n_factors"), [(2, 0), (2, 1), (0, 2), (2, 3), (1, 3)])
@pytest.mark.parametrize("weighted", [False, True])
def test_coded_fitted_and_hat_values_match_statsmodels(
    rng: np.random.Generator, n_dense: int, n_factors: int, weighted: bool
) -> None:
    # Oracle: statsmodels' fitted values (WLS) and OLSInfluence hat values of the whitened
    # written-out design. Every count of categoricals takes its own path through the folded
    # tables (none, one, two and three or more), with and without dense columns.
    n_rows = 4_000
    dense = [rng.normal(5.0, 2.0, n_rows), rng.gamma(2.0, 3.0, n_rows)][:n_dense]
    sizes, references = [5, 12, 30][:n_factors], [0, 3, 29]
    factors, column = [], 1 + n_dense
    for size, reference in zip(sizes, references, strict=False):
        codes = rng.choice(size, n_rows, p=np.arange(size, 0, -1) / (size * (size + 1) / 2))
        positions = np.full(size, -1)
        others = [level for level in range(size) if level != reference]
        positions[others] = np.arange(column, column + size - 1)
        column += size - 1
        factors.append(IndicatorCodes(codes, positions))
    design = CodedDesign(
        dense=dense,
        dense_positions=np.arange(1, 1 + n_dense),
        factors=factors,
        n_cols=column,
        has_intercept=True,
    )
    x = design.to_dense()
    y = x @ rng.normal(size=column) + rng.normal(size=n_rows)
    w = rng.uniform(0.5, 2.0, n_rows) if weighted else None
    unshifted = design.indicator_positions() if factors else []
    accumulator = QRAccumulator(column, has_intercept=True, unshifted=unshifted)
    accumulator.update_coded(design, y, w)
    fit = accumulator.finalize([f"c{j}" for j in range(column)])
    root = np.ones(n_rows) if w is None else np.sqrt(w)
    oracle = sm.WLS(y, x, weights=root**2).fit()
    hat = OLSInfluence(sm.OLS(y * root, x * root[:, np.newaxis]).fit()).hat_matrix_diag
    shifted, fitted, leverage = fit.fitted_and_leverage_coded(design, w)
    np.testing.assert_allclose(fitted, oracle.fittedvalues, rtol=1e-10)
    np.testing.assert_allclose(leverage, hat, rtol=1e-9)
    assert np.array_equal(fitted, fit.predict_coded(design))
    assert np.array_equal(leverage, fit.leverage_coded(design, w))
    want = x[:, 1 : 1 + n_dense] - fit.column_shift[1 : 1 + n_dense]
    assert np.array_equal(shifted, want)


def test_coded_fit_reports_a_level_without_rows_as_aliased(rng: np.random.Generator) -> None:
    # Oracle: the level's column is zero, so no coefficient can be estimated for it.
    design, y = _coded(rng, 5_000)
    codes = design.factors[1].codes.copy()
    codes[codes == 5] = 6  # level 5 (design column 11) has no row left
    design = CodedDesign(
        design.dense,
        design.dense_positions,
        [design.factors[0], IndicatorCodes(codes, design.factors[1].positions)],
        design.n_cols,
        design.has_intercept,
    )
    accumulator = QRAccumulator(18, has_intercept=True, unshifted=design.indicator_positions())
    assert accumulator.update_coded(design, y)
    fit = accumulator.finalize([f"c{j}" for j in range(18)])
    assert fit.aliased == ("c11",)
    assert fit.no_rows == ("c11",)  # no rows left, not a combination of other columns


def test_coded_fit_refuses_an_uncertified_gram(rng: np.random.Generator) -> None:
    # A reference level held by 3 rows in 20,000: indicators nearly sum to the intercept,
    # so the equilibrated condition number is far above what the Gram matrix may certify.
    design, y = _coded(rng, 20_000)
    codes = np.where(rng.random(y.size) < 0.5, 1, 2)
    codes[:3] = 0
    rare = IndicatorCodes(codes, np.array([-1, 2, 3, 4, 5]))
    design = CodedDesign(
        design.dense,
        design.dense_positions,
        [rare, design.factors[1]],
        design.n_cols,
        design.has_intercept,
    )
    accumulator = QRAccumulator(18, has_intercept=True, unshifted=design.indicator_positions())
    assert accumulator.update_coded(design, y)
    with pytest.raises(UncertifiedGram):
        accumulator.finalize([f"c{j}" for j in range(18)])
    # The same design's Breusch-Pagan from level sums: its auxiliary regression refuses too
    # (pass 2 then runs again with the indicators written out).
    (sums,) = level_grams(
        [f.codes for f in design.factors],
        [f.n_levels for f in design.factors],
        [*design.dense, y * y],
        np.zeros(3),
        [SummedBlock(3)],
        has_intercept=True,
    )
    test = BreuschPaganAccumulator(18, has_intercept=True)
    test.add_coded(design, sums, np.zeros(3))
    with pytest.raises(UncertifiedGram):
        test.finalize()


def _statsmodels_wls(table: pl.DataFrame, references: dict[str, str]) -> tuple[Any, list[str]]:
    """statsmodels WLS of the test model on the usable rows, and our name of each parameter."""
    used = table.drop_nulls().to_pandas()
    exog = used[["age"]].assign(**{"log(income)": np.log(used["income"])})
    for column in ("region", "channel"):
        dummies = used[column].str.get_dummies().drop(columns=references[column])
        exog = exog.join(dummies.add_prefix(f"{column}="))
    exog["age:income"] = used["age"] * used["income"]
    exog = sm.add_constant(exog).rename(columns={"const": "intercept"})
    result = sm.WLS(used["y"], exog, weights=used["weight"]).fit()
    return result, list(exog.columns)


def _full_pass_source(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch, shares: tuple
) -> tuple[pl.DataFrame, Any]:
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 5_000)
    monkeypatch.setattr(parquet_module, "PART_ROWS", 5_000)
    table = administrative_table(rng, 30_000, channel_shares=shares)
    path = tmp_path / "admin.parquet"
    table.write_parquet(path, row_group_size=2_500)
    return table, open_source(path)


TERMS = "age, log(income), region, channel, age:income"


@pytest.mark.parametrize("rare_reference", [False, True])
def test_full_pass_with_codes_matches_statsmodels(
    tmp_path: Path,
    rng: np.random.Generator,
    monkeypatch: pytest.MonkeyPatch,
    rare_reference: bool,
) -> None:
    # Oracle: statsmodels WLS on the usable rows with pandas-made dummies. With a rare
    # reference level (named by the user) the counts cannot certify the factor and the
    # pass runs again with the indicators written out: the answer must not change.
    shares = (0.6, 0.3, 0.0997, 0.0003) if rare_reference else (0.55, 0.25, 0.12, 0.08)
    table, source = _full_pass_source(tmp_path, rng, monkeypatch, shares)
    reference = {"channel": "desk"} if rare_reference else {}
    spec = build_spec(
        source.schema(), target="y", terms=TERMS, weights="weight", reference=reference
    )
    outcome = passes.fit_model(source, spec, rows=ALL_ROWS)
    result, names = _statsmodels_wls(table, dict(outcome.builder.reference_levels))
    assert list(outcome.fit.names) == names
    # Coefficients: numpy's Householder QR of the whitened design with columns scaled to
    # unit norm. statsmodels' pinv of the unscaled design is 1e-7 off on age:income (about
    # -7e-9, beside columns near 1), so it is the oracle of everything else.
    whitened = result.model.wexog
    scale = np.linalg.norm(whitened, axis=0)
    q, r = np.linalg.qr(whitened / scale)
    oracle = np.linalg.solve(r, q.T @ result.model.wendog) / scale
    np.testing.assert_allclose(outcome.fit.coef, oracle, rtol=1e-10)
    np.testing.assert_allclose(outcome.fit.coef[:-1], result.params.iloc[:-1], rtol=RTOL)
    np.testing.assert_allclose(outcome.fit.std_error, result.bse, rtol=RTOL)
    assert outcome.data.rows_used == result.nobs
    assert outcome.fit.r2 == pytest.approx(result.rsquared, rel=RTOL)


def test_report_with_codes_matches_statsmodels(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Oracle: statsmodels WLS results (HC0-HC3 standard errors; Breusch-Pagan in Koenker's
    # form on the weighted residuals and unweighted design; RESET as the Wald F of a WLS refit
    # with the squared and cubed fitted values; hat values and Cook's distances of the
    # whitened regression, OLSInfluence) on the same usable rows.
    from statsmodels.stats.outliers_influence import OLSInfluence

    table, source = _full_pass_source(tmp_path, rng, monkeypatch, (0.55, 0.25, 0.12, 0.08))
    spec = build_spec(source.schema(), target="y", terms=TERMS, weights="weight")
    report = passes.run_report(source, spec, rows=ALL_ROWS, by=("region",), top_k=5)
    diagnostics = report.diagnostics
    result, names = _statsmodels_wls(table, dict(report.outcome.builder.reference_levels))
    for kind in ("hc0", "hc1", "hc2", "hc3"):
        ours = [getattr(diagnostics.robust_se[name], kind) for name in names]
        np.testing.assert_allclose(ours, getattr(result, kind.upper() + "_se"), rtol=RTOL)
    lm, _, _, _ = het_breuschpagan(result.wresid, result.model.exog, robust=True)
    assert diagnostics.tests["breusch_pagan"].statistic == pytest.approx(lm, rel=RTOL)
    exog = result.model.exog
    augmented = np.column_stack([exog, result.fittedvalues**2, result.fittedvalues**3])
    n_exog = exog.shape[1]
    reset = (
        sm.WLS(result.model.endog, augmented, weights=result.model.weights)
        .fit()
        .wald_test(np.eye(2, n_exog + 2, k=n_exog), use_f=True, scalar=True)
    )
    assert diagnostics.tests["reset"].statistic == pytest.approx(float(reset.fvalue), rel=1e-7)
    # Hat values from statsmodels' OLSInfluence of the whitened regression; residuals from
    # the equilibrated Householder QR (as in the fit test: statsmodels' own are 1e-7 off on
    # rows with small residuals); Cook's distance e² h / (k s² (1 - h)²) from those.
    whitened, wendog = result.model.wexog, result.model.wendog
    hat = OLSInfluence(sm.OLS(wendog, whitened).fit()).hat_matrix_diag
    scale = np.linalg.norm(whitened, axis=0)
    q, r = np.linalg.qr(whitened / scale)
    resid = wendog - whitened @ (np.linalg.solve(r, q.T @ wendog) / scale)
    k = whitened.shape[1]
    s2 = resid @ resid / (resid.size - k)
    cooks = resid**2 * hat / (k * s2 * (1.0 - hat) ** 2)
    positions = table.with_row_index("row").drop_nulls()["row"].to_numpy()
    by_row = dict(zip(positions, range(positions.size), strict=True))
    for row in diagnostics.worst["leverage"] + diagnostics.worst["cooks"]:
        i = by_row[row.row]
        assert row.leverage == pytest.approx(hat[i], rel=RTOL)
        assert row.cooks == pytest.approx(cooks[i], rel=RTOL)
        assert row.weighted_resid == pytest.approx(resid[i], rel=RTOL)


def test_full_pass_finds_every_level_as_it_reads(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Oracles: polars' group_by counts of each level over the rows under the filter (rows
    # the user marks included) with the reference rule (most rows, ties to the first in
    # natural order), and statsmodels WLS on the usable, unmarked rows. The pass finds the
    # levels as it reads, in parts of 2,500 rows: `kiosk` appears in the last part only,
    # `fax` only in rows without a target, `stall` only in rows the user marks.
    from triage.engine.workers import set_pass_workers

    monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
    table = administrative_table(rng, 30_000)
    n = table.height
    channel = table["channel"].to_list()
    y = table["y"].to_list()
    weight = table["weight"].to_list()
    for i in range(n - 40, n):
        channel[i] = "kiosk"
    for i in range(100, 104):
        channel[i], y[i] = "fax", None
    marked = list(range(5_000, 5_003))
    for i in marked:
        channel[i], weight[i] = "stall", 1.5
    table = table.with_columns(
        pl.Series("channel", channel), pl.Series("y", y), pl.Series("weight", weight)
    )
    path = tmp_path / "admin.parquet"
    table.write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    spec = build_spec(
        source.schema(), target="y", terms=TERMS, weights="weight", where="weight > 0.6"
    )
    fits = {}
    try:
        for n_workers in (1, 2, 8):
            set_pass_workers(n_workers)
            # a position past the end of the file marks no row
            fits[n_workers] = passes.fit_model(
                source, spec, rows=ALL_ROWS, exclude_rows=[*marked, 10**9]
            )
    finally:
        set_pass_workers(None)
    outcome = fits[1]
    for other in (fits[2], fits[8]):
        assert np.array_equal(other.fit.coef, outcome.fit.coef, equal_nan=True)
        assert np.array_equal(other.fit.std_error, outcome.fit.std_error, equal_nan=True)
    under_filter = table.filter(pl.col("weight") > 0.6)
    for column in ("region", "channel"):
        counted = under_filter.drop_nulls(column).group_by(column).len().sort(column)
        found = outcome.builder.level_tables[column]
        assert found.levels == tuple(counted[column].to_list())
        assert found.counts == tuple(counted["len"].to_list())
        most = counted.sort("len", descending=True, maintain_order=True)[column][0]
        assert outcome.builder.reference_levels[column] == most
    assert set(outcome.fit.aliased) == {"channel=fax", "channel=stall"}
    used = (
        table.with_row_index("row")
        .filter((pl.col("weight") > 0.6) & ~pl.col("row").is_in(marked))
        .drop("row")
    )
    result, names = _statsmodels_wls(used, dict(outcome.builder.reference_levels))
    kept = [outcome.fit.names.index(name) for name in names]
    np.testing.assert_allclose(outcome.fit.coef[kept[:-1]], result.params.iloc[:-1], rtol=RTOL)
    np.testing.assert_allclose(outcome.fit.std_error[kept], result.bse, rtol=RTOL)
    assert outcome.data.rows_used == result.nobs
    assert outcome.data.rows_excluded == len(marked)


@pytest.mark.parametrize(
    ("limits", "raised", "says"),
    [
        ({"max_levels": 50}, SpecError, "at least 2,500 levels in the rows read"),
        ({"max_memory": 2**20}, DataError, "the design would have at least"),
    ],
)
def test_full_pass_refuses_a_column_of_too_many_levels_as_soon_as_it_finds_them(
    tmp_path: Path,
    rng: np.random.Generator,
    monkeypatch: pytest.MonkeyPatch,
    limits: dict[str, int],
    raised: type[Exception],
    says: str,
) -> None:
    # A column of case numbers (one per row) put in as a categorical: the pass stops in
    # its first part (2,500 rows) instead of counting every level of the file first.
    monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
    table = administrative_table(rng, 20_000).with_columns(
        (pl.lit("C") + pl.int_range(pl.len()).cast(pl.String)).alias("case")
    )
    path = tmp_path / "admin.parquet"
    table.write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    spec = build_spec(
        source.schema(), target="y", terms="age, region, case", categorical=["case"], **limits
    )
    with pytest.raises(raised, match=says):
        passes.fit_model(source, spec, rows=ALL_ROWS)


def test_importing_the_engine_leaves_scipy_for_the_first_level_sums() -> None:
    # scipy.sparse costs about 0.12 CPU-s to import: a command without categoricals must not
    # pay it, so the level sums import it on first use (checked in a fresh interpreter).
    code = (
        "import sys, numpy as np, triage.engine.passes; "
        "assert 'scipy.sparse' not in sys.modules; "
        "from triage.core.indicators import SummedBlock, level_grams; "
        "level_grams([np.array([0, 1, 1])], [2], [np.ones(3)], np.zeros(1), [SummedBlock(1)], "
        "has_intercept=True); "
        "assert 'scipy.sparse' in sys.modules"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
