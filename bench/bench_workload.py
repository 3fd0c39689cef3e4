"""Full passes on real-looking tables against the decode floor, side by side in one run.

Cases (each file generated here by our own code, at every size in `--rows`):

- ``admin``: an administrative extract: 6 numeric predictors with 2% missing values each,
  three text categoricals of 12, 60 and 400 levels with skewed (Zipf-like) shares, a
  weights column and a target, in row groups of 1,000,000 rows;
- ``admin-sorted``: the same rows sorted by the 60-level column, as many extracts are;
- ``numeric8``, ``numeric30``: the all-numeric files of `bench_fit.py`.

For each case and size it runs, in turn and `--repeat` times (so a slow spell of a shared
machine hits every contender alike), each in a fresh interpreter with its peak resident
memory:

- floor: polars alone reading the model's columns in bounded batches and touching every
  value (sums of the numbers, byte lengths of the text);
- ``triage fit --rows all``;
- ``triage report --rows all`` (with ``--by`` the 60-level column in the admin cases);
- ``triage export --all`` to a Parquet file in a temporary folder (deleted after each run).

It prints the median seconds of each, its ratio to the median floor, its median CPU seconds
(every thread; steadier than wall time while other work shares the machine) and the largest
peak memory. Usage::

    python bench/bench_workload.py                      # 2M and 20M rows, every case, 3 runs
    python bench/bench_workload.py --rows 2000000 --repeat 1 --cases admin,numeric8
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from bench_fit import DATA, compile_once, make_file, measure_cpu, warm_cache

LEVELS = {"region": 12, "district": 60, "office": 400}
"""The admin case's text categoricals and their numbers of levels."""

SORTED_BY = "district"
NUMERIC = [f"x{i}" for i in range(1, 7)]
MISSING_SHARE = 0.02
GROUP_ROWS = 1_000_000

FLOOR = """
import polars as pl, sys
columns = sys.argv[2].split(",")
lf = pl.scan_parquet(sys.argv[1]).select(columns)
text = [c for c, t in lf.collect_schema().items() if t == pl.String]
numbers = [c for c in columns if c not in text]
touch = [pl.sum_horizontal(numbers).sum(), *[pl.col(c).str.len_bytes().sum() for c in text]]
total = 0.0
for frame in lf.collect_batches(chunk_size=65536):
    total += sum(float(v or 0) for v in frame.select(touch).row(0))
"""

TRIAGE = """
import sys
from triage.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


def zipf_shares(n_levels: int, exponent: float = 1.1) -> np.ndarray:
    """Skewed level shares, as real codes have: share of level k proportional to 1 / k^s."""
    weights = 1.0 / np.arange(1, n_levels + 1) ** exponent
    return weights / weights.sum()


def make_admin_file(path: Path, n_rows: int, *, seed: int = 0) -> None:
    """Write the administrative case: numbers with gaps, skewed text codes, weights, target."""
    if path.exists():
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    names = {
        column: np.array([f"{column[0].upper()}{k:03d}" for k in range(n)])
        for column, n in LEVELS.items()
    }
    effects = {column: rng.normal(scale=0.5, size=n) for column, n in LEVELS.items()}
    beta = rng.normal(size=len(NUMERIC))
    tmp = path.with_suffix(".tmp")
    writer = None
    for start in range(0, n_rows, GROUP_ROWS):
        m = min(GROUP_ROWS, n_rows - start)
        codes = {c: rng.choice(n, size=m, p=zipf_shares(n)) for c, n in LEVELS.items()}
        x = rng.gamma(3.0, 2.0, size=(m, len(NUMERIC))) + codes["region"][:, None] * 0.1
        y = 10.0 + x @ beta + rng.standard_t(6, size=m)
        y += sum(effects[c][codes[c]] for c in LEVELS)
        columns: dict[str, pa.Array] = {"y": pa.array(y)}
        for j, name in enumerate(NUMERIC):
            gaps = rng.random(m) < MISSING_SHARE
            columns[name] = pa.array(x[:, j], mask=gaps)
        for column in LEVELS:
            columns[column] = pa.array(names[column][codes[column]], type=pa.string())
        columns["weight"] = pa.array(rng.gamma(2.0, 0.5, size=m) + 0.05)
        table = pa.table(columns)
        if writer is None:
            writer = pq.ParquetWriter(tmp, table.schema)
        writer.write_table(table, row_group_size=GROUP_ROWS)
    assert writer is not None
    writer.close()
    tmp.rename(path)


def make_sorted_copy(source: Path, path: Path) -> None:
    """Write `source` sorted by `SORTED_BY` (a stable sort), in the same row groups."""
    if path.exists():
        return
    import polars as pl

    tmp = path.with_suffix(".tmp")
    pl.read_parquet(source).sort(SORTED_BY, maintain_order=True).write_parquet(
        tmp, row_group_size=GROUP_ROWS
    )
    tmp.rename(path)


def case_commands(case: str, path: Path, out: Path) -> tuple[list[str], dict[str, list[str]]]:
    """The floor's columns and the triage command of each contender for one case."""
    if case.startswith("admin"):
        terms = ",".join([*NUMERIC, *LEVELS])
        model = ["-y", "y", "-x", terms, "--weights", "weight", "--max-levels", "400"]
        columns = ["y", *NUMERIC, *LEVELS, "weight"]
        by = ["--by", SORTED_BY]
    else:
        p = int(case.removeprefix("numeric"))
        names = [f"x{i}" for i in range(p)]
        model, columns, by = ["-y", "y", "-x", ",".join(names)], ["y", *names], []
    data = [str(path)]
    full = ["--rows", "all"]
    return columns, {
        "fit": ["fit", *data, *model, *full, "--json"],
        "report": ["report", *data, *model, *full, *by, "--json"],
        "export": ["export", *data, *model, "--all", "--out", str(out), "--force"],
    }


def case_file(case: str, n_rows: int) -> Path:
    """Return the file of a case, generated once in a child process.

    Not here: Linux carries a process's peak resident memory over into the children it
    starts, so a parent that had held a generated table would inflate every measurement.
    """
    if case.startswith("numeric"):
        path = DATA / f"bench_{n_rows}_{int(case.removeprefix('numeric'))}.parquet"
    elif case == "admin":
        path = DATA / f"admin_{n_rows}.parquet"
    else:
        path = DATA / f"admin_{n_rows}_by_{SORTED_BY}.parquet"
    if not path.exists():
        subprocess.run(
            [sys.executable, __file__, "--make", case, "--rows", str(n_rows)], check=True
        )
    return path


def make_case_file(case: str, n_rows: int) -> None:
    """Generate the file of a case (and, for the sorted copy, the file it sorts)."""
    if case.startswith("numeric"):
        p = int(case.removeprefix("numeric"))
        make_file(DATA / f"bench_{n_rows}_{p}.parquet", n_rows, p)
        return
    admin = DATA / f"admin_{n_rows}.parquet"
    make_admin_file(admin, n_rows)
    if case != "admin":
        make_sorted_copy(admin, DATA / f"admin_{n_rows}_by_{SORTED_BY}.parquet")


def run_case(
    case: str, n_rows: int, repeat: int, extra: list[str], baseline: str | None
) -> dict[str, object]:
    """Time the floor and every contender on one case, in turn, `repeat` times.

    With `baseline` (the folder of another checkout), each triage command also runs from
    that checkout, in the same turn, as `<name>@base` (without `extra`, which an older
    checkout may not know).
    """
    started = time.perf_counter()
    path = case_file(case, n_rows)
    print(f"{case} {n_rows:,}: file ready in {time.perf_counter() - started:.1f} s", flush=True)
    warm_cache(path)
    runs: dict[str, list[tuple[float, float, float]]] = {}
    with tempfile.TemporaryDirectory(prefix="triage-bench-") as folder:
        out = Path(folder) / "diagnostics.parquet"
        columns, commands = case_commands(case, path, out)
        for _ in range(repeat):
            runs.setdefault("floor", []).append(measure_cpu(FLOOR, str(path), ",".join(columns)))
            for name, command in commands.items():
                runs.setdefault(name, []).append(measure_cpu(TRIAGE, *command, *extra))
                out.unlink(missing_ok=True)
                if baseline is not None:
                    measured = measure_cpu(TRIAGE, *command, pythonpath=baseline)
                    runs.setdefault(f"{name}@base", []).append(measured)
                    out.unlink(missing_ok=True)
    row: dict[str, object] = {"case": case, "rows": n_rows}
    floor_s = statistics.median(r[0] for r in runs["floor"])
    for name, measured in runs.items():
        seconds = statistics.median(r[0] for r in measured)
        row[f"{name}_s"] = round(seconds, 3)
        row[f"{name}_vs_floor"] = round(seconds / floor_s, 3)
        row[f"{name}_mib"] = round(max(r[1] for r in measured))
        row[f"{name}_cpu_s"] = round(statistics.median(r[2] for r in measured), 3)
    print(json.dumps(row), flush=True)
    return row


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", default="2000000,20000000", help="comma-separated row counts")
    parser.add_argument(
        "--cases", default="admin,admin-sorted,numeric8,numeric30", help="comma-separated cases"
    )
    parser.add_argument("--repeat", type=int, default=3, help="runs of each contender, in turn")
    parser.add_argument("--workers", type=int, default=None, help="pass `--workers N` to triage")
    parser.add_argument(
        "--baseline",
        metavar="DIR",
        help="also run each triage command from this checkout (e.g. a git worktree of an "
        "earlier commit), in the same turns, for a before/after table",
    )
    parser.add_argument("--make", metavar="CASE", help=argparse.SUPPRESS)  # in a child process
    args = parser.parse_args()
    if args.make:
        make_case_file(args.make, int(args.rows))
        return
    extra = [] if args.workers is None else ["--workers", str(args.workers)]
    compile_once()
    rows = [
        run_case(case, int(n), args.repeat, extra, args.baseline)
        for case in args.cases.split(",")
        for n in args.rows.split(",")
    ]
    names = ["floor", "fit", "report", "export"]
    if args.baseline is not None:
        names += ["fit@base", "report@base", "export@base"]
    header = f"{'case':<13} {'rows':>11}" + "".join(
        f" {n + ' s':>9} {'x':>5} {'cpu s':>6} {'MiB':>5}" for n in names
    )
    print("\n" + header)
    for r in rows:
        cells = "".join(
            f" {r[f'{n}_s']:9.2f} {r[f'{n}_vs_floor']:5.2f} {r[f'{n}_cpu_s']:6.1f}"
            f" {r[f'{n}_mib']:5}"
            for n in names
        )
        print(f"{r['case']:<13} {r['rows']:>11,}{cells}")


if __name__ == "__main__":
    main()
