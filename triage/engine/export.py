"""Exports: chosen rows with all their columns plus diagnostics, or every row's diagnostics."""

from __future__ import annotations

import functools
import threading
from collections.abc import Collection, Generator, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl
import pyarrow as pa

from triage._typing import ALL_ROWS
from triage.core.design import STATUS_DOMAIN, STATUS_MISSING, STATUS_UNSEEN, STATUS_USED
from triage.core.filter import parse_filter
from triage.data.export import StreamingExport, write_frame
from triage.data.source import ROW_INDEX
from triage.engine.passes import (
    batch_rows_for,
    design_batches,
    diagnose_rows,
    fit_model,
    passes_of_two,
    run_report,
)
from triage.engine.progress import ProgressTracker
from triage.engine.workers import map_in_order, stream_parts_in_order
from triage.results.fit import DataSummary, FitOutcome

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from triage._typing import Criterion, RowsToRead, Sampling
    from triage.core.spec import ModelSpec
    from triage.data.source import Source
    from triage.engine.passes import PassEngine
    from triage.engine.progress import ProgressCallback
    from triage.results.diagnostics import RowDiagnostics

DIAGNOSTIC_COLUMNS: tuple[str, ...] = (
    "row",
    "fitted",
    "resid",
    "studentized",
    "leverage",
    "cooks",
)
"""Columns an export adds; `row` is the 0-based position in the source."""


def diagnostics_frame(diagnostics: RowDiagnostics, *, prefix: str = "") -> pl.DataFrame:
    """Turn per-row diagnostics into a frame with the `DIAGNOSTIC_COLUMNS` (optionally prefixed).

    Cook's distance is left empty (null) for a row outside the fit: it measures the pull of
    a row on a fit it is part of, so it has no value there.
    """
    values = {
        "row": diagnostics.rows,
        "fitted": diagnostics.fitted,
        "resid": diagnostics.resid,
        "studentized": diagnostics.studentized,
        "leverage": diagnostics.leverage,
        "cooks": pl.Series(diagnostics.cooks).scatter(np.flatnonzero(~diagnostics.in_fit), None),
    }
    return pl.DataFrame({prefix + name: values[name] for name in DIAGNOSTIC_COLUMNS})


def rows_with_diagnostics(
    source: Source,
    outcome: FitOutcome,
    positions: Sequence[int],
    *,
    exclude_rows: Collection[int] = (),
    fit_number: int | None = None,
) -> pl.DataFrame:
    """Read the rows at `positions` (all columns, in that order) and join their diagnostics.

    Beside the `DIAGNOSTIC_COLUMNS`, `in_fit` says whether the fit used the row (see
    `diagnose_rows`: a row outside it is scored as a new observation, with no Cook's
    distance), and `fit` names the fit by its number when one is given. A diagnostic column
    whose name is already taken by the data gets the prefix `triage_`.
    """
    frame, diagnostics = diagnose_rows(source, outcome, positions, exclude_rows=exclude_rows)
    added = [*DIAGNOSTIC_COLUMNS, "in_fit", "fit"]
    prefix = "triage_" if set(frame.columns) & set(added) else ""
    extra = diagnostics_frame(diagnostics, prefix=prefix).with_columns(
        pl.Series(prefix + "in_fit", diagnostics.in_fit)
    )
    joined = frame.join(extra, left_on=ROW_INDEX, right_on=prefix + "row", how="left")
    joined = joined.with_columns(pl.col(prefix + "in_fit").fill_null(value=False))
    if fit_number is not None:
        joined = joined.with_columns(pl.lit(fit_number, dtype=pl.Int64).alias(prefix + "fit"))
    return joined.rename({ROW_INDEX: prefix + "row"})


def export_rows(
    source: Source,
    outcome: FitOutcome,
    positions: Sequence[int],
    out: str | Path,
    *,
    force: bool = False,
    exclude_rows: Collection[int] = (),
    fit_number: int | None = None,
    note: str | None = None,
) -> Path:
    """Write the rows at `positions` with all their columns plus diagnostics to `out`.

    `note` (one line saying which fit scored the rows) goes into the file's metadata, or a
    sidecar note for CSV; see `write_frame`.
    """
    frame = rows_with_diagnostics(
        source, outcome, positions, exclude_rows=exclude_rows, fit_number=fit_number
    )
    return write_frame(frame, out, force=force, protected=(*source.files, source.path), note=note)


def export_worst_rows(
    source: Source,
    spec: ModelSpec,
    out: str | Path,
    *,
    k: int,
    criterion: Criterion = "cooks",
    rows: RowsToRead = ALL_ROWS,
    seed: int = 0,
    sampling: Sampling = "groups",
    force: bool = False,
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: PassEngine | None = None,
    note: str | None = None,
) -> tuple[Path, int, DataSummary]:
    """Fit, rank rows by `criterion`, and write the `k` worst.

    Every row is ranked by default (`rows=ALL_ROWS`); a list handed on should not depend on a
    sample. `note` says which fit scored the rows (see `export_rows`). Returns the path, the
    number of rows written and the rows ranked.
    """
    report = run_report(
        source,
        spec,
        rows=rows,
        seed=seed,
        sampling=sampling,
        top_k=k,
        on_progress=on_progress,
        cancel=cancel,
        engine=engine,
    )
    positions = [entry.row for entry in report.diagnostics.worst[criterion]]
    written = export_rows(source, report.outcome, positions, out, force=force, note=note)
    return written, len(positions), report.outcome.data


STATUS_FILTERED: Final = "removed by the filter"
"""Status of a row the model's `--where` filter leaves out."""
STATUS_MARKED: Final = "left out by a mark"
"""Status of a row the user marked to leave out of the fit."""
STATUS_NOT_SAMPLED: Final = "not in the sample"
"""Status of a usable row outside the sample a sample fit used (scored, not fitted)."""


_STATUSES: Final = (
    STATUS_USED,
    STATUS_MISSING,
    STATUS_UNSEEN,
    STATUS_DOMAIN,
    STATUS_FILTERED,
    STATUS_MARKED,
    STATUS_NOT_SAMPLED,
)
"""Every status an `export --all` line can have; a batch holds them as codes into this."""


def _code(status: str) -> int:
    return _STATUSES.index(status)


# Arrow columns are made from numpy buffers: `pyarrow.array` on a numpy array imports pandas
# to check for its types, 0.22 CPU-s of an export.


def _number_column(
    values: NDArray[np.float64] | NDArray[np.int64], valid: NDArray[np.bool_] | None = None
) -> pa.Array:
    """Make an arrow column of `values`, null where not `valid` (none by default)."""
    validity = (
        None
        if valid is None or bool(valid.all())
        else pa.py_buffer(np.packbits(valid, bitorder="little"))
    )
    kind = pa.int64() if values.dtype == np.int64 else pa.float64()
    data = pa.py_buffer(np.ascontiguousarray(values))
    return pa.Array.from_buffers(kind, values.size, [validity, data])


def _text_column(codes: NDArray[np.uint8], texts: Sequence[str]) -> pa.Array:
    """Make an arrow text column holding ``texts[code]`` for each of `codes`."""
    encoded = [text.encode("utf-8") for text in texts]
    offsets = np.zeros(len(encoded) + 1, dtype=np.int64)
    np.cumsum([len(text) for text in encoded], out=offsets[1:])
    buffers = [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
    dictionary = pa.Array.from_buffers(pa.large_string(), len(encoded), buffers)
    indices = pa.Array.from_buffers(pa.uint8(), codes.size, [None, pa.py_buffer(codes)])
    return pa.DictionaryArray.from_arrays(indices, dictionary).dictionary_decode()


_SCORED_ROW_BYTES: Final = 64
"""Bytes of a row of an `export --all` table, about: six numbers and a short status."""
_SCORED_AHEAD_BYTES: Final = 64 << 20
"""Bytes of scored tables the parts after the one being written may hold, all together.

A worker goes on with the next part while the one before it is written; about one part
(a row group of 1,000,000 rows) held ahead keeps two workers busy.
"""


def _status_tables(
    source: Source,
    outcome: FitOutcome,
    *,
    exclude_rows: Collection[int] = (),
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
) -> Iterator[tuple[pa.Table, NDArray[np.int64]]]:
    """Yield every row of the source, in order, with its status and, where scored, diagnostics.

    Each table holds a batch's rows with `row`, `status` and the other `DIAGNOSTIC_COLUMNS`
    (null where not scored; Cook's distance also outside the fit), beside the number of its
    rows of each of `_STATUSES`. The status is the first reason that applies, in the order
    the fit counts them: removed by the filter, left out by a mark, a missing value, a level
    not in the fit, outside a transform's domain; else ``used`` (or, after a sample fit,
    ``not in the sample``).
    """
    from triage.core.row_values import row_diagnostics

    spec, builder = outcome.spec, outcome.builder
    columns = list(spec.source_columns())
    where = parse_filter(spec.where, source.schema()) if spec.where else None
    marked = np.fromiter(sorted(set(exclude_rows)), dtype=np.int64)
    sampled = None if outcome.data.is_full_pass else outcome.sample[ROW_INDEX].to_numpy()
    tracker = ProgressTracker(source.row_count(), on_progress=on_progress, cancel=cancel)
    # Categoricals stay level codes (they need an intercept), so a batch is sized by the
    # columns it reads; a batch built dense is cut into pieces by the design's width.
    use_codes = outcome.fit.has_intercept
    step = batch_rows_for(len(columns) if use_codes else len(builder.column_names) + 2)
    status_enum = pl.Enum(_STATUSES)

    def score(frame: pl.DataFrame) -> tuple[pa.Table, NDArray[np.int64]]:
        # Statuses as codes and masks, the columns as arrow arrays made from numpy: strings,
        # joins and per-batch counts in polars cost the main thread 0.5 CPU-s on 2M rows.
        rows = frame.get_column(ROW_INDEX).to_numpy()
        status = builder.row_status(frame).cast(status_enum).to_physical()
        codes = status.to_numpy().astype(np.uint8)  # a copy: the overrides are written into it
        scored = codes == _code(STATUS_USED)
        overrides: list[tuple[NDArray[np.bool_], str]] = []
        if where is not None:
            kept = frame.select(where.fill_null(value=False)).to_series().to_numpy()
            overrides.append((~kept, STATUS_FILTERED))
        if marked.size:
            overrides.append((np.isin(rows, marked), STATUS_MARKED))
        for mask, _ in overrides:
            scored &= ~mask
        in_fit = scored if sampled is None else scored & np.isin(rows, sampled)
        scores, places = [], []
        for design in design_batches(builder, frame.filter(pl.Series(scored)), use_codes=use_codes):
            # positions increase in a batch: a scored row's place is found by binary search
            place = np.searchsorted(rows, design.rows)
            scores.append(row_diagnostics(outcome.fit, design, in_fit[place]))
            places.append(place)
        at = np.concatenate(places)
        built = np.zeros(rows.size, dtype=np.bool_)
        built[at] = True
        # a row `build` left out after all (design values too large for float64)
        overrides.append((scored & ~built, STATUS_DOMAIN))
        overrides.append((scored & ~in_fit, STATUS_NOT_SAMPLED))
        for mask, text in reversed(overrides):  # the first that applies wins
            codes[mask] = _code(text)

        def spread(name: str) -> NDArray[np.float64]:
            values: NDArray[np.float64] = np.concatenate([getattr(d, name) for d in scores])
            if at.size == rows.size:  # every row scored, in order
                return values
            spread_out = np.full(rows.size, np.nan)
            spread_out[at] = values
            return spread_out

        arrays = {
            "row": _number_column(rows),
            "status": _text_column(codes, _STATUSES),
            **{name: _number_column(spread(name), built) for name in DIAGNOSTIC_COLUMNS[1:-1]},
            "cooks": _number_column(spread("cooks"), built & in_fit),
        }
        names = ["row", "status", *DIAGNOSTIC_COLUMNS[1:]]
        table = pa.Table.from_arrays([arrays[name] for name in names], names=names)
        return table, np.bincount(codes, minlength=len(_STATUSES))

    parts = source.scan_parts(columns, batch_rows=step)
    if len(parts) < 2:  # one stream: read here, scored on the workers

        def frames() -> Iterator[pl.DataFrame]:
            for batch in source.scan_batches(columns, batch_rows=step):
                tracker.advance(batch.rows_read)
                yield batch.frame

        yield from map_in_order(frames(), score)
        return
    # Parts are read and scored on the workers, and their tables handed on in source order.
    rows_read = [0] * len(parts)

    def scored_part(k: int) -> Generator[tuple[pa.Table, NDArray[np.int64]], None, None]:
        for batch in parts[k]():
            rows_read[k] = batch.rows_read
            yield score(batch.frame)

    def report() -> None:
        tracker.advance(sum(rows_read))

    yield from stream_parts_in_order(
        [functools.partial(scored_part, k) for k in range(len(parts))],
        ahead=max(1, _SCORED_AHEAD_BYTES // (step * _SCORED_ROW_BYTES)),
        wait=report,
    )
    tracker.advance(sum(rows_read), force=True)


def export_all_rows(
    source: Source,
    spec: ModelSpec,
    out: str | Path,
    *,
    rows: RowsToRead = ALL_ROWS,
    seed: int = 0,
    sampling: Sampling = "groups",
    force: bool = False,
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: PassEngine | None = None,
    note: str | None = None,
) -> tuple[Path, dict[str, int]]:
    """Fit (on every row by default, or a sample), then write one line per source row to `out`.

    Each line holds the row's position, its `status` (``used`` or why the fit left it out)
    and, where the model scored it, the `DIAGNOSTIC_COLUMNS`. Memory stays bounded: a few
    batches a worker are held at a time. `note` says which fit scored the rows (see `export_rows`).
    Progress counts each row once per pass and says which pass it is ("pass 2 of 2").
    Returns the path and the number of rows of each status.
    With a cluster `engine`, the fit over every row runs on the cluster and only the fit
    comes back; the rows are then read and written here, next to the output, so no row
    crosses the network.
    """
    as_pass_of_two = passes_of_two(on_progress)
    outcome = fit_model(
        source,
        spec,
        rows=rows,
        seed=seed,
        sampling=sampling,
        on_progress=as_pass_of_two(1),
        cancel=cancel,
        engine=engine,
    )
    total = np.zeros(len(_STATUSES), dtype=np.int64)
    protected = (*source.files, source.path)
    # statistics of `row` only: a reader finds a row's group by them; those of the other
    # columns cost a fifth of the writing and no reader of the file skips groups by them
    with StreamingExport(
        out, force=force, protected=protected, note=note, statistics=("row",)
    ) as sink:
        for table, batch_counts in _status_tables(
            source, outcome, on_progress=as_pass_of_two(2), cancel=cancel
        ):
            sink.write(table)
            total += batch_counts
    counts = {status: int(n) for status, n in zip(_STATUSES, total, strict=True) if n}
    return sink.path, counts
