"""Text and JSON for model comparisons, the robust refit and the curvature check.

The layout and wording are triage's own. The best value of each criterion carries the
marker `BEST_MARK`; R² is never marked, since it cannot fall when a term is added.
"""

from __future__ import annotations

import textwrap
from typing import TYPE_CHECKING, Any, Final

from triage.views.format import NA, Align, format_count, format_number, format_p
from triage.views.text import (
    NO_ROWS_LEFT,
    criterion_text,
    join_sections,
    render_data_summary,
    rule,
    table,
)

if TYPE_CHECKING:
    from triage.results.checks import CurvatureCheck, RobustCheck
    from triage.results.compare import Comparison, ComparisonOutcome, ModelCriterion

BEST_MARK: Final = "◆"
"""Put after the best value of a criterion in the comparison table."""

_COLUMNS: Final[tuple[tuple[str, str, ModelCriterion | None], ...]] = (
    ("R²", "r2", None),
    ("adj. R²", "adj_r2", "adj_r2"),
    ("AIC", "aic", "aic"),
    ("BIC", "bic", "bic"),
    ("held-out R²", "holdout_r2", "holdout_r2"),
    ("held-out RMSE", "holdout_rmse", "holdout_rmse"),
    ("K-fold RMSE", "cv_rmse", "cv_rmse"),
)
"""Heading, `ModelScore` field and criterion of each figure column."""


def _wrap(text: str, width: int) -> str:
    """Wrap a sentence to `width` characters, continuation lines indented by two spaces."""
    return textwrap.fill(text, width=width, subsequent_indent="  ", break_on_hyphens=False)


def _title(title: str, label: str) -> str:
    """Return a section title, followed by ``: label`` when a model label is given."""
    return f"{title}: {label}" if label else title


def render_comparison_table(comparison: Comparison, *, width: int = 100) -> str:
    """Lay out one line per model with the best value of each criterion marked.

    Parameters
    ----------
    comparison : Comparison
        Models, nested F tests and best marks.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``models side by side`` section, a legend and any notes per model.
    """
    headers = ["model", "n", *(h for h, _, _ in _COLUMNS)]
    rows = []
    for i, model in enumerate(comparison.models):
        cells = [f"#{i + 1}", format_count(model.n)]
        for _, field, criterion in _COLUMNS:
            value = getattr(model, field)
            whole = field in ("aic", "bic")
            text = criterion_text(value) if whole else format_number(value)
            if criterion is not None and comparison.best.get(criterion) == i:
                text += f" {BEST_MARK}"
            elif text != NA:
                text += "  "
            cells.append(text)
        rows.append(cells)
    right: Align = ">"
    align: list[Align] = ["<", *([right] * (len(_COLUMNS) + 1))]
    lines = [rule("models side by side", width)]
    lines += [_wrap(f"#{i + 1}  {m.label}", width) for i, m in enumerate(comparison.models)]
    lines += ["", table(headers, rows, align=align, width=width)]
    lines.append(
        _wrap(
            f"{BEST_MARK} best value of a criterion; R² is not marked: it never falls when a "
            "term is added. A better value here is a hint, not proof.",
            width,
        )
    )
    for i, model in enumerate(comparison.models):
        lines += [_wrap(f"#{i + 1}: {note}", width) for note in model.notes]
        if model.aliased:
            names = ", ".join(model.aliased)
            lines.append(_wrap(f"#{i + 1}: no estimate (aliased) for {names}", width))
        if model.no_rows:
            names = ", ".join(model.no_rows)
            lines.append(_wrap(f"#{i + 1}: no estimate ({NO_ROWS_LEFT}) for {names}", width))
    return "\n".join(lines)


def render_nested_tests(comparison: Comparison, *, width: int = 100) -> str:
    """Show the F test of each nested pair, or an empty string when no pair is nested.

    Parameters
    ----------
    comparison : Comparison
        Models and their nested F tests.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``does the larger model add anything?`` section.
    """
    if not comparison.nested_f:
        return ""
    headers = ["smaller", "larger", "terms added", "F", "df", "p"]
    rows = []
    for test in comparison.nested_f:
        rows.append(
            [
                f"#{test.smaller + 1}",
                f"#{test.larger + 1}",
                str(test.df1),
                format_number(test.f),
                f"{test.df1}, {test.df2}",
                format_p(test.p),
            ]
        )
    rows_align: list[Align] = ["<", "<", ">", ">", ">", ">"]
    note = (
        "a small p says the added columns explain more than chance would; with many rows "
        "even a tiny gain is 'significant': weigh it against the held-out figures."
    )
    return "\n".join(
        [
            rule("does the larger model add anything? (F test of nested pairs)", width),
            table(headers, rows, align=rows_align, width=width),
            _wrap(note, width),
        ]
    )


def render_robust_check(check: RobustCheck, *, label: str = "", width: int = 100) -> str:
    """Show least-squares and Huber estimates side by side, with the shift in standard errors.

    Parameters
    ----------
    check : RobustCheck
        The refit.
    label : str, optional
        Which model, for the section title.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``robust refit`` section.
    """
    headers = ["term", "least squares", "Huber", "shift (SE)", ""]
    rows = [
        [
            c.name,
            format_number(c.ordinary),
            format_number(c.robust),
            format_number(c.shift_se, digits=3),
            "pulled by rows?" if c.is_flagged else "",
        ]
        for c in check.coefficients
    ]
    align: list[Align] = ["<", ">", ">", ">", "<"]
    lines = [
        rule(_title("robust refit (Huber, on the sample)", label), width),
        table(headers, rows, align=align, width=width, shrink=4),
        _wrap(
            f"{format_count(check.n_downweighted)} of {format_count(check.n)} rows were "
            f"down-weighted (scaled residual above {check.epsilon}); coefficients marked moved "
            f"{check.threshold:g} standard error or more: look at the worst rows before "
            "trusting them.",
            width,
        ),
    ]
    lines += [_wrap(note, width) for note in check.notes]
    return "\n".join(lines)


def _percent(value: float | None) -> str:
    """Format a relative gain in percent with two decimals (``15.49``, ``-0.01``)."""
    return NA if value is None else f"{100 * value:.2f}"


def render_curvature_check(check: CurvatureCheck, *, label: str = "", width: int = 100) -> str:
    """Show, per numeric predictor, how much a spline lowers the held-out errors.

    Parameters
    ----------
    check : CurvatureCheck
        The check.
    label : str, optional
        Which model, for the section title.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``curvature check`` section: each predictor's gain in K-fold RMSE and in
        median absolute held-out error (MedAE), with a plain-language suggestion.
    """
    headers = ["predictor", "RMSE gain %", "beside top", "MedAE gain %", "beside top", ""]
    rows = [
        [
            p.predictor,
            _percent(p.relative_gain),
            _percent(p.relative_gain_given_top),
            _percent(p.robust_gain),
            _percent(p.robust_gain_given_top),
            "curved?" if p.is_flagged else "",
        ]
        for p in check.predictors
    ]
    align: list[Align] = ["<", ">", ">", ">", ">", "<"]
    lines = [
        rule(_title(f"curvature check ({check.folds}-fold, on the sample)", label), width),
        _wrap(
            "held-out error of the model as written: RMSE "
            f"{format_number(check.base_rmse)}, median absolute error (MedAE) "
            f"{format_number(check.base_median_abs_error)}. MedAE barely moves for a few "
            "gross errors, which can swamp the RMSE; 'beside top' is the gain added to the "
            "first predictor's spline.",
            width,
        ),
        table(headers, rows, align=align, width=width, shrink=5),
    ]
    if check.flagged:
        names = ", ".join(f"`{name}`" for name in check.flagged)
        advice = (
            f"a spline of {names} predicts held-out folds clearly better: its effect may be "
            "curved; try a transform such as log(), sqrt() or poly(, 2)."
        )
    elif check.predictors:
        advice = (
            f"no spline lowers the RMSE or the MedAE by {check.threshold:.0%} or more; the "
            f"largest gain is for `{check.predictors[0].predictor}`."
        )
    else:
        advice = "no numeric predictor with enough distinct values to check."
    lines.append(_wrap(advice, width))
    return "\n".join(lines)


def render_comparison(outcome: ComparisonOutcome, *, width: int = 100) -> str:
    """Compose the report of ``triage compare``: data, held-out rule, table, nested F tests.

    Parameters
    ----------
    outcome : ComparisonOutcome
        A finished comparison.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        Sections joined by blank lines.
    """
    return join_sections(
        [
            render_data_summary(outcome.data, width=width),
            render_holdout_summary(outcome, width=width),
            render_nested_tests(outcome.comparison, width=width),
        ]
    )


def render_holdout_summary(outcome: ComparisonOutcome, *, width: int = 100) -> str:
    """Say which rows were held out and show each model's in-sample and held-out figures.

    Parameters
    ----------
    outcome : ComparisonOutcome
        A finished comparison (one model for `triage fit --holdout`).
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The held-out section followed by the comparison table.
    """
    split = [f"K-fold RMSE: {outcome.folds} folds over the sample rows that were fitted"]
    if outcome.holdout_rule is not None:
        split.insert(0, f"held out: {outcome.holdout_rule.describe()}")
        split.insert(
            1,
            f"{format_count(outcome.rows_held_out)} rows scored, not fitted; R², AIC, BIC "
            "and n describe the fitted rows",
        )
        if outcome.rows_without_cut:
            split.append(
                f"{format_count(outcome.rows_without_cut)} rows had no "
                f"`{outcome.holdout_rule.column}` and were left out of both parts"
            )
    body = "\n".join(_wrap(line, width) for line in split)
    if len(outcome.comparison.models) == 1:
        # One model has nothing to be compared with: its held-out figures, no table.
        model = outcome.comparison.models[0]
        figures = [
            ("held-out R²", format_number(model.holdout_r2)),
            ("held-out RMSE", format_number(model.holdout_rmse)),
            (f"{outcome.folds}-fold RMSE", format_number(model.cv_rmse)),
        ]
        shown = [f"{label:<15}{value}" for label, value in figures if value != NA]
        return f"{rule('rows held out of the fit', width)}\n{body}\n" + "\n".join(shown)
    table_text = render_comparison_table(outcome.comparison, width=width)
    return f"{rule('rows held out of the fit', width)}\n{body}\n\n{table_text}"


def holdout_to_json(outcome: ComparisonOutcome) -> dict[str, Any]:
    """Held-out figures of the first model, for the `holdout` key of `triage fit --json`."""
    model = comparison_to_json(outcome)["models"][0]
    rule_text = None if outcome.holdout_rule is None else outcome.holdout_rule.describe()
    return {
        "rule": rule_text,
        "rows_held_out": outcome.rows_held_out,
        "n": model["holdout_n"],
        "r2": model["holdout_r2"],
        "rmse": model["holdout_rmse"],
        "cv_rmse": model["cv_rmse"],
    }


def comparison_to_json(outcome: ComparisonOutcome) -> dict[str, Any]:
    """Turn a comparison into plain JSON values (None for values that are not defined).

    Parameters
    ----------
    outcome : ComparisonOutcome
        A finished comparison.

    Returns
    -------
    dict
        ``models`` in the order given, each with ``terms``, ``n``, ``r2``, ``adj_r2``,
        ``aic``, ``bic``, ``holdout_r2``, ``holdout_rmse`` (plus ``cv_rmse``,
        ``df_resid``, ``holdout_n``, ``aliased``, ``no_rows_left`` and ``notes``);
        ``nested_f`` with ``smaller`` and ``larger`` as the models' terms, ``f``, ``df1``,
        ``df2``, ``p``; ``best``: the terms of the best model per criterion.
    """
    comparison = outcome.comparison
    models = [
        {
            "terms": m.label,
            "n": m.n,
            "r2": m.r2,
            "adj_r2": m.adj_r2,
            "aic": m.aic,
            "bic": m.bic,
            "holdout_r2": m.holdout_r2,
            "holdout_rmse": m.holdout_rmse,
            "cv_rmse": m.cv_rmse,
            "df_resid": m.df_resid,
            "holdout_n": m.holdout_n,
            "aliased": list(m.aliased),
            "no_rows_left": list(m.no_rows),
            "notes": list(m.notes),
        }
        for m in comparison.models
    ]
    nested = [
        {
            "smaller": comparison.models[t.smaller].label,
            "larger": comparison.models[t.larger].label,
            "f": t.f,
            "df1": t.df1,
            "df2": t.df2,
            "p": t.p,
        }
        for t in comparison.nested_f
    ]
    best = {c: comparison.models[i].label for c, i in comparison.best.items()}
    return {"models": models, "nested_f": nested, "best": best}


def robust_to_json(check: RobustCheck) -> dict[str, Any]:
    """Turn a robust refit into plain JSON values.

    Parameters
    ----------
    check : RobustCheck
        The refit.

    Returns
    -------
    dict
        ``n``, ``n_downweighted``, ``epsilon``, ``scale``, ``threshold``, ``converged`` and
        ``coefficients`` (``name``, ``ordinary``, ``robust``, ``std_error``, ``shift_se``,
        ``flagged``).
    """
    return {
        "n": check.n,
        "n_downweighted": check.n_downweighted,
        "epsilon": check.epsilon,
        "scale": check.scale,
        "threshold": check.threshold,
        "converged": check.converged,
        "coefficients": [
            {
                "name": c.name,
                "ordinary": c.ordinary,
                "robust": c.robust,
                "std_error": c.std_error,
                "shift_se": None if c.shift_se is None else float(c.shift_se),
                "flagged": bool(c.is_flagged),
            }
            for c in check.coefficients
        ],
        "notes": list(check.notes),
    }


def curvature_to_json(check: CurvatureCheck) -> dict[str, Any]:
    """Turn a curvature check into plain JSON values.

    Parameters
    ----------
    check : CurvatureCheck
        The check.

    Returns
    -------
    dict
        ``n``, ``folds``, ``base_rmse``, ``base_median_abs_error``, ``threshold`` and
        ``predictors`` (largest robust gain first: ``predictor``, ``spline_rmse``, ``gain``,
        ``relative_gain``, ``relative_gain_given_top``, ``spline_median_abs_error``,
        ``robust_gain``, ``robust_gain_given_top``, ``flagged``).
    """
    return {
        "n": check.n,
        "folds": check.folds,
        "base_rmse": check.base_rmse,
        "base_median_abs_error": check.base_median_abs_error,
        "threshold": check.threshold,
        "predictors": [
            {
                "predictor": p.predictor,
                "spline_rmse": p.spline_rmse,
                "gain": p.gain,
                "relative_gain": p.relative_gain,
                "relative_gain_given_top": p.relative_gain_given_top,
                "spline_median_abs_error": p.spline_median_abs_error,
                "robust_gain": p.robust_gain,
                "robust_gain_given_top": p.robust_gain_given_top,
                "flagged": bool(p.is_flagged),
            }
            for p in check.predictors
        ],
    }
