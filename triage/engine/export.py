"""Exports: chosen rows with all their columns plus diagnostics, or every row's diagnostics."""

from __future__ import annotations

import threading
from collections.abc import Collection, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import polars as pl

from triage.data.export import StreamingExport, write_frame
from triage.data.source import ROW_INDEX
from triage.engine.passes import (
    DEFAULT_SAMPLE_ROWS,
    FitOutcome,
    diagnose_rows,
    fit_model,
    iter_row_diagnostics,
    run_report,
)

if TYPE_CHECKING:
    from triage._typing import Criterion, SampleDesign
    from triage.core.diagnostics import RowDiagnostics
    from triage.core.spec import ModelSpec
    from triage.data.source import Source
    from triage.engine.cluster import ClusterEngine
    from triage.engine.progress import ProgressCallback

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
    """Turn per-row diagnostics into a frame with the `DIAGNOSTIC_COLUMNS` (optionally prefixed)."""
    values = {
        "row": diagnostics.rows,
        "fitted": diagnostics.fitted,
        "resid": diagnostics.resid,
        "studentized": diagnostics.studentized,
        "leverage": diagnostics.leverage,
        "cooks": diagnostics.cooks,
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
    rows: int | None = DEFAULT_SAMPLE_ROWS,
    seed: int = 0,
    design: SampleDesign = "groups",
    by: Sequence[str] = (),
    force: bool = False,
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: ClusterEngine | None = None,
) -> tuple[Path, int]:
    """Fit, rank rows by `criterion`, and write the `k` worst; return the path and row count."""
    report = run_report(
        source,
        spec,
        rows=rows,
        seed=seed,
        design=design,
        top_k=k,
        by=by,
        on_progress=on_progress,
        cancel=cancel,
        engine=engine,
    )
    positions = [entry.row for entry in report.diagnostics.worst[criterion]]
    return export_rows(source, report.outcome, positions, out, force=force), len(positions)


def export_all_rows(
    source: Source,
    spec: ModelSpec,
    out: str | Path,
    *,
    rows: int | None = DEFAULT_SAMPLE_ROWS,
    seed: int = 0,
    design: SampleDesign = "groups",
    force: bool = False,
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: ClusterEngine | None = None,
) -> tuple[Path, int]:
    """Fit (on a sample or every row), then stream every row's diagnostics to `out`.

    Memory stays bounded: one batch of diagnostics is held at a time. With a cluster
    `engine`, the fit over every row runs on the cluster and only the fit comes back; the
    rows are then read and written here, next to the output, so no row crosses the network.
    """
    outcome = fit_model(
        source,
        spec,
        rows=rows,
        seed=seed,
        design=design,
        on_progress=on_progress,
        cancel=cancel,
        engine=engine,
    )
    n_rows = 0
    with StreamingExport(out, force=force, protected=(*source.files, source.path)) as sink:
        for diagnostics in iter_row_diagnostics(
            source, outcome, on_progress=on_progress, cancel=cancel
        ):
            sink.write(diagnostics_frame(diagnostics))
            n_rows += len(diagnostics.rows)
    return sink.path, n_rows
