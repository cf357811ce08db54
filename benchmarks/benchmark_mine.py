"""Benchmark of ``comove mine`` and ``comove groups`` at sports scale, beside a bare reference.

Run from the repository root::

    python benchmarks/benchmark_mine.py [--minutes 90] [--hz 25] [--out bench-out]

It writes an invented match (23 objects at 25 Hz for 90 minutes: 3.1 M fixes)
to Parquet, then measures, each in a fresh subprocess so that peak memory is
its own:

1. the bare reference: read the file with pyarrow, put the fixes on the grid
   (they already are), and one scipy cKDTree radius query over all snapshots
   laid side by side; once as it is, once with OpenBLAS on one thread (as the
   ``comove`` command line runs itself);
2. ``comove mine`` on the same file with ``--max-size 3``;
3. ``comove groups --preset team-sport`` (episodes and dyads) on the same file;
4. a straightforward per-snapshot loop (networkx graph + clique enumeration
   per snapshot, counting participation from the cliques), timed on a sample
   of snapshots and scaled to the whole match.

After one untimed run of each (compiled bytecode, warm file cache), 1-3 run
in turn for ``--repeat`` rounds, so that every round of each meets the same
load on a shared machine; the ratios to the reference are medians of the
per-round ratios, and beside them the ratio of the fastest runs (the least
disturbed by other load). Wall time and peak resident memory (ru_maxrss) are printed as
a Markdown table; paste it into docs/performance.md with the date and machine.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd

RADIUS = 5.0

#: Prefix that runs the reference with OpenBLAS on one thread, as ``comove`` runs itself.
ONE_BLAS_THREAD = "import os; os.environ['OPENBLAS_NUM_THREADS'] = '1'\n"
ROLES = (
    ["keeper"]
    + ["centre_back"] * 2
    + ["full_back"] * 2
    + ["midfielder"] * 3
    + ["winger"] * 2
    + ["striker"]
)


def invented_match(minutes: float, hz: float, seed: int = 5) -> pd.DataFrame:
    """Return an invented match: two sides of 11 and one official on a 105 x 68 m pitch."""
    rng = np.random.default_rng(seed)
    n_t = int(minutes * 60 * hz)
    dt = 1.0 / hz
    # a slowly wandering ball-side centre that everyone is drawn towards
    walk = np.cumsum(rng.normal(0, 3.0, (n_t, 2)), axis=0) * np.sqrt(dt)
    centre = np.array([52.5, 34.0]) + np.array([30.0, 20.0]) * np.tanh(walk / 40)
    frames = []
    roles = [f"home_{r}" for r in ROLES] + [f"away_{r}" for r in ROLES] + ["official"]
    for k, role in enumerate(roles):
        home_spot = rng.uniform([10, 5], [95, 63])
        drift = np.cumsum(rng.normal(0, 1.0, (n_t, 2)), axis=0) * np.sqrt(dt)
        pos = 0.6 * home_spot + 0.4 * centre + 8 * np.tanh(drift / 8)
        frames.append(
            pd.DataFrame(
                {
                    "player": f"P{k:02d}",
                    "t": 1_790_000_000 + np.arange(n_t) * dt,
                    "x": np.clip(pos[:, 0], 0, 105),
                    "y": np.clip(pos[:, 1], 0, 68),
                    "role": role,
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


REFERENCE = textwrap.dedent("""
    import sys, time, numpy as np, pyarrow.parquet as pq
    from scipy.spatial import cKDTree
    t0 = time.perf_counter()
    table = pq.read_table(sys.argv[1], columns=["player", "t", "x", "y"])
    t = table["t"].to_numpy(); x = table["x"].to_numpy(); y = table["y"].to_numpy()
    snap = np.round((t - t.min()) * float(sys.argv[3])).astype(np.int64)
    order = np.argsort(snap, kind="stable")
    snap, x, y = snap[order], x[order], y[order]
    r = float(sys.argv[2])
    pitch = (x.max() - x.min()) + 2 * r + 1
    tree = cKDTree(np.column_stack([x - x.min() + snap * pitch, y]),
                   balanced_tree=False, compact_nodes=False)
    pairs = tree.query_pairs(r, output_type="ndarray")
    print(len(pairs), time.perf_counter() - t0)
""")

NAIVE = textwrap.dedent("""
    import sys, time, itertools, numpy as np, pandas as pd, networkx as nx
    frame = pd.read_parquet(sys.argv[1])
    r = float(sys.argv[2]); sample = int(sys.argv[3])
    times = np.sort(frame["t"].unique())
    pick = set(times[np.linspace(0, times.size - 1, sample).astype(int)].tolist())
    frame = frame[frame["t"].isin(pick)]
    t0 = time.perf_counter()
    for _, snap in frame.groupby("t"):
        pts = snap[["x", "y"]].to_numpy(); roles = snap["role"].to_numpy()
        g = nx.Graph(); g.add_nodes_from(range(len(pts)))
        for a, b in itertools.combinations(range(len(pts)), 2):
            if np.hypot(*(pts[a] - pts[b])) <= r:
                g.add_edge(a, b)
        members = {}
        for clique in nx.enumerate_all_cliques(g):
            if len(clique) > 3:
                break
            key = tuple(sorted(roles[clique]))
            if len(clique) > 1 and len(set(key)) == len(key):
                members.setdefault(key, set()).update(clique)
        counts = pd.Series(roles).value_counts()
        for key, objs in members.items():
            min(sum(roles[o] == f for o in objs) / counts[f] for f in key)
    print(time.perf_counter() - t0)
""")


def run_measured(cmd: list[str], repeat: int = 1) -> tuple[float, float, str]:
    """Return the median wall seconds, peak RSS MiB and stdout of ``repeat`` subprocess runs."""
    runs = [_run_once(cmd) for _ in range(repeat)]
    walls = sorted(r[0] for r in runs)
    return walls[len(walls) // 2], max(r[1] for r in runs), runs[-1][2]


def run_rounds(
    commands: dict[str, list[str]], rounds: int
) -> dict[str, tuple[list[float], float, str]]:
    """Run every command once untimed, then ``rounds`` times in turn.

    Returns, per command, its wall times (one per round), peak RSS MiB and the
    last stdout. Interleaving puts each round of every command under the same
    load, so that ratios between commands are steadier than their times on a
    shared machine; the untimed run leaves compiled bytecode and the file cache
    as a user's second run finds them.
    """
    for cmd in commands.values():
        _run_once(cmd)
    out: dict[str, tuple[list[float], float, str]] = {k: ([], 0.0, "") for k in commands}
    for _ in range(rounds):
        for name, cmd in commands.items():
            wall, peak, stdout = _run_once(cmd)
            walls, top, _ = out[name]
            out[name] = ([*walls, wall], max(top, peak), stdout)
    return out


def _median(values: list[float]) -> float:
    return float(np.median(values))


def _run_once(cmd: list[str]) -> tuple[float, float, str]:
    """Run ``cmd`` once; return its wall seconds, peak memory (MiB) and stdout.

    The peak is the larger of the largest single process's peak RSS (the
    kernel's own figure for the command and its children) and the largest sum,
    sampled every 0.2 s, of the proportional set sizes (PSS) of the command's
    process tree, so that worker processes count with the command (PSS shares
    pages the processes share, so forked workers are not counted twice).
    """
    wrapper = textwrap.dedent("""
        import json, resource, subprocess, sys, threading, time
        try:
            import psutil
        except ImportError:
            psutil = None
        t0 = time.perf_counter()
        p = subprocess.Popen(sys.argv[1:], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True)
        tree = [0]
        def watch():
            root = psutil.Process(p.pid)
            while p.poll() is None:
                total = 0
                try:
                    procs = [root, *root.children(recursive=True)]
                except psutil.Error:
                    break
                for q in procs:
                    try:
                        total += q.memory_full_info().pss
                    except psutil.Error:
                        pass
                tree[0] = max(tree[0], total)
                time.sleep(0.2)
        if psutil is not None:
            threading.Thread(target=watch, daemon=True).start()
        out, err = p.communicate()
        wall = time.perf_counter() - t0
        single = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        if p.returncode:
            sys.stderr.write(err); sys.exit(p.returncode)
        print(json.dumps({"wall": wall, "peak": max(single, tree[0] / 2**20), "out": out}))
    """)
    # bytecode may be written, as on a user's machine (some shells forbid it)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    done = subprocess.run(
        [sys.executable, "-c", wrapper, *cmd], capture_output=True, text=True, check=True,
        env=env,
    )  # fmt: skip
    res = json.loads(done.stdout)
    return res["wall"], res["peak"], res["out"]


def main() -> None:
    """Run the benchmark and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=90.0)
    parser.add_argument("--hz", type=float, default=25.0)
    parser.add_argument("--naive-sample", type=int, default=3000)
    parser.add_argument("--repeat", type=int, default=5, help="timed rounds of each; medians count")
    parser.add_argument(
        "--replicates", type=int, default=0,
        help="also time `comove mine --replicates N` in every round, as a ratio to the "
        "untested `mine` of the same round",
    )  # fmt: skip
    parser.add_argument("--out", type=Path, default=Path("bench-out"))
    parser.add_argument("--walls", type=Path, help="also write every round's wall times (JSON)")
    parser.add_argument(
        "--time-major", action="store_true",
        help="write the file frame by frame (all players at one time, then the next) "
        "instead of player by player",
    )  # fmt: skip
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    data = args.out / "match.parquet"
    frame = invented_match(args.minutes, args.hz)
    if args.time_major:  # frame by frame, as many tracking feeds deliver them
        frame = frame.sort_values(["t", "player"], kind="stable", ignore_index=True)
    frame.to_parquet(data, index=False)
    n_snap = frame["t"].nunique()
    print(f"{len(frame):,} fixes, {n_snap:,} snapshots, {frame['player'].nunique()} objects")

    results = args.out / "results"
    cli = [sys.executable, "-m", "comove.cli"]
    common = ["--step", str(1 / args.hz), "--force", "--quiet", "--replicates", "0"]
    commands = {
            "reference": [sys.executable, "-c", REFERENCE, str(data), str(RADIUS), str(args.hz)],
            # the same with OpenBLAS on one thread, as the command line runs it
            "reference_1blas": [sys.executable, "-c", ONE_BLAS_THREAD + REFERENCE, str(data),
                                str(RADIUS), str(args.hz)],
            "mine": [*cli, "mine", str(data), "--radius", str(RADIUS), "--max-size", "3",
                     *common, "--out", str(results)],
            "groups": [*cli, "groups", str(data), "--preset", "team-sport", *common,
                       "--out", str(args.out / "groups")],
    }  # fmt: skip
    if args.replicates:
        commands["tested"] = [*cli, "mine", str(data), "--radius", str(RADIUS), "--max-size",
                              "3", "--step", str(1 / args.hz), "--force", "--quiet",
                              "--replicates", str(args.replicates), "--seed", "1",
                              "--out", str(args.out / "permuted")]  # fmt: skip
    measured = run_rounds(commands, args.repeat)
    ref_walls, ref_peak, ref_out = measured["reference"]
    blas_walls = measured["reference_1blas"][0]
    mine_walls, mine_peak, _ = measured["mine"]
    groups_walls, groups_peak, _ = measured["groups"]
    ref_wall, mine_wall, groups_wall = map(_median, (ref_walls, mine_walls, groups_walls))
    mine_ratio = _median([m / r for m, r in zip(mine_walls, ref_walls, strict=True)])
    groups_ratio = _median([g / r for g, r in zip(groups_walls, ref_walls, strict=True)])
    perm_wall = _median(measured["tested"][0]) if args.replicates else None
    naive_wall, _, naive_out = run_measured(
        [sys.executable, "-c", NAIVE, str(data), str(RADIUS), str(args.naive_sample)]
    )
    naive_per_snapshot = float(naive_out.split()[-1]) / args.naive_sample
    naive_total = naive_per_snapshot * n_snap
    patterns = pd.read_csv(results / "patterns.csv")
    print()
    print("| run | wall time (s) | peak memory (MiB) |")
    print("|---|---:|---:|")
    print(
        f"| bare reference (pyarrow read + one cKDTree radius pass) | {ref_wall:.1f} | "
        f"{ref_peak:.0f} |"
    )
    print(f"| bare reference, OpenBLAS on one thread | {_median(blas_walls):.1f} | — |")
    print(f"| `comove mine --max-size 3` | {mine_wall:.1f} | {mine_peak:.0f} |")
    print(
        f"| `comove groups --preset team-sport` (episodes and dyads) | {groups_wall:.1f} | "
        f"{groups_peak:.0f} |"
    )
    print(
        f"| per-snapshot networkx cliques (scaled from {args.naive_sample:,} snapshots) | "
        f"{naive_total:.0f} | — |"
    )
    if perm_wall is not None:
        print(f"| `comove mine --replicates {args.replicates}` | {perm_wall:.1f} | — |")
    print()
    each = ", ".join(f"{g / r:.2f}" for g, r in zip(groups_walls, ref_walls, strict=True))
    print(f"groups / reference: {groups_ratio:.2f}x (median of {args.repeat} rounds: {each}); "
          f"fastest / fastest: {min(groups_walls) / min(ref_walls):.2f}x")  # fmt: skip
    blas_ratio = _median([g / r for g, r in zip(groups_walls, blas_walls, strict=True)])
    print(f"groups / reference with OpenBLAS on one thread: {blas_ratio:.2f}x "
          f"(fastest / fastest: {min(groups_walls) / min(blas_walls):.2f}x)")  # fmt: skip
    if perm_wall is not None:
        tested = [t / m for t, m in zip(measured["tested"][0], mine_walls, strict=True)]
        print(f"mine --replicates {args.replicates} / untested mine: "
              f"{_median(tested):.1f}x (median of {args.repeat} rounds: "
              + ", ".join(f"{r:.1f}" for r in tested) + ")")  # fmt: skip
    print(
        f"mine / reference: {mine_ratio:.2f}x (fastest / fastest: "
        f"{min(mine_walls) / min(ref_walls):.2f}x); "
        f"per-snapshot loop / comove: {naive_total / mine_wall:.1f}x; "
        f"{ref_out.split()[0]} neighbour pairs; {len(patterns)} patterns kept"
    )
    print(f"cores: {os.cpu_count()}, python {sys.version.split()[0]}, {time.strftime('%Y-%m-%d')}")
    if args.walls is not None:  # every round's wall times, for pooling several runs
        walls = {name: runs[0] for name, runs in measured.items()}
        args.walls.write_text(json.dumps(walls, indent=1) + "\n")


if __name__ == "__main__":
    main()
