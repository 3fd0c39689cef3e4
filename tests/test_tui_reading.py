"""Reading the app at 80x24: the Columns pane's figures from every row after a full pass,
the normal quantile chart on its own key, and a heading that never cuts a term.

Oracle for the figures: polars and numpy reading the whole (small) demo file directly.
"""

from __future__ import annotations

import itertools
import re
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
from rich.cells import cell_len
from textual.command import CommandList
from textual.widgets import Static

from tests import tui_support
from tests.test_tui_app import main_screen
from tests.tui_support import build_app, key_for, press_id, screen_text, settle, wait_until
from triage.tui.screens.help import HelpScreen
from triage.tui.widgets.panes import SAMPLE_MARK, ColumnsPane, SpreadPane
from triage.tui.widgets.status import HEADING_MAX_LINES, heading_lines
from triage.views.format import format_number

config_home = tui_support.config_home
demo_file = tui_support.demo_file

SMALL = (80, 24)
SAMPLE_ROWS = 2_000
"""Two of the demo file's six row groups: the quick fit is a real sample."""

TERMS = "distance_km, stops, weight_kg, hour, depot, vehicle"
"""The README's first model."""


def _note(app: Any) -> str:
    """The Columns pane's note above its table."""
    return str(app.screen.query_one(ColumnsPane).query_one(".pane--note", Static).content)


def _cells(app: Any, column: str) -> list[str]:
    """The Columns pane's cells of one column: role, name, type, missing, low, mean, high."""
    table = app.screen.query_one("#columns-table")
    return [str(cell) for cell in table.get_row(column)]


async def test_full_pass_refreshes_the_model_columns_from_every_row(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms=TERMS, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "pane-columns")
        # before a pass over every row, every figure is marked as the sample's
        for name in ("minutes", "delivery_id", "depot"):
            assert _cells(app, name)[3].startswith(SAMPLE_MARK)
        assert "a pass over every row brings" in _note(app)
        await press_id(pilot, "start-full-pass")
        screen = main_screen(app)
        await wait_until(pilot, lambda: screen.passes.running_pass is None, "the full pass")
        await settle(pilot)
        whole = pl.read_parquet(demo_file)  # the oracle: polars on the whole file
        for name in ("minutes", "distance_km", "stops", "weight_kg", "hour"):
            values = whole[name].cast(pl.Float64).to_numpy()
            usable = values[np.isfinite(values)]
            _, _, _, missing, low, mean, high = _cells(app, name)
            assert missing == f"{1 - usable.size / whole.height:.1%}", name
            assert low == format_number(usable.min()), name
            assert mean == format_number(usable.mean()), name
            assert high == format_number(usable.max()), name
        figures = app.screen.query_one(ColumnsPane).figures
        assert figures["minutes"].high == whole["minutes"].max()
        weights = whole["weight_kg"].to_numpy()
        assert figures["weight_kg"].sd == pytest.approx(np.nanstd(weights, ddof=1), rel=1e-12)
        # a text column of the model: its missing share from every row, its top from the sample
        depot = _cells(app, "depot")
        assert depot[3] == f"{whole['depot'].null_count() / whole.height:.1%}"
        assert depot[6].startswith(SAMPLE_MARK)
        # a column the model does not read keeps the sample's marked figures
        assert all(cell.startswith(SAMPLE_MARK) for cell in _cells(app, "delivery_id")[3:])
        assert "the other figures come from every row of the source" in _note(app)


async def test_a_filtered_pass_over_every_row_leaves_the_sample_figures(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km", where="hour < 12", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "start-full-pass")
        screen = main_screen(app)
        await wait_until(pilot, lambda: screen.passes.running_pass is None, "the full pass")
        await settle(pilot)
        assert screen.current is not None and screen.current.is_full_pass
        assert app.screen.query_one(ColumnsPane).figures == {}
        assert _cells(app, "minutes")[6].startswith(SAMPLE_MARK)


async def test_quantile_chart_key_shows_it_across_spread_and_is_listed(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms=TERMS, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        assert screen.front == "fit"
        await press_id(pilot, "toggle-quantile-chart")  # from another pane: it comes forward
        await settle(pilot)
        spread = app.screen.query_one(SpreadPane)
        assert screen.front == "spread" and spread.is_quantile_chart
        text = screen_text(app)
        assert "studentized residuals vs normal" in text
        assert "residuals, median ± 4 robust SD" not in text
        # the chart spans the pane: its plot box is wider than half the screen
        box = next(line for line in text.splitlines() if "┌" in line)
        assert box.rindex("┐") - box.index("┌") > SMALL[0] // 2
        await press_id(pilot, "toggle-quantile-chart")  # in Spread: back to the histogram
        await settle(pilot)
        assert not spread.is_quantile_chart
        assert "residuals, median ± 4 robust SD" in screen_text(app)
        # `?` help and the command list name it
        await press_id(pilot, "show-help")
        assert isinstance(app.screen, HelpScreen)
        described = {desc: keys for keys, desc, _ in app.screen.rows}
        assert described["quantile chart"] == key_for(app, "toggle-quantile-chart")
        await press_id(pilot, "close-dialog")
        await press_id(pilot, "open-palette")
        for char in "quantile":
            await pilot.press(char)
        found = app.screen.query_one(CommandList)

        def offers_quantile_chart() -> bool:
            option = found.highlighted_option
            return option is not None and "fit: quantile chart" in str(option.prompt)

        await wait_until(pilot, offers_quantile_chart, "the command list to offer the chart")
        await pilot.press("enter")
        await settle(pilot)
        assert spread.is_quantile_chart


LONGER = (
    "distance_km, square(distance_km), log(stops), weight_kg, hour, depot, vehicle, stops:weight_kg"
)
"""Eight terms, a filter beside them: more than two lines' worth at 60 columns."""


def _heading(app: Any) -> list[str]:
    """The heading's lines as drawn: from under the pane strip to the first pane's border."""
    lines = screen_text(app).splitlines()[1:]
    return [line for line in itertools.takewhile(lambda line: "╭" not in line, lines)]


@pytest.mark.parametrize(
    ("terms", "where", "size", "n_lines"),
    [(TERMS, None, SMALL, 2), (LONGER, "hour > 8", SMALL, 2), (LONGER, "hour > 8", (60, 24), 3)],
)
async def test_the_heading_wraps_and_never_cuts_a_term(
    config_home: Path,
    demo_file: Path,
    terms: str,
    where: str | None,
    size: tuple[int, int],
    n_lines: int,
) -> None:
    app = build_app(demo_file, target="minutes", terms=terms, where=where, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=size) as pilot:
        await settle(pilot)
        heading = _heading(app)
        assert len(heading) == n_lines
        assert all(cell_len(line) <= size[0] for line in heading)
        assert "…" not in "".join(heading)
        words = " ".join(" ".join(heading).split())
        assert words.startswith("fit #1 SAMPLE: minutes ~ ")
        for term in terms.split(", "):
            # each term whole on one line, as a term (between `~`/`+` and `+`/the end)
            assert any(re.search(rf"[~+] {re.escape(term)}( |$)", line) for line in heading)
        if where is not None:
            assert words.endswith(f"| where {where}")


def test_heading_lines_break_between_terms_and_end_in_an_ellipsis_only_past_three() -> None:
    head = "fit #12 EVERY ROW: "
    formula = "minutes ~ " + " + ".join(f"log(column_{k})" for k in range(30))
    lines = heading_lines(head, formula, ["where hour > 8"], 78)
    assert len(lines) == HEADING_MAX_LINES and lines[-1].endswith("…")
    assert all(cell_len(line) <= 78 for line in lines)
    assert lines[1].startswith("  + log(column_")  # a continuation starts with a whole term
    wide = heading_lines("", "y ~ " + "x" * 50, ["where a > 1"], 30)
    assert [cell_len(line) for line in wide] == [30, 26, 16]  # folded only where no break fits
    assert heading_lines("", "y ~ a + b", [], 78) == ["y ~ a + b"]
