"""The rules behind the flags: their limits and which flags a pass-2 result raises.

A flag records which rule fired and the figures it judged; `triage.views.flags` words it
from the same limits. Flags are aids to judgement: none is proof of an error.
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
    "BONFERRONI_LEVEL",
    "COOKS_NUMERATOR",
    "DURBIN_WATSON_RANGE",
    "FLAG_P_VALUE",
    "LEVERAGE_FACTOR",
    "ROWS_PER_TERM",
    "STUDENTIZED_LIMIT",
    "TREND_R2",
    "bonferroni_bound",
    "poisson_at_least",
    "raise_flags",
]

STUDENTIZED_LIMIT: Final = 3.0
"""Rows with an externally studentized residual beyond ± this are counted (common practice)."""

BONFERRONI_LEVEL: Final = 0.05
"""Share of fits in which normal errors put some residual beyond the Bonferroni bound."""

LEVERAGE_FACTOR: Final = 2.0
"""Rows with leverage above ``LEVERAGE_FACTOR · p / n`` are counted (common practice)."""

COOKS_NUMERATOR: Final = 4.0
"""Rows with Cook's distance above ``COOKS_NUMERATOR / n`` are counted (common practice)."""

FLAG_P_VALUE: Final = 0.01
"""Tests with a p-value below this raise a flag."""

DURBIN_WATSON_RANGE: Final = (1.5, 2.5)
"""Durbin–Watson values outside this range raise a flag for ordered rows (common practice)."""

TREND_R2: Final = 0.95
"""R² above this on ordered rows raises a shared-trend flag (common practice)."""

ROWS_PER_TERM: Final = 10
"""Fewer rows than this per coefficient raises an overfitting flag (common practice)."""


def bonferroni_bound(n: int, df_resid: int, level: float = BONFERRONI_LEVEL) -> float:
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
    """Return the flags the rules raise on a pass-2 result, in display order."""
    flags: list[Flag] = []
    # Two-sided normal tail beyond the limit: what chance alone gives with normal errors.
    expected = n * 2.0 * norm_sf(STUDENTIZED_LIMIT)
    many_beyond = poisson_at_least(counts.studentized, expected) < FLAG_P_VALUE
    if counts.extreme or many_beyond:
        flags.append(
            Flag(
                "large-studentized",
                counts.extreme,
                cutoff=counts.extreme_threshold,
                rows=n,
                beyond_limit=counts.studentized if many_beyond else 0,
                expected=expected,
            )
        )
    if counts.leverage:
        flags.append(Flag("high-leverage", counts.leverage, cutoff=counts.leverage_threshold))
    if counts.cooks:
        flags.append(Flag("influential-rows", counts.cooks, cutoff=counts.cooks_threshold))
    bp, reset, jb, dw = (
        tests["breusch_pagan"],
        tests["reset"],
        tests["jarque_bera"],
        tests["durbin_watson"],
    )
    if bp.p_value < FLAG_P_VALUE:
        flags.append(Flag("spread-changes", bp.p_value))
    if reset.p_value < FLAG_P_VALUE:
        flags.append(Flag("curvature", reset.p_value))
    if jb.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "tails",
                jb.p_value,
                skewness=moments.skewness(),
                excess_kurtosis=moments.kurtosis() - 3.0,
            )
        )
    low, high = DURBIN_WATSON_RANGE
    if config.is_ordered and not (low <= dw.statistic <= high) and math.isfinite(dw.statistic):
        flags.append(Flag("serial-correlation", dw.statistic))
    if config.is_ordered and fit.r2 > TREND_R2:
        flags.append(Flag("shared-trend", fit.r2))
    rank = fit_rank(fit)
    if rank * ROWS_PER_TERM > fit.n:
        flags.append(Flag("many-terms", rank, rows=fit.n))
    return tuple(flags)
