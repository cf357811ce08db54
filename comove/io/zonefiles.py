"""Reading the periods and areas that results are split by (``--periods``, ``--areas``).

A periods file is a CSV table with the columns ``name``, ``start`` and ``end``:
one row per interval, several rows may share a name (every night, both
halves of extra time). Times are read as the track times are
(:func:`comove.io.times.parse_times`): ISO 8601, zone-less ones in
``time_zone`` or UTC, or epoch seconds/milliseconds. An interval holds the
times ``start <= t < end``.

An areas file is anything geopandas reads (GeoJSON, GeoPackage, a shapefile,
GeoParquet) holding polygons or multipolygons and a column of their names.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import InputError
from comove.io.times import parse_times

PERIOD_COLUMNS = ("name", "start", "end")


@dataclass(frozen=True)
class Periods:
    """Named time intervals.

    Attributes
    ----------
    names : list of str
        The distinct names, in the order of the file.
    name, start, end : ndarray
        One interval per row: its name's index in ``names``, and its start and
        end (int64 ns UTC, ``start < end``).
    """

    names: list[str]
    name: np.ndarray
    start: np.ndarray
    end: np.ndarray


def read_periods(path: str | Path, time_zone: str | None = None) -> Periods:
    """Return the named intervals of a periods CSV file.

    Raises
    ------
    InputError
        When the file cannot be read, lacks a column, or has a row whose
        times cannot be read or do not make an interval; the message names
        the file and the row.
    """
    path = Path(path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"{path}: cannot read the periods table ({exc}); give a CSV file "
                         "with the columns name,start,end") from None  # fmt: skip
    table.columns = [str(c).strip().lower() for c in table.columns]
    missing = [c for c in PERIOD_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(f"{path}: the periods table has no column {', '.join(missing)}; give "
                         "the columns name,start,end (one row per interval)")  # fmt: skip
    if table.empty:
        raise InputError(f"{path}: the periods table has no rows; give one row per interval")
    names = table["name"].str.strip()
    if (names == "").any():
        row = int(np.flatnonzero(names == "")[0]) + 2  # the header is line 1
        raise InputError(f"{path}, line {row}: a period without a name; name every interval")
    bounds = {}
    for column in ("start", "end"):
        parsed = parse_times(table[column].str.strip(), None, time_zone=time_zone)
        if (~parsed.ok).any():
            row = int(np.flatnonzero(~parsed.ok)[0])
            raise InputError(f"{path}, line {row + 2}: cannot read the {column} time "
                             f"{table[column].iloc[row]!r}; write it as ISO 8601, e.g. "
                             "2026-05-01T18:30:00Z")  # fmt: skip
        bounds[column] = parsed.ns
    wrong = bounds["end"] <= bounds["start"]
    if wrong.any():
        row = int(np.flatnonzero(wrong)[0])
        raise InputError(f"{path}, line {row + 2}: the period {names.iloc[row]!r} ends before "
                         "it starts; give an end after the start")  # fmt: skip
    distinct = list(dict.fromkeys(names))
    code = np.asarray([distinct.index(n) for n in names], dtype=np.int64)  # per row of the file
    return Periods(distinct, code, bounds["start"].astype(np.int64), bounds["end"].astype(np.int64))


@dataclass(frozen=True)
class Areas:
    """Named polygons.

    Attributes
    ----------
    names : list of str
        One per area (rows with one name are joined into one area).
    shapes : list of shapely geometry
        The polygons, in ``crs``.
    crs : pyproj.CRS or None
        The file's CRS (None when it has none).
    """

    names: list[str]
    shapes: list[Any]
    crs: Any


def read_areas(path: str | Path, name_column: str = "name") -> Areas:
    """Return the named polygons of an areas file.

    Raises
    ------
    InputError
        When the file cannot be read, has no such name column, or holds a
        geometry that is not a polygon; the message names the file and row.
    """
    import geopandas
    import shapely

    path = Path(path)
    try:
        frame = geopandas.read_file(path, engine="pyogrio")
    except Exception as exc:  # noqa: BLE001 - any reader failure is the file's problem
        raise InputError(f"{path}: cannot read the areas ({exc}); give polygons in a GeoJSON, "
                         "GeoPackage or other file geopandas reads") from None  # fmt: skip
    if name_column not in frame.columns:
        columns = ", ".join(str(c) for c in frame.columns if c != frame.geometry.name)
        raise InputError(f"{path}: no column {name_column!r} of area names; its columns: "
                         f"{columns or 'none'}; give --area-name COLUMN")  # fmt: skip
    if frame.empty:
        raise InputError(f"{path}: holds no areas; give at least one polygon")
    kinds = frame.geometry.geom_type.fillna("none")
    wrong = ~kinds.isin(["Polygon", "MultiPolygon"])
    if wrong.any():
        row = int(np.flatnonzero(wrong.to_numpy())[0])
        raise InputError(f"{path}, feature {row + 1}: a {kinds.iloc[row]} is not an area; give "
                         "polygons or multipolygons")  # fmt: skip
    names = frame[name_column].astype(str).str.strip()
    distinct = list(dict.fromkeys(names))
    shapes = [shapely.union_all(frame.geometry[names == n].to_numpy()) for n in distinct]
    for shape in shapes:
        shapely.prepare(shape)
    return Areas(distinct, shapes, frame.crs)
