"""Benchmark `triage sample`: wall time and peak memory at two sizes, side by side.

Each size is written by a fresh child process, so `RUSAGE_CHILDREN` (the largest peak
RSS among finished children) is read before and after each run; a flat memory profile
shows as about the same peak at 2M and 10M rows. Run from the repository root:

    python bench/bench_sample.py [--sizes 2000000 10000000] [--format parquet|csv]
"""

from __future__ import annotations

import argparse
import resource
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
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", CHILD, str(out), str(n_rows)], check=True)
    elapsed = time.perf_counter() - start
    peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if peak_kb <= before:
        # ru_maxrss over children is a running maximum: a smaller child cannot be told apart
        print(f"note: peak for {n_rows:,} rows is at most that of an earlier run", file=sys.stderr)
    size_mb = out.stat().st_size / 1e6
    out.unlink()
    return elapsed, peak_kb / 1024, size_mb


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
