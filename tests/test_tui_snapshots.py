"""Text snapshots of the main panes at 80x24 and 120x40.

The screen is captured as plain text (see `tests/tui_support.py`) and compared with the files
in `tests/snapshots/`; `TRIAGE_UPDATE_SNAPSHOTS=1` rewrites those that changed and fails with
the difference, so an update is read, never passed silently. Notifications are cleared before
capture (they carry timeouts), the data are the demo scenario with a fixed seed, and NO_COLOR
is unset by the `config_home` fixture.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from tests import tui_support
from tests.tui_support import assert_snapshot, build_app, press_id, screen_text, settle
from triage.tui.widgets.panes import WorstPane

config_home = tui_support.config_home
demo_file = tui_support.demo_file

MODEL = {"target": "minutes", "terms": "distance_km, log(weight_kg), stops, depot"}


async def _capture(pilot: Any, name: str) -> None:
    await settle(pilot)
    pilot.app.clear_notifications()
    await pilot.pause()
    assert_snapshot(screen_text(pilot.app), name)


@pytest.mark.parametrize(
    "pane", ["columns", "fit", "spread", "trend", "inputs", "flags", "groups", "fits"]
)
async def test_tui_snapshot_sample_panes_80x24(
    config_home: Path, demo_file: Path, pane: str
) -> None:
    app = build_app(demo_file, sample_rows=2_000, **MODEL)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await press_id(pilot, f"pane-{pane}")
        await _capture(pilot, f"sample_{pane}_80x24")


async def test_tui_snapshot_quantile_chart_80x24(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, sample_rows=2_000, **MODEL)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await press_id(pilot, "toggle-quantile-chart")
        await _capture(pilot, "sample_quantile_chart_80x24")


async def test_tui_snapshot_rows_80x24(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, **MODEL)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await press_id(pilot, "start-full-pass")
        await settle(pilot)
        await press_id(pilot, "pane-worst")
        await _capture(pilot, "full_worst_80x24")
        await press_id(pilot, "open-row")
        await _capture(pilot, "full_row_80x24")


@pytest.mark.parametrize("pane", ["columns", "spread", "worst"])
async def test_tui_snapshot_tiled_pages_120x40(
    config_home: Path, demo_file: Path, pane: str
) -> None:
    app = build_app(demo_file, **MODEL)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press_id(pilot, "start-full-pass")
        await settle(pilot)
        await press_id(pilot, f"pane-{pane}")
        if pane == "worst":
            worst = app.screen.query_one(WorstPane)
            worst.move_to(worst.positions()[1])
            await press_id(pilot, "toggle-mark")
            await press_id(pilot, "open-row")
        await _capture(pilot, f"full_{pane}_page_120x40")


async def test_tui_snapshot_help_and_error_80x24(config_home: Path, demo_file: Path) -> None:
    app = build_app(demo_file, **MODEL)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await press_id(pilot, "show-help")
        await _capture(pilot, "help_80x24")
        await press_id(pilot, "close-dialog")
        await press_id(pilot, "edit-terms")
        app.screen.query_one("#prompt-input").value = "log(dpeot)"
        await pilot.press("enter")
        await _capture(pilot, "error_80x24")


def test_snapshot_update_writes_and_shows_the_difference_instead_of_passing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(tui_support, "SNAPSHOT_DIR", tmp_path)
    monkeypatch.setenv(tui_support.UPDATE_ENV, "1")
    with pytest.raises(pytest.fail.Exception, match="written"):
        assert_snapshot("first\nscreen", "demo")  # a new snapshot is shown, not passed
    assert (tmp_path / "demo.txt").read_text(encoding="utf-8") == "first\nscreen\n"
    assert_snapshot("first\nscreen", "demo")  # unchanged: passes
    with pytest.raises(pytest.fail.Exception, match=r"(?s)rewritten.*-screen\n\+changed"):
        assert_snapshot("first\nchanged", "demo")
    assert (tmp_path / "demo.txt").read_text(encoding="utf-8") == "first\nchanged\n"
    monkeypatch.delenv(tui_support.UPDATE_ENV)
    assert_snapshot("first\nchanged", "demo")  # the next run compares and passes
    with pytest.raises(pytest.fail.Exception, match="differs"):
        assert_snapshot("first\nagain", "demo")
    assert (tmp_path / "demo.txt").read_text(encoding="utf-8") == "first\nchanged\n"
