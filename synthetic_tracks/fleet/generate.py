"""Vehicle fleet: 18 invented vehicles on closed circuits in open country, two hours, lon/lat.

Run ``python synthetic_tracks/fleet/generate.py`` to rewrite ``vehicles.csv``,
``truth.json`` and ``depots.geojson`` next to this file; import it and call
``generate(seed)`` (or ``depot_areas(seed)``) for variants.

Layout (local east/north kilometres around an arbitrary point in open country):

* Every vehicle drives its own closed circuit; circuits are kilometres apart, so vehicles
  on different circuits only meet where two circuits touch.
* Haulers 1-4 each share their circuit with one escort. The escort normally runs 30-50 m
  behind; twice it drops back (or runs ahead) by 700-900 m for a few minutes. With
  five haulers and four escorts, {escort, hauler} is prevalent while at least three
  convoys hold (hauler participation 3/5), fewer when vehicles drop out.
* Service vans and patrols have circuits of their own. Four patrol circuits touch one
  other circuit each; both vehicles are timed to reach the touching point together,
  travelling in opposite directions: a short head-on pass (the decoys).
* Fixes come every 5-20 s with a few 2-10 minute dropouts per vehicle; three rows are
  broken on purpose (missing latitude, exact duplicate, a position several km off).
* Two depot areas, for results by area (``--areas``), are placed from the circuits
  themselves: ``north_yard`` is a disc midway between the circuits of haulers 2 and 3,
  reaching 1.5 km past each road's closest point, so both convoys cross it every lap;
  ``south_yard`` is a disc of 1.5 km around the point where patrol 2's circuit touches
  van 3's, where the two pass head-on and no convoy ever runs.
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import shapely
from shapely.geometry.polygon import orient

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import scenario_kit as kit  # noqa: E402

SEED = 20260421
HERE = Path(__file__).resolve().parent
DATA_FILE = "vehicles.csv"
DEPOTS_FILE = "depots.geojson"
START = int(datetime(2026, 4, 21, 6, 0, tzinfo=UTC).timestamp())
DURATION = 7200
LON0, LAT0 = 66.40, 47.60
RADIUS = 150.0
STEP = 10
MAX_GAP = 60
TOLERANCE = 0.01
PARAMETERS = {
    "radius": RADIUS,
    "min_participation": 0.5,
    "min_prevalence": 0.5,
    "min_prevalent_time": 600.0,
    "step": float(STEP),
    "max_gap": float(MAX_GAP),
    # well above the fleet's 25 m/s top speed: only the planted position spike exceeds it
    "max_speed": 60.0,
}
LANE_GAP = 30.0  # metres between two circuits where they touch
CONVOY_LAG = 40.0
APART_RAMP = 330.0
SPEEDS = {"hauler": (10.0, 16.0), "service_van": (11.0, 20.0), "patrol": (12.0, 22.0)}
YARD_REACH = 1500.0  # metres a depot disc reaches past each road's closest point to the other


def _vehicles() -> dict[str, str]:
    out = {f"HL-0{i}": "hauler" for i in range(1, 6)}
    out |= {f"ES-0{i}": "escort" for i in range(1, 5)}
    out |= {f"SV-0{i}": "service_van" for i in range(1, 6)}
    out |= {f"PT-0{i}": "patrol" for i in range(1, 5)}
    return out


VEHICLES = _vehicles()


class Circuit:
    """A closed, counter-clockwise road: a wavy circle parametrised by arc length.

    The radius is r0 * (1 + eps * cos(k * (theta - theta_ext))), so at ``theta_ext`` the
    road is at its widest and runs exactly perpendicular to the radius; two circuits
    touching there run side by side in opposite directions.
    """

    def __init__(
        self, centre: tuple[float, float], r0: float, eps: float, k: int, theta_ext: float
    ) -> None:
        theta = np.linspace(-np.pi, np.pi, 8193)
        r = r0 * (1 + eps * np.cos(k * (theta - theta_ext)))
        self.xy = np.asarray(centre) + r[:, None] * np.stack([np.cos(theta), np.sin(theta)], 1)
        seg = np.linalg.norm(np.diff(self.xy, axis=0), axis=1)
        self.s = np.concatenate([[0.0], np.cumsum(seg)])
        self.length = float(self.s[-1])
        self.theta = theta

    def arc_at(self, theta: float) -> float:
        return float(np.interp(theta, self.theta, self.s))

    def at(self, s: np.ndarray) -> np.ndarray:
        s = np.mod(s, self.length)
        return np.stack(
            [np.interp(s, self.s, self.xy[:, 0]), np.interp(s, self.s, self.xy[:, 1])], -1
        )


def _circuits(rng: np.random.Generator) -> tuple[dict[str, Circuit], dict[str, float]]:
    """Circuits in metres; returns them and, for touching circuits, the angle of contact."""
    km = 1000.0
    circuits: dict[str, Circuit] = {}
    contact: dict[str, float] = {}
    haul_r, van_r, pat_r, eps = 3.6 * km, 3.0 * km, 3.4 * km, 0.07
    for i, cx in enumerate((-20, -10, 0, 10), start=1):
        circuits[f"HL-0{i}"] = Circuit(
            (cx * km, 10 * km), haul_r, eps, 3, rng.uniform(-np.pi, np.pi)
        )
    circuits["HL-05"] = Circuit((20 * km, 10 * km), haul_r, eps, 3, np.pi / 2)
    contact["HL-05"] = np.pi / 2
    for i, cx in enumerate((-20, -10, 0, 10, 20), start=1):
        ext = -np.pi / 2 if i in (1, 3, 5) else rng.uniform(-np.pi, np.pi)
        circuits[f"SV-0{i}"] = Circuit((cx * km, -2 * km), van_r, eps, 3, ext)
        if i in (1, 3, 5):
            contact[f"SV-0{i}"] = -np.pi / 2
    # Patrol circuits sit just below vans 1, 3, 5 and just above hauler 5's circuit.
    below = -2 * km - van_r * (1 + eps) - LANE_GAP - pat_r * (1 + eps)
    for i, cx in zip((1, 2, 3), (-20, 0, 20), strict=True):
        circuits[f"PT-0{i}"] = Circuit((cx * km, below), pat_r, eps, 2, np.pi / 2)
        contact[f"PT-0{i}"] = np.pi / 2
    above = 10 * km + haul_r * (1 + eps) + LANE_GAP + pat_r * (1 + eps)
    circuits["PT-04"] = Circuit((20 * km, above), pat_r, eps, 2, -np.pi / 2)
    contact["PT-04"] = -np.pi / 2
    return circuits, contact


def _speed(rng: np.random.Generator, n: int, lo: float, hi: float) -> np.ndarray:
    return lo + (hi - lo) * (0.5 + 0.5 * np.tanh(kit.smooth_series(rng, n, 1.0, 300.0, 1)[:, 0]))


def _dropouts(rng: np.random.Generator, keep_clear: list[float]) -> list[tuple[int, int]]:
    """Two or three 2-10 minute dropouts, away from each other and from decoy moments."""
    out: list[tuple[int, int]] = []
    busy = [(c - 300, c + 300) for c in keep_clear]
    while len(out) < int(rng.integers(2, 4)):
        length = int(rng.integers(120, 601))
        a = int(rng.integers(60, DURATION - length - 60))
        span = (a - 120, a + length + 120)
        if all(span[1] < lo or span[0] > hi for lo, hi in busy + out):
            out.append((a, a + length))
    return out


def _layout(seed: int) -> tuple[np.random.Generator, dict[str, Circuit], dict[str, float]]:
    """The seeded generator and the circuits it draws first (shared by tracks and depots)."""
    rng = np.random.default_rng(seed)
    circuits, contact = _circuits(rng)
    return rng, circuits, contact


def _build(seed: int) -> dict[str, object]:
    rng, circuits, contact = _layout(seed)
    n = DURATION + 1
    t = np.arange(n, dtype=float)
    decoy_pairs = [("PT-01", "SV-01"), ("PT-02", "SV-03"), ("PT-03", "SV-05"), ("HL-05", "PT-04")]
    # Decoy moments sit on the mining grid, so the head-on pass shows in the snapshots.
    decoy_time = {
        pair: STEP * int(rng.integers(90, (DURATION - 900) // STEP)) for pair in decoy_pairs
    }
    meet = {v: tc for pair, tc in decoy_time.items() for v in pair}

    arc: dict[str, np.ndarray] = {}
    for vid, kind in VEHICLES.items():
        if kind == "escort":
            continue
        travelled = np.concatenate([[0.0], np.cumsum(_speed(rng, n - 1, *SPEEDS[kind]))])
        if vid in meet:
            # Phase chosen so the vehicle is at the touching point at the decoy moment.
            circ = circuits[vid]
            phase = circ.arc_at(contact[vid]) - travelled[meet[vid]]
        else:
            phase = rng.uniform(0, circuits[vid].length)
        arc[vid] = phase + travelled

    apart: dict[str, list[tuple[float, float]]] = {}
    for i in range(1, 5):
        eid, hid = f"ES-0{i}", f"HL-0{i}"
        circuits[eid] = circuits[hid]
        spans = []
        lag = CONVOY_LAG + 10.0 * np.tanh(kit.smooth_series(rng, n, 1.0, 200.0, 1)[:, 0])
        for lo, hi in ((300.0, DURATION / 2), (DURATION / 2 + 300.0, DURATION - 300.0)):
            hold = rng.uniform(0, 150)
            a = rng.uniform(lo + APART_RAMP, hi - APART_RAMP - hold)
            peak = rng.choice([-1.0, 1.0]) * rng.uniform(700, 900)
            lag += peak * kit.plateau_weight(t, [(a, a + hold)], APART_RAMP)
            spans.append((a - APART_RAMP, a + hold + APART_RAMP))
        arc[eid] = arc[hid] - lag
        apart[eid] = spans

    truth_xy = {vid: circuits[vid].at(arc[vid]) for vid in VEHICLES}
    fixes: dict[str, np.ndarray] = {}
    for vid in VEHICLES:
        steps = rng.integers(5, 21, size=DURATION // 5)
        ft = int(rng.integers(0, 10)) + np.concatenate([[0], np.cumsum(steps)])
        ft = ft[ft <= DURATION]
        clear = [tc for pair, tc in decoy_time.items() if vid in pair]
        for a, b in _dropouts(rng, clear):
            ft = ft[(ft < a) | (ft > b)]
        fixes[vid] = ft
    noise = {vid: rng.normal(0.0, 1.5, size=(len(ft), 2)) for vid, ft in fixes.items()}
    return {
        "truth_xy": truth_xy,
        "fixes": fixes,
        "noise": noise,
        "apart": apart,
        "decoy_time": decoy_time,
        "rng": rng,
    }


def _iso(sec: int) -> str:
    return kit.iso_utc((START + int(sec)) * kit.NS)


def generate(seed: int = SEED) -> tuple[pd.DataFrame, dict]:
    """Build the fleet tracks and their truth.

    Parameters
    ----------
    seed : int
        Seed of the numpy generator; the default reproduces the committed files.

    Returns
    -------
    tuple of (pandas.DataFrame, dict)
        Columns vehicle_id, timestamp (ISO 8601, Z), longitude, latitude, vehicle_type,
        exactly as written to the CSV (bad rows included); and the truth dict.
    """
    plan = _build(seed)
    rng: np.random.Generator = plan["rng"]
    parts = []
    for vid, ft in plan["fixes"].items():
        xy = plan["truth_xy"][vid][ft] + plan["noise"][vid]
        lon, lat = kit.local_to_lonlat(xy, LON0, LAT0)
        parts.append(
            pd.DataFrame(
                {"vehicle_id": vid, "sec": ft, "longitude": lon, "latitude": lat, "kind": "ok"}
            )
        )
    frame = pd.concat(parts, ignore_index=True)

    def pick(vid: str) -> int:
        """A fix well inside a regular run, so dropping it leaves a gap under max_gap."""
        rows = np.flatnonzero(frame["vehicle_id"].to_numpy() == vid)
        sec = frame["sec"].to_numpy()[rows]
        regular = np.flatnonzero((np.diff(sec)[:-1] <= 20) & (np.diff(sec)[1:] <= 20)) + 1
        regular = regular[(regular > len(rows) // 4) & (regular < 3 * len(rows) // 4)]
        return int(rows[rng.choice(regular)])

    nan_row, spike_row, dup_row = pick("SV-02"), pick("HL-03"), pick("PT-02")
    frame.loc[nan_row, ["latitude", "kind"]] = [np.nan, "missing latitude"]
    spike = plan["truth_xy"]["HL-03"][frame.loc[spike_row, "sec"]] + np.array([4500.0, 3000.0])
    lon, lat = kit.local_to_lonlat(spike, LON0, LAT0)
    frame.loc[spike_row, ["longitude", "latitude", "kind"]] = [lon, lat, "position spike"]
    duplicate = frame.loc[[dup_row]].assign(kind="exact duplicate")
    frame = pd.concat([frame, duplicate], ignore_index=True)
    frame["longitude"] = frame["longitude"].round(6)
    frame["latitude"] = frame["latitude"].round(6)
    frame["vehicle_type"] = frame["vehicle_id"].map(VEHICLES)
    # The copy lands right after its original.
    frame["copy"] = frame["kind"] == "exact duplicate"
    frame = frame.sort_values(["sec", "vehicle_id", "copy"], kind="stable").reset_index(drop=True)
    frame["timestamp"] = [_iso(s) for s in frame["sec"]]

    bad_rows = []
    for row in np.flatnonzero(frame["kind"].to_numpy() != "ok"):
        rec = frame.loc[row]
        reason, code = {
            "missing latitude": ("latitude is missing", "missing_coordinates"),
            "position spike": (
                "position jumps about 5.4 km away and back within seconds",
                "speed_spike",
            ),
            "exact duplicate": (f"exact duplicate of row {row - 1}", "exact_duplicate"),
        }[rec["kind"]]
        bad_rows.append(
            {
                "row": int(row),
                "vehicle_id": rec["vehicle_id"],
                "timestamp": rec["timestamp"],
                "reason": reason,
                "drop_reason": code,
            }
        )

    # Truth from planted positions; presence from the fixes a cleaner keeps.
    ids = list(VEHICLES)
    grid_sec = np.arange(0, DURATION + 1, STEP)
    grid_ns = (START + grid_sec) * kit.NS
    kept = frame[frame["kind"].isin(["ok", "exact duplicate"])]
    present = np.stack(
        [
            kit.presence_on_grid(
                (START + kept.loc[kept["vehicle_id"] == vid, "sec"].to_numpy()) * kit.NS,
                grid_ns,
                MAX_GAP * kit.NS,
            )
            for vid in ids
        ]
    )
    pos = np.stack([plan["truth_xy"][vid][grid_sec] for vid in ids])
    roles = np.array([[VEHICLES[v]] * len(grid_sec) for v in ids], dtype=object)
    stats = kit.planted_prevalence(pos, present, roles, ["escort", "hauler"], RADIUS, 0.5)

    episodes = []
    for i in range(1, 5):
        eid, hid = f"ES-0{i}", f"HL-0{i}"
        convoy = np.ones(len(grid_sec), dtype=bool)
        for a, b in plan["apart"][eid]:
            convoy &= (grid_sec < a) | (grid_sec > b)
        both = convoy & present[ids.index(eid)] & present[ids.index(hid)]
        for a, b in kit.runs(both):
            if grid_sec[b] - grid_sec[a] >= 300:
                episodes.append(
                    {
                        "members": sorted([eid, hid]),
                        "start": _iso(grid_sec[a]),
                        "end": _iso(grid_sec[b]),
                        "how": "escort 30-50 m behind its hauler on the same circuit",
                    }
                )
    episodes.sort(key=lambda e: (e["start"], e["members"]))

    # Every pass of two vehicles whose circuits touch is listed, not only the timed one
    # (with unequal lap times a pair can meet more than once), provided a grid snapshot
    # catches it well inside the radius; faster glimpses fall between snapshots.
    decoys = []
    for pair in plan["decoy_time"]:
        gap = np.linalg.norm(plan["truth_xy"][pair[0]] - plan["truth_xy"][pair[1]], axis=1)
        for a, b in kit.runs(gap <= RADIUS):
            on_grid = np.arange(-(-a // STEP) * STEP, b + 1, STEP)
            if len(on_grid) and gap[on_grid].min() <= RADIUS / 2:
                closest = int(on_grid[np.argmin(gap[on_grid])])
                decoys.append(
                    {
                        "members": sorted(pair),
                        "time": _iso(closest),
                        "how": "crossing paths, opposite headings",
                    }
                )
    decoys.sort(key=lambda d: (d["time"], d["members"]))

    truth = {
        "scenario": "fleet",
        "description": "Eighteen invented vehicles driving closed circuits in open country for "
        "two hours, irregular fixes with dropouts and three broken rows.",
        "input": DATA_FILE,
        "columns": {
            "id": "vehicle_id",
            "time": "timestamp",
            "lon": "longitude",
            "lat": "latitude",
            "role": "vehicle_type",
        },
        "parameters": PARAMETERS,
        "planted": [
            kit.planted_entry(
                stats,
                ["escort", "hauler"],
                TOLERANCE,
                "four escorts each run 30-50 m behind one of five haulers, dropping 700-900 m "
                "back or ahead twice; prevalent while at least half of the present escorts and of "
                "the present haulers are in convoy",
            )
        ],
        "independent": [
            ["hauler", "patrol"],
            ["escort", "patrol"],
            ["patrol", "service_van"],
            ["hauler", "service_van"],
        ],
        "episodes": episodes,
        "decoys": decoys,
        "role_changes": [],
        "bad_rows": bad_rows,
    }
    out = frame[["vehicle_id", "timestamp", "longitude", "latitude", "vehicle_type"]]
    return out, truth


def _yard(circuits: dict[str, Circuit], a: str, b: str, reach: float) -> shapely.Polygon:
    """A disc midway between the closest points of two circuits, reaching ``reach`` past each.

    It holds a stretch of both roads where they come closest; for touching circuits, the
    two roads within about ``reach`` of the touching point.
    """
    road_a, road_b = shapely.LineString(circuits[a].xy), shapely.LineString(circuits[b].xy)
    near_a, near_b = shapely.shortest_line(road_a, road_b).coords
    centre = shapely.Point((np.asarray(near_a) + np.asarray(near_b)) / 2)
    return centre.buffer(shapely.distance(road_a, road_b) / 2 + reach, quad_segs=16)


def depot_areas(seed: int = SEED) -> dict:
    """The depot areas of the fleet's layout, as a GeoJSON feature collection in lon/lat.

    ``north_yard`` lies midway between the circuits of haulers 2 and 3, so both escorted
    convoys cross it on every lap; ``south_yard`` lies around the point where the circuits
    of patrol 2 and service van 3 touch, where the two pass head-on and no convoy runs.

    Parameters
    ----------
    seed : int
        Seed of the numpy generator; the default gives the committed ``depots.geojson``.

    Returns
    -------
    dict
        A GeoJSON ``FeatureCollection`` (WGS84 longitude/latitude, exterior rings
        counter-clockwise) whose features carry the properties ``name`` and ``about``.
    """
    _, circuits, _ = _layout(seed)
    yards = [
        ("north_yard", ("HL-02", "HL-03"),
         "between the circuits of haulers HL-02 and HL-03, crossed by both convoys every lap"),
        ("south_yard", ("PT-02", "SV-03"),
         "around the point where the circuits of patrol PT-02 and service van SV-03 touch"),
    ]  # fmt: skip
    features = []
    for name, (a, b), about in yards:
        shape = orient(_yard(circuits, a, b, YARD_REACH), sign=1.0)  # counter-clockwise
        lon, lat = kit.local_to_lonlat(np.asarray(shape.exterior.coords), LON0, LAT0)
        ring = [[round(float(x), 6), round(float(y), 6)] for x, y in zip(lon, lat, strict=True)]
        features.append(
            {
                "type": "Feature",
                "properties": {"name": name, "about": about},
                "geometry": {"type": "Polygon", "coordinates": [ring]},
            }
        )
    return {"type": "FeatureCollection", "features": features}


def write(out_dir: Path = HERE, seed: int = SEED) -> None:
    """Write the data file, truth.json and the depot areas into ``out_dir``."""
    frame, truth = generate(seed)
    out_dir.mkdir(parents=True, exist_ok=True)
    frame.to_csv(out_dir / DATA_FILE, index=False)
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")
    (out_dir / DEPOTS_FILE).write_text(json.dumps(depot_areas(seed), indent=1) + "\n")


if __name__ == "__main__":
    write()
