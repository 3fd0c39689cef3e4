"""The rules behind the flags: thresholds (common practice) and which flags a result raises.

Flags are aids to judgement: each names its rule, and none is proof of an error.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Final

from triage.core.distributions import chi2_sf, norm_sf, t_ppf
from triage.core.row_values import fit_rank
from triage.results.diagnostics import Flag

if TYPE_CHECKING:
    from triage.core.diagnostics_config import DiagnosticsConfig
    from triage.core.lsq import LinearFit
    from triage.core.moments import StreamMoments
    from triage.results.diagnostics import ResidualTest, ThresholdCounts

__all__ = [
    "DURBIN_WATSON_RANGE",
    "FLAG_P_VALUE",
    "ROWS_PER_TERM",
    "STUDENTIZED_LIMIT",
    "TREND_R2",
    "bonferroni_bound",
    "poisson_at_least",
    "raise_flags",
]

STUDENTIZED_LIMIT: Final = 3.0
"""Rows with an externally studentized residual beyond ± this are counted (common practice)."""


FLAG_P_VALUE: Final = 0.01
"""Tests with a p-value below this raise a flag."""


DURBIN_WATSON_RANGE: Final = (1.5, 2.5)
"""Durbin–Watson values outside this range raise a flag for ordered rows (common practice)."""


TREND_R2: Final = 0.95
"""R² above this on ordered rows raises a shared-trend flag (common practice)."""


ROWS_PER_TERM: Final = 10
"""Fewer rows than this per coefficient raises an overfitting flag (common practice)."""


def _rows(count: int) -> str:
    """``1 row``, ``2 rows``, ``4,149 rows``."""
    return f"{count:,} row{'' if count == 1 else 's'}"


def _have(count: int) -> str:
    return "has" if count == 1 else "have"


def bonferroni_bound(n: int, df_resid: int, level: float = 0.05) -> float:
    """Return the size of studentized residual that chance passes in under `level` of fits.

    The Bonferroni outlier bound: the t quantile at ``1 - level / (2 n)`` with
    ``df_resid - 1`` degrees of freedom (each externally studentized residual follows that
    t under normal errors); infinite when there are too few degrees of freedom.
    """
    if n < 1 or df_resid < 2:
        return math.inf
    return t_ppf(1.0 - level / (2.0 * n), df_resid - 1)


def poisson_at_least(count: int, mean: float) -> float:
    """Return P(X >= count) for X Poisson with `mean` (1 for a count of 0)."""
    if count <= 0:
        return 1.0
    if mean <= 0.0:
        return 0.0
    # P(X >= k) = P(chi-squared with 2k df <= 2 mean)
    return 1.0 - chi2_sf(2.0 * mean, 2.0 * count)


def raise_flags(
    fit: LinearFit,
    config: DiagnosticsConfig,
    n: int,
    counts: ThresholdCounts,
    tests: dict[str, ResidualTest],
    moments: StreamMoments,
) -> tuple[Flag, ...]:
    """Plain-word hints, each naming its rule; aids to judgement, not verdicts."""
    flags: list[Flag] = []
    # Two-sided normal tail beyond 3: what chance alone would give with normal errors.
    expected = n * 2.0 * norm_sf(STUDENTIZED_LIMIT)
    many_beyond_3 = poisson_at_least(counts.studentized, expected) < FLAG_P_VALUE
    if counts.extreme or many_beyond_3:
        found = []
        if counts.extreme:
            found.append(
                f"{_rows(counts.extreme)} beyond ±{counts.extreme_threshold:.3g}, further out "
                f"than normal errors would put any of {n:,} rows in 19 fits of 20 (Bonferroni "
                "bound)"
            )
        if many_beyond_3:
            found.append(
                f"{_rows(counts.studentized)} beyond ±3 where chance would put about "
                f"{expected:,.0f} (common practice threshold)"
            )
        flags.append(
            Flag(
                "large-studentized",
                f"studentized residuals: {'; '.join(found)}. Worth a look: they may be data "
                "errors or cases the model does not cover, though this is no proof of error.",
            )
        )
    if counts.leverage:
        flags.append(
            Flag(
                "high-leverage",
                f"{_rows(counts.leverage)} {_have(counts.leverage)} leverage above 2p/n = "
                f"{counts.leverage_threshold:.3g} (common practice): their predictor values "
                "are unusual and may pull the fit towards them. Worth a look.",
            )
        )
    if counts.cooks:
        flags.append(
            Flag(
                "influential-rows",
                f"{_rows(counts.cooks)} {_have(counts.cooks)} Cook's distance above 4/n = "
                f"{counts.cooks_threshold:.3g} (common practice): leaving one out may move "
                "the coefficients noticeably. Worth a look, no proof of error.",
            )
        )
    bp, reset, jb, dw = (
        tests["breusch_pagan"],
        tests["reset"],
        tests["jarque_bera"],
        tests["durbin_watson"],
    )
    if bp.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "spread-changes",
                f"Breusch–Pagan (Koenker) p = {bp.p_value:.2g} < 0.01: the spread of the "
                "residuals may change with the predictors, so the usual standard errors may "
                "mislead; consider the robust (HC3) ones.",
            )
        )
    if reset.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "curvature",
                f"RESET p = {reset.p_value:.2g} < 0.01: powers of the fitted values still "
                "explain the target, so the model may miss curvature or a term (a transform "
                "or an interaction may help).",
            )
        )
    if jb.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "tails",
                f"Jarque–Bera p = {jb.p_value:.2g} < 0.01 (skewness "
                f"{moments.skewness():.2f}, excess kurtosis {moments.kurtosis() - 3.0:.2f}; "
                "both 0 for a normal): the residuals may have heavy tails or skew, so "
                "intervals that assume normal errors may be off. With many rows this reacts "
                "to small departures.",
            )
        )
    low, high = DURBIN_WATSON_RANGE
    if config.is_ordered and not (low <= dw.statistic <= high) and math.isfinite(dw.statistic):
        flags.append(
            Flag(
                "serial-correlation",
                f"Durbin–Watson = {dw.statistic:.2f}, outside 1.5–2.5 (common practice) on "
                "ordered rows: neighbouring residuals may be correlated, which makes the "
                "standard errors look smaller than they are.",
            )
        )
    if config.is_ordered and fit.r2 > TREND_R2:
        flags.append(
            Flag(
                "shared-trend",
                f"R² = {fit.r2:.3f} on rows in time order (above 0.95, common practice): a "
                "trend shared by the target and the predictors may inflate the fit; worth "
                "checking with differences or a time term.",
            )
        )
    rank = fit_rank(fit)
    if rank * ROWS_PER_TERM > fit.n:
        flags.append(
            Flag(
                "many-terms",
                f"{rank} coefficients for {fit.n:,} rows (fewer than 10 rows per coefficient, "
                "common practice): the model may be overfitting; compare with fewer terms.",
            )
        )
    return tuple(flags)
