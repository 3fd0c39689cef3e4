"""Helpers for the app tests: a small demo file, waits on the app's state, notifications as
posted, plain-text screen capture, snapshot comparison.

Waits follow the app's own state (no worker pending or running, every posted message handled,
a condition on the screen met), never a fixed number of event-loop rounds or a time budget;
`HANG_S` only turns a hang into a failure that names what was awaited.

Snapshots are the screen as plain text (one line per terminal row), stored under
`tests/snapshots/`. `TRIAGE_UPDATE_SNAPSHOTS=1 pytest tests/test_tui_snapshots.py` rewrites
each one that changed and fails showing the difference; read it, rerun, and commit saying why.
"""

from __future__ import annotations

import asyncio
import difflib
import os
import time
import weakref
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from triage.tui.app import TriageApp, make_app
from triage.tui.settings import Settings

if TYPE_CHECKING:
    from textual.pilot import Pilot
    from textual.worker import Worker

    from triage.tui.head_start import HeadStart

SNAPSHOT_DIR = Path(__file__).parent / "snapshots"
"""Where the text snapshots live."""

UPDATE_ENV = "TRIAGE_UPDATE_SNAPSHOTS"
"""Set to 1 to rewrite snapshots instead of comparing."""

DEMO_ROWS = 6_000
"""Rows of the demo scenario written for the app tests (small: the machine is shared)."""


def write_demo(folder: Path) -> Path:
    """Write the demo delivery scenario (invented data, the project's demo) to `folder`."""
    from triage.data.scenario import write_scenario

    return write_scenario(
        folder / "deliveries.parquet", n_rows=DEMO_ROWS, seed=7, row_group_rows=1_000
    )


@pytest.fixture
def config_home(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Point triage's configuration directory at an empty temporary folder; no NO_COLOR."""
    folder = tmp_path / "config"
    monkeypatch.setenv("TRIAGE_CONFIG_DIR", str(folder))
    monkeypatch.delenv("NO_COLOR", raising=False)
    return folder


@pytest.fixture(scope="module")
def demo_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small demo file shared by the tests of one module."""
    return write_demo(tmp_path_factory.mktemp("demo"))


HANG_S = 120.0
"""A wait that lasts this long is a hang: it fails, naming what it waited for (a fail-safe
against a stuck test on a loaded machine, not a time budget any passing run comes near)."""

_POSTED: weakref.WeakKeyDictionary[TriageApp, list[str]] = weakref.WeakKeyDictionary()


def build_app(
    data: Path | None = None, *, head_start: HeadStart | None = None, **fields: object
) -> TriageApp:
    """Build the app through the same factory the command line uses, recording notifications.

    Pass `head_start` (made from settings equal to these) to build it as `triage open` does.
    """
    settings = Settings(data=None if data is None else str(data), **fields)  # type: ignore[arg-type]
    app = make_app(settings, head_start=head_start)
    posted: list[str] = []
    notify = app.notify

    def record(message: str, **options: Any) -> None:
        posted.append(message)
        notify(message, **options)

    app.notify = record  # type: ignore[method-assign]
    _POSTED[app] = posted
    return app


def notifications(app: TriageApp) -> list[str]:
    """Return every notification message the app was asked to show, in order.

    Recorded when posted, so a message is still here after the app's toast expires (the
    framework drops shown notifications after their timeout).
    """
    return _POSTED[app]


def key_for(app: TriageApp, binding_id: str) -> str:
    """Return the first key the loaded keymap gives `binding_id` (tests press keys by id)."""
    return app.keymap[binding_id].split(",")[0].strip()


async def press_id(pilot: Pilot[None], binding_id: str) -> None:
    """Press the key of a binding id and let the app settle."""
    app = pilot.app
    assert isinstance(app, TriageApp)
    await pilot.press(key_for(app, binding_id))
    await pilot.pause()


def _busy_workers(app: TriageApp) -> list[Worker[Any]]:
    return [worker for worker in app.workers if not worker.is_finished]


async def settle(pilot: Pilot[None]) -> None:
    """Wait until the app is quiet: no worker pending or running, every message handled, and
    the screen drawn the same after one more round of the event loop.

    A handled message may start another worker (the data opens, then the fit starts), and a
    new result may take another layout (a scroll bar follows the text it scrolls), so this
    repeats until a round changes nothing.
    """
    app = pilot.app
    assert isinstance(app, TriageApp)
    deadline = time.monotonic() + HANG_S
    drawn = None
    while True:
        try:
            # a worker that fails is the app's to report (tests check what it shows)
            await asyncio.wait_for(
                asyncio.gather(*(w.wait() for w in _busy_workers(app)), return_exceptions=True),
                timeout=max(deadline - time.monotonic(), 0.0),
            )
        except TimeoutError:
            busy = [worker.name for worker in _busy_workers(app)]
            msg = f"the app did not settle in {HANG_S:.0f} s; still busy: {busy}"
            raise AssertionError(msg) from None
        await pilot.pause()  # handle what the finished workers posted
        if _busy_workers(app):
            continue
        before, drawn = drawn, screen_text(app)
        if drawn == before:
            return


async def wait_until(pilot: Pilot[None], condition: Callable[[], bool], what: str) -> None:
    """Let the app run until `condition()` holds; `what` names it if it never does."""
    deadline = time.monotonic() + HANG_S
    while not condition():
        if time.monotonic() > deadline:
            msg = f"still waiting after {HANG_S:.0f} s for {what}"
            raise AssertionError(msg)
        await pilot.pause()


def screen_text(app: TriageApp, *, replace: dict[str, str] | None = None) -> str:
    """Return the active screen as plain text, one line per terminal row, right-stripped.

    Reads the compositor's strips (the same cells `export_screenshot` turns into SVG).
    """
    strips = app.screen._compositor.render_strips()
    text = "\n".join(strip.text.rstrip() for strip in strips)
    for old, new in (replace or {}).items():
        text = text.replace(old, new)
    return text


def assert_snapshot(text: str, name: str) -> None:
    """Compare `text` with the stored snapshot `name`; with `UPDATE_ENV` set, also rewrite it.

    An update is never a silent pass: a snapshot that changes (or is new) is written and the
    test fails with the difference, so the change is read before it is committed; the next
    run, updating or not, passes.
    """
    path = SNAPSHOT_DIR / f"{name}.txt"
    updating = os.environ.get(UPDATE_ENV) == "1"
    expected = path.read_text(encoding="utf-8").removesuffix("\n") if path.exists() else None
    if text == expected:
        return
    if updating:
        SNAPSHOT_DIR.mkdir(parents=True, exist_ok=True)
        path.write_text(text + "\n", encoding="utf-8")
    if expected is None:
        done = "written" if updating else f"missing; run with {UPDATE_ENV}=1 to write it"
        pytest.fail(f"snapshot {path.name} {done}; the screen:\n{text}")
    diff = "\n".join(
        difflib.unified_diff(expected.splitlines(), text.splitlines(), "stored", "now", lineterm="")
    )
    done = "rewritten; read the difference and" if updating else "differs; if intended, rerun with"
    hint = "commit it saying why" if updating else f"{UPDATE_ENV}=1 and read the difference"
    pytest.fail(f"snapshot {path.name} {done} {hint}:\n{diff}")
