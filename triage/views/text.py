"""Plain-text sections of the CLI report: data used, model, fit quality, tables, flags.

Every ``render_*`` function returns text without ANSI codes, at most ``width``
characters a line (long names are cut with an ellipsis), with numbers formatted by
:mod:`triage.views.format`. The layout and wording are triage's own.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any, Final, Literal

from triage._typing import CRITERIA
from triage.core.spec import quote_name
from triage.views.format import NA, format_count, format_number, format_p, truncate

if TYPE_CHECKING:
    from triage._typing import Criterion
    from triage.core.design import DesignBuilder
    from triage.core.diagnostics import Diagnostics
    from triage.core.lsq import LinearFit
    from triage.core.spec import ModelSpec
    from triage.engine.passes import DataSummary, FitOutcome, ReportOutcome

Align = Literal["<", ">"]

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
    head = f"── {truncate(title, max(width - 4, 1))} "
    return head + "─" * max(width - len(head), 2)


def _pairs(pairs: Sequence[tuple[str, str]], width: int) -> str:
    """Lay out label/value pairs one a line, labels padded to a common column.

    A value too long for its line wraps onto following lines under the value column.
    """
    label_width = min(_LABEL_WIDTH, max((len(label) for label, _ in pairs), default=0))
    indent = " " * (label_width + len(_GAP))
    lines = []
    for label, value in pairs:
        head = f"{truncate(label, label_width):<{label_width}}{_GAP}"
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

    When the table would be wider than ``width``, the column ``shrink`` gives up room
    (its cells are cut with an ellipsis); the other columns keep their full width.

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
        Index of the column to narrow when space runs out (names, or free text).

    Returns
    -------
    str
        The header, a thin rule and the rows.
    """
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]
    others = sum(widths) - widths[shrink] + len(_GAP) * (len(widths) - 1)
    widths[shrink] = max(min(widths[shrink], width - others), min(len(headers[shrink]), 8))

    def line(cells: Sequence[str]) -> str:
        parts = [f"{truncate(c, w):{a}{w}}" for c, w, a in zip(cells, widths, align, strict=True)]
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
    formula = f"{quote_name(spec.target)} ~ {' + '.join(labels)}".rstrip()
    if not labels:
        return f"{formula}  (intercept only)"
    return formula if spec.intercept else f"{formula}  (no intercept)"


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


def render_coding(builder: DesignBuilder, *, width: int = 100) -> str:
    """Show the reference level of each categorical term and the rule that chose it.

    Parameters
    ----------
    builder : DesignBuilder
        The fitted model's design.
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
    note = textwrap.fill(CODING_RULE, width=width)
    return f"{rule('categorical coding', width)}\n{_pairs(lines, width)}\n{note}"


def render_fit_quality(fit: LinearFit, *, width: int = 100) -> str:
    """Show how well the model fits overall, with a reminder of what that cannot tell.

    Parameters
    ----------
    fit : LinearFit
        The fit.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``fit quality`` section: R² (marked uncentered without an intercept),
        adjusted R², residual SD, F with its df and p, log-likelihood, AIC, BIC,
        condition number and n.
    """
    centred = "" if fit.has_intercept else " (uncentered: no intercept)"
    f_label = (
        f"F on {format_count(fit.df_model)} and {format_count(fit.df_resid)} df"
        f"{'' if fit.has_intercept else ' (uncentered)'}"
    )
    pairs = [
        (f"R²{centred}", format_number(fit.r2)),
        ("adjusted R²", format_number(fit.adj_r2)),
        ("spread of residuals (SD)", format_number(fit.resid_sd)),
        (f_label, f"{format_number(fit.f)}   p {format_p(fit.f_p)}"),
        ("log-likelihood", format_number(fit.loglik, digits=6)),
        ("AIC", format_number(fit.aic, digits=6)),
        ("BIC", format_number(fit.bic, digits=6)),
        ("condition number", format_number(fit.condition_number, digits=3)),
        ("rows (n)", format_count(fit.n)),
    ]
    if fit.is_weighted:
        pairs.append(("weighted", "yes: R², SD and tests use weighted residuals"))
    body = _pairs(pairs, width)
    reminder = "\n".join(textwrap.wrap(R2_REMINDER, width=max(width, 20)))
    return f"{rule('fit quality', width)}\n{body}\n{reminder}"


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
    headers = ["term", "estimate", "std error", "t", "p", "95% low", "95% high"]
    if robust_se is not None:
        headers.append(f"{robust_label} SE")
    rows = []
    for i, name in enumerate(fit.names):
        row = [
            name,
            format_number(fit.coef[i]),
            format_number(fit.std_error[i]),
            format_number(fit.t[i], digits=3),
            format_p(fit.p[i]),
            format_number(fit.ci_low[i]),
            format_number(fit.ci_high[i]),
        ]
        if robust_se is not None:
            row.append(format_number(robust_se.get(name)))
        rows.append(row)
    align: list[Align] = [">"] * len(headers)
    align[0] = "<"
    body = table(headers, rows, align=align, width=width)
    return f"{rule('coefficients', width)}\n{body}"


def render_aliased(fit: LinearFit, *, width: int = 100) -> str:
    """Name the design columns that are exact combinations of others, if any.

    Parameters
    ----------
    fit : LinearFit
        The fit.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``aliased terms`` section, or an empty string when there are none.
    """
    names = list(fit.aliased)
    if not names:
        return ""
    lines = [
        rule("aliased terms", width),
        truncate(
            "these columns are exact combinations of other columns and got no estimate:", width
        ),
    ]
    lines += [f"  {truncate(name, width - 2)}" for name in names]
    return "\n".join(lines)


TEST_ROWS: Final[tuple[tuple[str, str, str], ...]] = (
    ("breusch_pagan", "Breusch–Pagan (Koenker)", "changing spread"),
    ("reset", "RESET (fitted², fitted³)", "missed curvature"),
    ("jarque_bera", "Jarque–Bera", "non-normal residuals"),
    ("durbin_watson", "Durbin–Watson", "order effect; 2 means none"),
)
"""Test key, display name, and what a small p (or a DW far from 2) may point to."""


def _df_text(df: Sequence[float]) -> str:
    """Degrees of freedom as ``5`` or ``2, 492``; the not-available mark when there are none."""
    return ", ".join(format_number(d, digits=6, trim=True) for d in df) if len(df) else NA


def render_tests(tests: Mapping[str, Any], *, width: int = 100) -> str:
    """Show the residual tests with statistic, degrees of freedom and p.

    Parameters
    ----------
    tests : mapping of str to ResidualTest
        ``breusch_pagan``, ``reset``, ``jarque_bera``, ``durbin_watson`` (missing keys
        are skipped).
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``residual tests`` section; a p-value is a hint to look closer, not a verdict.
    """
    rows = [
        [
            name,
            format_number(tests[key].statistic),
            _df_text(tests[key].df),
            format_p(tests[key].p_value),
            hint,
        ]
        for key, name, hint in TEST_ROWS
        if key in tests
    ]
    headers = ["test", "statistic", "df", "p", "a small p may point to"]
    body = table(headers, rows, align=["<", ">", ">", ">", "<"], width=width, shrink=4)
    return f"{rule('residual tests', width)}\n{body}"


def render_residual_summary(diagnostics: Diagnostics, *, width: int = 100) -> str:
    """Show the spread and shape of the residuals: extremes, quantiles, skewness, kurtosis.

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
    cells = [format_number(v) for _, v in points]
    quantiles = table(headers, [cells], align=[">"] * len(headers), width=width)
    shape = _pairs(
        [
            ("rows", format_count(diagnostics.n)),
            ("skewness (0 if symmetric)", format_number(diagnostics.resid_skewness, digits=3)),
            ("kurtosis (3 for a normal)", format_number(diagnostics.resid_kurtosis, digits=3)),
        ],
        width,
    )
    return f"{rule('residuals', width)}\n{shape}\n{quantiles}"


def render_worst_rows(rows: Sequence[Any], *, criterion: Criterion, width: int = 100) -> str:
    """Show one worst-rows list: source row position, fitted value and diagnostics.

    Parameters
    ----------
    rows : sequence of WorstRow
        Rows worst first.
    criterion : {"abs_resid", "studentized", "leverage", "cooks"}
        What the list is ranked by; sets the title.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The section; row numbers are 0-based positions in the source.
    """
    title = CRITERION_TITLES[criterion]
    if not rows:
        return f"{rule(title, width)}\nno rows"
    headers = ["row", "fitted", "residual", "studentized", "leverage", "Cook's distance"]
    cells = [
        [
            str(int(r.row)),
            format_number(r.fitted),
            format_number(r.resid),
            format_number(r.studentized, digits=3),
            format_number(r.leverage, digits=3),
            format_number(r.cooks, digits=3),
        ]
        for r in rows
    ]
    body = table(headers, cells, align=[">"] * len(headers), width=width)
    return f"{rule(title, width)}\n{body}"


def _zero_if_noise(value: float, scale: float) -> float:
    """Show a value that is rounding noise beside `scale` (under 1e-9 of it) as 0.

    A column that is also a term gets mean residuals of exactly zero in exact arithmetic;
    printing them as 3.5e-15 would suggest a finding where there is none.
    """
    return 0.0 if abs(value) <= 1e-9 * abs(scale) else value


def render_segments(
    column: str,
    levels: Sequence[Any],
    *,
    is_capped: bool = False,
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
    return "\n".join(lines)


def render_flags(flags: Sequence[Any], *, width: int = 100) -> str:
    """List the hints the checks raised; each names the rule behind it.

    Parameters
    ----------
    flags : sequence of Flag
        Hints with ``code`` and ``message``.
    width : int, default=100
        Line width.

    Returns
    -------
    str
        The ``worth a look`` section, messages wrapped to ``width``.
    """
    lines = [rule("worth a look", width)]
    if not flags:
        lines.append("none of the checks raised a hint (which does not prove the model right).")
        return "\n".join(lines)
    lines.append("hints to aid judgement, not verdicts:")
    for flag in flags:
        lines += textwrap.wrap(
            f"[{flag.code}] {flag.message}",
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
            render_fit_quality(outcome.fit, width=width),
            render_coefficients(outcome.fit, width=width),
            render_coding(outcome.builder, width=width),
            render_aliased(outcome.fit, width=width),
        ]
    )


def _chart_height(width: int) -> int:
    """Chart height for a report of ``width`` columns: 14 lines at 80, up to 22."""
    return max(12, min(22, width // 6 + 1))


def render_full_report(
    report: ReportOutcome, *, width: int = 100, charts: bool = True, color: bool = False
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
        render_fit_quality(outcome.fit, width=width),
        render_flags(diagnostics.flags, width=width),
        render_coefficients(outcome.fit, robust_se=hc3, robust_label="HC3", width=width),
        render_coding(outcome.builder, width=width),
        render_aliased(outcome.fit, width=width),
        render_tests(diagnostics.tests, width=width),
        render_residual_summary(diagnostics, width=width),
    ]
    if charts:
        # plotext loads only when charts are drawn: `triage fit` never needs it.
        from triage.views.charts import render_binned, render_histogram

        height = _chart_height(width)
        sections.append(render_histogram(diagnostics.histogram, width, height, color=color))
        for name, bins in diagnostics.binned.items():
            title = "residual by fitted value" if name == "fitted" else f"residual by {name}"
            sections.append(
                render_binned(bins, width, height, title=title, x_label=name, color=color)
            )
    sections += [
        render_worst_rows(diagnostics.worst[c], criterion=c, width=width)
        for c in CRITERIA
        if c in diagnostics.worst
    ]
    sections += [
        render_segments(
            column, levels, is_capped=column in diagnostics.segments_capped, width=width
        )
        for column, levels in diagnostics.segments.items()
    ]
    return join_sections(sections)
