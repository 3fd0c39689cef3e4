"""The app on SIGTERM, SIGHUP and SIGINT mid-pass: passes cancelled, exit 128+N (issue 14).

The signal is sent to this process from the pass's own thread at its first batch (the data
layer's batch hook; the sample is smaller than the file, so the full pass reads it), so it
arrives while the full pass runs; the app's event loop handles it.
"""

from __future__ import annotations

import os
import signal
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.tui_support import build_app, config_home, demo_file, press_id, settle, wait_until
from triage.data import hooks

__all__ = ["config_home", "demo_file"]  # fixtures used below


@pytest.fixture
def hook_off() -> Iterator[None]:
    yield
    hooks.set_batch_hook(None)


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP, signal.SIGINT])
async def test_tui_signal_mid_pass_closes_the_app(
    signum: signal.Signals, demo_file: Path, config_home: Path, hook_off: None
) -> None:
    app = build_app(
        demo_file, target="minutes", terms="distance_km, stops, depot", sample_rows=1_000
    )
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        # the app's loop handles the signal now: it would otherwise end this test process
        assert signal.getsignal(signum) not in (signal.SIG_DFL, signal.default_int_handler)
        sent: list[int] = []

        def send_at_first_batch(path: Path, batch: int) -> None:
            if batch == 1 and not sent:
                sent.append(batch)
                os.kill(os.getpid(), signum)

        hooks.set_batch_hook(send_at_first_batch)
        await press_id(pilot, "start-full-pass")
        await wait_until(pilot, lambda: app.return_code is not None, "the app to close")
    assert sent == [1]
    assert app.return_code == 128 + signum
    assert all(worker.is_cancelled or worker.is_finished for worker in app.workers)


def test_tui_app_stuck_closing_after_a_signal_is_ended_without_partial_files(
    tmp_path: Path,
) -> None:
    # The close deadline: an app that cannot close (its terminal gone, Textual's writer
    # stopped) is ended with 128+N, its export temporaries removed, in a child process.
    import subprocess
    import sys

    temporary = tmp_path / "worst.csv.part"
    code = (
        "import signal, sys, threading\n"
        "from pathlib import Path\n"
        "from triage.data.bus_guard import TEMPORARIES\n"
        "from triage.tui.app import _end_if_still_closing\n"
        f"path = Path({str(temporary)!r}); path.write_text('partial'); TEMPORARIES.add(path)\n"
        "threading.Thread(target=_end_if_still_closing, args=(signal.SIGHUP, 0.05)).start()\n"
        "threading.Event().wait()  # an app stuck closing\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False
    )
    assert done.returncode == 128 + signal.SIGHUP
    assert not temporary.exists()
    assert done.stderr.splitlines() == [
        "triage: stopped by SIGHUP; the app could not close in time and was ended"
    ]
