"""Calibration and power of the swap test of who leads (``leadership.csv``), on invented pairs.

Run from the repository root::

    python benchmarks/lead_calibration.py [--pairs 40] [--scenes 3] [--replicates 99]

Each scene holds ``--pairs`` pairs of walkers 1 km apart, 10 Hz for 150 s. A
pair walks one wandering course (1.5 m/s, smooth random turns); each walker
adds its own smooth wobble of about ``--wobble`` metres (white noise smoothed
over ``--smooth`` seconds, its memory), so their headings agree closely but
not exactly. The swap test's blocks are 4.1 s long here (2 s delays each way):
a ``--smooth`` well beyond that checks the test when headings remember longer
than a block.

- Calibration: both walk the course at the same time (no lead). The share of
  pairs with p at most 0.05 and 0.10 should be at most those levels, within
  the binomial band of that many independent pairs.
- Power: the follower walks the course ``delay`` seconds after the leader, for
  several delays. Reported: the share of pairs with a clear leader, the share
  whose leader is named right, and the share with p at most 0.05.

Runs ``comove.pipeline.core.groups`` with ``links="snapshot"``, radius 3 m,
``max_delay`` 2 s. Prints Markdown tables for docs/leadership.md.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d
from scipy.stats import binom

from comove.pipeline.core import groups

STEP = 0.1
SAMPLES = 1500
MARGIN = 50  # samples of course walked before the first snapshot (for a late follower)


def pairs_scene(
    rng: np.random.Generator, n_pairs: int, delay_s: float, wobble_m: float, smooth_s: float
) -> pd.DataFrame:
    """Return tracks of ``n_pairs`` pairs: the follower walks the course ``delay_s`` later.

    Each walker's wobble is white noise smoothed by a Gaussian of ``smooth_s`` seconds.
    """
    lag = int(round(delay_s / STEP))
    t = np.arange(SAMPLES) * STEP
    frames = []
    for k in range(n_pairs):
        heading = np.cumsum(rng.normal(0.0, 0.08, SAMPLES + MARGIN))
        step = 1.5 * STEP * np.column_stack([np.cos(heading), np.sin(heading)])
        course = np.cumsum(step, axis=0) + [0.0, 1000.0 * k]
        walked = {"lead": course[MARGIN:], "follow": course[MARGIN - lag : MARGIN - lag + SAMPLES]}
        for m, (name, xy) in enumerate(walked.items()):
            shake = gaussian_filter1d(rng.normal(0.0, 1.0, (SAMPLES, 2)), smooth_s / STEP, axis=0)
            xy = xy + shake * (wobble_m / shake.std()) + [0.0, 0.5 * m]
            frames.append(pd.DataFrame({"id": f"p{k:03d}{name}", "time": t, "x": xy[:, 0],
                                        "y": xy[:, 1], "role": name}))  # fmt: skip
    return pd.concat(frames)


def run(frame: pd.DataFrame, replicates: int, seed: int) -> pd.DataFrame:
    """Return the leadership table of a scene, with its tests."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = groups(frame, radius=3.0, step=STEP, links="snapshot", max_delay=2.0,
                        replicates=replicates, seed=seed)  # fmt: skip
    return result.leaders


def main() -> None:
    """Run the calibration and power scenes and print their tables."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=40)
    parser.add_argument("--scenes", type=int, default=3)
    parser.add_argument("--replicates", type=int, default=99)
    parser.add_argument("--wobble", type=float, default=0.3)
    parser.add_argument(
        "--smooth",
        type=float,
        default=1.5,
        help="seconds over which a walker's wobble is smoothed (its memory)",
    )
    args = parser.parse_args()
    rng = np.random.default_rng(20261204)

    p_values = []
    for scene in range(args.scenes):
        table = run(
            pairs_scene(rng, args.pairs, 0.0, args.wobble, args.smooth), args.replicates, scene + 1
        )
        p_values.append(table["p_value"].to_numpy())
    p = np.concatenate(p_values)
    n = p.size
    print(f"Calibration: {n} pairs with no lead, {args.replicates} replicates, wobble "
          f"{args.wobble:g} m smoothed over {args.smooth:g} s\n")  # fmt: skip
    print("| level | share with p at or below it | binomial 95 % upper bound |")
    print("|---:|---:|---:|")
    for level in (0.05, 0.10):
        upper = binom.ppf(0.975, n, level) / n
        print(f"| {level:.2f} | {np.mean(p <= level):.3f} | {upper:.3f} |")

    print(f"\nPower: {args.pairs} pairs per delay, {args.replicates} replicates\n")
    print("| delay (s) | clear leader | leader named right | p at most 0.05 |")
    print("|---:|---:|---:|---:|")
    for delay in (0.1, 0.2, 0.3, 0.5, 1.0):
        table = run(
            pairs_scene(rng, args.pairs, delay, args.wobble, args.smooth), args.replicates, 7
        )
        right = table["clear_leader"] & table["leader"].str.endswith("lead")
        print(f"| {delay:g} | {table['clear_leader'].mean():.2f} | {right.mean():.2f} | "
              f"{(right & (table['p_value'] <= 0.05)).mean():.2f} |")  # fmt: skip


if __name__ == "__main__":
    main()
