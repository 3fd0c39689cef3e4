"""Benchmark full passes on a Dask LocalCluster: per-task time, bytes and scheduler overhead.

Starts a LocalCluster of 2 worker processes (one thread each) listening on loopback only,
writes the demo scenario as a folder of Parquet files (one part per file) and as one Arrow
IPC file (a part per run of record batches), and runs `triage fit` and `triage report` over
every row on them, then the same on the local engine in this process, side by side. A fit
makes one pass (it finds the categoricals' levels as it reads); a report two (the fit, then
its diagnostics). For each pass it prints, measured:

- per-task time: the compute time of each fold task (read a part and fold it) and each
  merge task, from Dask's task stream;
- bytes per task: the pickled size of one part's accumulators (what a worker sends to the
  worker that merges it), of the part itself and of the pass's job (builder, fit: sent once
  per worker);
- scheduler overhead per task: (wall time x workers - time spent computing) / tasks.

It ends with the figures the README's scaling note uses. On this 2-core machine the two
workers and the client share the cores, so the cluster is slower than the local engine
here: it is for tables beyond one server. Run from the repository root:

    python bench/bench_cluster.py [--rows 2000000] [--files 4] [--predictors 8,30]
"""

from __future__ import annotations

import argparse
import math
import pickle
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

N_WORKERS = 2


def write_folder(folder: Path, n_rows: int, n_files: int, n_extra: int) -> None:
    """Write the demo scenario (plus `n_extra` numeric columns) as `n_files` Parquet files."""
    import numpy as np
    import polars as pl

    from triage.data.scenario import iter_scenario

    folder.mkdir()
    per_file = -(-n_rows // n_files)
    rng = np.random.default_rng(1)
    for k, frame in enumerate(iter_scenario(n_rows, seed=2, block_rows=per_file)):
        extra = {f"x{j}": rng.normal(size=frame.height) for j in range(n_extra)}
        frame = frame.with_columns(**{name: pl.Series(v) for name, v in extra.items()})
        frame.write_parquet(folder / f"part-{k:03d}.parquet", row_group_size=125_000)


def measure_part_bytes(read_part: Any, job: Any) -> int:
    """Fold one part on a worker and return the pickled size of its accumulators."""
    from triage.engine.cluster import fold_part_task

    return len(pickle.dumps(fold_part_task(read_part, job), protocol=5))


class Recorder:
    """Wraps `ClusterEngine.fold_parts` to note each pass's parts, job and result sizes."""

    def __init__(self, engine: Any) -> None:
        self.engine = engine
        self.fold_parts = engine.fold_parts
        self.passes: list[dict[str, Any]] = []
        engine.fold_parts = self.record

    def record(self, parts: Any, new_part: Any, fold: Any, merge: Any, **options: Any) -> Any:
        import cloudpickle
        from distributed import get_task_stream

        from triage.engine.cluster import PassJob

        client = self.engine.client()
        with get_task_stream(client=client) as stream:
            started = time.perf_counter()
            result = self.fold_parts(parts, new_part, fold, merge, **options)
            wall = time.perf_counter() - started
        job = PassJob(new_part, fold, merge, options["marked"])
        part_bytes = client.submit(measure_part_bytes, parts[0], job, pure=False).result()
        self.passes.append(
            {
                "parts": len(parts),
                "wall": wall,
                "part_result_bytes": part_bytes,
                "part_spec_bytes": len(cloudpickle.dumps(parts[0])),
                "job_bytes": len(cloudpickle.dumps(job)),
                "root_bytes": len(pickle.dumps(result, protocol=5)),
                "stream": stream.data,
            }
        )
        return result


def summarise(name: str, record: dict[str, Any]) -> dict[str, float]:
    """Print one pass's per-task figures; return them."""
    stream = record["stream"]

    def computes(prefix: str) -> list[float]:
        return [
            s["stop"] - s["start"]
            for task in stream
            if str(task["key"]).startswith(prefix)
            for s in task["startstops"]
            if s["action"] == "compute"
        ]

    folds, merges = computes("fold_part_task"), computes("merge_task")
    idle = max(record["wall"] * N_WORKERS - sum(folds) - sum(merges), 0.0)
    print(
        f"{name:<18} {record['parts']:>3} parts  fold task {statistics.median(folds):6.3f} s "
        f"(median)  merge task {1e3 * statistics.median(merges or [0.0]):6.2f} ms  "
        f"pass {record['wall']:6.2f} s, worker time idle {idle:5.2f} s"
    )
    print(
        f"{'':<18} bytes: part's accumulators {record['part_result_bytes']:>9,}  "
        f"part spec {record['part_spec_bytes']:>6,}  job {record['job_bytes']:>8,} (once per "
        f"worker)  merged {record['root_bytes']:>9,}"
    )
    return {
        "fold_s": statistics.median(folds),
        "merge_s": statistics.median(merges or [0.0]),
        "bytes": record["part_result_bytes"],
        "job_bytes": record["job_bytes"],
    }


def scheduler_overhead(cluster: Any, n_tasks: int = 2_000) -> float:
    """Seconds per task of the scheduler alone: `n_tasks` tasks that do nothing, end to end."""
    from distributed import Client

    with Client(cluster.scheduler_address, set_as_default=False) as client:
        client.gather(client.map(abs, range(50), pure=False))  # warm up
        started = time.perf_counter()
        client.gather(client.map(abs, range(n_tasks), pure=False))
        return (time.perf_counter() - started) / n_tasks


def write_ipc(folder: Path, path: Path) -> None:
    """Write the folder's rows, in order, as one Arrow IPC file of 125,000-row record batches."""
    import polars as pl
    import pyarrow as pa
    import pyarrow.ipc as ipc

    table = pl.read_parquet(sorted(folder.glob("*.parquet"))).to_arrow().combine_chunks()
    with pa.OSFile(str(path), "wb") as sink, ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table, max_chunksize=125_000)


PASS_NAMES = {
    "fit": ("fit",),
    "report": ("fit", "diagnostics"),
}
"""The passes each command makes over every row (the fit's pass finds the levels too)."""


def run(path: Path, terms: str, cluster: Any) -> dict[str, dict[str, float]]:
    from triage._typing import ALL_ROWS
    from triage.core.spec import build_spec
    from triage.data.source import open_source
    from triage.engine.cluster import ClusterEngine
    from triage.engine.passes import fit_model, run_report

    source = open_source(path)
    spec = build_spec(source.schema(), target="minutes", terms=terms)
    figures: dict[str, dict[str, float]] = {}
    for name, call in (
        ("fit", lambda e: fit_model(source, spec, rows=ALL_ROWS, engine=e)),
        ("report", lambda e: run_report(source, spec, rows=ALL_ROWS, by=("depot",), engine=e)),
    ):
        with ClusterEngine(cluster.scheduler_address) as engine:
            recorder = Recorder(engine)
            engine.client()  # connected before the clock starts
            started = time.perf_counter()
            outcome = call(engine)
            cluster_s = time.perf_counter() - started
        started = time.perf_counter()
        call(None)
        local_s = time.perf_counter() - started
        fit = outcome.fit if name == "fit" else outcome.outcome.fit
        p = len(fit.names)
        print(f"-- {name}: p = {p} coefficients; cluster {cluster_s:.2f} s, local {local_s:.2f} s")
        for label, record in zip(PASS_NAMES[name], recorder.passes, strict=True):
            figures[f"{name}: {label}"] = summarise(f"{name}: {label}", record)
    return figures


def scaling_note(
    figures: dict[str, dict[str, float]], rows_per_part: int, overhead_s: float
) -> None:
    """Print the estimate for 10 billion rows on 100 workers from the measured figures.

    Network: every part's accumulators go once to the worker that merges them and every
    merge's result once up the tree (2 x parts - 1 results), plus the job to each worker.
    Time: the parts spread over the workers, then one merge per level of the tree; the
    scheduler handles 2 x parts tasks at the measured cost of a task that does nothing.
    """
    rows, workers = 10_000_000_000, 100
    from triage.engine.cluster import tree_levels

    parts = math.ceil(rows / rows_per_part)
    depth = tree_levels(parts)
    print(f"\n-- scaling: 10,000,000,000 rows on {workers} workers, parts of {rows_per_part:,}")
    print(f"parts (fold tasks) {parts:,}, merge tasks {parts - 1:,}, tree depth {depth}")
    for label, f in figures.items():
        network = (2 * parts - 1) * f["bytes"] + workers * f["job_bytes"]
        wall = parts * f["fold_s"] / workers + depth * (f["merge_s"] + overhead_s)
        scheduler = 2 * parts * overhead_s
        print(
            f"{label:<18} accumulators {f['bytes']:>10,} B/task  network {network / 1e9:7.2f} GB"
            f"  time {wall / 60:6.1f} min  scheduler busy {scheduler:5.0f} s"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2_000_000)
    parser.add_argument("--files", type=int, default=4)
    parser.add_argument("--predictors", default="8,30", help="model widths, comma-separated")
    args = parser.parse_args()
    from distributed import LocalCluster

    widths = [int(w) for w in args.predictors.split(",")]
    n_extra = max(max(widths) - 6, 0)
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        started = time.perf_counter()
        write_folder(folder / "parquet", args.rows, args.files, n_extra)
        write_ipc(folder / "parquet", folder / "deliveries.arrow")
        took = time.perf_counter() - started
        print(f"wrote {args.rows:,} rows in {args.files} files and one IPC file ({took:.1f} s)")
        with LocalCluster(
            n_workers=N_WORKERS,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address="127.0.0.1:0",
        ) as cluster:
            overhead_s = scheduler_overhead(cluster)
            print(f"scheduler overhead: {1e3 * overhead_s:.2f} ms per task (2,000 empty tasks)")
            for width in widths:
                numeric = ["distance_km", "stops", "weight_kg", "hour"]
                numeric += [f"x{j}" for j in range(max(width - 6, 0))]
                terms = ", ".join([*numeric, "depot", "vehicle"])
                print(f"\n== model with {width} predictors (depot and vehicle coded as indicators)")
                figures = run(folder / "parquet", terms, cluster)
                scaling_note(figures, -(-args.rows // args.files), overhead_s)
                if width == widths[0]:
                    print(f"\n== the same model on one Arrow IPC file ({width} predictors)")
                    run(folder / "deliveries.arrow", terms, cluster)
    sys.stdout.flush()


if __name__ == "__main__":
    main()
