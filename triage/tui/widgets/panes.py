"""The panes of the main screen: each renders results pushed down by the screen.

Panes never call the engine, never call each other and never compute a statistic: the
screen assigns results to their reactives and they turn them into text with `triage.views`.
The views (numpy, plotext) are imported where a pane first draws results, so the first frame
does not wait for them.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Final, Literal

from rich.cells import cell_len
from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical, VerticalScroll
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import DataTable, Static

from triage.tui.session import ModelDraft, SessionFit
from triage.wording import counted

if TYPE_CHECKING:
    import polars as pl
    from rich.console import RenderableType

    from triage.core.spec import ModelSpec
    from triage.results.compare import Comparison, ModelCriterion
    from triage.results.diagnostics import RowDiagnostics, WorstRow
    from triage.results.fit import ColumnFigures, FitOutcome, ReportOutcome

PaneId = Literal[
    "columns", "fit", "spread", "trend", "inputs", "flags", "worst", "groups", "row", "fits"
]
Page = Literal["model", "residuals", "rows"]


@dataclass(frozen=True)
class PaneInfo:
    """A pane's id, its title on screen and the page it tiles on in a large terminal."""

    pane_id: PaneId
    """Short id; the binding `pane-<id>` brings the pane to the front."""
    title: str
    """Title shown in the pane strip and on the pane's border."""
    page: Page
    """Group of panes shown together when the terminal is large enough to tile."""
    hint: str
    """What the pane shows before there is a fit."""


PANES: Final[tuple[PaneInfo, ...]] = (
    PaneInfo("columns", "Columns", "model", "opening the data…"),
    PaneInfo("fit", "Fit", "model", "no fit yet: pick a target and terms in Columns"),
    PaneInfo("spread", "Spread", "residuals", "residual histogram: no fit yet"),
    PaneInfo("trend", "Trend", "residuals", "residual by fitted value: no fit yet"),
    PaneInfo("inputs", "Inputs", "residuals", "residual by each numeric input: no fit yet"),
    PaneInfo("flags", "Flags", "model", "flags: no fit yet"),
    PaneInfo("worst", "Worst", "rows", "worst rows: no fit yet"),
    PaneInfo("groups", "Groups", "residuals", "residuals by group: no fit yet"),
    PaneInfo("row", "Row", "rows", "no row chosen: pick one in Worst"),
    PaneInfo("fits", "Fits", "model", "fits of this session: none yet"),
)
"""Every pane, in the order of their keys."""

PANE_BY_ID: Final[dict[str, PaneInfo]] = {info.pane_id: info for info in PANES}
"""Pane information by pane id."""


class Pane(Vertical):
    """A titled box holding one view of the results."""

    def __init__(self, info: PaneInfo) -> None:
        super().__init__(id=f"pane-{info.pane_id}", classes="pane")
        self.info = info
        """Id, title and page of this pane."""
        self.border_title = info.title
        self.is_colorless = False
        """Draw without colour (the `NO_COLOR` convention)."""
        self.is_ordered = False
        """Row order means something (the user said so): show order statistics."""

    def focus_target(self) -> Widget:
        """Return the child that takes the keyboard when the pane comes to the front.

        The pane itself (which cannot take focus) when it has no focusable child.
        """
        for child in self.query("*"):
            if isinstance(child, Widget) and child.can_focus:
                return child
        return self


class TextPane(Pane):
    """A pane showing scrollable plain text, rebuilt for its width when it changes."""

    def compose(self) -> ComposeResult:
        """Add the scrolling body."""
        with VerticalScroll(classes="pane--scroll"):
            yield Static(self.info.hint, classes="pane--body", markup=False)

    def text_for(self, width: int) -> str | None:
        """Return the text for a body `width` cells wide, or None to keep the hint."""
        return None

    def refresh_text(self) -> None:
        """Rebuild the text for the current width."""
        width = self.content_size.width - 2 if self.content_size.width > 10 else 78
        text = self.text_for(width)
        self.query_one(".pane--body", Static).update(self.info.hint if text is None else text)

    def on_resize(self) -> None:
        """Rebuild the text when the pane changes width."""
        self.refresh_text()


def _right(text: str) -> Text:
    """Return a right-aligned cell: numbers line up on their last digit."""
    return Text(text, justify="right")


def _table(pane: Pane, table_id: str) -> DataTable[Any]:
    return pane.query_one(f"#{table_id}", DataTable)


SAMPLE_MARK: Final = "~"
"""Put before a figure of the Columns pane that comes from the sample, not every row."""


def _sample_figure(value: float | None) -> str:
    """Format a figure of the sample profile, marked as such; empty when there is none."""
    from triage.views.format import format_number

    return "" if value is None else SAMPLE_MARK + format_number(value)


class ColumnsPane(Pane):
    """The columns of the source, their role in the model and their figures.

    Figures come from the sample profile (marked `SAMPLE_MARK`) until a pass over every row
    of the source brings those of the model's columns (`refresh_figures`).
    """

    profile: reactive[pl.DataFrame | None] = reactive(None, always_update=True)
    """One row per column from `profile_columns`, None until the data opens."""
    figures: reactive[dict[str, ColumnFigures]] = reactive(dict, always_update=True)
    """Figures over every row of the source, by column, from the passes that read them."""
    draft: reactive[ModelDraft] = reactive(ModelDraft)
    """The model being built (roles are shown beside the columns)."""
    keys_hint: reactive[str] = reactive("")
    """The model-building keys of the active keymap, shown above the table."""

    def compose(self) -> ComposeResult:
        """Add the column table."""
        yield Static(self.info.hint, classes="pane--note", markup=False)
        table: DataTable[str] = DataTable(id="columns-table", cursor_type="row")
        yield table

    def on_mount(self) -> None:
        """Name the table's columns."""
        _table(self, "columns-table").add_columns(
            "role", "column", "type", "missing", "low", "mean", "high/top"
        )

    def watch_profile(self) -> None:
        """Fill the table when the profile arrives."""
        self._fill()

    def watch_draft(self) -> None:
        """Refresh the roles when the model changes."""
        self._fill()

    def watch_keys_hint(self) -> None:
        """Show the keys once the keymap is known."""
        self._fill()

    def watch_figures(self) -> None:
        """Show the figures a pass over every row brought."""
        self._fill()

    def refresh_figures(self, figures: tuple[ColumnFigures, ...]) -> None:
        """Take the figures of some columns over every row of the source (later ones win)."""
        if figures:
            self.figures = {**self.figures, **{figure.name: figure for figure in figures}}

    def _role(self, name: str) -> str:
        draft = self.draft
        if draft.target == name:
            return "target"
        parts = []
        term = draft.term_of(name)
        if term is not None:
            parts.append(term.label if term.transform or term.kind == "indicator" else "term")
        elif any(name in t.columns for t in draft.terms):
            parts.append("in :")
        if draft.weights == name:
            parts.append("weights")
        if name in draft.categorical:
            parts.append("cat")
        return " ".join(parts)

    def _fill(self) -> None:
        if not self.is_mounted or self.profile is None:
            return
        from triage.views.format import format_number

        table = _table(self, "columns-table")
        row = table.cursor_row
        table.clear()
        for entry in self.profile.iter_rows(named=True):
            name = entry["name"]
            every_row = self.figures.get(name)
            if every_row is None:
                missing = SAMPLE_MARK + f"{entry['missing']:.1%}"
                low, mean, high = (_sample_figure(entry[key]) for key in ("low", "mean", "high"))
            else:
                missing = f"{every_row.missing / max(every_row.rows, 1):.1%}"
                low, mean, high = (
                    "" if value is None else format_number(value)
                    for value in (every_row.low, every_row.mean, every_row.high)
                )
            if entry["top"] is not None:
                high = SAMPLE_MARK + str(entry["top"])
            role = self._role(name)
            table.add_row(role, name, entry["dtype"], missing, low, mean, high, key=name)
        table.move_cursor(row=min(row, table.row_count - 1), animate=False)
        source = (
            f"{SAMPLE_MARK} marks a figure from a sample of whole row groups: the true "
            "extremes may lie outside"
        )
        if self.figures:
            source += "; the other figures come from every row of the source"
        else:
            source += "; a pass over every row brings the model's columns from every row"
        self.query_one(".pane--note", Static).update(
            f"{self.profile.height} columns. {source}. On a column: {self.keys_hint}"
        )

    def cursor_column(self) -> str | None:
        """Return the name of the column under the cursor, or None before the data opens."""
        table = _table(self, "columns-table")
        if self.profile is None or table.row_count == 0:
            return None
        return str(table.coordinate_to_cell_key(table.cursor_coordinate).row_key.value)


class FitPane(TextPane):
    """Fit quality and the coefficient table, with a what-if comparison when there is one."""

    def __init__(self, info: PaneInfo) -> None:
        super().__init__(info)
        self.fit: SessionFit | None = None
        """The fit shown."""
        self.baseline: SessionFit | None = None
        """The fit a what-if refit is compared with."""
        self.is_robust = False
        """Show robust (HC3) standard errors beside the usual ones."""
        self.provisional: tuple[int, FitOutcome] | None = None
        """A sample fit (its number and outcome) shown while its diagnostics are computed."""

    def set_fit(self, fit: SessionFit, baseline: SessionFit | None, *, robust: bool) -> None:
        """Show a fit (and its baseline, for a what-if refit)."""
        self.fit, self.baseline, self.is_robust = fit, baseline, robust
        self.provisional = None
        self.refresh_text()

    def show_provisional(self, outcome: FitOutcome, number: int) -> None:
        """Show a fit before its diagnostics arrive (the first screen appears sooner)."""
        self.provisional = (number, outcome)
        self.refresh_text()

    def drop_provisional(self) -> None:
        """Go back to the last finished fit (the pass that made the provisional one failed)."""
        if self.provisional is not None:
            self.provisional = None
            self.refresh_text()

    def text_for(self, width: int) -> str | None:
        """Compose data, fit quality, coefficients and the what-if comparison."""
        from triage.views.text import join_sections

        if self.provisional is not None:
            number, outcome = self.provisional
            header = f"fit #{number}: computed on a SAMPLE (residual diagnostics still running)"
            return join_sections(_fit_sections(header, outcome, None, width))
        if self.fit is None:
            return None
        report = self.fit.report
        robust = robust_se_by_name(report) if self.is_robust else None
        basis = "computed on EVERY ROW" if self.fit.is_full_pass else "computed on a SAMPLE"
        sections = _fit_sections(f"fit #{self.fit.number}: {basis}", report.outcome, robust, width)
        if self.baseline is not None:
            sections.append(_what_if_text(self.baseline, self.fit, width))
        return join_sections(sections)


def _fit_sections(
    header: str, outcome: FitOutcome, robust: dict[str, float] | None, width: int
) -> list[str]:
    """Header, data summary, fit quality, coefficients and aliased terms of one fit."""
    from triage.views.text import (
        render_aliased,
        render_coding,
        render_coefficients,
        render_data_summary,
        render_fit_quality,
        target_scale_note,
    )

    if outcome.spec.target_transform is not None:
        header = f"{header}\n{target_scale_note(outcome.spec)}"
    return [
        header,
        render_data_summary(outcome.data, width=width),
        render_fit_quality(outcome.fit, target=outcome.spec.target_label, width=width),
        render_coefficients(outcome.fit, robust_se=robust, width=width),
        render_coding(outcome.builder, from_sample=not outcome.data.is_full_pass, width=width),
        render_aliased(outcome.fit, width=width),
    ]


def _what_if_text(before: SessionFit, after: SessionFit, width: int) -> str:
    """Describe how the coefficients and R² moved when the marked rows were left out."""
    from triage.core.compare import refit_shifts
    from triage.views.format import format_number, truncate
    from triage.views.text import rule, table

    shifts = refit_shifts(before.report.outcome.fit, after.report.outcome.fit)
    rows = [
        [
            s.name,
            format_number(s.before),
            format_number(s.after),
            format_number(s.after - s.before),
            format_number(s.change_in_se, digits=3),
        ]
        for s in shifts
    ]
    headers = ["term", f"fit #{before.number}", f"fit #{after.number}", "moved", "moved / SE"]
    body = table(headers, rows, align=["<", ">", ">", ">", ">"], width=width)
    r2_before = before.report.outcome.fit.r2
    r2_after = after.report.outcome.fit.r2
    left_out = len(after.excluded - before.excluded)
    lines = [
        rule(f"what-if: without {left_out:,} marked rows (the file is unchanged)", width),
        body,
        f"R² {format_number(r2_before)} -> {format_number(r2_after)}",
        truncate(
            "moved / SE: the shift in standard errors of the first fit; a large value "
            "says those rows pull on that coefficient, not that they are wrong.",
            width,
        ),
    ]
    return "\n".join(lines)


FITS_COLUMNS: Final[tuple[tuple[str, int | None], ...]] = (
    ("#", 4),
    ("rows", 12),
    ("adj. R²", 8),
    ("AIC", 13),
    ("BIC", 13),
    ("model (change)", None),
)
"""Columns of the Fits table and their widths in cells (None: as wide as the model text).

Every figure that tells fits apart fits in 80 columns; the model column names only what
changed from the fit before, and the note above the table spells out the whole model of
the fit under the cursor.
"""


def model_change(before: ModelSpec | None, after: ModelSpec) -> str:
    """Say how a model differs from the one before it: ``+ depot  - hour``, or all of it.

    Parameters
    ----------
    before : ModelSpec or None
        The model of the previous fit (None for the first).
    after : ModelSpec
        The model described.

    Returns
    -------
    str
        The whole formula when there is no previous model or the target changed; otherwise
        the terms added (``+``) and dropped (``-``), and a changed filter, weights or
        intercept; ``same model`` when nothing changed.
    """
    from triage.views.text import model_formula

    if before is None or before.target != after.target:
        return model_formula(after)
    old = [t.label for t in before.terms]
    new = [t.label for t in after.terms]
    parts = [f"+ {label}" for label in new if label not in old]
    parts += [f"- {label}" for label in old if label not in new]
    if before.intercept != after.intercept:
        parts.append("with intercept" if after.intercept else "no intercept")
    if before.weights != after.weights:
        parts.append(f"weights {after.weights}" if after.weights else "no weights")
    if before.where != after.where:
        parts.append(f"where {after.where}" if after.where else "every row kept")
    return "  ".join(parts) or "same model"


class FitsPane(Pane):
    """Every fit of the session; enter shows one again."""

    fits: reactive[tuple[SessionFit, ...]] = reactive((), always_update=True)
    """The session's fits, oldest first."""
    current: reactive[int | None] = reactive(None)
    """Number of the fit on screen."""
    comparison: reactive[tuple[tuple[int, ...], Comparison] | None] = reactive(None)
    """Numbers of the fits on the same rows as the one on screen, and their comparison."""

    def compose(self) -> ComposeResult:
        """Add the list of fits."""
        yield Static(self.info.hint, classes="pane--note", markup=False)
        table: DataTable[str | Text] = DataTable(id="fits-table", cursor_type="row")
        yield table

    def on_mount(self) -> None:
        """Name the table's columns."""
        table = _table(self, "fits-table")
        # fixed widths: the table is refilled on every fit, and widths grown from content
        # were seen to lag one refill behind
        for index, (label, width) in enumerate(FITS_COLUMNS):
            heading: str | Text = label if index == len(FITS_COLUMNS) - 1 else _right(label)
            table.add_column(heading, width=width)

    def watch_comparison(self) -> None:
        """Refill the list when the comparison changes."""
        self._fill()

    def watch_fits(self) -> None:
        """Refill the list when a fit is added."""
        self._fill()

    def watch_current(self) -> None:
        """Move the marker to the fit on screen."""
        self._fill()

    def _fill(self) -> None:
        if not self.is_mounted:
            return
        from triage.views.format import format_count, format_number
        from triage.views.text import criterion_text

        table = _table(self, "fits-table")
        table.clear()
        compared, comparison = self.comparison or ((), None)
        best = {} if comparison is None else comparison.best

        def cell(fit: SessionFit, criterion: ModelCriterion, value: float) -> Text:
            whole = criterion in ("aic", "bic")
            text = criterion_text(value) if whole else format_number(value)
            is_best = fit.number in compared and best.get(criterion) == compared.index(fit.number)
            return _right(text + (" ◆" if is_best else "  "))

        before: ModelSpec | None = None
        for fit in self.fits:
            lsq = fit.report.outcome.fit
            spec = fit.report.outcome.spec
            rows = f"{'all' if fit.is_full_pass else 'smpl'} {format_count(lsq.n)}"
            table.add_row(
                _right((">" if fit.number == self.current else "") + str(fit.number)),
                _right(rows),
                cell(fit, "adj_r2", lsq.adj_r2),
                cell(fit, "aic", lsq.aic),
                cell(fit, "bic", lsq.bic),
                model_change(before, spec)
                + (f"  ({len(fit.excluded):,} marked rows left out)" if fit.excluded else ""),
                key=str(fit.number),
            )
            before = spec
        numbers = [fit.number for fit in self.fits]
        if self.current in numbers:
            table.move_cursor(row=numbers.index(self.current), animate=False)
        self._note(table.cursor_row)

    def _note(self, cursor: int) -> None:
        from triage.views.text import model_formula

        note = f"{counted(len(self.fits), 'fit')} this session; enter shows one again"
        compared = (self.comparison or ((), None))[0]
        if len(compared) > 1:
            note += (
                f"; ◆ best of fits {', '.join(f'#{n}' for n in compared)} (same rows as the "
                "one on screen; R² is never marked: it rises with every term)"
            )
        if 0 <= cursor < len(self.fits):
            fit = self.fits[cursor]
            note += f"\n#{fit.number}: {model_formula(fit.report.outcome.spec)}"
        self.query_one(".pane--note", Static).update(note)

    def on_data_table_row_highlighted(self, event: DataTable.RowHighlighted) -> None:
        """Spell out the whole model of the fit under the cursor."""
        self._note(event.cursor_row)


@dataclass(frozen=True, eq=False)
class RowView:
    """One original row and its diagnostics, as the Row pane shows it."""

    position: int
    """0-based position of the row in the source."""
    frame: pl.DataFrame | None
    """The whole original row; None while it is being read."""
    diagnostics: RowDiagnostics | None
    """Its diagnostics under the fit on screen; None while being read."""
    is_marked: bool
    """True when the user marked the row."""
    fit_number: int
    """The fit the diagnostics belong to."""


class RowPane(Pane):
    """The whole original row beside its fitted value, residual and influence numbers."""

    row: reactive[RowView | None] = reactive(None, always_update=True)
    """The row shown, or None before one is chosen."""

    def __init__(self, info: PaneInfo) -> None:
        super().__init__(info)
        self.cells: list[tuple[str, str]] = []
        """The (field, value) rows the table shows."""
        self.decimals = 1
        """Decimals of observed, fitted and residual (as in Worst, for the fit shown)."""

    def compose(self) -> ComposeResult:
        """Add the heading and the row table."""
        yield Static(self.info.hint, classes="pane--note", markup=False)
        table: DataTable[str] = DataTable(id="row-table", cursor_type="row")
        yield table

    def on_mount(self) -> None:
        """Name the table's columns."""
        _table(self, "row-table").add_columns("field", "value")

    def watch_row(self, view: RowView | None) -> None:
        """Show the row, or a placeholder while it is read."""
        if not self.is_mounted or view is None:
            return
        mark = "  [marked]" if view.is_marked else ""
        if view.frame is None:
            self._set_note(f"row {view.position:,} under fit #{view.fit_number}: reading…{mark}")
            self._set_cells([])
            return
        diag = view.diagnostics
        outside = diag is not None and len(diag.rows) > 0 and not diag.in_fit[0]
        basis = "not in" if outside else "under"
        self._set_note(f"row {view.position:,} (0-based) {basis} fit #{view.fit_number}{mark}")
        self._set_cells([*_diagnostic_cells(view, self.decimals), *_record_cells(view.frame)])

    def _set_note(self, text: str) -> None:
        """Show `text` above the table; a note that stays on one line needs no new layout."""
        note = self.query_one(".pane--note", Static)
        stays_one_line = note.size.height == 1 and cell_len(text) <= note.size.width
        note.update(text, layout=not stays_one_line)

    def _set_cells(self, cells: list[tuple[str, str]]) -> None:
        """Fill the table; when only the values changed, update those cells in place.

        Stepping between rows of one source keeps the fields, so the table is not rebuilt
        (and the cursor stays on the field it was on).
        """
        table = _table(self, "row-table")
        if [name for name, _ in cells] != [name for name, _ in self.cells]:
            table.clear()
            for index, (name, value) in enumerate(cells):
                table.add_row(name, value, key=str(index))
        else:
            column = table.ordered_columns[1]
            for index, ((_, old), (_, new)) in enumerate(zip(self.cells, cells, strict=True)):
                if new != old:
                    # widen the column for a longer value; never narrow it (measuring the
                    # whole column per cell made a step cost 10 ms more)
                    wider = cell_len(new) > column.content_width
                    table.update_cell(str(index), column.key, new, update_width=wider)
        self.cells = cells


def _record_cells(frame: pl.DataFrame) -> list[tuple[str, str]]:
    """Name and format every original field of a one-row frame."""
    from triage.core.design import ROW_INDEX

    record = frame.row(0, named=True) if frame.height else {}
    return [
        (name, "(missing)" if value is None else str(value))
        for name, value in record.items()
        if name != ROW_INDEX
    ]


def _diagnostic_cells(view: RowView, decimals: int) -> list[tuple[str, str]]:
    """Name and format the diagnostics of one row (or say why there are none)."""
    from triage.views.format import format_fixed, format_number

    diag = view.diagnostics
    if diag is None or len(diag.rows) == 0:
        return [("fitted", "not used by the model (missing value or unseen level)")]
    fitted, resid = float(diag.fitted[0]), float(diag.resid[0])
    if not diag.in_fit[0]:
        # scored as a new row: leverage x0ᵀ(XᵀX)⁻¹x0 and the standardised prediction residual
        return [
            ("in the fit", "no: outside its rows, scored as a new row"),
            ("observed", format_fixed(fitted + resid, decimals)),
            ("fitted", format_fixed(fitted, decimals)),
            ("residual", format_fixed(resid, decimals)),
            ("leverage as a new row", format_number(diag.leverage[0], digits=3)),
            ("standardised residual", format_number(diag.studentized[0], digits=3)),
            ("Cook's distance", "only for rows in the fit"),
            ("─" * 8, "─" * 8),
        ]
    return [
        ("observed", format_fixed(fitted + resid, decimals)),
        ("fitted", format_fixed(fitted, decimals)),
        ("residual", format_fixed(resid, decimals)),
        ("leverage", format_number(diag.leverage[0], digits=3)),
        ("studentized residual", format_number(diag.studentized[0], digits=3)),
        ("Cook's distance", format_number(diag.cooks[0], digits=3)),
        ("─" * 8, "─" * 8),
    ]


def robust_se_by_name(report: ReportOutcome) -> dict[str, float]:
    """Return the HC3 standard error of each coefficient from the diagnostics pass."""
    return {name: se.hc3 for name, se in report.diagnostics.robust_se.items()}


class ChartBody(Widget):
    """Draws a chart at its own current size (rendering on resize is cheap: bins are small)."""

    DEFAULT_CSS = """
    ChartBody { height: 1fr; width: 1fr; }
    """

    def __init__(self, draw: Callable[[int, int], str | None], hint: str) -> None:
        super().__init__(classes="pane--chart")
        self.draw = draw
        """Returns the chart text for a width and height, or None when there is nothing."""
        self.hint = hint
        """Shown when there is nothing to draw."""

    def render(self) -> RenderableType:
        """Draw the chart for the widget's current size."""
        width, height = self.size.width, self.size.height
        chart = self.draw(width, height) if width > 0 and height > 0 else None
        if chart is None:
            return Text(self.hint)
        return Text.from_ansi(chart, no_wrap=True)


class ChartPane(Pane):
    """A pane holding one chart of the fit on screen."""

    shown: reactive[SessionFit | None] = reactive(None, always_update=True)
    """The fit whose chart is drawn."""

    def compose(self) -> ComposeResult:
        """Add the chart body."""
        yield ChartBody(self.draw, self.info.hint)

    def watch_shown(self) -> None:
        """Redraw when another fit is shown."""
        if self.is_mounted:
            self.query_one(ChartBody).refresh()

    def draw(self, width: int, height: int) -> str | None:
        """Return the chart text for `width` x `height`, or None with no fit."""
        return None

    def color(self) -> bool:
        """Return True when charts may use colour."""
        return not self.is_colorless


SIDE_BY_SIDE_WIDTH: Final = 70
"""From this width the Spread pane draws the normal quantile chart beside the histogram."""


class SpreadPane(ChartPane):
    """The residual histogram, with the normal quantile chart beside it or on its own."""

    is_quantile_chart: reactive[bool] = reactive(False)
    """Draw the normal quantile chart across the whole pane instead of the histogram."""

    def watch_is_quantile_chart(self) -> None:
        """Redraw in the other view."""
        if self.is_mounted:
            self.query_one(ChartBody).refresh()

    def draw(self, width: int, height: int) -> str | None:
        """Draw the histogram of residuals (and the quantile chart when it fits beside it)."""
        if self.shown is None:
            return None
        from triage.views.charts import render_histogram, render_quantile_chart, side_by_side

        diagnostics = self.shown.report.diagnostics
        if self.is_quantile_chart:
            quantiles = diagnostics.studentized_quantiles
            return render_quantile_chart(quantiles, width, height, color=self.color())
        if width < SIDE_BY_SIDE_WIDTH:
            return render_histogram(diagnostics.histogram, width, height, color=self.color())
        left = width * 11 // 20
        histogram = render_histogram(diagnostics.histogram, left, height, color=self.color())
        quantile_chart = render_quantile_chart(
            diagnostics.studentized_quantiles, width - left, height, color=self.color()
        )
        return side_by_side(histogram, quantile_chart, left)


class TrendPane(ChartPane):
    """Mean residual and its 10–90% band in bins of fitted value."""

    def draw(self, width: int, height: int) -> str | None:
        """Draw residuals by fitted value."""
        if self.shown is None:
            return None
        from triage.views.charts import render_binned

        bins = self.shown.report.diagnostics.binned.get("fitted", ())
        return render_binned(
            bins,
            width,
            height,
            title="residual by fitted value",
            x_label="fitted value",
            color=self.color(),
        )


class InputsPane(ChartPane):
    """Mean residual and its band in bins of one predictor; a key steps to the next."""

    predictor: reactive[str | None] = reactive(None)
    """The predictor drawn."""

    def watch_predictor(self) -> None:
        """Redraw for another predictor."""
        self.watch_shown()

    def draw(self, width: int, height: int) -> str | None:
        """Draw residuals by the chosen predictor."""
        if self.shown is None:
            return None
        if self.predictor is None:
            return "the model has no numeric predictor to draw against"
        from triage.views.charts import render_binned

        names = self.shown.report.outcome.builder.numeric_predictors
        position = f"{names.index(self.predictor) + 1} of {len(names)}"
        bins = self.shown.report.diagnostics.binned.get(self.predictor, ())
        return render_binned(
            bins,
            width,
            height,
            title=f"residual by {self.predictor} ({position})",
            x_label=self.predictor,
            color=self.color(),
        )


class FlagsPane(TextPane):
    """The flags in plain words, with the tests and counts behind them."""

    shown: reactive[SessionFit | None] = reactive(None, always_update=True)
    """The fit whose flags are shown."""

    def watch_shown(self) -> None:
        """Rebuild the text for another fit."""
        if self.is_mounted:
            self.refresh_text()

    def text_for(self, width: int) -> str | None:
        """Compose the hints, the residual tests and the shape of the residuals."""
        if self.shown is None:
            return None
        from triage.views.text import (
            join_sections,
            render_flags,
            render_residual_summary,
            render_tests,
        )

        diagnostics = self.shown.report.diagnostics
        return join_sections(
            [
                render_flags(diagnostics.flags, width=width),
                render_tests(diagnostics, is_ordered=self.is_ordered, width=width),
                render_residual_summary(diagnostics, width=width),
            ]
        )


WORST_FIGURES: Final[tuple[tuple[str, str], ...]] = (
    ("fitted", "fitted"),
    ("resid", "residual"),
    ("studentized", "stud. resid"),
    ("leverage", "leverage"),
    ("cooks", "Cook's D"),
)
"""`WorstRow` field and column heading of each figure in the Worst table."""

RANKED_BY: Final[dict[str, str]] = {
    "abs_resid": "resid",
    "studentized": "studentized",
    "leverage": "leverage",
    "cooks": "cooks",
}
"""The `WorstRow` field each ranking sorts by (its heading gets a ▼)."""

CURSOR_MARK: Final = "▸"
"""Shown beside the row under the cursor, so it stands out without colour."""


class WorstPane(Pane):
    """The worst rows by one criterion; a key switches the criterion, enter opens a row."""

    marked: reactive[frozenset[int]] = reactive(frozenset())
    """Source positions the user marked (shown with a `*`)."""

    def __init__(self, info: PaneInfo) -> None:
        super().__init__(info)
        self.rows: tuple[WorstRow, ...] = ()
        """The rows listed, worst first."""
        self.criterion: str = "abs_resid"
        """The ranking shown."""
        self.target = "observed"
        """Heading of the observed-target column (the target's name)."""
        self.decimals = 1
        """Decimals of observed, fitted and residual under the fit shown."""
        self.shown_columns: tuple[str, ...] = ()
        """Source columns shown beside each row (an id, a name), at most two."""
        self.records: dict[int, dict[str, str]] = {}
        """Source position -> column -> text of the rows read so far (for `shown_columns`)."""

    def compose(self) -> ComposeResult:
        """Add the heading and the table."""
        yield Static(self.info.hint, classes="pane--note", markup=False)
        table: DataTable[str | Text] = DataTable(id="worst-table", cursor_type="row")
        yield table

    def on_mount(self) -> None:
        """Name the table's columns."""
        self._set_columns()

    def _set_columns(self) -> None:
        table = _table(self, "worst-table")
        table.clear(columns=True)
        ranked = RANKED_BY.get(self.criterion)
        table.add_column("", key="mark")
        table.add_column(_right("row"), key="row")
        for name in self.shown_columns:
            table.add_column(name, key=f"show:{name}")
        table.add_column(_right(self.target), key="observed")
        for field, title in WORST_FIGURES:
            table.add_column(_right(f"{title} ▼" if field == ranked else title), key=field)

    def show(self, fit: SessionFit, criterion: str) -> None:
        """List the worst rows of `fit` by `criterion`."""
        from triage.views.format import amount_decimals, truncate
        from triage.views.text import CRITERION_TITLES

        self.rows = fit.report.diagnostics.worst.get(criterion, ())  # type: ignore[call-overload]
        self.decimals = amount_decimals(fit.report.outcome.fit.resid_sd)
        self.criterion = criterion
        self.target = truncate(fit.report.outcome.spec.target_label, 14)
        self._set_columns()
        self._fill()
        title = CRITERION_TITLES.get(criterion, criterion)
        basis = "every row" if fit.is_full_pass else "the sample"
        self.query_one(".pane--note", Static).update(
            f"{len(self.rows)} rows, {title}, from {basis} of fit #{fit.number}; "
            "a flagged row deserves a look, it is not shown to be wrong"
        )

    def show_pending(self, number: int) -> None:
        """Empty the list while the diagnostics of fit `number` are computed."""
        self.rows = ()
        self._fill()
        self.query_one(".pane--note", Static).update(
            f"worst rows of fit #{number}: residual diagnostics running…"
        )

    def watch_marked(self) -> None:
        """Refresh the marks."""
        self._fill()

    def _mark(self, index: int, cursor: int) -> str:
        entry = self.rows[index]
        return (CURSOR_MARK if index == cursor else " ") + ("*" if entry.row in self.marked else "")

    def _fill(self) -> None:
        if not self.is_mounted:
            return
        from triage.views.format import format_fixed, format_number

        table = _table(self, "worst-table")
        row = min(max(table.cursor_row, 0), max(len(self.rows) - 1, 0))
        table.clear()
        # observed, fitted and residual share one format, so residual = observed - fitted
        # can be checked by eye
        decimals = self.decimals
        for index, entry in enumerate(self.rows):
            table.add_row(
                self._mark(index, row),
                _right(f"{entry.row:,}"),
                *[self._shown(entry.row, name) for name in self.shown_columns],
                _right(format_fixed(entry.fitted + entry.resid, decimals)),
                _right(format_fixed(entry.fitted, decimals)),
                _right(format_fixed(entry.resid, decimals)),
                _right(format_number(entry.studentized, digits=3)),
                _right(format_number(entry.leverage, digits=3)),
                _right(format_number(entry.cooks, digits=3)),
                key=str(entry.row),
            )
        if self.rows:
            table.move_cursor(row=row, animate=False)

    def _shown(self, position: int, name: str) -> str:
        record = self.records.get(position)
        return "…" if record is None else record.get(name, "")

    def show_columns(self, names: tuple[str, ...]) -> None:
        """Show these source columns beside each row (values fill in as rows are read)."""
        self.shown_columns = names
        if self.is_mounted:
            self._set_columns()
            self._fill()

    def add_record(self, position: int, record: dict[str, object]) -> None:
        """Keep a row read from the source; fill its shown columns if it is listed."""
        self.records[position] = {
            name: "(missing)" if value is None else str(value) for name, value in record.items()
        }
        if not self.is_mounted or position not in self.positions():
            return
        table = _table(self, "worst-table")
        for name in self.shown_columns:
            table.update_cell(str(position), f"show:{name}", self._shown(position, name))

    def on_data_table_row_highlighted(self, event: DataTable.RowHighlighted) -> None:
        """Move the cursor mark with the cursor (it shows where it is without colour)."""
        table = _table(self, "worst-table")
        for index, entry in enumerate(self.rows):
            mark = self._mark(index, event.cursor_row)
            if str(table.get_cell(str(entry.row), "mark")) != mark:
                table.update_cell(str(entry.row), "mark", mark)

    def positions(self) -> list[int]:
        """Return the source positions listed, worst first."""
        return [entry.row for entry in self.rows]

    def cursor_position(self) -> int | None:
        """Return the source position under the cursor, or None for an empty list."""
        table = _table(self, "worst-table")
        if not self.rows or table.row_count == 0:
            return None
        return self.rows[min(table.cursor_row, len(self.rows) - 1)].row

    def move_to(self, position: int) -> None:
        """Put the cursor on the row at source `position`, if listed."""
        positions = self.positions()
        if position in positions:
            _table(self, "worst-table").move_cursor(row=positions.index(position), animate=False)


class GroupsPane(TextPane):
    """Residuals broken down by the levels of one column; a key steps to the next column."""

    shown: reactive[SessionFit | None] = reactive(None, always_update=True)
    """The fit whose segments are shown."""
    column: reactive[str | None] = reactive(None)
    """The column the residuals are broken down by."""

    def watch_shown(self) -> None:
        """Rebuild for another fit."""
        if self.is_mounted:
            self.refresh_text()

    def watch_column(self) -> None:
        """Rebuild for another column."""
        self.watch_shown()

    def text_for(self, width: int) -> str | None:
        """Lay out one row per level of the chosen column: rows, mean residual, RMSE and t."""
        if self.shown is None:
            return None
        diagnostics = self.shown.report.diagnostics
        names = list(diagnostics.segments)
        if self.column is None or self.column not in diagnostics.segments:
            return "no column to break residuals down by (text columns or few-valued numbers)"
        from triage.views.format import truncate
        from triage.views.text import render_segments, zero_by_construction

        position = f"column {names.index(self.column) + 1} of {len(names)}"
        body = render_segments(
            self.column,
            diagnostics.segments[self.column],
            is_capped=self.column in diagnostics.segments_capped,
            in_model=zero_by_construction(self.shown.report.outcome.spec, self.column),
            width=width,
        )
        note = truncate(
            "t of mean: the mean residual in standard errors; far from 0 suggests "
            "the model is biased for that level, worth a look, not a conclusion.",
            width,
        )
        return f"{position}\n{body}\n{note}"
