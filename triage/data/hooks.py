"""A hook called for every batch a source reads, so tests can act at a known point of a pass.

Tests change a file or send a signal at batch `k` of a pass without sleeping: in-process
with `set_batch_hook`, and in a child process through `PAUSE_ENVIRONMENT`, which makes the
pass report batch `k` on one pipe and wait for a byte on another before it goes on.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from typing import Final

from triage.data.remote import FileName

BatchHook = Callable[[FileName, int], None]
"""Called with the source path and the batch's number (1 for the first of the process)."""

PAUSE_ENVIRONMENT: Final = "TRIAGE_TEST_PAUSE_AT_BATCH"
"""``K,WRITE_FD,READ_FD``: at batch K write one byte to WRITE_FD, then wait for one on READ_FD."""

_lock = threading.Lock()
_hook: BatchHook | None = None
_batches = 0
_is_environment_read = False


def set_batch_hook(hook: BatchHook | None) -> None:
    """Install `hook` (or remove it with None) and restart the batch count."""
    global _hook, _batches, _is_environment_read
    with _lock:
        _hook, _batches, _is_environment_read = hook, 0, True


def _pause_from_environment() -> BatchHook | None:
    text = os.environ.get(PAUSE_ENVIRONMENT)
    if not text:
        return None
    at, write_fd, read_fd = (int(part) for part in text.split(","))

    def pause(path: FileName, batch: int) -> None:
        if batch == at:
            os.write(write_fd, b"k")
            os.read(read_fd, 1)

    return pause


def batch_read(path: FileName) -> None:
    """Count one batch read from `path` and call the hook, if any, on the reading thread."""
    global _hook, _batches, _is_environment_read
    if _is_environment_read and _hook is None:
        return  # the usual case, without taking the lock
    with _lock:
        if not _is_environment_read:
            _hook, _is_environment_read = _pause_from_environment(), True
        if _hook is None:
            return
        _batches += 1
        hook, batch = _hook, _batches
    hook(path, batch)
