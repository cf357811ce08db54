"""Neighbour search of ``comove focal``: from the focal objects only, against every pair.

Run from the repository root::

    python benchmarks/focal_search.py [--objects 2000] [--snapshots 300] [--repeats 5]

On uniform scenes (objects placed at random in a square, a fresh placement per
snapshot, about four neighbours each within the radius), one role holds a share
of the objects. For each share, :func:`comove.roles.focal.focal_chain` is timed
two ways, interleaved, and the best of the repeats is kept:

- ``from focal``: the neighbours searched from the focal entries only
  (:func:`comove.tracks.neighbours.neighbours_of`);
- ``every pair`` (the bare reference): every pair searched
  (:func:`comove.tracks.neighbours.neighbour_pairs`) and those with a focal
  object kept.

The two give the same tally (checked on every share). Prints a Markdown table
for docs/performance.md; ``comove.roles.focal.FROM_FOCAL_SHARE`` is set from
where the ratio crosses 1.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from comove.roles.focal import FROM_FOCAL_SHARE, FocalParams, focal_chain
from comove.tracks.alignment import Snapshots
from comove.tracks.neighbours import neighbour_pairs

SHARES = (0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.35, 0.5)
RADIUS = 50.0
NEIGHBOURS = 4.0  # mean neighbours of an object within the radius


def scene(rng: np.random.Generator, n_obj: int, n_snap: int, share: float) -> Snapshots:
    """Return aligned snapshots: every object present at every snapshot, placed at random."""
    side = float(np.sqrt(n_obj * np.pi * RADIUS**2 / NEIGHBOURS))
    n = n_obj * n_snap
    role = (rng.random(n_obj) < share).astype(np.int32)
    role[0] = 1  # at least one focal object
    return Snapshots(
        step_ns=10**9, first_index=0, n_snapshots=n_snap,
        snap=np.repeat(np.arange(n_snap), n_obj), obj=np.tile(np.arange(n_obj, dtype=np.int32),
                                                             n_snap),
        role=np.tile(role, n_snap), x=rng.uniform(0, side, n), y=rng.uniform(0, side, n),
        objects=np.array([f"o{k}" for k in range(n_obj)]), roles=np.array(["other", "focal"]),
        max_gap_ns=0,
    )  # fmt: skip


def main() -> None:
    """Time both searches per focal share and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--objects", type=int, default=2000)
    parser.add_argument("--snapshots", type=int, default=300)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    params = FocalParams(focal_role="focal", radius=RADIUS)
    print(f"{args.objects} objects x {args.snapshots} snapshots, about {NEIGHBOURS:g} "
          f"neighbours each; best of {args.repeats}; the run uses the focal search up to "
          f"{FROM_FOCAL_SHARE:.0%}\n")  # fmt: skip
    print("| focal share | every pair (s) | from focal (s) | ratio (every / from focal) |")
    print("|---:|---:|---:|---:|")
    for share in SHARES:
        snaps = scene(rng, args.objects, args.snapshots, share)
        best = {"every": np.inf, "focal": np.inf}
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            every = focal_chain(snaps, params, pairs=neighbour_pairs(snaps, RADIUS))
            t1 = time.perf_counter()
            # no pairs given: searched from the focal entries (below the share) or not
            from_focal = _from_focal(snaps, params)
            t2 = time.perf_counter()
            best["every"] = min(best["every"], t1 - t0)
            best["focal"] = min(best["focal"], t2 - t1)
        assert np.array_equal(every.masks, from_focal.masks)
        assert np.array_equal(every.count, from_focal.count)
        print(f"| {share:.0%} | {best['every']:.3f} | {best['focal']:.3f} | "
              f"{best['every'] / best['focal']:.2f} |")  # fmt: skip


def _from_focal(snaps: Snapshots, params: FocalParams):
    """Return the tally searched from the focal entries, whatever their share."""
    import comove.roles.focal as focal

    kept = focal.FROM_FOCAL_SHARE
    focal.FROM_FOCAL_SHARE = 1.0
    try:
        return focal_chain(snaps, params)
    finally:
        focal.FROM_FOCAL_SHARE = kept


if __name__ == "__main__":
    main()
