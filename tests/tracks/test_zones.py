"""Periods and areas: the sun's elevation, interval and polygon masks, the files' errors."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pytest
from scenes import make_fixes

from comove.errors import InputError
from comove.io.zonefiles import read_areas, read_periods
from comove.tracks.alignment import AlignParams, align
from comove.tracks.zones import (
    SUNRISE_ELEVATION,
    Zone,
    ZoneParams,
    merged_intervals,
    plan_zones,
    solar_elevation,
)

UTC = dt.UTC


def ns_of(when: dt.datetime) -> int:
    return int(when.timestamp()) * 1_000_000_000


def crossings(lon: float, lat: float, near: dt.datetime) -> tuple[list, list]:
    """Return the sunrises and sunsets (UTC) within 18 h of ``near``, to the second."""
    t = ns_of(near) + np.arange(-18 * 3600, 18 * 3600, 1, dtype=np.int64) * 10**9
    up = solar_elevation(t, np.full(t.size, lon), np.full(t.size, lat)) > SUNRISE_ELEVATION
    when = lambda idx: [dt.datetime.fromtimestamp(t[i] / 1e9, UTC) for i in idx]  # noqa: E731
    return when(np.flatnonzero(~up[:-1] & up[1:]) + 1), when(np.flatnonzero(up[:-1] & ~up[1:]) + 1)


def nearest_gap(found: list, expected: dt.datetime) -> float:
    """Return the seconds between ``expected`` and the nearest of ``found``."""
    return min(abs((f - expected).total_seconds()) for f in found)


PLACES = [  # (name, lon, lat)
    ("Greenwich", 0.0, 51.4769),
    ("Quito", -78.4678, -0.1807),
    ("Sydney", 151.2093, -33.8688),
    ("Anchorage", -149.9003, 61.2181),
    ("Nairobi", 36.8219, -1.2921),
]
DATES = [dt.date(2026, 3, 20), dt.date(2026, 6, 21), dt.date(2026, 9, 23), dt.date(2026, 12, 21)]


@pytest.mark.parametrize("name, lon, lat", PLACES, ids=[p[0] for p in PLACES])
def test_sunrise_and_sunset_agree_with_the_astral_library(name, lon, lat):
    # reference: astral (package registry), its own implementation of the sun's position;
    # its sunrise and sunset use the same -0.833° convention
    from astral import Observer
    from astral.sun import sunrise, sunset

    where = Observer(latitude=lat, longitude=lon)
    for day in DATES:
        for reference, ours in ((sunrise, 0), (sunset, 1)):
            expected = reference(where, date=day, tzinfo=UTC)
            found = crossings(lon, lat, expected)[ours]
            assert nearest_gap(found, expected) < 60, (name, day, found, expected)


def test_sunrise_and_sunset_agree_with_an_almanac():
    # London (51.5072 N, 0.1276 W) at the June solstice: sunrise 04:43 and sunset 21:21
    # BST, i.e. 03:43 and 20:21 UTC; at the December solstice 08:04 and 15:53 GMT.
    # Almanac values as printed in sunrise tables for London (from memory, not checked);
    # tables round to the minute, hence the two-minute tolerance.
    for day, rise_hm, set_hm in [(dt.date(2026, 6, 21), (3, 43), (20, 21)),
                                 (dt.date(2026, 12, 21), (8, 4), (15, 53))]:  # fmt: skip
        for ours, (h, m) in ((0, rise_hm), (1, set_hm)):
            expected = dt.datetime(day.year, day.month, day.day, h, m, tzinfo=UTC)
            found = crossings(-0.1276, 51.5072, expected)[ours]
            assert nearest_gap(found, expected) <= 120, (day, found, expected)


def test_polar_night_and_midnight_sun():
    # Tromsø, 69.65 N: the sun stays below the horizon all day at the December solstice
    # and above it all day at the June solstice (common knowledge of the Arctic)
    for day, up in ((dt.datetime(2026, 12, 21, tzinfo=UTC), False),
                    (dt.datetime(2026, 6, 21, tzinfo=UTC), True)):  # fmt: skip
        t = ns_of(day) + np.arange(0, 86400, 600, dtype=np.int64) * 10**9
        elevation = solar_elevation(t, np.full(t.size, 18.96), np.full(t.size, 69.65))
        assert ((elevation > SUNRISE_ELEVATION) == up).all()


def test_merged_intervals_join_overlapping_and_touching_ones():
    start, end = np.array([10, 0, 3, 20, 12]), np.array([15, 3, 5, 25, 18])
    assert merged_intervals(start, end).tolist() == [[0, 5], [10, 18], [20, 25]]


def walker_snaps(lonlat: bool = False):
    """Two objects for 10 s: one walks across x = 5 (an area's edge), one stays at x = 1."""
    t = np.tile(np.arange(10.0), 2)
    obj = np.repeat([0, 1], 10)
    x = np.r_[np.arange(10.0), np.ones(10)]
    fixes = make_fixes(obj, t, x, np.zeros(20), np.zeros(20, dtype=int))
    return align(fixes, AlignParams(step=1.0, max_gap=0.5))


def test_period_zone_keeps_the_entries_in_its_intervals():
    snaps = walker_snaps()
    zone = Zone(period="p", intervals=np.array([[2 * 10**9, 4 * 10**9], [7 * 10**9, 8 * 10**9]]))
    kept = zone.apply(snaps)
    assert sorted(set(kept.times(kept.snap) // 10**9)) == [2, 3, 7]  # end excluded
    assert kept.n_snapshots == snaps.n_snapshots  # the grid stays


def test_an_object_counts_in_an_area_only_while_inside(tmp_path):
    path = tmp_path / "areas.geojson"
    square = [[[0, -1], [5, -1], [5, 1], [0, 1], [0, -1]]]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "west"},
         "geometry": {"type": "Polygon", "coordinates": square}}]}))  # fmt: skip
    snaps = walker_snaps()
    with pytest.warns(UserWarning, match="read as the tracks' x/y"):
        zones = plan_zones(ZoneParams(areas=str(path)), snaps)
    assert [(z.period, z.area) for z in zones] == [("all", "all"), ("all", "west")]
    kept = zones[1].apply(snaps)
    walker = kept.obj == 0
    # x = 0..5 inside (the edge counts), 6..9 outside; the other object always inside
    assert sorted(kept.x[walker].tolist()) == [0, 1, 2, 3, 4, 5]
    assert (kept.obj == 1).sum() == 10


def write(path, text):
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    "text, message",
    [
        ("name,start\nx,2026-01-01\n", "no column end"),
        ("name,start,end\nx,2026-01-02,2026-01-01\n", "line 2: the period 'x' ends before"),
        ("name,start,end\nx,2026-01-01,2026-01-02\n,2026-01-03,2026-01-04\n",
         "line 3: a period without a name"),
        ("name,start,end\nx,2026-01-01,soon\n", "line 2: cannot read the end time 'soon'"),
        ("name,start,end\n", "has no rows"),
    ],
)  # fmt: skip
def test_bad_periods_files_name_the_file_and_line(tmp_path, text, message):
    path = write(tmp_path / "periods.csv", text)
    with pytest.raises(InputError, match=message) as err:
        read_periods(path)
    assert str(err.value).startswith(str(path))


def test_periods_file_reads_names_and_zone_less_times_in_the_given_zone(tmp_path):
    path = write(
        tmp_path / "p.csv",
        "name,start,end\nnight,2026-01-01T18:00,2026-01-02T06:00\n"
        "night,2026-01-02T18:00,2026-01-03T06:00\nday,2026-01-02T06:00,2026-01-02T18:00\n",
    )
    periods = read_periods(path, time_zone="Europe/Lisbon")
    assert periods.names == ["night", "day"]
    assert periods.name.tolist() == [0, 0, 1]
    assert periods.start[0] == ns_of(dt.datetime(2026, 1, 1, 18, tzinfo=UTC))  # WET = UTC+0
    with pytest.raises(InputError, match="may not be named 'all'"):
        plan_zones(ZoneParams(periods=str(write(tmp_path / "a.csv",
                   "name,start,end\nall,2026-01-01,2026-01-02\n"))), walker_snaps())  # fmt: skip


def test_bad_areas_files_are_refused(tmp_path):
    point = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "properties": {"name": "p"},
                "geometry": {"type": "Point", "coordinates": [0, 0]},
            }
        ],
    }
    path = write(tmp_path / "a.geojson", json.dumps(point))
    with pytest.raises(InputError, match="feature 1: a Point is not an area"):
        read_areas(path)
    with pytest.raises(InputError, match="no column 'zone' of area names; its columns: name"):
        read_areas(path, "zone")
    with pytest.raises(InputError, match="cannot read the areas"):
        read_areas(write(tmp_path / "b.geojson", "not json"))


def test_day_night_needs_tracks_on_the_earth_and_missing_files_are_named(tmp_path):
    with pytest.raises(InputError, match="day-night needs tracks on the Earth"):
        plan_zones(ZoneParams(periods="Day-Night"), walker_snaps())
    with pytest.raises(InputError, match="periods file nowhere.csv not found"):
        ZoneParams(periods="nowhere.csv")
    with pytest.raises(InputError, match="areas file nowhere.gpkg not found"):
        ZoneParams(areas="nowhere.gpkg")
