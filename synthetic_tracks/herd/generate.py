"""Collared herd: 12 invented animals, hourly fixes for 30 days, one CSV per collar.

Run ``python synthetic_tracks/herd/generate.py`` to rewrite ``collars/*.csv`` and
``truth.json`` next to this file; import it and call ``generate(seed)`` for variants.

Layout (local east/north metres around an arbitrary point in open savanna):

* The four adult females graze as one group around a shared centre that travels a few km
  by day and rests at night; every female stays within about 60 m of the centre.
* Each calf follows its mother within about 30 m, except during a few creche spells
  (one in each stretch without the yearlings, 6-12 h each) when the calves gather 1.3 km
  away from the females.
* The two yearlings join the females part of the time (around 60 %); otherwise they
  range together 1.4-2.4 km off, on the side opposite the creche.
* The two adult males range alone, 2.4-4 km from the group, at right angles to the
  yearlings' side, so they are never near calves, yearlings or females.
* Datetimes have no zone and are meant as UTC; about 10 % of fixes are missed.
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import scenario_kit as kit  # noqa: E402

SEED = 20260501
HERE = Path(__file__).resolve().parent
COLLAR_DIR = "collars"
START = int(datetime(2026, 5, 1, 0, 0, tzinfo=UTC).timestamp())
DAYS = 30
HOUR = 3600
DT = 60.0  # resolution of the planted paths, seconds
LON0, LAT0 = 23.85, -20.95
RADIUS = 300.0
MAX_GAP = 3 * HOUR
MISS_RATE = 0.10
TOLERANCE = 0.015
PARAMETERS = {
    "radius": RADIUS,
    "min_participation": 0.5,
    "min_prevalence": 0.5,
    "min_prevalent_time": 86400.0,
    "step": float(HOUR),
    "max_gap": float(MAX_GAP),
}
ANIMALS = {
    "K101": "adult_female",
    "K102": "adult_female",
    "K103": "adult_female",
    "K104": "adult_female",
    "K105": "calf",
    "K106": "calf",
    "K107": "calf",
    "K108": "calf",
    "K109": "yearling",
    "K110": "yearling",
    "K111": "adult_male",
    "K112": "adult_male",
}
MOTHER = {"K105": "K101", "K106": "K102", "K107": "K103", "K108": "K104"}
YEARLING_RAMP = 4 * HOUR
CRECHE_RAMP = 2 * HOUR


def _activity(t: np.ndarray) -> np.ndarray:
    """Share of full travel speed by clock hour: resting at night, moving by day."""
    h = (t / HOUR) % 24
    return 0.06 + 0.94 * kit.smoothstep((h - 5.5) / 2) * kit.smoothstep((19.5 - h) / 2)


def _build(seed: int) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    n = DAYS * 24 * HOUR // int(DT) + 1
    t = np.arange(n) * DT
    day, hour = 24 * HOUR, HOUR

    speed = 420.0 / HOUR * (1 + 0.3 * np.tanh(kit.smooth_series(rng, n, DT, day, 1)[:, 0]))
    # Heading turns slowly (hours), so straight-line interpolation between hourly fixes
    # stays close to the planted path.
    turn = 1.0e-4 * kit.smooth_series(rng, n, DT, 3 * hour, 1)[:, 0]
    heading = rng.uniform(-np.pi, np.pi) + np.cumsum(turn * DT)
    velocity = (_activity(t) * speed)[:, None] * np.stack([np.cos(heading), np.sin(heading)], 1)
    centre = kit.fold(
        kit.integrate(velocity, DT), [-6000, -6000], [6000, 6000], rng.uniform(-1, 1, 2)
    )

    def jitter(tau: float, amp: float) -> np.ndarray:
        return kit.bounded_jitter(rng, n, DT, tau, amp)

    def smooth(tau: float) -> np.ndarray:
        return np.tanh(kit.smooth_series(rng, n, DT, tau, 1)[:, 0])

    side = rng.uniform(-np.pi, np.pi) + 1.2 * smooth(3 * day)
    toward = np.stack([np.cos(side), np.sin(side)], 1)
    yearling_gap = (1900 + 500 * smooth(2 * day))[:, None] * toward
    creche_spot = -1300.0 * toward

    yearling_iv = kit.alternating_intervals(
        rng,
        0,
        t[-1],
        (36 * hour, 96 * hour),
        (24 * hour, 60 * hour),
        YEARLING_RAMP,
        start_on=bool(rng.random() < 0.6),
    )
    # One creche spell in each long stretch without the yearlings: a calf-yearling or
    # whole-herd set then shares the yearlings' schedule instead of sitting on the
    # prevalence threshold.
    creche_iv = []
    edges = [-np.inf] + [x for a, b in yearling_iv for x in (a, b)] + [np.inf]
    for away_from, away_to in zip(edges[0::2], edges[1::2], strict=True):
        lo = max(away_from + YEARLING_RAMP, 0.0) + CRECHE_RAMP + hour
        hi = min(away_to - YEARLING_RAMP, t[-1]) - CRECHE_RAMP - hour
        length = rng.uniform(6 * hour, 12 * hour)
        if hi - lo > length:
            start = rng.uniform(lo, hi - length)
            creche_iv.append((start, start + length))
    w_y = kit.plateau_weight(t, yearling_iv, YEARLING_RAMP)
    w_c = kit.plateau_weight(t, creche_iv, CRECHE_RAMP)

    pos: dict[str, np.ndarray] = {}
    for aid, cls in ANIMALS.items():
        if cls == "adult_female":
            pos[aid] = centre + jitter(6 * hour, 42.0)
    for calf, mother in MOTHER.items():
        at_heel = pos[mother] + jitter(3 * hour, 21.0)
        in_creche = centre + creche_spot + jitter(3 * hour, 21.0)
        pos[calf] = (1 - w_c[:, None]) * at_heel + w_c[:, None] * in_creche
    for aid in ("K109", "K110"):
        pos[aid] = centre + (1 - w_y[:, None]) * yearling_gap + jitter(6 * hour, 42.0)
    for aid, turn_side in (("K111", 1.0), ("K112", -1.0)):
        angle = side + turn_side * np.pi / 2 + 0.5 * smooth(day)
        dist = 3200 + 800 * smooth(1.5 * day)
        pos[aid] = centre + dist[:, None] * np.stack([np.cos(angle), np.sin(angle)], 1)

    fixes: dict[str, np.ndarray] = {}
    for aid in ANIMALS:
        ft = np.arange(DAYS * 24) * HOUR + rng.integers(3, 61, size=DAYS * 24)
        ft = ft[rng.random(len(ft)) >= MISS_RATE]
        # A gap of exactly max_gap would test the boundary rule rather than the herd.
        while np.any(np.diff(ft) == MAX_GAP):
            ft[1:][np.diff(ft) == MAX_GAP] += 1
        fixes[aid] = ft
    noise = {aid: rng.normal(0.0, 4.0, size=(len(ft), 2)) for aid, ft in fixes.items()}
    return {
        "t": t,
        "pos": pos,
        "fixes": fixes,
        "noise": noise,
        "w_y": w_y,
        "w_c": w_c,
    }


def _iso(sec: int) -> str:
    return kit.iso_utc((START + int(sec)) * kit.NS)


def _episodes(plan: dict[str, object], grid_sec: np.ndarray) -> list[dict[str, object]]:
    """Groups that move as one between state changes of yearlings and creche."""
    idx = (grid_sec / DT).astype(int)
    w_y, w_c = plan["w_y"][idx], plan["w_c"][idx]
    females = [a for a, c in ANIMALS.items() if c == "adult_female"]
    calves, yearlings = list(MOTHER), ["K109", "K110"]
    states = {
        (1, 0): ([females + calves + yearlings], "females, calves and yearlings graze as one herd"),
        (1, 1): ([females + yearlings, calves], "calves in a creche; yearlings with the females"),
        (0, 0): ([females + calves, yearlings], "yearlings range apart as a pair"),
        (0, 1): ([females, calves, yearlings], "calves in a creche; yearlings apart"),
    }
    out = []
    for (ys, cs), (groups, how) in states.items():
        mask = (w_y == ys) & (w_c == cs)
        for a, b in kit.runs(mask):
            if grid_sec[b] - grid_sec[a] < 12 * HOUR:
                continue
            for g in groups:
                out.append(
                    {
                        "members": sorted(g),
                        "start": _iso(grid_sec[a]),
                        "end": _iso(grid_sec[b]),
                        "how": how,
                    }
                )
    return sorted(out, key=lambda e: (e["start"], e["members"]))


def generate(seed: int = SEED) -> tuple[pd.DataFrame, dict]:
    """Build the collar tracks and their truth.

    Parameters
    ----------
    seed : int
        Seed of the numpy generator; the default reproduces the committed files.

    Returns
    -------
    tuple of (pandas.DataFrame, dict)
        Columns animal, datetime (ISO 8601 without zone, UTC), longitude, latitude,
        sex_age, all collars in one frame sorted by animal and time; and the truth dict.
    """
    plan = _build(seed)
    t = plan["t"]
    parts = []
    for aid, ft in plan["fixes"].items():
        path = plan["pos"][aid]
        xy = np.stack([np.interp(ft, t, path[:, 0]), np.interp(ft, t, path[:, 1])], 1)
        lon, lat = kit.local_to_lonlat(xy + plan["noise"][aid], LON0, LAT0)
        stamps = pd.to_datetime((START + ft) * kit.NS, unit="ns").strftime("%Y-%m-%d %H:%M:%S")
        parts.append(
            pd.DataFrame(
                {
                    "animal": aid,
                    "datetime": stamps,
                    "longitude": np.round(lon, 6),
                    "latitude": np.round(lat, 6),
                    "sex_age": ANIMALS[aid],
                }
            )
        )
    frame = pd.concat(parts, ignore_index=True)

    ids = list(ANIMALS)
    grid_sec = np.arange(DAYS * 24 + 1) * HOUR
    grid_ns = (START + grid_sec) * kit.NS
    present = np.stack(
        [
            kit.presence_on_grid((START + plan["fixes"][a]) * kit.NS, grid_ns, MAX_GAP * kit.NS)
            for a in ids
        ]
    )
    pos = np.stack([plan["pos"][a][(grid_sec / DT).astype(int)] for a in ids])
    roles = np.array([[ANIMALS[a]] * len(grid_sec) for a in ids], dtype=object)

    def entry(role_set: list[str], how: str) -> dict[str, object]:
        stats = kit.planted_prevalence(pos, present, roles, role_set, RADIUS, 0.5)
        return kit.planted_entry(stats, role_set, TOLERANCE, how)

    truth = {
        "scenario": "herd",
        "description": "Twelve invented collared animals, hourly fixes for 30 days with about "
        "10 % missed; datetimes carry no zone and are UTC.",
        "input": f"{COLLAR_DIR}/*.csv",
        "columns": {
            "id": "animal",
            "time": "datetime",
            "lon": "longitude",
            "lat": "latitude",
            "role": "sex_age",
        },
        "parameters": PARAMETERS,
        "planted": [
            entry(
                ["adult_female", "calf"],
                "each calf within about 30 m of its mother except during 6-12 h creche "
                "spells 1.3 km away",
            ),
            entry(
                ["adult_female", "yearling"],
                "yearlings join the female group part of the time, otherwise range 1.4-2.4 km off",
            ),
            entry(
                ["calf", "yearling"],
                "implied: calves are at heel whenever the yearlings are with the group "
                "(creche spells fall only in the yearlings' absences)",
            ),
            entry(
                ["adult_female", "calf", "yearling"],
                "whole herd together: yearlings joined, calves at heel",
            ),
        ],
        "independent": [
            ["adult_male", "calf"],
            ["adult_male", "yearling"],
            ["adult_female", "adult_male"],
        ],
        "episodes": _episodes(plan, grid_sec),
        "decoys": [],
        "role_changes": [],
    }
    frame = frame.sort_values(["animal", "datetime"], kind="stable").reset_index(drop=True)
    return frame, truth


def write(out_dir: Path = HERE, seed: int = SEED) -> None:
    """Write one CSV per collar and truth.json into ``out_dir``."""
    frame, truth = generate(seed)
    collars = out_dir / COLLAR_DIR
    collars.mkdir(parents=True, exist_ok=True)
    for old in collars.glob("*.csv"):
        old.unlink()
    for aid, rows in frame.groupby("animal", sort=True):
        rows.to_csv(collars / f"{aid}.csv", index=False)
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")


if __name__ == "__main__":
    write()
