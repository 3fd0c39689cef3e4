"""Benchmark `triage sample`: wall time and peak memory at two sizes, side by side.

Each size is written by a fresh child process whose own peak RSS comes from `os.wait4`;
a flat memory profile shows as about the same peak at 2M and 10M rows. Run from the repository root:

    python bench/bench_sample.py [--sizes 2000000 10000000] [--format parquet|csv]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHILD = """
import sys
from triage.data.scenario import write_scenario
write_scenario(sys.argv[1], n_rows=int(sys.argv[2]), seed=0)
"""


def run_one(n_rows: int, out: Path) -> tuple[float, float, float]:
    """Write `n_rows` rows in a child process; return (seconds, peak RSS in MB, file MB)."""
    start = time.perf_counter()
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(out), str(n_rows)])
    # os.wait4 gives this child's own resource use (Linux: ru_maxrss in KiB)
    _, status, usage = os.wait4(child.pid, 0)
    elapsed = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode != 0:
        raise SystemExit(f"writing {n_rows:,} rows failed with exit code {child.returncode}")
    size_mb = out.stat().st_size / 1e6
    out.unlink()
    return elapsed, usage.ru_maxrss / 1024, size_mb


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[2_000_000, 10_000_000])
    parser.add_argument("--format", choices=["parquet", "csv"], default="parquet")
    args = parser.parse_args()
    print(f"{'rows':>12} {'seconds':>9} {'rows/s':>12} {'peak RSS MB':>12} {'file MB':>9}")
    results = []
    with tempfile.TemporaryDirectory() as folder:
        for n_rows in sorted(args.sizes):
            out = Path(folder) / f"bench.{args.format}"
            elapsed, peak_mb, size_mb = run_one(n_rows, out)
            results.append((n_rows, elapsed, peak_mb))
            print(
                f"{n_rows:>12,} {elapsed:>9.1f} {n_rows / elapsed:>12,.0f} "
                f"{peak_mb:>12,.0f} {size_mb:>9,.0f}"
            )
    (small_n, small_t, small_peak), (big_n, big_t, big_peak) = results[0], results[-1]
    print(
        f"rows x{big_n / small_n:.1f}: time x{big_t / small_t:.2f}, "
        f"peak RSS x{big_peak / small_peak:.2f} (flat memory: close to x1)"
    )


if __name__ == "__main__":
    main()
