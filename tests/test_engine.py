"""Passes: progress only increases, cancel stops within one batch, read-ahead shuts down.

The data are generated in the test (behaviour, not numbers); the fit itself is checked
against numpy's least squares (oracle) so a cancelled-then-rerun pass is still right.
"""

from __future__ import annotations

import functools
import operator
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tests.tables import administrative_table
from triage._typing import ALL_ROWS, RowsToRead
from triage.core.filter import parse_filter
from triage.core.spec import build_spec
from triage.data import parquet as parquet_module
from triage.data.source import ROW_INDEX, open_source
from triage.engine import passes
from triage.engine import progress as progress_module
from triage.engine.progress import ReadAhead
from triage.engine.workers import fold_in_order, stream_parts_in_order
from triage.errors import PassCancelled
from triage.results.progress import PassProgress

N_ROWS = 20_000
BATCH = 1_000


@pytest.fixture
def data_file(tmp_path: Path, rng: np.random.Generator) -> Path:
    x = rng.normal(size=(N_ROWS, 2))
    y = 1.0 + x @ np.array([2.0, -1.0]) + rng.normal(size=N_ROWS)
    path = tmp_path / "d.parquet"
    pl.DataFrame({"y": y, "a": x[:, 0], "b": x[:, 1]}).write_parquet(path, row_group_size=2_500)
    return path


@pytest.fixture(autouse=True)
def small_batches(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(passes, "BATCH_ROWS", BATCH)
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 2_500)
    monkeypatch.setattr(progress_module, "PROGRESS_INTERVAL_S", 0.0)


@pytest.mark.parametrize("part_rows", [500_000, 2_500])
def test_engine_progress_counts_each_row_once_per_pass_and_names_the_pass(
    data_file: Path, monkeypatch: pytest.MonkeyPatch, part_rows: int
) -> None:
    # 500,000: one part, read ahead and dealt out in batches; 2,500: eight parts read at once.
    monkeypatch.setattr(parquet_module, "PART_ROWS", part_rows)
    source = open_source(data_file)
    spec = build_spec(source.schema(), target="y", terms="a, b")
    seen: list[PassProgress] = []
    report = passes.run_report(source, spec, rows=ALL_ROWS, on_progress=seen.append)
    assert [p.pass_number for p in seen] == sorted(p.pass_number for p in seen)
    assert {p.pass_number for p in seen} == {1, 2}
    for number in (1, 2):
        done = [p.rows_done for p in seen if p.pass_number == number]
        assert done == sorted(done) and done[-1] == N_ROWS
    assert all(p.rows_total == N_ROWS and p.n_passes == 2 for p in seen)
    assert seen[-1].stage.startswith("pass 2 of 2")
    # The time left of pass 1 includes pass 2: at pass 1's speed, at least its own rows.
    first = [p for p in seen if p.pass_number == 1 and p.eta_s is not None and p.rows_per_s > 0]
    assert all(p.eta_s >= N_ROWS / p.rows_per_s * 0.999 for p in first)  # type: ignore[operator]
    frame = pl.read_parquet(data_file)
    design = np.column_stack([np.ones(N_ROWS), frame["a"], frame["b"]])
    oracle = np.linalg.lstsq(design, frame["y"].to_numpy(), rcond=None)[0]  # numpy as oracle
    np.testing.assert_allclose(report.outcome.fit.coef, oracle, rtol=1e-10)
    # Both passes were split over worker threads; Durbin-Watson must still join the parts
    # in file order (statsmodels durbin_watson on the in-memory residuals).
    from statsmodels.stats.stattools import durbin_watson

    resid = frame["y"].to_numpy() - design @ oracle
    dw = report.diagnostics.tests["durbin_watson"].statistic
    assert dw == pytest.approx(durbin_watson(resid), rel=1e-9)


@pytest.mark.parametrize("stop_after", [1, 5])
def test_engine_cancel_stops_within_one_batch(data_file: Path, stop_after: int) -> None:
    source = open_source(data_file)
    spec = build_spec(source.schema(), target="y", terms="a, b")
    cancel = threading.Event()
    reports: list[int] = []

    def on_progress(progress: PassProgress) -> None:
        reports.append(progress.rows_done)
        if len(reports) == stop_after:
            cancel.set()

    with pytest.raises(PassCancelled):
        passes.fit_model(source, spec, rows=ALL_ROWS, on_progress=on_progress, cancel=cancel)
    assert len(reports) == stop_after  # no batch was read after the one that set it
    # Hand-worked: the pass cuts each row group of 2,500 rows into batches of at most BATCH
    # rows, of ceil(2,500 / 3) = 834 rows but the last (832).
    (part,) = source.scan_parts(["y", "a", "b"], batch_rows=BATCH)
    ends = [834, 1_668, 2_500, 3_334, 4_168]
    assert [batch.rows_read for batch in part()][:5] == ends
    assert reports[-1] == ends[stop_after - 1]


def test_engine_cancel_stops_a_pass_read_in_parts(
    data_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
    source = open_source(data_file)
    spec = build_spec(source.schema(), target="y", terms="a, b")
    cancel = threading.Event()
    cancel.set()
    with pytest.raises(PassCancelled):
        passes.fit_model(source, spec, rows=ALL_ROWS, cancel=cancel)


def test_engine_fold_in_order_merges_in_unit_order_whoever_finishes_first() -> None:
    # Oracle: the units' own order; unit 0 finishes last, on whichever thread took it.
    def fold_unit(k: int, stopping: threading.Event) -> list[int]:
        time.sleep(0.2 if k == 0 else 0.01)
        return [k]

    merged = fold_in_order(range(6), fold_unit, lambda a, b: a + b, wait=lambda: None, n_workers=2)
    assert merged == [0, 1, 2, 3, 4, 5]


def test_engine_fold_in_order_interrupted_while_starting_leaves_no_reader(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # A signal's exception (here KeyboardInterrupt) reaches the main thread while it starts
    # the second worker; the first is inside the units generator, reading. fold_in_order
    # must wait for it, so the caller can close the generator (as `contextlib.closing` in
    # the passes does) instead of failing with "generator already executing".
    reading, go_on = threading.Event(), threading.Event()

    def units() -> Iterator[int]:
        reading.set()
        go_on.wait(5)
        yield from range(4)

    start = threading.Thread.start

    def start_then_interrupt(thread: threading.Thread) -> None:
        start(thread)
        if thread.name.endswith("-1"):
            reading.wait(5)
            threading.Timer(0.2, go_on.set).start()  # the reader goes on a moment later
            raise KeyboardInterrupt

    monkeypatch.setattr(threading.Thread, "start", start_then_interrupt)
    generator = units()
    with pytest.raises(KeyboardInterrupt):
        fold_in_order(
            generator, lambda k, _: [k], lambda a, b: a + b, wait=lambda: None, n_workers=2
        )
    monkeypatch.undo()
    generator.close()  # raised ValueError while a worker was still reading it
    assert not [t for t in threading.enumerate() if t.name.startswith("triage-worker-")]


def test_engine_fold_in_order_stops_on_an_error_or_a_cancel() -> None:
    started: list[int] = []

    def fold_unit(k: int, stopping: threading.Event) -> int:
        started.append(k)
        if k == 1:
            msg = "bad part"
            raise ValueError(msg)
        stopping.wait(5.0)  # a long part that returns early when told to stop
        return k

    with pytest.raises(ValueError, match="bad part"):
        fold_in_order(range(50), fold_unit, operator.add, wait=lambda: None, n_workers=2)
    assert len(started) <= 3  # no part was started after the error

    def wait() -> None:
        raise PassCancelled("stopped")

    started.clear()
    with pytest.raises(PassCancelled):
        fold_in_order(
            range(50), lambda k, stopping: fold_unit(2 * k, stopping), operator.add, wait=wait
        )
    assert len(started) <= 4


def test_engine_read_ahead_stops_its_thread_when_closed_early() -> None:
    produced: list[int] = []

    def items():  # type: ignore[no-untyped-def]
        for i in range(1_000):
            produced.append(i)
            yield i

    reader = ReadAhead(items(), depth=2)
    for item in reader:
        if item == 3:
            break
    assert not reader._thread.is_alive()
    assert len(produced) < 10


def test_engine_keeps_batch_memory_in_the_heap_under_glibc() -> None:
    # glibc's mallopt accepts each setting (returns 1, per glibc's malloc.h documentation);
    # elsewhere the allocator is left alone.
    import platform

    from triage.engine.allocator import keep_batch_memory

    expected = sys.platform.startswith("linux") and platform.libc_ver()[0] == "glibc"
    assert keep_batch_memory() is expected


def test_engine_gives_arrow_reads_jemalloc_unless_the_user_chose_a_pool() -> None:
    # Oracle: pyarrow's own name for its default pool, in a fresh interpreter each time.
    import os
    import subprocess

    import pyarrow as pa

    try:
        pa.jemalloc_memory_pool()
        built_with = "jemalloc"
    except NotImplementedError:
        built_with = pa.default_memory_pool().backend_name
    show = (
        "import pyarrow as pa; from triage.engine.allocator import keep_batch_memory; "
        "keep_batch_memory(); print(pa.default_memory_pool().backend_name)"
    )
    root = str(Path(__file__).resolve().parents[1])

    def pool_name(**env: str) -> str:
        clean = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
        result = subprocess.run(
            [sys.executable, "-c", show],
            env={**clean, "PYTHONPATH": root, **env},
            capture_output=True,
            text=True,
            check=True,
        )
        return result.stdout.strip()

    assert pool_name() == built_with
    assert pool_name(ARROW_DEFAULT_MEMORY_POOL="system") == "system"


def _write_split(
    table: pl.DataFrame, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, split: str
) -> Path:
    """Write `table` as Parquet read in eight parts (`split="parts"`), or as CSV: one stream."""
    if split == "parts":
        monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
        path = tmp_path / "admin.parquet"
        table.write_parquet(path, row_group_size=1_250)
    else:
        path = tmp_path / "admin.csv"
        table.write_csv(path)
    return path


@pytest.mark.parametrize("split", ["parts", "read-ahead"])
def test_engine_report_is_the_same_for_1_2_and_8_workers(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch, split: str
) -> None:
    # Oracle: the one-worker run; the merge order is fixed, so any worker count must give
    # the same numbers bit for bit (8 workers on this 2-core machine interleave at random).
    from triage.engine.workers import set_pass_workers
    from triage.views.json import report_to_json

    table = administrative_table(rng, N_ROWS)
    path = _write_split(table, tmp_path, monkeypatch, split)
    source = open_source(path)
    spec = build_spec(
        source.schema(),
        target="y",
        terms="age, log(income), region, channel, age:income",
        weights="weight",
    )
    reports = {}
    try:
        for n_workers in (1, 2, 8):
            set_pass_workers(n_workers)
            report = passes.run_report(source, spec, rows=ALL_ROWS, by=("region",), top_k=10)
            reports[n_workers] = report
    finally:
        set_pass_workers(None)
    one = reports[1]
    assert one.outcome.data.rows_used > N_ROWS // 4
    for n_workers in (2, 8):
        other = reports[n_workers]
        assert np.array_equal(other.outcome.fit.coef, one.outcome.fit.coef, equal_nan=True)
        assert np.array_equal(other.outcome.fit.cov, one.outcome.fit.cov, equal_nan=True)
        assert report_to_json(other) == report_to_json(one)


def test_engine_workers_default_to_the_cpus_the_process_may_use() -> None:
    # Oracle: the operating system's affinity mask (os.sched_getaffinity, Linux).
    import os

    from triage.engine.workers import pass_workers, set_pass_workers

    set_pass_workers(None)
    assert pass_workers() == len(os.sched_getaffinity(0))
    set_pass_workers(3)
    try:
        assert pass_workers() == 3
    finally:
        set_pass_workers(None)
    with pytest.raises(ValueError, match="at least one worker"):
        set_pass_workers(0)


def test_engine_full_pass_drops_missing_values_in_some_batches(tmp_path: Path) -> None:
    # Clean batches take the column route, batches with a null, NaN or inf the full build;
    # both must add up to numpy's least squares on the usable rows (oracle).
    rng = np.random.default_rng(7)
    x = rng.normal(size=(N_ROWS, 2))
    y = 1.0 + x @ np.array([2.0, -1.0]) + rng.normal(size=N_ROWS)
    a: list[float | None] = list(x[:, 0])
    a[1_500] = None
    a[7_001] = float("nan")
    y[12_345] = np.inf
    path = tmp_path / "holes.parquet"
    pl.DataFrame({"y": y, "a": a, "b": x[:, 1]}).write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    outcome = passes.fit_model(
        source, build_spec(source.schema(), target="y", terms="a, b"), rows=ALL_ROWS
    )
    usable = np.ones(N_ROWS, dtype=bool)
    usable[[1_500, 7_001, 12_345]] = False
    design = np.column_stack([np.ones(N_ROWS), x])[usable]
    expected = np.linalg.lstsq(design, y[usable], rcond=None)[0]
    np.testing.assert_allclose(outcome.fit.coef, expected, rtol=1e-10)
    assert outcome.data.rows_dropped_missing == 3
    assert outcome.data.rows_used == N_ROWS - 3


@pytest.mark.parametrize("split", ["parts", "read-ahead"])
def test_engine_report_pass_2_from_memory_equals_reading_again(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch, split: str
) -> None:
    # Oracle: the same report with a budget too small to keep anything, which reads the
    # file again for pass 2. Pass 2 then folds batches of another size, so sums may differ
    # in the last bits: compared to 1e-12.
    from triage.views.json import report_to_json

    table = administrative_table(rng, N_ROWS)
    path = tmp_path / ("admin.parquet" if split == "parts" else "admin.csv")
    if split == "parts":
        monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
        table.write_parquet(path, row_group_size=1_250)
    else:
        table.write_csv(path)
    source = open_source(path)
    spec = build_spec(
        source.schema(), target="y", terms="age, log(income), region, channel", weights="weight"
    )
    results = {}
    for budget in (1 << 30, 1):
        monkeypatch.setattr(passes, "KEEP_FRAMES_BYTES", budget)
        seen: list[PassProgress] = []
        report = passes.run_report(
            source, spec, rows=ALL_ROWS, by=("region",), on_progress=seen.append
        )
        stages = {p.stage for p in seen if p.pass_number == 2}
        results[budget] = report, stages
        second = [p.rows_done for p in seen if p.pass_number == 2]
        assert second == sorted(second) and second[-1] == N_ROWS
    (kept, kept_stages), (read, read_stages) = results[1 << 30], results[1]
    assert kept_stages == {"pass 2 of 2, from memory"}
    assert read_stages == {"pass 2 of 2, reading again"}
    np.testing.assert_array_equal(kept.outcome.fit.coef, read.outcome.fit.coef)
    flat_kept = pl.json_normalize(report_to_json(kept), separator=".")
    flat_read = pl.json_normalize(report_to_json(read), separator=".")
    assert flat_kept.columns == flat_read.columns
    for column in flat_kept.columns:
        a, b = flat_kept[column].to_list()[0], flat_read[column].to_list()[0]
        if isinstance(a, float) and isinstance(b, float):
            assert a == pytest.approx(b, rel=1e-12, abs=1e-300, nan_ok=True), column
        else:
            assert a == b, column


def test_engine_report_falls_back_to_refactored_tests_when_reset_has_nothing_to_add(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    # Fitted values on two levels: their square and cube lie in the design's span (numpy's
    # matrix_rank as oracle), which RESET from the fit cannot tell from rounding. The pass
    # runs again with the auxiliary regressions factored from their rows: RESET is NaN (its
    # columns are aliased) and the rest of the report comes out as in any pass.
    group = (rng.random(N_ROWS) < 0.3).astype(float)
    y = 2.0 + 3.0 * group + rng.normal(size=N_ROWS)
    path = tmp_path / "two_levels.parquet"
    pl.DataFrame({"y": y, "group": group}).write_parquet(path, row_group_size=2_500)
    source = open_source(path)
    spec = build_spec(source.schema(), target="y", terms="group")
    report = passes.run_report(source, spec, rows=ALL_ROWS)
    design = np.column_stack([np.ones(N_ROWS), group])
    fitted = design @ np.linalg.lstsq(design, y, rcond=None)[0]
    assert np.linalg.matrix_rank(np.column_stack([design, fitted**2, fitted**3])) == 2
    tests = report.diagnostics.tests
    assert np.isnan(tests["reset"].statistic)
    assert np.isfinite(tests["breusch_pagan"].statistic)
    assert report.diagnostics.n == N_ROWS


def test_full_pass_learning_sample_keeps_rows_spread_through_the_whole_groups_read(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch
) -> None:
    # 2,000-row groups and 3,000 learning rows: two whole groups are read (4,000 rows), and a
    # full pass keeps 3,000 of them spread evenly; a quick fit of 3,000 rows keeps all 4,000.
    monkeypatch.setattr(passes, "LEARNING_SAMPLE_ROWS", 3_000)
    path = tmp_path / "admin.parquet"
    administrative_table(rng, 20_000).write_parquet(path, row_group_size=2_000)
    source = open_source(path)
    spec = build_spec(source.schema(), target="y", terms="age, income, channel")

    def plan(rows: RowsToRead) -> passes.PassPlan:
        return passes.PassPlan.read(
            source, spec, rows=rows, seed=7, sampling="groups", exclude_rows=()
        )

    full, quick = plan(ALL_ROWS), plan(3_000)
    learned = full.learning_frame
    assert learned.height == 3_000 and full.is_full_pass
    assert quick.learning_frame.height == 4_000 and not quick.is_full_pass
    # Oracle: polars reads the same two row groups whole, then rows i * 4,000 // 3,000.
    whole = pl.read_parquet(path).with_row_index("position")
    groups = np.unique(quick.learning_frame[ROW_INDEX].to_numpy() // 2_000)
    read = whole.filter(pl.col("position").floordiv(2_000).is_in(groups.tolist()))
    expected = read[np.arange(3_000) * read.height // 3_000]
    assert learned[ROW_INDEX].to_list() == expected["position"].to_list()
    for name in ("age", "income", "channel", "y"):
        assert learned[name].to_list() == expected[name].to_list()
    # Both groups contribute in proportion; the same seed draws the same rows again.
    per_group = np.bincount(learned[ROW_INDEX].to_numpy() // 2_000)[groups]
    assert per_group.tolist() == [1_500, 1_500]
    assert plan(ALL_ROWS).learning_frame.equals(learned)


def test_engine_parquet_text_codes_read_as_categorical_give_the_text_read_report(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rng: np.random.Generator
) -> None:
    # Parquet parts read text columns dictionary-encoded (polars Categorical); the reference
    # is the same file, parts and batches read as text. Both reports must agree bit for bit:
    # the same levels in the same order, references, coefficients and every diagnostic.
    from triage.views.json import report_to_json

    monkeypatch.setattr(parquet_module, "PART_ROWS", 2_500)
    path = tmp_path / "admin.parquet"
    administrative_table(rng, N_ROWS).write_parquet(path, row_group_size=1_250)
    where = "channel LIKE '%e%' OR age > 30"
    source = open_source(path)
    spec = build_spec(
        source.schema(),
        target="y",
        terms="age, log(income), region, channel, age:income",
        weights="weight",
        where=where,
    )
    coded = passes.run_report(source, spec, rows=ALL_ROWS, by=("region",), top_k=10)
    open_parquet = parquet_module.open_parquet

    def open_as_text(path: Path, **options: object) -> object:
        options.pop("read_dictionary", None)
        return open_parquet(path, **options)

    monkeypatch.setattr(parquet_module, "open_parquet", open_as_text)
    text = passes.run_report(source, spec, rows=ALL_ROWS, by=("region",), top_k=10)
    assert coded.outcome.data.rows_used > N_ROWS // 4
    assert np.array_equal(coded.outcome.fit.coef, text.outcome.fit.coef)
    assert np.array_equal(coded.outcome.fit.cov, text.outcome.fit.cov)
    assert report_to_json(coded) == report_to_json(text)
    monkeypatch.setattr(parquet_module, "open_parquet", open_parquet)

    # The claim itself: a pass reads `region` as codes, and the filter's `channel` as text.
    first_part = source.scan_parts(
        list(spec.source_columns()), where=parse_filter(where, source.schema())
    )[0]
    batch = next(iter(first_part()))
    assert batch.frame.schema["region"] == pl.Categorical
    assert batch.frame.schema["channel"] == pl.String


def test_engine_stream_parts_in_order_yields_in_part_order_holding_few_ahead() -> None:
    # Oracle: the parts' own order; part 0 is slow, so the others run ahead of it until they
    # hold `ahead` items (each worker may hold one item more that it has not yet queued).
    produced, consumed = [0], [0]
    lock = threading.Lock()

    def part(k: int) -> Iterator[int]:
        for i in range(10):
            if k == 0:
                time.sleep(0.01)
            with lock:
                produced[0] += 1
            yield 10 * k + i

    parts = [functools.partial(part, k) for k in range(5)]
    items, most_held = [], 0
    for item in stream_parts_in_order(parts, ahead=3, wait=lambda: None, n_workers=4):
        consumed[0] += 1
        items.append(item)
        with lock:
            most_held = max(most_held, produced[0] - consumed[0])
    assert items == list(range(50))
    assert most_held <= 3 + 2 + 4  # ahead, two of the part being yielded, one per worker


def test_engine_stream_parts_in_order_stops_its_workers_on_an_error_or_when_closed() -> None:
    def part(k: int) -> Iterator[int]:
        for i in range(1_000):
            if k == 2 and i == 3:
                msg = "bad part"
                raise ValueError(msg)
            yield i

    parts = [functools.partial(part, k) for k in range(6)]
    with pytest.raises(ValueError, match="bad part"):
        list(stream_parts_in_order(parts, ahead=2, wait=lambda: None, n_workers=2))
    assert not [t for t in threading.enumerate() if t.name.startswith("triage-worker-")]
    stream = stream_parts_in_order(parts[:2], ahead=2, wait=lambda: None, n_workers=2)
    assert [next(stream) for _ in range(5)] == [0, 1, 2, 3, 4]
    stream.close()  # the caller stops early (a failed write, Ctrl-C)
    assert not [t for t in threading.enumerate() if t.name.startswith("triage-worker-")]


@pytest.mark.parametrize("split", ["parts", "read-ahead"])
def test_engine_export_all_is_the_same_for_1_2_and_8_workers(
    tmp_path: Path, rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch, split: str
) -> None:
    # Oracle: the one-worker file, and polars for the rows' order and statuses. Parts and
    # batches are small, so the parts run ahead of the one being written.
    import pyarrow.parquet as pq

    from triage.engine import export as export_module
    from triage.engine.workers import set_pass_workers

    table = administrative_table(rng, N_ROWS)
    monkeypatch.setattr(export_module, "batch_rows_for", lambda n_columns: 400)
    path = _write_split(table, tmp_path, monkeypatch, split)
    source = open_source(path)
    spec = build_spec(
        source.schema(),
        target="y",
        terms="age, log(income), region, channel",
        weights="weight",
        where="income > 15000",
    )
    written, seen = {}, {}
    try:
        for n_workers in (1, 2, 8):
            set_pass_workers(n_workers)
            out = tmp_path / f"all_{n_workers}.parquet"
            seen[n_workers] = progress = list[PassProgress]()
            export_module.export_all_rows(
                source, spec, out, note="fit 1", on_progress=progress.append
            )
            written[n_workers] = pq.read_table(out)
    finally:
        set_pass_workers(None)
    for progress in seen.values():  # each row counted once per pass, the pass named
        assert [p.pass_number for p in progress] == sorted(p.pass_number for p in progress)
        done = [p.rows_done for p in progress if p.pass_number == 2]
        assert done == sorted(done) and done[-1] == N_ROWS
        assert progress[-1].stage.startswith("pass 2 of 2")
    one = written[1]
    assert one["row"].to_pylist() == list(range(N_ROWS))
    expected = (
        table.select(
            pl.when(pl.col("income") <= 15_000)
            .then(pl.lit(export_module.STATUS_FILTERED))
            .when(pl.col("age").is_null())
            .then(pl.lit("missing value"))
            .otherwise(pl.lit("used"))
        )
        .to_series()
        .to_list()
    )
    assert one["status"].to_pylist() == expected
    for n_workers in (2, 8):
        assert written[n_workers].equals(one)
        assert written[n_workers].schema.metadata == one.schema.metadata
