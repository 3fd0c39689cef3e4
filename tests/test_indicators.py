"""Categoricals as level codes: Gram matrices, fits and full passes against written-out oracles.

Oracles: numpy (the Gram matrix of the written-out design, `numpy.linalg.lstsq`) and
statsmodels WLS on the same usable rows of a table that looks real (skewed level shares,
missing values, weights, sorted by a code).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from tests.tables import administrative_table
from triage._typing import ALL_ROWS
from triage.core.indicators import CodedDesign, IndicatorCodes, coded_gram
from triage.core.lsq import QRAccumulator, UncertifiedGram
from triage.core.spec import build_spec
from triage.data import parquet as parquet_module
from triage.data.source import open_source
from triage.engine import passes

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
    shifted = [design.dense[0] - 5.0, design.dense[1] - 6.0, y - 4.0]
    ones = np.ones(y.size)
    block = np.column_stack([ones, *shifted])
    dense_gram = block.T @ (block * w[:, np.newaxis])
    gram = coded_gram(design, shifted, dense_gram, w)
    z = design.to_dense()
    z[:, 1] -= 5.0
    z[:, 6] -= 6.0
    z = np.column_stack([z, y - 4.0])
    np.testing.assert_allclose(gram, z.T @ (z * w[:, np.newaxis]), rtol=1e-12, atol=1e-9)


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
    n_rows = 30_000
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 5_000)
    monkeypatch.setattr(parquet_module, "PART_ROWS", 5_000)
    shares = (0.6, 0.3, 0.0997, 0.0003) if rare_reference else (0.55, 0.25, 0.12, 0.08)
    table = administrative_table(rng, n_rows, channel_shares=shares)
    path = tmp_path / "admin.parquet"
    table.write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    reference = {"channel": "desk"} if rare_reference else {}
    spec = build_spec(
        source.schema(),
        target="y",
        terms="age, log(income), region, channel, age:income",
        weights="weight",
        reference=reference,
    )
    outcome = passes.fit_model(source, spec, rows=ALL_ROWS)
    used = table.drop_nulls().to_pandas()
    exog = used[["age"]].assign(log_income=np.log(used["income"]))
    for column, ref in (("region", outcome.builder.reference_levels["region"]),):
        dummies = used[column].str.get_dummies().drop(columns=ref)
        exog = exog.join(dummies.add_prefix(f"{column}="))
    channel_ref = outcome.builder.reference_levels["channel"]
    exog = exog.join(used["channel"].str.get_dummies().drop(columns=channel_ref).add_prefix("c="))
    exog["age:income"] = used["age"] * used["income"]
    result = sm.WLS(used["y"], sm.add_constant(exog), weights=used["weight"]).fit()
    ours = dict(zip(outcome.fit.names, outcome.fit.coef, strict=True))
    ours_se = dict(zip(outcome.fit.names, outcome.fit.std_error, strict=True))
    for name, value in result.params.items():
        key = {"const": "intercept", "log_income": "log(income)"}.get(name, name)
        key = key.replace("c=", "channel=") if key.startswith("c=") else key
        assert ours[key] == pytest.approx(value, rel=RTOL, abs=1e-12)
        assert ours_se[key] == pytest.approx(result.bse[name], rel=RTOL)
    assert outcome.data.rows_used == len(used)
    assert outcome.fit.r2 == pytest.approx(result.rsquared, rel=RTOL)
