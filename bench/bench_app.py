"""Terminal-app responsiveness, measured from outside as a user sees it, in one run.

Runs the real `triage` command inside tmux at 80x24 on a demo file of `--rows` rows
(generated once with `triage sample`), and reads the screen with `capture-pane`:

- launch to first fit on screen: from starting the command to the status line naming fit #1,
  beside the time `triage fit` (the headless quick fit on the same sample) takes end to end,
  and to the residual diagnostics of that fit on screen;
- keystroke to redraw: in the row pane, the time from sending the next-row key to the
  screen showing another row, over `--steps` steps (median and worst).

Targets from the issue: first fit under 2 s on 20 million rows; stepping under 100 ms.
Usage: ``python bench/bench_app.py --rows 20000000``.
"""

from __future__ import annotations

import argparse
import re
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"
TERMS = "distance_km, stops, weight_kg, hour, depot, vehicle"
SESSION = "triage-bench"
ROW_LINE = re.compile(r"row ([\d,]+) \(0-based\)")
ROW_NUMBER = re.compile(r"^│\s+[\d,]{5,}\s", re.MULTILINE)  # a row of the Worst table


def tmux(*args: str) -> str:
    """Run a tmux command and return its output."""
    return subprocess.run(["tmux", *args], capture_output=True, text=True, check=True).stdout


def screen() -> str:
    """The visible screen as plain text."""
    return tmux("capture-pane", "-p", "-t", SESSION)


def wait_for(predicate: object, *, timeout_s: float = 60.0, poll_s: float = 0.005) -> float:
    """Poll the screen until `predicate(text)` holds; return when it did (perf_counter).

    Each poll runs a tmux client (about 3 ms of CPU), so polling every 5 ms keeps half a core
    busy: on a 2-core machine that competes with the app's two busy threads at launch.
    """
    deadline = time.perf_counter() + timeout_s
    while time.perf_counter() < deadline:
        text = screen()
        if predicate(text):  # type: ignore[operator]
            return time.perf_counter()
        time.sleep(poll_s)
    raise TimeoutError(screen())


def shows_other_row(text: str, old: str) -> bool:
    """True when the row pane shows a row other than `old`."""
    match = ROW_LINE.search(text)
    return match is not None and match.group(1) != old


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, default=20_000_000)
    parser.add_argument("--steps", type=int, default=30)
    parser.add_argument(
        "--launch-poll-ms",
        type=float,
        default=5.0,
        help="pause between screen reads while waiting for the first fit (default 5)",
    )
    args = parser.parse_args()
    if shutil.which("tmux") is None:
        sys.exit("bench_app needs tmux (apt-get install tmux)")
    path = DATA / f"deliveries_{args.rows}.parquet"
    if not path.exists():
        DATA.mkdir(parents=True, exist_ok=True)
        subprocess.run(
            ["triage", "sample", "--rows", str(args.rows), "--out", str(path)], check=True
        )
    started = time.perf_counter()
    subprocess.run(
        ["triage", "fit", str(path), "-y", "minutes", "-x", TERMS],
        check=True,
        capture_output=True,
    )
    cli_s = time.perf_counter() - started

    subprocess.run(["tmux", "kill-session", "-t", SESSION], capture_output=True, check=False)
    command = f"triage {path} --target minutes --terms '{TERMS}'"
    started = time.perf_counter()
    tmux("new-session", "-d", "-s", SESSION, "-x", "80", "-y", "24", command)
    try:
        poll_s = args.launch_poll_ms / 1000
        shown = wait_for(lambda text: "fit #1" in text, poll_s=poll_s)
        launch_s = shown - started
        # the pass line says "residual diagnostics running" (cut short at 80 columns) until
        # the diagnostics of the fit are on screen
        diagnosed = wait_for(
            lambda text: "fit #1" in text and "residual diag" not in text, poll_s=poll_s
        )
        diagnosed_s = diagnosed - started
        tmux("send-keys", "-t", SESSION, "7")
        wait_for(lambda text: ROW_NUMBER.search(text) is not None)
        tmux("send-keys", "-t", SESSION, "d")
        wait_for(lambda text: ROW_LINE.search(text) is not None)
        steps = []
        for _ in range(args.steps):
            before = ROW_LINE.search(screen())
            assert before is not None
            old = before.group(1)
            sent = time.perf_counter()
            tmux("send-keys", "-t", SESSION, "n")
            done = wait_for(lambda text, old=old: shows_other_row(text, old), timeout_s=10)
            steps.append(done - sent)
    finally:
        subprocess.run(["tmux", "kill-session", "-t", SESSION], capture_output=True, check=False)
    print(f"rows in file                      {args.rows:,}")
    print(f"triage fit (headless quick fit)   {cli_s:6.2f} s")
    print(
        f"app: launch to first fit shown    {launch_s:6.2f} s  ({launch_s / cli_s:.2f}x the CLI; "
        f"screen read every {args.launch_poll_ms:g} ms)"
    )
    print(f"app: launch to diagnostics shown  {diagnosed_s:6.2f} s")
    print(
        f"app: next-row key to redraw       median {1000 * statistics.median(steps):5.0f} ms, "
        f"worst {1000 * max(steps):5.0f} ms over {len(steps)} steps "
        "(includes tmux polling, about 5 ms)"
    )


if __name__ == "__main__":
    main()
