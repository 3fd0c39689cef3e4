"""What the sample checks found: the robust (Huber) refit and the curvature check."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["CoefficientShift", "CurvatureCheck", "PredictorCurvature", "RobustCheck"]


@dataclass(frozen=True)
class CoefficientShift:
    """One coefficient under the ordinary and the robust fit."""

    name: str
    """Design column name."""
    ordinary: float
    """Least-squares estimate on the sample."""
    robust: float
    """Huber estimate on the same rows."""
    std_error: float
    """Ordinary standard error."""
    shift_se: float | None
    """``(robust - ordinary) / std_error``; None when the standard error is not defined."""
    is_flagged: bool
    """Whether ``|shift_se|`` reaches the threshold."""


@dataclass(frozen=True)
class RobustCheck:
    """The Huber refit beside the ordinary fit of the same sample rows."""

    n: int
    """Rows refitted."""
    epsilon: float
    """Huber's tuning constant used."""
    scale: float
    """Huber's estimate of the residual scale."""
    n_downweighted: int
    """Rows whose scaled residual exceeds `epsilon` (scikit-learn's ``outliers_``)."""
    coefficients: tuple[CoefficientShift, ...]
    """One entry per estimable design column, in design order."""
    threshold: float
    """Shift, in standard errors, at which a coefficient is flagged."""
    converged: bool
    """False when the optimizer stopped at its iteration cap (the figures are then rough)."""
    notes: tuple[str, ...]
    """Plain-language remarks."""

    @property
    def flagged(self) -> tuple[str, ...]:
        """Names of the flagged coefficients."""
        return tuple(c.name for c in self.coefficients if c.is_flagged)


@dataclass(frozen=True)
class PredictorCurvature:
    """The curvature check of one predictor, scored by RMSE and by median absolute error."""

    predictor: str
    """Source column."""
    spline_rmse: float
    """K-fold RMSE with the spline basis in place of the plain term."""
    gain: float
    """Model's K-fold RMSE minus `spline_rmse` (positive: the spline predicts better)."""
    relative_gain: float
    """`gain` as a share of the model's K-fold RMSE."""
    relative_gain_given_top: float | None
    """RMSE gain of this spline added to the top predictor's spline; None for the top."""
    spline_median_abs_error: float
    """Median absolute held-out error with the spline basis in place of the plain term."""
    robust_gain: float
    """Relative drop of the median absolute held-out error (a few gross errors barely move it)."""
    robust_gain_given_top: float | None
    """`robust_gain` of this spline added to the top predictor's spline; None for the top."""
    is_flagged: bool
    """Whether either relative gain reaches the threshold (given the top spline, for the others)."""


@dataclass(frozen=True)
class CurvatureCheck:
    """Curvature check of every numeric predictor of a model, on the sample."""

    n: int
    """Rows used."""
    folds: int
    """Folds of the cross-validation."""
    base_rmse: float
    """K-fold RMSE of the model as written."""
    base_median_abs_error: float
    """Median absolute held-out error of the model as written, on the same folds."""
    predictors: tuple[PredictorCurvature, ...]
    """One entry per predictor, largest robust gain first."""
    threshold: float
    """Relative gain at which a predictor is flagged."""

    @property
    def flagged(self) -> tuple[str, ...]:
        """Predictors whose effect may be curved, largest gain first."""
        return tuple(p.predictor for p in self.predictors if p.is_flagged)
