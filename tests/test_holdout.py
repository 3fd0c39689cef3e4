"""Held-out split and scoring: checked against numpy on the held-out rows and scikit-learn."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from triage.core.holdout import (
    HoldoutAccumulator,
    HoldoutRule,
    cut_holdout_mask,
    kfold_rmse,
    kfold_test_rows,
    random_holdout_mask,
)
from triage.data.base import random_keys
from triage.errors import DataError, SpecError


def _design(rng: np.random.Generator, n: int, *, offset: float = 0.0) -> tuple[np.ndarray, ...]:
    x = np.column_stack([np.ones(n), rng.normal(offset, 3.0, n), rng.uniform(0, 10, n)])
    y = 2.0 + 0.5 * x[:, 1] - 1.5 * x[:, 2] + rng.normal(0, 1.0, n)
    return x, y


def _numpy_score(x, y, coef, w=None):
    """Held-out SSE, R² and RMSE computed directly with numpy (the oracle)."""
    w = np.ones(y.size) if w is None else w
    resid = y - x @ coef
    sse = float(np.sum(w * resid**2))
    mean = np.sum(w * y) / np.sum(w)
    sst = float(np.sum(w * (y - mean) ** 2))
    return sse, 1 - sse / sst, np.sqrt(sse / np.sum(w))


@pytest.mark.parametrize("weighted", [False, True])
def test_holdout_scoring_in_many_batches_equals_numpy(rng, weighted):
    x, y = _design(rng, 5_000, offset=1e4)
    w = rng.uniform(0.5, 2.0, y.size) if weighted else None
    coef = np.array([2.1, 0.49, -1.4])
    acc = HoldoutAccumulator(3)
    for start in range(0, y.size, 333):
        sl = slice(start, start + 333)
        acc.update(x[sl], y[sl], None if w is None else w[sl])
    score = acc.score(coef)
    sse, r2, rmse = _numpy_score(x, y, coef, w)
    # Oracle: numpy residuals on the same rows.
    assert score.n == y.size
    assert score.sse == pytest.approx(sse, rel=1e-9)
    assert score.r2 == pytest.approx(r2, rel=1e-9)
    assert score.rmse == pytest.approx(rmse, rel=1e-9)


def test_holdout_two_halves_merged_equal_one_pass(rng):
    x, y = _design(rng, 2_000)
    coef = np.array([1.0, 0.4, -1.2])
    whole = HoldoutAccumulator(3)
    whole.update(x, y)
    first, second = HoldoutAccumulator(3), HoldoutAccumulator(3)
    # Each half takes its own first-batch shift, so the merge must move one into the other.
    first.update(x[:700], y[:700])
    second.update(x[700:][::-1], y[700:][::-1])
    merged = first.merge(second).score(coef)
    # Oracle: numpy on all rows.
    sse, r2, _ = _numpy_score(x, y, coef)
    assert merged.sse == pytest.approx(sse, rel=1e-10)
    assert merged.r2 == pytest.approx(whole.score(coef).r2, rel=1e-12)
    assert merged.r2 == pytest.approx(r2, rel=1e-10)


@pytest.mark.parametrize("n_batches", [1, 7])
def test_holdout_scoring_without_intercept_column_equals_numpy(rng, n_batches):
    # A design with no intercept column: the held-out R² is still about the held-out mean.
    x, y = _design(rng, 1_400, offset=50.0)
    x = x[:, 1:]
    coef = np.array([0.52, -1.45])
    acc = HoldoutAccumulator(2)
    for rows in np.array_split(np.arange(y.size), n_batches):
        acc.update(x[rows], y[rows])
    score = acc.score(coef)
    # Oracle: numpy residuals on the same rows.
    sse, r2, rmse = _numpy_score(x, y, coef)
    assert score.n == y.size
    assert score.sse == pytest.approx(sse, rel=1e-10)
    assert score.r2 == pytest.approx(r2, rel=1e-10)
    assert score.rmse == pytest.approx(rmse, rel=1e-10)


def test_holdout_rejects_bad_rows(rng):
    x, y = _design(rng, 50)
    acc = HoldoutAccumulator(3)
    with pytest.raises(DataError, match="held-out rows must be"):
        acc.update(x[:, :2], y)
    bad = y.copy()
    bad[3] = np.nan
    with pytest.raises(DataError, match="NaN or infinite"):
        acc.update(x, bad)
    with pytest.raises(SpecError, match="cannot merge held-out rows"):
        acc.merge(HoldoutAccumulator(2))
    # A rejected batch leaves the accumulator empty.
    assert acc.n_rows == 0


def test_holdout_score_treats_aliased_nan_as_zero(rng):
    x, y = _design(rng, 100)
    acc = HoldoutAccumulator(3)
    acc.update(x, y)
    coef = np.array([1.0, np.nan, 0.3])
    # Oracle: numpy with the NaN column contributing nothing.
    sse, _, _ = _numpy_score(x, y, np.array([1.0, 0.0, 0.3]))
    assert acc.score(coef).sse == pytest.approx(sse, rel=1e-10)


def test_holdout_empty_scores_nan():
    score = HoldoutAccumulator(2).score(np.zeros(2))
    assert score.n == 0
    assert np.isnan(score.r2) and np.isnan(score.rmse)


def test_holdout_random_mask_does_not_depend_on_batching():
    positions = np.arange(100_000, dtype=np.int64)
    whole = random_holdout_mask(random_keys(positions, 7), 0.25)
    pieces = np.concatenate(
        [
            random_holdout_mask(random_keys(positions[s : s + 999], 7), 0.25)
            for s in range(0, positions.size, 999)
        ]
    )
    np.testing.assert_array_equal(whole, pieces)
    # Binomial(100000, 0.25): SD about 137, so 5 SD is about 0.007 of the share.
    assert abs(whole.mean() - 0.25) < 0.007
    other_seed = random_holdout_mask(random_keys(positions, 8), 0.25)
    assert not np.array_equal(whole, other_seed)


def test_holdout_cut_mask_on_dates_and_numbers():
    dates = pl.Series("day", [dt.date(2024, 1, 1), None, dt.date(2024, 7, 1), dt.date(2024, 9, 1)])
    held, known = cut_holdout_mask(dates, "2024-07-01")
    assert held.tolist() == [False, False, True, True]
    assert known.tolist() == [True, False, True, True]
    held, _ = cut_holdout_mask(pl.Series("k", [1, 5, 9]), "5")
    assert held.tolist() == [False, True, True]
    with pytest.raises(SpecError, match="cannot read the cut"):
        cut_holdout_mask(pl.Series("k", [1, 5, 9]), "soon")


def test_holdout_rule_checks_its_arguments():
    with pytest.raises(SpecError, match="exactly one"):
        HoldoutRule()
    with pytest.raises(SpecError, match="between 0 and 1"):
        HoldoutRule(fraction=1.5)
    with pytest.raises(SpecError, match="needs a cut value"):
        HoldoutRule(column="day")


def test_holdout_kfold_rmse_equals_sklearn_cross_val_score(rng):
    from sklearn.linear_model import LinearRegression
    from sklearn.model_selection import KFold, cross_val_score

    x, y = _design(rng, 600)
    result = kfold_rmse(x, y, has_intercept=True, folds=5, seed=3)
    assert result is not None
    # Oracle: scikit-learn on the same folds (KFold with the same shuffle seed).
    expected = -cross_val_score(
        LinearRegression(),
        x[:, 1:],
        y,
        cv=KFold(5, shuffle=True, random_state=3),
        scoring="neg_root_mean_squared_error",
    )
    np.testing.assert_allclose(result.fold_rmse, expected, rtol=1e-10)
    assert result.rmse == pytest.approx(expected.mean(), rel=1e-10)


@pytest.mark.parametrize("n_rows", [5, 7, 10, 601])
@pytest.mark.parametrize("folds", [2, 3, 5])
@pytest.mark.parametrize("seed", [0, 3, 2**32 - 1])
def test_holdout_kfold_folds_equal_sklearn_kfold(n_rows: int, folds: int, seed: int) -> None:
    from sklearn.model_selection import KFold

    # Oracle: scikit-learn's KFold with the same shuffle seed, its held-out rows per fold.
    expected = [
        test.tolist()
        for _, test in KFold(folds, shuffle=True, random_state=seed).split(np.zeros(n_rows))
    ]
    assert [fold.tolist() for fold in kfold_test_rows(n_rows, folds, seed)] == expected


def test_holdout_kfold_imports_no_scikit_learn() -> None:
    import subprocess
    import sys

    code = (
        "import sys, numpy as np; from triage.core.holdout import kfold_rmse; "
        "x = np.column_stack([np.ones(50), np.arange(50.0)]); "
        "kfold_rmse(x, np.arange(50.0) % 7, has_intercept=True); print('sklearn' in sys.modules)"
    )
    loaded = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert loaded.stdout.strip() == "False"


def test_holdout_kfold_with_too_few_rows_is_none(rng):
    x, y = _design(rng, 3)
    assert kfold_rmse(x, y, has_intercept=True, folds=5) is None
    with pytest.raises(SpecError, match="at least 2"):
        kfold_rmse(x, y, has_intercept=True, folds=1)
