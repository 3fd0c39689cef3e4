"""What a source's files looked like when it was opened, and checks that they still do.

A file replaced, truncated, appended to or rewritten while a pass reads it would mix old and
new rows, or end a pass early without a word (pyarrow stops at a truncated row group). Every
source records each file's size, modification time and identity (device and inode) when it
is opened, and checks a file again as it opens it for reading and once more when a scan
ends, together with the row count its metadata promised. A change raises `SourceChanged`.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

from triage.errors import SourceChanged


@dataclass(frozen=True)
class FileStamp:
    """What one file looked like: size, modification time and identity."""

    size: int
    mtime_ns: int
    device: int
    inode: int

    @classmethod
    def of(cls, path: Path) -> FileStamp | None:
        """Stat `path`; None when it no longer exists."""
        try:
            info = os.stat(path)
        except FileNotFoundError:
            return None
        return cls(info.st_size, info.st_mtime_ns, info.st_dev, info.st_ino)


def changed_message(path: Path, *, how: str = "changed") -> str:
    """Return the one-line message for a file that changed under a read."""
    return (
        f"`{path}` {how} while it was being read; nothing was written; run again when it is stable"
    )


class SourceSnapshot:
    """The stamps of a source's files, taken when the source was opened.

    Parameters
    ----------
    files : sequence of Path
        The files the source reads.

    Raises
    ------
    SourceError
        Never here; a missing file is reported when the source opens it.
    """

    def __init__(self, files: Sequence[Path]) -> None:
        self._stamps = {path: FileStamp.of(path) for path in files}

    @property
    def files(self) -> tuple[Path, ...]:
        """The files recorded, in source order."""
        return tuple(self._stamps)

    def stamp(self, path: Path) -> FileStamp | None:
        """Return the stamp of `path` taken at opening (None if it was not recorded or missing)."""
        return self._stamps.get(path)

    def check_file(self, path: Path) -> None:
        """Raise `SourceChanged` if `path` differs from its stamp (a file not recorded passes).

        Raises
        ------
        SourceChanged
            Naming the file: changed, or removed.
        """
        if path not in self._stamps:
            return
        now = FileStamp.of(path)
        if now == self._stamps[path]:
            return
        how = "was removed" if now is None else "changed"
        raise SourceChanged(changed_message(path, how=how))

    def check_files(self, paths: Iterable[Path]) -> None:
        """Check each of `paths` in turn (see `check_file`)."""
        for path in paths:
            self.check_file(path)

    def check_all(self) -> None:
        """Check every recorded file."""
        self.check_files(self._stamps)

    def check_rows(self, rows_read: int, rows_expected: int | None, files: Iterable[Path]) -> None:
        """Raise `SourceChanged` when a finished scan of `files` read other than the rows promised.

        The files are checked first, so the message names the one that changed; if none
        shows a change, the first of them is named.

        Parameters
        ----------
        rows_read : int
            Rows the scan read, before any filter.
        rows_expected : int or None
            Rows the metadata promised when the source was opened; None skips the check.
        files : iterable of Path
            The files the scan read.
        """
        files = list(files)
        self.check_files(files)
        if rows_expected is None or rows_read == rows_expected or not files:
            return
        raise SourceChanged(changed_message(files[0]))
