"""Smoke test: the real `triage` command in tmux at 80x24, driven by keys, read by capture-pane."""

from __future__ import annotations

import os
import shlex
import shutil
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from tests import tui_support

demo_file = tui_support.demo_file

pytestmark = pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed")


def _tmux(*args: str) -> str:
    done = subprocess.run(["tmux", *args], check=True, capture_output=True, text=True)
    return done.stdout


def _screen(session: str) -> str:
    return _tmux("capture-pane", "-p", "-t", session)


def _wait_for(session: str, text: str, *, timeout: float = 60.0) -> str:
    deadline = time.monotonic() + timeout
    screen = ""
    while time.monotonic() < deadline:
        screen = _screen(session)
        if text in screen:
            return screen
        time.sleep(0.3)
    raise AssertionError(f"{text!r} did not appear; the screen was:\n{screen}")


def _command() -> list[str]:
    """The installed `triage` script when there is one, else the same entry point via -m."""
    script = shutil.which("triage")
    return [script] if script else [sys.executable, "-m", "triage"]


def test_tui_smoke_in_tmux_at_80x24(demo_file: Path, tmp_path: Path) -> None:
    session = f"triage-smoke-{uuid.uuid4().hex[:8]}"
    config = tmp_path / "config"
    argv = [
        *_command(),
        str(demo_file),
        "--target",
        "minutes",
        "--terms",
        "distance_km, stops",
        "--rows",
        "2000",
    ]
    shell = (
        f"cd {shlex.quote(str(Path(__file__).parents[1]))} && "
        f"TRIAGE_CONFIG_DIR={shlex.quote(str(config))} {shlex.join(argv)}; "
        f"echo triage-exited-$?; sleep 30"
    )
    _tmux("new-session", "-d", "-s", session, "-x", "80", "-y", "24", shell)
    try:
        screen = _wait_for(session, "fit #1 from a SAMPLE")
        assert "Columns" in screen and "minutes ~ distance_km + stops" in screen
        assert all(len(line) <= 80 for line in screen.splitlines())
        _tmux("send-keys", "-t", session, "2")
        _wait_for(session, "fit quality")
        _tmux("send-keys", "-t", session, "a")
        _wait_for(session, "from EVERY ROW")
        _tmux("send-keys", "-t", session, "7")
        _wait_for(session, "largest residuals")
        _tmux("send-keys", "-t", session, "d")
        _wait_for(session, "(0-based) under fit #2")
        _tmux("send-keys", "-t", session, "?")
        _wait_for(session, "Bring the Columns pane to the front")
        _tmux("send-keys", "-t", session, "Escape")
        _tmux("send-keys", "-t", session, "C-q")
        _wait_for(session, "triage-exited-0")
    finally:
        subprocess.run(["tmux", "kill-session", "-t", session], check=False, capture_output=True)


def test_tui_terms_edited_during_a_full_pass_in_tmux_at_80x24(tmp_path: Path) -> None:
    """A full pass over millions of rows ends after the terms changed: the screen keeps the
    new model's fit, and the coefficients shown belong to the terms in the heading."""
    repo = Path(__file__).parents[1]
    data = tmp_path / "deliveries-5m.parquet"
    subprocess.run(
        [sys.executable, "-m", "triage", "sample", "--rows", "5000000", "--out", str(data)],
        check=True,
        capture_output=True,
        cwd=repo,
        env={**os.environ, "PYTHONPATH": str(repo)},
    )
    socket = f"triage-test-{uuid.uuid4().hex[:8]}"
    argv = [
        sys.executable,
        "-m",
        "triage",
        str(data),
        "--target",
        "minutes",
        "--terms",
        "distance_km, stops, weight_kg, hour, vehicle, depot",
    ]
    shell = (
        f"cd {shlex.quote(str(repo))} && PYTHONPATH={shlex.quote(str(repo))} "
        f"TRIAGE_CONFIG_DIR={shlex.quote(str(tmp_path / 'config'))} {shlex.join(argv)}; "
        "sleep 30"
    )

    def tmux(*args: str) -> str:
        return _tmux("-L", socket, *args)

    def wait_for(text: str, timeout: float = 120.0) -> str:
        deadline = time.monotonic() + timeout
        screen = ""
        while time.monotonic() < deadline:
            screen = tmux("capture-pane", "-p", "-t", "app")
            if text in screen:
                return screen
            time.sleep(0.2)
        raise AssertionError(f"{text!r} did not appear; the screen was:\n{screen}")

    tmux("new-session", "-d", "-s", "app", "-x", "80", "-y", "24", shell)
    try:
        wait_for("rows used  [0 marked]")  # fit #1 with its diagnostics
        tmux("send-keys", "-t", "app", "a")
        wait_for("rows/s")  # the pass over every row is under way
        tmux("send-keys", "-t", "app", "e")
        wait_for("terms (comma list")
        # the cursor sits after the model's terms: ctrl+u clears them, then type new ones
        tmux("send-keys", "-t", "app", "C-u")
        wait_for("log(stops), depot, stops:weight_kg")  # the empty field shows its example
        tmux("send-keys", "-t", "app", "-l", "distance_km, stops")
        wait_for("distance_km, stops ")
        tmux("send-keys", "-t", "app", "Enter")
        # the edit landed while the pass ran: the pass is now bound for the Fits list
        wait_for("every row (to Fits)")
        wait_for("joined Fits")
        tmux("send-keys", "-t", "app", "2")
        tmux("send-keys", "-t", "app", "End")
        screen = wait_for("── coefficients")
        heading = screen.splitlines()[1]
        assert "fit #2 SAMPLE: minutes ~ distance_km + stops" in heading
        body = screen.split("── coefficients", 1)[1].splitlines()[3:]
        terms = [line.strip("│ ").split("  ")[0] for line in body if line.startswith("│ ")]
        assert [t for t in terms if t] == ["intercept", "distance_km", "stops"], screen
        assert "fit #2 from a SAMPLE" in screen.splitlines()[-2]
        tmux("send-keys", "-t", "app", "0")
        screen = wait_for("fits this session")
        assert "3 fits this session" in screen
    finally:
        subprocess.run(["tmux", "-L", socket, "kill-server"], check=False, capture_output=True)
