"""Open a table on disk as a `Source`: Parquet (one file, a folder or a glob), CSV, Arrow IPC.

Every frame a source returns carries `ROW_INDEX`, the row's 0-based position in the source as
read (across many files: in sorted file order), taken before any filter, so a row found in a
pass can always be fetched again with `Source.read_rows`.

Examples
--------
>>> source = open_source("deliveries.parquet")
>>> for batch in source.scan_batches(["minutes", "distance_km"], batch_rows=1_000):
...     print(batch.frame.height, batch.rows_read)
1000 1000
1000 2000
"""

from __future__ import annotations

import glob
import os
from pathlib import Path
from typing import Final
from urllib.parse import urlsplit

from triage.core.design import ROW_INDEX
from triage.data.base import Batch, BlockSource, Sample, Source
from triage.data.delimited import CsvOptions, CsvSource
from triage.data.ipc import IpcSource
from triage.data.parquet import ParquetDatasetSource, ParquetFileSource, ParquetUrlDatasetSource
from triage.data.remote import is_url, url_filesystem, url_info, url_name
from triage.errors import SourceError

__all__ = [
    "DEFAULT_CSV_OPTIONS",
    "ROW_INDEX",
    "Batch",
    "BlockSource",
    "CsvOptions",
    "CsvSource",
    "IpcSource",
    "ParquetDatasetSource",
    "ParquetFileSource",
    "Sample",
    "Source",
    "open_source",
]

PARQUET_SUFFIXES: Final[tuple[str, ...]] = (".parquet", ".pq")
"""File name endings read as Parquet."""

CSV_SUFFIXES: Final[tuple[str, ...]] = (
    ".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz", ".txt.gz",
)  # fmt: skip
"""File name endings read as delimited text (gzip-compressed ones included)."""

IPC_SUFFIXES: Final[tuple[str, ...]] = (".arrow", ".feather", ".ipc")
"""File name endings read as Arrow IPC."""

_GLOB_CHARS: Final[str] = "*?["

DEFAULT_CSV_OPTIONS: Final[CsvOptions] = CsvOptions()
"""The parsing options `open_source` uses unless told otherwise."""


def open_source(path: str | os.PathLike[str], *, csv: CsvOptions = DEFAULT_CSV_OPTIONS) -> Source:
    """Open a file, folder or glob of tabular data for reading in batches.

    Only metadata is read here (the Parquet or IPC footer, the CSV header and first rows), so
    opening is cheap; a damaged file fails here rather than in the middle of a pass.

    Parameters
    ----------
    path : str or PathLike
        A ``.parquet``/``.pq`` file; a folder of Parquet files (hive-style ``key=value``
        subfolders become columns); a glob of Parquet files (``data/*.parquet``,
        ``data/**/*.parquet``); a ``.csv``/``.tsv``/``.txt`` file, optionally ``.gz``, or a
        folder or glob of them (sharing a header; read with the first file's types); an
        Arrow IPC file (``.arrow``/``.feather``/``.ipc``); or the URL of a Parquet or Arrow
        IPC file, or of a folder or glob of Parquet files (``s3://``, ``https://``,
        ``file://``: any that fsspec opens; a folder or glob needs a store that lists).
    csv : CsvOptions, default=DEFAULT_CSV_OPTIONS
        How to parse delimited text; ignored for other kinds.

    Returns
    -------
    Source

    Raises
    ------
    SourceError
        If the path does not exist, holds no Parquet files, has an unknown extension, or
        cannot be read.
    """
    text = os.fspath(path)
    if is_url(text):
        return _open_url(text)
    target = Path(text).expanduser()
    if any(c in text for c in _GLOB_CHARS) and not target.exists():
        return _open_glob(target, csv)
    if target.is_dir():
        return _open_folder(target, csv)
    if not target.exists():
        msg = (
            f"`{target}` does not exist (working directory `{Path.cwd()}`); "
            "check the path or give an absolute one"
        )
        raise SourceError(msg)
    name = target.name.lower()
    if name.endswith(PARQUET_SUFFIXES):
        return ParquetFileSource(target)
    if name.endswith(CSV_SUFFIXES):
        return CsvSource(target, csv)
    if name.endswith(IPC_SUFFIXES):
        return IpcSource(target)
    known = ", ".join(f"`{s}`" for s in PARQUET_SUFFIXES + CSV_SUFFIXES + IPC_SUFFIXES)
    msg = (
        f"cannot tell the format of `{target.name}` from its extension; "
        f"use one of {known}, or a folder of Parquet files"
    )
    raise SourceError(msg)


def _open_url(url: str) -> Source:
    """Open a Parquet or Arrow IPC file, or a folder or glob of Parquet files, by URL (fsspec)."""
    name = url_name(url).lower()
    if any(c in urlsplit(url).path for c in _GLOB_CHARS):
        return _open_url_files(url, is_glob=True)
    info = None if name.endswith(CSV_SUFFIXES) else url_info(url)
    if info is not None and info.get("type") == "directory":
        return _open_url_files(url, is_glob=False)
    if not name.endswith(PARQUET_SUFFIXES + IPC_SUFFIXES):
        msg = (
            f"`{url}`: a URL must name a Parquet (`.parquet`, `.pq`) or Arrow IPC "
            "(`.arrow`, `.feather`, `.ipc`) file, or a folder or glob of Parquet files, whose "
            "metadata says where their rows are; copy a CSV file to a local or mounted disk"
        )
        raise SourceError(msg)
    if info is None:
        msg = f"`{url}` does not exist; check the URL"
        raise SourceError(msg)
    return ParquetFileSource(url) if name.endswith(PARQUET_SUFFIXES) else IpcSource(url)


def _open_url_files(url: str, *, is_glob: bool) -> Source:
    """Open the Parquet files of a folder or glob in a store, listed through fsspec."""
    filesystem, path = url_filesystem(url)
    base = path.rstrip("/")
    if is_glob:  # partition folders are read below the glob's fixed part
        base = base[: min(base.find(c) for c in _GLOB_CHARS if c in base)].rsplit("/", 1)[0]
    try:
        found = filesystem.glob(path) if is_glob else filesystem.find(path)
    except Exception as error:  # a store's own error (connection, permission): one line
        why = (str(error).strip().splitlines() or [type(error).__name__])[0]
        msg = f"cannot list `{url}`: {type(error).__name__}: {why}"
        raise SourceError(msg) from None
    files = sorted(
        str(name)
        for name in found
        if str(name).lower().endswith(PARQUET_SUFFIXES)
        and not any(
            part.startswith((".", "_")) for part in str(name)[len(base) :].strip("/").split("/")
        )
    )
    if not files:
        msg = f"`{url}` holds no Parquet files (`*.parquet`, `*.pq`); check the URL"
        raise SourceError(msg)
    urls = [filesystem.unstrip_protocol(name) for name in files]
    return ParquetUrlDatasetSource(url, urls, filesystem.unstrip_protocol(base))


def _is_parquet(path: Path) -> bool:
    return path.is_file() and path.name.lower().endswith(PARQUET_SUFFIXES)


def _is_csv(path: Path) -> bool:
    return path.is_file() and path.name.lower().endswith(CSV_SUFFIXES)


def _open_folder(folder: Path, csv: CsvOptions) -> Source:
    # Skip hidden and bookkeeping entries (`.tmp`, `_SUCCESS`, `_delta_log/`), as writers
    # of partitioned folders leave them beside the data.
    entries = sorted(
        (
            p
            for p in folder.rglob("*")
            if not any(part.startswith((".", "_")) for part in p.relative_to(folder).parts)
        ),
        key=lambda p: p.as_posix(),
    )
    files = [p for p in entries if _is_parquet(p)]
    if files:
        return ParquetDatasetSource(folder, files, folder)
    files = [p for p in entries if _is_csv(p)]
    if not files:
        msg = (
            f"folder `{folder}` holds no Parquet files (`*.parquet`, `*.pq`) and no CSV files "
            "(`*.csv`, `*.tsv`, `*.txt`); point at a data folder, or at an Arrow IPC file"
        )
        raise SourceError(msg)
    return _open_csv_files(folder, files, folder, csv)


def _open_csv_files(path: Path, files: list[Path], base: Path, csv: CsvOptions) -> Source:
    """Open CSV files found below `base` as one table (no `key=value` folders: Parquet only)."""
    partitioned = next((f for f in files if "=" in f.parent.relative_to(base).as_posix()), None)
    if partitioned is not None:
        msg = (
            f"`{partitioned}` is in a `key=value` folder, read as a column only for Parquet; "
            "convert the CSV files to Parquet, or point at files that hold every column"
        )
        raise SourceError(msg)
    return CsvSource(path, csv, files)


def _open_glob(pattern: Path, csv: CsvOptions) -> Source:
    matches = sorted(
        (Path(p) for p in glob.glob(os.fspath(pattern), recursive=True)),
        key=lambda p: p.as_posix(),
    )
    is_kind, kind, suffixes = _is_parquet, "Parquet", "`*.parquet`"
    if not any(_is_parquet(p) for p in matches) and any(_is_csv(p) for p in matches):
        is_kind, kind, suffixes = _is_csv, "CSV", "`*.csv`"
    files = [p for p in matches if is_kind(p)]
    if not files:
        msg = (
            f"glob `{pattern}` matches no Parquet files (`*.parquet`, `*.pq`) and no CSV files; "
            "check the pattern, and quote it so the shell does not expand it"
        )
        raise SourceError(msg)
    others = [p for p in matches if p.is_file() and p not in files]
    if others:
        msg = (
            f"glob `{pattern}` matches files that are not {kind}, such as `{others[0]}`; "
            f"narrow the pattern to {suffixes} files"
        )
        raise SourceError(msg)
    base = Path()
    for part in pattern.parts:
        if any(c in part for c in _GLOB_CHARS):
            break
        base /= part
    if kind == "CSV":
        return _open_csv_files(pattern, files, base, csv)
    return ParquetDatasetSource(pattern, files, base)
