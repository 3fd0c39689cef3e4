"""Files named by a URL (``s3://``, ``gs://``, ``https://``, ``file://``), opened through fsspec.

A Parquet or Arrow IPC file may be given as a URL that fsspec knows; pyarrow reads it
through fsspec's file, fetching only the byte ranges it asks for: the footer (and an IPC
file's record batch headers) when the source opens, then the row groups or record batches
a read needs. fsspec is optional (``pip install 'triage[urls]'``, which also brings its HTTP
backend); each storage service needs fsspec's package for it (``s3fs``, ``gcsfs`` ...),
which fsspec names when it is missing.

Paths on local disks stay `pathlib.Path`; a URL is kept as its text (`FileName`).
"""

from __future__ import annotations

import re
import zlib
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, Any, Final
from urllib.parse import unquote, urlsplit

from triage.errors import SourceError

if TYPE_CHECKING:
    import pyarrow as pa

FileName = Path | str
"""A file on a local disk (`Path`), or a URL as text (`str`)."""

URL_INSTALL_HINT: Final = "install fsspec with `pip install 'triage[urls]'`"

_SCHEME = re.compile(r"^[A-Za-z][A-Za-z0-9+.-]*://")

_TIME_KEYS: Final = (
    "mtime", "LastModified", "Last-Modified", "last_modified", "updated", "modified", "ETag",
)  # fmt: skip
"""Keys of fsspec's `info` that change when a remote file is rewritten, where a store gives one."""


def is_url(text: str) -> bool:
    """Whether `text` names a file by a URL (a scheme then ``://``).

    Examples
    --------
    >>> is_url("s3://bucket/deliveries.parquet"), is_url("data/deliveries.parquet")
    (True, False)
    """
    return bool(_SCHEME.match(text))


def url_name(url: str) -> str:
    """Return the last part of a URL's path (its file name), without query or fragment.

    Examples
    --------
    >>> url_name("https://example.org/data/deliveries.parquet?version=2")
    'deliveries.parquet'
    """
    return PurePosixPath(urlsplit(url).path).name


def local_file(url: str) -> Path | None:
    """Return the local file a ``file://`` URL names, or None for any other URL.

    Examples
    --------
    >>> local_file("file:///data/deliveries%20old.parquet"), local_file("s3://b/k.parquet")
    (PosixPath('/data/deliveries old.parquet'), None)
    """
    parts = urlsplit(url)
    return Path(unquote(parts.path)) if parts.scheme.lower() == "file" else None


def file_name(file: FileName) -> str:
    """Return the name of a file, local or remote, for messages."""
    return file.name if isinstance(file, Path) else url_name(file)


def url_filesystem(url: str) -> tuple[Any, str]:
    """Return fsspec's filesystem for `url` and the path within it.

    Raises
    ------
    SourceError
        When fsspec is not installed, or does not know the URL's scheme, or the package
        for that scheme is missing (fsspec's own advice is kept).
    """
    try:
        import fsspec.core
    except ImportError:
        msg = f"`{url}` is a URL, read through fsspec, which is not installed; {URL_INSTALL_HINT}"
        raise SourceError(msg) from None
    try:
        filesystem, path = fsspec.core.url_to_fs(url)
    except (ImportError, ValueError) as error:
        why = (str(error).strip().splitlines() or [type(error).__name__])[0]
        msg = f"cannot open `{url}`: {why}"
        raise SourceError(msg) from None
    return filesystem, str(path)


def open_input(file: FileName) -> pa.NativeFile:
    """Open a local file or a URL for random-access reading by pyarrow."""
    import pyarrow as pa  # here: the app's first frame loads this module, not pyarrow

    if isinstance(file, Path):
        return pa.OSFile(str(file), "rb")
    filesystem, path = url_filesystem(file)
    try:
        # No read-ahead cache: a store fetches the ranges pyarrow asks for and no more (its
        # default would fetch blocks of 5 to 50 MB past each small read).
        handle = filesystem.open(path, mode="rb", cache_type="none")
    except FileNotFoundError:
        msg = f"`{file}` does not exist; check the URL"
        raise SourceError(msg) from None
    return pa.PythonFile(handle, mode="r")


def url_info(url: str) -> dict[str, Any] | None:
    """Return fsspec's `info` of `url`, or None when there is no such file.

    Raises
    ------
    SourceError
        When the URL cannot be asked (no fsspec, an unknown scheme, a refused connection).
    """
    filesystem, path = url_filesystem(url)
    try:
        info: dict[str, Any] = filesystem.info(path)
    except Exception as error:  # a backend's own error (connection, permission): one line
        # fsspec's HTTP store says "not found" for a host it cannot reach, too: the cause tells
        cause = error.__cause__ if isinstance(error, FileNotFoundError) else error
        if cause is None or isinstance(cause, FileNotFoundError):
            return None
        why = (str(cause).strip().splitlines() or [type(cause).__name__])[0]
        msg = f"cannot open `{url}`: {type(cause).__name__}: {why}"
        raise SourceError(msg) from None
    return info


def url_version(url: str) -> tuple[int, int] | None:
    """Return `url`'s size and a number that changes when it is rewritten; None if it is gone.

    The number is a checksum of the store's version or modification time; a store that gives
    only the size (some HTTP servers) gives 0, and its files are checked by size alone.
    """
    info = url_info(url)
    if info is None:
        return None
    version = next((str(info[key]) for key in _TIME_KEYS if info.get(key) is not None), "")
    return int(info.get("size") or 0), zlib.crc32(version.encode()) if version else 0
