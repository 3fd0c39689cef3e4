"""Tests of the streaming QR accumulator and its fit (triage.core.lsq).

Oracles: numpy.linalg (lstsq, qr, cond), statsmodels OLS/WLS and their influence and
robust-covariance results, scipy.stats, and mpmath at 50 significant digits.
"""

from __future__ import annotations

import importlib
import itertools
import warnings
from typing import Any

import mpmath
import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.outliers_influence import OLSInfluence

from triage.core import lsq as lsq_module
from triage.core.lsq import (
    RANK_TOLERANCE,
    LinearFit,
    QRAccumulator,
    _cholesky_r,
    fit_arrays,
    householder_r,
)
from triage.errors import DataError, SpecError


def make_data(
    rng: np.random.Generator, n: int = 400, p: int = 5, *, intercept: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """Random well-conditioned design (intercept column first) and a noisy linear target."""
    k = p - 1 if intercept else p
    x = rng.normal(size=(n, k)) * [3.0, 0.5, 10.0, 1.0, 2.0][:k] + 2.0
    design = np.column_stack([np.ones(n), x]) if intercept else x
    y = design @ rng.normal(size=p) + rng.normal(size=n)
    return design, y


def fit_batches(
    design: np.ndarray,
    y: np.ndarray,
    weights: np.ndarray | None = None,
    *,
    n_batches: int = 1,
    intercept: bool = True,
) -> LinearFit:
    acc = QRAccumulator(design.shape[1], has_intercept=intercept)
    index = np.array_split(np.arange(len(y)), n_batches)
    for rows in index:
        acc.update(design[rows], y[rows], None if weights is None else weights[rows])
    return acc.finalize([f"c{j}" for j in range(design.shape[1])])


def digits(estimate: Any, reference: Any) -> float:
    """Smallest number of agreeing digits (log relative error) over the entries."""
    est = np.asarray(estimate, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    with np.errstate(divide="ignore"):
        return float(np.min(-np.log10(np.abs(est - ref) / np.abs(ref))))


def normwise_digits(estimate: Any, reference: Any) -> float:
    """Agreeing digits of a whole vector: -log10 of ||estimate - reference|| / ||reference||."""
    est = np.asarray(estimate, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    return float(-np.log10(np.linalg.norm(est - ref) / np.linalg.norm(ref)))


# ---------------------------------------------------------------- per-batch factorization


def test_lsq_cholesky_qr2_matches_householder(rng: np.random.Generator) -> None:
    # Oracle: numpy.linalg.qr (LAPACK Householder); R is unique once its diagonal is positive.
    z = rng.normal(size=(2_000, 8)) * np.logspace(-3, 3, 8)
    r_chol = _cholesky_r(z)
    assert r_chol is not None
    r_np = np.linalg.qr(z, mode="r")
    r_np *= np.sign(np.diagonal(r_np))[:, np.newaxis]
    np.testing.assert_allclose(r_chol, r_np, rtol=1e-12, atol=1e-12 * np.abs(r_np).max())
    np.testing.assert_array_equal(np.tril(r_chol, -1), 0.0)


def test_lsq_cholesky_qr2_declines_ill_conditioned_block(rng: np.random.Generator) -> None:
    # A duplicated column makes the block singular: CholeskyQR2 must hand it to Householder.
    z = rng.normal(size=(500, 4))
    z[:, 3] = z[:, 1]
    assert _cholesky_r(z) is None
    # Householder still gives R'R = Z'Z (oracle: numpy matrix product).
    r = householder_r(z)
    np.testing.assert_allclose(r.T @ r, z.T @ z, rtol=1e-12, atol=1e-10)


def test_lsq_cholesky_qr2_handles_zero_column(rng: np.random.Generator) -> None:
    # A column that is all zero in a batch (a level absent from it) keeps the fast route,
    # and the factor still satisfies R'R = Z'Z (oracle: numpy matrix product).
    z = rng.normal(size=(300, 5))
    z[:, 2] = 0.0
    r = _cholesky_r(z)
    assert r is not None
    np.testing.assert_allclose(r.T @ r, z.T @ z, rtol=1e-12, atol=1e-10)
    np.testing.assert_array_equal(np.tril(r, -1), 0.0)


# ---------------------------------------------------------------- against in-memory solvers


def test_lsq_many_batches_equal_numpy_lstsq(rng: np.random.Generator) -> None:
    # Oracle: numpy.linalg.lstsq on the whole matrix in memory (well conditioned data).
    design, y = make_data(rng, n=3_000)
    expected = np.linalg.lstsq(design, y, rcond=None)[0]
    fit = fit_batches(design, y, n_batches=37)
    assert digits(fit.coef, expected) >= 10
    # Fitted values: numpy matrix product with the lstsq coefficients.
    np.testing.assert_allclose(fit.predict(design), design @ expected, rtol=1e-10)


@pytest.mark.parametrize("n_batches", [1, 9])
def test_lsq_ols_statistics_match_statsmodels(rng: np.random.Generator, n_batches: int) -> None:
    # Oracle: statsmodels OLS (sm.OLS(...).fit()) for every reported statistic.
    design, y = make_data(rng)
    fit = fit_batches(design, y, n_batches=n_batches)
    ref = sm.OLS(y, design).fit()
    check_against_statsmodels(fit, ref)


@pytest.mark.parametrize("n_batches", [1, 6])
def test_lsq_wls_statistics_match_statsmodels(rng: np.random.Generator, n_batches: int) -> None:
    # Oracle: statsmodels WLS, including its log-likelihood with 0.5 * sum(log w).
    design, y = make_data(rng)
    weights = rng.uniform(0.2, 5.0, size=len(y))
    fit = fit_batches(design, y, weights, n_batches=n_batches)
    ref = sm.WLS(y, design, weights=weights).fit()
    check_against_statsmodels(fit, ref)
    assert fit.is_weighted


def test_lsq_no_intercept_matches_statsmodels_uncentered(rng: np.random.Generator) -> None:
    # Oracle: statsmodels OLS without a constant, which reports the uncentered R².
    design, y = make_data(rng, p=3, intercept=False)
    fit = fit_batches(design, y, n_batches=4, intercept=False)
    ref = sm.OLS(y, design).fit()
    assert ref.k_constant == 0
    check_against_statsmodels(fit, ref)
    # Uncentered R² by its definition 1 - RSS / sum(y²) (numpy).
    assert fit.r2 == pytest.approx(1.0 - ref.ssr / np.sum(y**2), rel=1e-10)


def check_against_statsmodels(fit: LinearFit, ref: Any) -> None:
    rel = 1e-8
    np.testing.assert_allclose(fit.coef, ref.params, rtol=rel)
    np.testing.assert_allclose(fit.std_error, ref.bse, rtol=rel)
    np.testing.assert_allclose(fit.t, ref.tvalues, rtol=rel)
    np.testing.assert_allclose(fit.p, ref.pvalues, rtol=1e-6, atol=1e-300)
    ci = ref.conf_int(alpha=0.05)
    np.testing.assert_allclose(fit.ci_low, ci[:, 0], rtol=rel)
    np.testing.assert_allclose(fit.ci_high, ci[:, 1], rtol=rel)
    np.testing.assert_allclose(fit.cov, ref.cov_params(), rtol=1e-7, atol=1e-12)
    for ours, theirs in [
        (fit.r2, ref.rsquared),
        (fit.adj_r2, ref.rsquared_adj),
        (fit.f, ref.fvalue),
        (fit.f_p, ref.f_pvalue),
        (fit.loglik, ref.llf),
        (fit.aic, ref.aic),
        (fit.bic, ref.bic),
        (fit.rss, ref.ssr),
        (fit.resid_sd, np.sqrt(ref.scale)),
    ]:
        assert ours == pytest.approx(theirs, rel=rel)
    assert fit.tss == pytest.approx(ref.centered_tss if fit.has_intercept else ref.uncentered_tss)
    assert (fit.n, fit.df_model, fit.df_resid) == (ref.nobs, ref.df_model, ref.df_resid)


# ---------------------------------------------------------------- mpmath oracle, hard cases


def mpmath_solution(design: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Least-squares coefficients of the float64 data computed with mpmath at 50 digits.

    Means are exact to 50 digits, so the centred normal equations (condition number
    squared is at most about 1e10 here) still leave about 40 correct digits.
    """
    mp = mpmath.mp
    with mpmath.workdps(50):
        n, p = design.shape
        x = [[mp.mpf(float(v)) for v in row] for row in design]
        t = [mp.mpf(float(v)) for v in y]
        means = [mp.fsum(x[i][j] for i in range(n)) / n for j in range(1, p)]
        t_mean = mp.fsum(t) / n
        c = [[x[i][j + 1] - means[j] for j in range(p - 1)] for i in range(n)]
        tc = [v - t_mean for v in t]
        gram = mp.matrix(p - 1, p - 1)
        rhs = mp.matrix(p - 1, 1)
        for a in range(p - 1):
            rhs[a] = mp.fsum(c[i][a] * tc[i] for i in range(n))
            for b in range(p - 1):
                gram[a, b] = mp.fsum(c[i][a] * c[i][b] for i in range(n))
        slopes = mp.lu_solve(gram, rhs)
        intercept = t_mean - mp.fsum(means[j] * slopes[j] for j in range(p - 1))
        return np.array([float(intercept)] + [float(slopes[j]) for j in range(p - 1)])


def hard_case(name: str, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    n = 300
    noise = rng.normal(size=n)
    if name == "predictor-mean-1e9":
        x = 1e9 + rng.normal(size=n)  # mean 1e9, SD 1
        design = np.column_stack([np.ones(n), x, rng.normal(size=n)])
        return design, 3.0 + 2.0 * x + noise
    if name == "target-offset-1e12":
        x = rng.normal(size=n)
        return np.column_stack([np.ones(n), x]), 1e12 + 0.5 * x + noise
    # Correlation 1 - 1e-10 between the two predictors.
    x1 = rng.normal(size=n)
    x2 = x1 + np.sqrt(2e-10) * rng.normal(size=n)
    return np.column_stack([np.ones(n), x1, x2]), 1.0 + x1 + x2 + noise


# Digits of the coefficients (min over them), 1 batch / 5 batches, with the fixture's seed and
# (in brackets) over seeds 0-4, measured with numpy 2.4.6 from PyPI (OpenBLAS 0.3.31) under the
# BLAS kernels OpenBLAS picks by CPU, forced with OPENBLAS_CORETYPE on one machine:
#   predictor-mean-1e9  Haswell/Zen/Sandybridge 13.29 / 14.02 (12.70-13.64 / 13.21-14.29);
#                       SkylakeX/Cooperlake (AVX-512) 12.85 / 14.02 (11.97-13.08 / 13.21-14.29)
#   target-offset-1e12  15.41 / 15.71 under both (15.0 or more over the seeds)
#   near-collinear      Haswell 11.48 / 10.87 (9.84-11.78 / 8.94-11.58); SkylakeX 11.59 / 10.98
# The kernel changes the summation order of the batch's Gram matrix (one Cholesky when the
# shifted batch is well conditioned): on predictor-mean-1e9 that moves the slopes by about half
# a digit, and the intercept (about 1e9 times the slope's error) with them. Both are far better
# than the bound of a backward-stable solve (condition number 2e9: about 6 digits), so this is
# rounding luck of the kernel, not a fault to fix; the thresholds sit below the lowest kernel.
# (CholeskyQR2 on every batch gave 13.2-14.3 on this case under Haswell; LAPACK's triangular
# solve in scipy gave 9.9-11.6 / 8.9-12.8 on near-collinear; numpy.linalg.lstsq reaches 0.0
# digits on predictor-mean-1e9.)
HARD_DIGITS = {"predictor-mean-1e9": 12.5, "target-offset-1e12": 13.5, "near-collinear": 10.0}


@pytest.mark.parametrize("name", sorted(HARD_DIGITS))
@pytest.mark.parametrize("n_batches", [1, 5])
def test_lsq_hard_cases_match_mpmath(name: str, n_batches: int, rng: np.random.Generator) -> None:
    # Oracle: mpmath least-squares solution at 50 significant digits.
    design, y = hard_case(name, rng)
    expected = mpmath_solution(design, y)
    fit = fit_batches(design, y, n_batches=n_batches)
    assert digits(fit.coef, expected) >= HARD_DIGITS[name]
    assert fit.aliased == ()


# ---------------------------------------------------------------- merging and splitting


def test_lsq_merge_two_halves_equals_one_pass(rng: np.random.Generator) -> None:
    # Halves with very different means get different shifts; merged they must equal one pass
    # and numpy.linalg.lstsq in memory (oracle).
    design, y = make_data(rng, n=1_000)
    design[500:, 1:] += 1e4
    y[500:] += 1e5
    weights = rng.uniform(0.5, 2.0, size=len(y))
    first = QRAccumulator(design.shape[1], has_intercept=True)
    second = QRAccumulator(design.shape[1], has_intercept=True)
    first.update(design[:500], y[:500], weights[:500])
    second.update(design[500:], y[500:], weights[500:])
    assert first.merge(second) is first
    assert first.n_rows == 1_000
    names = [f"c{j}" for j in range(design.shape[1])]
    merged = first.finalize(names)
    one_pass = fit_batches(design, y, weights)
    root_w = np.sqrt(weights)
    expected = np.linalg.lstsq(design * root_w[:, np.newaxis], y * root_w, rcond=None)[0]
    assert digits(merged.coef, expected) >= 10
    assert digits(merged.coef, one_pass.coef) >= 10
    assert merged.rss == pytest.approx(one_pass.rss, rel=1e-10)
    assert merged.tss == pytest.approx(one_pass.tss, rel=1e-10)
    assert merged.loglik == pytest.approx(one_pass.loglik, rel=1e-10)
    np.testing.assert_allclose(merged.std_error, one_pass.std_error, rtol=1e-9)


@pytest.mark.parametrize("intercept", [True, False])
def test_lsq_update_columns_equals_update(rng: np.random.Generator, intercept: bool) -> None:
    # Column batches against matrix batches, and numpy.linalg.lstsq in memory (oracle).
    design, y = make_data(rng, n=900, intercept=intercept)
    design[:, 1:] += 1e6
    by_matrix = QRAccumulator(design.shape[1], has_intercept=intercept)
    by_columns = QRAccumulator(design.shape[1], has_intercept=intercept)
    predictors = design[:, 1:] if intercept else design
    for rows in np.array_split(np.arange(len(y)), 3):
        by_matrix.update(design[rows], y[rows])
        assert by_columns.update_columns([c[rows] for c in predictors.T], y[rows])
    names = [f"c{j}" for j in range(design.shape[1])]
    from_columns, from_matrix = by_columns.finalize(names), by_matrix.finalize(names)
    # The same up to rounding: the matrix route takes its first shift in one reduction.
    assert digits(from_columns.coef, from_matrix.coef) >= 12
    assert from_columns.rss == pytest.approx(from_matrix.rss, rel=1e-12)
    expected = np.linalg.lstsq(design, y, rcond=None)[0]
    assert digits(from_columns.coef, expected) >= 9


@pytest.mark.parametrize("chunk_rows", [7, 64, 100_000])
def test_lsq_gram_in_chunks_matches_statsmodels_wls(
    rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch, chunk_rows: int
) -> None:
    # statsmodels WLS as oracle, whatever the chunk the Gram matrix is formed in.
    monkeypatch.setattr(lsq_module, "GRAM_CHUNK_ROWS", chunk_rows)
    design, y = make_data(rng, n=500)
    weights = rng.uniform(0.5, 2.0, size=len(y))
    fit = fit_batches(design, y, weights, n_batches=2)
    oracle = sm.WLS(y, design, weights=weights).fit()
    np.testing.assert_allclose(fit.coef, oracle.params, rtol=1e-10)
    np.testing.assert_allclose(fit.std_error, oracle.bse, rtol=1e-9)


def test_lsq_update_columns_declines_non_finite_batch(rng: np.random.Generator) -> None:
    design, y = make_data(rng, n=300)
    acc = QRAccumulator(design.shape[1], has_intercept=True)
    assert acc.update_columns(list(design[:100, 1:].T), y[:100])
    before = acc.factor
    spoilt = design[100:200, 1:].copy()
    spoilt[7, 2] = np.nan
    assert not acc.update_columns(list(spoilt.T), y[100:200])
    infinite = y[100:200].copy()
    infinite[3] = np.inf
    assert not acc.update_columns(list(design[100:200, 1:].T), infinite)
    after = acc.factor
    assert acc.n_rows == 100 and before is not None and after is not None
    np.testing.assert_array_equal(after.r, before.r)
    with pytest.raises(DataError, match="predictor columns"):
        acc.update_columns(list(design[:10, 2:].T), y[:10])
    with pytest.raises(DataError, match="predictor columns"):
        acc.update_columns(list(design[:10, 1:].T), y[:9])
    with pytest.raises(DataError, match="NaN or infinite"):
        acc.update(np.column_stack([np.ones(100), spoilt]), y[100:200])


def test_lsq_merge_into_empty_and_of_empty(rng: np.random.Generator) -> None:
    # Oracle: numpy.linalg.lstsq; empty accumulators must not change the result.
    design, y = make_data(rng, n=200)
    full = QRAccumulator(design.shape[1], has_intercept=True)
    full.update(design, y)
    empty = QRAccumulator(design.shape[1], has_intercept=True)
    empty.merge(full).merge(QRAccumulator(design.shape[1], has_intercept=True))
    fit = empty.finalize([f"c{j}" for j in range(design.shape[1])])
    assert digits(fit.coef, np.linalg.lstsq(design, y, rcond=None)[0]) >= 11


def test_lsq_factor_is_the_shifted_block_factor(rng: np.random.Generator) -> None:
    # Oracle: numpy matrix products; R'R must equal Z'Z for Z = sqrt(w) [X - m | y - m_y],
    # with m, m_y the first batch's means (column 0, the intercept, unshifted).
    design, y = make_data(rng, n=600)
    weights = rng.uniform(0.5, 2.0, size=len(y))
    acc = QRAccumulator(design.shape[1], has_intercept=True)
    assert acc.factor is None
    for rows in np.array_split(np.arange(len(y)), 3):
        acc.update(design[rows], y[rows], weights[rows])
    factor = acc.factor
    assert factor is not None
    expected_shift = np.append(0.0, design[:200, 1:].mean(axis=0))
    np.testing.assert_allclose(factor.x_shift, expected_shift, rtol=1e-14)
    assert factor.y_shift == pytest.approx(float(y[:200].mean()), rel=1e-14)
    z = np.column_stack([design - factor.x_shift, y - factor.y_shift]) * np.sqrt(weights)[:, None]
    np.testing.assert_allclose(factor.r.T @ factor.r, z.T @ z, rtol=1e-10, atol=1e-8)
    np.testing.assert_array_equal(np.tril(factor.r, -1), 0.0)
    # The accessor hands out copies: changing one leaves the accumulator as it was.
    factor.r[:] = 0.0
    second = acc.factor
    assert second is not None
    assert np.any(second.r != 0.0)


def test_lsq_fit_arrays_equals_statsmodels_wls(rng: np.random.Generator) -> None:
    # Oracle: statsmodels WLS on the same rows.
    design, y = make_data(rng, n=300)
    weights = rng.uniform(0.5, 2.0, size=len(y))
    names = [f"c{j}" for j in range(design.shape[1])]
    fit = fit_arrays(design, y, names, has_intercept=True, weights=weights)
    expected = sm.WLS(y, design, weights=weights).fit()
    assert fit.names == tuple(names)
    assert digits(fit.coef, expected.params) >= 10
    np.testing.assert_allclose(fit.std_error, expected.bse, rtol=1e-9)


@settings(max_examples=40, deadline=None)
@given(
    cuts=st.lists(st.integers(min_value=0, max_value=120), max_size=8),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
)
def test_lsq_any_batch_split_gives_same_coefficients(cuts: list[int], seed: int) -> None:
    # Oracle: numpy.linalg.lstsq on the unsplit data; batches may be empty or narrower
    # than the design.
    data_rng = np.random.default_rng(seed)
    design, y = make_data(data_rng, n=120)
    bounds = [0, *sorted(cuts), 120]
    acc = QRAccumulator(design.shape[1], has_intercept=True)
    for start, stop in itertools.pairwise(bounds):
        acc.update(design[start:stop], y[start:stop])
    fit = acc.finalize([f"c{j}" for j in range(design.shape[1])])
    # Normwise: the seeds drawn here give some coefficient near zero now and then (seed
    # 1318: -1.04e-6 beside others near 1), whose own relative error says nothing of the
    # solve; hypothesis found that case for the per-coefficient measure.
    assert normwise_digits(fit.coef, np.linalg.lstsq(design, y, rcond=None)[0]) >= 10


# ---------------------------------------------------------------- rank deficiency


def test_lsq_duplicated_column_is_reported_aliased(rng: np.random.Generator) -> None:
    design, y = make_data(rng)
    with_copy = np.column_stack([design, design[:, 2]])
    acc = QRAccumulator(with_copy.shape[1], has_intercept=True)
    for rows in np.array_split(np.arange(len(y)), 4):
        acc.update(with_copy[rows], y[rows])
    names = ["intercept", "a", "b", "c", "d", "b_copy"]
    fit = acc.finalize(names)
    assert fit.aliased == ("b_copy",)
    assert np.isnan(fit.coef[5]) and np.isnan(fit.std_error[5]) and np.isnan(fit.p[5])
    assert np.all(np.isnan(fit.cov[5])) and np.all(np.isnan(fit.cov[:, 5]))
    # Oracle: statsmodels OLS on the design without the copy.
    ref = sm.OLS(y, design).fit()
    np.testing.assert_allclose(fit.coef[:5], ref.params, rtol=1e-9)
    np.testing.assert_allclose(fit.std_error[:5], ref.bse, rtol=1e-9)
    assert (fit.df_model, fit.df_resid) == (ref.df_model, ref.df_resid)
    assert fit.aic == pytest.approx(ref.aic, rel=1e-10)
    # Predictions ignore the aliased column (oracle: statsmodels fitted values).
    np.testing.assert_allclose(fit.predict(with_copy), ref.fittedvalues, rtol=1e-10)


def test_lsq_dummies_summing_to_intercept_are_aliased(rng: np.random.Generator) -> None:
    n = 600
    level = rng.integers(0, 3, size=n)
    dummies = (level[:, np.newaxis] == np.arange(3)).astype(float)
    x = rng.normal(size=n)
    design = np.column_stack([np.ones(n), x, dummies])
    y = 1.0 + 2.0 * x + np.array([0.0, 1.0, -1.0])[level] + rng.normal(size=n)
    fit = fit_batches(design, y, n_batches=10)
    assert fit.aliased == ("c4",)
    # Oracle: statsmodels OLS with the last dummy left out (same column space).
    ref = sm.OLS(y, design[:, :4]).fit()
    np.testing.assert_allclose(fit.coef[:4], ref.params, rtol=1e-9)
    assert fit.r2 == pytest.approx(ref.rsquared, rel=1e-12)


def test_lsq_constant_predictor_is_aliased_with_intercept(rng: np.random.Generator) -> None:
    # A predictor equal to 7.5 on every row is the intercept scaled: it gets no estimate.
    design, y = make_data(rng, n=200, p=3)
    design = np.column_stack([design, np.full(200, 7.5)])
    fit = fit_batches(design, y, n_batches=3)
    assert fit.aliased == ("c3",)


def test_lsq_rank_tolerance_is_far_from_rounding_noise(rng: np.random.Generator) -> None:
    # A duplicate across 50 merged batches leaves |R_jj| / ||R_:j|| near machine epsilon
    # (numpy.finfo), several orders below RANK_TOLERANCE.
    design, y = make_data(rng, n=5_000)
    design = np.column_stack([design, design[:, 1] * 3.0 - design[:, 2]])
    acc = QRAccumulator(design.shape[1], has_intercept=True)
    for rows in np.array_split(np.arange(len(y)), 50):
        acc.update(design[rows], y[rows])
    r = acc._r
    assert r is not None
    ratio = abs(r[5, 5]) / np.linalg.norm(r[:6, 5])
    assert ratio < 1e3 * np.finfo(np.float64).eps < RANK_TOLERANCE


# ---------------------------------------------------------------- as many parameters as rows


def test_lsq_exact_fit_has_no_residual_df(rng: np.random.Generator) -> None:
    design = np.column_stack([np.ones(4), rng.normal(size=(4, 3))])
    y = rng.normal(size=4)
    # filterwarnings=error in the pytest config turns any numpy or scipy warning into a failure.
    fit = fit_batches(design, y, n_batches=2)
    # Oracle: numpy.linalg.solve of the square system.
    np.testing.assert_allclose(fit.coef, np.linalg.solve(design, y), rtol=1e-9)
    assert fit.df_resid == 0
    assert fit.r2 == 1.0
    assert fit.resid_sd == 0.0
    assert np.isnan(fit.adj_r2) and np.isnan(fit.f) and np.isnan(fit.f_p)
    for values in (fit.std_error, fit.t, fit.p, fit.ci_low, fit.ci_high):
        assert np.all(np.isnan(values))
    np.testing.assert_allclose(fit.predict(design), y, rtol=1e-9)


# ---------------------------------------------------------------- pass-2 helpers


def test_lsq_leverage_matches_statsmodels(rng: np.random.Generator) -> None:
    # Oracle: statsmodels OLSInfluence.hat_matrix_diag.
    design, y = make_data(rng)
    design[:, 1] += 1e6  # a large mean must not disturb hat values
    fit = fit_batches(design, y, n_batches=3)
    expected = OLSInfluence(sm.OLS(y, design).fit()).hat_matrix_diag
    np.testing.assert_allclose(fit.leverage(design), expected, rtol=1e-8)
    assert fit.leverage(design).sum() == pytest.approx(design.shape[1], rel=1e-10)


def test_lsq_weighted_leverage_matches_numpy(rng: np.random.Generator) -> None:
    # Oracle: diagonal of W^1/2 X (X'WX)^-1 X' W^1/2 with numpy.linalg.pinv.
    design, y = make_data(rng, n=300)
    weights = rng.uniform(0.2, 4.0, size=300)
    fit = fit_batches(design, y, weights, n_batches=2)
    xw = design * np.sqrt(weights)[:, np.newaxis]
    expected = np.einsum("ij,ji->i", xw, np.linalg.pinv(xw))
    np.testing.assert_allclose(fit.leverage(design, weights), expected, rtol=1e-9)


@pytest.mark.parametrize("kind", ["HC0", "HC3"])
def test_lsq_sandwich_matches_statsmodels(rng: np.random.Generator, kind: str) -> None:
    # Oracle: statsmodels OLS robust covariance (cov_HC0 / cov_HC3).
    design, y = make_data(rng)
    y += rng.normal(size=len(y)) * np.abs(design[:, 1])  # heteroscedastic errors
    fit = fit_batches(design, y, n_batches=4)
    resid = y - fit.predict(design)
    factor = resid**2
    if kind == "HC3":
        factor = factor / (1.0 - fit.leverage(design)) ** 2
    shifted = fit.to_shifted(design)
    meat = (shifted * factor[:, np.newaxis]).T @ shifted
    ref = sm.OLS(y, design).fit()
    expected = ref.cov_HC0 if kind == "HC0" else ref.cov_HC3
    np.testing.assert_allclose(fit.sandwich(meat), expected, rtol=1e-8, atol=1e-14)


def test_lsq_sandwich_longley_matches_published_hc_errors() -> None:
    # Oracle: statsmodels/regression/tests/results/results_regression.py, Longley.HC0_se and
    # HC3_se (printed to 5 significant digits), on statsmodels.datasets.longley.
    results = importlib.import_module("statsmodels.regression.tests.results.results_regression")
    data = importlib.import_module("statsmodels.datasets.longley").load_pandas()
    design = np.column_stack([np.ones(len(data.endog)), data.exog.to_numpy(dtype=float)])
    y = data.endog.to_numpy(dtype=float)
    fit = fit_batches(design, y, n_batches=2)
    resid = y - fit.predict(design)
    shifted = fit.to_shifted(design)
    hat = fit.leverage(design)
    certified = results.Longley()
    for factor, published in [
        (resid**2, certified.HC0_se),
        (resid**2 / (1.0 - hat) ** 2, certified.HC3_se),
    ]:
        meat = (shifted * factor[:, np.newaxis]).T @ shifted
        se = np.sqrt(np.diagonal(fit.sandwich(meat)))
        published = np.asarray(published)
        np.testing.assert_allclose(se, np.append(published[-1], published[:-1]), rtol=5e-4)


def test_lsq_weighted_sandwich_matches_statsmodels(rng: np.random.Generator) -> None:
    # Oracle: statsmodels WLS cov_HC0 (meat from whitened rows and residuals).
    design, y = make_data(rng)
    weights = rng.uniform(0.3, 3.0, size=len(y))
    fit = fit_batches(design, y, weights, n_batches=3)
    resid = y - fit.predict(design)
    shifted = fit.to_shifted(design)
    factor = weights**2 * resid**2
    meat = (shifted * factor[:, np.newaxis]).T @ shifted
    ref = sm.WLS(y, design, weights=weights).fit()
    np.testing.assert_allclose(fit.sandwich(meat), ref.cov_HC0, rtol=1e-8, atol=1e-14)


def test_lsq_sandwich_with_aliased_column(rng: np.random.Generator) -> None:
    # Oracle: statsmodels cov_HC0 of the design without the duplicated column.
    design, y = make_data(rng)
    with_copy = np.column_stack([design, design[:, 1]])
    fit = fit_batches(with_copy, y, n_batches=2)
    shifted = fit.to_shifted(with_copy)
    assert shifted.shape == (len(y), 5)
    resid = y - fit.predict(with_copy)
    meat = (shifted * (resid**2)[:, np.newaxis]).T @ shifted
    robust = fit.sandwich(meat)
    assert np.all(np.isnan(robust[5])) and np.all(np.isnan(robust[:, 5]))
    ref = sm.OLS(y, design).fit()
    np.testing.assert_allclose(robust[:5, :5], ref.cov_HC0, rtol=1e-8, atol=1e-14)


def test_lsq_condition_number_matches_numpy(rng: np.random.Generator) -> None:
    # Oracle: numpy.linalg.cond of the weighted design with columns scaled to unit length
    # (the scaled, uncentered design of Belsley, Kuh and Welsch).
    design, y = make_data(rng)
    design[:, 2] += 50.0
    weights = rng.uniform(0.5, 2.0, size=len(y))
    fit = fit_batches(design, y, weights, n_batches=3)
    xw = design * np.sqrt(weights)[:, np.newaxis]
    expected = np.linalg.cond(xw / np.linalg.norm(xw, axis=0))
    assert fit.condition_number == pytest.approx(expected, rel=1e-9)


def test_lsq_wide_design_matches_numpy_and_statsmodels(rng: np.random.Generator) -> None:
    # A design past 200 columns (an office code of 210 skewed levels, weights, 3 numbers),
    # where condition numbers come from eigenvalues and solves run in blocks of 64 rows.
    # Oracles: statsmodels WLS (standard errors, HC0, hat values of the whitened design) and
    # numpy.linalg.cond of the weighted design with columns scaled to unit length.
    n, levels = 2_500, 210
    shares = np.arange(levels, 0, -1) / (levels * (levels + 1) / 2)
    # every level holds at least two rows
    office = np.concatenate([np.arange(levels), np.arange(levels)])
    office = np.concatenate([office, rng.choice(levels, size=n - office.size, p=shares)])
    numbers = rng.gamma(3.0, 2.0, size=(n, 3)) + np.array([0.0, 50.0, 1e3])
    dummies = (office[:, np.newaxis] == np.arange(1, levels)).astype(float)
    design = np.column_stack([np.ones(n), numbers, dummies])
    y = design @ rng.normal(size=design.shape[1]) + rng.standard_t(5, size=n)
    weights = rng.uniform(0.5, 2.0, size=n)
    fit = fit_batches(design, y, weights, n_batches=4)
    result = sm.WLS(y, design, weights=weights).fit()
    np.testing.assert_allclose(fit.coef, result.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(fit.std_error, result.bse, rtol=1e-8)
    xw = design * np.sqrt(weights)[:, np.newaxis]
    expected = np.linalg.cond(xw / np.linalg.norm(xw, axis=0))
    assert fit.condition_number == pytest.approx(expected, rel=1e-9)
    hat = OLSInfluence(sm.OLS(result.model.wendog, result.model.wexog).fit()).hat_matrix_diag
    np.testing.assert_allclose(fit.leverage(design[:500], weights[:500]), hat[:500], rtol=1e-8)
    shifted = fit.to_shifted(design)
    u = (y - fit.predict(design)) * weights
    robust = fit.sandwich((shifted * (u * u)[:, np.newaxis]).T @ shifted)
    np.testing.assert_allclose(np.sqrt(np.diag(robust)), result.HC0_se, rtol=1e-8)


# ---------------------------------------------------------------- errors


def test_lsq_rejects_bad_input(rng: np.random.Generator) -> None:
    design, y = make_data(rng, n=50)
    acc = QRAccumulator(5, has_intercept=True)
    with pytest.raises(DataError, match=r"must have shape \(n_rows, 5\)"):
        acc.update(design[:, :4], y)
    with pytest.raises(DataError, match="`y` passed to `update`"):
        acc.update(design, y[:-1])
    bad = design.copy()
    bad[3, 2] = np.nan
    with pytest.raises(DataError, match="NaN or infinite"):
        acc.update(bad, y)
    bad_y = y.copy()
    bad_y[1] = np.inf
    with pytest.raises(DataError, match="NaN or infinite"):
        acc.update(design[:3], bad_y[:3])  # narrower than the design: Householder route
    with pytest.raises(DataError, match="NaN or infinite"):
        acc.update(design, bad_y)
    with pytest.raises(DataError, match="positive and finite"):
        acc.update(design, y, np.zeros(50))
    no_ones = design.copy()
    no_ones[0, 0] = 2.0
    with pytest.raises(DataError, match="column 0 of `x` must be the intercept"):
        acc.update(no_ones, y)
    with pytest.raises(DataError, match="no rows reached the fit"):
        acc.finalize(["a", "b", "c", "d", "e"])
    # Rejected batches left no trace: the fit equals numpy.linalg.lstsq on the good batch.
    acc.update(design, y)
    assert acc.n_rows == 50
    with pytest.raises(SpecError, match="`names` must hold 5"):
        acc.finalize(["a"])
    with pytest.raises(SpecError, match="cannot merge"):
        acc.merge(QRAccumulator(5, has_intercept=False))
    fit = acc.finalize(["a", "b", "c", "d", "e"])
    assert not fit.is_weighted
    assert digits(fit.coef, np.linalg.lstsq(design, y, rcond=None)[0]) >= 11
    with pytest.raises(DataError, match="`meat` passed to `sandwich`"):
        fit.sandwich(np.eye(3))
    with pytest.raises(DataError, match="`x` passed to `predict`"):
        fit.predict(design[:, :2])


def test_lsq_fit_is_silent_on_perfect_fit(rng: np.random.Generator) -> None:
    # y exactly linear in x, more rows than parameters: tiny or zero RSS must not warn
    # (warnings are errors in this suite) and R² is 1 to printing precision.
    x = np.arange(30.0)
    design = np.column_stack([np.ones(30), x])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit = fit_batches(design, 2.0 + 0.5 * x, n_batches=3)
    # Oracle: the exact line (closed form, intercept 2 and slope 0.5).
    np.testing.assert_allclose(fit.coef, [2.0, 0.5], rtol=1e-13)
    assert f"{fit.r2:.6f}" == "1.000000"


@pytest.mark.parametrize("n_cols", [3, 10, 31])
def test_lsq_cholesky_qr2_matches_householder_on_well_conditioned_blocks(
    rng: np.random.Generator, n_cols: int
) -> None:
    # numpy's Householder QR (LAPACK dgeqrf) as oracle: the fast CholeskyQR2 route (explicit
    # inverse below INVERSE_MAX_CONDITION) must give the same R to near machine precision.
    from triage.core.lsq import _cholesky_r

    z = rng.normal(size=(20_000, n_cols)) * rng.uniform(0.1, 1e3, size=n_cols)
    z[:, 0] = 1.0
    fast = _cholesky_r(z)
    assert fast is not None
    oracle = householder_r(z)
    np.testing.assert_allclose(fast, oracle, rtol=0, atol=1e-12 * np.abs(oracle).max())
