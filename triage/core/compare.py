"""Comparing least-squares models fitted to the same rows: criteria, nested F tests, best marks.

R² never falls when a term is added, even a column of pure noise, so it is shown but never
marked as best. The criteria that can prefer a smaller model are adjusted R², AIC, BIC and
the error on rows the fit did not see (held-out R² and RMSE, K-fold RMSE). All of them are
aids to judgement: a better value on one sample is not proof of a better model.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Final, Literal

from triage.core.distributions import f_sf
from triage.results.compare import Comparison, ModelCriterion, ModelScore, NestedFTest, RefitShift

if TYPE_CHECKING:
    from triage.core.lsq import LinearFit
    from triage.results.holdout import HoldoutScore

__all__ = [
    "MODEL_CRITERIA",
    "best_marks",
    "compare_fits",
    "is_nested",
    "nested_f_test",
    "refit_shifts",
    "score_fit",
]

MODEL_CRITERIA: Final[Mapping[ModelCriterion, Literal["max", "min"]]] = {
    "adj_r2": "max",
    "aic": "min",
    "bic": "min",
    "holdout_r2": "max",
    "holdout_rmse": "min",
    "cv_rmse": "min",
}
"""Each criterion and whether its best value is the largest or the smallest."""

NO_DF_NOTE: Final = (
    "no residual degrees of freedom left: as many parameters as rows, so the fit is exact "
    "(R² = 1) and standard errors, adjusted R², AIC and BIC are not defined"
)
"""Said of a model that has nothing left to judge it by."""


def _finite(value: float | None) -> float | None:
    """Return `value`, or None when it is missing, NaN or infinite."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def score_fit(
    label: str,
    fit: LinearFit,
    *,
    holdout: HoldoutScore | None = None,
    cv_rmse: float | None = None,
) -> ModelScore:
    """Collect one fit's comparison figures.

    Parameters
    ----------
    label : str
        The model's terms as written.
    fit : LinearFit
        The fit on the rows not held out.
    holdout : HoldoutScore, optional
        The fit's score on the held-out rows.
    cv_rmse : float, optional
        K-fold cross-validated RMSE on the sample.

    Returns
    -------
    ModelScore
        With no residual degrees of freedom, adjusted R², AIC and BIC are None (an exact
        fit has an infinite likelihood; marking it best would be wrong) and a note says why.
    """
    has_df = fit.df_resid > 0
    notes = () if has_df else (NO_DF_NOTE,)
    n_params = fit.n - fit.df_resid
    return ModelScore(
        label=label,
        names=tuple(fit.names),
        n=fit.n,
        n_params=n_params,
        df_resid=fit.df_resid,
        rss=fit.rss,
        r2=_finite(fit.r2),
        adj_r2=_finite(fit.adj_r2) if has_df else None,
        aic=_finite(fit.aic) if has_df else None,
        bic=_finite(fit.bic) if has_df else None,
        holdout_n=None if holdout is None else holdout.n,
        holdout_r2=None if holdout is None else _finite(holdout.r2),
        holdout_rmse=None if holdout is None else _finite(holdout.rmse),
        cv_rmse=_finite(cv_rmse),
        aliased=fit.collinear,
        no_rows=fit.no_rows,
        notes=notes,
    )


def is_nested(smaller: Sequence[str], larger: Sequence[str]) -> bool:
    """Return True when every design column of `smaller` is a column of `larger`, and fewer.

    Both models must be fitted to the same rows with the same weights; the caller
    guarantees that (the comparison pass fits every model on the rows all can use).
    """
    small, large = set(smaller), set(larger)
    return small < large


def nested_f_test(
    smaller: LinearFit, larger: LinearFit, *, indices: tuple[int, int]
) -> NestedFTest:
    """Test whether the columns `larger` adds to `smaller` improve the fit beyond chance.

    Parameters
    ----------
    smaller, larger : LinearFit
        Fits on the same rows, the design columns of `smaller` a subset of `larger`'s.
    indices : tuple of int
        Positions of the two models in the comparison, stored in the result.

    Returns
    -------
    NestedFTest
        ``F = ((RSS_s - RSS_l) / (df_s - df_l)) / (RSS_l / df_l)`` with p from
        F(df_s - df_l, df_l), as statsmodels' ``compare_f_test``. `f` and `p` are None
        when the larger model has no residual degrees of freedom, adds no estimable
        column (every added column aliased), or fits exactly.
    """
    df1 = smaller.df_resid - larger.df_resid
    df2 = larger.df_resid
    if df1 <= 0 or df2 <= 0 or larger.rss <= 0.0:
        return NestedFTest(indices[0], indices[1], None, df1, df2, None)
    # Clip at 0: a smaller RSS for the smaller model can only be rounding.
    f = max(smaller.rss - larger.rss, 0.0) / df1 / (larger.rss / df2)
    p = f_sf(f, df1, df2)
    return NestedFTest(indices[0], indices[1], f, df1, df2, p)


def best_marks(scores: Sequence[ModelScore]) -> dict[ModelCriterion, int]:
    """Return, per criterion, the index of the model with the best value.

    Models whose value is not defined are skipped; a criterion no model has is left out.
    On a tie the first model given wins. R² is not a criterion here: it always favours
    the largest model.
    """
    marks: dict[ModelCriterion, int] = {}
    for criterion, direction in MODEL_CRITERIA.items():
        candidates = [(s.value(criterion), i) for i, s in enumerate(scores)]
        defined = [(v, i) for v, i in candidates if v is not None]
        if len(defined) < 2:
            continue
        sign = -1.0 if direction == "max" else 1.0
        marks[criterion] = min(defined, key=lambda pair: (sign * pair[0], pair[1]))[1]
    return marks


def compare_fits(
    labels: Sequence[str],
    fits: Sequence[LinearFit],
    *,
    holdouts: Sequence[HoldoutScore | None] | None = None,
    cv_rmse: Sequence[float | None] | None = None,
) -> Comparison:
    """Compare fits of several models to the same rows.

    Parameters
    ----------
    labels : sequence of str
        Each model's terms as written.
    fits : sequence of LinearFit
        The fits, on the same rows and weights.
    holdouts : sequence of HoldoutScore or None, optional
        Each fit's score on the held-out rows.
    cv_rmse : sequence of float or None, optional
        Each model's K-fold RMSE on the sample.

    Returns
    -------
    Comparison
        Nested F tests are computed for every pair where `is_nested` holds and both fits
        used the same number of rows.
    """
    k = len(fits)
    holdout_list = list(holdouts) if holdouts is not None else [None] * k
    cv_list = list(cv_rmse) if cv_rmse is not None else [None] * k
    scores = tuple(
        score_fit(label, fit, holdout=h, cv_rmse=cv)
        for label, fit, h, cv in zip(labels, fits, holdout_list, cv_list, strict=True)
    )
    tests = tuple(
        nested_f_test(fits[i], fits[j], indices=(i, j))
        for i in range(k)
        for j in range(k)
        if i != j and fits[i].n == fits[j].n and is_nested(fits[i].names, fits[j].names)
    )
    return Comparison(scores, tests, best_marks(scores))


def refit_shifts(before: LinearFit, after: LinearFit) -> list[RefitShift]:
    """Pair the coefficients of two fits by name, with the shift in standard errors.

    Parameters
    ----------
    before, after : LinearFit
        The fit and its refit without the marked rows.

    Returns
    -------
    list of RefitShift
        Names of `before` first, then names only `after` has.
    """
    b_index = {name: i for i, name in enumerate(before.names)}
    a_index = {name: i for i, name in enumerate(after.names)}
    shifts = []
    for name in [*before.names, *(n for n in after.names if n not in b_index)]:
        b = float(before.coef[b_index[name]]) if name in b_index else math.nan
        a = float(after.coef[a_index[name]]) if name in a_index else math.nan
        se = float(before.std_error[b_index[name]]) if name in b_index else math.nan
        moved = (a - b) / se if se > 0 else math.nan
        shifts.append(RefitShift(name, b, a, moved))
    return shifts
