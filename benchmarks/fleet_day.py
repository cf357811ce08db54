"""An invented fleet day for benchmarks: many vehicles, one fix a minute, lon/lat.

Every vehicle, type and place is made up. N vehicles drive for a number of
hours in a square region (a correlated random walk: speed and heading drift
smoothly; the walls reflect), each reporting a fix every ``interval`` seconds
with a uniform jitter of ``jitter`` seconds, as fleet telematics do. A share of
the vehicles is planted in convoys: a leader and one to three followers that
keep 15-65 m behind it on its track, half of the convoys all day, half for a
stretch of 30 minutes to 3 hours after which they part (the follower's own
drive before and after is moved to meet the convoy, so that nobody jumps).
Each fix is the vehicle's position at its own jittered time. Positions are in
a local plane (metres) turned into longitude and latitude around an
arbitrary point in open water (equirectangular, which is exact enough for a
benchmark over tens of kilometres).

Used by ``benchmarks/benchmark_fleet.py``; run on its own it writes a Parquet
file and the convoy truth beside it::

    python benchmarks/fleet_day.py --vehicles 1000 --hours 24 --out fleet.parquet
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pandas as pd

#: Invented vehicle types and their shares of the fleet.
TYPES = {"courier": 0.35, "hauler": 0.25, "coach": 0.1, "cab": 0.2, "escort": 0.1}

#: Centre of the region (degrees): an arbitrary point in open water.
CENTRE_LON, CENTRE_LAT = -31.0, 41.0
EARTH_RADIUS_M = 6_371_008.8  # mean Earth radius (IUGG)


def _walk(rng: np.random.Generator, n: int, steps: int, dt: float, side: float) -> np.ndarray:
    """Return (steps, n, 2) positions of n correlated random walks in a square of ``side`` m."""
    pos = np.empty((steps, n, 2))
    xy = rng.uniform(0, side, (n, 2))
    heading = rng.uniform(0, 2 * np.pi, n)
    speed = rng.uniform(4.0, 20.0, n)  # m/s: urban to open-road driving
    for k in range(steps):  # generator only: one vectorised step per time step
        heading += rng.normal(0, 0.35, n)
        speed = np.clip(speed + rng.normal(0, 0.8, n), 0.0, 28.0)
        xy = xy + (speed * dt)[:, None] * np.column_stack([np.cos(heading), np.sin(heading)])
        for axis in (0, 1):  # reflecting walls
            low, high = xy[:, axis] < 0, xy[:, axis] > side
            xy[low, axis] = -xy[low, axis]
            xy[high, axis] = 2 * side - xy[high, axis]
            flip = low | high
            heading[flip] = (np.pi - heading[flip]) if axis == 0 else -heading[flip]
        pos[k] = xy
    return pos


def fleet_day(
    vehicles: int = 10_000,
    hours: float = 24.0,
    interval: float = 60.0,
    jitter: float = 5.0,
    convoy_share: float = 0.05,
    seed: int = 7,
) -> tuple[pd.DataFrame, list[dict]]:
    """Return the fixes of an invented fleet day and its planted convoys.

    Parameters
    ----------
    vehicles : int
        Number of vehicles.
    hours : float
        Length of the day.
    interval, jitter : float
        Seconds between fixes, and the half-width of their uniform jitter.
    convoy_share : float
        Share of the vehicles that lead a convoy.
    seed : int
        Seed of the generator.

    Returns
    -------
    frame : DataFrame
        Columns ``vehicle``, ``type``, ``time`` (UTC), ``lon``, ``lat``;
        sorted by time, as a feed delivers it.
    convoys : list of dict
        ``members`` (leader first), ``start`` and ``end`` (ISO UTC), ``all_day``.
    """
    rng = np.random.default_rng(seed)
    steps = int(hours * 3600 / interval) + 1
    side = np.sqrt(vehicles / 3.0) * 1000.0  # about three vehicles per km2
    pos = _walk(rng, vehicles, steps, interval, side)
    convoys = _plant_convoys(rng, pos, vehicles, steps, interval, convoy_share)
    t0 = np.datetime64("2026-03-02T00:00:00", "ns")
    seconds = np.arange(steps) * interval
    offset = rng.uniform(-jitter, jitter, (steps, vehicles))
    offset[0] = np.abs(offset[0])  # nothing before the day starts
    offset[-1] = -np.abs(offset[-1])
    times = seconds[:, None] + offset
    # each fix is where the vehicle is at its own (jittered) time: along its path
    # between the neighbouring whole minutes
    ahead = offset >= 0
    other = np.clip(np.arange(steps)[:, None] + np.where(ahead, 1, -1), 0, steps - 1)
    share = (np.abs(offset) / interval)[..., None]
    at = pos + share * (np.take_along_axis(pos, other[..., None], axis=0) - pos)
    x, y = at[..., 0] - side / 2, at[..., 1] - side / 2
    lat = CENTRE_LAT + np.degrees(y / EARTH_RADIUS_M)
    lon = CENTRE_LON + np.degrees(x / (EARTH_RADIUS_M * np.cos(np.radians(CENTRE_LAT))))
    names = np.array([f"V{k:05d}" for k in range(vehicles)])
    kinds = rng.choice(list(TYPES), size=vehicles, p=list(TYPES.values()))
    frame = pd.DataFrame({
        "vehicle": np.tile(names, steps),
        "type": np.tile(kinds, steps),
        "time": t0 + (times.ravel() * 1e9).astype("timedelta64[ns]"),
        "lon": lon.ravel(),
        "lat": lat.ravel(),
    })  # fmt: skip
    frame["time"] = frame["time"].dt.tz_localize("UTC")
    for c in convoys:
        c["members"] = [str(names[m]) for m in c["members"]]
        c["start"] = str(pd.Timestamp(t0 + np.timedelta64(int(c["start"] * interval), "s")))
        c["end"] = str(pd.Timestamp(t0 + np.timedelta64(int(c["end"] * interval), "s")))
    return frame.sort_values("time", kind="stable", ignore_index=True), convoys


def _plant_convoys(
    rng: np.random.Generator,
    pos: np.ndarray,
    vehicles: int,
    steps: int,
    interval: float,
    share: float,
) -> list[dict]:
    """Move followers behind their leaders for a stretch; return the convoys (step indices)."""
    n_convoys = int(vehicles * share)
    picked = rng.permutation(vehicles)
    convoys, used = [], 0
    for _ in range(n_convoys):  # generator only: one vectorised stretch per convoy
        size = int(rng.integers(2, 5))
        if used + size > vehicles:
            break
        leader, followers = picked[used], picked[used + 1 : used + size]
        used += size
        if len(convoys) % 2:  # half for a stretch of the day, half all day
            length = int(rng.integers(int(1800 / interval), int(10800 / interval)))
            start = int(rng.integers(0, max(steps - length, 1)))
            end = min(start + length, steps - 1)
        else:
            start, end = 0, steps - 1
        track = pos[start : end + 1, leader]
        step = np.diff(track, axis=0, prepend=track[:1] - 1e-3)
        back = step / np.maximum(np.hypot(step[:, :1], step[:, 1:]), 1e-9)
        for k, f in enumerate(followers):
            gap = 15.0 + 20.0 * rng.random() + 10.0 * k  # m: close convoy driving
            behind = track - gap * back
            # the follower's own drive before and after is moved to meet the convoy, so
            # that it joins and leaves at its own speed, never with a jump
            pos[:start, f] += behind[0] - pos[start, f]
            pos[end + 1 :, f] += behind[-1] - pos[end, f]
            pos[start : end + 1, f] = behind
        convoys.append({"members": [int(leader), *map(int, followers)], "start": start,
                        "end": end, "all_day": start == 0 and end == steps - 1})  # fmt: skip
    return convoys


def main() -> None:
    """Write a fleet day to Parquet, and its convoys to a JSON file beside it."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--vehicles", type=int, default=10_000)
    parser.add_argument("--hours", type=float, default=24.0)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--out", type=Path, default=Path("fleet_day.parquet"))
    args = parser.parse_args()
    frame, convoys = fleet_day(args.vehicles, args.hours, seed=args.seed)
    frame.to_parquet(args.out, index=False, row_group_size=1_000_000)
    args.out.with_suffix(".convoys.json").write_text(json.dumps(convoys, indent=1))
    print(f"{len(frame):,} fixes of {args.vehicles:,} vehicles, {len(convoys)} convoys")


if __name__ == "__main__":
    main()
