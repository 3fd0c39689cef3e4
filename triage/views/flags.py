"""Flags in words: each rule's sentence, built from the figures of the flag and the rule's limits.

The one place flag wording lives. Every number a sentence quotes comes from the flag or from
`triage.core.flag_rules`, so changing a limit there changes the words too. Flags are aids to
judgement, not verdicts: each sentence names its rule and says "may".
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Final

from triage.core.flag_rules import (
    BONFERRONI_LEVEL,
    COOKS_NUMERATOR,
    DURBIN_WATSON_RANGE,
    FLAG_P_VALUE,
    LEVERAGE_FACTOR,
    ROWS_PER_TERM,
    STUDENTIZED_LIMIT,
    TREND_R2,
)
from triage.wording import counted

if TYPE_CHECKING:
    from triage.results.diagnostics import Flag, FlagCode

__all__ = ["flag_message"]


def _have(count: float) -> str:
    return "has" if count == 1 else "have"


def _large_studentized(flag: Flag) -> str:
    found = []
    if flag.value:
        fits = round(1.0 / BONFERRONI_LEVEL)
        found.append(
            f"{counted(flag.value, 'row')} beyond ±{flag.cutoff:.3g}, further out than normal "
            f"errors would put any of {flag.rows:,} rows in {fits - 1} fits of {fits} (Bonferroni "
            "bound)"
        )
    if flag.beyond_limit:
        found.append(
            f"{counted(flag.beyond_limit, 'row')} beyond ±{STUDENTIZED_LIMIT:g} where chance "
            f"would put about {flag.expected:,.0f} (common practice threshold)"
        )
    return (
        f"studentized residuals: {'; '.join(found)}. Worth a look: they may be data errors or "
        "cases the model does not cover, though this is no proof of error."
    )


def _high_leverage(flag: Flag) -> str:
    rows = counted(flag.value, "row")
    return (
        f"{rows} {_have(flag.value)} leverage above {LEVERAGE_FACTOR:g}p/n = "
        f"{flag.cutoff:.3g} (common practice): their predictor values are unusual and may "
        "pull the fit towards them. Worth a look."
    )


def _influential_rows(flag: Flag) -> str:
    rows = counted(flag.value, "row")
    return (
        f"{rows} {_have(flag.value)} Cook's distance above {COOKS_NUMERATOR:g}/n "
        f"= {flag.cutoff:.3g} (common practice): leaving one out may move the coefficients "
        "noticeably. Worth a look, no proof of error."
    )


def _spread_changes(flag: Flag) -> str:
    return (
        f"Breusch–Pagan (Koenker) p = {flag.value:.2g} < {FLAG_P_VALUE:g}: the spread of the "
        "residuals may change with the predictors, so the usual standard errors may mislead; "
        "consider the robust (HC3) ones."
    )


def _curvature(flag: Flag) -> str:
    return (
        f"RESET p = {flag.value:.2g} < {FLAG_P_VALUE:g}: powers of the fitted values still "
        "explain the target, so the model may miss curvature or a term (a transform or an "
        "interaction may help)."
    )


def _tails(flag: Flag) -> str:
    return (
        f"Jarque–Bera p = {flag.value:.2g} < {FLAG_P_VALUE:g} (skewness {flag.skewness:.2f}, "
        f"excess kurtosis {flag.excess_kurtosis:.2f}; both 0 for a normal): the residuals may "
        "have heavy tails or skew, so intervals that assume normal errors may be off. With "
        "many rows this reacts to small departures."
    )


def _serial_correlation(flag: Flag) -> str:
    low, high = DURBIN_WATSON_RANGE
    return (
        f"Durbin–Watson = {flag.value:.2f}, outside {low:g}–{high:g} (common practice) on "
        "ordered rows: neighbouring residuals may be correlated, which makes the standard "
        "errors look smaller than they are."
    )


def _shared_trend(flag: Flag) -> str:
    return (
        f"R² = {flag.value:.3f} on rows in time order (above {TREND_R2:g}, common practice): "
        "a trend shared by the target and the predictors may inflate the fit; worth checking "
        "with differences or a time term."
    )


def _many_terms(flag: Flag) -> str:
    return (
        f"{int(flag.value)} coefficients for {flag.rows:,} rows (fewer than {ROWS_PER_TERM} "
        "rows per coefficient, common practice): the model may be overfitting; compare with "
        "fewer terms."
    )


_WORDING: Final[dict[FlagCode, Callable[[Flag], str]]] = {
    "large-studentized": _large_studentized,
    "high-leverage": _high_leverage,
    "influential-rows": _influential_rows,
    "spread-changes": _spread_changes,
    "curvature": _curvature,
    "tails": _tails,
    "serial-correlation": _serial_correlation,
    "shared-trend": _shared_trend,
    "many-terms": _many_terms,
}


def flag_message(flag: Flag) -> str:
    """Return one or two sentences saying what the flag's rule found, naming the rule."""
    return _WORDING[flag.code](flag)
