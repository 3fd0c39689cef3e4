"""What a source's files looked like when it was opened, and checks that they still do.

A file replaced, truncated, appended to or rewritten while a pass reads it would mix old and
new rows, or end a pass early without a word (pyarrow stops at a truncated row group). Every
source records each file's size, modification time and identity (inode) when it
is opened, and checks a file again as it opens it for reading and once more when a scan
ends, together with the row count its metadata promised. A change raises `SourceChanged`.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

from triage.data.remote import FileName, url_version
from triage.errors import SourceChanged


@dataclass(frozen=True)
class FileStamp:
    """What one file looked like: size, modification time and identity (inode).

    The device number is left out: a cluster worker sees a shared file system under a
    device number of its own, while size, time and inode come from the file itself.
    """

    size: int
    mtime_ns: int
    inode: int

    @classmethod
    def of(cls, path: FileName) -> FileStamp | None:
        """Stat `path` (a URL: ask its store); None when it no longer exists."""
        if isinstance(path, str):
            found = url_version(path)
            return None if found is None else cls(*found, inode=0)
        try:
            info = os.stat(path)
        except FileNotFoundError:
            return None
        return cls(info.st_size, info.st_mtime_ns, info.st_ino)


def changed_message(path: FileName, *, how: str = "changed") -> str:
    """Return the one-line message for a file that changed under a read."""
    return (
        f"`{path}` {how} while it was being read; nothing was written; run again when it is stable"
    )


class SourceSnapshot:
    """The stamps of a source's files, taken when the source was opened.

    Parameters
    ----------
    files : sequence of FileName
        The files the source reads.

    Raises
    ------
    SourceError
        Never here; a missing file is reported when the source opens it.
    """

    def __init__(self, files: Sequence[FileName]) -> None:
        self._stamps = {path: FileStamp.of(path) for path in files}

    @property
    def files(self) -> tuple[FileName, ...]:
        """The files recorded, in source order."""
        return tuple(self._stamps)

    def stamp(self, path: FileName) -> FileStamp | None:
        """Return the stamp of `path` taken at opening (None if it was not recorded or missing)."""
        return self._stamps.get(path)

    def is_unchanged(self, path: FileName) -> bool:
        """Whether `path` still matches its stamp (a file not recorded counts as unchanged)."""
        return path not in self._stamps or FileStamp.of(path) == self._stamps[path]

    def check_file(self, path: FileName) -> None:
        """Raise `SourceChanged` if `path` differs from its stamp (a file not recorded passes).

        Raises
        ------
        SourceChanged
            Naming the file: changed, or removed.
        """
        if self.is_unchanged(path):
            return
        how = "was removed" if FileStamp.of(path) is None else "changed"
        raise SourceChanged(changed_message(path, how=how))

    def check_files(self, paths: Iterable[FileName]) -> None:
        """Check each of `paths` in turn (see `check_file`)."""
        for path in paths:
            self.check_file(path)

    def check_all(self) -> None:
        """Check every recorded file."""
        self.check_files(self._stamps)

    def check_rows(
        self, rows_read: int, rows_expected: int | None, files: Iterable[FileName]
    ) -> None:
        """Raise `SourceChanged` when a finished scan of `files` read other than the rows promised.

        The files are checked first, so the message names the one that changed; if none
        shows a change, the first of them is named.

        Parameters
        ----------
        rows_read : int
            Rows the scan read, before any filter.
        rows_expected : int or None
            Rows the metadata promised when the source was opened; None skips the check.
        files : iterable of FileName
            The files the scan read.
        """
        files = list(files)
        self.check_files(files)
        if rows_expected is None or rows_read == rows_expected or not files:
            return
        raise SourceChanged(changed_message(files[0]))


_reading_lock = threading.Lock()
_reading: dict[tuple[int, FileName], int] = {}
"""(snapshot id, file) -> reads of it under way (`changed_file_being_read` reads it unlocked)."""
_snapshots: dict[int, SourceSnapshot] = {}


@contextlib.contextmanager
def being_read(snapshot: SourceSnapshot, files: Sequence[FileName]) -> Iterator[None]:
    """Record that `files` of `snapshot` are being read during the block (see `bus_guard`)."""
    keys = [(id(snapshot), path) for path in files]
    with _reading_lock:
        _snapshots[id(snapshot)] = snapshot
        for key in keys:
            _reading[key] = _reading.get(key, 0) + 1
    try:
        yield
    finally:
        with _reading_lock:
            for key in keys:
                _reading[key] -= 1
                if not _reading[key]:
                    del _reading[key]
            if not any(k[0] == id(snapshot) for k in _reading):
                _snapshots.pop(id(snapshot), None)


def changed_file_being_read() -> FileName | None:
    """Return a file being read now that changed since it was opened, else any file being read.

    Called from the bus-error guard, where a lock could be held by the thread that faulted:
    it reads a copy of the registry without locking.
    """
    reading = list(_reading)
    for snapshot_id, path in reading:
        snapshot = _snapshots.get(snapshot_id)
        if snapshot is not None and not snapshot.is_unchanged(path):
            return path
    return reading[0][1] if reading else None
