"""Plain-text sections of the CLI report: data used, model, fit quality, tables, flags.

Every ``render_*`` function returns text without ANSI codes, at most ``width``
characters a line (long names are cut with an ellipsis), with numbers formatted by
:mod:`triage.views.format`. The layout and wording are triage's own.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any, Final

from triage._typing import CRITERIA
from triage.views.format import (
    NA,
    Align,
    amount_decimals,
    as_float,
    cell_width,
    fit_cell,
    format_count,
    format_fixed,
    format_number,
    format_p,
    truncate,
)
from triage.wording import counted

if TYPE_CHECKING:
    from triage._typing import Criterion
    from triage.core.design import DesignBuilder
    from triage.core.lsq import LinearFit
    from triage.core.spec import ModelSpec
    from triage.results.diagnostics import Diagnostics, Flag
    from triage.results.fit import DataSummary, FitOutcome, ReportOutcome

_LABEL_WIDTH: Final = 28
"""Width of the label column in label/value blocks."""

_GAP: Final = "  "
"""Space between table columns."""

R2_REMINDER: Final = (
    "R² alone does not judge a fit: read it with the residuals, worst rows and tests."
)
"""One-line reminder printed under the fit-quality block."""

CRITERION_TITLES: Final[Mapping[str, str]] = {
    "abs_resid": "largest residuals (absolute)",
    "studentized": "largest studentized residuals (absolute)",
    "leverage": "highest leverage",
    "cooks": "largest Cook's distance",
}
"""Section title of each worst-rows list."""


def rule(title: str, width: int = 100) -> str:
    """Return a section rule such as ``── fit quality ─────``, ``width`` characters long.

    Parameters
    ----------
    title : str
        Section name, lower case.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The rule.
    """
    head = f"── {truncate(title, max(width - 6, 1))} "  # room for at least "──" after it
    return head + "─" * max(width - cell_width(head), 2)


def _pairs(pairs: Sequence[tuple[str, str]], width: int, label_width: int | None = None) -> str:
    """Lay out label/value pairs one a line, labels padded to a common column.

    A value too long for its line wraps onto following lines under the value column.
    `label_width` fixes the label column (several blocks then line up).
    """
    if label_width is None:
        label_width = min(_LABEL_WIDTH, max((cell_width(label) for label, _ in pairs), default=0))
    indent = " " * (label_width + len(_GAP))
    lines = []
    for label, value in pairs:
        head = fit_cell(label, label_width) + _GAP
        wrapped = textwrap.wrap(value, width=max(width - len(indent), 10)) or [""]
        lines.append(truncate(head + wrapped[0], width))
        lines += [truncate(indent + more, width) for more in wrapped[1:]]
    return "\n".join(lines)


def table(
    headers: Sequence[str],
    rows: Sequence[Sequence[str]],
    *,
    align: Sequence[Align],
    width: int = 100,
    shrink: int = 0,
) -> str:
    """Lay out already formatted cells in aligned columns under a header line.

    When the table would be wider than ``width`` and ``shrink`` is a free-text column
    (not the first), that column gives up room (its cells are cut with an ellipsis).
    The first column names the rows and is never cut while the table has other columns
    to move: the columns that do not fit go to a second block below, again headed by
    the names, so every row stays told apart from the others.

    Parameters
    ----------
    headers : sequence of str
        Column headings.
    rows : sequence of sequences of str
        Cells, one sequence per row, as long as ``headers``.
    align : sequence of {"<", ">"}
        Left or right alignment per column.
    width : int, default=100
        Line width.
    shrink : int, default=0
        Index of the column to narrow when space runs out (free text); 0 (the row
        names) moves columns to a second block instead.

    Returns
    -------
    str
        The header, a thin rule and the rows (and any further blocks after a blank line).
    """
    widths = [
        max([cell_width(h)] + [cell_width(r[i]) for r in rows]) for i, h in enumerate(headers)
    ]
    total = sum(widths) + len(_GAP) * (len(widths) - 1)
    if shrink == 0 and total > width and len(widths) > 2:
        used = widths[0] + len(_GAP) + widths[1]
        keep = 2
        while keep < len(widths) and used + len(_GAP) + widths[keep] <= width:
            used += len(_GAP) + widths[keep]
            keep += 1
        rest = [0, *range(keep, len(widths))]
        first = table(headers[:keep], [r[:keep] for r in rows], align=align[:keep], width=width)
        second = table(
            [headers[i] for i in rest],
            [[r[i] for i in rest] for r in rows],
            align=[align[i] for i in rest],
            width=width,
        )
        return f"{first}\n\n{second}"
    others = sum(widths) - widths[shrink] + len(_GAP) * (len(widths) - 1)
    widths[shrink] = max(min(widths[shrink], width - others), min(cell_width(headers[shrink]), 8))

    def line(cells: Sequence[str]) -> str:
        parts = [fit_cell(c, w, a) for c, w, a in zip(cells, widths, align, strict=True)]
        return _GAP.join(parts).rstrip()

    out = [line(headers), _GAP.join("╌" * w for w in widths)]
    out += [line(r) for r in rows]
    return "\n".join(out)


def render_data_summary(data: DataSummary, *, width: int = 100) -> str:
    """Describe which rows a result was computed on and why the others were left out.

    Parameters
    ----------
    data : DataSummary
        From a finished pass.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``data`` section, saying "every row" or "a sample" explicitly.
    """
    computed_on = "every row" if data.sample is None else f"a sample: {data.sample}"
    pairs = [
        ("source", data.source),
        ("rows in source", format_count(data.rows_in_source)),
        ("computed on", computed_on),
        ("rows read", format_count(data.rows_read)),
    ]
    reasons = [
        ("removed by the filter", data.rows_filtered_out),
        ("dropped: missing values", data.rows_dropped_missing),
        ("dropped: outside a transform's domain", data.rows_dropped_domain),
        ("dropped: level not seen in the sample", data.rows_dropped_unseen_level),
        ("left out by you", data.rows_excluded),
    ]
    pairs += [(label, format_count(n)) for label, n in reasons if n]
    pairs.append(("rows used in the fit", format_count(data.rows_used)))
    if data.sample_warning:
        pairs.append(("caution", data.sample_warning))
    return rule("data", width) + "\n" + _pairs(pairs, width)


def model_formula(spec: ModelSpec) -> str:
    """Write the model as ``target ~ term + term``, the published Wilkinson–Rogers form.

    The intercept is not written into the formula (our term syntax has it as a separate
    option): a model without one, or with no terms, says so in words after the formula.

    Parameters
    ----------
    spec : ModelSpec
        The model.

    Returns
    -------
    str
        E.g. ``minutes ~ distance_km + log(weight_kg)  (no intercept)``.
    """
    labels = [term.label for term in spec.terms]
    formula = f"{spec.target_label} ~ {' + '.join(labels)}".rstrip()
    if not labels:
        return f"{formula}  (intercept only)"
    return formula if spec.intercept else f"{formula}  (no intercept)"


def target_scale_note(spec: ModelSpec) -> str:
    """Say on which scale residuals and fitted values are, for a transformed target."""
    return (
        f"the model fits {spec.target_label}: residuals, fitted values, charts and worst rows "
        f"are on that scale, not in units of `{spec.target}`"
    )


def render_model(spec: ModelSpec, *, width: int = 100) -> str:
    """Show the model formula, with its weights and filter when it has them.

    Parameters
    ----------
    spec : ModelSpec
        The model.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``model`` section.
    """
    pairs = [("formula", model_formula(spec))]
    if spec.target_transform is not None:
        pairs.append(("scale", target_scale_note(spec)))
    if spec.weights:
        pairs.append(("weights", spec.weights))
    if spec.where:
        pairs.append(("rows where", spec.where))
    return rule("model", width) + "\n" + _pairs(pairs, width)


CODING_RULE: Final = (
    "each indicator's coefficient is its level's difference from the reference level; "
    "the reference is the level with the most rows (ties: the first in natural order) "
    "unless `--reference COL=LEVEL` names one"
)
"""The reference rule, said under the coding section."""


def coding_lines(builder: DesignBuilder) -> list[tuple[str, str]]:
    """Describe each categorical's coding: its level count and reference, and why that one.

    Parameters
    ----------
    builder : DesignBuilder
        The fitted model's design.

    Returns
    -------
    list of (str, str)
        (column, e.g. ``12 levels, reference R00 (most rows: 151,234 of 970,479)``).
    """
    lines = []
    for column, table in builder.level_tables.items():
        reference = builder.reference_levels[column]
        if column in builder.spec.reference:
            why = "named with --reference"
        else:
            n_reference = table.counts[table.levels.index(reference)]
            why = f"most rows: {n_reference:,} of {table.n_rows:,}"
        lines.append((column, f"{len(table.levels):,} levels, reference {reference} ({why})"))
    return lines


def render_coding(builder: DesignBuilder, *, from_sample: bool = False, width: int = 100) -> str:
    """Show the reference level of each categorical term and the rule that chose it.

    Parameters
    ----------
    builder : DesignBuilder
        The fitted model's design.
    from_sample : bool, default=False
        The levels were learned from a sample: a line says what that leaves out.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``categorical coding`` section, or "" for a model without categoricals.
    """
    lines = coding_lines(builder)
    if not lines:
        return ""
    rule_text = CODING_RULE
    if from_sample:
        rule_text += (
            "; the levels come from the sample: a level it lacks is not in the model, and "
            "`--rows all` learns every level"
        )
    note = textwrap.fill(rule_text, width=width)
    return f"{rule('categorical coding', width)}\n{_pairs(lines, width)}\n{note}"


def _grouped(groups: Sequence[tuple[str, Sequence[tuple[str, str]]]], width: int) -> str:
    """Lay out label/value pairs under question headings; labels share one column."""
    indent = "  "
    labels = [label for _, pairs in groups for label, _ in pairs]
    label_width = min(_LABEL_WIDTH, max(map(len, labels), default=0))
    lines = []
    for question, pairs in groups:
        if not pairs:
            continue
        lines.append(truncate(question, width))
        block = _pairs(list(pairs), width - len(indent), label_width)
        lines += [indent + line for line in block.split("\n")]
    return "\n".join(lines)


def criterion_text(value: object) -> str:
    """Format an AIC or BIC whole to one decimal (``1,182,597.8``), the same on every screen.

    Models are compared by differences of a few units, so these are never rounded to
    significant digits.
    """
    number = as_float(value)
    if number is None or not math.isfinite(number):
        return format_number(number)
    return f"{number:,.1f}"


def parameters_counted(fit: LinearFit) -> int:
    """How many parameters AIC and BIC count: the estimated coefficients, intercept included.

    The error variance is not counted (the convention the reference libraries use).
    """
    return fit.df_model + int(fit.has_intercept)


def render_fit_quality(fit: LinearFit, *, target: str | None = None, width: int = 100) -> str:
    """Show how well the model fits, grouped by the question each figure answers.

    Parameters
    ----------
    fit : LinearFit
        The fit.
    target : str, optional
        The target as the model fits it (`ModelSpec.target_label`), to say in whose units
        the errors are measured.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``fit quality`` section in four groups: how much the model explains (R²,
        adjusted R²), how big its errors are in the target's units (residual SD),
        whether its terms earn their place (the joint F test, AIC, BIC and how many
        parameters they count), and whether the numbers can be trusted (rows used, the
        condition number of the scaled design, weights).
    """
    uncentered = "" if fit.has_intercept else " (uncentered: no intercept)"
    baseline = "intercept only" if fit.has_intercept else "none"
    parameters = parameters_counted(fit)
    parameters_text = f"{counted(parameters, 'coefficient')} counted"
    units = f"in the units of {target}" if target else "in the target's units"
    groups: list[tuple[str, list[tuple[str, str]]]] = [
        (
            "how much of the target the model explains",
            [
                (f"R²{uncentered}", format_number(fit.r2)),
                ("adjusted R²", format_number(fit.adj_r2)),
            ],
        ),
        (
            f"how big the errors are, {units}",
            [("typical error (residual SD)", format_number(fit.resid_sd))],
        ),
        (
            "whether the terms earn their place",
            [
                (
                    f"all terms vs {baseline}",
                    f"F {format_number(fit.f)}, p {format_p(fit.f_p)}  "
                    f"(df {format_count(fit.df_model)} and {format_count(fit.df_resid)})",
                ),
                ("AIC (lower is better)", f"{criterion_text(fit.aic)}  ({parameters_text})"),
                ("BIC (lower is better)", f"{criterion_text(fit.bic)}  ({parameters_text})"),
            ],
        ),
        (
            "whether the numbers can be trusted",
            [
                ("rows used", format_count(fit.n)),
                (
                    "condition no., scaled design",
                    format_number(fit.condition_number, digits=3)
                    + "  (common practice: over 30 means collinear)",
                ),
                *(
                    [("weights", "yes: R², SD and tests use weighted residuals")]
                    if fit.is_weighted
                    else []
                ),
            ],
        ),
    ]
    reminder = "\n".join(textwrap.wrap(R2_REMINDER, width=max(width, 20)))
    return f"{rule('fit quality', width)}\n{_grouped(groups, width)}\n{reminder}"


def render_coefficients(
    fit: LinearFit,
    *,
    robust_se: Mapping[str, float] | None = None,
    robust_label: str = "HC3",
    width: int = 100,
) -> str:
    """Show each design column's estimate, standard error, t, p and 95% interval.

    Parameters
    ----------
    fit : LinearFit
        The fit.
    robust_se : mapping of str to float, optional
        Robust standard errors by design column name, shown as an extra column.
    robust_label : str, default="HC3"
        Which robust estimator ``robust_se`` holds, for the column heading.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``coefficients`` section; aliased columns show the not-available mark.
    """
    headers = ["term", "estimate", "std error"]
    if robust_se is not None:
        headers.append(f"{robust_label} SE")
    headers += ["t", "p", "95% low", "95% high"]
    rows = []
    for i, name in enumerate(fit.names):
        row = [name, format_number(fit.coef[i]), format_number(fit.std_error[i])]
        if robust_se is not None:
            row.append(format_number(robust_se.get(name)))
        row += [
            format_number(fit.t[i], digits=3),
            format_p(fit.p[i]),
            format_number(fit.ci_low[i]),
            format_number(fit.ci_high[i]),
        ]
        rows.append(row)
    align: list[Align] = [">"] * len(headers)
    align[0] = "<"
    body = table(headers, rows, align=align, width=width)
    return f"{rule('coefficients', width)}\n{body}"


NO_ROWS_LEFT: Final = "no rows left after missing values"
"""Why a design column that is 0 in every row used got no estimate (`LinearFit.no_rows`)."""


def render_aliased(fit: LinearFit, *, width: int = 100) -> str:
    """Name the design columns that got no estimate, each under its reason, if any.

    A column that is an exact combination of others is aliased; a column that is 0 in
    every row used (a level whose rows were all left out, for a missing value in another
    column, a mark or a held-out split) has no rows to estimate it from, and says so apart.

    Parameters
    ----------
    fit : LinearFit
        The fit.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``aliased terms`` and ``terms with no rows left`` sections, or an empty string
        when every column got an estimate.
    """
    sections = []
    if fit.collinear:
        sections.append(
            (
                "aliased terms",
                "these columns are exact combinations of other columns and got no estimate:",
                fit.collinear,
            )
        )
    if fit.no_rows:
        sections.append(
            (
                "terms with no rows left",
                f"{NO_ROWS_LEFT}: these columns are 0 in every row used (every row of the "
                "level was left out, for a missing value in another column, a mark or a "
                "held-out split), so they got no estimate:",
                fit.no_rows,
            )
        )
    lines = []
    for title, why, names in sections:
        lines += [rule(title, width), *textwrap.wrap(why, width=max(width, 20))]
        lines += [f"  {truncate(name, width - 2)}" for name in names]
    return "\n".join(lines)


def _df_text(df: Sequence[float]) -> str:
    """Degrees of freedom as ``5`` or ``2, 492``; the not-available mark when there are none."""
    return ", ".join(format_number(d, digits=6, trim=True) for d in df) if len(df) else NA


def _test_row(test: Any, name: str) -> list[str]:
    return [name, format_number(test.statistic), _df_text(test.df), format_p(test.p_value)]


def render_tests(diagnostics: Diagnostics, *, is_ordered: bool = False, width: int = 100) -> str:
    """Ask the residuals four questions, each answered by its test and figures.

    Parameters
    ----------
    diagnostics : Diagnostics
        From pass 2: its tests and the shape of the residuals.
    is_ordered : bool, default=False
        The user said row order means something (time order): only then is the
        Durbin–Watson statistic shown, under its own question.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``questions for the residuals`` section: whether the spread changes
        (Breusch–Pagan), whether curvature is left (RESET), whether the tails are a
        normal's (Jarque–Bera, skewness, excess kurtosis) and, for ordered rows, whether
        neighbours are related (Durbin–Watson). A small p is a hint to look, not a verdict.
    """
    tests = diagnostics.tests
    groups: list[tuple[str, list[list[str]]]] = []
    if "breusch_pagan" in tests:
        groups.append(
            (
                "does the spread change with the inputs?",
                [_test_row(tests["breusch_pagan"], "Breusch–Pagan (Koenker)")],
            )
        )
    if "reset" in tests:
        groups.append(
            (
                "is there curvature the terms miss?",
                [_test_row(tests["reset"], "RESET (fitted², fitted³)")],
            )
        )
    tails = [_test_row(tests["jarque_bera"], "Jarque–Bera")] if "jarque_bera" in tests else []
    tails += [
        ["skewness (normal: 0)", format_number(diagnostics.resid_skewness, digits=3), "", ""],
        [
            "excess kurtosis (normal: 0)",
            format_number(diagnostics.resid_kurtosis - 3.0, digits=3),
            "",
            "",
        ],
    ]
    groups.append(("are the tails like a normal's?", tails))
    if is_ordered and "durbin_watson" in tests:
        groups.append(
            (
                "are neighbouring rows related? (2: not at all)",
                [_test_row(tests["durbin_watson"], "Durbin–Watson")],
            )
        )
    headers = ["", "statistic", "df", "p"]
    rows = [row for _, group in groups for row in group]
    body = table(headers, rows, align=["<", ">", ">", ">"], width=width - 2).split("\n")
    lines = [rule("questions for the residuals", width), body[0], body[1]]
    at = 2
    for question, group in groups:
        lines.append(truncate(question, width))
        lines += ["  " + line for line in body[at : at + len(group)]]
        at += len(group)
    lines[1] = "  " + lines[1]
    lines[2] = "  " + lines[2]
    return "\n".join(line.rstrip() for line in lines)


def render_residual_summary(diagnostics: Diagnostics, *, width: int = 100) -> str:
    """Show where the residuals lie: the extremes and quantiles.

    Parameters
    ----------
    diagnostics : Diagnostics
        From pass 2.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``residuals`` section (weighted residuals for a weighted fit).
    """
    hist = diagnostics.histogram
    points = [("smallest", hist.minimum)]
    points += [
        (f"{format_number(100 * q, digits=3, trim=True)}%", v)
        for q, v in sorted(hist.quantiles.items())
    ]
    points.append(("largest", hist.maximum))
    headers = [label for label, _ in points]
    cells = [format_number(v, digits=5) for _, v in points]
    quantiles = table(headers, [cells], align=[">"] * len(headers), width=width)
    title = f"residuals: {format_count(diagnostics.n)} rows"
    return f"{rule(title, width)}\n{quantiles}"


def render_worst_rows(
    rows: Sequence[Any],
    *,
    criterion: Criterion,
    target: str = "observed",
    decimals: int = 1,
    shown: Mapping[int, Mapping[str, str]] | None = None,
    width: int = 100,
) -> str:
    """Show one worst-rows list: source row position, observed and fitted value, diagnostics.

    Parameters
    ----------
    rows : sequence of WorstRow
        Rows worst first.
    criterion : {"abs_resid", "studentized", "leverage", "cooks"}
        What the list is ranked by; sets the title.
    target : str, default="observed"
        Heading of the observed-value column (the target's name).
    decimals : int, default=1
        Decimals of observed, fitted and residual (`amount_decimals` of the fit).
    shown : mapping of int to mapping of str to str, optional
        Identifying columns to put after the row number: position -> column -> text.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The section; row numbers are 0-based positions in the source. Observed, fitted
        and residual share one format, so residual = observed - fitted checks by eye.
    """
    title = CRITERION_TITLES[criterion]
    if not rows:
        return f"{rule(title, width)}\nno rows"
    names = list(next(iter(shown.values()), {})) if shown else []
    headers = ["row", *names, target, "fitted", "residual", "studentized", "leverage"]
    headers.append("Cook's distance")
    cells = [
        [
            f"{int(r.row):,}",
            *[(shown or {}).get(r.row, {}).get(name, NA) for name in names],
            format_fixed(r.fitted + r.resid, decimals),
            format_fixed(r.fitted, decimals),
            format_fixed(r.resid, decimals),
            format_number(r.studentized, digits=3),
            format_number(r.leverage, digits=3),
            format_number(r.cooks, digits=3),
        ]
        for r in rows
    ]
    left: list[Align] = ["<"] * len(names)
    right: list[Align] = [">"] * (len(headers) - 1 - len(names))
    align: list[Align] = [">", *left, *right]
    body = table(headers, cells, align=align, width=width)
    return f"{rule(title, width)}\n{body}"


def _zero_if_noise(value: float, scale: float) -> float:
    """Show a value that is rounding noise beside `scale` (under 1e-9 of it) as 0.

    A column that is also a term gets mean residuals of exactly zero in exact arithmetic;
    printing them as 3.5e-15 would suggest a finding where there is none.
    """
    return 0.0 if abs(value) <= 1e-9 * abs(scale) else value


def zero_by_construction(spec: ModelSpec, column: str) -> bool:
    """Whether least squares makes every level's mean residual 0 for a segment column.

    True for a categorical term of an unweighted model with an intercept: the residuals
    are orthogonal to each level's indicator, so they sum to 0 within every level.
    """
    return (
        spec.intercept
        and spec.weights is None
        and any(t.kind == "categorical" and t.column == column for t in spec.terms)
    )


def render_segments(
    column: str,
    levels: Sequence[Any],
    *,
    is_capped: bool = False,
    in_model: bool = False,
    width: int = 100,
) -> str:
    """Show the residuals of each level of one segment column, most biased first.

    Parameters
    ----------
    column : str
        The segment column.
    levels : sequence of SegmentLevel
        Levels in display order.
    is_capped : bool, default=False
        The column had more levels than the cap; the rarest were pooled.
    in_model : bool, default=False
        The column is a categorical term of the model (`zero_by_construction`): a line
        says why every mean residual is 0.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The section; ``t`` is the mean residual in standard-error units.
    """
    headers = ["level", "rows", "mean residual", "RMSE", "t of mean"]
    cells = [
        [
            lv.level,
            format_count(lv.n),
            format_number(_zero_if_noise(lv.mean_resid, lv.rmse)),
            format_number(lv.rmse),
            format_number(_zero_if_noise(lv.t, 1.0), digits=3),
        ]
        for lv in levels
    ]
    body = table(headers, cells, align=["<", ">", ">", ">", ">"], width=width)
    lines = [rule(f"residuals by {column}", width), body]
    if is_capped:
        lines.append(truncate("too many levels: the rarest are pooled as (other)", width))
    if in_model:
        note = (
            f"`{column}` is a term of the model, so its mean residuals are 0 by construction "
            "(least squares fits each level's mean); group by a column not in the model to "
            "look for bias"
        )
        lines.append(textwrap.fill(note, width=width))
    return "\n".join(lines)


def render_flags(flags: Sequence[Flag], *, width: int = 100) -> str:
    """List the hints the checks raised; each names the rule behind it.

    Parameters
    ----------
    flags : sequence of Flag
        The flags of a pass-2 result, worded by `triage.views.flags`.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``worth a look`` section, messages wrapped to ``width``.
    """
    from triage.views.flags import flag_message  # the flag rules load with a report only

    lines = [rule("worth a look", width)]
    if not flags:
        lines.append("none of the checks raised a hint (which does not prove the model right).")
        return "\n".join(lines)
    lines.append("hints to aid judgement, not verdicts:")
    for flag in flags:
        lines += textwrap.wrap(
            f"[{flag.code}] {flag_message(flag)}",
            width=max(width, 20),
            initial_indent="• ",
            subsequent_indent="  ",
        )
    return "\n".join(lines)


def join_sections(sections: Sequence[str]) -> str:
    """Join non-empty sections with a blank line between them.

    Parameters
    ----------
    sections : sequence of str
        Rendered sections; empty ones (a section with nothing to show) are skipped.

    Returns
    -------
    str
    """
    return "\n\n".join(s for s in sections if s)


def render_fit_report(outcome: FitOutcome, *, width: int = 100) -> str:
    """Compose the report of ``triage fit``: data, model, fit quality, coefficients.

    Parameters
    ----------
    outcome : FitOutcome
        A finished fit.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The sections joined by blank lines.

    See Also
    --------
    render_full_report : the same plus diagnostics and charts.
    """
    return join_sections(
        [
            render_data_summary(outcome.data, width=width),
            render_model(outcome.spec, width=width),
            render_fit_quality(outcome.fit, target=outcome.spec.target_label, width=width),
            render_coefficients(outcome.fit, width=width),
            render_coding(outcome.builder, from_sample=not outcome.data.is_full_pass, width=width),
            render_aliased(outcome.fit, width=width),
        ]
    )


def _chart_height(width: int) -> int:
    """Chart height for a report of ``width`` columns: 14 lines at 80, up to 22."""
    return max(12, min(22, width // 6 + 1))


def render_full_report(
    report: ReportOutcome,
    *,
    width: int = 100,
    charts: bool = True,
    color: bool = False,
    is_ordered: bool = False,
    shown: Mapping[int, Mapping[str, str]] | None = None,
) -> str:
    """Compose the report of ``triage report``: the fit, hints, tests, charts and tables.

    Parameters
    ----------
    report : ReportOutcome
        A fit and its diagnostics.
    width : int, default=100
        Line width.
    charts : bool, default=True
        Include the residual histogram and the binned residual charts.
    color : bool, default=False
        Colour the charts with ANSI codes; the tables are always plain.
    is_ordered : bool, default=False
        Row order means something: show the Durbin–Watson statistic.
    shown : mapping of int to mapping of str to str, optional
        Identifying columns of the worst rows (``report --show``).

    Returns
    -------
    str
        The sections joined by blank lines.

    See Also
    --------
    render_fit_report : the fit alone.
    """
    outcome, diagnostics = report.outcome, report.diagnostics
    hc3 = {name: se.hc3 for name, se in diagnostics.robust_se.items()}
    sections = [
        render_data_summary(outcome.data, width=width),
        render_model(outcome.spec, width=width),
        render_fit_quality(outcome.fit, target=outcome.spec.target_label, width=width),
        render_flags(diagnostics.flags, width=width),
        render_coefficients(outcome.fit, robust_se=hc3, robust_label="HC3", width=width),
        render_coding(outcome.builder, from_sample=not outcome.data.is_full_pass, width=width),
        render_aliased(outcome.fit, width=width),
        render_tests(diagnostics, is_ordered=is_ordered, width=width),
        render_residual_summary(diagnostics, width=width),
    ]
    if charts:
        # plotext loads only when charts are drawn: `triage fit` never needs it.
        from triage.views.charts import render_binned, render_histogram, render_quantile_chart

        height = _chart_height(width)
        sections.append(render_histogram(diagnostics.histogram, width, height, color=color))
        sections.append(
            render_quantile_chart(diagnostics.studentized_quantiles, width, height, color=color)
        )
        for name, bins in diagnostics.binned.items():
            title = "residual by fitted value" if name == "fitted" else f"residual by {name}"
            sections.append(
                render_binned(bins, width, height, title=title, x_label=name, color=color)
            )
    sections += [
        render_worst_rows(
            diagnostics.worst[c],
            criterion=c,
            target=outcome.spec.target_label,
            decimals=amount_decimals(outcome.fit.resid_sd),
            shown=shown,
            width=width,
        )
        for c in CRITERIA
        if c in diagnostics.worst
    ]
    sections += [
        render_segments(
            column,
            levels,
            is_capped=column in diagnostics.segments_capped,
            in_model=zero_by_construction(outcome.spec, column),
            width=width,
        )
        for column, levels in diagnostics.segments.items()
    ]
    return join_sections(sections)
