"""Suite-wide set-up: the skip policy, and a folder for the examples in triage's docstrings.

Skips: a test may skip only for a reason listed in `DOCUMENTED_SKIPS`; every skip is listed
in the summary with its reason, and a skip for any other reason fails the run (so a missing
file or library never passes silently). The examples (`pytest --doctest-modules triage`) each
run in a fresh temporary folder holding `deliveries.parquet`, a small file of the project's
own demo scenario (invented data), so they can open and write files by plain names.
"""

from __future__ import annotations

from collections import Counter
from typing import Final

import pytest

DOCUMENTED_SKIPS: Final = {
    "running as root": "file modes cannot lock root out of a folder (tests/test_export.py)",
    "not root, or no mount(8)": (
        "read-only and full destinations are small tmpfs mounts, which only root can make "
        "(tests/test_faults.py)"
    ),
    "tmpfs mount refused": (
        "a container without the right to mount cannot make the small tmpfs (tests/test_faults.py)"
    ),
    "tmux is not installed": (
        "the terminal smoke test drives the real app in tmux (tests/test_tui_smoke.py); "
        ".ci/run installs it"
    ),
}
"""The only reasons a test may skip, with why the check cannot run there."""

DOCTEST_DEMO_ROWS: Final = 2_000
"""Rows of the demo file an example finds (two row groups of 1,000)."""

_skipped: list[str] = []
"""The reason of every skip in this run."""


def _skip_reason(report: pytest.TestReport | pytest.CollectReport) -> str:
    longrepr = report.longrepr
    text = longrepr[2] if isinstance(longrepr, tuple) else str(longrepr)
    return text.removeprefix("Skipped: ")


def pytest_runtest_logreport(report: pytest.TestReport) -> None:
    """Note each skipped test's reason (an expected failure is not a skip)."""
    if report.skipped and not hasattr(report, "wasxfail"):
        _skipped.append(_skip_reason(report))


def pytest_collectreport(report: pytest.CollectReport) -> None:
    """Note each module skipped whole at collection."""
    if report.skipped:
        _skipped.append(_skip_reason(report))


def _undocumented() -> list[str]:
    return [reason for reason in _skipped if reason not in DOCUMENTED_SKIPS]


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    """Fail an otherwise passing run that skipped a test for an undocumented reason."""
    if _undocumented() and session.exitstatus == pytest.ExitCode.OK:
        session.exitstatus = pytest.ExitCode.TESTS_FAILED


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    """List every skip with its reason, saying whether the reason is a documented one."""
    if not _skipped:
        return
    terminalreporter.section("skipped tests")
    for reason, count in Counter(_skipped).items():
        why = DOCUMENTED_SKIPS.get(reason)
        if why is None:
            line = f"{count} skipped: {reason} -- NOT a documented reason: this fails the run"
            terminalreporter.write_line(line, red=True)
        else:
            terminalreporter.write_line(f"{count} skipped: {reason} -- documented: {why}")


@pytest.fixture(autouse=True)
def _doctest_folder(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> None:
    """Run each docstring example in a temporary folder with the demo file; tests are left alone."""
    if not isinstance(request.node, pytest.DoctestItem):
        return
    from triage.data.scenario import write_scenario

    folder = request.getfixturevalue("tmp_path")
    write_scenario(
        folder / "deliveries.parquet", n_rows=DOCTEST_DEMO_ROWS, seed=7, row_group_rows=1_000
    )
    monkeypatch.chdir(folder)
