"""Benchmark of ``comove mine`` and ``comove groups`` on an invented fleet day, beside a bare limit.

The input is ``fleet_day.py``'s fleet (N vehicles, a fix a minute with a
+-5 s jitter, lon/lat, five vehicle types, planted convoys). The *bare limit*
reads the same Parquet file with pyarrow, puts the fixes on the minute grid,
projects them to metres and finds every pair within the radius at every
snapshot with one k-d tree pass: what any tool must at least do. Each command
runs as its own process, interleaved with the reference round by round, and
is reported as a ratio to it (machines are noisy; ratios from the same round
are steadier). Peak memory is measured for the whole day and for its first
half, to show whether memory grows with the length of the input.

It also reports how many dyad rows ``groups`` writes and the share of the
all-day convoys' leader-follower pairs whose half-weight index is 0.9 or more.

    python benchmarks/benchmark_fleet.py --vehicles 1000            # a few minutes
    python benchmarks/benchmark_fleet.py --vehicles 10000 --repeat 1
"""

from __future__ import annotations

import argparse
import json
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from benchmark_mine import run_rounds  # noqa: E402
from fleet_day import fleet_day  # noqa: E402

RADIUS = 150.0
COLUMNS = ["--id", "vehicle", "--time", "time", "--lon", "lon", "--lat", "lat", "--role", "type"]

REFERENCE = textwrap.dedent("""
    import sys, time, numpy as np, pyarrow.parquet as pq
    from scipy.spatial import cKDTree
    t0 = time.perf_counter()
    table = pq.read_table(sys.argv[1], columns=["vehicle", "time", "lon", "lat"])
    t = table["time"].to_numpy().astype("int64") / 1e9
    lon = table["lon"].to_numpy(); lat = table["lat"].to_numpy()
    snap = np.round((t - t.min()) / 60.0).astype(np.int64)
    k = np.radians(lat.mean())
    x = np.radians(lon - lon.mean()) * 6371008.8 * np.cos(k)
    y = np.radians(lat - lat.mean()) * 6371008.8
    r = float(sys.argv[2])
    width = (x.max() - x.min()) + 2 * r + 1
    tree = cKDTree(np.column_stack([x - x.min() + snap * width, y]),
                   balanced_tree=False, compact_nodes=False)
    pairs = tree.query_pairs(r, output_type="ndarray")
    print(len(pairs), time.perf_counter() - t0)
""")


def convoy_hwi_share(dyads: pd.DataFrame, convoys: list[dict]) -> tuple[float, int]:
    """Return the share of all-day convoy leader-follower pairs with HWI >= 0.9, and how many."""
    hwi = {(a, b): h for a, b, h in zip(dyads["object_a"], dyads["object_b"],
                                         dyads["half_weight_index"], strict=True)}  # fmt: skip
    pairs = [tuple(sorted((c["members"][0], f))) for c in convoys if c["all_day"]
             for f in c["members"][1:]]  # fmt: skip
    found = [hwi.get(p, 0.0) >= 0.9 for p in pairs]
    return float(np.mean(found)) if found else float("nan"), len(pairs)


def main() -> None:
    """Write the fleet day (and its first half), run the rounds, print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--vehicles", type=int, default=10_000)
    parser.add_argument("--hours", type=float, default=24.0)
    parser.add_argument("--repeat", type=int, default=3, help="timed rounds; medians count")
    parser.add_argument("--out", type=Path, default=Path("bench-fleet"))
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    frame, convoys = fleet_day(args.vehicles, args.hours)
    whole, half = args.out / "fleet_day.parquet", args.out / "fleet_half_day.parquet"
    frame.to_parquet(whole, index=False, row_group_size=1_000_000)
    cut = frame["time"].min() + pd.Timedelta(hours=args.hours / 2)
    frame[frame["time"] < cut].to_parquet(half, index=False, row_group_size=1_000_000)
    print(f"{len(frame):,} fixes, {args.vehicles:,} vehicles, {len(convoys)} convoys")
    del frame

    cli = [sys.executable, "-m", "comove.cli"]
    common = [*COLUMNS, "--step", "60", "--replicates", "0", "--force", "--quiet"]
    commands = {}
    for name, data in (("day", whole), ("half", half)):
        commands[f"reference_{name}"] = [sys.executable, "-c", REFERENCE, str(data), str(RADIUS)]
        commands[f"mine_{name}"] = [*cli, "mine", str(data), "--radius", str(RADIUS), *common,
                                    "--out", str(args.out / f"mine_{name}")]  # fmt: skip
        commands[f"groups_{name}"] = [*cli, "groups", str(data), "--preset", "vehicles", *common,
                                      "--out", str(args.out / f"groups_{name}")]  # fmt: skip
    measured = run_rounds(commands, args.repeat)
    rows = []
    for name in ("day", "half"):
        ref_walls = measured[f"reference_{name}"][0]
        for command in ("mine", "groups"):
            walls, peak, _ = measured[f"{command}_{name}"]
            ratio = np.median([w / r for w, r in zip(walls, ref_walls, strict=True)])
            rows.append({"input": name, "command": command, "wall_s": np.median(walls),
                         "reference_s": np.median(ref_walls), "ratio": ratio,
                         "peak_mib": peak,
                         "reference_peak_mib": measured[f"reference_{name}"][1]})  # fmt: skip
    table = pd.DataFrame(rows)
    print(table.to_string(index=False, float_format=lambda v: f"{v:.2f}"))
    for command in ("mine", "groups"):
        day = table[(table.command == command) & (table.input == "day")]["peak_mib"].iloc[0]
        part = table[(table.command == command) & (table.input == "half")]["peak_mib"].iloc[0]
        print(f"{command}: peak memory day / half day = {day / part:.2f}")
    dyads = pd.read_csv(args.out / "groups_day" / "dyads.csv")
    share, n_pairs = convoy_hwi_share(dyads, convoys)
    every = args.vehicles * (args.vehicles - 1) // 2
    print(f"dyad rows: {len(dyads):,} (all pairs would be {every:,})")
    print(f"all-day convoy pairs with half-weight index >= 0.9: {share:.1%} of {n_pairs}")
    (args.out / "fleet_result.json").write_text(json.dumps(rows, indent=1))


if __name__ == "__main__":
    main()
