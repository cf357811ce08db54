"""Periods and areas: which aligned entries each part of the results is computed on.

With ``--periods`` and/or ``--areas`` every analysis runs once on all entries
(period ``all``, area ``all``) and once on each *zone*: a period, an area, or
a period within an area. A zone keeps the entries (object x snapshot) that
fall in it:

- in a period: the snapshot's time is in one of the period's intervals
  (``start <= t < end``);
- by day (``--periods day-night``): the sun is above the horizon where the
  object is at that moment, i.e. its geometric elevation exceeds -0.833°
  (the sun's upper limb on the horizon with standard refraction, the sunrise
  and sunset convention of almanacs); otherwise by night;
- in an area: the object's position is inside or on the area's polygon.

An analysis of a zone sees the tracks as if they held only its entries: an
object is present only while it is in the zone, so an object leaving an area
leaves its groups there, and an episode that runs across a period's end is cut
into the part within the period. Velocities are estimated from the entries in
the zone.

References
----------
.. [1] NOAA Global Monitoring Laboratory, "Solar Calculation Details" and the
   NOAA Solar Calculator spreadsheet, after J. Meeus, "Astronomical
   Algorithms", Willmann-Bell, 1991, chapters 24-25. (from memory, not checked)
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyproj

from comove.errors import ComoveNote, InputError, bad_setting
from comove.io.projection import to_lonlat
from comove.io.results import ALL_PARTS as ALL
from comove.io.zonefiles import Areas, Periods, read_areas, read_periods
from comove.tracks.alignment import Snapshots

#: ``--periods`` value that splits by the sun's elevation.
DAY_NIGHT = "day-night"
#: Geometric solar elevation (degrees) above which it is day: upper limb on the horizon.
SUNRISE_ELEVATION = -0.833


@dataclass(frozen=True)
class ZoneParams:
    """Results by period and area.

    Parameters
    ----------
    periods : str, optional
        A CSV file of named intervals (columns ``name``, ``start``, ``end``;
        several rows may share a name), or ``day-night`` to split by the sun's
        elevation at each object's position (tracks on the Earth only).
    areas : str, optional
        A file of named polygons (GeoJSON, GeoPackage or any other file
        geopandas reads).
    area_name : str, default "name"
        The areas file's column of names.
    """

    periods: str | None = field(
        default=None,
        metadata={
            "help": "also give results per period: a CSV of name,start,end (one row per "
            "interval), or day-night (lon/lat tracks: day while the sun is up where the "
            "object is)"
        },
    )
    areas: str | None = field(
        default=None,
        metadata={
            "help": "also give results per area: polygons with a name column (GeoJSON, "
            "GeoPackage, ...); an object counts in an area while it is inside"
        },
    )
    area_name: str = field(default="name", metadata={"help": "column of the areas' names"})

    def __post_init__(self) -> None:
        periods = None if self.periods is None else str(self.periods).strip()
        if periods is not None and periods.lower() == DAY_NIGHT:
            periods = DAY_NIGHT
        object.__setattr__(self, "periods", periods)
        if periods not in (None, DAY_NIGHT) and not Path(periods).is_file():
            raise bad_setting("periods", f"file {periods} not found; give a CSV of "
                              f"name,start,end, or {DAY_NIGHT}")  # fmt: skip
        if self.areas is not None and not Path(self.areas).is_file():
            raise bad_setting("areas", f"file {self.areas} not found; give a file of polygons")

    @property
    def split(self) -> bool:
        """Return whether results are split at all."""
        return self.periods is not None or self.areas is not None


@dataclass(frozen=True)
class Zone:
    """One part of the results: a period, an area, or a period within an area.

    Attributes
    ----------
    period, area : str
        Names; ``all`` for every time or everywhere.
    intervals : ndarray or None
        The period's intervals, shape (k, 2), int64 ns UTC, sorted and merged.
    daylight : bool or None
        For ``day-night``: True by day, False by night.
    shape : shapely geometry or None
        The area, in ``shape_crs`` (or in the tracks' plane when they have no CRS).
    shape_crs : pyproj.CRS or None
        The CRS of ``shape``.
    """

    period: str = ALL
    area: str = ALL
    intervals: np.ndarray | None = field(default=None, repr=False, compare=False)
    daylight: bool | None = None
    shape: Any = field(default=None, repr=False, compare=False)
    shape_crs: Any = field(default=None, repr=False, compare=False)

    @property
    def everything(self) -> bool:
        """Return whether the zone keeps every entry."""
        return self.period == ALL and self.area == ALL

    def mask(self, snaps: Snapshots) -> np.ndarray:
        """Return which entries of ``snaps`` are in the zone."""
        keep = np.ones(snaps.n_entries, dtype=bool)
        if self.intervals is not None:
            t = snaps.times(snaps.snap)
            at = np.searchsorted(self.intervals[:, 0], t, side="right") - 1
            keep &= (at >= 0) & (t < self.intervals[np.maximum(at, 0), 1])
        if self.daylight is not None:
            lon, lat = to_lonlat(snaps.x, snaps.y, snaps.metric_crs)
            up = solar_elevation(snaps.times(snaps.snap), lon, lat) > SUNRISE_ELEVATION
            keep &= up if self.daylight else ~up
        if self.shape is not None:
            import shapely

            x, y = _in_crs(snaps, self.shape_crs)
            keep &= shapely.intersects_xy(self.shape, x, y)
        return keep

    def apply(self, snaps: Snapshots) -> Snapshots:
        """Return ``snaps`` with only the zone's entries (all of them for ``all``/``all``)."""
        return snaps if self.everything else snaps.subset(self.mask(snaps))


def _in_crs(snaps: Snapshots, crs: Any) -> tuple[np.ndarray, np.ndarray]:
    """Return the entries' positions in ``crs`` (the input's CRS when None; plane when no CRS)."""
    if snaps.metric_crs is None:
        return snaps.x, snaps.y
    target = crs if crs is not None else (snaps.input_crs or "EPSG:4326")
    to = pyproj.Transformer.from_crs(snaps.metric_crs, target, always_xy=True)
    x, y = to.transform(snaps.x, snaps.y)
    return np.asarray(x), np.asarray(y)


def plan_zones(params: ZoneParams, snaps: Snapshots, time_zone: str | None = None) -> list[Zone]:
    """Return the zones of a run: ``all``/``all`` first, then each period, area and both.

    Parameters
    ----------
    params : ZoneParams
        The periods and areas.
    snaps : Snapshots
        The run's snapshots, or their shell (names and CRSs; no entries needed).
    time_zone : str, optional
        Zone of the periods' zone-less times (the tracks' ``--time-zone``).

    Raises
    ------
    InputError
        For ``day-night`` on tracks with no place on the Earth, or a period or
        area named ``all``.
    """
    periods: list[Zone] = [Zone()]
    if params.periods == DAY_NIGHT:
        if snaps.metric_crs is None:
            raise bad_setting("periods", f"{DAY_NIGHT} needs tracks on the Earth: give lon/lat "
                              "columns, or --crs for projected x/y")  # fmt: skip
        periods += [Zone(period="day", daylight=True), Zone(period="night", daylight=False)]
    elif params.periods is not None:
        periods += _period_zones(read_periods(params.periods, time_zone), params.periods)
    areas: list[Zone] = [Zone()]
    if params.areas is not None:
        areas += _area_zones(read_areas(params.areas, params.area_name), params.areas, snaps)
    return [replace(p, area=a.area, shape=a.shape, shape_crs=a.shape_crs)
            for p in periods for a in areas]  # fmt: skip


def _period_zones(periods: Periods, path: str) -> list[Zone]:
    """Return one zone per period name, its intervals sorted and merged."""
    out = []
    for code, name in enumerate(periods.names):
        _not_all(name, path, "period")
        rows = periods.name == code
        out.append(Zone(period=name, intervals=merged_intervals(periods.start[rows],
                                                               periods.end[rows])))  # fmt: skip
    return out


def _area_zones(areas: Areas, path: str, snaps: Snapshots) -> list[Zone]:
    """Return one zone per area, with the CRS its polygon is in."""
    crs = areas.crs
    if snaps.metric_crs is None and crs is not None:
        warnings.warn(f"{path}: the tracks have no CRS, so the areas' coordinates are read as "
                      "the tracks' x/y", ComoveNote, stacklevel=3)  # fmt: skip
        crs = None
    for name in areas.names:
        _not_all(name, path, "area")
    return [Zone(area=n, shape=s, shape_crs=crs)
            for n, s in zip(areas.names, areas.shapes, strict=True)]  # fmt: skip


def _not_all(name: str, path: str, kind: str) -> None:
    if name.lower() == ALL:
        raise InputError(f"{path}: a {kind} may not be named {ALL!r}, which names the rows over "
                         f"every {kind}; rename it")  # fmt: skip


def merged_intervals(start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Return half-open intervals sorted by start, overlapping and touching ones merged.

    Examples
    --------
    >>> merged_intervals(np.array([5, 0, 2]), np.array([9, 3, 4])).tolist()
    [[0, 4], [5, 9]]
    """
    order = np.argsort(start, kind="stable")
    start, end = np.asarray(start)[order], np.asarray(end)[order]
    reach = np.maximum.accumulate(end)
    new = np.r_[True, start[1:] > reach[:-1]]
    first = np.flatnonzero(new)
    last = np.r_[first[1:] - 1, start.size - 1]
    return np.column_stack([start[first], reach[last]]).astype(np.int64)


def solar_elevation(ns: np.ndarray, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Return the sun's geometric elevation in degrees, without refraction.

    Parameters
    ----------
    ns : ndarray of int64
        Times, nanoseconds since the epoch, UTC.
    lon, lat : ndarray
        Places, WGS84 degrees (east and north positive).

    Notes
    -----
    The NOAA solar position equations [1]_ (after Meeus): the sun's apparent
    longitude and the obliquity of the ecliptic give its declination, the
    equation of time and the longitude give the true solar time and so the
    hour angle, and these the zenith angle. Their error is well under a
    minute of sunrise time between 1800 and 2100 at latitudes below 72°
    (NOAA's own statement of the method; from memory, not checked). The
    almanac and reference-library checks are in ``tests/tracks/test_zones.py``.

    References
    ----------
    .. [1] NOAA Global Monitoring Laboratory, "NOAA Solar Calculator" and its
       spreadsheet equations, after J. Meeus, "Astronomical Algorithms",
       Willmann-Bell, 1991. (from memory, not checked)

    Examples
    --------
    Noon at the Greenwich meridian on the June solstice of 2026:

    >>> t = np.array([np.datetime64("2026-06-21T12:00:00", "ns").astype(np.int64)])
    >>> round(float(solar_elevation(t, np.array([0.0]), np.array([51.4769]))[0]), 1)
    62.0
    """
    ns = np.asarray(ns, dtype=np.int64)
    days = (ns // 86_400_000_000_000).astype(np.float64)
    day_ns = (ns % 86_400_000_000_000).astype(np.float64)  # of the UTC day, exact
    julian_century = (days + day_ns / 86_400e9 + 2440587.5 - 2451545.0) / 36525.0
    t = julian_century
    mean_long = np.mod(280.46646 + t * (36000.76983 + t * 0.0003032), 360.0)
    anomaly = np.radians(357.52911 + t * (35999.05029 - 0.0001537 * t))
    eccentricity = 0.016708634 - t * (0.000042037 + 0.0000001267 * t)
    centre = (
        np.sin(anomaly) * (1.914602 - t * (0.004817 + 0.000014 * t))
        + np.sin(2 * anomaly) * (0.019993 - 0.000101 * t)
        + np.sin(3 * anomaly) * 0.000289
    )
    omega = np.radians(125.04 - 1934.136 * t)
    apparent_long = np.radians(mean_long + centre - 0.00569 - 0.00478 * np.sin(omega))
    mean_obliquity = 23 + (26 + (21.448 - t * (46.815 + t * (0.00059 - t * 0.001813))) / 60) / 60
    obliquity = np.radians(mean_obliquity + 0.00256 * np.cos(omega))
    declination = np.arcsin(np.sin(obliquity) * np.sin(apparent_long))
    y = np.tan(obliquity / 2) ** 2
    l0 = np.radians(mean_long)
    eq_time = 4 * np.degrees(
        y * np.sin(2 * l0)
        - 2 * eccentricity * np.sin(anomaly)
        + 4 * eccentricity * y * np.sin(anomaly) * np.cos(2 * l0)
        - 0.5 * y * y * np.sin(4 * l0)
        - 1.25 * eccentricity * eccentricity * np.sin(2 * anomaly)
    )  # minutes
    true_solar_min = np.mod(day_ns / 60e9 + eq_time + 4 * np.asarray(lon, dtype=np.float64), 1440)
    hour_angle = np.radians(true_solar_min / 4 - 180)
    phi = np.radians(np.asarray(lat, dtype=np.float64))
    cos_zenith = np.sin(phi) * np.sin(declination) + np.cos(phi) * np.cos(declination) * np.cos(
        hour_angle
    )
    return 90.0 - np.degrees(np.arccos(np.clip(cos_zenith, -1.0, 1.0)))
