"""Pilot tests of the app's flows: open, build by keys, fit, full pass, panes, rows, errors.

Results on screen are checked against outside oracles: polars reading the file directly and
statsmodels OLS (with its HC3 covariance and influence measures) on the same rows.
"""

from __future__ import annotations

import functools
import gc
import re
import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from textual.command import CommandList, CommandPalette
from textual.widgets import Input, Static

from tests import tui_support
from tests.tui_support import (
    build_app,
    key_for,
    notifications,
    press_id,
    screen_text,
    settle,
    wait_until,
)
from triage._typing import CRITERIA
from triage.tui.screens.dialogs import ErrorScreen, PromptScreen, TextScreen
from triage.tui.screens.export import ExportScreen
from triage.tui.screens.help import HelpScreen
from triage.tui.screens.main import MainScreen
from triage.tui.widgets.panes import (
    PANES,
    ColumnsPane,
    FitPane,
    FitsPane,
    FlagsPane,
    GroupsPane,
    InputsPane,
    Pane,
    RowPane,
    SpreadPane,
    TrendPane,
    WorstPane,
)
from triage.tui.widgets.status import PassLine

config_home = tui_support.config_home
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
        return self._gated(self._inner.scan_batches(*args, **kwargs))

    def scan_parts(self, *args: Any, **kwargs: Any) -> list[Callable[[], Iterator[Any]]]:
        # a full pass reads a source's parts (one, for the small demo file), not scan_batches
        parts = self._inner.scan_parts(*args, **kwargs)
        return [functools.partial(lambda part: self._gated(part()), part) for part in parts]

    def _gated(self, batches: Iterator[Any]) -> Iterator[Any]:
        self.batches_started.set()
        for batch in batches:
            if not self.gate.acquire(timeout=tui_support.HANG_S):  # fail, never a short pass
                msg = f"the test released no batch in {tui_support.HANG_S:.0f} s"
                raise AssertionError(msg)
            yield batch


@pytest.fixture
def gated(monkeypatch: pytest.MonkeyPatch) -> list[GatedSource]:
    """Make the app open gated sources; the list receives each one opened."""
    import triage.data.source as source_module
    import triage.engine.passes as passes_module
    import triage.engine.progress as progress_module

    # every batch reports its progress (the app's default is at most four reports a second)
    monkeypatch.setattr(progress_module, "PROGRESS_INTERVAL_S", 0.0)
    # a full pass streams only when the learning sample is not the whole file
    monkeypatch.setattr(passes_module, "LEARNING_SAMPLE_ROWS", 1_000)
    monkeypatch.setattr(passes_module, "BATCH_ROWS", 500)  # twelve batches per pass
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
    config_home: Path, demo_file: Path
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


async def test_tui_build_model_by_keys_then_quick_fit(config_home: Path, demo_file: Path) -> None:
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
        # the quick fit agrees with statsmodels on the sampled rows (oracle); the dummy
        # coding's reference level differs, so compare R² and the numeric slopes
        import statsmodels.formula.api as smf

        outcome = screen.current.report.outcome
        rows = outcome.sample.drop_nulls(["minutes", "distance_km", "weight_kg", "hour"])
        oracle = smf.ols(
            "minutes ~ distance_km + np.log(weight_kg) + C(hour)", data=rows.to_pandas()
        ).fit()
        assert outcome.fit.names[0] == "intercept"
        assert outcome.fit.r2 == pytest.approx(oracle.rsquared, rel=1e-9)
        names = list(outcome.fit.names)
        assert outcome.fit.coef[names.index("distance_km")] == pytest.approx(
            oracle.params["distance_km"], rel=1e-8
        )
        assert outcome.fit.coef[names.index("log(weight_kg)")] == pytest.approx(
            oracle.params["np.log(weight_kg)"], rel=1e-8
        )


async def test_tui_typed_terms_weights_and_filter(config_home: Path, demo_file: Path) -> None:
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
        assert (spec.target, spec.weights) == ("minutes", "weight_kg")
        assert spec.where == "depot = 'north'"
        assert [t.label for t in spec.terms] == ["distance_km", "stops"]
        data = fit.report.outcome.data
        sampled = fit.report.outcome.sample["__row"].to_numpy()
        # oracle: polars on the file; the sample is whole row groups of 1,000 rows
        groups = np.unique(sampled // 1_000)
        frame = pl.read_parquet(demo_file).with_row_index("__row")
        in_groups = frame.filter((pl.col("__row") // 1_000).is_in(groups.tolist()))
        assert data.rows_filtered_out == int((in_groups["depot"] != "north").sum())
        kept = in_groups.filter(pl.col("depot") == "north")
        assert sorted(sampled.tolist()) == kept["__row"].to_list()
        complete = kept.drop_nulls(["minutes", "distance_km", "stops", "weight_kg"])
        assert data.rows_used == complete.height


async def test_tui_command_line_model_fits_at_once_on_a_sample(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        fit = main_screen(app).current
        assert fit is not None and not fit.is_full_pass
        outcome = fit.report.outcome
        assert outcome.data.rows_read == SAMPLE_ROWS
        oracle = ols(outcome.sample, "minutes", ["distance_km", "stops"])  # statsmodels
        np.testing.assert_allclose(outcome.fit.coef, oracle.params, rtol=1e-9)
        assert outcome.fit.r2 == pytest.approx(oracle.rsquared, rel=1e-9)


# ------------------------------------------------------------------------------------------
# full pass: progress, responsiveness, cancel


async def test_tui_full_pass_reports_progress_stays_responsive_and_finishes(
    config_home: Path, demo_file: Path, gated: list[GatedSource]
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        assert screen.current is not None and not screen.current.is_full_pass
        await press_id(pilot, "start-full-pass")
        assert screen.passes.running_pass is not None
        source = gated[0]
        pass_line = app.screen.query_one(PassLine)
        seen: list[int] = []
        for _ in range(3):
            source.gate.release()
            await wait_until(
                pilot,
                lambda: pass_line.progress is not None and pass_line.progress.rows_done not in seen,
                "the progress of the next batch",
            )
            assert pass_line.progress is not None
            seen.append(pass_line.progress.rows_done)
        assert seen == sorted(seen) and seen[-1] > seen[0]
        assert pass_line.progress is not None and pass_line.progress.rows_total
        shown = str(pass_line.render())
        assert f"{pass_line.progress.rows_done:,}/" in shown
        assert "rows/s" in shown and "s left" in shown and "SAMPLE" in shown
        assert "pass 1 of 2" in shown  # rows counted once per pass, the pass named
        # the app answers keys while the pass runs
        await press_id(pilot, "pane-spread")
        assert screen.front == "spread"
        # sample results stay on screen, labelled as such, until the pass ends
        assert "SAMPLE" in pass_line.basis
        for _ in range(60):  # two passes (fit, diagnostics) of twelve batches
            source.gate.release()
        await wait_until(pilot, lambda: screen.passes.running_pass is None, "the full pass to end")
        await settle(pilot)
        assert screen.current is not None and screen.current.is_full_pass
        assert "EVERY ROW" in pass_line.basis
        assert pass_line.progress is None
        oracle = ols(pl.read_parquet(demo_file), "minutes", ["distance_km", "stops"])
        np.testing.assert_allclose(screen.current.report.outcome.fit.coef, oracle.params, rtol=1e-9)


async def test_tui_full_pass_cancel_keeps_sample_results(
    config_home: Path, demo_file: Path, gated: list[GatedSource]
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        sample_fit = screen.current
        await press_id(pilot, "start-full-pass")
        gated[0].gate.release()
        await wait_until(
            pilot,
            lambda: app.screen.query_one(PassLine).progress is not None,
            "the first progress report",
        )
        await press_id(pilot, "cancel-pass")
        for _ in range(60):
            gated[0].gate.release()
        await wait_until(pilot, lambda: screen.passes.running_pass is None, "the full pass to end")
        await settle(pilot)
        assert screen.current is sample_fit
        assert len(screen.fits) == 1
        assert app.screen.query_one(PassLine).progress is None
        assert any("stopped" in m for m in notifications(app))


# ------------------------------------------------------------------------------------------
# panes


async def _full_fit_app(pilot: Any) -> MainScreen:
    await settle(pilot)
    await press_id(pilot, "start-full-pass")
    await settle(pilot)
    screen = main_screen(pilot.app)
    assert screen.current is not None and screen.current.is_full_pass
    return screen


async def test_tui_each_pane_comes_to_front_and_shows_the_fit(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(
        demo_file,
        target="minutes",
        terms="distance_km, log(weight_kg), stops, depot",
        sample_rows=SAMPLE_ROWS,
    )
    async with app.run_test(size=SMALL) as pilot:
        screen = await _full_fit_app(pilot)
        fit = screen.current
        assert fit is not None
        for info in PANES:
            await press_id(pilot, f"pane-{info.pane_id}")
            assert screen.front == info.pane_id
            shown = [p.info.pane_id for p in app.screen.query(Pane) if p.has_class("-shown")]
            assert shown == [info.pane_id]  # 80x24: one pane at a time
        for pane_type in (SpreadPane, TrendPane, InputsPane):
            pane = app.screen.query_one(pane_type)
            assert pane.shown is fit
            assert pane.draw(76, 16)
        # predictors cycle by key through the model's numeric predictors
        predictors = fit.report.outcome.builder.numeric_predictors
        pane = app.screen.query_one(InputsPane)
        seen = [pane.predictor]
        for _ in range(len(predictors) - 1):
            await press_id(pilot, "next-predictor")
            seen.append(pane.predictor)
        assert sorted(seen) == sorted(predictors)
        # worst rows follow the criterion key, in the diagnostics' order
        worst = app.screen.query_one(WorstPane)
        for criterion in CRITERIA:
            assert worst.criterion == criterion
            assert worst.positions() == [r.row for r in fit.report.diagnostics.worst[criterion]]
            await press_id(pilot, "next-criterion")
        # every hint and every residual test reaches the Flags pane
        flags_text = app.screen.query_one(FlagsPane).text_for(100) or ""
        for flag in fit.report.diagnostics.flags:
            assert flag.code in flags_text
        assert "Breusch" in flags_text and "RESET" in flags_text
        # segments follow the column key
        segments = app.screen.query_one(GroupsPane)
        first = segments.column
        assert first in fit.report.diagnostics.segments
        await press_id(pilot, "next-segment-column")
        assert segments.column != first or len(screen.segment_columns) == 1
        # depot levels: mean residual per level agrees with statsmodels residuals (oracle)
        frame = pl.read_parquet(demo_file)
        used = frame.drop_nulls(["minutes", "distance_km", "weight_kg", "stops", "depot"])
        import statsmodels.formula.api as smf

        oracle = smf.ols(
            "minutes ~ distance_km + np.log(weight_kg) + stops + C(depot)", data=used.to_pandas()
        ).fit()
        resid = pl.DataFrame({"depot": used["depot"], "e": np.asarray(oracle.resid)})
        means = dict(resid.group_by("depot").agg(pl.col("e").mean()).iter_rows())
        for level in fit.report.diagnostics.segments["depot"]:
            assert level.mean_resid == pytest.approx(means[level.level], abs=1e-8)


async def test_tui_robust_toggle_shows_hc3_from_statsmodels(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        screen = await _full_fit_app(pilot)
        pane = app.screen.query_one(FitPane)
        assert "HC3 SE" not in (pane.text_for(100) or "")
        await press_id(pilot, "toggle-robust")
        text = pane.text_for(100) or ""
        assert "HC3 SE" in text
        assert screen.current is not None
        from triage.tui.widgets.panes import robust_se_by_name

        robust = robust_se_by_name(screen.current.report)
        oracle = ols(pl.read_parquet(demo_file), "minutes", ["distance_km", "stops"])
        hc3 = np.sqrt(np.diag(oracle.cov_HC3))  # statsmodels HC3
        names = screen.current.report.outcome.fit.names
        np.testing.assert_allclose([robust[n] for n in names], hc3, rtol=1e-8)


# ------------------------------------------------------------------------------------------
# rows: drill-down, marks, what-if, export


async def test_tui_drill_down_shows_the_original_row_and_steps(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        screen = await _full_fit_app(pilot)
        await press_id(pilot, "pane-worst")
        await press_id(pilot, "open-row")
        await settle(pilot)
        row_pane = app.screen.query_one(RowPane)
        positions = app.screen.query_one(WorstPane).positions()
        assert screen.front == "row"
        frame = pl.read_parquet(demo_file)
        used = frame.drop_nulls(["minutes", "distance_km", "stops"]).with_row_index("i")
        oracle = ols(frame, "minutes", ["distance_km", "stops"])
        influence = oracle.get_influence()
        full_rows = (
            frame.with_row_index("__row")
            .filter(pl.all_horizontal(pl.col("minutes", "distance_km", "stops").is_not_null()))[
                "__row"
            ]
            .to_list()
        )
        steps = [(positions[0], "next-row"), (positions[1], "previous-row"), (positions[0], None)]
        for expected, then in steps:
            view = row_pane.row
            assert view is not None and view.frame is not None and view.diagnostics is not None
            assert view.position == expected
            # every column, read by position, equals polars' own read of that row
            original = frame.row(expected, named=True)
            shown = {k: v for k, v in view.frame.row(0, named=True).items() if k != "__row"}
            assert shown == original
            i = full_rows.index(expected)
            assert view.diagnostics.cooks[0] == pytest.approx(
                influence.cooks_distance[0][i], rel=1e-7
            )
            assert view.diagnostics.studentized[0] == pytest.approx(
                influence.resid_studentized_external[i], rel=1e-7
            )
            assert view.diagnostics.leverage[0] == pytest.approx(
                influence.hat_matrix_diag[i], rel=1e-7
            )
            if then is not None:
                await press_id(pilot, then)
                await settle(pilot)
        assert used.height == len(full_rows)


async def test_tui_mark_refit_compare_without_changing_the_file(
    config_home: Path, demo_file: Path
) -> None:
    before_bytes = demo_file.read_bytes()
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        screen = await _full_fit_app(pilot)
        first = screen.current
        assert first is not None
        await press_id(pilot, "pane-worst")
        worst = app.screen.query_one(WorstPane)
        marked = worst.positions()[:3]
        for position in marked:
            worst.move_to(position)
            await press_id(pilot, "toggle-mark")
        assert screen.marked == set(marked)
        await press_id(pilot, "refit-without-marked")
        await settle(pilot)
        refit = screen.current
        assert refit is not None and refit.number == first.number + 1
        assert refit.baseline == first.number
        assert refit.excluded == frozenset(marked) and refit.is_full_pass
        frame = pl.read_parquet(demo_file).with_row_index("__row")
        kept = frame.filter(~pl.col("__row").is_in(marked))
        oracle = ols(kept, "minutes", ["distance_km", "stops"])  # statsmodels without them
        np.testing.assert_allclose(refit.report.outcome.fit.coef, oracle.params, rtol=1e-9)
        text = app.screen.query_one(FitPane).text_for(100) or ""
        assert "what-if: without 3 marked rows" in text
        assert f"fit #{first.number}" in text and f"fit #{refit.number}" in text
    assert demo_file.read_bytes() == before_bytes


async def test_tui_export_marked_and_worst_rows(
    config_home: Path, demo_file: Path, tmp_path: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await _full_fit_app(pilot)
        await press_id(pilot, "pane-worst")
        worst = app.screen.query_one(WorstPane)
        worst.move_to(worst.positions()[4])
        await press_id(pilot, "toggle-mark")
        await press_id(pilot, "export-rows")
        assert isinstance(app.screen, ExportScreen)
        assert "no proof of error or wrongdoing" in str(
            app.screen.query_one("#export-notice").content
        )
        app.screen.query_one("#export-path").value = str(tmp_path / "marked.parquet")
        await pilot.press("enter")
        await settle(pilot)
        written = pl.read_parquet(tmp_path / "marked.parquet")
        assert written["row"].to_list() == [worst.positions()[4]]
        original = pl.read_parquet(demo_file).row(worst.positions()[4], named=True)
        assert {k: written.row(0, named=True)[k] for k in original} == original
        assert any("data-protection" in m for m in notifications(app))
        # the worst K rows
        await press_id(pilot, "export-rows")
        app.screen.query_one("#export-worst").value = True
        app.screen.query_one("#export-k").value = "5"
        app.screen.query_one("#export-path").value = str(tmp_path / "worst.csv")
        app.screen.query_one("#export-path").focus()
        await pilot.press("enter")
        await settle(pilot)
        worst_written = pl.read_csv(tmp_path / "worst.csv")
        assert worst_written["row"].to_list() == worst.positions()[:5]


async def test_tui_fits_list_switches_back_to_an_earlier_fit(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        assert screen.front == "fit"  # the command line named a model
        await press_id(pilot, "pane-columns")
        await move_to_column(pilot, "stops")
        await press_id(pilot, "toggle-term")
        await settle(pilot)
        assert [f.number for f in screen.fits] == [1, 2]
        await press_id(pilot, "pane-fits")
        table = app.screen.query_one("#fits-table")
        table.move_cursor(row=0, animate=False)
        await pilot.press("enter")
        await pilot.pause()
        assert screen.current is screen.fits[0]
        assert app.screen.query_one(FitsPane).current == 1
        labels = [t.label for t in screen.current.report.outcome.spec.terms]
        assert labels == ["distance_km"]


# ------------------------------------------------------------------------------------------
# help, keymaps, errors, layout


async def test_tui_help_lists_every_key_of_the_active_keymap(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "show-help")
        assert isinstance(app.screen, HelpScreen)
        rows = app.screen.rows
        described = {desc: keys for keys, desc, _ in rows}
        for binding in [*MainScreen.BINDINGS, *type(app).BINDINGS]:
            key = app.get_key_display(binding.with_key(key_for(app, binding.id)))
            assert key in described[binding.description].split(" / ")
        # the dialogs' keys are listed too, so every id of the keymap appears
        for binding in [*ErrorScreen.BINDINGS, *ExportScreen.BINDINGS]:
            key = app.get_key_display(binding.with_key(key_for(app, binding.id)))
            assert key in described[f"{binding.description} (in dialogs)"].split(" / ")
        # our words only: no framework entries under the framework's Title Case names
        assert not {"Focus Next", "Focus Previous", "Copy selected text"} & set(described)
        assert "move" in described and "next / previous box" in described
        shown = str(app.screen.query_one("#help-table", Static).render())
        assert "AIC and BIC count the estimated coefficients" in " ".join(shown.split())
        await press_id(pilot, "close-dialog")
        assert isinstance(app.screen, MainScreen)


async def test_tui_keymap_file_overrides_keys(
    config_home: Path, demo_file: Path, tmp_path: Path
) -> None:
    mine = tmp_path / "mine.toml"
    mine.write_text('pane-fit = "F"\nquick-fit = "z"\npane-fits = "ctrl+l"\n', encoding="utf-8")
    app = build_app(demo_file, keymap_file=mine)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        await pilot.press("2")  # the default key no longer brings Fit forward
        assert screen.front == "columns"
        await pilot.press("F")
        assert screen.front == "fit"
        await pilot.press("ctrl+l")
        assert screen.front == "fits"
        keys = {b.binding.id: b.binding.key for b in app.screen.active_bindings.values()}
        assert keys["quick-fit"] == "z"


async def test_tui_alternative_keyset(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, keyset="fkeys")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await pilot.press("f3")
        assert main_screen(app).front == "fit"


async def test_tui_bad_term_shows_a_message_the_user_dismisses(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "edit-terms")
        app.screen.query_one("#prompt-input").value = "log(dpeot)"
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert "dpeot" in app.screen.message and "depot" in app.screen.message
        await press_id(pilot, "close-dialog")
        assert isinstance(app.screen, MainScreen)
        assert app.is_running


async def test_tui_typed_indicator_terms_fit_as_statsmodels_and_show_by_name(
    config_home: Path, demo_file: Path
) -> None:
    # Oracle: statsmodels OLS on the fit's sample rows with the indicators made by hand.
    app = build_app(demo_file, sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "edit-terms")
        typed = "minutes ~ distance_km + depot[east] + hour=08"
        app.screen.query_one("#prompt-input").value = typed
        await pilot.press("enter")
        await settle(pilot)
        fit = main_screen(app).current
        assert fit is not None
        outcome = fit.report.outcome
        assert outcome.fit.names == ("intercept", "distance_km", "depot=east", "hour=8")
        rows = outcome.sample.with_columns(
            (pl.col("depot") == "east").cast(pl.Float64).alias("east"),
            (pl.col("hour") == 8).cast(pl.Float64).alias("eight"),
        )
        oracle = ols(rows, "minutes", ["distance_km", "east", "eight"])
        np.testing.assert_allclose(outcome.fit.coef, oracle.params, rtol=1e-8)
        await press_id(pilot, "pane-columns")
        await settle(pilot)
        hour_line = next(line for line in screen_text(app).split("\n") if " hour " in line)
        assert "hour=8" in hour_line  # the Columns pane names the term as the fit reads it
        await press_id(pilot, "edit-terms")
        app.screen.query_one("#prompt-input").value = "minutes ~ distance_km + depot=eest"
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert "`depot` has no level `eest`" in app.screen.message
        assert "`east`" in app.screen.message


async def test_tui_bad_filter_and_unreadable_file_show_messages(
    config_home: Path, demo_file: Path, tmp_path: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "edit-filter")
        app.screen.query_one("#prompt-input").value = "dpeot = 'north'"
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert "dpeot" in app.screen.message
        await press_id(pilot, "dismiss-error")
        await press_id(pilot, "open-data")
        app.screen.query_one("#prompt-input").value = str(tmp_path / "absent.parquet")
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert "absent.parquet" in app.screen.message
        await press_id(pilot, "close-dialog")
        assert app.is_running


async def test_tui_stacks_at_80x24_and_tiles_at_120x40(config_home: Path, demo_file: Path) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)

        def shown() -> set[str]:
            return {p.info.pane_id for p in app.screen.query(Pane) if p.has_class("-shown")}

        assert shown() == {"fit"}  # the command line named a model: its fit comes forward
        await press_id(pilot, "pane-columns")
        assert shown() == {"columns"}
        await pilot.resize_terminal(*LARGE)
        await pilot.pause()
        assert shown() == {"columns", "fit", "flags", "fits"}
        await press_id(pilot, "pane-trend")
        assert shown() == {"spread", "trend", "inputs", "groups"}
        for pane in app.screen.query(Pane):
            if pane.has_class("-shown"):
                assert pane.region.width >= 55 and pane.region.height >= 16
        await pilot.resize_terminal(*SMALL)
        await pilot.pause()
        assert shown() == {"trend"}


async def test_tui_no_color_draws_plain_charts(
    config_home: Path, demo_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # NO_COLOR convention (no-color.org): any non-empty value turns colour off
    monkeypatch.setenv("NO_COLOR", "1")
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        assert app.ansi_color
        assert "\x1b[" not in (app.screen.query_one(SpreadPane).draw(76, 16) or "x\x1b[")
        assert "\x1b[" not in (app.screen.query_one(TrendPane).draw(76, 16) or "x\x1b[")
    monkeypatch.delenv("NO_COLOR")
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        assert "\x1b[" in (app.screen.query_one(SpreadPane).draw(76, 16) or "")


async def test_tui_command_palette_runs_a_screen_action(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "open-palette")
        for char in "every row":
            await pilot.press(char if char != " " else "space")
        palette = app.screen
        assert isinstance(palette, CommandPalette)
        found = palette.query_one(CommandList)

        def offers_every_row() -> bool:
            option = found.highlighted_option
            return option is not None and "every row" in str(option.prompt).lower()

        await wait_until(pilot, offers_every_row, "the palette to offer the full pass")
        await pilot.press("enter")
        await settle(pilot)
        screen = main_screen(app)
        assert screen.current is not None and screen.current.is_full_pass


@pytest.mark.parametrize("word", ["curvature", "spline", "Huber", "robust"])
async def test_tui_command_palette_finds_the_checks_by_their_names(
    config_home: Path, demo_file: Path, word: str
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "open-palette")
        for char in word:
            await pilot.press(char)
        found = app.screen.query_one(CommandList)

        def offers_the_checks() -> bool:
            prompts = [str(found.get_option_at_index(i).prompt) for i in range(found.option_count)]
            return any("checks" in prompt for prompt in prompts)

        await wait_until(pilot, offers_the_checks, f"the palette to offer the checks for {word}")


# ------------------------------------------------------------------------------------------
# the command line that opens the app


def test_tui_cli_open_hands_options_to_the_app(
    config_home: Path, demo_file: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from triage.cli.main import main
    from triage.tui.app import TriageApp

    opened: list[TriageApp] = []
    monkeypatch.setattr(TriageApp, "run", lambda self: opened.append(self))
    mine = tmp_path / "keys.toml"
    mine.write_text('quick-fit = "z"\n', encoding="utf-8")
    code = main(
        [
            str(demo_file),
            "--target",
            "minutes",
            "--terms",
            "distance_km, depot",
            "--rows",
            "all",
            "--seed",
            "3",
            "--where",
            "hour > 8",
            "--keyset",
            "fkeys",
            "--keymap",
            str(mine),
            "--categorical",
            "hour",
        ]
    )
    assert code == 0
    settings = opened[0].settings
    assert (settings.data, settings.target, settings.terms) == (
        str(demo_file),
        "minutes",
        "distance_km, depot",
    )
    assert settings.is_full_at_start and settings.seed == 3
    assert settings.where == "hour > 8" and settings.categorical == ("hour",)
    assert opened[0].keymap["quick-fit"] == "z" and opened[0].keymap["pane-fit"] == "f3"


def test_tui_cli_open_reports_a_bad_keymap_in_one_line(
    config_home: Path, demo_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from triage.cli.main import main

    bad = tmp_path / "bad.toml"
    bad.write_text('pane-fitt = "F"\n', encoding="utf-8")
    assert main(["open", str(demo_file), "--keymap", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "pane-fitt" in err and "`pane-fit`" in err


async def test_tui_open_another_file_starts_a_new_session(
    config_home: Path, demo_file: Path, tmp_path: Path
) -> None:
    other = tmp_path / "other.csv"
    pl.read_parquet(demo_file).head(500).write_csv(other)
    app = build_app(demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        old = main_screen(app)
        assert old.fits
        await press_id(pilot, "open-data")
        app.screen.query_one("#prompt-input").value = str(other)
        await pilot.press("enter")
        await settle(pilot)
        new = main_screen(app)
        assert new is not old and not new.fits and new.draft.target is None
        profile = new.query_one(ColumnsPane).profile
        assert profile is not None
        assert profile["name"].to_list() == pl.read_csv(other).columns  # oracle: polars


async def test_tui_full_pass_is_not_repeated_when_the_sample_was_every_row(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km")  # 200,000 > 6,000 rows
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        assert screen.current is not None and screen.current.is_full_pass
        await press_id(pilot, "start-full-pass")
        await settle(pilot)
        assert len(screen.fits) == 1 and screen.passes.running_pass is None
        assert any("already uses every row" in m for m in notifications(app))


# ------------------------------------------------------------------------------------------
# comparison of the session's fits, robust and curvature checks (issue 6)


async def test_tui_terms_editor_adds_what_is_typed_to_the_model_terms(
    config_home: Path, demo_file: Path
) -> None:
    # Typing in the editor extends the model's terms; it replaced them all when the field
    # opened with its text selected.
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "edit-terms")
        assert isinstance(app.screen, PromptScreen)
        await pilot.press(*", hour")
        assert app.screen.query_one("#prompt-input", Input).value == "distance_km, stops, hour"


async def test_tui_fits_pane_compares_fits_on_the_same_rows(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        screen = await _full_fit_app(pilot)
        await press_id(pilot, "edit-terms")
        assert isinstance(app.screen, PromptScreen)
        app.screen.query_one("#prompt-input").value = "distance_km, square(distance_km), stops"
        await pilot.press("enter")
        await settle(pilot)
        # the demo file is smaller than the sample: both fits read every row, the same rows
        assert screen.current is not None and screen.current.number == 2
        compared, comparison = app.screen.query_one(FitsPane).comparison or ((), None)
        assert compared == (1, 2)
        assert comparison is not None
        frame = pl.read_parquet(demo_file).with_columns(distance_sq=pl.col("distance_km") ** 2)
        small = ols(frame, "minutes", ["distance_km", "stops"])  # statsmodels as oracle
        large = ols(frame, "minutes", ["distance_km", "distance_sq", "stops"])
        best_aic = 0 if small.aic < large.aic else 1
        assert comparison.best["aic"] == best_aic
        f_test = comparison.nested_f[0]
        f_oracle, p_oracle, _ = large.compare_f_test(small)
        np.testing.assert_allclose(f_test.f, f_oracle, rtol=1e-8)
        np.testing.assert_allclose(f_test.p, p_oracle, rtol=1e-6, atol=1e-300)


async def test_tui_checks_key_shows_huber_and_spline_results(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "run-checks")
        await settle(pilot)
        # the finished checks wait for their key: no window opens by itself
        assert isinstance(app.screen, MainScreen)
        assert main_screen(app).checks.keys() == {1}
        await press_id(pilot, "show-checks")
        assert isinstance(app.screen, TextScreen)
        assert app.screen.title_text == "checks of fit #1"
        text = str(app.screen.query_one("#text-body", Static).content)
        assert "Huber" in text and "distance_km" in text and "spline" in text
        await press_id(pilot, "close-dialog")
        assert isinstance(app.screen, MainScreen)


# ------------------------------------------------------------------------------------------
# starting quickly: the head start, light imports, the keymap Textual applies, row steps


@pytest.fixture
def head_started() -> Iterator[Callable[..., tuple[Any, Any]]]:
    """Build apps as `triage open` does, a head start begun first; stops each one afterwards.

    The head start pauses the garbage collector while it works: once stopped, the collector
    must be as the test found it.
    """
    from triage.tui.head_start import HeadStart
    from triage.tui.settings import Settings

    started: list[HeadStart] = []

    def build(data: Path, **fields: Any) -> tuple[Any, Any]:
        head_start = HeadStart(Settings(data=str(data), **fields)).start()
        started.append(head_start)
        return build_app(data, head_start=head_start, **fields), head_start

    collecting = gc.isenabled()
    yield build
    for head_start in started:
        head_start.stop()
    assert gc.isenabled() == collecting


async def test_tui_head_start_fit_is_taken_over_not_repeated(
    config_home: Path,
    demo_file: Path,
    monkeypatch: pytest.MonkeyPatch,
    head_started: Callable[..., tuple[Any, Any]],
) -> None:
    import triage.engine.passes as passes_module

    runs: list[object] = []
    real_run_report = passes_module.run_report

    def counted(*args: Any, **kwargs: Any) -> Any:
        runs.append(args[1])
        return real_run_report(*args, **kwargs)

    monkeypatch.setattr(passes_module, "run_report", counted)
    app, head_start = head_started(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        fit = screen.current
        assert fit is not None and fit.number == 1 and not fit.is_full_pass
        assert len(runs) == 1  # the head start's pass only; the screen took its report
        outcome = fit.report.outcome
        assert outcome.spec == runs[0] and outcome.data.rows_read == SAMPLE_ROWS
        oracle = ols(outcome.sample, "minutes", ["distance_km", "stops"])  # statsmodels
        np.testing.assert_allclose(outcome.fit.coef, oracle.params, rtol=1e-9)
        # a report is handed over once: the next request of the same model computes its own
        cancel = threading.Event()
        again = head_start.take_report(
            outcome.spec, screen.segment_columns, cancel=cancel, on_fit=lambda _: None
        )
        assert again is None
        await press_id(pilot, "quick-fit")
        await settle(pilot)
        assert len(runs) == 2 and screen.current is not None and screen.current.number == 2


async def test_tui_head_start_bad_terms_are_reported_by_the_screen(
    config_home: Path, demo_file: Path, head_started: Callable[..., tuple[Any, Any]]
) -> None:
    app, _ = head_started(demo_file, target="minutes", terms="distance_km, log(dpeot)")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert "dpeot" in app.screen.message and "depot" in app.screen.message
        await press_id(pilot, "close-dialog")
        assert main_screen(app).current is None


async def test_tui_head_start_unreadable_file_is_reported_by_the_screen(
    config_home: Path, tmp_path: Path, head_started: Callable[..., tuple[Any, Any]]
) -> None:
    broken = tmp_path / "broken.parquet"
    broken.write_bytes(b"not a parquet file")
    app, _ = head_started(broken, target="minutes", terms="distance_km")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, ErrorScreen)
        assert app.screen.title_text == "cannot open the data"
        assert app.is_running


def test_tui_head_start_leaves_the_collector_as_it_found_it(demo_file: Path) -> None:
    from triage.tui.head_start import HeadStart
    from triage.tui.settings import Settings

    for collecting in (True, False):
        (gc.enable if collecting else gc.disable)()
        try:
            head_start = HeadStart(Settings(data=str(demo_file))).start()
            assert head_start.take_opened(str(demo_file)) is not None
            head_start.stop()
            assert gc.isenabled() == collecting
        finally:
            gc.enable()


async def test_tui_head_start_unexpected_planning_error_is_one_line_and_the_app_goes_on(
    config_home: Path,
    demo_file: Path,
    monkeypatch: pytest.MonkeyPatch,
    head_started: Callable[..., tuple[Any, Any]],
) -> None:
    import triage.tui.head_start as head_start_module

    def broken(*args: Any) -> tuple[str, ...]:
        raise RuntimeError("planning broke\nsecond line")

    # only the head start's own planning breaks; the screen keeps its working copy
    monkeypatch.setattr(head_start_module, "segment_columns", broken)
    app, head_start = head_started(
        demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        line = "could not fit ahead: RuntimeError: planning broke\\nsecond line"
        assert head_start.plan_failure == line
        assert notifications(app) == [line]
        screen = main_screen(app)
        assert screen.source is not None
        assert screen.current is not None and screen.current.number == 1  # fitted by the screen
        await press_id(pilot, "quit")
        assert not app.is_running


async def test_tui_head_start_any_failure_reaches_the_screen_instead_of_a_wait(
    config_home: Path,
    demo_file: Path,
    monkeypatch: pytest.MonkeyPatch,
    head_started: Callable[..., tuple[Any, Any]],
) -> None:
    from triage.tui.head_start import HeadStart

    def broken(self: HeadStart, opened: Any) -> None:
        raise RuntimeError("the head start broke")

    monkeypatch.setattr(HeadStart, "_plan", broken)
    app, _ = head_started(demo_file, target="minutes", terms="distance_km")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)  # fails (naming the open worker) if the screen waits for ever
        assert isinstance(app.screen, ErrorScreen)
        assert "RuntimeError: the head start broke" in app.screen.message
        await press_id(pilot, "close-dialog")
        assert isinstance(app.screen, MainScreen) and app.is_running


def test_tui_app_module_loads_no_data_or_statistics_library() -> None:
    # the first frame must not wait for these: they load in the head start's thread or
    # where a pane first draws results
    import subprocess
    import sys

    heavy = ["numpy", "polars", "pyarrow", "plotext", "scipy", "sklearn", "statsmodels"]
    code = f"import sys, triage.tui.app; print(','.join(m for m in {heavy!r} if m in sys.modules))"
    loaded = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout.strip()
    assert loaded == ""


@pytest.mark.parametrize("keyset", ["default", "fkeys"])
async def test_tui_textual_gets_only_changed_keys_with_the_same_bindings(
    config_home: Path, demo_file: Path, keyset: str
) -> None:
    from triage.tui.app import declared_keys
    from triage.tui.keymap import keymap_overrides

    app = build_app(demo_file, keyset=keyset)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        applied = dict(app._keymap)
        assert applied == keymap_overrides(app.keymap, declared_keys())
        if keyset == "default":
            assert applied == {}
        reduced = {k: b.binding.id for k, b in app.screen.active_bindings.items()}
        # oracle: Textual's own bindings under the whole merged keymap
        app.set_keymap(app.keymap)
        full = {k: b.binding.id for k, b in app.screen.active_bindings.items()}
        assert reduced == full


async def test_tui_row_table_shows_each_stepped_row_as_polars_reads_it(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "pane-worst")
        await press_id(pilot, "open-row")
        await settle(pilot)
        frame = pl.read_parquet(demo_file)  # oracle: polars' own read of the file
        table = app.screen.query_one("#row-table")
        for _ in range(4):
            position = main_screen(app).row_position
            assert position is not None
            cells = [tuple(str(c) for c in table.get_row_at(i)) for i in range(table.row_count)]
            fields = dict(cells[cells.index(("─" * 8, "─" * 8)) + 1 :])
            original = frame.row(position, named=True)
            assert fields == {k: "(missing)" if v is None else str(v) for k, v in original.items()}
            await press_id(pilot, "next-row")
            await settle(pilot)


async def test_tui_footer_follows_the_active_keys_and_rebuilds_only_on_change(
    config_home: Path, demo_file: Path, gated: list[GatedSource]
) -> None:
    from textual.widgets._footer import FooterKey

    from triage.tui.widgets.status import KeyFooter

    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )

    def footer_keys() -> list[FooterKey]:
        return list(app.screen.query_one(KeyFooter).query(FooterKey))

    def matches_textual() -> bool:
        # oracle: Textual's own active bindings of the screen, those marked to be shown
        shown = [
            (active.binding.key, active.enabled)
            for active in app.screen.active_bindings.values()
            if active.binding.show
        ]
        drawn = [(key.key, not key.has_class("-disabled")) for key in footer_keys()]
        return drawn[: len(shown)] == shown

    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        assert matches_textual()
        await press_id(pilot, "pane-fit")  # the column keys turn off away from Columns
        await pilot.pause()
        assert matches_textual()
        before = footer_keys()
        for pane in ("pane-worst", "pane-spread", "pane-row"):  # focus moves, keys stay
            await press_id(pilot, pane)
        await pilot.pause()
        assert footer_keys() == before
        await press_id(pilot, "start-full-pass")  # the stop key becomes active
        await wait_until(pilot, matches_textual, "the footer to show the keys of a running pass")
        assert footer_keys() != before
        assert any(
            key.action == "cancel_pass" and not key.has_class("-disabled") for key in footer_keys()
        )
        for _ in range(60):
            gated[0].gate.release()
        await wait_until(
            pilot, lambda: main_screen(app).passes.running_pass is None, "the pass to end"
        )
        await settle(pilot)
        assert matches_textual()


async def test_tui_keys_that_cannot_act_say_why(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        await press_id(pilot, "cancel-pass")  # no pass over every row is running
        await press_id(pilot, "pane-fit")
        await press_id(pilot, "toggle-mark")  # marks belong to Worst and Row
        messages = [n.message for n in app._notifications]
        assert any("no pass over every row is running" in m for m in messages)
        assert any("rows are marked in Worst or Row" in m for m in messages)
        assert screen.marked == set()


async def test_tui_weights_equal_to_the_target_get_a_message(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km", weights="minutes")
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        shown = [n.message for n in app._notifications]
        if isinstance(app.screen, ErrorScreen):
            shown.append(str(app.screen.message))
        assert any("is also the target" in m for m in shown), shown


@pytest.mark.parametrize("keyset", [None, "fkeys"])
@pytest.mark.parametrize("width", [60, 80])
async def test_tui_pane_strip_names_each_pane_once_and_footer_keeps_apart(
    config_home: Path, demo_file: Path, keyset: str | None, width: int
) -> None:
    from triage.tui.widgets.panes import PANES
    from triage.tui.widgets.status import short_key

    app = build_app(demo_file, target="minutes", terms="distance_km", keyset=keyset)
    async with app.run_test(size=(width, 24)) as pilot:
        await settle(pilot)
        strip = tui_support.screen_text(app).split("\n")[0]
        assert len(strip) <= width
        keys = [short_key(key_for(app, f"pane-{info.pane_id}")) for info in PANES]
        pattern = r"\s+".join(rf"{re.escape(k)} (\S+)" for k in keys)
        found = re.search(pattern, strip)
        assert found is not None, strip  # every pane's key is on the strip, in order
        labels = list(found.groups())
        assert len(labels) == len(set(labels)), labels  # no two keys labelled alike
        assert all(info.title.startswith(label) for info, label in zip(PANES, labels, strict=True))
        footer = tui_support.screen_text(app).split("\n")[-1]
        assert ("commands" in footer) == (width >= 72)


async def test_tui_row_pane_follows_the_worst_cursor_when_tiled(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=LARGE) as pilot:
        await settle(pilot)
        screen = main_screen(app)
        await press_id(pilot, "pane-worst")
        assert screen.is_tiled
        worst = app.screen.query_one(WorstPane)
        for index in (1, 2):
            await pilot.press("down")
            await settle(pilot)
            view = app.screen.query_one(RowPane).row
            assert view is not None and view.position == worst.positions()[index]
            assert view.frame is not None  # read, not only named


async def test_tui_export_choices_show_their_state_without_colour(
    config_home: Path, demo_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("NO_COLOR", "1")
    app = build_app(demo_file, target="minutes", terms="distance_km", is_colorless=True)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "export-rows")
        assert isinstance(app.screen, ExportScreen)
        screen = tui_support.screen_text(app)
        assert "▐●▌ worst K rows" in screen and "▐ ▌ marked rows" in screen
        assert "▐ ▌ replace the file" in screen
        app.screen.query_one("#export-replace").value = True
        await pilot.pause()
        assert "▐X▌ replace the file" in tui_support.screen_text(app)


async def test_tui_worst_rows_show_the_columns_the_user_chose(
    config_home: Path, demo_file: Path
) -> None:
    """Oracle: the same rows read back with polars by position."""
    app = build_app(demo_file, target="minutes", terms="distance_km, stops", show=("delivery_id",))
    original = pl.read_parquet(demo_file)
    async with app.run_test(size=SMALL) as pilot:
        await settle(pilot)
        await press_id(pilot, "pane-worst")
        worst = app.screen.query_one(WorstPane)
        table = worst.query_one("#worst-table")

        def shown(name: str) -> list[str]:
            return [str(table.get_cell(str(p), f"show:{name}")) for p in worst.positions()]

        await wait_until(pilot, lambda: "…" not in shown("delivery_id"), "the rows to be read")
        expected = [str(original["delivery_id"][p]) for p in worst.positions()]
        assert shown("delivery_id") == expected
        # a key in Columns adds a second column, and refuses a third
        await press_id(pilot, "pane-columns")
        columns = app.screen.query_one(ColumnsPane)
        table_columns = columns.query_one("#columns-table")
        for name in ("depot", "vehicle"):
            names = [str(table_columns.get_row_at(i)[1]) for i in range(table_columns.row_count)]
            table_columns.move_cursor(row=names.index(name))
            await press_id(pilot, "toggle-shown")
        assert worst.shown_columns == ("delivery_id", "depot")
        assert any("at most 2 columns" in n.message for n in app._notifications)
        assert shown("depot") == [str(original["depot"][p]) for p in worst.positions()]
