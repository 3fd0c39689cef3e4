"""Results as JSON-safe dictionaries for ``triage fit --json`` and ``triage report --json``.

The keys are a public contract: scripts read them. Add keys freely; never rename or
remove one without a version note. Every number is a plain Python ``int`` or ``float``;
NaN and infinities become ``None`` (JSON ``null``, "not available"), so the output
passes ``json.dumps(..., allow_nan=False)``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from triage.views.format import format_number
from triage.views.text import CODING_RULE, model_formula, zero_by_construction

if TYPE_CHECKING:
    from triage.core.design import DesignBuilder
    from triage.core.spec import Term
    from triage.results.diagnostics import Diagnostics, ResidualBin, ResidualTest, WorstRow
    from triage.results.fit import DataSummary, FitOutcome, ReportOutcome


def json_safe(value: Any) -> Any:
    """Convert numpy values, tuples and non-finite floats into plain JSON values.

    Parameters
    ----------
    value : object
        A number, string, None, mapping, sequence or numpy array, nested freely.

    Returns
    -------
    object
        The same structure with numpy scalars as Python numbers, arrays and tuples as
        lists, mapping keys as strings, and NaN or infinities as None.
    """
    if value is None or isinstance(value, bool | str):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        number = float(value)
        return number if math.isfinite(number) else None
    if isinstance(value, np.ndarray):
        return [json_safe(v) for v in value.tolist()]
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    msg = f"cannot write a value of type `{type(value).__name__}` as JSON: {value!r}"
    raise TypeError(msg)


def _data_to_json(data: DataSummary) -> dict[str, Any]:
    """Describe the rows a result was computed on."""
    return {
        "source": data.source,
        "rows_in_source": data.rows_in_source,
        "rows_read": data.rows_read,
        "rows_used": data.rows_used,
        "rows_dropped": data.rows_dropped,
        "rows_dropped_missing": data.rows_dropped_missing,
        "rows_dropped_domain": data.rows_dropped_domain,
        "rows_dropped_unseen_level": data.rows_dropped_unseen_level,
        "rows_filtered_out": data.rows_filtered_out,
        "rows_excluded": data.rows_excluded,
        "sample": data.sample,
        "sample_warning": data.sample_warning,
        "is_full_pass": data.is_full_pass,
    }


def _term_to_json(term: Term, builder: DesignBuilder) -> dict[str, Any]:
    """Describe one term so that its design columns can be rebuilt from the source.

    Every term gives its kind, column, transform, power, factors and design columns; a
    ``std()`` term the mean and SD it uses; an indicator (``depot=north``) its level; a
    categorical its levels in natural order with the rows counted for each (the rows it
    was learned from), its reference level and whether ``--reference`` named it.
    """
    entry: dict[str, Any] = {
        "term": term.label,
        "kind": term.kind,
        "column": term.column,
        "transform": term.transform,
        "arg": term.arg,
        "factors": [_term_to_json(f, builder) for f in term.factors],
        "design_columns": [
            name
            for name, owner in zip(builder.column_names, builder.term_of_column, strict=True)
            if owner == term.label
        ],
    }
    if term.kind == "indicator":
        entry["level"] = term.level
    if term.label in builder.scaling:
        mean, sd = builder.scaling[term.label]
        entry["mean"], entry["sd"] = mean, sd
    column = term.column
    if term.kind == "categorical" and column is not None and column in builder.level_tables:
        table = builder.level_tables[column]
        entry["levels"] = [
            {"level": level, "rows": n} for level, n in zip(table.levels, table.counts, strict=True)
        ]
        entry["reference"] = builder.reference_levels[column]
        entry["reference_given"] = column in builder.spec.reference
    return entry


def fit_to_json(outcome: FitOutcome) -> dict[str, Any]:
    """Return a fit as a JSON-safe dictionary.

    Parameters
    ----------
    outcome : FitOutcome
        A finished fit.

    Returns
    -------
    dict
        Keys ``data``, ``model``, ``coefficients`` (one entry per design column, the
        intercept named ``intercept``), ``aliased`` (columns that combine others exactly),
        ``no_rows_left`` (columns 0 in every row used, such as a level whose rows were all
        left out) and ``fit``.

    See Also
    --------
    report_to_json : the same plus the diagnostics.
    """
    fit, spec = outcome.fit, outcome.spec
    coefficients = [
        {
            "term": name,
            "estimate": fit.coef[i],
            "std_error": fit.std_error[i],
            "t": fit.t[i],
            "p": fit.p[i],
            "ci_low": fit.ci_low[i],
            "ci_high": fit.ci_high[i],
        }
        for i, name in enumerate(fit.names)
    ]
    result = {
        "data": _data_to_json(outcome.data),
        "model": {
            "target": spec.target,
            "target_transform": spec.target_transform,
            "target_label": spec.target_label,
            "terms": [term.label for term in spec.terms],
            "intercept": spec.intercept,
            "weights": spec.weights,
            "where": spec.where,
            "formula": model_formula(spec),
            "categorical": list(spec.categorical),
            "max_levels": spec.max_levels,
            "drop_invalid": spec.drop_invalid,
            "term_coding": [_term_to_json(term, outcome.builder) for term in spec.terms],
            "reference_rule": CODING_RULE,
        },
        "coefficients": coefficients,
        "aliased": list(fit.collinear),
        "no_rows_left": list(fit.no_rows),
        "fit": {
            "n": fit.n,
            "r2": fit.r2,
            "r2_is_uncentered": not fit.has_intercept,
            "adj_r2": fit.adj_r2,
            "resid_sd": fit.resid_sd,
            "f": fit.f,
            "f_p": fit.f_p,
            "df_model": fit.df_model,
            "df_resid": fit.df_resid,
            "rss": fit.rss,
            "loglik": fit.loglik,
            "aic": fit.aic,
            "bic": fit.bic,
            "condition_number": fit.condition_number,
            "is_weighted": fit.is_weighted,
        },
    }
    safe: dict[str, Any] = json_safe(result)
    return safe


def _test_to_json(test: ResidualTest) -> dict[str, Any]:
    """Write a test as ``stat``, its degrees of freedom (``df`` or ``df1``/``df2``) and ``p``."""
    entry: dict[str, Any] = {"stat": test.statistic}
    if len(test.df) == 1:
        entry["df"] = test.df[0]
    elif len(test.df) == 2:
        entry["df1"], entry["df2"] = test.df
    # Durbin–Watson has no simple reference law, so no p (NaN in the result).
    if test.df:
        entry["p"] = test.p_value
    return entry


def _bin_to_json(b: ResidualBin) -> dict[str, Any]:
    """Write one residual bin."""
    return {
        "lo": b.lo,
        "hi": b.hi,
        "n": b.n,
        "x_mean": b.x_mean,
        "mean_resid": b.mean_resid,
        "q10": b.q10,
        "q50": b.q50,
        "q90": b.q90,
    }


def _worst_to_json(r: WorstRow) -> dict[str, Any]:
    """Write one worst row; ``row`` is its 0-based position in the source."""
    return {
        "row": r.row,
        "fitted": r.fitted,
        "resid": r.resid,
        "weighted_resid": r.weighted_resid,
        "studentized": r.studentized,
        "leverage": r.leverage,
        "cooks": r.cooks,
    }


def _diagnostics_to_json(d: Diagnostics) -> dict[str, Any]:
    """Write everything pass 2 found, under the keys that `report_to_json` documents."""
    from triage.views.flags import flag_message  # the flag rules load with a report only

    hist = d.histogram
    robust = {
        label: {name: getattr(se, attr) for name, se in d.robust_se.items()}
        for label, attr in (("HC0", "hc0"), ("HC1", "hc1"), ("HC2", "hc2"), ("HC3", "hc3"))
    }
    return {
        "robust_se": robust,
        "tests": {name: _test_to_json(test) for name, test in d.tests.items()},
        "worst": {c: [_worst_to_json(r) for r in rows] for c, rows in d.worst.items()},
        "segments": {
            column: [
                {
                    "level": lv.level,
                    "n": lv.n,
                    "mean_resid": lv.mean_resid,
                    "rmse": lv.rmse,
                    "t": lv.t,
                }
                for lv in levels
            ]
            for column, levels in d.segments.items()
        },
        "segments_capped": list(d.segments_capped),
        "histogram": {
            "edges": hist.edges,
            "counts": hist.counts,
            "below": hist.below,
            "above": hist.above,
            "minimum": hist.minimum,
            "maximum": hist.maximum,
            "quantiles": {
                format_number(q, digits=6, trim=True): v for q, v in hist.quantiles.items()
            },
        },
        "binned": {name: [_bin_to_json(b) for b in bins] for name, bins in d.binned.items()},
        "residuals": {
            "n": d.n,
            "skewness": d.resid_skewness,
            "kurtosis": d.resid_kurtosis,
            "excess_kurtosis": d.resid_kurtosis - 3.0,
            "studentized_quantiles": {
                format_number(q, digits=6, trim=True): v for q, v in d.studentized_quantiles.items()
            },
        },
        "threshold_counts": {
            "studentized": d.counts.studentized,
            "extreme": d.counts.extreme,
            "extreme_threshold": d.counts.extreme_threshold,
            "leverage": d.counts.leverage,
            "leverage_threshold": d.counts.leverage_threshold,
            "cooks": d.counts.cooks,
            "cooks_threshold": d.counts.cooks_threshold,
        },
        "flags": [{"code": f.code, "message": flag_message(f)} for f in d.flags],
    }


def report_to_json(
    report: ReportOutcome, *, shown: Mapping[int, Mapping[str, str]] | None = None
) -> dict[str, Any]:
    """Return a fit and its diagnostics as a JSON-safe dictionary.

    Parameters
    ----------
    report : ReportOutcome
        A fit and its diagnostics.
    shown : mapping of int to mapping of str to str, optional
        Columns to put beside each worst row (``report --show``): position -> column -> text;
        each worst row then has a ``shown`` object.

    Returns
    -------
    dict
        The keys of `fit_to_json` plus ``robust_se`` (``HC0``..``HC3``: term -> SE),
        ``tests`` (each with ``stat``, ``df`` or ``df1``/``df2``, and ``p`` where one
        exists), ``worst`` (criterion -> rows), ``segments`` (column -> levels),
        ``segments_capped``, ``segments_zero_by_construction`` (segment columns that are
        categorical terms, whose mean residuals are 0 by construction), ``histogram``,
        ``binned`` (``fitted`` and each numeric predictor -> bins), ``residuals``,
        ``threshold_counts`` and ``flags``.

    See Also
    --------
    fit_to_json : the fit alone.
    """
    result = fit_to_json(report.outcome)
    result.update(json_safe(_diagnostics_to_json(report.diagnostics)))
    if shown is not None:
        for rows in result["worst"].values():
            for row in rows:
                row["shown"] = dict(shown.get(row["row"], {}))
    spec = report.outcome.spec
    # segment columns whose mean residuals least squares makes 0 (a categorical term)
    result["segments_zero_by_construction"] = [
        column for column in report.diagnostics.segments if zero_by_construction(spec, column)
    ]
    return result
