"""Calibration and power of the role-set tests of ``comove mine``, on invented movement models.

Run from the repository root::

    python benchmarks/significance_calibration.py [--scenes 40] [--replicates 99]

Calibration: scenes where roles are given at random and no role prefers another,
under three movement models, tested under both null models; the share of role-pair
p-values at or below 0.05 and 0.10 should lie within the binomial band of that
many independent draws (p-values within one scene are correlated, so the band is a
guide, not a bound). Power: a planted pair of roles whose objects keep together for
a share s of the time, among others that do not, for several s; the share of scenes
in which the planted pair's p-value is at most 0.05, for both statistics and both
null models. Prints Markdown tables for docs/significance.md.

Movement models (each object moves on its own, 1 s snapshots, 30 x 30 m):

- ``home ranges``: independent Ornstein-Uhlenbeck walkers, each around its own
  centre (spread 5 m, 20 s memory), the centres overlapping;
- ``random walks``: independent correlated random walks (speed 1 m/s, turning
  noise 0.3 rad per step) reflected at the edges;
- ``shared attractor``: everyone orbits one wandering point (a ball, a waterhole):
  the objects *are* together more than by chance, through the attractor, so the
  time shift is expected to reject and the role shuffle not.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
import pandas as pd
from scipy.stats import binom

from comove.pipeline.core import mine

SIDE = 30.0
OPTIONS = dict(radius=3.0, step=1.0, min_participation=0.25, min_prevalence=0.01, max_size=2)


def _reflect(pos: np.ndarray) -> np.ndarray:
    pos = np.abs(pos)
    return SIDE - np.abs(SIDE - pos)


def home_ranges(rng: np.random.Generator, n_obj: int, n_t: int) -> np.ndarray:
    """Independent Ornstein-Uhlenbeck walkers around their own centres; shape (n_t, n_obj, 2)."""
    centre = rng.uniform(8, SIDE - 8, (n_obj, 2))
    a = np.exp(-1 / 20.0)
    pos = np.empty((n_t, n_obj, 2))
    off = rng.normal(0, 5.0, (n_obj, 2))
    for t in range(n_t):  # a scene generator, not library code
        off = a * off + rng.normal(0, 5.0 * np.sqrt(1 - a * a), off.shape)
        pos[t] = centre + off
    return pos


def random_walks(rng: np.random.Generator, n_obj: int, n_t: int) -> np.ndarray:
    """Independent correlated random walks in the square, reflected at its edges."""
    pos = np.empty((n_t, n_obj, 2))
    here = rng.uniform(0, SIDE, (n_obj, 2))
    heading = rng.uniform(0, 2 * np.pi, n_obj)
    for t in range(n_t):
        heading = heading + rng.normal(0, 0.3, n_obj)
        here = _reflect(here + np.column_stack([np.cos(heading), np.sin(heading)]))
        pos[t] = here
    return pos


def shared_attractor(rng: np.random.Generator, n_obj: int, n_t: int) -> np.ndarray:
    """Everyone orbits one wandering point."""
    ball = _reflect(SIDE / 2 + np.cumsum(rng.normal(0, 0.8, (n_t, 2)), axis=0))
    a = np.exp(-1 / 5.0)
    off = rng.normal(0, 4.0, (n_obj, 2))
    pos = np.empty((n_t, n_obj, 2))
    for t in range(n_t):
        off = a * off + rng.normal(0, 4.0 * np.sqrt(1 - a * a), off.shape)
        pos[t] = ball[t] + off
    return pos


MODELS = {"home ranges": home_ranges, "random walks": random_walks,
          "shared attractor": shared_attractor}  # fmt: skip


def frame(pos: np.ndarray, roles: np.ndarray) -> pd.DataFrame:
    """Return id, time, x, y, role rows of positions (n_t, n_obj, 2)."""
    n_t, n_obj, _ = pos.shape
    return pd.DataFrame({
        "id": np.tile([f"o{k}" for k in range(n_obj)], n_t),
        "time": np.repeat(np.arange(n_t, dtype=float), n_obj),
        "x": pos[:, :, 0].ravel(), "y": pos[:, :, 1].ravel(),
        "role": np.tile(roles, n_t),
    })  # fmt: skip


def planted(rng: np.random.Generator, share: float, n_obj: int, n_t: int) -> np.ndarray:
    """Random walks where each object of role r1 keeps beside one of role r0 a share of the time."""
    pos = random_walks(rng, n_obj, n_t)
    # roles r0, r1, r2, r3 in turn; follower k+1 of leader k for k = 0, 4, 8
    for lead in range(0, n_obj - 1, 4):
        on = np.zeros(n_t, dtype=bool)
        length = int(round(share * n_t))
        if length:
            start = int(rng.integers(0, n_t - length + 1))
            on[start : start + length] = True
        beside = pos[:, lead] + rng.normal(0, 0.5, (n_t, 2))
        pos[:, lead + 1] = np.where(on[:, None], beside, pos[:, lead + 1])
    return pos


def band(n: int, level: float) -> str:
    """Return the 95 % binomial interval of the share of n draws at ``level``."""
    lo, hi = binom.interval(0.95, n, level)
    return f"{lo / n:.3f}–{hi / n:.3f}"


def calibration(scenes: int, replicates: int, n_obj: int, n_t: int) -> None:
    """Print the share of role-pair p-values at or below 0.05 and 0.10, per model and null."""
    print("| model | null | p-values | share ≤ 0.05 (95 % band) | share ≤ 0.10 (95 % band) |")
    print("|---|---|---:|---:|---:|")
    for name, model in MODELS.items():
        for null in ("time-shift", "role-shuffle"):
            ps = []
            for seed in range(scenes):
                rng = np.random.default_rng(seed)
                roles = rng.permutation(np.arange(n_obj) % 4).astype(str)
                found = mine(frame(model(rng, n_obj, n_t), np.char.add("r", roles)),
                             null=null, replicates=replicates, seed=seed, jobs=1,
                             **OPTIONS).tests  # fmt: skip
                ps.extend(found["p_value"].tolist())
            ps = np.asarray(ps)
            n = ps.size
            print(f"| {name} | {null} | {n} | {(ps <= 0.05).mean():.3f} ({band(n, 0.05)}) | "
                  f"{(ps <= 0.10).mean():.3f} ({band(n, 0.10)}) |", flush=True)  # fmt: skip


def power(scenes: int, replicates: int, n_obj: int, n_t: int) -> None:
    """Print the share of scenes where the planted pair has p <= 0.05, per share together."""
    shares = (0.0, 0.1, 0.2, 0.4, 0.6)
    print("| null | statistic | " + " | ".join(f"s = {s:g}" for s in shares) + " |")
    print("|---|---|" + "---:|" * len(shares))
    roles = np.char.add("r", (np.arange(n_obj) % 4).astype(str))
    for null in ("time-shift", "role-shuffle"):
        for statistic in ("continuous", "count"):
            cells = []
            for share in shares:
                hits = 0
                for seed in range(scenes):
                    rng = np.random.default_rng(1000 + seed)
                    found = mine(frame(planted(rng, share, n_obj, n_t), roles), null=null,
                                 statistic=statistic, replicates=replicates, seed=seed,
                                 jobs=1, **OPTIONS).tests.set_index("roles")  # fmt: skip
                    hits += bool("r0;r1" in found.index and found.loc["r0;r1", "p_value"] <= 0.05)
                cells.append(f"{hits / scenes:.2f}")
            print(f"| {null} | {statistic} | " + " | ".join(cells) + " |", flush=True)


def main() -> None:
    """Print both tables."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenes", type=int, default=40)
    parser.add_argument("--power-scenes", type=int, default=20)
    parser.add_argument("--replicates", type=int, default=99)
    parser.add_argument("--objects", type=int, default=12)
    parser.add_argument("--snapshots", type=int, default=300)
    parser.add_argument("--part", choices=["both", "calibration", "power"], default="both")
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    if args.part in ("both", "calibration"):
        calibration(args.scenes, args.replicates, args.objects, args.snapshots)
        print()
    if args.part in ("both", "power"):
        power(args.power_scenes, args.replicates, args.objects, args.snapshots)


if __name__ == "__main__":
    main()
