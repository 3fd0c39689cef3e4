"""Passes over a source: the fit (pass 1) and the residual diagnostics (pass 2).

The engine never sees Textual: it takes a progress callback and a `threading.Event` for
cancel, checks the event between batches, and raises `PassCancelled` within one batch.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import os
import threading
import time
from collections.abc import Callable, Collection, Generator, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol, TypeVar

import numpy as np
import polars as pl

from triage._typing import ALL_ROWS
from triage.core.column_figures import ColumnFiguresAccumulator
from triage.core.design import (
    MIN_BLOCK_ROWS,
    CodedBatch,
    DesignBatch,
    DesignBudget,
    DesignBuilder,
    OpenBatch,
    OpenLevelDesign,
)
from triage.core.filter import parse_filter
from triage.core.indicator_terms import IndicatorRows, count_indicator_rows, indicator_parts
from triage.core.levels import LevelCounter
from triage.core.limits import check_column_values, check_factor_scale
from triage.core.lsq import OpenLevelAccumulator, QRAccumulator, UncertifiedGram
from triage.data.source import ROW_INDEX
from triage.engine.allocator import keep_batch_memory
from triage.engine.progress import ProgressCallback, ProgressTracker, ReadAhead
from triage.engine.workers import fold_in_order, pass_workers
from triage.errors import DataError, TriageError
from triage.results.fit import ColumnFigures, DataSummary, FitOutcome, ReportOutcome
from triage.results.progress import PassProgress

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from triage._typing import RowsToRead, Sampling
    from triage.core.indicator_terms import IndicatorLevel
    from triage.core.levels import FoundLevels, LevelTable
    from triage.core.lsq import LinearFit
    from triage.core.spec import ModelSpec
    from triage.data.source import Batch, Sample, Source
    from triage.results.diagnostics import Diagnostics, RowDiagnostics

S = TypeVar("S")

DEFAULT_SAMPLE_ROWS = 200_000
"""Rows in a quick fit's sample."""

LEARNING_SAMPLE_ROWS = 200_000
"""Rows kept before a full pass to learn category levels and chart bin edges.

The sample is drawn as asked (whole row groups at random, or uniform rows); when it comes
back larger, as one 1,000,000-row group does, a full pass keeps this many of its rows spread
evenly through it. Holding the whole group through both passes cost a numeric-30 report
on 2M rows about 80 MiB of peak memory and 0.4-0.8 CPU-s (chart edges from 1,000,000 rows),
medians of three measured here.
"""

BATCH_ROWS = 262_144
"""Most rows per batch of a streamed pass."""

BATCH_VALUES = 2_621_440
"""Values (rows times columns read) per batch, so wide models get shorter batches.

Measured here on 20 million rows: 8 predictors fitted in 5.2 s with 65,536-row batches
and 4.1 s with 262,144; with 30 predictors 262,144-row batches raised peak memory from
1.0 to 1.5 GB for a 10% gain, so a batch holds about this many values instead.
"""


FIT_BATCH_VALUES = 8_388_608
"""Values per batch of a fit's pass (pass 1), which keeps little of a batch besides its columns.

Measured here on 20 million rows of 30 predictors in row groups of 1,000,000: 5.9 s and 477
MiB peak with `BATCH_VALUES` (batches of 62,500 rows), 5.0 s and 725 MiB with these (250,000).
"""


MEMORY_SHARE = 0.5
"""Share of the machine's memory (or of the process's address-space limit) a design may take."""


def default_memory_limit() -> int:
    """Bytes a design may take by default: `MEMORY_SHARE` of the machine's memory.

    A lower address-space or data limit on the process (``ulimit -v``, ``-d``) counts instead.
    """
    import resource

    total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    for kind in (resource.RLIMIT_AS, resource.RLIMIT_DATA):
        soft, _ = resource.getrlimit(kind)
        if soft != resource.RLIM_INFINITY:
            total = min(total, soft)
    return int(total * MEMORY_SHARE)


def batch_rows_for(n_columns: int, values: int = BATCH_VALUES) -> int:
    """Rows per batch when reading `n_columns` columns: a power of two, 4,096 to `BATCH_ROWS`."""
    rows = max(values // max(n_columns, 1), MIN_BLOCK_ROWS)
    return min(BATCH_ROWS, 1 << (rows.bit_length() - 1))


def dense_pieces(
    builder: DesignBuilder, frame: pl.DataFrame, values: int = BATCH_VALUES
) -> Iterator[pl.DataFrame]:
    """Cut `frame` so that each piece's design, written out whole, holds about `values` values.

    A batch is sized by the columns it reads; a categorical of many levels makes its design
    far wider, so a batch written out with its indicators (when the level codes cannot be
    used) is cut into pieces, as `DesignBudget` assumes.
    """
    step = batch_rows_for(len(builder.column_names) + 2, values)
    if frame.height <= step:
        yield frame
        return
    yield from frame.iter_slices(step)


@dataclass
class RowCounts:
    """Row counts gathered while building design batches."""

    read: int = 0
    kept_by_filter: int = 0
    missing: int = 0
    domain: int = 0
    unseen: int = 0
    excluded: int = 0
    used: int = 0

    def add(self, batch: DesignBatch | CodedBatch | OpenBatch) -> None:
        """Count the rows a design batch kept and dropped."""
        self.missing += batch.n_dropped_missing
        self.domain += batch.n_dropped_domain
        self.unseen += batch.n_dropped_unseen_level
        self.used += batch.n_rows

    def absorb(self, part: RowCounts) -> None:
        """Add the counts gathered by one part of a split pass."""
        self.read += part.read
        self.kept_by_filter += part.kept_by_filter
        self.excluded += part.excluded
        self.missing += part.missing
        self.domain += part.domain
        self.unseen += part.unseen
        self.used += part.used


KEEP_FRAMES_BYTES = 128 * 1024 * 1024
"""Bytes of pass 1's decoded frames a report keeps in memory for pass 2 (never on disk).

Up to this, pass 2 folds the frames pass 1 decoded instead of reading the file again; past
it they are let go as soon as the budget is reached and pass 2 reads again. About a million
rows of 6 numeric and 3 text columns fit. Measured here on 2 million such rows (weights, 476
design columns): keeping them (with a 256 MiB budget) saved 1.2 of 11 CPU-s and raised the
report's peak from 858 to 1,189 MB, so the budget stays well under the 1 GiB a pass aims at.
"""


class KeptFrames:
    """Pass 1's frames, kept by unit for pass 2 while they fit in `budget_bytes`.

    Frames are added from worker threads; once the budget is passed, everything kept is let
    go and the pass that follows reads the source again.
    """

    def __init__(self, budget_bytes: int) -> None:
        self.budget_bytes = budget_bytes
        self.is_recording = True
        self.is_complete = True
        self._units: dict[int, list[pl.DataFrame]] = {}
        self._bytes = 0
        self._lock = threading.Lock()

    def add(self, unit: int, frame: pl.DataFrame) -> None:
        """Keep `frame` as the next frame of `unit`, unless the budget is passed."""
        size = int(frame.estimated_size())
        with self._lock:
            if not self.is_complete:
                return
            if self._bytes + size > self.budget_bytes:
                self.is_complete = False
                self._units.clear()
                return
            self._units.setdefault(unit, []).append(frame)
            self._bytes += size

    def units(self) -> list[list[pl.DataFrame]]:
        """Return the kept frames of each unit, in unit order."""
        return [self._units[k] for k in sorted(self._units)]


class PassEngine(Protocol):
    """Runs the parts of a full pass somewhere else (a cluster): a part in, accumulators out.

    `triage.engine.cluster.ClusterEngine` is the one there is.
    """

    part_rows: int | None
    """Least rows in a part, or None for the source's own default."""

    def fold_parts(
        self,
        parts: Sequence[Callable[[], Iterator[Batch]]],
        new_part: Callable[[], S],
        fold: Callable[[S, pl.DataFrame], None],
        merge: Callable[[S, S], S],
        *,
        marked: NDArray[np.int64] | None,
        tracker: ProgressTracker,
    ) -> tuple[S, RowCounts]:
        """Fold every part with `fold_part` and merge them as `fold_in_order` would."""
        ...


def drop_marked_rows(
    frame: pl.DataFrame, marked: NDArray[np.int64], counts: RowCounts
) -> pl.DataFrame:
    """Leave out the rows at the sorted source positions `marked`, counting them."""
    if marked.size == 0:
        return frame
    keep = ~np.isin(frame[ROW_INDEX].to_numpy(), marked)
    counts.excluded += int(frame.height - keep.sum())
    return frame.filter(pl.Series(keep))


def counted_frames(
    batches: Iterable[Batch], counts: RowCounts, marked: NDArray[np.int64] | None
) -> Iterator[pl.DataFrame]:
    """Yield the frames of `batches`, counting their rows and leaving out `marked` ones."""
    for batch in batches:
        counts.read = batch.rows_read
        counts.kept_by_filter += batch.frame.height
        yield batch.frame if marked is None else drop_marked_rows(batch.frame, marked, counts)


def fold_part(
    read_part: Callable[[], Iterator[Batch]],
    state: S,
    fold: Callable[[S, pl.DataFrame], None],
    counts: RowCounts,
    *,
    marked: NDArray[np.int64] | None,
    check: Callable[[], None] = lambda: None,
    stopping: threading.Event | None = None,
    keep: Callable[[pl.DataFrame], None] | None = None,
) -> S:
    """Read one part of a source and fold its frames into `state`, counting its rows.

    This is the whole of a part's work, on a worker thread or on a cluster worker: a part
    in, an accumulator out. `marked` rows are left out (None keeps them); `check` runs
    before each batch (a cancel); a set `stopping` ends the part early; `keep`, if given,
    receives each folded frame (a report keeps them for pass 2, `KeptFrames`).
    """
    for frame in counted_frames(read_part(), counts, marked):
        if stopping is not None and stopping.is_set():
            break
        check()
        fold(state, frame)
        if keep is not None:
            keep(frame)
    return state


def fold_each_frame(
    frames: Iterable[pl.DataFrame],
    new_part: Callable[[], S],
    fold: Callable[[S, pl.DataFrame], None],
    merge: Callable[[S, S], S],
    *,
    wait: Callable[[], None],
    keep: Callable[[int, pl.DataFrame], None] | None = None,
    n_workers: int | None = None,
) -> S:
    """Fold each frame into a part of its own on worker threads; merge them in frame order.

    This is how a pass over a source of one part (a stream) folds, here or on a cluster
    worker, so both give the same bits. `keep`, if given, receives each frame and its number.
    """

    def fold_frame(unit: tuple[int, pl.DataFrame], stopping: threading.Event) -> S:
        k, frame = unit
        state = new_part()
        fold(state, frame)
        if keep is not None:
            keep(k, frame)
        return state

    merged = fold_in_order(enumerate(frames), fold_frame, merge, wait=wait, n_workers=n_workers)
    return new_part() if merged is None else merged


class PassPlan:
    """What a pass reads: columns, filter, excluded rows, and where the rows come from.

    With `sample=None` the pass streams every row; otherwise it reads only the sample.
    `engine` runs full passes over split sources on a cluster; None (the default) runs
    them in this process.
    """

    def __init__(
        self,
        source: Source,
        spec: ModelSpec,
        *,
        sample: Sample | None,
        learning_frame: pl.DataFrame,
        exclude_rows: Collection[int] = (),
        extra_columns: Sequence[str] = (),
        engine: PassEngine | None = None,
        column_figures: bool = False,
    ) -> None:
        keep_batch_memory()
        self.engine = engine
        self.column_figures = column_figures
        self.source = source
        self.spec = spec
        self.where = _parse_where(source, spec)
        self.columns = _pass_columns(spec, extra_columns)
        self.exclude = np.fromiter(sorted(set(exclude_rows)), dtype=np.int64)
        self.sample = sample
        self.learning_frame = learning_frame
        self.rows_in_source = source.row_count()
        self._kept: KeptFrames | None = None

    @classmethod
    def read(
        cls,
        source: Source,
        spec: ModelSpec,
        *,
        rows: RowsToRead,
        seed: int,
        sampling: Sampling,
        exclude_rows: Collection[int],
        extra_columns: Sequence[str] = (),
        engine: PassEngine | None = None,
        column_figures: bool = False,
    ) -> PassPlan:
        """Draw the sample (a quick fit's rows, or a full pass's learning rows); plan the pass.

        The sample is read here, in this process, whatever the `engine`.
        """
        sample = source.read_sample(
            _pass_columns(spec, extra_columns),
            n_rows=LEARNING_SAMPLE_ROWS if rows is ALL_ROWS else rows,
            seed=seed,
            sampling=sampling,
            where=_parse_where(source, spec),
            spread_to=LEARNING_SAMPLE_ROWS if rows is ALL_ROWS else None,
        )
        streams = rows is ALL_ROWS and not sample.is_whole
        return cls(
            source,
            spec,
            sample=None if streams else sample,
            learning_frame=sample.frame,
            exclude_rows=exclude_rows,
            extra_columns=extra_columns,
            engine=engine,
            column_figures=column_figures,
        )

    @property
    def is_full_pass(self) -> bool:
        """True when the pass reads every row of the source."""
        return self.sample is None or self.sample.is_whole

    @property
    def folds_whole_source(self) -> bool:
        """True when every row of the source reaches the fold: a full pass, no filter, no marks."""
        return self.is_full_pass and self.where is None and self.exclude.size == 0

    @property
    def figures_schema(self) -> dict[str, pl.DataType] | None:
        """The schema the columns' figures read, or None when this pass folds none.

        Figures are folded only when asked for (`column_figures`) and every row of the
        source reaches the fold; they cost about a fifth of a numeric fit's CPU.
        """
        if not (self.column_figures and self.folds_whole_source):
            return None
        return dict(self.source.schema())

    def _drop_excluded(self, frame: pl.DataFrame, counts: RowCounts) -> pl.DataFrame:
        return drop_marked_rows(frame, self.exclude, counts)

    def frames(
        self,
        counts: RowCounts,
        tracker: ProgressTracker,
        *,
        batch_values: int = BATCH_VALUES,
        columns: Sequence[str] | None = None,
        drop_marked: bool = True,
        part: Callable[[], Iterator[Batch]] | None = None,
    ) -> Generator[pl.DataFrame, None, None]:
        """Yield the filtered frames of the pass, counting rows and reporting progress.

        `columns` reads other columns than the plan's (a first read of the categoricals);
        `drop_marked=False` keeps the rows the user marked; `part` is read in place of
        the whole source (its one part, `Source.scan_parts`).
        """
        columns = self.columns if columns is None else list(columns)
        step = batch_rows_for(len(columns), batch_values)
        if self.sample is None:
            if part is None:
                part = functools.partial(
                    self.source.scan_batches, columns, where=self.where, batch_rows=step
                )
            marked = self.exclude if drop_marked else None
            for frame in counted_frames(ReadAhead(iter(part())), counts, marked):
                tracker.advance(counts.read)
                yield frame
            return
        frame = self.sample.frame
        counts.read = self.sample.rows_read
        counts.kept_by_filter = frame.height
        frame = self._drop_excluded(frame, counts)
        for start in range(0, max(frame.height, 1), step):
            tracker.check()
            yield frame.slice(start, step)
        tracker.advance(self.sample.rows_read, force=True)

    def keep_frames(self, budget_bytes: int | None = None) -> None:
        """Keep the next full pass's frames in memory for later passes, up to `budget_bytes`.

        The budget is `KEEP_FRAMES_BYTES` when not given. When the learning sample's bytes
        per row, times the source's rows, already pass the budget, nothing is kept at all: the
        frames would only raise pass 1's peak memory before being let go.
        """
        if self.sample is not None:
            return
        kept = KeptFrames(KEEP_FRAMES_BYTES if budget_bytes is None else budget_bytes)
        sample = self.learning_frame
        if self.rows_in_source is not None and sample.height > 0:
            expected = sample.estimated_size() / sample.height * self.rows_in_source
            kept.is_complete = expected <= kept.budget_bytes
        self._kept = kept

    @property
    def pass_source(self) -> str:
        """Where a later pass takes its rows from, in words ("" when nothing was kept)."""
        if self._kept is None or self._kept.is_recording:
            return ""
        return "from memory" if self._kept.is_complete else "reading again"

    def _fold_kept(
        self,
        kept: list[list[pl.DataFrame]],
        new_part: Callable[[], S],
        fold: Callable[[S, pl.DataFrame], None],
        merge: Callable[[S, S], S],
        tracker: ProgressTracker,
    ) -> S:
        """Fold the frames an earlier pass kept, unit by unit, as that pass folded them."""
        kept_rows = sum(frame.height for frames in kept for frame in frames)
        total = self.rows_total() or kept_rows
        done = [0]

        def fold_unit(k: int, stopping: threading.Event) -> S:
            state = new_part()
            for frame in kept[k]:
                if stopping.is_set():
                    break
                tracker.check()
                fold(state, frame)
                done[0] += frame.height
            return state

        def report() -> None:
            tracker.advance(total * done[0] // max(kept_rows, 1))

        merged = fold_in_order(range(len(kept)), fold_unit, merge, wait=report)
        tracker.advance(total, force=True)
        return new_part() if merged is None else merged

    def fold_frames(
        self,
        new_part: Callable[[], S],
        fold: Callable[[S, pl.DataFrame], None],
        merge: Callable[[S, S], S],
        counts: RowCounts,
        tracker: ProgressTracker,
        *,
        batch_values: int = BATCH_VALUES,
        columns: Sequence[str] | None = None,
        drop_marked: bool = True,
    ) -> S:
        """Fold the pass's frames into parts on worker threads and merge the parts into one.

        A full pass over a source that splits (`Source.scan_parts`) reads and folds its
        parts at the same time, each in one thread, and merges them in source order
        (`fold_in_order`). Otherwise the frames are read ahead on one thread and each is
        folded by the next free worker into a part of its own; the parts merge in frame
        order. Either way the result depends neither on timing nor on the number of workers.
        With a cluster `engine`, a full pass's parts are folded on its workers instead
        (`ClusterEngine.fold_parts`). `columns` and `drop_marked` are as for `frames`.
        """
        kept = self._kept if columns is None and drop_marked else None
        if kept is not None and not kept.is_recording and kept.is_complete:
            return self._fold_kept(kept.units(), new_part, fold, merge, tracker)
        keep = kept.add if kept is not None and kept.is_recording else None
        try:
            return self._fold_read(
                new_part, fold, merge, counts, tracker, batch_values, columns, drop_marked, keep
            )
        finally:
            if kept is not None:
                kept.is_recording = False

    def _fold_read(
        self,
        new_part: Callable[[], S],
        fold: Callable[[S, pl.DataFrame], None],
        merge: Callable[[S, S], S],
        counts: RowCounts,
        tracker: ProgressTracker,
        batch_values: int,
        columns: Sequence[str] | None,
        drop_marked: bool,
        keep: Callable[[int, pl.DataFrame], None] | None,
    ) -> S:
        """Read and fold the pass's frames (see `fold_frames`), handing each to `keep`.

        A cluster keeps nothing: its parts are folded on other machines.
        """
        columns = self.columns if columns is None else list(columns)
        parts: Sequence[Callable[[], Iterator[Batch]]] = ()
        marked = self.exclude if drop_marked else None
        if self.sample is None:
            parts = self.source.scan_parts(
                columns,
                where=self.where,
                batch_rows=batch_rows_for(len(columns), batch_values),
                part_rows=None if self.engine is None else self.engine.part_rows,
            )
            if self.engine is not None:
                if self._kept is not None:
                    self._kept.is_complete = False
                folded, cluster_counts = self.engine.fold_parts(
                    parts, new_part, fold, merge, marked=marked, tracker=tracker
                )
                counts.absorb(cluster_counts)
                tracker.advance(counts.read, force=True)
                return folded
        if len(parts) < 2:
            with contextlib.closing(
                self.frames(
                    counts,
                    tracker,
                    batch_values=batch_values,
                    columns=columns,
                    drop_marked=drop_marked,
                    part=parts[0] if parts else None,
                )
            ) as frames:
                return fold_each_frame(frames, new_part, fold, merge, wait=tracker.check, keep=keep)
        part_counts = [RowCounts() for _ in parts]

        def fold_unit(k: int, stopping: threading.Event) -> S:
            # a cancel (tracker.check) stops each worker within one batch
            return fold_part(
                parts[k],
                new_part(),
                fold,
                part_counts[k],
                marked=marked,
                check=tracker.check,
                stopping=stopping,
                keep=None if keep is None else functools.partial(keep, k),
            )

        def report() -> None:
            tracker.advance(sum(c.read for c in part_counts))

        merged = fold_in_order(range(len(parts)), fold_unit, merge, wait=report)
        assert merged is not None  # there are at least two parts
        for k_counts in part_counts:
            counts.absorb(k_counts)
        tracker.advance(counts.read, force=True)
        return merged

    def summary(self, counts: RowCounts) -> DataSummary:
        """Describe the rows a finished pass used."""
        sample = None if self.is_full_pass or self.sample is None else self.sample
        return DataSummary(
            source=self.source.description,
            # a CSV has no row count in metadata, but a pass over every row counted them
            rows_in_source=(
                counts.read
                if self.rows_in_source is None and self.is_full_pass
                else self.rows_in_source
            ),
            rows_read=counts.read,
            rows_filtered_out=counts.read - counts.kept_by_filter,
            rows_dropped_missing=counts.missing,
            rows_dropped_domain=counts.domain,
            rows_dropped_unseen_level=counts.unseen,
            rows_excluded=counts.excluded,
            rows_used=counts.used,
            sample=None if sample is None else sample.description,
            sample_warning=None if sample is None else sample.warning,
            is_full_pass=self.is_full_pass,
        )

    def count_levels(
        self, tracker: ProgressTracker, cap: int, specs: Sequence[ModelSpec] = ()
    ) -> dict[str, LevelTable] | None:
        """Count every level of the models' categoricals over every row, or None for a sample.

        A full pass reads only the categorical columns first (the filter's columns too),
        so its design has every level present and never drops a row as unseen. Rows the
        user marked are counted: the coding is that of the rows under the filter. A column
        stops being counted past `cap` levels (it is refused then, whatever its count).
        `specs` are the models of the pass (default: the plan's).
        """
        columns = list(
            dict.fromkeys(
                t.column
                for spec in (specs or (self.spec,))
                for t in spec.terms
                if t.kind == "categorical" and t.column
            )
        )
        if self.sample is not None or not columns:
            return None
        schema = self.source.schema()

        def fold(counter: LevelCounter, frame: pl.DataFrame) -> None:
            counter.update(frame)

        return self.fold_frames(
            lambda: LevelCounter(schema, columns, cap=cap),
            fold,
            LevelCounter.merge,
            RowCounts(),
            tracker,
            batch_values=FIT_BATCH_VALUES,
            columns=columns,
            drop_marked=False,
        ).finalize()

    def count_indicator_rows(
        self, tracker: ProgressTracker, specs: Sequence[ModelSpec] = ()
    ) -> dict[str, IndicatorLevel] | None:
        """Count the rows holding each indicator term's level, or None for a sample.

        None also for a model without an indicator term such as ``depot=north``. The
        learning sample is looked at first: when it holds every level, that is enough.
        Otherwise every row is counted: like `count_levels`, a read of the indicators'
        columns only (and the filter's), marked rows included, so a level found only at the
        end of a sorted file is found, and a level that only rows left out for a missing
        value elsewhere hold is still a level of the column.
        """
        terms = indicator_parts(specs or (self.spec,))
        if self.sample is not None or not terms:
            return None
        schema = self.source.schema()
        in_sample = count_indicator_rows(schema, terms, self.learning_frame)
        if all(held.n_rows for held in in_sample.values()):
            return in_sample  # every level is held: no need to count every row

        def fold(counter: IndicatorRows, frame: pl.DataFrame) -> None:
            counter.update(frame)

        return self.fold_frames(
            lambda: IndicatorRows(schema, terms),
            fold,
            IndicatorRows.merge,
            RowCounts(),
            tracker,
            batch_values=FIT_BATCH_VALUES,
            columns=list(dict.fromkeys(t.column for t in terms if t.column)),
            drop_marked=False,
        ).finalize()

    def budget(self) -> DesignBudget:
        """Return this pass's design memory budget (the spec's `max_memory` or the default)."""
        limit = self.spec.max_memory
        return DesignBudget(
            limit_bytes=limit if limit is not None else default_memory_limit(),
            batch_rows=batch_rows_for(len(self.columns), FIT_BATCH_VALUES),
            n_workers=pass_workers(),
            block_values=FIT_BATCH_VALUES,
        )

    def learn(self, tracker: ProgressTracker) -> DesignBuilder:
        """Learn the design of a sample fit, or of a full pass without categoricals.

        A full pass's indicator terms (``depot=north``) have their rows counted first.
        """
        return DesignBuilder.learn(
            self.spec,
            self.source.schema(),
            self.learning_frame,
            indicator_levels=self.count_indicator_rows(tracker),
            budget=self.budget(),
        )

    def learn_open(self, tracker: ProgressTracker) -> OpenLevelDesign:
        """Learn all of a full pass's design but its categoricals' levels, which it finds."""
        budget = self.budget()
        return OpenLevelDesign.learn(
            self.spec,
            self.source.schema(),
            self.learning_frame,
            cap=min(self.spec.max_levels, budget.max_columns()),
            indicator_levels=self.count_indicator_rows(tracker),
            budget=budget,
        )

    def marked_rows(self, rows_read: int) -> pl.DataFrame:
        """Read the rows the user marked that the filter keeps (their levels count too).

        Positions past the `rows_read` rows of the source mark no row, as in the pass.
        """
        frame = self.source.read_rows(self.exclude[self.exclude < rows_read])
        return frame if self.where is None else frame.filter(self.where)

    def rows_total(self) -> int | None:
        """Rows the pass will read, when known."""
        if self.sample is None:
            return self.rows_in_source
        return self.sample.rows_read


def _parse_where(source: Source, spec: ModelSpec) -> pl.Expr | None:
    return parse_filter(spec.where, source.schema()) if spec.where else None


def _pass_columns(spec: ModelSpec, extra_columns: Sequence[str]) -> list[str]:
    columns = list(spec.source_columns())
    return columns + [c for c in extra_columns if c not in columns]


@contextlib.contextmanager
def naming_values_too_large(builder: DesignBuilder, frame: pl.DataFrame) -> Iterator[None]:
    """Turn a failure of the fit on a batch into an error naming a column too large to fit.

    Values near the float limit overflow the fit's sums of squares, which shows up as a
    floating-point warning or an error about non-finite values; the batch is then built
    again, quietly, to find the column (or target) responsible. Other failures pass as
    they were.
    """
    try:
        yield
    except (DataError, ArithmeticError, RuntimeWarning):
        columns = _design_quietly(builder, frame)
        if columns is not None:
            check_column_values(columns)
        raise


def _design_quietly(builder: DesignBuilder, frame: pl.DataFrame) -> dict[str, np.ndarray] | None:
    """Build `frame`'s design columns and target by label, or None if that fails too."""
    try:
        with np.errstate(all="ignore"):  # numpy's error state is per thread: safe in a worker
            batch = builder.build(frame)
    except (TriageError, ArithmeticError, RuntimeWarning):
        return None
    design = dict(zip(builder.column_names, batch.x.T, strict=True))
    return {**design, builder.spec.target_label: batch.y}


def check_rows_left(
    counts: RowCounts, spec: ModelSpec, rows_read: pl.DataFrame | None = None
) -> None:
    """Raise `DataError`, saying why, when a pass left no rows to fit.

    `rows_read` (the sample, when there is one) lets the message name a model column
    that has no value in any of those rows.
    """
    if counts.used > 0:
        return
    if counts.read == 0:
        msg = (
            f"the data has no rows, so there is nothing to fit `{spec.target_label}` on; "
            "check the file (or the folder's files)"
        )
        raise DataError(msg)
    looked_at = rows_read if rows_read is not None else pl.DataFrame()
    empty = []
    if counts.missing and looked_at.height:
        empty = [c for c in spec.model_columns() if looked_at[c].null_count() == looked_at.height]
    if empty and counts.missing == counts.kept_by_filter - counts.excluded:
        named = ", ".join(f"`{c}`" for c in empty)
        where = (
            f"is missing ({counts.read:,} rows)"
            if looked_at.height >= counts.kept_by_filter
            else f"is missing in the {looked_at.height:,} rows sampled, and every row read "
            "lacks a model value"
        )
        msg = (
            f"every value of {named} {where}; choose another column or check the file "
            "(`--null-value` sets the texts read as missing)"
        )
        raise DataError(msg)
    reasons = []
    if counts.read > counts.kept_by_filter:
        reasons.append(f"{counts.read - counts.kept_by_filter:,} by the filter `{spec.where}`")
    if counts.missing:
        reasons.append(f"{counts.missing:,} for missing values")
    if counts.domain:
        reasons.append(f"{counts.domain:,} outside a transform's domain")
    if counts.excluded:
        reasons.append(f"{counts.excluded:,} marked by you")
    why = "; ".join(reasons) if reasons else "the source has no rows"
    msg = (
        f"no rows left to fit `{spec.target_label}` ({why}); loosen `--where` or check the columns"
    )
    raise DataError(msg)


def fit_model(
    source: Source,
    spec: ModelSpec,
    *,
    rows: RowsToRead = DEFAULT_SAMPLE_ROWS,
    seed: int = 0,
    sampling: Sampling = "groups",
    exclude_rows: Collection[int] = (),
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: PassEngine | None = None,
    column_figures: bool = False,
) -> FitOutcome:
    """Fit `spec` by least squares on a sample of about `rows` rows, or on every row.

    Parameters
    ----------
    source : Source
        Where the rows come from.
    spec : ModelSpec
        The model, already validated against the source's schema.
    rows : int or ALL_ROWS, default=200_000
        Sample size; `ALL_ROWS` streams every row in bounded memory.
    seed : int, default=0
        Seed of the sample.
    sampling : {"groups", "uniform"}, default="groups"
        How the sample is drawn (see `Source.read_sample`).
    exclude_rows : collection of int
        Source positions to leave out (a what-if refit; the file is never changed).
    on_progress, cancel
        Progress callback and cancel event; see `ProgressTracker`.
    engine : PassEngine, optional
        Runs a pass over every row on a cluster; a sample is always fitted here.
    column_figures : bool, default=False
        Fold the model's columns' figures (`FitOutcome.column_figures`) into a pass that
        reads every row of the source, for a screen that shows them.

    Returns
    -------
    FitOutcome

    Raises
    ------
    PassCancelled
        When `cancel` is set; within one batch.
    DataError
        When no rows are left or the data cannot support the fit.
    """
    if rows is ALL_ROWS and not (DesignBuilder.scales_from_sample(spec) or indicator_parts([spec])):
        # Nothing to learn: a full pass skips the sample (0.3 s on a 20-million-row file;
        # 0.16 CPU-s for the 200,000 rows of 6 numbers and 3 text codes measured here). An
        # indicator term's level is looked for in the sample first (`count_indicator_rows`).
        schema = source.schema()
        columns = {c: schema[c] for c in _pass_columns(spec, ())}
        nothing = pl.DataFrame(schema={ROW_INDEX: pl.Int64, **columns})
        plan = PassPlan(
            source,
            spec,
            sample=None,
            learning_frame=nothing,
            exclude_rows=exclude_rows,
            engine=engine,
            column_figures=column_figures,
        )
    else:
        plan = PassPlan.read(
            source,
            spec,
            rows=rows,
            seed=seed,
            sampling=sampling,
            exclude_rows=exclude_rows,
            engine=engine,
            column_figures=column_figures,
        )
    return _fit(plan, on_progress=on_progress, cancel=cancel)


def _fit(
    plan: PassPlan,
    *,
    on_progress: ProgressCallback | None,
    cancel: threading.Event | None,
) -> FitOutcome:
    spec = plan.spec
    tracker = ProgressTracker(plan.rows_total(), on_progress=on_progress, cancel=cancel)
    accumulator: QRAccumulator | None
    if plan.sample is None and any(t.kind == "categorical" for t in spec.terms):
        builder, counts, accumulator, figures = _fit_pass_finding_levels(
            plan, tracker, ProgressTracker(None, cancel=cancel)
        )
    else:
        builder = plan.learn(ProgressTracker(None, cancel=cancel))
        counts, accumulator, figures = _fit_pass(plan, builder, tracker, use_codes=True)
    fit_or_none: LinearFit | None = None
    try:
        if accumulator is not None:
            fit_or_none = _finalize_fit(plan, builder, counts, accumulator)
    except UncertifiedGram:
        # Rare: a design the counts and sums cannot factor to full accuracy (say a rare
        # reference level). The pass runs again with the indicators written out.
        fit_or_none = None
    if fit_or_none is None:
        tracker = ProgressTracker(plan.rows_total(), on_progress=on_progress, cancel=cancel)
        counts, accumulator, figures = _fit_pass(plan, builder, tracker, use_codes=False)
        fit_or_none = _finalize_fit(plan, builder, counts, accumulator)
    summary = plan.summary(counts)
    return FitOutcome(spec, builder, fit_or_none, summary, plan.learning_frame, figures)


FitPart = tuple[QRAccumulator, RowCounts, ColumnFiguresAccumulator | None]
"""What one part of pass 1 folds into: the fit, the row counts, the columns' figures."""


@dataclass
class _FindingPart:
    """One part of a pass that finds its levels: levels, sums by level, rows, column figures."""

    levels: list[FoundLevels]
    sums: OpenLevelAccumulator
    counts: RowCounts
    figures: ColumnFiguresAccumulator | None
    is_finite: bool = True
    """False once a batch's sums passed float64: the rows must be factored written out."""

    def merge(self, other: _FindingPart) -> _FindingPart:
        """Add a later part (its levels join ours in the order found); return self."""
        pairs = zip(self.levels, other.levels, strict=True)
        where = [mine.absorb(theirs) for mine, theirs in pairs]
        self.sums.merge(other.sums, where, [len(found) for found in self.levels])
        self.counts.absorb(other.counts)
        if self.figures is not None and other.figures is not None:
            self.figures.merge(other.figures)
        self.is_finite = self.is_finite and other.is_finite
        return self


def _fit_pass_finding_levels(
    plan: PassPlan, tracker: ProgressTracker, learning: ProgressTracker
) -> tuple[DesignBuilder, RowCounts, QRAccumulator | None, tuple[ColumnFigures, ...]]:
    """Pass 1 of a full pass with categoricals, finding their levels as it goes.

    Each part codes its batches against the levels it has found and keeps its sums by level;
    the parts' levels join when they merge, and the design (references included) is learned
    once every row is read, from the rows under the filter (marked rows too), as a count of
    the levels before the pass would give. The accumulator is None when the sums passed
    float64 (the caller factors the rows written out). Column figures as in `_fit_pass`;
    `learning` reports on what is read before the pass (indicator terms' rows).
    """
    design = plan.learn_open(learning)
    has_intercept = plan.spec.intercept  # the parts go to a cluster's workers without `plan`
    n_dense = len(design.numeric.column_names) - int(has_intercept)
    schema = plan.figures_schema
    source_columns = plan.spec.source_columns()

    def new_part() -> _FindingPart:
        sums = OpenLevelAccumulator(n_dense, has_intercept=has_intercept)
        figures = None if schema is None else ColumnFiguresAccumulator(schema, source_columns)
        return _FindingPart(design.new_levels(), sums, RowCounts(), figures)

    def fold(part: _FindingPart, frame: pl.DataFrame) -> None:
        if part.figures is not None:
            part.figures.update(frame)
        with naming_values_too_large(design.numeric, frame):
            batch = design.build(frame, part.levels)
        part.counts.add(batch)
        n_levels = [len(found) for found in part.levels]
        if not part.sums.update(batch.dense, batch.y, batch.weights, batch.codes, n_levels):
            part.is_finite = False

    counts = RowCounts()
    part = plan.fold_frames(
        new_part, fold, _FindingPart.merge, counts, tracker, batch_values=FIT_BATCH_VALUES
    )
    counts.absorb(part.counts)
    figures = () if part.figures is None else part.figures.finalize()
    if plan.exclude.size:
        marked = design.new_levels()
        design.count(plan.marked_rows(counts.read), marked)
        for found, more in zip(part.levels, marked, strict=True):
            found.absorb(more)
    builder, level_positions = design.finish(part.levels, plan.source.schema(), plan.learning_frame)
    if not part.is_finite:
        return builder, counts, None, figures
    dense_positions, _ = builder.coded_positions
    accumulator = part.sums.to_accumulator(
        len(builder.column_names), dense_positions, level_positions
    )
    return builder, counts, accumulator, figures


def _fit_pass(
    plan: PassPlan, builder: DesignBuilder, tracker: ProgressTracker, *, use_codes: bool
) -> tuple[RowCounts, QRAccumulator, tuple[ColumnFigures, ...]]:
    """Fold every batch of pass 1 into one accumulator; categoricals as codes if `use_codes`.

    When every row of the source reaches the fold, the model's columns' figures (rows,
    missing, low, mean, spread, high) are folded alongside.
    """
    spec = plan.spec
    unshifted = builder.indicator_positions if use_codes else ()
    schema = plan.figures_schema

    def new_part() -> FitPart:
        accumulator = QRAccumulator(
            len(builder.column_names), has_intercept=spec.intercept, unshifted=unshifted
        )
        figures = (
            None if schema is None else ColumnFiguresAccumulator(schema, spec.source_columns())
        )
        return accumulator, RowCounts(), figures

    def fold(part: FitPart, frame: pl.DataFrame) -> None:
        with naming_values_too_large(builder, frame):
            accumulator, part_counts, figures = part
            if figures is not None:
                figures.update(frame)
            columns = builder.build_columns(frame)
            if columns is not None and accumulator.update_columns(columns.predictors, columns.y):
                part_counts.used += columns.n_rows
                return
            coded = builder.build_coded(frame) if use_codes else None
            if coded is not None and accumulator.update_coded(coded.design, coded.y, coded.weights):
                part_counts.add(coded)
                return
            # Rows to drop (nulls, NaN, levels, domain) or weights: the batch's full build.
            for piece in dense_pieces(builder, frame, FIT_BATCH_VALUES):
                batch = builder.build(piece)
                part_counts.add(batch)
                accumulator.update(batch.x, batch.y, batch.weights)

    def merge(part: FitPart, other: FitPart) -> FitPart:
        part[0].merge(other[0])
        part[1].absorb(other[1])
        if part[2] is not None and other[2] is not None:
            part[2].merge(other[2])
        return part

    counts = RowCounts()
    accumulator, design_counts, figures = plan.fold_frames(
        new_part, fold, merge, counts, tracker, batch_values=FIT_BATCH_VALUES
    )
    counts.absorb(design_counts)
    return counts, accumulator, () if figures is None else figures.finalize()


def _finalize_fit(
    plan: PassPlan, builder: DesignBuilder, counts: RowCounts, accumulator: QRAccumulator
) -> LinearFit:
    """Check the rows left and solve; raises `UncertifiedGram` when codes cannot be factored."""
    spec = plan.spec
    check_rows_left(counts, spec, plan.learning_frame)
    n_coefficients = len(builder.column_names)
    if counts.used < n_coefficients:
        msg = (
            f"the model has {n_coefficients} coefficients but only {counts.used:,} usable rows; "
            "drop terms, loosen `--where`, or use more rows (`--rows`)"
        )
        raise DataError(msg)
    check_factor_scale(accumulator.factor, builder.column_names, spec.target_label)
    fit = accumulator.finalize(builder.column_names)
    if not fit.tss > 0:
        msg = (
            f"the target `{spec.target_label}` does not vary over the {counts.used:,} rows used, "
            "so there is nothing to explain; check the column or the filter"
        )
        raise DataError(msg)
    return fit


def run_report(
    source: Source,
    spec: ModelSpec,
    *,
    rows: RowsToRead = DEFAULT_SAMPLE_ROWS,
    seed: int = 0,
    sampling: Sampling = "groups",
    exclude_rows: Collection[int] = (),
    top_k: int = 20,
    by: Sequence[str] = (),
    is_ordered: bool = False,
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    on_fit: Callable[[FitOutcome], None] | None = None,
    engine: PassEngine | None = None,
    column_figures: bool = False,
) -> ReportOutcome:
    """Fit `spec` (pass 1), then compute residual diagnostics on the same rows (pass 2).

    Parameters are those of `fit_model`, plus `top_k` (rows kept per worst-row list), `by`
    (columns to break residuals down by) and `is_ordered` (rows are in a meaningful order,
    so serial-correlation flags apply). Progress counts each row once per pass and says which
    pass it is ("pass 2 of 2"); its time left covers both passes. `on_fit`, if given,
    receives the fit as soon as pass 1 ends, so a screen can show it while pass 2 runs. With
    a cluster `engine`, pass 2 ships the fit (a few kilobytes) to the workers, never rows.
    """
    _check_segment_columns(source, spec, by)
    plan = PassPlan.read(
        source,
        spec,
        rows=rows,
        seed=seed,
        sampling=sampling,
        exclude_rows=exclude_rows,
        extra_columns=by,
        engine=engine,
        column_figures=column_figures,
    )
    as_pass_of_two = passes_of_two(on_progress, pass_source=lambda: plan.pass_source)
    plan.keep_frames()
    outcome = _fit(plan, on_progress=as_pass_of_two(1), cancel=cancel)
    if on_fit is not None:
        on_fit(outcome)
    diagnostics = _diagnose(
        plan,
        outcome,
        top_k=top_k,
        by=by,
        is_ordered=is_ordered,
        on_progress=as_pass_of_two(2),
        cancel=cancel,
    )
    return ReportOutcome(outcome, diagnostics)


def passes_of_two(
    on_progress: ProgressCallback | None, *, pass_source: Callable[[], str] = str
) -> Callable[[int], ProgressCallback | None]:
    """Return a maker of callbacks that report a pass as pass `number` of two (see `_pass_of_two`).

    Time counts from this call; `pass_source` says, as pass 2 reports, where its rows come from.
    """
    started = time.perf_counter()

    def as_pass_of_two(number: int) -> ProgressCallback | None:
        if on_progress is None:
            return None
        callback = on_progress

        def report(progress: PassProgress) -> None:
            elapsed = time.perf_counter() - started
            callback(_pass_of_two(progress, number, elapsed, pass_source()))

        return report

    return as_pass_of_two


def _pass_of_two(
    progress: PassProgress, number: int, elapsed_s: float, pass_source: str = ""
) -> PassProgress:
    """Label one pass's progress as pass `number` of two; the time left covers both passes.

    Rows are counted once per pass, at this pass's speed; before pass 2 starts its rows are
    assumed to go as fast as pass 1's. `elapsed_s` counts from the start of the first pass.
    """
    eta = progress.eta_s
    if eta is not None and number == 1 and progress.rows_per_s > 0 and progress.rows_total:
        eta += progress.rows_total / progress.rows_per_s
    return PassProgress(
        progress.rows_done,
        progress.rows_total,
        elapsed_s,
        progress.rows_per_s,
        eta,
        pass_number=number,
        n_passes=2,
        pass_source=pass_source if number > 1 else "",
    )


def _check_segment_columns(source: Source, spec: ModelSpec, by: Sequence[str]) -> None:
    from triage.core.filter import closest_names_hint
    from triage.errors import SpecError

    schema = source.schema()
    for column in by:
        if column not in schema:
            msg = f"unknown column `{column}` in `--by`{closest_names_hint(column, schema)}"
            raise SpecError(msg)


def _diagnose(
    plan: PassPlan,
    outcome: FitOutcome,
    *,
    top_k: int,
    by: Sequence[str],
    is_ordered: bool,
    on_progress: ProgressCallback | None,
    cancel: threading.Event | None,
) -> Diagnostics:
    from triage.core.binning import edge_sample
    from triage.core.diagnostics import DiagnosticsAccumulator
    from triage.core.diagnostics_config import DiagnosticsConfig, default_config

    builder, fit = outcome.builder, outcome.fit
    # Coded batches keep the indicators as level codes; they need an intercept.
    codes = builder.indicator_positions if fit.has_intercept else ()
    predictors = builder.numeric_predictors
    sample_fitted, sample = _usable_sample(
        builder, fit, plan.learning_frame, [*predictors, *by], use_codes=bool(codes)
    )
    config = default_config(
        fit,
        sample_fitted=sample_fitted,
        sample_predictors={c: edge_sample(sample[c].to_numpy()) for c in predictors},
        segment_columns=tuple(by),
        sample_segments={c: sample[c] for c in by},
        top_k=top_k,
        is_ordered=is_ordered,
    )

    def run(indicators: Sequence[int], config: DiagnosticsConfig) -> Diagnostics:
        def fold(accumulator: DiagnosticsAccumulator, frame: pl.DataFrame) -> None:
            for batch in design_batches(builder, frame, use_codes=bool(indicators)):
                if batch.n_rows:
                    accumulator.update(batch)

        def new_part() -> DiagnosticsAccumulator:
            return DiagnosticsAccumulator(fit, config, indicators=indicators)

        tracker = ProgressTracker(plan.rows_total(), on_progress=on_progress, cancel=cancel)
        merged = plan.fold_frames(
            new_part, fold, DiagnosticsAccumulator.merge, RowCounts(), tracker
        )
        return merged.finalize()

    try:
        return run(codes, config)
    except UncertifiedGram:
        # An auxiliary test's design (the fit's plus e², or plus ŷ² and ŷ³) that the fit,
        # counts and sums cannot factor to full accuracy: pass 2 runs again, indicators
        # written out, each auxiliary regression factored from its own rows.
        return run((), dataclasses.replace(config, exact_tests=True))


SAMPLE_PIECE_ROWS = 65_536
"""Rows of the learning sample built and predicted at a time when pass 2 chooses its edges.

Building the whole sample at once wrote out its design and a shifted copy: 1,000,000 rows
of 31 columns raised a numeric-30 report's peak memory by 0.48 GB and cost 0.7 CPU-s, most
of it page faults (measured here).
"""


def _usable_sample(
    builder: DesignBuilder,
    fit: LinearFit,
    frame: pl.DataFrame,
    columns: Sequence[str],
    *,
    use_codes: bool,
) -> tuple[NDArray[np.float64], pl.DataFrame]:
    """Fitted values of the rows of `frame` the design can use, and those rows' `columns`."""
    columns = list(dict.fromkeys(columns))
    fitted, kept = [], []
    for start in range(0, frame.height, SAMPLE_PIECE_ROWS):
        batch = build_for_diagnostics(
            builder, frame.slice(start, SAMPLE_PIECE_ROWS), use_codes=use_codes
        )
        fitted.append(predict_batch(fit, batch))
        kept.append(batch.frame.select(columns))
    if not kept:
        return np.zeros(0), frame.select(columns)
    return np.concatenate(fitted), pl.concat(kept)


def design_batches(
    builder: DesignBuilder, frame: pl.DataFrame, *, use_codes: bool
) -> Iterable[DesignBatch | CodedBatch]:
    """Build a frame's design for scoring, in one or more batches.

    One coded batch when `use_codes` and the builder can; else written-out batches cut to a
    bounded width (`dense_pieces`).
    """
    coded = builder.build_coded(frame) if use_codes else None
    return [coded] if coded is not None else map(builder.build, dense_pieces(builder, frame))


def build_for_diagnostics(
    builder: DesignBuilder, frame: pl.DataFrame, *, use_codes: bool
) -> DesignBatch | CodedBatch:
    """Build a batch for pass 2: categoricals as level codes when asked and possible."""
    coded = builder.build_coded(frame) if use_codes else None
    return coded if coded is not None else builder.build(frame)


def predict_batch(fit: LinearFit, batch: DesignBatch | CodedBatch) -> NDArray[np.float64]:
    """Fitted values of a batch, written out or coded."""
    if isinstance(batch, CodedBatch):
        return fit.predict_coded(batch.design)
    return fit.predict(batch.x)


def diagnose_rows(
    source: Source,
    outcome: FitOutcome,
    positions: Sequence[int],
    *,
    exclude_rows: Collection[int] = (),
) -> tuple[pl.DataFrame, RowDiagnostics]:
    """Read the full original rows at `positions` and compute their diagnostics under the fit.

    Rows the model cannot use (a missing value, an unseen level) come back in the frame
    but not in the diagnostics; match the two on `ROW_INDEX`. A row the fit did not use
    (outside its filter, among `exclude_rows`, or outside the sample of a sample fit) is
    scored as a new observation: see `RowDiagnostics.in_fit`.
    """
    from triage.core.row_values import row_diagnostics

    frame = source.read_rows(list(positions))
    batch = outcome.builder.build(frame.select([*outcome.spec.source_columns(), ROW_INDEX]))
    inside = rows_in_fit(source, outcome, frame, exclude_rows)
    in_fit = np.isin(batch.rows, frame[ROW_INDEX].to_numpy()[inside])
    return frame, row_diagnostics(outcome.fit, batch, in_fit)


def rows_in_fit(
    source: Source, outcome: FitOutcome, frame: pl.DataFrame, exclude_rows: Collection[int] = ()
) -> NDArray[np.bool_]:
    """Return, per row of `frame` (every column plus `ROW_INDEX`), whether the fit used it.

    A row is in the fit when it passes the model's filter, is not among `exclude_rows` and,
    for a fit on a sample, was drawn into that sample. Rows with a missing value are never
    in a design batch, so they are not asked about.
    """
    rows = frame[ROW_INDEX].to_numpy()
    inside: NDArray[np.bool_] = np.ones(rows.size, dtype=np.bool_)
    where = _parse_where(source, outcome.spec)
    if where is not None and rows.size:
        inside &= frame.select(where.fill_null(value=False)).to_series().to_numpy()
    if exclude_rows:
        inside &= ~np.isin(rows, np.fromiter(exclude_rows, dtype=np.int64))
    if not outcome.data.is_full_pass:
        inside &= np.isin(rows, outcome.sample[ROW_INDEX].to_numpy())
    return inside
