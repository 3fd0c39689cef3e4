"""The JSON keys the issues fix as a stable contract (issue #2 for `fit`, #3 for `report`).

Typed here from the issue texts, once, for every test that checks a JSON document.
"""

from __future__ import annotations

FIT_SECTIONS: dict[str, set[str]] = {
    "data": {"source", "rows_in_source", "rows_used", "rows_dropped", "sample"},
    "model": {"target", "terms", "intercept", "weights", "where"},
    "fit": {
        "r2",
        "adj_r2",
        "resid_sd",
        "f",
        "f_p",
        "df_model",
        "df_resid",
        "loglik",
        "aic",
        "bic",
        "condition_number",
    },
}
"""Keys of the sections of `triage fit --json`."""

FIT_KEYS: set[str] = {*FIT_SECTIONS, "coefficients", "aliased"}
"""Top-level keys of `triage fit --json`."""

COEFFICIENT_KEYS: set[str] = {"term", "estimate", "std_error", "t", "p", "ci_low", "ci_high"}
"""Keys of each entry of `coefficients`."""

REPORT_KEYS: set[str] = FIT_KEYS | {
    "robust_se",
    "tests",
    "worst",
    "segments",
    "histogram",
    "binned",
    "flags",
}
"""Top-level keys of `triage report --json`."""
