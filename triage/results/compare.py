"""Several models compared on the same rows: scores, nested F tests, best marks and refits."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal, TypeAlias

if TYPE_CHECKING:
    from triage.core.holdout import HoldoutRule
    from triage.results.fit import DataSummary, FitOutcome
    from triage.results.holdout import HoldoutScore, KFoldResult

__all__ = [
    "ComparedModel",
    "Comparison",
    "ComparisonOutcome",
    "ModelCriterion",
    "ModelScore",
    "NestedFTest",
    "RefitShift",
]

ModelCriterion: TypeAlias = Literal["adj_r2", "aic", "bic", "holdout_r2", "holdout_rmse", "cv_rmse"]
"""A model-choice criterion that can be marked best."""


@dataclass(frozen=True)
class ModelScore:
    """One model's line in a comparison; None marks a value that is not defined."""

    label: str
    """The terms as the user wrote them."""
    names: tuple[str, ...]
    """Design column names."""
    n: int
    """Rows the model was fitted on (not counting held-out rows)."""
    n_params: int
    """Estimated parameters (rank of the design, intercept included)."""
    df_resid: int
    """Rows minus parameters."""
    rss: float
    """Residual sum of squares of the fit."""
    r2: float | None
    """In-sample R² (never marked best: it cannot fall when a term is added)."""
    adj_r2: float | None
    """Adjusted R²."""
    aic: float | None
    """Akaike's criterion (Gaussian likelihood, statsmodels' definition)."""
    bic: float | None
    """Schwarz's Bayesian criterion."""
    holdout_n: int | None
    """Held-out rows scored, or None without a held-out rule."""
    holdout_r2: float | None
    """R² on the held-out rows, about their own mean (can be negative)."""
    holdout_rmse: float | None
    """Root mean squared prediction error on the held-out rows."""
    cv_rmse: float | None
    """Mean over K folds of the held-out-fold RMSE, on the in-memory sample."""
    aliased: tuple[str, ...]
    """Design columns that got no estimate because they combine other columns exactly."""
    no_rows: tuple[str, ...]
    """Design columns that got no estimate because they are 0 in every row fitted (a level
    whose rows were all left out)."""
    notes: tuple[str, ...]
    """Plain-language remarks, e.g. that no degrees of freedom are left."""

    def value(self, criterion: ModelCriterion) -> float | None:
        """Return the value of `criterion` for this model."""
        number: float | None = getattr(self, criterion)
        return number


@dataclass(frozen=True)
class NestedFTest:
    """F test of a smaller model against a larger one that contains it."""

    smaller: int
    """Index of the smaller model in the comparison."""
    larger: int
    """Index of the larger model."""
    f: float | None
    """``((RSS_s - RSS_l) / df1) / (RSS_l / df2)``; None when not defined."""
    df1: int
    """Difference in residual degrees of freedom (parameters added)."""
    df2: int
    """Residual degrees of freedom of the larger model."""
    p: float | None
    """Upper-tail probability of `f` under F(df1, df2)."""


@dataclass(frozen=True)
class Comparison:
    """Several models on the same rows: their figures, nested F tests and best marks."""

    models: tuple[ModelScore, ...]
    """One line per model, in the order given."""
    nested_f: tuple[NestedFTest, ...]
    """One test per pair where one model's columns are a subset of the other's."""
    best: Mapping[ModelCriterion, int]
    """Index of the best model per criterion (only when two or more models have a value)."""


@dataclass(frozen=True)
class RefitShift:
    """How one coefficient moved between a fit and its refit on other rows (a what-if)."""

    name: str
    """Design column name."""
    before: float
    """Estimate in the fit with every row (NaN when absent or aliased)."""
    after: float
    """Estimate in the refit without the marked rows (NaN when absent or aliased)."""
    change_in_se: float
    """`(after - before)` in units of the first fit's standard error (NaN when unknown)."""


@dataclass(frozen=True)
class ComparedModel:
    """One model of a comparison: its fit on the rows not held out, and its held-out scores."""

    label: str
    """The terms as written."""
    outcome: FitOutcome
    """The fit, its builder and the rows it used; `sample` holds the sample rows every model
    could use (the rows the K-fold RMSE, robust refit and curvature check run on)."""
    holdout: HoldoutScore | None
    """Score on the held-out rows, or None without a held-out rule."""
    cv: KFoldResult | None
    """K-fold RMSE on the sample's rows not held out, or None with too few rows."""


@dataclass(frozen=True)
class ComparisonOutcome:
    """Several models fitted to the same rows, compared."""

    models: tuple[ComparedModel, ...]
    """In the order given."""
    comparison: Comparison
    """Criteria, nested F tests and best marks."""
    data: DataSummary
    """The rows every model could use; `rows_used` counts the rows fitted (not held out)."""
    holdout_rule: HoldoutRule | None
    """How rows were held out, if they were."""
    rows_held_out: int
    """Rows scored but not fitted."""
    rows_without_cut: int
    """Rows left out of both parts because the held-out-by column was missing."""
    folds: int
    """Folds of the K-fold RMSE."""
