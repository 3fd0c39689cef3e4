"""Passes: progress only increases, cancel stops within one batch, read-ahead shuts down.

The data are generated in the test (behaviour, not numbers); the fit itself is checked
against numpy's least squares (oracle) so a cancelled-then-rerun pass is still right.
"""

from __future__ import annotations

import sys
import threading
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from triage.core.spec import build_spec
from triage.data.source import open_source
from triage.engine import passes
from triage.engine import progress as progress_module
from triage.engine.progress import PassProgress, ReadAhead
from triage.errors import PassCancelled

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


def test_engine_progress_only_increases_over_both_passes(data_file: Path) -> None:
    source = open_source(data_file)
    spec = build_spec(source.schema(), target="y", terms="a, b")
    seen: list[PassProgress] = []
    report = passes.run_report(source, spec, rows=None, on_progress=seen.append)
    done = [p.rows_done for p in seen]
    assert done == sorted(done) and done[-1] == 2 * N_ROWS
    assert all(p.rows_total == 2 * N_ROWS for p in seen)
    frame = pl.read_parquet(data_file)
    design = np.column_stack([np.ones(N_ROWS), frame["a"], frame["b"]])
    oracle = np.linalg.lstsq(design, frame["y"].to_numpy(), rcond=None)[0]  # numpy as oracle
    np.testing.assert_allclose(report.outcome.fit.coef, oracle, rtol=1e-10)
    # Both passes were dealt out to worker threads in 20 batches; Durbin-Watson must still
    # join them in file order (statsmodels durbin_watson on the in-memory residuals).
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
        passes.fit_model(source, spec, rows=None, on_progress=on_progress, cancel=cancel)
    assert len(reports) == stop_after  # no batch was read after the one that set it
    assert reports[-1] == stop_after * BATCH


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


def test_engine_workers_deal_items_in_turn_and_return_every_state() -> None:
    # Oracle: the round-robin rule written out by hand (item i to worker i mod 2).
    from triage.engine.workers import BatchWorkers

    with BatchWorkers(list, list.append, n_workers=2) as workers:
        for item in range(7):
            workers.submit(item)
        states = workers.finish()
    assert states == [[0, 2, 4, 6], [1, 3, 5]]


def test_engine_workers_raise_a_workers_error_in_the_caller() -> None:
    from triage.engine.workers import BatchWorkers

    def fold(state: list[int], item: int) -> None:
        if item == 3:
            msg = "bad batch"
            raise ValueError(msg)
        state.append(item)

    with pytest.raises(ValueError, match="bad batch"), BatchWorkers(list, fold) as workers:
        for item in range(50):
            workers.submit(item)
        workers.finish()


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
        source, build_spec(source.schema(), target="y", terms="a, b"), rows=None
    )
    usable = np.ones(N_ROWS, dtype=bool)
    usable[[1_500, 7_001, 12_345]] = False
    design = np.column_stack([np.ones(N_ROWS), x])[usable]
    expected = np.linalg.lstsq(design, y[usable], rcond=None)[0]
    np.testing.assert_allclose(outcome.fit.coef, expected, rtol=1e-10)
    assert outcome.data.rows_dropped_missing == 3
    assert outcome.data.rows_used == N_ROWS - 3
