"""Full-pass fit speed and memory, measured side by side in one run.

Generates Parquet files of random data (8 and 30 numeric predictors), then times, each in a
fresh subprocess with its peak resident memory:

- floor: polars alone reading the same columns in bounded batches (summing them, so every
  value is decoded);
- triage fit: `triage fit --rows all` on the same file (pass 1);
- triage report: `triage report --rows all` (pass 1 and pass 2: two reads of the file);
- in-memory: pandas + statsmodels OLS, the route a user would otherwise take (skipped when
  the estimated memory would exceed `--memory-cap-gb`).

Prints ratios to the floor, and peak memory at two sizes to show it is flat in rows. The
floor and the fit, which take seconds, run `--repeat` times (5) in turn, and their medians are
compared: on the machines this was written on, the floor alone varied by 30% between runs.
Usage: ``python bench/bench_fit.py --rows 2000000,20000000 --predictors 8,30``.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"

FLOOR = """
import polars as pl, sys
lf = pl.scan_parquet(sys.argv[1]).select(sys.argv[2].split(","))
total = 0.0
for frame in lf.collect_batches(chunk_size=65536):
    total += float(frame.sum_horizontal().sum())
"""

TRIAGE = """
import sys
from triage.cli.main import main
args = ["fit", sys.argv[1], "--target", "y", "--terms", sys.argv[2], "--rows", "all", "--json"]
code = main(args)
sys.exit(code)
"""

REPORT = """
import sys
from triage.cli.main import main
args = ["report", sys.argv[1], "-y", "y", "-x", sys.argv[2], "--rows", "all", "--json"]
code = main(args)
sys.exit(code)
"""

IN_MEMORY = """
import sys, pandas as pd, statsmodels.api as sm
frame = pd.read_parquet(sys.argv[1], columns=["y", *sys.argv[2].split(",")])
model = sm.OLS(frame["y"], sm.add_constant(frame[sys.argv[2].split(",")])).fit()
print(model.rsquared, file=sys.stderr)
"""

MEASURE = """
import resource, runpy, sys, time
script, args = sys.argv[1], sys.argv[2:]
sys.argv = ["bench", *args]
start = time.perf_counter()
code = 0
try:
    exec(compile(script, "bench", "exec"), {"__name__": "__main__"})
except SystemExit as stop:
    code = stop.code or 0
elapsed = time.perf_counter() - start
usage = resource.getrusage(resource.RUSAGE_SELF)
peak_mib = usage.ru_maxrss / 1024
print("MEASURE", elapsed, peak_mib, code, usage.ru_utime + usage.ru_stime, file=sys.stderr)
"""


def make_file(path: Path, n_rows: int, n_predictors: int, *, seed: int = 0) -> None:
    """Write random data with a known linear model, in row groups of about 1M rows."""
    if path.exists():
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    beta = rng.normal(size=n_predictors)
    names = [f"x{i}" for i in range(n_predictors)]
    tmp = path.with_suffix(".tmp")
    writer = None
    step = 1_000_000
    for start in range(0, n_rows, step):
        m = min(step, n_rows - start)
        x = rng.normal(loc=5.0, scale=2.0, size=(m, n_predictors))
        y = 3.0 + x @ beta + rng.normal(size=m)
        table = pa.table({"y": y, **{n: x[:, i] for i, n in enumerate(names)}})
        if writer is None:
            writer = pq.ParquetWriter(tmp, table.schema)
        writer.write_table(table)
    assert writer is not None
    writer.close()
    tmp.rename(path)


def warm_cache(path: Path) -> None:
    """Read the file's bytes once so the page cache holds it (if memory allows)."""
    with path.open("rb") as handle:
        while handle.read(1 << 24):
            pass


def median_of(runs: list[tuple[float, float]]) -> tuple[float, float]:
    """Median seconds and the largest peak MiB of repeated runs."""
    return statistics.median(r[0] for r in runs), max(r[1] for r in runs)


def measure(script: str, *args: str) -> tuple[float, float]:
    """Run `script` in a fresh interpreter; return (seconds, peak MiB)."""
    seconds, peak, _ = measure_cpu(script, *args)
    return seconds, peak


def measure_cpu(
    script: str, *args: str, pythonpath: str | None = None
) -> tuple[float, float, float]:
    """Run `script` in a fresh interpreter; return (seconds, peak MiB, CPU seconds).

    CPU seconds (user and system, every thread) vary less than wall time on a shared
    machine, so they show the direction of a change while others run. `pythonpath`, when
    given, puts another checkout of triage first (a baseline measured in the same run).
    """
    env = {"OPENBLAS_NUM_THREADS": "1", **_environ()}
    if pythonpath is not None:
        env["PYTHONPATH"] = pythonpath
    # -P: the working folder is not put first on the path, so a checkout it holds cannot
    # stand in for the one PYTHONPATH (or the installation) names.
    done = subprocess.run(
        [sys.executable, "-P", "-c", MEASURE, script, *args],
        capture_output=True,
        text=True,
        check=False,
        env=env,
    )
    line = [s for s in done.stderr.splitlines() if s.startswith("MEASURE")]
    if not line:
        raise RuntimeError(done.stderr[-2000:])
    _, seconds, peak, code, cpu = line[-1].split()
    if code != "0":
        raise RuntimeError(done.stderr[-2000:])
    return float(seconds), float(peak), float(cpu)


def _environ() -> dict[str, str]:
    """The caller's environment, with bytecode caching on as in a normal installation.

    pip compiles an installed package's modules once; a sandbox that sets
    PYTHONDONTWRITEBYTECODE would make every run compile triage's own modules again
    (0.1-0.25 s measured here), which no installed copy pays.
    """
    import os

    dropped = {"OPENBLAS_NUM_THREADS", "PYTHONDONTWRITEBYTECODE"}
    return {k: v for k, v in os.environ.items() if k not in dropped}


def compile_once() -> None:
    """Import what the contenders import once, so their bytecode is cached before timing."""
    modules = "triage.cli.main, triage.engine.passes, triage.views.json, triage.views.text"
    subprocess.run([sys.executable, "-c", f"import {modules}"], check=True, env=_environ())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", default="2000000,20000000", help="comma-separated row counts")
    parser.add_argument("--predictors", default="8,30")
    parser.add_argument("--memory-cap-gb", type=float, default=16.0)
    parser.add_argument("--repeat", type=int, default=5, help="runs of the floor and the fit")
    args = parser.parse_args()
    compile_once()
    results = []
    cases = [(int(n), int(p)) for p in args.predictors.split(",") for n in args.rows.split(",")]
    for n_rows, p in cases:
        path = DATA / f"bench_{n_rows}_{p}.parquet"
        started = time.perf_counter()
        make_file(path, n_rows, p)
        print(f"file {path.name}: ready in {time.perf_counter() - started:.1f} s", flush=True)
        names = ",".join(f"x{i}" for i in range(p))
        warm_cache(path)  # every contender then reads from memory, none pays the disk alone
        floor_runs, triage_runs = [], []
        for _ in range(args.repeat):  # in turn, so a slow spell of the machine hits both
            floor_runs.append(measure(FLOOR, str(path), "y," + names))
            triage_runs.append(measure(TRIAGE, str(path), names))
        floor, triage = median_of(floor_runs), median_of(triage_runs)
        report = measure(REPORT, str(path), names)
        # pandas + statsmodels hold the frame, the design and QR copies: about 6 copies
        estimate_gb = 6 * n_rows * (p + 1) * 8 / 2**30
        memory = measure(IN_MEMORY, str(path), names) if estimate_gb < args.memory_cap_gb else None
        row = {
            "rows": n_rows,
            "predictors": p,
            "floor_s": floor[0],
            "floor_mib": floor[1],
            "triage_s": triage[0],
            "triage_mib": triage[1],
            "triage_vs_floor": triage[0] / floor[0],
            "report_s": report[0],
            "report_mib": report[1],
            "report_vs_floor": report[0] / floor[0],
            "in_memory_s": memory[0] if memory else None,
            "in_memory_mib": memory[1] if memory else None,
            "in_memory_vs_triage_time": memory[0] / triage[0] if memory else None,
            "in_memory_vs_triage_memory": memory[1] / triage[1] if memory else None,
        }
        results.append(row)
        print(json.dumps(row), flush=True)
    print(
        "\nrows        p  floor s  fit s  ratio  fit MiB  report s  ratio  report MiB"
        "  in-memory s  in-memory MiB"
    )
    for r in results:
        mem_s = f"{r['in_memory_s']:11.1f}" if r["in_memory_s"] else "    skipped"
        mem_m = f"{r['in_memory_mib']:13.0f}" if r["in_memory_mib"] else "      skipped"
        print(
            f"{r['rows']:<11,} {r['predictors']:>2} {r['floor_s']:8.2f} {r['triage_s']:6.2f}"
            f" {r['triage_vs_floor']:6.2f} {r['triage_mib']:8.0f} {r['report_s']:9.2f}"
            f" {r['report_vs_floor']:6.2f} {r['report_mib']:11.0f} {mem_s} {mem_m}"
        )


if __name__ == "__main__":
    main()
