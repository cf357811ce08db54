"""The fleet's depot areas: a valid areas file, and per-area results that follow its geometry.

Which vehicles enter an area is read here from the committed fixes and polygons, not
from the generator, so the checks hold whatever layout the generator draws.
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import geopandas
import numpy as np
import pandas as pd
import pytest
import shapely

from comove.io.results import overall
from comove.pipeline.core import groups

FLEET = Path(__file__).resolve().parents[1] / "synthetic_tracks" / "fleet"
DEPOTS = FLEET / "depots.geojson"
RUN = {"preset": "vehicles", "radius": 150.0, "max_speed": 60.0, "replicates": 0, "seed": 1}
# an object counts in an area from its positions on the grid; fixes within one step's drive
# (15 s at up to 25 m/s) of the edge may fall either side of it
EDGE_M = 400.0


def _generator():
    spec = importlib.util.spec_from_file_location("fleet_generate", FLEET / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def depots() -> geopandas.GeoDataFrame:
    return geopandas.read_file(DEPOTS, engine="pyogrio")


@pytest.fixture(scope="module")
def fixes() -> geopandas.GeoDataFrame:
    truth = json.loads((FLEET / "truth.json").read_text())
    raw = pd.read_csv(FLEET / "vehicles.csv").drop(index=[b["row"] for b in truth["bad_rows"]])
    raw["time"] = pd.to_datetime(raw["timestamp"], utc=True)
    return geopandas.GeoDataFrame(
        raw, geometry=geopandas.points_from_xy(raw["longitude"], raw["latitude"]), crs=4326
    )


@pytest.fixture(scope="module")
def runs() -> tuple:
    zoned = groups(str(FLEET / "vehicles.csv"), areas=str(DEPOTS), **RUN)
    plain = groups(str(FLEET / "vehicles.csv"), **RUN)
    return zoned, plain


def _in_metres(frame: geopandas.GeoDataFrame) -> geopandas.GeoDataFrame:
    return frame.to_crs(frame.estimate_utm_crs())


def _visitors(depots: geopandas.GeoDataFrame, fixes: geopandas.GeoDataFrame) -> dict[str, set]:
    """Area name -> the vehicles with at least one fix inside it."""
    out = {}
    for name, shape in zip(depots["name"], depots.geometry, strict=True):
        inside = shapely.contains_xy(shape, fixes["longitude"], fixes["latitude"])
        out[name] = set(fixes.loc[inside, "vehicle_id"])
    return out


def _convoys() -> set[str]:
    truth = json.loads((FLEET / "truth.json").read_text())
    return {";".join(e["members"]) for e in truth["episodes"]}


def test_depots_are_named_valid_polygons_in_lonlat(depots):
    assert depots.crs.to_epsg() == 4326
    assert "name" in depots.columns and depots["name"].is_unique
    assert 2 <= len(depots) <= 3
    assert (depots.geom_type == "Polygon").all() and depots.is_valid.all()
    # exterior rings counter-clockwise, as GeoJSON asks
    assert all(shapely.is_ccw(p.exterior) for p in depots.geometry)
    areas_km2 = _in_metres(depots).area / 1e6
    assert ((areas_km2 > 1) & (areas_km2 < 100)).all()
    assert not shapely.intersects(*depots.geometry[:2])


def test_depots_file_is_what_the_generator_writes():
    assert _generator().depot_areas() == json.loads(DEPOTS.read_text())


def test_depots_lie_on_the_circuits_and_hold_different_traffic(depots, fixes):
    visitors = _visitors(depots, fixes)
    convoy_members = {m for pair in _convoys() for m in pair.split(";")}
    names = dict(zip(depots["name"], depots.index, strict=True))
    assert visitors["north_yard"] and visitors["north_yard"] <= convoy_members
    assert visitors["south_yard"] and not visitors["south_yard"] & convoy_members
    # each area is crossed, not just grazed: its visitors spend a good share of time inside
    for name in names:
        inside = fixes[fixes["vehicle_id"].isin(visitors[name])]
        shape = depots.geometry[names[name]]
        share = shapely.contains_xy(shape, inside["longitude"], inside["latitude"]).mean()
        assert share > 0.05, name


def test_per_area_episodes_follow_the_geometry(runs, depots, fixes):
    zoned, plain = runs
    pd.testing.assert_frame_equal(overall(zoned.episodes), plain.episodes)
    pd.testing.assert_frame_equal(overall(zoned.dyads), plain.dyads)
    episodes = zoned.episodes
    assert set(episodes["period"]) == {"all"}
    visitors = _visitors(depots, fixes)
    convoys = _convoys()
    for name in depots["name"]:
        expected = {c for c in convoys if set(c.split(";")) <= visitors[name]}
        found = episodes[episodes["area"] == name]
        assert set(found["members"]) == expected, name
        assert (found["roles"] == "escort;hauler").all()
    assert len(episodes[episodes["area"] == "north_yard"]) >= 4
    # the patrol and the van do meet in the south yard, but only head-on and for a moment
    south = zoned.dyads[zoned.dyads["area"] == "south_yard"]
    assert len(south) >= 1 and (south["together_snapshots"] <= 2).all()
    assert set(south[["role_a", "role_b"]].to_numpy().ravel()) == {"patrol", "service_van"}


def test_an_episode_in_an_area_is_a_stretch_of_one_over_everything_inside_the_area(
    runs, depots, fixes
):
    zoned, _ = runs
    episodes = zoned.episodes
    everything = episodes[episodes["area"] == "all"]
    metric = _in_metres(fixes)
    near = _in_metres(depots).buffer(EDGE_M)
    for _, ep in episodes[episodes["area"] != "all"].iterrows():
        start, end = pd.Timestamp(ep["start"]), pd.Timestamp(ep["end"])
        same = everything[everything["members"] == ep["members"]]
        assert ((same["start"] <= start) & (same["end"] >= end)).any(), ep["episode"]
        members = ep["members"].split(";")
        during = metric[metric["vehicle_id"].isin(members) & metric["time"].between(start, end)]
        assert len(during) >= 2 * len(members)
        shape = near[int(np.flatnonzero(depots["name"] == ep["area"])[0])]
        assert during.within(shape).all(), ep["episode"]
    # the tables over an area count only the time inside it
    north = zoned.dyads[zoned.dyads["area"] == "north_yard"].set_index(["object_a", "object_b"])
    whole = zoned.dyads[zoned.dyads["area"] == "all"].set_index(["object_a", "object_b"])
    for pair, row in north.iterrows():
        assert 0 < row["together_s"] < whole.loc[pair, "together_s"] / 2
