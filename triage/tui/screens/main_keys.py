"""The main screen's keys: one binding per action, with an id keymaps name and a tooltip."""

from __future__ import annotations

from typing import Final

from textual.binding import Binding, BindingType

from triage.tui.widgets.panes import PANES

COLUMN_ACTIONS: Final = frozenset(
    {
        "set_target",
        "toggle_term",
        "cycle_transform",
        "toggle_categorical",
        "set_weights",
        "toggle_shown",
    }
)
"""Actions that work on the column under the cursor of the Columns pane."""

FIT_ACTIONS: Final = frozenset(
    {
        "toggle_robust",
        "next_predictor",
        "next_criterion",
        "next_segment_column",
        "open_row",
        "step_row",
        "toggle_mark",
        "refit_without_marked",
        "clear_marks",
        "export_rows",
        "show_checks",
        "toggle_quantile_chart",
    }
)
"""Actions that need a fit on screen."""


def _pane_binding(index: int, pane_id: str, title: str) -> Binding:
    key = str((index + 1) % 10)
    return Binding(
        key,
        f"show_pane('{pane_id}')",
        title,
        show=False,
        id=f"pane-{pane_id}",
        tooltip=f"Bring the {title} pane to the front.",
    )


MAIN_BINDINGS: Final[list[BindingType]] = [
    *(_pane_binding(i, info.pane_id, info.title) for i, info in enumerate(PANES)),
    Binding(
        "greater_than_sign",
        "cycle_pane(1)",
        "next pane",
        show=False,
        id="next-pane",
        tooltip="Bring the next pane to the front.",
    ),
    Binding(
        "less_than_sign",
        "cycle_pane(-1)",
        "previous pane",
        show=False,
        id="previous-pane",
        tooltip="Bring the previous pane to the front.",
    ),
    Binding(
        "ctrl+o",
        "open_data",
        "open file",
        show=False,
        id="open-data",
        tooltip="Open another Parquet, CSV or Arrow file, folder or glob.",
    ),
    Binding(
        "y",
        "set_target",
        "target",
        id="set-target",
        tooltip="Make the column under the cursor the target of the model.",
    ),
    Binding(
        "space",
        "toggle_term",
        "term",
        show=False,
        id="toggle-term",
        tooltip="Add the column under the cursor as a term, or remove its term.",
    ),
    Binding(
        "t",
        "cycle_transform",
        "transform",
        show=False,
        id="cycle-transform",
        tooltip="Step the column's term through log, log1p, sqrt, square, std, none.",
    ),
    Binding(
        "c",
        "toggle_categorical",
        "categorical",
        show=False,
        id="toggle-categorical",
        tooltip="Treat the column under the cursor as categories, or stop doing so.",
    ),
    Binding(
        "w",
        "set_weights",
        "weights",
        show=False,
        id="set-weights",
        tooltip="Use the column under the cursor as case weights, or stop doing so.",
    ),
    Binding(
        "l",
        "toggle_shown",
        "show in Worst",
        show=False,
        id="toggle-shown",
        tooltip="Show the column under the cursor beside each worst row (two at most), or stop.",
    ),
    Binding(
        "f",
        "edit_filter",
        "filter",
        show=False,
        id="edit-filter",
        tooltip="Type a row filter in SQL syntax, e.g. depot = 'north' AND hour < 20.",
    ),
    Binding(
        "e",
        "edit_terms",
        "type terms",
        show=False,
        id="edit-terms",
        tooltip=(
            "Type the terms, e.g. distance_km, log(stops), depot (an indicator per level), "
            "depot=north (that level's alone), or y ~ a + b."
        ),
    ),
    Binding(
        "s",
        "quick_fit",
        "sample fit",
        id="quick-fit",
        tooltip="Fit the model on a sample now (about a second on a large file).",
    ),
    Binding(
        "a",
        "start_full_pass",
        "every row",
        id="start-full-pass",
        tooltip="Fit and diagnose on every row in the background.",
    ),
    Binding(
        "x",
        "cancel_pass",
        "stop pass",
        id="cancel-pass",
        tooltip="Stop the running pass; the sample results stay on screen.",
    ),
    Binding(
        "r",
        "toggle_robust",
        "robust SE",
        show=False,
        id="toggle-robust",
        tooltip="Show standard errors robust to changing spread (HC3), or the usual ones.",
    ),
    Binding(
        "q",
        "toggle_quantile_chart",
        "quantile chart",
        show=False,
        id="toggle-quantile-chart",
        tooltip="Show the normal quantile chart of the studentized residuals across the Spread "
        "pane (tails and skew at a glance), or the histogram again.",
    ),
    Binding(
        "v",
        "next_predictor",
        "next input",
        show=False,
        id="next-predictor",
        tooltip="Show residuals against the next numeric input of the model.",
    ),
    Binding(
        "o",
        "next_criterion",
        "next ranking",
        show=False,
        id="next-criterion",
        tooltip="Rank the worst rows by the next criterion.",
    ),
    Binding(
        "g",
        "next_segment_column",
        "next group column",
        show=False,
        id="next-segment-column",
        tooltip="Break residuals down by the next column.",
    ),
    Binding(
        "d",
        "open_row",
        "open row",
        show=False,
        id="open-row",
        tooltip="Show the whole original row under the cursor with its diagnostics.",
    ),
    Binding(
        "n",
        "step_row(1)",
        "next row",
        show=False,
        id="next-row",
        tooltip="Open the next row of the worst-rows list.",
    ),
    Binding(
        "p",
        "step_row(-1)",
        "previous row",
        show=False,
        id="previous-row",
        tooltip="Open the previous row of the worst-rows list.",
    ),
    Binding(
        "m",
        "toggle_mark",
        "mark row",
        show=False,
        id="toggle-mark",
        tooltip="Mark or unmark the current row for a what-if refit or an export.",
    ),
    Binding(
        "i",
        "refit_without_marked",
        "refit w/o marked",
        show=False,
        id="refit-without-marked",
        tooltip="Refit without the marked rows and show how each coefficient moved.",
    ),
    Binding(
        "M",
        "clear_marks",
        "clear marks",
        show=False,
        id="clear-marks",
        tooltip="Unmark every row.",
    ),
    Binding(
        "k",
        "run_checks",
        "checks",
        show=False,
        id="run-checks",
        tooltip="Refit the fit on screen robustly (Huber) and check each numeric input for "
        "curvature with a spline, on the sample; a notification says when they are ready.",
    ),
    Binding(
        "K",
        "show_checks",
        "read checks",
        show=False,
        id="show-checks",
        tooltip="Read the finished robust and curvature checks of the fit on screen.",
    ),
    Binding(
        "E",
        "export_rows",
        "export",
        show=False,
        id="export-rows",
        tooltip="Write the marked rows or the worst K rows to Parquet or CSV.",
    ),
]
"""Every key of the main screen; a keymap file rebinds them by id."""
