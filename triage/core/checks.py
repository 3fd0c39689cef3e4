"""Checks run on the in-memory sample: a robust refit, and a curvature check per predictor.

- **Robust refit.** scikit-learn's `HuberRegressor` down-weights rows with large residuals.
  Each coefficient's move from the ordinary least-squares value, in units of its ordinary
  standard error, shows whether a few rows pull that coefficient. A large move is a hint
  to look at the worst rows, not a verdict that the ordinary fit is wrong.
- **Curvature check.** For each numeric predictor, the plain linear term is replaced by a
  cubic B-spline basis of the predictor (scikit-learn's `SplineTransformer`) and the
  held-out errors of K folds are compared with the model's own, by RMSE and by median
  absolute error (robust to a few gross errors). A clear gain suggests the predictor's
  effect is curved and a transform may help.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Final

import numpy as np

from triage.core.holdout import kfold_errors
from triage.core.lsq import fit_arrays
from triage.errors import DataError
from triage.results.checks import CoefficientShift, CurvatureCheck, PredictorCurvature, RobustCheck
from triage.results.holdout import KFoldErrors

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "CURVATURE_GAIN_THRESHOLD",
    "ROBUST_SHIFT_THRESHOLD",
    "curvature_check",
    "huber_refit",
]

ROBUST_SHIFT_THRESHOLD: Final = 1.0
"""A coefficient is flagged when the robust estimate is this many ordinary standard errors away.

Our own choice, not a published rule: both estimates come from the same rows, so they are
strongly correlated and their difference is usually far smaller than one standard error;
a move of a whole standard error means some rows pull the estimate.
"""

HUBER_EPSILON: Final = 1.35
"""Huber's tuning constant: 95% efficiency under normal errors (scikit-learn's default)."""

CURVATURE_GAIN_THRESHOLD: Final = 0.01
"""A predictor is flagged when the spline lowers the K-fold RMSE by at least this share (1%).

Our own choice: smaller gains are within what an extra handful of free parameters buys by
chance on a large sample.
"""

SPLINE_KNOTS: Final = 5
"""Knots of the cubic spline basis (at quantiles of the predictor): 6 basis columns."""


def huber_refit(
    x: ArrayLike,
    y: ArrayLike,
    names: Sequence[str],
    *,
    has_intercept: bool,
    weights: ArrayLike | None = None,
    epsilon: float = HUBER_EPSILON,
    threshold: float = ROBUST_SHIFT_THRESHOLD,
    max_iter: int = 1000,
) -> RobustCheck:
    """Refit by Huber's M-estimator and measure each coefficient's move from least squares.

    Parameters
    ----------
    x : array_like of shape (n_rows, p)
        Design rows (the intercept column first when `has_intercept`).
    y : array_like of shape (n_rows,)
        Target.
    names : sequence of str
        Design column names.
    has_intercept : bool
        Whether column 0 of `x` is the intercept.
    weights : array_like of shape (n_rows,), optional
        Row weights, passed to both fits.
    epsilon : float, default=1.35
        Huber's tuning constant.
    threshold : float, default=1.0
        Shift, in ordinary standard errors, at which a coefficient is flagged.
    max_iter : int, default=1000
        Iteration cap of scikit-learn's L-BFGS optimizer.

    Returns
    -------
    RobustCheck

    Notes
    -----
    `HuberRegressor` is called with ``alpha=0`` (no penalty), so its estimate does not
    depend on the units of the columns; the columns are standardised before the call only
    to help the optimizer converge, and the estimates are mapped back. Aliased columns
    are left out of both fits.

    Raises
    ------
    DataError
        When no residual degrees of freedom are left (no standard errors to measure by).
    """
    # Deferred: scikit-learn takes about 1 to 4 s to import on these machines.
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import HuberRegressor

    xa = np.asarray(x, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    wa = None if weights is None else np.asarray(weights, dtype=np.float64)
    ordinary = fit_arrays(xa, ya, names, has_intercept=has_intercept, weights=wa)
    aliased = ordinary.aliased
    if ordinary.df_resid <= 0:
        msg = (
            f"the robust refit needs residual degrees of freedom, got {ordinary.df_resid} "
            f"({xa.shape[0]} rows for {xa.shape[1]} columns); use more rows or fewer terms"
        )
        raise DataError(msg)
    kept = [j for j, name in enumerate(names) if name not in set(aliased)]
    slopes = [j for j in kept if not (has_intercept and j == 0)]
    z = xa[:, slopes]
    center = z.mean(axis=0) if has_intercept else np.zeros(len(slopes))
    spread = z.std(axis=0)
    spread[spread == 0.0] = 1.0
    y_scale = float(np.std(ya)) or 1.0
    model = HuberRegressor(
        epsilon=epsilon, alpha=0.0, fit_intercept=has_intercept, max_iter=max_iter
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        model.fit((z - center) / spread, ya / y_scale, sample_weight=wa)
    converged = int(model.n_iter_) < max_iter
    robust = np.full(len(names), math.nan)
    robust[slopes] = model.coef_ / spread * y_scale
    if has_intercept:
        robust[0] = (float(model.intercept_) - float(model.coef_ @ (center / spread))) * y_scale
    shifts = []
    for j in kept:
        se = float(ordinary.std_error[j])
        shift = (robust[j] - ordinary.coef[j]) / se if math.isfinite(se) and se > 0 else None
        shifts.append(
            CoefficientShift(
                name=names[j],
                ordinary=float(ordinary.coef[j]),
                robust=float(robust[j]),
                std_error=se,
                shift_se=shift,
                is_flagged=shift is not None and abs(shift) >= threshold,
            )
        )
    notes = []
    if ordinary.collinear:
        notes.append("left out as aliased: " + ", ".join(f"`{a}`" for a in ordinary.collinear))
    if ordinary.no_rows:
        names = ", ".join(f"`{a}`" for a in ordinary.no_rows)
        notes.append(f"left out with no rows left after missing values: {names}")
    if not converged:
        notes.append(f"the robust fit stopped after {max_iter} iterations; figures are rough")
    return RobustCheck(
        n=xa.shape[0],
        epsilon=epsilon,
        scale=float(model.scale_) * y_scale,
        n_downweighted=int(np.sum(model.outliers_)),
        coefficients=tuple(shifts),
        threshold=threshold,
        converged=converged,
        notes=tuple(notes),
    )


def spline_basis(values: ArrayLike, *, n_knots: int = SPLINE_KNOTS) -> NDArray[np.float64]:
    """Return a cubic B-spline basis of one predictor, without the constant.

    Parameters
    ----------
    values : array_like of shape (n_rows,)
        The predictor.
    n_knots : int, default=5
        Knots, placed at quantiles of `values` so sparse tails get no empty pieces.

    Returns
    -------
    ndarray of shape (n_rows, n_knots + 1)
        ``SplineTransformer(degree=3, knots="quantile", include_bias=False)``; with an
        intercept in the model the basis spans every cubic piece, the straight line
        included.
    """
    # Deferred: scikit-learn takes about 1 to 4 s to import on these machines.
    from sklearn.preprocessing import SplineTransformer

    column = np.asarray(values, dtype=np.float64).reshape(-1, 1)
    transformer = SplineTransformer(n_knots=n_knots, degree=3, knots="quantile", include_bias=False)
    basis: NDArray[np.float64] = transformer.fit_transform(column)
    return basis


def curvature_check(
    x: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None = None,
    *,
    has_intercept: bool,
    predictors: Mapping[str, ArrayLike],
    linear_columns: Mapping[str, Sequence[int]],
    folds: int = 5,
    seed: int = 0,
    threshold: float = CURVATURE_GAIN_THRESHOLD,
) -> CurvatureCheck:
    """Compare the model's held-out errors with refits that give each predictor a spline.

    Every refit is scored on the same K held-out folds twice: by RMSE, and by the median
    absolute error, which a few gross errors (a duration typed in seconds, say) barely
    move while they can swamp the RMSE and hide a curve. Predictors are ranked by the
    median absolute error, and flagged when either score drops by the threshold.

    Correlated predictors can each pick up part of one predictor's curve, so the check
    runs in two steps: every predictor's spline alone, then each other predictor's spline
    added to the spline of the one with the largest gain. The top predictor is flagged on
    its own gains, the others on their gains given the top spline.

    Parameters
    ----------
    x : array_like of shape (n_rows, p)
        Design rows of the model as written.
    y : array_like of shape (n_rows,)
        Target.
    weights : array_like of shape (n_rows,), optional
        Row weights.
    has_intercept : bool
        Whether column 0 of `x` is the intercept.
    predictors : mapping of str to array_like
        Each numeric predictor's values on the same rows.
    linear_columns : mapping of str to sequence of int
        Design columns to drop when the predictor's spline is added (its plain linear
        term, which the spline basis spans); other terms of the predictor stay.
    folds : int, default=5
        Folds of the cross-validation; every refit uses the same folds.
    seed : int, default=0
        Seed of the fold assignment.
    threshold : float, default=0.01
        Relative RMSE gain at which a predictor is flagged.

    Returns
    -------
    CurvatureCheck

    Raises
    ------
    DataError
        With fewer rows than folds.
    """
    xa = np.asarray(x, dtype=np.float64)

    def errors_with(splines: Sequence[str]) -> KFoldErrors:
        drop = [j for name in splines for j in linear_columns.get(name, ())]
        bases = [spline_basis(predictors[name]) for name in splines]
        design = np.hstack([np.delete(xa, drop, axis=1), *bases])
        result = kfold_errors(
            design, y, weights, has_intercept=has_intercept, folds=folds, seed=seed
        )
        if result is None:
            msg = (
                f"the curvature check needs at least {folds} rows for {folds} folds, "
                f"got {xa.shape[0]}; use more rows or fewer `--folds`"
            )
            raise DataError(msg)
        return result

    def drop(before: float, after: float) -> float:
        return (before - after) / before if before > 0 else 0.0

    base = errors_with(())
    # A cubic piece needs at least 4 distinct values.
    usable = [n for n, v in predictors.items() if np.unique(np.asarray(v)).size >= 4]
    alone = {name: errors_with((name,)) for name in usable}
    ranked = sorted(usable, key=lambda name: (alone[name].median_abs_error, alone[name].rmse))
    results = []
    for rank, name in enumerate(ranked):
        own = alone[name]
        given_top = robust_given_top = None
        if rank > 0:
            top = alone[ranked[0]]
            both = errors_with((ranked[0], name))
            given_top = drop(top.rmse, both.rmse)
            robust_given_top = drop(top.median_abs_error, both.median_abs_error)
        relative = drop(base.rmse, own.rmse)
        robust = drop(base.median_abs_error, own.median_abs_error)
        decisive = (relative, robust) if given_top is None else (given_top, robust_given_top or 0.0)
        results.append(
            PredictorCurvature(
                predictor=name,
                spline_rmse=own.rmse,
                gain=base.rmse - own.rmse,
                relative_gain=relative,
                relative_gain_given_top=given_top,
                spline_median_abs_error=own.median_abs_error,
                robust_gain=robust,
                robust_gain_given_top=robust_given_top,
                is_flagged=max(decisive) >= threshold,
            )
        )
    return CurvatureCheck(
        xa.shape[0], folds, base.rmse, base.median_abs_error, tuple(results), threshold
    )
