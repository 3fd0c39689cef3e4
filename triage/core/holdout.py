"""Held-out rows: which rows are set aside, and how well any coefficient vector predicts them.

A row is held out by a rule that depends only on the row itself, never on how a pass was
cut into batches: either a pseudo-random key of its source position (mixed with a seed)
falls below a fraction, or a column's value is at or past a cut (time-ordered data: fit
on earlier rows, score on later ones). The same rows are therefore held out in a quick
fit on a sample and in a full pass.

The coefficients are known only after the pass, so the held-out rows are scored without
a second pass: `HoldoutAccumulator` keeps, through a `QRAccumulator` over ``[1 | X]``, the
upper-triangular factor ``R`` of the shifted, weighted block
``Z = sqrt(w) * [1 | X - m | y - m_y]`` over the held-out rows (size ``(p + 2, p + 2)``),
from which the held-out error of *any* coefficient vector follows afterwards:

- residuals ``y - X b = Z v`` with ``v = [m_y - m'b, -b, 1]``, so the held-out sum of
  squared errors is ``SSE(b) = ||Z v||^2 = ||R v||^2`` (a (p + 2)-vector, no cancellation
  between large sums);
- column 0 of ``Z`` is ``sqrt(w)``, so ``R[0, 0]^2 = sum(w)`` and the squared norm of the
  last column of ``R`` below row 0 is the weighted sum of squares of ``y`` about its
  weighted held-out mean, ``SST``;
- held-out ``R² = 1 - SSE / SST`` (about the held-out mean, as scikit-learn's
  ``r2_score``; it is negative when the model predicts worse than that mean) and
  ``RMSE = sqrt(SSE / sum(w))``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Self

import numpy as np
import polars as pl

from triage.core.lsq import QRAccumulator, fit_arrays
from triage.errors import DataError, SpecError
from triage.results.holdout import HoldoutScore, KFoldErrors, KFoldResult

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "HoldoutAccumulator",
    "HoldoutRule",
    "cut_holdout_mask",
    "kfold_rmse",
    "random_holdout_mask",
]


@dataclass(frozen=True)
class HoldoutRule:
    """Which rows are held out of the fit and scored afterwards.

    Exactly one of `fraction` and `column` is set.

    Attributes
    ----------
    fraction : float or None
        Share of rows held out at random, in (0, 1).
    column : str or None
        Column whose values at or past `cut` mark a held-out row.
    cut : object
        The cut value (a number, date or text, compared in the column's type).
    seed : int
        Seed mixed with each row's source position for the random rule.
    """

    fraction: float | None = None
    column: str | None = None
    cut: object = None
    seed: int = 0

    def __post_init__(self) -> None:
        if (self.fraction is None) == (self.column is None):
            msg = (
                "a held-out rule needs exactly one of a fraction (`--holdout`) and a column "
                f"(`--holdout-by`), got fraction `{self.fraction}` and column `{self.column}`"
            )
            raise SpecError(msg)
        if self.fraction is not None and not 0.0 < self.fraction < 1.0:
            msg = f"`--holdout` must be a fraction between 0 and 1, got `{self.fraction}`"
            raise SpecError(msg)
        if self.column is not None and self.cut is None:
            msg = f"`--holdout-by {self.column}` needs a cut value: add `--cut VALUE`"
            raise SpecError(msg)

    def describe(self) -> str:
        """Say in words which rows are held out."""
        if self.column is not None:
            return f"rows with `{self.column}` >= {self.cut} (earlier rows fit, later rows scored)"
        return f"{self.fraction:.0%} of rows at random (seed {self.seed}), by row position"


def random_holdout_mask(keys: NDArray[np.uint64], fraction: float) -> NDArray[np.bool_]:
    """Mark rows whose pseudo-random key, read as a number in [0, 1), is below `fraction`.

    Parameters
    ----------
    keys : ndarray of uint64
        One key per row, a fixed function of the row's position and a seed (for example
        `triage.data.base.random_keys`), so the mask does not depend on batching.
    fraction : float
        Share of rows to hold out, in (0, 1).

    Returns
    -------
    ndarray of bool
        True for held-out rows; the top 53 bits of each key give a uniform double.
    """
    uniform = (keys >> np.uint64(11)).astype(np.float64) * 2.0**-53
    mask: NDArray[np.bool_] = uniform < fraction
    return mask


def cut_holdout_mask(values: pl.Series, cut: object) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Mark rows whose value is at or past `cut`, and rows whose value is known.

    Parameters
    ----------
    values : polars.Series
        The held-out-by column for some rows.
    cut : object
        The cut; text is converted to the column's type (``"2024-07-01"`` for a date).

    Returns
    -------
    held_out : ndarray of bool
        True where the value is >= `cut`.
    known : ndarray of bool
        False where the value is missing: such rows are neither fitted nor scored.

    Raises
    ------
    SpecError
        When `cut` cannot be read in the column's type.
    """
    cut_value = _cast_cut(values, cut)
    known = values.is_not_null().to_numpy()
    held_out = (values >= cut_value).fill_null(value=False).to_numpy()
    return held_out.astype(bool), known.astype(bool)


def _cast_cut(values: pl.Series, cut: object) -> pl.Series:
    """Return `cut` as a one-element series of the column's type."""
    try:
        cut_series = pl.Series([cut])
        if isinstance(cut, str) and values.dtype == pl.Date:
            return cut_series.str.to_date()
        if isinstance(cut, str) and values.dtype.is_temporal():
            # polars 2 no longer casts text to dates: parse it first.
            return cut_series.str.to_datetime().cast(values.dtype)
        return cut_series.cast(values.dtype, strict=True)
    except (pl.exceptions.PolarsError, ValueError, TypeError) as error:
        msg = (
            f"cannot read the cut `{cut}` as a value of `{values.name}` (type {values.dtype}): "
            f"{error}; give a value of that type to `--cut`"
        )
        raise SpecError(msg) from error


class HoldoutAccumulator:
    """Streaming, mergeable factor of the held-out rows, able to score any coefficients.

    Parameters
    ----------
    n_cols : int
        Number of design columns ``p`` (the intercept column included when there is one).

    Notes
    -----
    See the module docstring for the formulas. The factor is kept by a `QRAccumulator`
    over ``[1 | X]`` with an intercept, so the held-out rows get the same shifted,
    streaming and mergeable factorization as the fit (CholeskyQR2 per batch while well
    conditioned, Householder otherwise). With a design that has its own intercept column,
    that column becomes a zero column once shifted, which the factorization allows.
    """

    def __init__(self, n_cols: int) -> None:
        if n_cols < 1:
            msg = f"`n_cols` must be a positive integer, got `{n_cols}`"
            raise SpecError(msg)
        self._p = n_cols
        self._qr = QRAccumulator(n_cols + 1, has_intercept=True)

    @property
    def n_rows(self) -> int:
        """Held-out rows accumulated so far."""
        return self._qr.n_rows

    def update(self, x: ArrayLike, y: ArrayLike, weights: ArrayLike | None = None) -> None:
        """Add a batch of held-out design rows.

        Parameters
        ----------
        x : array_like of shape (n_rows, n_cols)
            Design rows, built exactly as for the fit.
        y : array_like of shape (n_rows,)
            Target values.
        weights : array_like of shape (n_rows,), optional
            Positive, finite row weights.

        Raises
        ------
        DataError
            If shapes disagree, a value is not finite or a weight is not positive.
        """
        xb = np.asarray(x, dtype=np.float64)
        yb = np.asarray(y, dtype=np.float64)
        if xb.ndim != 2 or xb.shape[1] != self._p or yb.shape != (xb.shape[0],):
            msg = (
                f"held-out rows must be `x` of shape (n_rows, {self._p}) and `y` of shape "
                f"(n_rows,), got {xb.shape} and {yb.shape}; build them with the fit's design"
            )
            raise DataError(msg)
        ones_and_x = np.empty((xb.shape[0], self._p + 1), order="F")
        ones_and_x[:, 0] = 1.0
        ones_and_x[:, 1:] = xb
        self._qr.update(ones_and_x, yb, weights)

    def merge(self, other: HoldoutAccumulator) -> Self:
        """Add another accumulator's rows to this one (in place) and return self.

        Parameters
        ----------
        other : HoldoutAccumulator
            An accumulator over the same design columns; it is not modified.

        Returns
        -------
        HoldoutAccumulator
            This accumulator.

        Raises
        ------
        SpecError
            If the two accumulators have different numbers of columns.
        """
        if other._p != self._p:
            msg = (
                f"cannot merge held-out rows of {other._p} design columns into rows of "
                f"{self._p}; both must come from the same design"
            )
            raise SpecError(msg)
        self._qr.merge(other._qr)
        return self

    def score(self, coef: ArrayLike) -> HoldoutScore:
        """Score coefficients on the held-out rows.

        Parameters
        ----------
        coef : array_like of shape (n_cols,)
            Coefficients in the design's column order; NaN (an aliased column that got no
            estimate) counts as 0, as in `LinearFit.predict`.

        Returns
        -------
        HoldoutScore
            All NaN but ``n = 0`` when no rows were held out.
        """
        b = np.nan_to_num(np.asarray(coef, dtype=np.float64), nan=0.0)
        if b.shape != (self._p,):
            msg = f"`coef` must hold {self._p} values, got shape {b.shape}"
            raise DataError(msg)
        factor = self._qr.factor
        if factor is None:
            return HoldoutScore(0, math.nan, math.nan, math.nan, math.nan)
        # The ones column is unshifted (x_shift[0] = 0); the design columns follow it.
        v = np.concatenate([[factor.y_shift - factor.x_shift[1:] @ b], -b, [1.0]])
        sse = float(np.sum((factor.r @ v) ** 2))
        sst = float(np.sum(factor.r[1:, -1] ** 2))
        sum_w = float(factor.r[0, 0] ** 2)
        r2 = 1.0 - sse / sst if sst > 0.0 else math.nan
        return HoldoutScore(self.n_rows, sse, sst, r2, math.sqrt(sse / sum_w))


def kfold_test_rows(n_rows: int, folds: int, seed: int) -> list[NDArray[np.intp]]:
    """Split row positions ``0 .. n_rows - 1`` into shuffled folds: each fold's held-out rows.

    The folds of scikit-learn's ``KFold(folds, shuffle=True, random_state=seed)``, without its
    import (about 1.4 s): the positions shuffled by numpy's legacy ``RandomState(seed)``, cut in
    order into `folds` runs of ``n_rows // folds`` rows, the first ``n_rows % folds`` one row
    longer; each run is returned sorted.

    Examples
    --------
    >>> [fold.tolist() for fold in kfold_test_rows(7, 3, seed=0)]
    [[1, 2, 6], [0, 3], [4, 5]]
    """
    order = np.arange(n_rows)
    np.random.RandomState(seed).shuffle(order)
    sizes = np.full(folds, n_rows // folds)
    sizes[: n_rows % folds] += 1
    return [np.sort(run) for run in np.split(order, np.cumsum(sizes)[:-1])]


def _held_out_residuals(
    x: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None,
    *,
    has_intercept: bool,
    folds: int,
    seed: int,
) -> list[tuple[NDArray[np.float64], NDArray[np.float64]]] | None:
    """Each fold's held-out residuals and weights (ones without weights); None if too few rows."""
    if folds < 2:
        msg = f"`--folds` must be an integer of at least 2, got `{folds}`"
        raise SpecError(msg)
    xa = np.asarray(x, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    wa = None if weights is None else np.asarray(weights, dtype=np.float64)
    if xa.shape[0] < folds:
        return None
    names = [f"c{j}" for j in range(xa.shape[1])]
    out = []
    for test in kfold_test_rows(xa.shape[0], folds, seed):
        train = np.ones(xa.shape[0], dtype=bool)
        train[test] = False
        w_train = None if wa is None else wa[train]
        fit = fit_arrays(xa[train], ya[train], names, has_intercept=has_intercept, weights=w_train)
        resid = ya[test] - fit.predict(xa[test])
        out.append((resid, np.ones(test.size) if wa is None else wa[test]))
    return out


def kfold_errors(
    x: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None = None,
    *,
    has_intercept: bool,
    folds: int = 5,
    seed: int = 0,
) -> KFoldErrors | None:
    """Score a design on held-out folds by RMSE and by median absolute error.

    Parameters are those of `kfold_rmse`; the folds are the same.

    Returns
    -------
    KFoldErrors or None
        None when there are fewer rows than folds.
    """
    parts = _held_out_residuals(x, y, weights, has_intercept=has_intercept, folds=folds, seed=seed)
    if parts is None:
        return None
    rmse = [math.sqrt(float(np.sum(w * e**2) / np.sum(w))) for e, w in parts]
    scaled = np.concatenate([np.sqrt(w) * np.abs(e) for e, w in parts])
    return KFoldErrors(folds, float(np.mean(rmse)), float(np.median(scaled)))


def kfold_rmse(
    x: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None = None,
    *,
    has_intercept: bool,
    folds: int = 5,
    seed: int = 0,
) -> KFoldResult | None:
    """Estimate prediction error by K-fold cross-validation, fitting with `fit_arrays`.

    Parameters
    ----------
    x : array_like of shape (n_rows, p)
        Design rows (the intercept column first when `has_intercept`).
    y : array_like of shape (n_rows,)
        Target.
    weights : array_like of shape (n_rows,), optional
        Row weights; each fold's RMSE is then ``sqrt(sum(w e^2) / sum(w))``.
    has_intercept : bool
        Whether column 0 of `x` is the intercept.
    folds : int, default=5
        Number of folds, at least 2.
    seed : int, default=0
        Seed of the shuffle that assigns rows to folds (`kfold_test_rows`: the folds of
        ``sklearn.model_selection.KFold(folds, shuffle=True, random_state=seed)``).

    Returns
    -------
    KFoldResult or None
        None when there are fewer rows than folds.

    Raises
    ------
    SpecError
        If `folds` is below 2.
    """
    parts = _held_out_residuals(x, y, weights, has_intercept=has_intercept, folds=folds, seed=seed)
    if parts is None:
        return None
    return KFoldResult(
        folds, tuple(math.sqrt(float(np.sum(w * e**2) / np.sum(w))) for e, w in parts)
    )
