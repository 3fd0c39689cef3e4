"""What the app shows is what was computed: every pane, the heading and exports name one fit.

Each test drives one way the screen could mix fits: a full pass ending after the model
changed (made deterministic by a source whose batches the test releases), a fit recalled
from the Fits list, exports of rows outside the fit (a filter, a what-if refit), and a
check finishing while the user types. Tests wait on the app's own state, never on sleeps.

Oracles: statsmodels OLS (coefficients; influence measures for rows in a fit;
`get_prediction(...).se_obs`, the standard error of a new observation, for rows outside it)
and pyarrow reading the written file's metadata.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm
from textual.widgets import Input

from tests import tui_support
from tests.test_tui_app import GatedSource, gated, main_screen
from tests.tui_support import build_app, notifications, press_id, wait_until
from triage.data.export import NOTE_KEY
from triage.tui.screens.dialogs import PromptScreen
from triage.tui.screens.export import ExportScreen
from triage.tui.screens.main import MainScreen
from triage.tui.session import SessionFit
from triage.tui.widgets.panes import (
    FitPane,
    FitsPane,
    FlagsPane,
    GroupsPane,
    InputsPane,
    RowPane,
    SpreadPane,
    TrendPane,
    WorstPane,
)
from triage.tui.widgets.status import ModelLine, PassLine
from triage.views.text import model_formula

config_home = tui_support.config_home
demo_file = tui_support.demo_file
gated_source = gated

SMALL = (80, 24)
SAMPLE_ROWS = 2_000
"""Two of the demo file's six row groups: a quick fit is a real sample."""


def settled(screen: MainScreen) -> bool:
    """True when a fit is on screen with its diagnostics and no sample fit is awaited."""
    return (
        screen.current is not None
        and screen.passes.pending is None
        and not screen.passes.screen_passes
    )


def assert_screen_names(screen: MainScreen, fit: SessionFit) -> None:
    """Every pane, the heading and the pass line show `fit` and nothing of another fit."""
    label = screen.query_one(ModelLine).label
    assert label is not None and label.number == fit.number
    assert label.formula == model_formula(fit.report.outcome.spec)
    assert label == fit.label
    fit_pane = screen.query_one(FitPane)
    assert fit_pane.fit is fit and fit_pane.provisional is None
    text = fit_pane.text_for(100) or ""
    assert f"fit #{fit.number}:" in text
    for name in fit.report.outcome.fit.names:
        assert name in text
    for pane_type in (SpreadPane, TrendPane, InputsPane, FlagsPane, GroupsPane):
        assert screen.query_one(pane_type).shown is fit, pane_type.__name__
    worst = screen.query_one(WorstPane)
    assert worst.rows == fit.report.diagnostics.worst[worst.criterion]  # type: ignore[index]
    assert screen.query_one(FitsPane).current == fit.number
    assert screen.query_one(PassLine).basis.startswith(f"fit #{fit.number} from ")
    row = screen.query_one(RowPane).row
    assert row is None or row.fit_number == fit.number


def toasts(screen: MainScreen) -> list[Any]:
    """The notifications drawn on the screen now."""
    return [toast for toast in screen.query("Toast") if toast.region.area]


def ols(frame: pl.DataFrame, predictors: list[str]) -> Any:
    """statsmodels OLS of minutes with a constant on the complete rows of `frame`."""
    used = frame.drop_nulls(["minutes", *predictors])
    x = sm.add_constant(used.select(predictors).to_numpy().astype(float))
    return sm.OLS(used["minutes"].to_numpy(), x).fit()


async def type_into_prompt(pilot: Any, text: str) -> None:
    for char in text:
        await pilot.press(
            {" ": "space", "<": "less_than_sign", ">": "greater_than_sign"}.get(char, char)
        )


async def export_from_screen(pilot: Any, path: Path, *, worst_k: int | None = None) -> None:
    """Export the marked rows (or the worst K) through the dialog and wait for the file."""
    screen = main_screen(pilot.app)
    await press_id(pilot, "export-rows")
    await wait_until(pilot, lambda: isinstance(pilot.app.screen, ExportScreen), "the export dialog")
    dialog = pilot.app.screen
    if worst_k is not None:
        dialog.query_one("#export-worst").value = True
        dialog.query_one("#export-k").value = str(worst_k)
    dialog.query_one("#export-path", Input).value = str(path)
    dialog.query_one("#export-path", Input).focus()
    await pilot.press("enter")
    await wait_until(pilot, path.exists, f"{path.name} written")
    await wait_until(pilot, lambda: pilot.app.screen is screen, "the main screen back")


def row_shown(screen: MainScreen, position: int) -> bool:
    """True when the Row pane shows the row at `position` with its diagnostics."""
    row = screen.query_one(RowPane).row
    return row is not None and row.position == position and row.diagnostics is not None


def shows(text: str, value: float) -> bool:
    """True when `text` is `value` written to the precision it shows (e.g. `41.6`, `1.2e-05`)."""
    number = float(text.replace(",", ""))
    if "e" in text:
        return bool(number == pytest.approx(value, rel=5e-3))
    decimals = len(text.split(".")[1]) if "." in text else 0
    return abs(number - value) <= 0.5 * 10.0**-decimals * (1 + 1e-9)


def assert_row_pane_shows(
    screen: MainScreen, record: dict[str, Any], leverage: str, studentized: str
) -> None:
    """The Row pane holds the file's numbers for the row, and writes them to its precision."""
    row = screen.query_one(RowPane).row
    assert row is not None and row.diagnostics is not None and row.position == record["row"]
    diag = row.diagnostics
    for name, value in (
        ("fitted", diag.fitted[0]),
        ("resid", diag.resid[0]),
        ("leverage", diag.leverage[0]),
        ("studentized", diag.studentized[0]),
    ):
        assert record[name] == pytest.approx(float(value), rel=1e-12), name
    shown = row_pane_values(screen)
    for label, column in (
        ("fitted", "fitted"),
        ("residual", "resid"),
        (leverage, "leverage"),
        (studentized, "studentized"),
    ):
        assert shows(shown[label], record[column]), (label, shown[label], record[column])


def row_pane_values(screen: MainScreen) -> dict[str, str]:
    table = screen.query_one("#row-table")
    cells = [tuple(str(c) for c in table.get_row_at(i)) for i in range(table.row_count)]
    rule = ("─" * 8, "─" * 8)
    return dict(cells[: cells.index(rule)]) if rule in cells else {}  # {} while reading


# ------------------------------------------------------------------------------------------


async def test_a_full_pass_ending_after_the_model_changed_joins_fits_without_the_screen(
    config_home: Path, demo_file: Path, gated_source: list[GatedSource], tmp_path: Path
) -> None:
    old_terms = ["distance_km", "stops", "weight_kg", "hour"]
    app = build_app(
        demo_file, target="minutes", terms=", ".join(old_terms), sample_rows=SAMPLE_ROWS
    )
    posted = notifications(app)
    async with app.run_test(size=SMALL, notifications=True) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        assert screen.front == "fit"  # the command line named a model
        await press_id(pilot, "start-full-pass")
        source = gated_source[0]
        pass_line = screen.query_one(PassLine)
        await wait_until(pilot, source.batches_started.is_set, "the pass reading")
        # progress stays in view: no notification covers the two-line pass line at 80x24
        await wait_until(pilot, lambda: bool(toasts(screen)), "the pass's start announced")
        assert pass_line.region.height == 2
        assert all(not toast.region.overlaps(pass_line.region) for toast in toasts(screen))
        # the terms change while the pass reads
        await press_id(pilot, "edit-terms")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the terms prompt")
        app.screen.query_one("#prompt-input", Input).value = "distance_km, stops"
        await pilot.press("enter")
        await wait_until(pilot, lambda: settled(screen), "the fit of the new terms")
        assert screen.passes.running_pass is not None  # the gated pass still runs
        assert pass_line.pass_label == "every row (to Fits)"  # says where its fit goes
        assert any("goes on; its fit will join Fits" in m for m in posted)
        new = screen.current
        assert new is not None and new.number == 2
        for _ in range(60):  # let the pass finish: the race the issue describes
            source.gate.release()
        await wait_until(pilot, lambda: screen.passes.running_pass is None, "the pass's end")
        await wait_until(pilot, lambda: len(screen.fits) == 3, "the pass's fit in the list")
        full = screen.fit_numbered(3)
        assert full is not None and full.is_full_pass
        assert [t.label for t in full.report.outcome.spec.terms] == old_terms
        assert screen.current is new  # the screen keeps the newer model's fit
        assert_screen_names(screen, new)
        assert [t.label for t in new.report.outcome.spec.terms] == ["distance_km", "stops"]
        assert any("fit #3" in m and "joined Fits" in m for m in posted)
        # both fits agree with statsmodels on their own rows
        frame = pl.read_parquet(demo_file)
        np.testing.assert_allclose(
            full.report.outcome.fit.coef, ols(frame, old_terms).params, rtol=1e-9
        )
        sampled = new.report.outcome.sample
        np.testing.assert_allclose(
            new.report.outcome.fit.coef, ols(sampled, ["distance_km", "stops"]).params, rtol=1e-9
        )
        # an export now names the fit on screen and carries its numbers
        out = tmp_path / "worst.parquet"
        await export_from_screen(pilot, out, worst_k=5)
        written = pl.read_parquet(out)
        assert written["fit"].to_list() == [2] * 5
        assert written["in_fit"].all()
        note = pq.read_schema(out).metadata[NOTE_KEY.encode()].decode()
        assert note == new.label.one_line() and note.startswith("fit #2: minutes ~ distance_km")
        worst = screen.query_one(WorstPane)
        for entry, record in zip(worst.rows, written.iter_rows(named=True), strict=False):
            assert record["row"] == entry.row
            for column, value in (
                ("fitted", entry.fitted),
                ("resid", entry.resid),
                ("studentized", entry.studentized),
                ("leverage", entry.leverage),
                ("cooks", entry.cooks),
            ):
                assert record[column] == pytest.approx(value, rel=1e-12), column
        # and the Fits list's pass is shown whole when chosen
        await press_id(pilot, "pane-fits")
        screen.query_one("#fits-table").move_cursor(row=2, animate=False)
        await pilot.press("enter")
        await wait_until(pilot, lambda: screen.current is full, "fit #3 chosen")
        assert_screen_names(screen, full)


async def test_a_recalled_fit_comes_back_whole_and_editing_starts_from_it(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km", sample_rows=SAMPLE_ROWS)
    async with app.run_test(size=SMALL) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        await press_id(pilot, "edit-terms")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the terms prompt")
        app.screen.query_one("#prompt-input", Input).value = "distance_km, stops, depot"
        await pilot.press("enter")
        await wait_until(pilot, lambda: settled(screen) and len(screen.fits) == 2, "fit #2")
        await press_id(pilot, "pane-worst")
        await press_id(pilot, "open-row")  # a row under fit #2 is open
        await wait_until(pilot, lambda: screen.query_one(RowPane).row is not None, "the row")
        first = screen.fits[0]
        await press_id(pilot, "pane-fits")
        screen.query_one("#fits-table").move_cursor(row=0, animate=False)
        await pilot.press("enter")
        await wait_until(pilot, lambda: screen.current is first, "fit #1 chosen")
        row_pane = screen.query_one(RowPane)
        await wait_until(
            pilot,
            lambda: row_pane.row is not None and row_pane.row.diagnostics is not None,
            "the open row read again under fit #1",
        )
        assert_screen_names(screen, first)
        assert "stops" not in (screen.query_one(FitPane).text_for(100) or "")
        # the open row shows fit #1's numbers: statsmodels on the sample rows as the oracle
        row = row_pane.row
        assert row is not None and row.diagnostics is not None
        sample = first.report.outcome.sample.drop_nulls(["minutes", "distance_km"])
        oracle = ols(sample, ["distance_km"])
        i = sample["__row"].to_list().index(row.position)
        assert row.diagnostics.cooks[0] == pytest.approx(
            oracle.get_influence().cooks_distance[0][i], rel=1e-7
        )
        # editing starts from the recalled fit's model
        assert screen.draft.terms_text() == "distance_km"
        await press_id(pilot, "edit-terms")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the terms prompt")
        field = app.screen.query_one("#prompt-input", Input)
        assert field.value == "distance_km"
        field.value = "distance_km, hour"
        await pilot.press("enter")
        await wait_until(pilot, lambda: settled(screen) and len(screen.fits) == 3, "fit #3")
        third = screen.current
        assert third is not None and third.number == 3
        assert [t.label for t in third.report.outcome.spec.terms] == ["distance_km", "hour"]
        assert_screen_names(screen, third)


async def test_exported_rows_outside_the_fit_match_the_screen_and_say_so(
    config_home: Path, demo_file: Path, tmp_path: Path
) -> None:
    # the sample is larger than the demo file: every fit here reads every row
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    async with app.run_test(size=SMALL) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        await press_id(pilot, "pane-worst")
        worst = screen.query_one(WorstPane)
        frame = pl.read_parquet(demo_file).with_row_index("__row").cast({"__row": pl.Int64})
        big = [e.row for e in worst.rows if frame["minutes"][e.row] >= 1000][:2]
        assert len(big) == 2  # the planted seconds-for-minutes rows
        for position in big:
            worst.move_to(position)
            await press_id(pilot, "toggle-mark")
        # a filter that leaves the marked rows out
        await press_id(pilot, "edit-filter")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the filter prompt")
        app.screen.query_one("#prompt-input", Input).value = "minutes < 1000"
        await pilot.press("enter")
        await wait_until(
            pilot, lambda: settled(screen) and len(screen.fits) == 2, "the filtered fit"
        )
        filtered = screen.current
        assert filtered is not None and filtered.label.details == ("where minutes < 1000",)
        assert_screen_names(screen, filtered)
        out = tmp_path / "outside.csv"
        await export_from_screen(pilot, out)
        written = pl.read_csv(out).sort("row")
        assert written["row"].to_list() == sorted(big)
        assert written["fit"].to_list() == [2, 2]
        assert not written["in_fit"].any()
        assert written["cooks"].is_null().all()  # no Cook's distance outside the fit
        note = (tmp_path / "outside.csv.fit.txt").read_text(encoding="utf-8").strip()
        assert note == filtered.label.one_line() and "where minutes < 1000" in note
        kept = frame.filter(pl.col("minutes") < 1000)
        oracle = ols(kept, ["distance_km", "stops"])  # statsmodels on the filtered rows
        np.testing.assert_allclose(filtered.report.outcome.fit.coef, oracle.params, rtol=1e-9)
        x0 = sm.add_constant(
            frame[sorted(big)].select("distance_km", "stops").to_numpy().astype(float),
            has_constant="add",
        )
        prediction = oracle.get_prediction(x0)
        resid = frame[sorted(big)]["minutes"].to_numpy() - prediction.predicted_mean
        np.testing.assert_allclose(written["resid"].to_numpy(), resid, rtol=1e-9)
        np.testing.assert_allclose(
            written["studentized"].to_numpy(), resid / prediction.se_obs, rtol=1e-7
        )
        # the Row pane shows the same numbers for the same fit
        for record in written.iter_rows(named=True):
            screen.open_row(record["row"])
            await wait_until(
                pilot, lambda shown=record["row"]: row_shown(screen, shown), "the row read"
            )
            assert row_pane_values(screen)["in the fit"].startswith("no")
            assert_row_pane_shows(screen, record, "leverage as a new row", "standardised residual")
            assert f"not in fit #{filtered.number}" in str(
                screen.query_one(RowPane).query_one(".pane--note").content
            )

        # a what-if refit: two rows of the filtered fit marked and left out
        await press_id(pilot, "pane-worst")
        await press_id(pilot, "clear-marks")
        left_out = worst.positions()[:2]
        for position in left_out:
            worst.move_to(position)
            await press_id(pilot, "toggle-mark")
        await press_id(pilot, "refit-without-marked")
        await wait_until(
            pilot, lambda: settled(screen) and len(screen.fits) == 3, "the what-if fit"
        )
        refit = screen.current
        assert refit is not None and refit.excluded == frozenset(left_out)
        assert_screen_names(screen, refit)
        assert not set(left_out) & set(worst.positions())
        out = tmp_path / "what-if.parquet"
        await export_from_screen(pilot, out)
        written = pl.read_parquet(out).sort("row")
        assert written["fit"].to_list() == [3, 3]
        assert not written["in_fit"].any()
        assert written["cooks"].is_null().all()
        note = pq.read_schema(out).metadata[NOTE_KEY.encode()].decode()
        assert "fit #3" in note and "2 marked left out" in note and "minutes < 1000" in note
        rest = kept.filter(~pl.col("__row").is_in(left_out))
        oracle = ols(rest, ["distance_km", "stops"])  # statsmodels without the marked rows
        np.testing.assert_allclose(refit.report.outcome.fit.coef, oracle.params, rtol=1e-9)
        new_rows = frame[sorted(left_out)]
        x0 = sm.add_constant(
            new_rows.select("distance_km", "stops").to_numpy().astype(float), has_constant="add"
        )
        prediction = oracle.get_prediction(x0)
        resid = new_rows["minutes"].to_numpy() - prediction.predicted_mean
        np.testing.assert_allclose(
            written["studentized"].to_numpy(), resid / prediction.se_obs, rtol=1e-7
        )
        screen.open_row(left_out[0])
        record = written.filter(pl.col("row") == left_out[0]).row(0, named=True)
        await wait_until(pilot, lambda: row_shown(screen, left_out[0]), "the left-out row read")
        shown = row_pane_values(screen)
        assert shown["in the fit"].startswith("no")
        assert_row_pane_shows(screen, record, "leverage as a new row", "standardised residual")


async def test_a_check_finishing_while_the_user_types_does_not_take_the_keys(
    config_home: Path, demo_file: Path
) -> None:
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    posted = notifications(app)
    async with app.run_test(size=SMALL) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        await press_id(pilot, "run-checks")
        await press_id(pilot, "edit-filter")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the filter prompt")
        prompt = app.screen
        await type_into_prompt(pilot, "minutes")
        await wait_until(pilot, lambda: 1 in screen.checks, "the checks' end")
        await type_into_prompt(pilot, " < 1000")
        assert app.screen is prompt
        assert prompt.query_one("#prompt-input", Input).value == "minutes < 1000"
        assert any("checks of fit #1 are ready" in m for m in posted)
        await pilot.press("enter")
        await wait_until(
            pilot, lambda: settled(screen) and len(screen.fits) == 2, "the filtered fit"
        )
        assert screen.current is not None and screen.current.report.outcome.spec.where == (
            "minutes < 1000"
        )
        # the checks belong to fit #1: asked for on fit #2, they are not shown as its own
        await press_id(pilot, "show-checks")
        assert isinstance(app.screen, MainScreen)
        assert any("fit #2 has not been checked yet" in m for m in posted)


async def test_a_failure_in_the_background_while_the_user_types_is_a_notification(
    config_home: Path, demo_file: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import threading

    import triage.engine.export as export_module
    from triage.errors import ExportError

    release = threading.Event()

    def failing_export(*args: Any, **kwargs: Any) -> Path:
        release.wait(timeout=60)  # fails only once the user is typing in the filter prompt
        msg = "cannot write in folder `nowhere`"
        raise ExportError(msg)

    monkeypatch.setattr(export_module, "export_rows", failing_export)
    app = build_app(demo_file, target="minutes", terms="distance_km, stops")
    posted = notifications(app)
    async with app.run_test(size=SMALL) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        await press_id(pilot, "export-rows")
        await wait_until(pilot, lambda: isinstance(app.screen, ExportScreen), "the dialog")
        app.screen.query_one("#export-worst").value = True
        app.screen.query_one("#export-path", Input).value = str(tmp_path / "rows.csv")
        app.screen.query_one("#export-path", Input).focus()
        await pilot.press("enter")
        await wait_until(pilot, lambda: app.screen is screen, "the main screen back")
        await press_id(pilot, "edit-filter")
        await wait_until(pilot, lambda: isinstance(app.screen, PromptScreen), "the prompt")
        prompt = app.screen
        await type_into_prompt(pilot, "hour")
        release.set()
        await wait_until(pilot, lambda: any("export failed" in m for m in posted), "the failure")
        await type_into_prompt(pilot, " > 8")
        assert app.screen is prompt
        assert prompt.query_one("#prompt-input", Input).value == "hour > 8"


async def test_a_sample_fit_of_the_same_model_does_not_push_a_full_pass_off_the_screen(
    config_home: Path, demo_file: Path, gated_source: list[GatedSource]
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops", sample_rows=SAMPLE_ROWS
    )
    async with app.run_test(size=SMALL) as pilot:
        screen = main_screen(app)
        await wait_until(pilot, lambda: settled(screen), "the first fit")
        await press_id(pilot, "start-full-pass")
        await wait_until(pilot, gated_source[0].batches_started.is_set, "the pass reading")
        await press_id(pilot, "quick-fit")  # the same model on the sample again
        await wait_until(
            pilot,
            lambda: screen.current is not None and screen.current.number == 2,
            "the second sample fit",
        )
        assert screen.query_one(PassLine).pass_label == "every row"  # still bound for the screen
        for _ in range(60):
            gated_source[0].gate.release()
        await wait_until(pilot, lambda: settled(screen), "the pass's fit on screen")
        full = screen.current
        assert full is not None and full.number == 3 and full.is_full_pass
        assert_screen_names(screen, full)
        oracle = ols(pl.read_parquet(demo_file), ["distance_km", "stops"])  # statsmodels
        np.testing.assert_allclose(full.report.outcome.fit.coef, oracle.params, rtol=1e-9)


@pytest.mark.parametrize("label", ["every row", "every row (to Fits)"])
def test_the_progress_line_keeps_pass_share_speed_and_time_left_at_80_columns(label: str) -> None:
    from triage.results.progress import PassProgress
    from triage.tui.widgets.status import progress_text

    progress = PassProgress(
        2_621_440, 20_000_000, 2.0, 1_569_213.0, 1_234.0, 2, 2, pass_source="reading again"
    )
    for width in (78, 100, 118):
        line = progress_text(progress, width, label=label)
        assert len(line) <= width, line
        assert line.startswith(label) and "2" in line.split(":")[0]  # which pass
        for part in ("13%", "2,621,440", "1,569,213 rows/s", "1,234 s left"):
            assert part in line, (part, line)
    assert "[" in progress_text(progress, 140, label=label)  # a bar where there is room
