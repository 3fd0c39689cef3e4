"""Smoke test: the real `triage` command in tmux at 80x24, driven by keys, read by capture-pane."""

from __future__ import annotations

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
        _wait_for(session, "of the source (0-based)")
        _tmux("send-keys", "-t", session, "?")
        _wait_for(session, "Bring the Columns pane to the front")
        _tmux("send-keys", "-t", session, "Escape")
        _tmux("send-keys", "-t", session, "C-q")
        _wait_for(session, "triage-exited-0")
    finally:
        subprocess.run(["tmux", "kill-session", "-t", session], check=False, capture_output=True)
