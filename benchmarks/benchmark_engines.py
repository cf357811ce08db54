"""Benchmark of the dask engine: one worker against two on the sports match, same tables.

Runs ``comove mine`` with null replicates on the benchmark's invented match
(``benchmark_mine.invented_match``: 23 players, 25 Hz, 90 minutes) three ways:
the local engine with ``--jobs 2``, and the dask engine with a local cluster
of one and of two worker processes. Prints the wall time of each, the speed-up
of two dask workers over one, and whether every table written is identical
(byte for byte) across the three.

    python benchmarks/benchmark_engines.py --replicates 39
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from benchmark_mine import RADIUS, invented_match, run_measured  # noqa: E402

TABLES = ("patterns.csv", "participation.csv", "participation_series.parquet")


def main() -> None:
    """Write the match, run the three engines, print times and whether the tables agree."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=90.0)
    parser.add_argument("--replicates", type=int, default=39)
    parser.add_argument("--out", type=Path, default=Path("bench-engines"))
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    data = args.out / "match.parquet"
    invented_match(args.minutes, 25.0).to_parquet(data, index=False)
    base = [sys.executable, "-m", "comove.cli", "mine", str(data), "--radius", str(RADIUS),
            "--max-size", "3", "--step", "0.04", "--replicates", str(args.replicates),
            "--seed", "1", "--force", "--quiet"]  # fmt: skip
    runs = {
        "local, 2 jobs": ["--engine", "local", "--jobs", "2"],
        "dask, 1 worker": ["--engine", "dask", "--jobs", "1"],
        "dask, 2 workers": ["--engine", "dask", "--jobs", "2"],
    }
    walls = {}
    for k, (name, extra) in enumerate(runs.items()):
        wall, peak, _ = run_measured([*base, *extra, "--out", str(args.out / f"run{k}")])
        walls[name] = wall
        print(f"{name:16s} {wall:7.1f} s  peak {peak:6.0f} MiB")
    gain = walls["dask, 1 worker"] / walls["dask, 2 workers"]
    print(f"dask: 2 workers / 1 worker speed-up {gain:.2f}x")
    same = all(
        (args.out / "run0" / t).read_bytes() == (args.out / f"run{k}" / t).read_bytes()
        for t in TABLES
        for k in (1, 2)
        if (args.out / "run0" / t).exists()
    )
    print(f"tables identical across the three runs: {same}")


if __name__ == "__main__":
    main()
