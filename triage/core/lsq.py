"""Streaming least squares: a mergeable QR accumulator and the fit it produces.

The accumulator keeps only the upper-triangular factor ``R`` of the augmented,
shifted and weighted block ``sqrt(w) * [1 | X - m | y - m_y]``, of size
``(p + 1, p + 1)``, so memory does not grow with the number of rows. The shift
``(m, m_y)`` is taken from the first batch; the column of ones stays in the
factorization, so the answer does not depend on the shift being the exact mean.
Nothing here forms ``X'X`` of the raw data: each batch is shifted, and factored
by one Cholesky of its equilibrated Gram matrix when its condition number
bounds the loss to about 1e-12, by CholeskyQR2 (a factor of Householder quality)
when it is less well conditioned, and by Householder QR otherwise. Two
accumulators merge by stacking their ``R`` factors and factoring again, so a pass
can be split over workers.

Everything the fit reports comes from ``R``:

- coefficients by back-substitution, the intercept shifted back at the end;
- the residual sum of squares as the square of the last diagonal entry, the
  explained sum of squares as the sum of squares of the entries above it, so
  neither is a difference of large numbers;
- variances of linear combinations ``t'b`` as ``s^2 * ||R^-T t||^2`` (one
  triangular solve), never through formulas that cancel on collinear data.
"""

from __future__ import annotations

import functools
import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Final, Self

import numpy as np
from numpy.typing import ArrayLike, NDArray

from triage.core.distributions import f_sf, t_ppf, t_sf
from triage.core.indicators import (
    GRAM_CHUNK_ROWS,
    CodedDesign,
    IntArray,
    LevelGram,
    SummedBlock,
    coded_gram,
    level_grams,
)
from triage.errors import DataError, SpecError

__all__ = [
    "CHOLQR_MAX_CONDITION",
    "RANK_TOLERANCE",
    "AccumulatedFactor",
    "LinearFit",
    "OpenLevelAccumulator",
    "QRAccumulator",
    "UncertifiedGram",
    "fit_arrays",
]

FloatArray = NDArray[np.float64]

RANK_TOLERANCE: Final = 1e-11
"""A design column is aliased when ``|R[j, j]| <= RANK_TOLERANCE * ||R[:j+1, j]||``.

The ratio is the sine of the angle between column ``j`` (shifted, weighted) and the
span of the columns before it, so it does not depend on the column's units. Exact
aliasing (a duplicated column, dummies summing to the intercept, a constant
predictor) leaves rounding noise of about 1e-16 to 1e-14 there, growing slowly with
the number of merged batches. The hardest NIST StRD design, Filip (a degree-10
polynomial, certified as full rank), has its smallest ratio at 5.5e-8 to 6.1e-8
whatever the batch split (measured here), over three orders of magnitude above.
A pair of predictors with correlation 1 - 1e-10 gives about 1.4e-5.
Columns are tested in order, so of two aliased columns the later one is dropped.
"""

INVERSE_MAX_CONDITION: Final = 1e4
"""Largest 2-norm condition number of a batch's equilibrated ``R1`` for which CholeskyQR2 forms
``Q1`` with the explicit inverse of ``R1`` (a matrix product) instead of a triangular solve.

The inverse's rounding error grows with the condition number; at 1e4 it stays near 1e-12
relative, which the second Cholesky pass removes. The NIST StRD designs span every route
(2-norm condition of the equilibrated, shifted block, measured here: NoInt2 25, NoInt1 79,
Longley 146, Norris 800, Wampler3-5 1.6e3-1.8e3, Pontius 7.8e3, Filip 4.6e9, Wampler1-2
about 4e16) and all meet their certified values (tests/test_nist.py).
"""

GRAM_MAX_CONDITION: Final = 1e2
"""Largest 2-norm condition number of a batch's equilibrated ``R1`` for which ``R1`` itself, the
Cholesky factor of the batch's Gram matrix, is taken as the batch's factor.

Forming the Gram matrix costs a relative error of about ``cond**2 * eps`` in ``R1``: at most
about 1e-12 here. Shifted data with moderately correlated predictors stay below it; above
it a second Cholesky pass (CholeskyQR2) brings the factor to Householder quality. One
Cholesky costs one Gram product, a third of CholeskyQR2 (measured here).
"""

CHOLQR_MAX_CONDITION: Final = 1e7
"""Largest 2-norm condition number of a batch's equilibrated ``R1`` for which CholeskyQR2 is used.

Below it two Cholesky passes give a factor of Householder quality (the Gram
matrix of the first, nearly orthogonal ``Q1`` is well conditioned); above it, or
when Cholesky fails, the batch goes to Householder QR.
"""


def _normalize_signs(r: FloatArray) -> FloatArray:
    """Flip rows of an upper-triangular factor so its diagonal is non-negative (in place)."""
    negative = np.diagonal(r) < 0
    r[negative] *= -1.0
    return r


def householder_r(a: FloatArray) -> FloatArray:
    """Return the square upper-triangular factor of ``a`` by Householder QR.

    Parameters
    ----------
    a : ndarray of shape (n_rows, n_cols)
        Any matrix; with fewer rows than columns the factor is padded with zero rows.

    Returns
    -------
    ndarray of shape (n_cols, n_cols)
        ``R`` with a non-negative diagonal and ``R'R = a'a``.
    """
    n_cols = a.shape[1]
    r_top = np.asarray(np.linalg.qr(a, mode="r"), dtype=np.float64)
    r = np.zeros((n_cols, n_cols))
    r[: r_top.shape[0]] = r_top
    return _normalize_signs(r)


def _cholesky_r(z: FloatArray) -> FloatArray | None:
    """Return the triangular factor of ``z`` by Cholesky QR, or None when ``z`` is ill conditioned.

    The Gram matrix is equilibrated (columns scaled to unit norm) before each
    Cholesky, so the condition number ignores units. Below `GRAM_MAX_CONDITION` one
    Cholesky of the Gram matrix is enough; up to `CHOLQR_MAX_CONDITION` CholeskyQR2 adds
    a triangular solve (or a product with the inverse) and a second Gram product, all
    matrix-matrix kernels.

    Parameters
    ----------
    z : ndarray of shape (n_rows, n_cols)
        The shifted, weighted block, with ``n_rows >= n_cols`` and finite values.

    Returns
    -------
    ndarray of shape (n_cols, n_cols) or None
        ``R`` with a non-negative diagonal, or None when a Cholesky factorization
        fails or the condition number exceeds `CHOLQR_MAX_CONDITION`.
    """
    gram = z.T @ z
    diagonal = np.diagonal(gram)
    if not np.all(np.isfinite(diagonal)):  # a NaN or inf in z, or squares past float64
        return None
    nonzero = diagonal > 0.0
    if not np.all(nonzero):
        # A column that is zero in this batch (say a category level absent from it) would
        # make the Gram matrix singular; factor the other columns and put zero rows and
        # columns back, which keeps R upper triangular with R'R = Z'Z.
        r_nonzero = _cholesky_r(z[:, nonzero]) if np.any(nonzero) else None
        if r_nonzero is None:
            return None
        r = np.zeros((z.shape[1], z.shape[1]))
        r[np.ix_(nonzero, nonzero)] = r_nonzero
        return r
    found = _equilibrated_cholesky(gram)
    if found is None:
        return None
    r1, condition = found
    if not condition < CHOLQR_MAX_CONDITION:
        return None
    if condition < GRAM_MAX_CONDITION:
        return r1  # Cholesky leaves a positive diagonal
    if condition < INVERSE_MAX_CONDITION:
        # Well conditioned: Q1 = Z R1^-1 by one matrix product with the explicit inverse,
        # 2-4x faster than the triangular solve on 65,536-row blocks (measured here).
        q1 = z @ np.triu(np.linalg.inv(r1))
        gram_q = q1.T @ q1
    else:
        # Q1' = R1^-T Z' by a solve on the transposed view. The explicit inverse cost NIST
        # Wampler4/5 two to three digits when fed in batches of 8 rows (measured here):
        # the solve keeps each row's backward error small.
        q1_t = _solve_upper(r1, z.T, transposed=True)
        gram_q = q1_t @ q1_t.T
    r2 = _upper_cholesky(gram_q)
    if r2 is None:
        return None
    return _normalize_signs(r2 @ r1)


def _equilibrated_cholesky(gram: FloatArray) -> tuple[FloatArray, float] | None:
    """Return ``R1`` with ``R1'R1 = gram`` and the equilibrated block's 2-norm condition number.

    The Gram matrix is equilibrated (columns scaled to unit norm) before the Cholesky, so
    the condition number ignores units. `gram` must have a positive, finite diagonal.
    None when the Cholesky fails.
    """
    scale = np.sqrt(np.diagonal(gram))
    equilibrated = gram / np.outer(scale, scale)
    r1 = _upper_cholesky(equilibrated)
    if r1 is None:
        return None
    # The 2-norm condition number, of the small factor; the 1-norm one read 214 for a
    # 2-norm 18 on a 31-column block here.
    condition = _condition_number(r1, equilibrated)
    r1 *= scale[np.newaxis, :]
    return r1, condition


def _gram_factor(gram: FloatArray) -> FloatArray | None:
    """Return the Cholesky factor of a block's Gram matrix when that alone is accurate enough.

    That is below `GRAM_MAX_CONDITION`; None otherwise, or for a diagonal that is not
    positive and finite (a NaN or inf, squares past float64, a zero column), where the
    block itself must be factored (`_factor_block`).
    """
    diagonal = np.diagonal(gram)
    if not (np.all(np.isfinite(diagonal)) and np.all(diagonal > 0.0)):
        return None
    found = _equilibrated_cholesky(gram)
    if found is None or not found[1] < GRAM_MAX_CONDITION:
        return None
    return found[0]


def _certified_gram_factor(gram: FloatArray) -> FloatArray | None:
    """Return the Cholesky factor of a Gram matrix that certifies it (`_gram_factor`), or None.

    Columns that are zero throughout (a level no row has) get zero rows and columns in the
    factor, which keeps ``R'R = gram``; the fit then reports them as aliased.
    """
    diagonal = np.diagonal(gram)
    if not np.all(np.isfinite(diagonal)):
        return None
    nonzero = diagonal > 0.0
    if np.all(nonzero):
        return _gram_factor(gram)
    r_nonzero = _gram_factor(gram[np.ix_(nonzero, nonzero)]) if np.any(nonzero) else None
    if r_nonzero is None:
        return None
    r = np.zeros(gram.shape)
    r[np.ix_(nonzero, nonzero)] = r_nonzero
    return r


def _fill_block(
    z: FloatArray,
    columns: Sequence[FloatArray],
    shifts: FloatArray,
    root_w: FloatArray | None,
    rows: slice,
    *,
    intercept: bool,
) -> None:
    """Write `rows` of the block ``sqrt(w) * [1 | columns - shifts]`` into `z` (that many rows).

    Without an intercept there is no ones column.
    """
    first = 1 if intercept else 0
    if intercept:
        z[:, 0] = 1.0
    for j, (column, shift) in enumerate(zip(columns, shifts, strict=True), start=first):
        np.subtract(column[rows], shift, out=z[:, j])
    if root_w is not None:
        z *= root_w[rows, np.newaxis]


def shifted_gram(
    columns: Sequence[FloatArray], shifts: FloatArray, root_w: FloatArray | None, *, intercept: bool
) -> FloatArray:
    """Return the Gram matrix of the block `_fill_block` writes, `GRAM_CHUNK_ROWS` at a time."""
    n_rows, n_cols = len(columns[0]), len(columns) + (1 if intercept else 0)
    chunk = np.empty((min(n_rows, GRAM_CHUNK_ROWS), n_cols), order="F")
    gram = np.zeros((n_cols, n_cols))
    for start in range(0, n_rows, GRAM_CHUNK_ROWS):
        stop = min(start + GRAM_CHUNK_ROWS, n_rows)
        z = chunk[: stop - start]
        _fill_block(z, columns, shifts, root_w, slice(start, stop), intercept=intercept)
        gram += np.dot(z.T, z)
    return gram


def _upper_cholesky(gram: FloatArray) -> FloatArray | None:
    """Return the upper-triangular ``R`` with ``R'R = gram``, or None if not positive definite."""
    try:
        lower = np.linalg.cholesky(gram)
    except np.linalg.LinAlgError:
        return None
    return np.ascontiguousarray(lower.T)


SOLVE_BLOCK_ROWS: Final = 64
"""Rows of a triangular solve substituted one by one before the rest are updated at once.

Within a block each row is solved from the ones before it, as plain substitution does; the
rows of earlier blocks enter every row of the next block by one matrix product. Measured
here (one thread) on a 3,000-column factor with 3,000 right-hand sides: 4.8 s row by row.
"""


def _solve_upper(r: FloatArray, b: FloatArray, *, transposed: bool = False) -> FloatArray:
    """Solve ``R v = b`` (or ``R' v = b`` when `transposed`) for an upper-triangular ``R``.

    By substitution (backward for ``R``, forward for ``R'``), `SOLVE_BLOCK_ROWS` rows at a
    time, never by an LU solve: one would pivot on ``R'`` and cost the near-collinear case
    about a digit (measured against a 50-digit solution). `b` is a vector or a matrix.
    """
    n = r.shape[0]
    v = np.empty(b.shape)
    if transposed:
        for start in range(0, n, SOLVE_BLOCK_ROWS):
            stop = min(start + SOLVE_BLOCK_ROWS, n)
            rhs = b[start:stop] - r[:start, start:stop].T @ v[:start]
            for i in range(start, stop):
                v[i] = (rhs[i - start] - r[start:i, i] @ v[start:i]) / r[i, i]
        return v
    # As quiet as LAPACK's solve it replaces: values past float64 come out inf or NaN, and
    # the callers' checks name them.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        for stop in range(n, 0, -SOLVE_BLOCK_ROWS):
            start = max(stop - SOLVE_BLOCK_ROWS, 0)
            rhs = b[start:stop] - r[start:stop, stop:] @ v[stop:]
            for i in range(stop - 1, start - 1, -1):
                v[i] = (rhs[i - start] - r[i, i + 1 : stop] @ v[i + 1 : stop]) / r[i, i]
    return v


SVD_MAX_COLUMNS: Final = 200
"""Most columns of a factor whose condition number is read from its singular values alone.

Past it the eigenvalues of ``R'R`` are read first: on a 1,500-column factor (one thread)
its singular values took 0.85 s, the eigenvalues 0.36 s; a 3,000-column fit spent 17 of its
25 s in two singular value decompositions.
"""

EIGEN_MAX_CONDITION: Final = 1e4
"""Largest condition number taken from the eigenvalues of ``R'R``; past it, singular values.

The smallest eigenvalue's relative error is about ``p eps cond**2``, so the condition number
read this way is good to about 3e-5 relative at 3,000 columns (better below).
"""


def _condition_number(r: FloatArray, gram: FloatArray | None = None) -> float:
    """Return the 2-norm condition number of a square factor ``R`` (`gram` is ``R'R`` if known).

    Singular values up to `SVD_MAX_COLUMNS` columns or past `EIGEN_MAX_CONDITION`; otherwise
    the square root of the ratio of the extreme eigenvalues of ``R'R``.
    """
    if r.shape[0] > SVD_MAX_COLUMNS:
        eigenvalues = np.linalg.eigvalsh(r.T @ r if gram is None else gram)
        low, high = float(eigenvalues[0]), float(eigenvalues[-1])
        if low > 0.0 and high < EIGEN_MAX_CONDITION**2 * low:
            return math.sqrt(high / low)
    singular_values = np.linalg.svd(r, compute_uv=False)
    if singular_values[-1] == 0.0:
        return math.inf
    return float(singular_values[0] / singular_values[-1])


class UncertifiedGram(DataError):
    """Rows added as codes cannot be factored from their Gram matrix (`update_coded`)."""


class _NonFiniteBatch(DataError):
    """A batch holds a NaN or infinite value (`QRAccumulator.update_columns` reports it)."""


def _factor_block(z: FloatArray) -> FloatArray:
    """Return the triangular factor of a shifted, weighted block: Cholesky QR, else Householder.

    Raises
    ------
    DataError
        If the block holds a NaN or infinite value.
    """
    r = _cholesky_r(z) if z.shape[0] >= z.shape[1] else None
    # A NaN or inf in z makes its Gram diagonal non-finite, which sends the block here,
    # so the O(n p) finiteness check runs only on the Householder route.
    if r is None or not np.all(np.isfinite(r)):
        if not np.all(np.isfinite(z)):
            msg = (
                "`x` or `y` passed to `update` holds a NaN or infinite value; drop rows "
                "with missing or non-finite values before fitting"
            )
            raise _NonFiniteBatch(msg)
        r = householder_r(z)
    return r


def _check_weights(weights: ArrayLike, n_rows: int) -> FloatArray:
    """Return ``weights`` as a float64 vector of ``n_rows`` positive, finite values, or raise."""
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (n_rows,):
        msg = f"`weights` passed to `update` must have shape ({n_rows},) like `x`, got {w.shape}"
        raise DataError(msg)
    if not np.all(w > 0.0) or not np.all(np.isfinite(w)):
        msg = (
            "`weights` must be positive and finite, got a value <= 0, NaN or infinite; "
            "filter such rows out (for example with `--where`) before fitting"
        )
        raise DataError(msg)
    return w


def _zero_columns(r: FloatArray, x_shift: FloatArray, *, has_intercept: bool) -> NDArray[np.bool_]:
    """Mark the design columns that are 0 in every row of the factor ``R``.

    With an intercept, ``R`` factors ``sqrt(w) [1 | X - m]``; moving the shift back
    (``x = x~ + m * 1``) changes only row 0, so column ``j``'s weighted sum of squares is
    ``||R[:, j] + R[0, 0] m_j e_0||^2``. A column of zeros gives exactly 0 there when its
    shift is 0, and rounding of about ``|R[0, 0] m_j|`` times the unit roundoff otherwise.
    """
    p = x_shift.size
    columns = r[:, :p].copy()
    moved = np.zeros(p)
    if has_intercept:
        moved = np.abs(r[0, 0] * x_shift)
        columns[0] += r[0, 0] * x_shift
    norms = np.linalg.norm(columns, axis=0)
    return np.asarray(norms <= RANK_TOLERANCE * moved)


def _drop_aliased(r: FloatArray, n_design: int) -> tuple[FloatArray, list[int]]:
    """Remove design columns that lie in the span of earlier ones, refactoring ``R`` after each.

    Parameters
    ----------
    r : ndarray of shape (n_design + 1, n_design + 1)
        Factor of the augmented block ``[design | target]``.
    n_design : int
        Number of design columns (the target column is last and never dropped).

    Returns
    -------
    r : ndarray of shape (k + 1, k + 1)
        Factor of the kept design columns and the target.
    kept : list of int
        Positions of the kept design columns, in order.
    """
    kept = list(range(n_design))
    j = 0
    while j < len(kept):
        column_norm = float(np.linalg.norm(r[: j + 1, j]))
        if abs(r[j, j]) <= RANK_TOLERANCE * column_norm or column_norm == 0.0:
            r = householder_r(np.delete(r, j, axis=1))
            del kept[j]
        else:
            j += 1
    return r, kept


def _as_float_matrix(x: ArrayLike, n_cols: int, where: str) -> FloatArray:
    """Return ``x`` as a float64 matrix with ``n_cols`` columns, or raise `DataError`."""
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] != n_cols:
        msg = (
            f"`x` passed to `{where}` must have shape (n_rows, {n_cols}), got shape {a.shape}; "
            "build it with the same design as the fit"
        )
        raise DataError(msg)
    return a


@dataclass(frozen=True, eq=False)
class _ShiftedFactor:
    """The triangular factor of the kept, shifted design columns, and the shift that maps back."""

    r: FloatArray
    """Upper-triangular ``R`` of ``sqrt(w) * [1 | X - m]`` over the kept columns, shape (k, k)."""
    kept: NDArray[np.intp]
    """Positions of the kept design columns."""
    x_shift: FloatArray
    """Shift of every design column (0 for the intercept and without one), shape (p,)."""
    y_shift: float
    """Shift of the target (0 without an intercept)."""
    shifted_coef: FloatArray
    """Coefficients of the kept shifted columns, predicting ``y - y_shift``."""
    has_intercept: bool
    """Whether column 0 is the intercept column of ones."""

    def to_shifted(self, x: FloatArray) -> FloatArray:
        """Return the kept columns of ``x`` minus their shift."""
        if self.kept.size == x.shape[1]:
            # No aliased column: subtracting keeps x's memory layout (design batches are
            # Fortran-ordered); taking columns by index would copy into C order first,
            # which measured 6 ms on a 65,536 x 9 batch against under 1 ms for this.
            return x - self.x_shift
        return x[:, self.kept] - self.x_shift[self.kept]

    def back_transform(self) -> FloatArray:
        """Return ``A`` with ``b = A b~ + const``: the map from shifted to reported coefficients.

        Only the intercept changes: ``b_0 = b~_0 - sum_j m_j b~_j``, so ``A`` is the
        identity with ``-m`` in the rest of row 0.
        """
        k = len(self.kept)
        a = np.eye(k)
        if self.has_intercept:
            a[0, 1:] = -self.x_shift[self.kept[1:]]
        return a

    def cov_root(self) -> FloatArray:
        """Return ``V = R^-T A'``, so that ``cov(b) = s^2 V'V`` in reported coordinates."""
        return _solve_upper(self.r, self.back_transform().T, transposed=True)

    @functools.cached_property
    def r_inverse(self) -> FloatArray:
        """``R^-1`` (upper triangular), so hat values of many rows cost one matrix product."""
        return np.triu(_solve_upper(self.r, np.eye(self.r.shape[0])))


@dataclass(frozen=True, eq=False)
class LinearFit:
    """A finished least-squares fit: estimates, their uncertainty and fit quality.

    Statistics follow statsmodels' OLS/WLS definitions. Arrays have one entry per
    design column (in `names` order); entries for aliased columns, and standard
    errors, t, p and intervals when no residual degrees of freedom are left, are
    NaN. Flags derived from these numbers are aids to judgement, not verdicts.
    """

    names: tuple[str, ...]
    """Design column names, the intercept first when the model has one."""
    coef: FloatArray
    """Estimates in the original units (the shift is undone)."""
    std_error: FloatArray
    """Standard errors of the estimates."""
    t: FloatArray
    """Estimate divided by its standard error."""
    p: FloatArray
    """Two-sided p-values from Student's t with `df_resid` degrees of freedom."""
    ci_low: FloatArray
    """Lower ends of the 95% confidence intervals (t quantile)."""
    ci_high: FloatArray
    """Upper ends of the 95% confidence intervals."""
    aliased: tuple[str, ...]
    """Names of design columns that get no estimate: in the span of earlier columns (a
    column that is 0 in every row used among them, see `no_rows`)."""
    no_rows: tuple[str, ...]
    """Aliased columns that are 0 in every row used, such as the indicator of a level all of
    whose rows were left out (a missing value in another column): no estimate for want of
    rows, not because the column combines others (`collinear`)."""
    cov: FloatArray
    """Covariance matrix of the estimates, shape (p, p), NaN rows and columns for aliased ones."""
    n: int
    """Rows used."""
    df_model: int
    """Rank of the design minus the intercept."""
    df_resid: int
    """Rows minus the rank of the design."""
    rss: float
    """Residual sum of squares (weighted)."""
    tss: float
    """Total sum of squares: about the weighted mean, or uncentered without an intercept."""
    r2: float
    """``1 - rss / tss`` (uncentered without an intercept)."""
    adj_r2: float
    """``1 - (n - has_intercept) / df_resid * (1 - r2)``; NaN when `df_resid` is 0."""
    resid_sd: float
    """``sqrt(rss / df_resid)``; 0 when `df_resid` is 0 (the fit is exact)."""
    f: float
    """F statistic of the model against the intercept-only model (against zero without one)."""
    f_p: float
    """Upper-tail probability of `f` under F(`df_model`, `df_resid`)."""
    loglik: float
    """Gaussian log-likelihood at the estimates, with ``0.5 * sum(log w)`` for weights."""
    aic: float
    """``-2 loglik + 2 k`` with ``k`` the rank including the intercept."""
    bic: float
    """``-2 loglik + k log(n)``."""
    condition_number: float
    """Condition number of the kept design columns (weighted, not centered) scaled to unit length.

    The scaled, uncentered design of Belsley, Kuh and Welsch: it measures how
    sensitive the reported coefficients, intercept included, are to the data.
    """
    has_intercept: bool
    """Whether the model has an intercept (design column 0)."""
    is_weighted: bool
    """Whether rows carried weights."""
    _factor: _ShiftedFactor = field(repr=False)
    """Triangular factor and shift, for predictions, hat values and robust covariances."""

    @property
    def collinear(self) -> tuple[str, ...]:
        """Aliased columns that are exact combinations of other columns (not `no_rows`)."""
        return tuple(name for name in self.aliased if name not in self.no_rows)

    @property
    def kept_columns(self) -> NDArray[np.intp]:
        """Positions of the design columns that are not aliased (the rows of `to_shifted`)."""
        return self._factor.kept

    @property
    def column_shift(self) -> FloatArray:
        """The shift `to_shifted` subtracts from each design column (0 for the intercept)."""
        return self._factor.x_shift

    def _shifted(self, x: ArrayLike, where: str) -> FloatArray:
        """Check ``x`` (`where` names the public method in errors); shift its kept columns."""
        return self._factor.to_shifted(_as_float_matrix(x, len(self.names), where))

    def to_shifted(self, x: ArrayLike) -> FloatArray:
        """Return design rows as the accumulator factored them: shifted, aliased columns dropped.

        Parameters
        ----------
        x : array_like of shape (n_rows, p)
            Design rows with every column in `names`.

        Returns
        -------
        ndarray of shape (n_rows, k)
            ``[1 | x - m]`` over the kept columns (``x`` unchanged without an
            intercept). Weights are not applied. These are the rows whose outer
            products, times squared residuals, form the ``meat`` for `sandwich`.

        Raises
        ------
        DataError
            If ``x`` does not have ``p`` columns.
        """
        return self._shifted(x, "to_shifted")

    def predict(self, x: ArrayLike) -> FloatArray:
        """Return fitted values for design rows; aliased columns contribute nothing.

        Parameters
        ----------
        x : array_like of shape (n_rows, p)
            Design rows with every column in `names`.

        Returns
        -------
        ndarray of shape (n_rows,)
            Computed in the shifted coordinates, so a predictor with a large mean
            does not cancel against the intercept.

        Raises
        ------
        DataError
            If ``x`` does not have ``p`` columns.
        """
        return self.predict_shifted(self._shifted(x, "predict"))

    def predict_shifted(self, shifted: FloatArray) -> FloatArray:
        """Return fitted values for rows already passed through `to_shifted`."""
        fitted: FloatArray = np.dot(shifted, self._factor.shifted_coef) + self._factor.y_shift
        return fitted

    def leverage(self, x: ArrayLike, weights: ArrayLike | None = None) -> FloatArray:
        """Return hat values ``h_i = w_i * ||R^-T x~_i||^2`` of design rows.

        Parameters
        ----------
        x : array_like of shape (n_rows, p)
            Design rows with every column in `names`.
        weights : array_like of shape (n_rows,), optional
            Row weights of a weighted fit.

        Returns
        -------
        ndarray of shape (n_rows,)
            Diagonal of the hat matrix for these rows (``Q`` is never formed).

        Raises
        ------
        DataError
            If ``x`` does not have ``p`` columns.
        """
        return self.leverage_shifted(self._shifted(x, "leverage"), weights)

    def leverage_shifted(self, shifted: FloatArray, weights: ArrayLike | None = None) -> FloatArray:
        """Return hat values for rows already passed through `to_shifted`.

        ``x~ R^-1`` by one matrix product with the inverse of the small factor: numpy's
        solve per batch cost about 4x more here, and both lose about ``cond(R) * eps``
        relative. `GRAM_CHUNK_ROWS` rows at a time, so the product stays in cache and no
        batch-sized copy is made: 65,536 rows of 31 columns took 5.7 ms instead of 7.8
        (measured here), with the same values.
        """
        r_inverse = self._factor.r_inverse
        h: FloatArray = np.empty(shifted.shape[0])
        for start in range(0, shifted.shape[0], GRAM_CHUNK_ROWS):
            v = np.dot(shifted[start : start + GRAM_CHUNK_ROWS], r_inverse)
            h[start : start + GRAM_CHUNK_ROWS] = np.einsum("ij,ij->i", v, v)
        if weights is not None:
            h *= np.asarray(weights, dtype=np.float64)
        return h

    @functools.cached_property
    def _coded_parts(self) -> tuple[FloatArray, FloatArray]:
        """Shifted coefficients and ``M = R^-1 R^-T`` over every design column, padded.

        One extra zero entry (index p) stands for a reference level, which has no column.
        Aliased columns get zeros.
        """
        f, p = self._factor, len(self.names)
        coef = np.zeros(p + 1)
        coef[f.kept] = f.shifted_coef
        m = np.zeros((p + 1, p + 1))
        m[np.ix_(f.kept, f.kept)] = f.r_inverse @ f.r_inverse.T
        return coef, m

    def _coded_columns(self, design: CodedDesign) -> tuple[FloatArray, FloatArray, list[IntArray]]:
        """Split shifted coded rows into what varies and what does not.

        Returns the dense columns minus their shift as an (n, q) matrix; ``c0``, the part of
        every shifted row that does not depend on its values (1 for the intercept, minus
        the shift of each indicator column, padded); and each factor's padded positions.
        """
        p = len(self.names)
        shifts = self._factor.x_shift[design.dense_positions]
        a = np.empty((design.n_rows, len(design.dense)), order="F")
        for j, (column, shift) in enumerate(zip(design.dense, shifts, strict=True)):
            np.subtract(column, shift, out=a[:, j])
        c0 = np.zeros(p + 1)
        c0[:p] = -self._factor.x_shift
        c0[design.dense_positions] = 0.0
        if self.has_intercept:
            c0[0] = 1.0
        padded = [np.where(f.positions >= 0, f.positions, p) for f in design.factors]
        return a, c0, padded

    def _check_coded(self, design: CodedDesign, where: str) -> None:
        if design.n_cols != len(self.names) or design.has_intercept != self.has_intercept:
            msg = (
                f"the coded design passed to `{where}` has {design.n_cols} columns "
                f"(intercept: {design.has_intercept}); the fit has {len(self.names)} "
                f"(intercept: {self.has_intercept}): build it with the fit's design"
            )
            raise DataError(msg)

    def predict_coded(self, design: CodedDesign) -> FloatArray:
        """Return fitted values of rows whose categoricals come as level codes.

        The same numbers as `predict` on the written-out rows (up to rounding), at the
        cost of the dense columns plus one table look-up per categorical.
        """
        self._check_coded(design, "predict_coded")
        return self._fitted_coded(design, *self._coded_columns(design))

    def leverage_coded(self, design: CodedDesign, weights: ArrayLike | None = None) -> FloatArray:
        """Return hat values of rows whose categoricals come as level codes.

        ``h = w x~' M x~`` with ``M = R^-1 R^-T``, summed from its dense block, one row
        of look-ups per categorical and one per pair of categoricals: O(q^2 + q c + c^2)
        per row for q dense columns and c categoricals, instead of O(p^2).
        """
        self._check_coded(design, "leverage_coded")
        return self._leverage_coded(design, *self._coded_columns(design), weights)

    def fitted_and_leverage_coded(
        self, design: CodedDesign, weights: ArrayLike | None = None
    ) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Return the dense columns minus their shift, fitted values and hat values of coded rows.

        As `predict_coded` and `leverage_coded`, sharing their work. The first is an
        (n, q) Fortran-ordered matrix of the design's dense columns minus the fit's shift
        (aliased ones included), for cross-products of the same rows.
        """
        self._check_coded(design, "fitted_and_leverage_coded")
        a, c0, padded = self._coded_columns(design)
        fitted = self._fitted_coded(design, a, c0, padded)
        return a, fitted, self._leverage_coded(design, a, c0, padded, weights)

    def _fitted_coded(
        self, design: CodedDesign, a: FloatArray, c0: FloatArray, padded: list[IntArray]
    ) -> FloatArray:
        """Fitted values from the parts `_coded_columns` split the rows into."""
        coef, _ = self._coded_parts
        fitted: FloatArray = np.dot(a, coef[design.dense_positions])
        fitted += float(c0 @ coef) + self._factor.y_shift
        for factor, positions in zip(design.factors, padded, strict=True):
            fitted += np.take(coef[positions], factor.codes)
        return fitted

    def _leverage_coded(
        self,
        design: CodedDesign,
        a: FloatArray,
        c0: FloatArray,
        padded: list[IntArray],
        weights: ArrayLike | None,
    ) -> FloatArray:
        """Hat values from the parts `_coded_columns` split the rows into.

        The terms linear in the dense columns ``a`` are gathered first, ``g = a M_dd +
        2 m_c0 + 2 sum_f M[f, dense][code_f]``, so one product ``a . g`` per row replaces
        one per categorical; ``g`` is built column by column (its transpose is contiguous)
        from tables read with np.take, which cost a third of fancy indexing here. The
        terms of the categoricals alone (a level's own, its term with the constant part,
        and every pair of levels) are folded into one table per pair of categoricals.
        Together 2.9 ms instead of 4.0 for the dense terms of 110,749 rows with 6 dense
        columns and 3 categoricals (measured here). `GRAM_CHUNK_ROWS` rows at a time, so
        ``g`` stays in cache: 4.4 ms instead of 5.5 for the whole, caches cold as between
        batches; each row's value is computed the same way either way.
        """
        _, m = self._coded_parts
        dense = design.dense_positions
        m_c0 = m @ c0
        a_t = a.T  # (q, n), C-contiguous: a is Fortran-ordered
        n_rows = a_t.shape[1]
        m_dense = m[np.ix_(dense, dense)]
        linear = (2.0 * m_c0[dense])[:, np.newaxis]
        with_dense = [2.0 * m[np.ix_(dense, positions)] for positions in padded]
        h: FloatArray = np.zeros(n_rows)  # stays 0 without dense columns
        chunk_rows = min(n_rows, GRAM_CHUNK_ROWS)
        g = np.empty(dense.size * chunk_rows)  # each chunk's part a C-contiguous view, for np.dot
        level = np.empty(chunk_rows)
        for start in range(0, n_rows if dense.size else 0, GRAM_CHUNK_ROWS):
            rows = slice(start, min(start + GRAM_CHUNK_ROWS, n_rows))
            size = rows.stop - start
            part, values = g[: dense.size * size].reshape(dense.size, size), level[:size]
            np.dot(m_dense, a_t[:, rows], out=part)
            part += linear
            for factor, table in zip(design.factors, with_dense, strict=True):
                codes = factor.codes[rows]
                for j in range(dense.size):
                    np.take(table[j], codes, out=values, mode="clip")
                    part[j] += values
            part *= a_t[:, rows]
            np.sum(part, axis=0, out=h[rows])
        h += self._categorical_leverage(design, padded, float(c0 @ m_c0), m_c0)
        if weights is not None:
            h *= np.asarray(weights, dtype=np.float64)
        return h

    def _categorical_leverage(
        self, design: CodedDesign, padded: list[IntArray], constant: float, m_c0: FloatArray
    ) -> FloatArray | float:
        """Return the part of each coded row's hat value that involves no dense column.

        ``c0' M c0`` plus, per categorical, its level's own term and its term with ``c0``,
        plus a term per pair of categoricals: the first two folded into the pair tables
        (categorical i's own into pair (i, i + 1), the last one's and the constant into
        pair (0, last)), so c categoricals cost c (c - 1) / 2 look-ups, not c (c + 1) / 2.
        """
        _, m = self._coded_parts
        factors = design.factors
        own = [2.0 * m_c0[positions] + m[positions, positions] for positions in padded]
        if not factors:
            return constant
        if len(factors) == 1:
            return np.take(own[0] + constant, factors[0].codes)
        last = len(factors) - 1
        h = np.zeros(design.n_rows)
        for i, j in itertools.combinations(range(len(factors)), 2):
            table = 2.0 * m[np.ix_(padded[i], padded[j])]
            if j == i + 1:
                table += own[i][:, np.newaxis]
            if (i, j) == (0, last):
                table += own[last] + constant
            h += np.take(table.ravel(), factors[i].codes * padded[j].size + factors[j].codes)
        return h

    def sandwich(self, meat: ArrayLike) -> FloatArray:
        """Return the robust covariance ``B meat B'`` in reported coordinates.

        Parameters
        ----------
        meat : array_like of shape (k, k)
            Sum over rows of ``x~ x~' u^2``, with ``x~`` from `to_shifted` and
            ``u`` the (weighted, possibly rescaled) residual factor of the HC
            variant wanted.

        Returns
        -------
        ndarray of shape (p, p)
            ``A (R'R)^-1 meat (R'R)^-1 A'`` with ``A`` the map from shifted to
            reported coefficients; NaN rows and columns for aliased columns.

        Raises
        ------
        DataError
            If ``meat`` is not ``(k, k)``.
        """
        m = np.asarray(meat, dtype=np.float64)
        k = len(self._factor.kept)
        if m.shape != (k, k):
            msg = (
                f"`meat` passed to `sandwich` must have shape ({k}, {k}) (the kept columns "
                f"of `to_shifted`), got shape {m.shape}"
            )
            raise DataError(msg)
        # U = (R'R)^-1 A' = R^-1 V, so B meat B' in reported coordinates is U' meat U.
        u = _solve_upper(self._factor.r, self._factor.cov_root())
        inner = u.T @ m @ u
        return _embed(0.5 * (inner + inner.T), self._factor.kept, len(self.names))

    def whiten(self, cross: ArrayLike) -> FloatArray:
        """Return ``R^-T cross``: cross-products with the design in the fit's orthonormal basis.

        Parameters
        ----------
        cross : array_like of shape (k, m)
            ``sum(w x~ v')`` over rows, ``x~`` from `to_shifted` (the kept columns), for m
            further columns ``v``.

        Returns
        -------
        ndarray of shape (k, m)
            ``Q' (sqrt(w) v)`` for the orthonormal ``Q`` (never formed) with ``sqrt(w) x~ = Q R``
            over the fit's rows: its squared column norms are the sums of squares of the
            further columns that the design explains. Pass 2 tests added columns this way
            without factoring the design again.
        """
        return _solve_upper(self._factor.r, np.asarray(cross, dtype=np.float64), transposed=True)

    @functools.cached_property
    def shifted_condition_number(self) -> float:
        """2-norm condition number of ``R`` with its columns scaled to unit length.

        The kept design as it was factored (shifted, weighted): what `whiten` loses is
        about this times the rounding unit, relative.
        """
        r = self._factor.r
        return _condition_number(r / np.linalg.norm(r, axis=0))


def _embed(small: FloatArray, kept: NDArray[np.intp], p: int) -> FloatArray:
    """Place a (k, k) matrix over the kept columns into a (p, p) matrix of NaN."""
    full = np.full((p, p), np.nan)
    full[np.ix_(kept, kept)] = small
    return full


@dataclass(frozen=True, eq=False)
class AccumulatedFactor:
    """What a `QRAccumulator` holds so far: the triangular factor and the shift it is taken in."""

    r: FloatArray
    """Upper-triangular ``R``, shape (p + 1, p + 1), non-negative diagonal, with ``R'R = Z'Z``
    for ``Z = sqrt(w) * [X - m | y - m_y]``, whose column 0 is ``sqrt(w)`` with an intercept."""
    x_shift: FloatArray
    """``m``: shift of every design column, shape (p,); 0 for the intercept and without one."""
    y_shift: float
    """``m_y``: shift of the target (0 without an intercept)."""


class QRAccumulator:
    """Streaming, mergeable least-squares accumulator (pass 1).

    Parameters
    ----------
    n_cols : int
        Number of design columns ``p``, the intercept included.
    has_intercept : bool
        Whether design column 0 is the intercept column of ones. Then the other
        columns and the target are shifted by their first-batch means before
        factoring; without one nothing is shifted.

    See Also
    --------
    LinearFit : the result of `finalize`.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.column_stack([np.ones(4), [1.0, 2.0, 3.0, 4.0]])
    >>> acc = QRAccumulator(2, has_intercept=True)
    >>> acc.update(x[:2], np.array([3.0, 5.0]))
    >>> acc.update(x[2:], np.array([7.0, 9.0]))
    >>> acc.finalize(["intercept", "a"]).coef.round(12).tolist()
    [1.0, 2.0]
    """

    def __init__(self, n_cols: int, *, has_intercept: bool, unshifted: Sequence[int] = ()) -> None:
        if n_cols < 1:
            msg = f"`n_cols` must be a positive integer, got `{n_cols}`"
            raise SpecError(msg)
        self._p = n_cols
        self._has_intercept = has_intercept
        self._unshifted = np.asarray(unshifted, dtype=np.intp)
        self._r: FloatArray | None = None
        self._pending: FloatArray | None = None
        """Gram matrix, in this accumulator's shift, of coded rows not yet in ``R``."""
        self._x_shift = np.zeros(n_cols)
        self._y_shift = 0.0
        self._n = 0
        self._sum_log_w = 0.0
        self._is_weighted = False

    @property
    def n_rows(self) -> int:
        """Rows accumulated so far."""
        return self._n

    @classmethod
    def from_gram(
        cls,
        gram: FloatArray,
        x_shift: FloatArray,
        y_shift: float,
        *,
        n_rows: int,
        sum_log_w: float,
        is_weighted: bool,
        has_intercept: bool,
    ) -> QRAccumulator:
        """Start from the Gram matrix of rows in the given shift, as `update_coded` keeps it.

        `gram` is ``Z' W Z`` over ``[design | target]`` shifted by ``(x_shift, y_shift)``;
        it is factored when the fit is asked for, or `UncertifiedGram` is raised then.
        """
        accumulator = cls(x_shift.size, has_intercept=has_intercept)
        accumulator._x_shift = x_shift
        accumulator._y_shift = y_shift
        accumulator._pending = gram
        accumulator._n = n_rows
        accumulator._sum_log_w = sum_log_w
        accumulator._is_weighted = is_weighted
        return accumulator

    @property
    def factor(self) -> AccumulatedFactor | None:
        """A copy of the factor and shift accumulated so far, or None before the first row.

        For callers that need more of the rows than a fit, such as the held-out error of
        any coefficient vector (`triage.core.holdout.HoldoutAccumulator`).
        """
        self._flush()
        if self._r is None:
            return None
        return AccumulatedFactor(self._r.copy(), self._x_shift.copy(), self._y_shift)

    def update(self, x: ArrayLike, y: ArrayLike, weights: ArrayLike | None = None) -> None:
        """Add a batch of design rows.

        Parameters
        ----------
        x : array_like of shape (n_rows, n_cols)
            Design rows; column 0 holds ones when the model has an intercept.
        y : array_like of shape (n_rows,)
            Target values.
        weights : array_like of shape (n_rows,), optional
            Positive, finite row weights; rows are multiplied by ``sqrt(w)``.

        Raises
        ------
        DataError
            If shapes disagree, a value is not finite, a weight is not positive,
            or column 0 is not all ones in a model with an intercept.
        """
        xb = _as_float_matrix(x, self._p, "update")
        yb = np.asarray(y, dtype=np.float64)
        n_rows = xb.shape[0]
        if yb.shape != (n_rows,):
            msg = f"`y` passed to `update` must have shape ({n_rows},) like `x`, got {yb.shape}"
            raise DataError(msg)
        if n_rows and self._has_intercept and not np.all(xb[:, 0] == 1.0):
            msg = (
                "column 0 of `x` must be the intercept column of ones when `has_intercept` "
                "is set; put the intercept first or build the accumulator without one"
            )
            raise DataError(msg)
        first = 1 if self._has_intercept else 0
        # One reduction over the matrix; the shift it gives is the same up to rounding, on
        # which NIST Filip's digits hang (8.1 with these means, 7.2 with column-wise ones).
        starts = not self._has_shift and self._has_intercept and n_rows > 0
        means = xb[:, first:].mean(axis=0) if starts else None
        self._add([xb[:, j] for j in range(first, self._p)], yb, weights, means=means)

    def update_columns(
        self,
        predictors: Sequence[FloatArray],
        y: FloatArray,
        weights: ArrayLike | None = None,
    ) -> bool:
        """Add a batch given column by column; if a value is not finite, add nothing.

        `update` takes a matrix its caller has copied the columns into; here each column
        is copied once, as it is shifted, so a pass can hand over the columns where the
        reader left them. A full-pass fit of 20 million rows and 8 predictors took 3.6
        CPU-s this way against 4.6 through the matrix (medians of five, measured here).

        Parameters
        ----------
        predictors : sequence of ndarray of shape (n_rows,)
            The design columns after the intercept (all of them without an intercept).
        y : ndarray of shape (n_rows,)
            Target values.
        weights : array_like of shape (n_rows,), optional
            As for `update`.

        Returns
        -------
        bool
            False when a value is NaN or infinite: nothing was added, and the caller can
            drop such rows and pass the rest.

        Raises
        ------
        DataError
            If the number of columns or their lengths are wrong, or a weight is not positive.
        """
        n_expected = self._p - (1 if self._has_intercept else 0)
        y_shape = np.shape(y)
        if len(predictors) != n_expected or any(np.shape(c) != y_shape for c in predictors):
            msg = (
                f"`update_columns` takes {n_expected} predictor columns as long as `y` "
                f"(shape {y_shape}), got {[np.shape(c) for c in predictors]}"
            )
            raise DataError(msg)
        try:
            self._add(predictors, y, weights)
        except _NonFiniteBatch:
            return False
        return True

    def _add(
        self,
        predictors: Sequence[FloatArray],
        y: FloatArray,
        weights: ArrayLike | None,
        *,
        means: FloatArray | None = None,
    ) -> None:
        """Shift the columns into one block (ones first with an intercept), factor and absorb it.

        `means`, when given, are the predictors' means, for the first batch's shift.
        """
        n_rows = len(y)
        if n_rows == 0:
            return
        w = None if weights is None else _check_weights(weights, n_rows)
        root_w = None if w is None else np.sqrt(w)
        first = 1 if self._has_intercept else 0
        # A NaN or inf in the batch may raise floating-point warnings while shifting and
        # factoring; `_factor_block` reports it as a DataError, so the warnings are not wanted.
        with np.errstate(invalid="ignore", over="ignore"):
            x_shift, y_shift = self._x_shift, self._y_shift
            if not self._has_shift and self._has_intercept:
                # Any shift near the data works (the ones column stays in the factor);
                # the first batch's means keep shifted values small.
                found = [np.mean(c) for c in predictors] if means is None else means
                x_shift = np.append(0.0, found)
                x_shift[self._unshifted] = 0.0
                y_shift = float(np.mean(y))
            columns, shifts = [*predictors, y], np.append(x_shift[first:], y_shift)
            intercept = self._has_intercept
            r_batch = None
            if n_rows > self._p:
                r_batch = _gram_factor(shifted_gram(columns, shifts, root_w, intercept=intercept))
            if r_batch is None:  # the block itself is needed (and its Gram formed again)
                z = np.empty((n_rows, self._p + 1), order="F")
                _fill_block(z, columns, shifts, root_w, slice(None), intercept=intercept)
                r_batch = _factor_block(z)
        # Commit only now, so a rejected batch leaves the accumulator as it was.
        self._x_shift, self._y_shift = x_shift, y_shift
        if w is not None:
            self._sum_log_w += float(np.log(w).sum())
            self._is_weighted = True
        self._absorb(r_batch, n_rows)

    @property
    def _has_shift(self) -> bool:
        """Whether rows have come in, so the shift is fixed."""
        return self._r is not None or self._pending is not None

    def update_coded(
        self, design: CodedDesign, y: FloatArray, weights: ArrayLike | None = None
    ) -> bool:
        """Add a batch whose categoricals come as level codes (`triage.core.indicators`).

        Its Gram matrix is formed from the dense columns and from counts and per-level sums,
        never from indicator columns, and added to a Gram matrix pending for the rows not yet
        factored. Indicator columns are not shifted (pass their positions as `unshifted`).
        The pending rows are factored when the fit or the factor is asked for: by Cholesky
        when the equilibrated condition number certifies it (`GRAM_MAX_CONDITION`), else
        `UncertifiedGram` is raised and the caller passes the rows again as dense batches.

        Returns
        -------
        bool
            False when a value is NaN or infinite: nothing was added.
        """
        n_rows = len(y)
        if n_rows == 0:
            return True
        w = None if weights is None else _check_weights(weights, n_rows)
        root_w = None if w is None else np.sqrt(w)
        intercept = self._has_intercept
        with np.errstate(invalid="ignore", over="ignore"):
            x_shift, y_shift = self._x_shift, self._y_shift
            if not self._has_shift and intercept:
                x_shift = np.zeros(self._p)
                x_shift[design.dense_positions] = [np.mean(c) for c in design.dense]
                y_shift = float(np.mean(y))
            shifts = np.append(x_shift[design.dense_positions], y_shift)
            gram = coded_gram(design, [*design.dense, y], shifts, w, root_w)
        if not np.all(np.isfinite(np.diagonal(gram))):
            return False
        self._x_shift, self._y_shift = x_shift, y_shift
        if w is not None:
            self._sum_log_w += float(np.log(w).sum())
            self._is_weighted = True
        self._pending = gram if self._pending is None else self._pending + gram
        self._n += n_rows
        return True

    def _flush(self) -> None:
        """Factor the pending Gram matrix into ``R``, or raise `UncertifiedGram`."""
        if self._pending is None:
            return
        r = _certified_gram_factor(self._pending)
        if r is None:
            msg = (
                "the design is too ill-conditioned to be factored from its counts and sums; "
                "its rows must be passed again with the indicator columns written out"
            )
            raise UncertifiedGram(msg)
        self._pending = None
        self._absorb(r, 0)

    def _absorb(self, r_other: FloatArray, n_rows: int) -> None:
        """Stack a factor (in this accumulator's shift) onto ours and refactor."""
        if self._r is None:
            self._r = r_other
        else:
            self._r = householder_r(np.vstack([self._r, r_other]))
        self._n += n_rows

    def merge(self, other: QRAccumulator) -> Self:
        """Add another accumulator's rows to this one (in place) and return self.

        The other factor is first expressed in this accumulator's shift: moving
        column ``j`` from shift ``m'`` to ``m`` adds ``(m' - m)`` times the weighted
        ones column, which changes only row 0 of an upper-triangular ``R``.

        Parameters
        ----------
        other : QRAccumulator
            An accumulator over the same design columns; it is not modified.

        Returns
        -------
        QRAccumulator
            This accumulator.

        Raises
        ------
        SpecError
            If the two accumulators describe different designs.
        """
        if other._p != self._p or other._has_intercept != self._has_intercept:
            msg = (
                f"cannot merge an accumulator of {other._p} columns "
                f"(intercept: {other._has_intercept}) into one of {self._p} columns "
                f"(intercept: {self._has_intercept}); both must come from the same design"
            )
            raise SpecError(msg)
        if not other._has_shift:
            return self
        delta = np.zeros(self._p + 1)
        if not self._has_shift:
            self._x_shift = other._x_shift.copy()
            self._y_shift = other._y_shift
        elif self._has_intercept:
            delta = np.append(other._x_shift - self._x_shift, other._y_shift - self._y_shift)
            delta[0] = 0.0
        if other._pending is not None:
            # Moving to our shift adds delta times the (weighted) ones column: Z' = Z T with
            # T = I + e0 delta', so Z'Z' = G + g0 delta' + delta g0' + G00 delta delta'.
            g0 = other._pending[:, 0]
            pending = (
                other._pending
                + np.outer(g0, delta)
                + np.outer(delta, g0)
                + other._pending[0, 0] * np.outer(delta, delta)
            )
            self._pending = pending if self._pending is None else self._pending + pending
        if other._r is not None:
            r_other = other._r.copy()
            r_other[0] += r_other[0, 0] * delta
            self._absorb(r_other, 0)
        self._n += other._n
        self._sum_log_w += other._sum_log_w
        self._is_weighted = self._is_weighted or other._is_weighted
        return self

    def finalize(self, names: Sequence[str]) -> LinearFit:
        """Solve the least-squares problem and compute the fit statistics.

        Parameters
        ----------
        names : sequence of str
            One name per design column.

        Returns
        -------
        LinearFit
            The fit; the accumulator can keep taking batches afterwards.

        Raises
        ------
        SpecError
            If the number of names differs from `n_cols`.
        DataError
            If no rows were added, or every design column is zero or aliased.
        """
        names = tuple(names)
        if len(names) != self._p:
            msg = f"`names` must hold {self._p} design column names, got {len(names)}"
            raise SpecError(msg)
        self._flush()
        if self._r is None:
            msg = (
                "no rows reached the fit; check the filter and the rows dropped for missing values"
            )
            raise DataError(msg)
        zero = _zero_columns(self._r, self._x_shift, has_intercept=self._has_intercept)
        r, kept_list = _drop_aliased(self._r.copy(), self._p)
        k = len(kept_list)
        if k == 0:
            msg = "every design column is zero or aliased; the model has nothing to estimate"
            raise DataError(msg)
        kept = np.asarray(kept_list, dtype=np.intp)
        n = self._n
        df_resid = n - k
        df_model = k - int(self._has_intercept)

        qty = r[:k, k]
        shifted_coef = _solve_upper(r[:k, :k], qty)
        factor = _ShiftedFactor(
            r=np.ascontiguousarray(r[:k, :k]),
            kept=kept,
            x_shift=self._x_shift.copy(),
            y_shift=self._y_shift,
            shifted_coef=shifted_coef,
            has_intercept=self._has_intercept,
        )
        reported = shifted_coef.copy()
        if self._has_intercept:
            reported[0] += self._y_shift - self._x_shift[kept[1:]] @ shifted_coef[1:]

        # Both sums of squares are sums of squares of entries of R: no cancellation.
        ess = float(np.sum(qty[int(self._has_intercept) :] ** 2))
        rss = float(r[k, k] ** 2) if df_resid > 0 else 0.0
        tss = ess + rss

        v = factor.cov_root()
        nan = math.nan
        if df_resid > 0:
            scale = rss / df_resid
            resid_sd = math.sqrt(scale)
            cov_k = scale * (v.T @ v)
            se_k = np.sqrt(scale * np.einsum("ij,ij->j", v, v))
            # A standard error that is not a finite number leaves t, p and the interval
            # unknown too, never a finite t and p beside it.
            se_k = np.where(np.isfinite(se_k), se_k, nan)
            with np.errstate(divide="ignore", invalid="ignore"):
                t_k = reported / se_k
            p_k = 2.0 * t_sf(np.abs(t_k), df_resid)
            half_width = t_ppf(0.975, df_resid) * se_k
            adj_r2 = (
                1.0 - (n - int(self._has_intercept)) / df_resid * (rss / tss) if tss > 0 else nan
            )
            if df_model == 0:
                f, f_p = nan, nan
            else:
                f = (ess / df_model) / scale if scale > 0.0 else math.inf
                f_p = f_sf(f, df_model, df_resid)
            # statsmodels' WLS log-likelihood (regression/linear_model.py, WLS.loglike).
            half_n = n / 2.0
            loglik = (
                -half_n * math.log(rss) - (1.0 + math.log(math.pi / half_n)) * half_n
                if rss > 0.0
                else math.inf
            ) + 0.5 * self._sum_log_w
            aic = -2.0 * loglik + 2.0 * k
            bic = -2.0 * loglik + k * math.log(n)
        else:
            # As many parameters as rows: an exact fit with nothing left to judge it by.
            resid_sd = 0.0
            cov_k = np.full((k, k), nan)
            se_k = t_k = p_k = half_width = np.full(k, nan)
            adj_r2 = f = f_p = loglik = aic = bic = nan
        r2 = 1.0 - rss / tss if tss > 0 else nan

        p = self._p
        kept_set = set(kept_list)

        def spread(values: FloatArray) -> FloatArray:
            full = np.full(p, nan)
            full[kept] = values
            return full

        return LinearFit(
            names=names,
            coef=spread(reported),
            std_error=spread(se_k),
            t=spread(t_k),
            p=spread(p_k),
            ci_low=spread(reported - half_width),
            ci_high=spread(reported + half_width),
            aliased=tuple(name for j, name in enumerate(names) if j not in kept_set),
            no_rows=tuple(name for j, name in enumerate(names) if j not in kept_set and zero[j]),
            cov=_embed(cov_k, kept, p),
            n=n,
            df_model=df_model,
            df_resid=df_resid,
            rss=rss,
            tss=tss,
            r2=r2,
            adj_r2=adj_r2,
            resid_sd=resid_sd,
            f=f,
            f_p=f_p,
            loglik=loglik,
            aic=aic,
            bic=bic,
            condition_number=_scaled_condition_number(factor),
            has_intercept=self._has_intercept,
            is_weighted=self._is_weighted,
            _factor=factor,
        )


class OpenLevelAccumulator:
    """Pass 1's sums while the levels of its categoricals are still being found; mergeable.

    Rows come as their dense design columns (neither the intercept nor indicators), target,
    weights and one level code per categorical. The sums are kept by level (`LevelGram`),
    every level in its place, so a level joins when a batch first holds it and the
    reference level is chosen after the pass; `to_accumulator` then writes them out in the
    design's order as a `QRAccumulator`'s Gram matrix. The dense columns and the target are
    shifted by the first batch's means (with an intercept), as `QRAccumulator` does.

    Parameters
    ----------
    n_dense : int
        Dense design columns (the intercept and the indicators left out).
    has_intercept : bool
        Whether the design has an intercept.
    """

    def __init__(self, n_dense: int, *, has_intercept: bool) -> None:
        self._has_intercept = has_intercept
        self._gram: LevelGram | None = None
        self._shift = np.zeros(n_dense + 1)
        self._n = 0
        self._sum_log_w = 0.0
        self._is_weighted = False

    @property
    def n_rows(self) -> int:
        """Rows accumulated so far."""
        return self._n

    def update(
        self,
        dense: Sequence[FloatArray],
        y: FloatArray,
        weights: FloatArray | None,
        codes: Sequence[NDArray[np.integer]],
        n_levels: Sequence[int],
    ) -> bool:
        """Add a batch: `codes[i]` holds each row's level of categorical i, of `n_levels[i]`.

        Returns False, adding nothing, when a sum is not finite (values whose squares pass
        float64): the rows must then be factored written out.
        """
        n_rows = len(y)
        if n_rows == 0:
            return True
        w = None if weights is None else _check_weights(weights, n_rows)
        root_w = None if w is None else np.sqrt(w)
        with np.errstate(invalid="ignore", over="ignore"):
            shift = self._shift
            if self._gram is None and self._has_intercept:
                shift = np.array([*(np.mean(c) for c in dense), np.mean(y)])
            (batch,) = level_grams(
                codes,
                n_levels,
                [*dense, y],
                shift,
                [SummedBlock(len(dense) + 1, w, root_w)],
                has_intercept=self._has_intercept,
            )
        if not np.all(np.isfinite(np.diagonal(batch.dense))):
            return False
        self.add(batch, shift, n_rows, w)
        return True

    def add(
        self, batch: LevelGram, shift: FloatArray, n_rows: int, weights: FloatArray | None
    ) -> None:
        """Add a batch's sums (of `n_rows` rows with `weights`), formed in `shift`.

        The first batch's shift is kept; a later batch in another shift is moved to it.
        """
        if weights is not None:
            self._sum_log_w += float(np.log(weights).sum())
            self._is_weighted = True
        if self._gram is None:
            self._shift = shift
            self._gram = batch
        else:
            self._gram.grow(batch.n_levels)
            self._gram.add(batch.moved(shift - self._shift))
        self._n += n_rows

    def merge(
        self, other: OpenLevelAccumulator, where: Sequence[IntArray], n_levels: Sequence[int]
    ) -> Self:
        """Add another part's sums (it is not modified) and return self.

        `where[i][k]` is our level of the other's level k of categorical i, and `n_levels`
        our levels once the other's are added (`triage.core.levels.FoundLevels.absorb`).
        """
        if other._gram is None:
            return self
        if self._gram is None:
            self._shift = other._shift.copy()
            self._gram = LevelGram.empty(
                other._gram.dense.shape[0], n_levels, has_intercept=self._has_intercept
            )
        self._gram.grow(n_levels)
        self._gram.add(other._gram.moved(other._shift - self._shift), where)
        self._n += other._n
        self._sum_log_w += other._sum_log_w
        self._is_weighted = self._is_weighted or other._is_weighted
        return self

    def to_accumulator(
        self, n_cols: int, dense_positions: IntArray, level_positions: Sequence[IntArray]
    ) -> QRAccumulator:
        """Write the sums out over a design of `n_cols` columns as a `QRAccumulator`.

        `dense_positions` gives the design column of each dense column; `level_positions[i][k]`
        that of level k of categorical i (as found), or -1 for its reference level.
        """
        x_shift = np.zeros(n_cols)
        if self._gram is None:
            return QRAccumulator(n_cols, has_intercept=self._has_intercept)
        x_shift[dense_positions] = self._shift[:-1]
        self._gram.grow([positions.size for positions in level_positions])
        gram = self._gram.assemble(
            np.append(dense_positions, n_cols).astype(np.intp), level_positions, n_cols + 1
        )
        return QRAccumulator.from_gram(
            gram,
            x_shift,
            float(self._shift[-1]),
            n_rows=self._n,
            sum_log_w=self._sum_log_w,
            is_weighted=self._is_weighted,
            has_intercept=self._has_intercept,
        )


def fit_arrays(
    x: ArrayLike,
    y: ArrayLike,
    names: Sequence[str],
    *,
    has_intercept: bool,
    weights: ArrayLike | None = None,
) -> LinearFit:
    """Fit rows held in memory in one batch: `QRAccumulator` update then finalize.

    Parameters
    ----------
    x : array_like of shape (n_rows, p)
        Design rows (the intercept column first when `has_intercept`).
    y : array_like of shape (n_rows,)
        Target.
    names : sequence of str
        One name per design column.
    has_intercept : bool
        Whether column 0 of `x` is the intercept.
    weights : array_like of shape (n_rows,), optional
        Positive, finite row weights.

    Returns
    -------
    LinearFit

    Raises
    ------
    DataError, SpecError
        As `QRAccumulator.update` and `QRAccumulator.finalize`.
    """
    accumulator = QRAccumulator(len(names), has_intercept=has_intercept)
    accumulator.update(x, y, weights)
    return accumulator.finalize(names)


def _scaled_condition_number(factor: _ShiftedFactor) -> float:
    """Return the condition number of the unshifted kept design with columns scaled to unit length.

    Moving the shift back (``x = x~ + m * 1``) changes only row 0 of ``R``.
    """
    r = factor.r.copy()
    if factor.has_intercept:
        r[0, 1:] += r[0, 0] * factor.x_shift[factor.kept[1:]]
    return _condition_number(r / np.linalg.norm(r, axis=0))
