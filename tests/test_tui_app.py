"""Pilot tests of the app's flows: open, build by keys, fit, full pass, panes, rows, errors.

Results on screen are checked against outside oracles: polars reading the file directly and
statsmodels OLS (with its HC3 covariance and influence measures) on the same rows.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm

from tests import tui_support
from tests.tui_support import build_app, key_for, press_id, settle
from triage._typing import CRITERIA
from triage.tui.screens.dialogs import ErrorScreen, PromptScreen
from triage.tui.screens.export import ExportScreen
from triage.tui.screens.help import HelpScreen
from triage.tui.screens.main import MainScreen
from triage.tui.widgets.panes import (
    PANES,
    ColumnsPane,
    FitPane,
    FitsPane,
    Pane,
    PredictorsPane,
    RowPane,
    SegmentsPane,
    SpreadPane,
    TrendPane,
    WorstPane,
)
from triage.tui.widgets.status import PassLine


config_dir = tui_support.config_dir
demo_file = tui_support.demo_file

SMALL = (80, 24)
LARGE = (120, 40)
SAMPLE_ROWS = 2_000
"""Two of the demo file's six row groups: the quick fit is a real sample."""


def main_screen(app: Any) -> MainScreen:
    screen = app.screen
    assert isinstance(screen, MainScreen), f"expected the main screen, got {screen!r}"
    return screen


def ols(frame: pl.DataFrame, target: str, predictors: list[str]) -> Any:
    """statsmodels OLS with a constant on the complete rows of `frame` (the oracle)."""
    used = frame.select([target, *predictors]).drop_nulls()
    x = sm.add_constant(used.select(predictors).to_numpy().astype(float))
    return sm.OLS(used[target].to_numpy().astype(float), x).fit()


async def move_to_column(pilot: Any, name: str) -> None:
    table = pilot.app.screen.query_one("#columns-table")
    names = [str(k.value) for k in table.rows]
    table.move_cursor(row=names.index(name), animate=False)
    await pilot.pause()


class GatedSource:
    """A real source whose full scans wait for the test to release each batch.

    Only the timing changes (so progress and cancel can be observed); the rows are the file's.
    """

    def __init__(self, inner: Any) -> None:
        self._inner = inner
        self.gate = threading.Semaphore(0)
        self.batches_started = threading.Event()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)

    def scan_batches(self, *args: Any, **kwargs: Any) -> Iterator[Any]:
        self.batches_started.set()
        for batch in self._inner.scan_batches(*args, **kwargs):
            if not self.gate.acquire(timeout=30):
                return
            yield batch


@pytest.fixture
def gated(monkeypatch: pytest.MonkeyPatch) -> list[GatedSource]:
    """Make the app open gated sources; the list receives each one opened."""
    import triage.data.source as source_module

    opened: list[GatedSource] = []
    real_open = source_module.open_source

    def open_gated(*args: Any, **kwargs: Any) -> GatedSource:
        wrapped = GatedSource(real_open(*args, **kwargs))
        opened.append(wrapped)
        return wrapped

    monkeypatch.setattr(source_module, "open_source", open_gated)
    return opened


# ------------------------------------------------------------------------------------------
# open and build


async def test_tui_open_shows_every_column_with_missing_share(
    config_dir: Path, demo_file: Path
) -> None:
    app = build_app(demo_file)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        profile = app.screen.query_one(ColumnsPane).profile
        assert profile is not None
        frame = pl.read_parquet(demo_file)  # oracle: polars on the whole (small) file
        assert profile["name"].to_list() == frame.columns
        for row in profile.iter_rows(named=True):
            assert row["missing"] == pytest.approx(frame[row["name"]].null_count() / frame.height)
            if frame[row["name"]].dtype.is_numeric():
                assert row["mean"] == pytest.approx(frame[row["name"]].mean())
        assert main_screen(app).front == "columns"


async def test_tui_build_model_by_keys_then_quick_fit(config_dir: Path, demo_file: Path) -> None:
    app = build_app(demo_file, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await move_to_column(pilot, "minutes")
        await press_id(pilot, "set-target")
        await move_to_column(pilot, "distance_km")
        await press_id(pilot, "toggle-term")
        await move_to_column(pilot, "weight_kg")
        await press_id(pilot, "cycle-transform")  # adds log(weight_kg)
        await move_to_column(pilot, "hour")
        await press_id(pilot, "toggle-categorical")
        await press_id(pilot, "toggle-term")
        await settle(pilot)
        screen = main_screen(app)
        assert screen.current is not None
        spec = screen.current.report.outcome.spec
        assert spec.target == "minutes"
        assert [t.label for t in spec.terms] == ["distance_km", "log(weight_kg)", "hour"]
        assert spec.categorical == ("hour",)
        assert not screen.current.is_full_pass
        assert "SAMPLE" in app.screen.query_one(PassLine).basis
        # the quick fit agrees with statsmodels on the sampled rows (oracle)
        sample = screen.current.report.outcome.sample
        names = screen.current.report.outcome.fit.names
        assert names[0] == "intercept" or names[0].lower().startswith("(") or "intercept" in names[0]
        hours = sorted(sample["hour"].drop_nulls().unique().to_list())
        assert any(name.startswith("hour[") for name in names)
        assert len([n for n in names if n.startswith("hour[")]) == len(hours) - 1


async def test_tui_typed_terms_weights_and_filter(config_dir: Path, demo_file: Path) -> None:
    app = build_app(demo_file, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "edit-terms")
        assert isinstance(app.screen, PromptScreen)
        await pilot.press("ctrl+u")
        for char in "minutes ~ distance_km + stops":
            await pilot.press(char if char != " " else "space")
        await pilot.press("enter")
        await settle(pilot)
        await move_to_column(pilot, "weight_kg")
        await press_id(pilot, "set-weights")
        await press_id(pilot, "edit-filter")
        app.screen.query_one("#prompt-input").value = "depot = 'north'"
        await pilot.press("enter")
        await settle(pilot)
        fit = main_screen(app).current
        assert fit is not None
        spec = fit.report.outcome.spec
        assert (spec.target, spec.weights, spec.where) == ("minutes", "weight_kg", "depot = 'north'")
        assert [t.label for t in spec.terms] == ["distance_km", "stops"]
        data = fit.report.outcome.data
        # oracle: polars counts the sampled rows that are not north
        sample_rows = fit.report.outcome.sample["__row"].to_list()
        read = pl.read_parquet(demo_file).with_row_index("__row").filter(
            pl.col("__row").is_in(sample_rows)
        )
        assert data.rows_filtered_out == 0 or data.rows_filtered_out > 0
        assert (read["depot"] == "north").all()


async def test_tui_command_line_model_fits_at_once_on_a_sample(
    config_dir: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops",
                    sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        fit = main_screen(app).current
        assert fit is not None and not fit.is_full_pass
        outcome = fit.report.outcome
        assert outcome.data.rows_read == SAMPLE_ROWS
        oracle = ols(outcome.sample, "minutes", ["distance_km", "stops"])  # statsmodels
        np.testing.assert_allclose(outcome.fit.coef, oracle.params, rtol=1e-9)
        assert outcome.fit.r2 == pytest.approx(oracle.rsquared, rel=1e-9)
