"""Reading trajectory fixes from files and in-memory tables into one standard frame.

This stage only finds and renames columns, turns ids and roles into strings and coordinates
into floats. It parses no times and drops no rows: :mod:`comove.tracks.cleaning` does both and
counts what it drops.
"""

from __future__ import annotations

import csv
import glob
import importlib
import io
import json
import operator
import os
import sys
import zoneinfo
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyproj
from pyproj.exceptions import CRSError

from comove.errors import InputError
from comove.io import storage
from comove.io.projection import crs_to_lonlat, max_scale_error

__all__ = ["ColumnSpec", "RawTracks", "read_blocks", "read_tracks"]

# Preference order matters: the first name present wins.
ID_NAMES = (
    "id",
    "object",
    "object_id",
    "obj_id",
    "track",
    "track_id",
    "individual",
    "individual_id",
    "animal",
    "animal_id",
    "vehicle",
    "vehicle_id",
    "player",
    "player_id",
    "vessel",
    "mmsi",
    "tag",
    "tag_id",
    "name",
)
TIME_NAMES = (
    "time",
    "timestamp",
    "t",
    "datetime",
    "date_time",
    "date",
    "time_utc",
    "utc",
    "epoch",
    "seconds",
)
X_NAMES = ("x", "pos_x", "easting", "east")
Y_NAMES = ("y", "pos_y", "northing", "north")
LON_NAMES = ("lon", "long", "longitude", "lng")
LAT_NAMES = ("lat", "latitude")
ROLE_NAMES = (
    "role",
    "type",
    "class",
    "category",
    "kind",
    "label",
    "position",
    "species",
    "sex",
    "age_class",
    "sex_age",
    "age_sex",
    "vehicle_type",
    "vessel_type",
    "ship_type",
    "object_type",
    "group",
)

TEXT_SUFFIXES = (".csv", ".tsv", ".tab", ".txt")
PARQUET_SUFFIXES = (".parquet", ".pq")
GEO_SUFFIXES = (".gpkg", ".geojson", ".json")
_ALL_SUFFIXES = TEXT_SUFFIXES + PARQUET_SUFFIXES + GEO_SUFFIXES
#: Compressions of text files, read transparently (``tracks.csv.gz``).
COMPRESSION_SUFFIXES = {".gz": "gzip", ".bz2": "bz2", ".xz": "lzma"}
#: Text cells read as missing values in text files (the defaults of ``pandas.read_csv``,
#: written out so that whole and block-wise reading agree).
NA_TEXT = (
    "",
    "#N/A",
    "#N/A N/A",
    "#NA",
    "-1.#IND",
    "-1.#QNAN",
    "-NaN",
    "-nan",
    "1.#IND",
    "1.#QNAN",
    "<NA>",
    "N/A",
    "NA",
    "NULL",
    "NaN",
    "None",
    "n/a",
    "nan",
    "null",
)
#: Rows per block when the input is read in blocks.
BLOCK_ROWS = 1_000_000


def _kind_suffix(path: str) -> str:
    """Return the suffix that names a file's format, looking past a compression suffix."""
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix in COMPRESSION_SUFFIXES:
        suffix = Path(p.stem).suffix.lower()
    return suffix


def _open_text(path: str):
    """Open a possibly compressed text file (or address) for reading its first lines."""
    module = COMPRESSION_SUFFIXES.get(Path(path).suffix.lower())
    return storage.open_input(path, module, encoding="utf-8-sig", errors="replace", newline="")


# A projected CRS in metres is used as the working plane as it stands only when its scale
# error over the data stays below this; UTM inside its zone does (under about 1000 ppm),
# Web Mercator away from the equator does not and is re-projected by the cleaning stage.
PLANAR_SCALE_TOLERANCE = 1e-3

_FLAGS = {
    "id": "--id",
    "time": "--time",
    "x": "--x",
    "y": "--y",
    "lon": "--lon",
    "lat": "--lat",
    "role": "--role",
}
_WHAT = {
    "id": "object id",
    "time": "time",
    "x": "x (easting)",
    "y": "y (northing)",
    "lon": "longitude",
    "lat": "latitude",
    "role": "role",
}
_MAX_LISTED = 12
_OBJ_COL = "__comove_object__"
_TIME_COL = "__comove_time__"
_INDEX = "<index>"
_GEOMETRY = "geometry"


@dataclass(frozen=True)
class ColumnSpec:
    """Input columns: which column holds which field (default: detected by name).

    ``None`` for a column means detect it by its name.

    Parameters
    ----------
    id, time, x, y, lon, lat, role : str or None
        Column names (``--id``, ``--time``, ``--x``, ``--y``, ``--lon``, ``--lat``,
        ``--role``). Matched exactly first, then ignoring case.
    crs : str or None
        CRS of the x/y columns when they are not planar metres (``--crs``): anything
        :meth:`pyproj.CRS.from_user_input` accepts, e.g. ``"EPSG:3857"``.
    time_unit : {None, "s", "ms"}
        Unit of numeric epoch times (``--time-unit``); ``None`` detects it.
    time_format : str or None
        The strftime codes the time text is written in (``--time-format``), e.g.
        ``"%d/%m/%Y %H:%M"``; ``None`` reads ISO 8601, and local day-first or
        month-first dates when the dates tell which.
    time_zone : str or None
        IANA zone of times written without one (``--time-zone``), e.g.
        ``"Europe/Lisbon"``; ``None`` takes them as UTC.
    layer : str or None
        The layer of a GeoPackage (``--layer``); needed only when the file holds
        several, for a file of one layer it may be left out.
    require_role : bool
        Whether a role column is mandatory (co-location mining) or optional (group analyses,
        where a missing role column makes every role ``""``).

    Raises
    ------
    InputError
        If x and y (or lon and lat) are not given together, both pairs are given, the CRS is
        not understood or ``time_unit`` is not one of ``None``, ``"s"``, ``"ms"``.
    """

    id: str | None = None
    time: str | None = None
    x: str | None = None
    y: str | None = None
    lon: str | None = None
    lat: str | None = None
    role: str | None = None
    crs: str | None = None
    time_unit: str | None = None
    time_format: str | None = None
    time_zone: str | None = None
    layer: str | None = None
    require_role: bool = True

    def __post_init__(self) -> None:
        if (self.x is None) != (self.y is None):
            raise InputError("--x and --y must be given together; name both coordinate columns")
        if (self.lon is None) != (self.lat is None):
            raise InputError("--lon and --lat must be given together; name both coordinate columns")
        if self.x is not None and self.lon is not None:
            raise InputError(
                "give either --x/--y or --lon/--lat, not both; choose one coordinate pair"
            )
        if self.time_zone is not None:
            try:
                zoneinfo.ZoneInfo(self.time_zone)
            except (zoneinfo.ZoneInfoNotFoundError, ValueError):
                raise InputError(
                    f"--time-zone {self.time_zone!r} is not a time zone; give an IANA name "
                    "such as Europe/Lisbon, or UTC"
                ) from None
        if self.time_unit not in (None, "s", "ms"):
            raise InputError(
                f"--time-unit {self.time_unit!r} is not supported; use s or ms "
                "(or leave it out to detect the unit)"
            )
        if self.crs is not None:
            try:
                pyproj.CRS.from_user_input(self.crs)
            except CRSError as exc:
                raise InputError(
                    f"--crs {self.crs!r} is not a coordinate reference system pyproj "
                    "understands; give e.g. EPSG:32633 or a PROJ string"
                ) from exc


@dataclass
class RawTracks:
    """Fixes as read, in standard columns, before any parsing or filtering.

    Attributes
    ----------
    frame : pandas.DataFrame
        Columns ``object`` (str), ``time`` (as read: strings, numbers or datetimes), ``x`` and
        ``y`` (float64; ``lon`` and ``lat`` instead when ``coords == "lonlat"``), ``role``
        (str; all ``""`` when the role column is optional and absent) and ``source``
        (categorical str: the file, or ``"<DataFrame>"`` etc.; the sources' rows follow
        one another in order). Missing ids and roles are NaN. :meth:`source_rows` tells
        the row within its source of any of these rows.
    coords : str
        ``"lonlat"`` (WGS84 degrees), ``"planar"`` (metres, used as they are) or ``"crs"``
        (x/y in the CRS ``crs``, to be re-projected).
    crs : str or None
        The CRS of x/y when ``coords == "crs"``, or the file's CRS when planar coordinates
        come from a geo file with a projected CRS; ``None`` otherwise.
    sources : list of str
        Resolved paths of the files read, or ``["<DataFrame>"]`` etc. for in-memory input.
    columns : dict of str to str
        Which input column fed each standard field, e.g. ``{"id": "player", "time": "t"}``.
    role_required : bool
        Whether missing roles are a reason to drop a row (copied from the column spec).
    time_unit : {None, "s", "ms"}
        Unit of numeric epoch times, ``None`` to detect it (copied from the column spec).
    time_format, time_zone : str or None
        How time text is written and the zone of zone-less times (copied from the
        column spec).
    first_row : int
        For a block of :func:`read_blocks`: the 0-based row within its source of the block's
        first row; 0 for everything :func:`read_tracks` reads.
    source_index : int
        For a block of :func:`read_blocks`: the index into ``sources`` of the block's one
        source; 0 for everything :func:`read_tracks` reads.
    """

    frame: pd.DataFrame
    coords: str
    crs: str | None
    sources: list[str]
    columns: dict[str, str]
    role_required: bool = True
    time_unit: str | None = None
    time_format: str | None = None
    time_zone: str | None = None
    first_row: int = 0
    source_index: int = 0

    def source_rows(self, where: np.ndarray) -> np.ndarray:
        """Return the 1-based data row within its source (header not counted) of frame rows."""
        where = np.asarray(where, dtype=np.int64)
        if where.size == 0:
            return where
        codes = self.frame["source"].cat.codes.to_numpy()
        n_sources = len(self.frame["source"].cat.categories)
        first = np.searchsorted(codes, np.arange(n_sources))  # sources follow one another
        return where - first[codes[where]] + 1 + self.first_row


@dataclass
class _Table:
    """One input table before standardisation."""

    name: str  # how messages and the source column name it
    resolved: str  # entry for RawTracks.sources
    data: pd.DataFrame
    geometry: bool = False  # coordinates come from point geometries
    is_file: bool = False  # data still to be read from the path ``name``
    fixed: dict[str, str] = field(default_factory=dict)  # fields already bound to columns


@dataclass
class _Part:
    frame: pd.DataFrame
    coords: str
    crs: str | None
    columns: dict[str, str]


def read_tracks(source: Any, columns: ColumnSpec | None = None) -> RawTracks:
    """Read fixes from files or in-memory tables into standard columns.

    Parameters
    ----------
    source : str, pathlib.Path, sequence of these, DataFrame, GeoDataFrame or trajectories
        A path to a CSV/TSV (``.csv``, ``.tsv``, ``.tab``, ``.txt``), Parquet or GeoParquet
        (``.parquet``, ``.pq``), GeoPackage or GeoJSON (``.gpkg``, ``.geojson``, ``.json``)
        file; a glob pattern such as ``"collars/*.csv"``; a list of paths and patterns, whose
        files are concatenated (each needs the id column); a pandas DataFrame; a geopandas
        GeoDataFrame of points; or a movingpandas TrajectoryCollection (or Trajectory), whose
        trajectory ids become the object ids and whose time index becomes the time.
    columns : ColumnSpec, optional
        Column names and options; by default every column is detected by its name.

    Returns
    -------
    RawTracks
        The fixes in standard columns, with where they came from.

    Raises
    ------
    InputError
        For a missing file, a pattern matching nothing, an unknown or unreadable file, an
        empty file, a missing or ambiguous column, or files whose columns disagree.

    Notes
    -----
    Columns not named in ``columns`` are found by case-insensitive name, preferring earlier
    names in ``ID_NAMES``, ``TIME_NAMES``, ``X_NAMES``/``Y_NAMES``, ``LON_NAMES``/``LAT_NAMES``
    and ``ROLE_NAMES``. Geo inputs take coordinates from their point geometries unless
    coordinate columns are named. A GeoDataFrame without a CRS is taken as planar metres.
    Times in text files are kept as text so that cleaning can tell zone-less times apart.

    Examples
    --------
    The columns are found by their names; ids become text, times stay as they are:

    >>> import pandas as pd
    >>> frame = pd.DataFrame({"player": [7, 7, 9], "t": [0.0, 0.04, 0.0],
    ...                       "x": [1.0, 1.5, 20.0], "y": [2.0, 2.0, 5.0],
    ...                       "position": ["back", "back", "wing"]})
    >>> raw = read_tracks(frame)
    >>> raw.columns
    {'id': 'player', 'time': 't', 'x': 'x', 'y': 'y', 'role': 'position'}
    >>> raw.frame
      object  time     x    y  role       source
    0      7  0.00   1.0  2.0  back  <DataFrame>
    1      7  0.04   1.5  2.0  back  <DataFrame>
    2      9  0.00  20.0  5.0  wing  <DataFrame>
    """
    spec = columns if columns is not None else ColumnSpec()
    tables = _tables(source)
    parts = _standardise_all(tables, spec)
    # one part is not copied either: concatenation shares the columns' memory
    frame = pd.concat([p.frame for p in parts], ignore_index=True)
    lengths = [len(p.frame) for p in parts]
    frame["source"] = pd.Categorical.from_codes(
        np.repeat(np.arange(len(tables)), lengths), categories=[t.name for t in tables]
    )
    return RawTracks(
        frame=frame,
        coords=parts[0].coords,
        crs=parts[0].crs,
        sources=[t.resolved for t in tables],
        columns=parts[0].columns,
        role_required=spec.require_role,
        time_unit=spec.time_unit,
        time_format=spec.time_format,
        time_zone=spec.time_zone,
    )


def read_blocks(
    source: Any, columns: ColumnSpec | None = None, rows: int = BLOCK_ROWS
) -> Iterator[RawTracks]:
    """Read fixes like :func:`read_tracks`, as consecutive blocks of at most ``rows`` rows.

    The blocks' frames, one after another, hold the rows of
    ``read_tracks(source, columns).frame`` in the same order and with the same values, so
    that a caller can stream inputs much larger than memory.

    Parameters
    ----------
    source : str, pathlib.Path, sequence of these, DataFrame, GeoDataFrame or trajectories
        Anything :func:`read_tracks` reads.
    columns : ColumnSpec, optional
        Column names and options; by default every column is detected by its name.
    rows : int, default BLOCK_ROWS
        The most rows a block holds; at least 1.

    Returns
    -------
    iterator of RawTracks
        The blocks, read as they are asked for. Each holds rows of one source only; its
        ``coords``, ``crs``, ``sources``, ``columns``, ``role_required`` and ``time_unit``
        are those :func:`read_tracks` gives, its ``source_index`` names its source in
        ``sources`` and its ``first_row`` is the 0-based row within that source of its first
        row, so that :meth:`RawTracks.source_rows` tells rows within the source.

    Raises
    ------
    InputError
        For the inputs :func:`read_tracks` refuses, with the same messages. A missing file
        or a pattern matching nothing is refused at once; a file's columns and contents only
        when its blocks are reached, after the blocks of the files before it.
    ValueError
        If ``rows`` is less than 1.

    Notes
    -----
    Memory is bounded by the block for CSV/TSV and other delimited text files, compressed
    or not, which are streamed, and for Parquet and (WKB-encoded) GeoParquet files, which
    are read in batches of only the columns needed. GeoPackage and GeoJSON files, GeoParquet
    files with other geometry encodings, and in-memory inputs (DataFrame, GeoDataFrame,
    trajectories) are read whole, or already are, and then cut into blocks: their memory is
    not bounded by the block.

    A file is opened only when the blocks of the files before it have been taken. Its
    columns are bound once, from its header or schema, as :func:`read_tracks` binds them.
    When a coordinate cell of a text file holds text, the rest of the file is read with
    coordinates as text and converted to numbers, bad cells becoming NaN, as
    :func:`read_tracks` does. Point geometries of a GeoParquet file read in batches in a
    projected CRS in metres are taken as planar metres or not from the points of its first
    block, where :func:`read_tracks` samples the whole file.

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"player": [7, 7, 9], "t": [0.0, 0.04, 0.0],
    ...                       "x": [1.0, 1.5, 20.0], "y": [2.0, 2.0, 5.0],
    ...                       "position": ["back", "back", "wing"]})
    >>> blocks = list(read_blocks(frame, rows=2))
    >>> [(len(block.frame), block.first_row) for block in blocks]
    [(2, 0), (1, 2)]
    >>> blocks[1].frame
      object  time     x    y  role       source
    0      9   0.0  20.0  5.0  wing  <DataFrame>
    >>> blocks[1].source_rows([0])
    array([3])
    """
    spec = columns if columns is not None else ColumnSpec()
    rows = operator.index(rows)
    if rows < 1:
        raise ValueError(f"rows must be at least 1, not {rows}")
    # Paths are checked now; the files themselves are read as the blocks are asked for.
    return _blocks(_tables(source), spec, rows)


def _blocks(tables: list[_Table], spec: ColumnSpec, rows: int) -> Iterator[RawTracks]:
    """Yield the blocks of the tables one after another, checking them as read_tracks does."""
    sources = [t.resolved for t in tables]
    first: _Part | None = None
    reference: tuple[_Table, dict[str, str]] | None = None
    for index, table in enumerate(tables):
        first_row = 0
        for part, mapping in _source_blocks(table, spec, reference, rows):
            if first is None:
                first, reference = part, (table, mapping)
            elif first_row == 0:
                _check_same_coords(table, part, tables[0], first)
            frame = part.frame
            frame["source"] = pd.Categorical.from_codes(
                np.zeros(len(frame), dtype=np.int64), categories=[table.name]
            )
            yield RawTracks(
                frame=frame,
                coords=first.coords,
                crs=first.crs,
                sources=list(sources),
                columns=dict(first.columns),
                role_required=spec.require_role,
                time_unit=spec.time_unit,
                time_format=spec.time_format,
                time_zone=spec.time_zone,
                first_row=first_row,
                source_index=index,
            )
            first_row += len(frame)


def _standardise_all(tables: list[_Table], spec: ColumnSpec) -> list[_Part]:
    """Standardise each table; later files must have the first one's columns and coordinates."""
    parts: list[_Part] = []
    reference: tuple[_Table, dict[str, str]] | None = None
    for table in tables:
        part, mapping = _standardise(table, spec, reference)
        if reference is None:
            reference = (table, mapping)
        else:
            _check_same_coords(table, part, tables[0], parts[0])
        parts.append(part)
    return parts


def _check_same_coords(table: _Table, part: _Part, first_table: _Table, first: _Part) -> None:
    """Refuse a later table whose coordinates differ in kind or CRS from the first table's."""
    if (part.coords, part.crs) != (first.coords, first.crs):
        raise InputError(
            f"{table.name}: coordinates are {_describe_coords(part.coords, part.crs)} "
            f"but {first_table.name} has {_describe_coords(first.coords, first.crs)}; "
            "convert the files to one coordinate system"
        )


# --------------------------------------------------------------------------- sources


def _tables(source: Any) -> list[_Table]:
    """Turn any accepted source into tables, reading files lazily where that helps."""
    # GeoDataFrame is a DataFrame subclass, so it is tested first.
    if _is_geodataframe(source):
        return [_Table("<GeoDataFrame>", "<GeoDataFrame>", source, geometry=True)]
    if isinstance(source, pd.DataFrame):
        return [_Table("<DataFrame>", "<DataFrame>", source)]
    if hasattr(source, "trajectories") or (hasattr(source, "df") and hasattr(source, "id")):
        return [_trajectory_table(source)]
    if isinstance(source, (str, os.PathLike)):
        paths = _expand(source)
    elif isinstance(source, Iterable) and not isinstance(source, (bytes, dict)):
        items = list(source)
        if not items:
            raise InputError("no input files given; name at least one file or pattern")
        paths = []
        for item in items:
            if not isinstance(item, (str, os.PathLike)):
                raise TypeError(f"cannot read tracks from a list holding {type(item).__name__}")
            paths.extend(_expand(item))
    else:
        raise TypeError(f"cannot read tracks from {type(source).__name__}")

    seen: set[str] = set()
    tables = []
    for path in paths:
        resolved = path if storage.is_address(path) else str(Path(path).resolve())
        if resolved in seen:
            continue
        seen.add(resolved)
        tables.append(_Table(str(path), resolved, pd.DataFrame(), is_file=True))
    return tables


def _expand(item: str | os.PathLike[str]) -> list[str]:
    text = os.fspath(item)
    if storage.is_address(text):
        return storage.expand(text)
    # A file whose name merely contains glob characters is still read as itself.
    if any(ch in text for ch in "*?[") and not os.path.isfile(os.path.expanduser(text)):
        matches = sorted(
            p for p in glob.glob(os.path.expanduser(text), recursive=True) if os.path.isfile(p)
        )
        if not matches:
            raise InputError(f"{text}: no files match this pattern; check the pattern and folder")
        return matches
    path = os.path.expanduser(text)
    if os.path.isdir(path):
        raise InputError(
            f"{text}: is a folder; give a file, or a pattern such as {os.path.join(text, '*.csv')}"
        )
    if not os.path.exists(path):
        raise InputError(f"{text}: no such file; check the path")
    return [path]


def _is_geodataframe(obj: Any) -> bool:
    # without geopandas imported nothing can be a GeoDataFrame: no need to import it
    geopandas = sys.modules.get("geopandas")
    return geopandas is not None and isinstance(obj, geopandas.GeoDataFrame)


def _has_geometry(data: pd.DataFrame) -> bool:
    if not _is_geodataframe(data):
        return False
    try:
        data.geometry  # noqa: B018 - raises when no active geometry column is set
    except AttributeError:
        return False
    return True


def _trajectory_table(source: Any) -> _Table:
    name = "<TrajectoryCollection>" if hasattr(source, "trajectories") else "<Trajectory>"
    trajectories = list(source.trajectories) if hasattr(source, "trajectories") else [source]
    if not trajectories:
        raise InputError(f"{name}: holds no trajectories; give one with fixes")
    pieces = []
    index_name = None
    for traj in trajectories:
        df = traj.df
        index_name = index_name or df.index.name
        piece = df.reset_index(names=_TIME_COL)
        piece[_OBJ_COL] = traj.id
        pieces.append(piece)
    data = pd.concat(pieces, ignore_index=True)
    time_label = str(index_name) if index_name is not None else _INDEX
    return _Table(
        name,
        name,
        data,
        geometry=True,
        fixed={
            "id": _OBJ_COL,
            "time": _TIME_COL,
            "_id_label": "<trajectory id>",
            "_time_label": time_label,
        },
    )


# --------------------------------------------------------------------------- columns


def _list_columns(cols: Sequence[str]) -> str:
    shown = ", ".join(str(c) for c in cols[:_MAX_LISTED])
    if len(cols) > _MAX_LISTED:
        shown += f", … ({len(cols) - _MAX_LISTED} more)"
    return shown or "(none)"


def _find_named(name: str, cols: list[str], wanted: str, key: str) -> str:
    if wanted in cols:
        return wanted
    folded = [c for c in cols if c.lower() == wanted.lower()]
    if len(folded) == 1:
        return folded[0]
    raise InputError(
        f"{name}: no column {wanted!r} (given with {_FLAGS[key]}); columns are "
        f"{_list_columns(cols)} — name the {_WHAT[key]} column with {_FLAGS[key]}"
    )


#: Parts of a time column's name that identify it when no name matches whole: vessel and
#: collar exports spell it ``ais_pos_timestamp``, ``acquisition_datetime``, ...
TIME_NAME_PARTS = ("timestamp", "datetime", "date_time")


def _find_auto(
    cols: list[str], names: Sequence[str], taken: set[str], parts: Sequence[str] = ()
) -> str | None:
    """Return the column named one of ``names`` (any case), else one holding a name part.

    The second is the one column whose name holds one of ``parts``; None when
    there is none, or several such columns.
    """
    lower: dict[str, str] = {}
    for c in cols:
        if c not in taken:
            lower.setdefault(c.lower(), c)
    for n in names:
        if n in lower:
            return lower[n]
    holding = [c for low, c in lower.items() if any(p in low for p in parts)]
    return holding[0] if len(holding) == 1 else None


def _missing(name: str, cols: list[str], key: str) -> InputError:
    return InputError(
        f"{name}: no {_WHAT[key]} column found; columns are {_list_columns(cols)} — "
        f"name it with {_FLAGS[key]}"
    )


def _resolve(
    name: str, cols: list[str], spec: ColumnSpec, *, geometry: bool, time_index: bool
) -> dict[str, str]:
    """Bind each standard field to a column (keys: id, time, x/y or lon/lat, role)."""
    mapping: dict[str, str] = {}
    taken: set[str] = set()

    def pick(key: str, names: Sequence[str]) -> str | None:
        wanted = getattr(spec, key)
        parts = TIME_NAME_PARTS if key == "time" else ()
        col = (
            _find_named(name, cols, wanted, key)
            if wanted is not None
            else _find_auto(cols, names, taken, parts)
        )
        if col is not None:
            mapping[key] = col
            taken.add(col)
        return col

    if pick("id", ID_NAMES) is None:
        raise _missing(name, cols, "id")
    if pick("time", TIME_NAMES) is None:
        if not time_index:
            raise _missing(name, cols, "time")
        mapping["time"] = _INDEX

    if spec.x is not None:
        pick("x", X_NAMES)
        pick("y", Y_NAMES)
    elif spec.lon is not None:
        pick("lon", LON_NAMES)
        pick("lat", LAT_NAMES)
    elif not geometry:
        found = {
            k: _find_auto(cols, n, taken)
            for k, n in (("x", X_NAMES), ("y", Y_NAMES), ("lon", LON_NAMES), ("lat", LAT_NAMES))
        }
        has_xy = found["x"] is not None and found["y"] is not None
        has_ll = found["lon"] is not None and found["lat"] is not None
        if has_xy and has_ll:
            raise InputError(
                f"{name}: both x/y ({found['x']}, {found['y']}) and longitude/latitude "
                f"({found['lon']}, {found['lat']}) columns exist — choose one pair with "
                "--x/--y or --lon/--lat"
            )
        if has_xy or has_ll:
            for key in ("x", "y") if has_xy else ("lon", "lat"):
                mapping[key] = found[key]  # type: ignore[assignment]
                taken.add(found[key])  # type: ignore[arg-type]
        else:
            # Name the half of a pair that is missing when the other half is there.
            for key, partner in (("lat", "lon"), ("lon", "lat"), ("y", "x"), ("x", "y")):
                if found[partner] is not None and found[key] is None:
                    raise _missing(name, cols, key)
            raise InputError(
                f"{name}: no coordinate columns found; columns are {_list_columns(cols)} — "
                "name them with --x/--y (planar metres, or another CRS with --crs) "
                "or --lon/--lat"
            )

    if pick("role", ROLE_NAMES) is None and spec.require_role:
        raise _missing(name, cols, "role")
    return mapping


def _check_same_columns(
    table: _Table, cols: list[str], reference: tuple[_Table, dict[str, str]]
) -> dict[str, str]:
    first, mapping = reference
    for key, col in mapping.items():
        if col == _INDEX or col in cols:
            continue
        raise InputError(
            f"{table.name}: no column {col!r} ({_WHAT[key]}), which {first.name} has; "
            f"columns are {_list_columns(cols)} — give every file the same columns"
        )
    return mapping


# --------------------------------------------------------------------------- file readers


def _read_error(name: str, kind: str, exc: BaseException) -> InputError:
    reason = " ".join(str(exc).split()) or type(exc).__name__
    if len(reason) > 160:
        reason = reason[:157] + "..."
    return InputError(f"{name}: cannot be read as {kind} ({reason}); check that the file is valid")


def _text_layout(path: str, name: str) -> tuple[str, list[str]]:
    """Delimiter and header of a delimited text file."""
    suffix = _kind_suffix(path)
    try:
        with _open_text(path) as handle:
            sample = handle.read(65536)
    except (OSError, EOFError, ValueError) as exc:  # damaged or truncated compression too
        raise _read_error(name, "text", exc) from exc
    lines = sample.splitlines()
    header = next((ln for ln in lines if ln.strip()), "")
    if not header:
        raise InputError(f"{name}: the file is empty; give a file with a header and data rows")
    sep = "\t" if suffix in (".tsv", ".tab") else ","
    if sep == "," and len(next(csv.reader([header]))) == 1:
        try:
            sep = csv.Sniffer().sniff(sample, delimiters=";\t| ").delimiter
        except csv.Error:
            sep = ","
    names = [c.strip() for c in next(csv.reader([header], delimiter=sep))]
    return sep, names


def _text_columns(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None
) -> tuple[str, dict[str, str], dict[str, str], str]:
    """Return a text file's delimiter, column binding, types of the columns to read and kind.

    The types map each column to read to ``"str"`` (ids, times, roles) or ``"float64"``
    (coordinates); the kind names the format in messages.
    """
    sep, cols = _text_layout(table.name, table.name)
    mapping = (
        _check_same_columns(table, cols, reference)
        if reference is not None
        else _resolve(table.name, cols, spec, geometry=False, time_index=False)
    )
    usecols = list(dict.fromkeys(mapping.values()))
    text_fields = {mapping[k] for k in ("id", "time", "role") if k in mapping}
    # Ids, roles and times stay text: "007" keeps its zeros and cleaning can see time zones.
    dtype = {c: ("str" if c in text_fields else "float64") for c in usecols}
    kind = {",": "CSV", "\t": "TSV"}.get(sep, "delimited text")
    return sep, mapping, dtype, kind


def _read_text(table: _Table, spec: ColumnSpec, reference: Any) -> tuple[pd.DataFrame, dict]:
    path = table.name
    sep, mapping, dtype, kind = _text_columns(table, spec, reference)
    usecols = list(dtype)
    options: dict[str, Any] = {
        "engine": "pyarrow",
        "sep": sep,
        "usecols": usecols,
        "na_values": list(NA_TEXT),
        "keep_default_na": False,
    }
    try:
        try:
            data = pd.read_csv(path, dtype=dtype, **options)
        except ValueError as exc:
            if "convert" not in str(exc):
                raise
            # A coordinate column holds some text; read it as text and let the numeric
            # conversion turn the bad cells into NaN, which cleaning counts.
            data = pd.read_csv(path, dtype=dict.fromkeys(usecols, "str"), **options)
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
        raise _read_error(table.name, kind, exc) from exc
    return data, mapping


def _has_geo_metadata(path: str) -> bool:
    import pyarrow.parquet as pq

    where, fs = storage.arrow_location(path)
    metadata = pq.read_schema(where, filesystem=fs).metadata or {}
    return b"geo" in metadata


def _read_plain_parquet(path: str) -> pd.DataFrame:
    """Return a Parquet file as a frame, text columns as categoricals.

    Ids, roles and often times repeat across millions of rows: dictionary
    decoding is several times faster than building Python strings, and later
    stages then work on the distinct values only.
    """
    import pyarrow as pa
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    where, fs = storage.arrow_location(path)
    schema = pq.read_schema(where, filesystem=fs)
    text = [
        f.name for f in schema if pa.types.is_string(f.type) or pa.types.is_large_string(f.type)
    ]
    # The system allocator, not Arrow's own pool: memory Arrow frees after the
    # conversion goes back to the allocator numpy uses, so later stages reuse it instead
    # of touching fresh pages (measured at sports scale: peak memory 980 -> 850 MiB).
    # split_blocks: one array per column, not one 2-d block copied together (3x faster).
    pool = pa.system_memory_pool()
    fmt = ds.ParquetFileFormat(read_options=ds.ParquetReadOptions(dictionary_columns=text))
    table = ds.dataset(where, format=fmt, filesystem=fs).to_table(memory_pool=pool)
    return table.to_pandas(split_blocks=True, memory_pool=pool)


def _read_table(table: _Table, spec: ColumnSpec) -> _Table:
    """Load a Parquet or geo file into ``table.data`` (a GeoPackage's layer from ``spec``)."""
    path = table.name
    suffix = Path(path).suffix.lower()
    if suffix in PARQUET_SUFFIXES:
        try:
            if _has_geo_metadata(path):
                import geopandas

                where, fs = storage.arrow_location(path)
                data = geopandas.read_parquet(where, filesystem=fs)
                return _Table(table.name, table.resolved, data, geometry=True)
            return _Table(table.name, table.resolved, _read_plain_parquet(path))
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
            raise _read_error(table.name, "Parquet", exc) from exc
    import geopandas

    kind = "GeoPackage" if suffix == ".gpkg" else "GeoJSON"
    layer = _layer(table.name, path, spec.layer) if suffix == ".gpkg" else None
    try:
        if storage.is_address(path):  # the GDAL readers take the bytes, not the address
            with storage.open_input(path) as handle:
                data = geopandas.read_file(io.BytesIO(handle.read()), engine="pyogrio",
                                           layer=layer)  # fmt: skip
        else:
            data = geopandas.read_file(path, engine="pyogrio", layer=layer)
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
        raise _read_error(table.name, kind, exc) from exc
    return _Table(table.name, table.resolved, data, geometry=True)


def _layer(name: str, path: str, wanted: str | None) -> str | None:
    """Return the GeoPackage layer to read: the one named, or the only one.

    Raises
    ------
    InputError
        When the file holds several layers and none is named, or the named one is
        not there; the message lists the layers.
    """
    import pyogrio

    try:
        if storage.is_address(path):
            with storage.open_input(path) as handle:
                layers = [str(n) for n in pyogrio.list_layers(io.BytesIO(handle.read()))[:, 0]]
        else:
            layers = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
        raise _read_error(name, "GeoPackage", exc) from exc
    listed = ", ".join(layers[:10]) + (f" and {len(layers) - 10} more" if len(layers) > 10 else "")
    if wanted is not None:
        if wanted not in layers:
            raise InputError(f"{name}: has no layer {wanted!r}; its layers: {listed}")
        return wanted
    if len(layers) > 1:
        raise InputError(f"{name}: holds {len(layers)} layers ({listed}); choose one with --layer")
    return None


# --------------------------------------------------------------------------- reading in blocks

# pyarrow's message when a cell cannot be read as a coordinate (a float64 column)
_NOT_A_NUMBER = "conversion error to double"


def _source_blocks(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None, rows: int
) -> Iterator[tuple[_Part, dict[str, str]]]:
    """Yield one table's standard blocks of at most ``rows`` rows, each with the binding."""
    if table.is_file:
        suffix = _file_kind(table.name)
        stream: _Stream | None = None
        if suffix in TEXT_SUFFIXES:
            stream = _text_stream(table, spec, reference, rows)
        elif suffix in PARQUET_SUFFIXES:
            stream = _parquet_stream(table, spec, reference, rows)
        if stream is not None:
            yield from _stream_blocks(stream, spec)
            return
    # Read whole (or in memory already): standardise at once, then cut.
    part, mapping = _standardise(table, spec, reference)
    for start in range(0, len(part.frame), rows):
        block = part.frame.iloc[start : start + rows].reset_index(drop=True)
        yield _Part(block, part.coords, part.crs, part.columns), mapping


@dataclass
class _Stream:
    """A file opened for reading in blocks: its binding and its blocks of input columns."""

    table: _Table  # name and resolved path of the file
    mapping: dict[str, str]
    geometry_col: str | None  # column of the point geometries, if the file has them
    chunks: Iterator[pd.DataFrame]


def _stream_blocks(stream: _Stream, spec: ColumnSpec) -> Iterator[tuple[_Part, dict[str, str]]]:
    """Standardise a streamed file's blocks; the first block decides the kind of coordinates."""
    table = stream.table
    decided: tuple[str, str | None] | None = None
    report: dict[str, str] | None = None
    first_row = 0
    for data in stream.chunks:
        data = _str_columns(data)
        block = _Table(table.name, table.resolved, data, geometry=stream.geometry_col is not None)
        frame, coords, crs = _standard_frame(
            block, data, stream.mapping, spec, decided=decided, first_row=first_row
        )
        if report is None:
            decided = (coords, crs)
            report = _columns_report(block, data, stream.mapping, coords, stream.geometry_col)
        yield _Part(frame, coords, crs, report), stream.mapping
        first_row += len(data)
    if report is None:
        raise _no_rows(table.name)


def _rebatch(batches: Iterable[Any], rows: int) -> Iterator[Any]:
    """Regroup Arrow record batches into tables of ``rows`` rows (the last may hold fewer)."""
    import pyarrow as pa

    pending: list[Any] = []
    count = 0
    for batch in batches:
        while batch.num_rows:
            take = min(rows - count, batch.num_rows)
            pending.append(batch.slice(0, take))
            count += take
            batch = batch.slice(take)
            if count == rows:
                yield pa.Table.from_batches(pending)
                pending, count = [], 0
    if count:
        yield pa.Table.from_batches(pending)


def _text_stream(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None, rows: int
) -> _Stream:
    """Bind a text file's columns from its header and open it for streaming."""
    sep, mapping, dtype, kind = _text_columns(table, spec, reference)
    batches = _text_batches(table.name, sep, dtype, kind)
    chunks = (t.to_pandas(split_blocks=True) for t in _rebatch(batches, rows))
    return _Stream(table, mapping, None, chunks)


def _text_batches(path: str, sep: str, dtype: dict[str, str], kind: str) -> Iterator[Any]:
    """Yield a text file's columns ``dtype`` in record batches, typed as :func:`_read_text` does.

    When a coordinate cell holds text, the file is read again with coordinates as text,
    skipping the rows already given, and the rest is converted as the whole-file reader
    converts it.
    """
    import pyarrow as pa

    coords = [c for c, t in dtype.items() if t != "str"]
    given = 0
    as_text = False
    while True:
        try:
            for batch in _csv_batches(path, sep, dtype, as_text=as_text, skip=given):
                if as_text:
                    batch = _numeric_columns(batch, coords)
                given += batch.num_rows
                yield batch
            return
        except pa.ArrowInvalid as exc:
            if as_text or _NOT_A_NUMBER not in str(exc):
                raise _read_error(path, kind, exc) from exc
            as_text = True
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
            raise _read_error(path, kind, exc) from exc


def _csv_batches(
    path: str, sep: str, dtype: dict[str, str], *, as_text: bool, skip: int
) -> Iterator[Any]:
    """Yield the record batches of a delimited text file, leaving out its first ``skip`` rows."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    types = {
        c: pa.large_string() if t == "str" or as_text else pa.float64() for c, t in dtype.items()
    }
    convert = pacsv.ConvertOptions(
        include_columns=list(dtype),
        column_types=types,
        null_values=list(NA_TEXT),
        strings_can_be_null=True,
    )
    with _open_binary(path) as stream:
        reader = pacsv.open_csv(
            stream, parse_options=pacsv.ParseOptions(delimiter=sep), convert_options=convert
        )
        for batch in reader:
            if skip >= batch.num_rows:
                skip -= batch.num_rows
                continue
            yield batch.slice(skip) if skip else batch
            skip = 0


def _numeric_columns(batch: Any, names: list[str]) -> Any:
    """Return a record batch with its text columns ``names`` converted to float64."""
    import pyarrow as pa

    arrays = [
        pa.array(_floats(column.to_pandas()), type=pa.float64()) if name in names else column
        for name, column in zip(batch.schema.names, batch.columns, strict=True)
    ]
    return pa.RecordBatch.from_arrays(arrays, names=batch.schema.names)


def _open_binary(path: str) -> Any:
    """Open a possibly compressed file as a stream of its (decompressed) bytes."""
    import pyarrow as pa

    module = COMPRESSION_SUFFIXES.get(Path(path).suffix.lower())
    if storage.is_address(path):
        return storage.open_input(path, module)
    if module is None:
        return pa.input_stream(path, compression=None)
    if module in ("gzip", "bz2") and pa.Codec.is_available(module):
        return pa.input_stream(path, compression=module)
    return importlib.import_module(module).open(path, "rb")


def _parquet_stream(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None, rows: int
) -> _Stream | None:
    """Bind a Parquet file's columns from its schema and open it for reading in batches.

    Returns ``None`` for a GeoParquet file whose geometries are not WKB, which is read whole.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    name = table.name
    try:
        geo = _has_geo_metadata(name)
        where, fs = storage.arrow_location(name)
        schema = pq.read_schema(where, filesystem=fs)
        n_rows = pq.read_metadata(where, filesystem=fs).num_rows
        # the columns, index and dtypes the whole-file reader gives, without the rows
        view = _str_columns(schema.empty_table().to_pandas())
        geometry_col = covering = crs = None
        if geo:
            meta = json.loads(schema.metadata[b"geo"])
            geometry_col = str(meta["primary_column"])
            column = meta["columns"][geometry_col]
            if column.get("encoding") != "WKB":
                return None
            # no CRS given means longitude/latitude; an explicit null means none
            crs = column["crs"] if "crs" in column else "OGC:CRS84"
            covering = column.get("covering", {}).get("bbox", {}).get("xmin", [None])[0]
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
        raise _read_error(name, "Parquet", exc) from exc
    if n_rows == 0:
        raise _no_rows(name)
    hidden = {geometry_col, covering, _OBJ_COL, _TIME_COL}
    visible = [c for c in view.columns if c not in hidden]
    bound = _Table(name, table.resolved, view, geometry=geo)
    time_index = isinstance(view.index, pd.DatetimeIndex)
    mapping = _bind_columns(bound, visible, spec, reference, time_index=time_index)

    wanted = [c for c in dict.fromkeys(mapping.values()) if c != _INDEX]
    if geometry_col is not None and "x" not in mapping and "lon" not in mapping:
        wanted.append(geometry_col)
    text = [
        f.name for f in schema if pa.types.is_string(f.type) or pa.types.is_large_string(f.type)
    ]
    chunks = _parquet_chunks(
        name,
        wanted,
        text,
        rows,
        with_index=mapping["time"] == _INDEX,
        geometry_col=geometry_col,
        crs=crs,
    )
    return _Stream(table, mapping, geometry_col, chunks)


def _parquet_chunks(
    name: str,
    columns: list[str],
    text: list[str],
    rows: int,
    *,
    with_index: bool,
    geometry_col: str | None,
    crs: Any,
) -> Iterator[pd.DataFrame]:
    """Yield frames of ``rows`` rows of a Parquet file's ``columns`` (text as categoricals).

    ``with_index`` also reads the columns that hold the frame's index; WKB geometries in
    ``geometry_col`` become a GeoDataFrame's points in ``crs``.
    """
    import pyarrow.parquet as pq

    try:
        where, fs = storage.arrow_location(name)
        file = pq.ParquetFile(where, read_dictionary=text, filesystem=fs)
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file to the user
        raise _read_error(name, "Parquet", exc) from exc
    try:
        batches = file.iter_batches(
            batch_size=rows, columns=columns, use_pandas_metadata=with_index
        )
        tables = _rebatch(batches, rows)
        while True:
            try:
                arrow = next(tables, None)
                if arrow is None:
                    return
                data = _arrow_frame(arrow, geometry_col, crs)
            except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
                raise _read_error(name, "Parquet", exc) from exc
            yield data
    finally:
        file.close()


def _arrow_frame(arrow: Any, geometry_col: str | None, crs: Any) -> pd.DataFrame:
    """Convert an Arrow table to a frame; WKB in ``geometry_col`` becomes point geometries."""
    if geometry_col is None or geometry_col not in arrow.column_names:
        return arrow.to_pandas(split_blocks=True)
    import geopandas

    attrs = arrow.drop_columns([geometry_col]).to_pandas(split_blocks=True)
    wkb = np.asarray(arrow[geometry_col], dtype=object)
    geometry = geopandas.GeoSeries.from_wkb(wkb, index=attrs.index, crs=crs)
    return geopandas.GeoDataFrame(attrs, geometry=geometry)


# --------------------------------------------------------------------------- standardising


def _standardise(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None
) -> tuple[_Part, dict[str, str]]:
    """Read one table if it is a file, bind its columns and return them in standard form.

    ``reference`` is the first table and its column binding, which later files must share.
    Returns the standard part and the binding of this table's columns.
    """
    table, mapping = _load(table, spec, reference)
    data = table.data
    if len(data) == 0:
        raise _no_rows(table.name)
    data = _str_columns(data)
    cols = list(data.columns)
    if table.geometry and not _has_geometry(data):
        # e.g. a GeoPackage attribute table: a plain table after all.
        table = _Table(table.name, table.resolved, pd.DataFrame(data), fixed=table.fixed)
    geometry_col = data.geometry.name if table.geometry else None
    visible = [c for c in cols if c != geometry_col and c not in (_OBJ_COL, _TIME_COL)]
    if not mapping:
        time_index = isinstance(data.index, pd.DatetimeIndex)
        mapping = _bind_columns(table, visible, spec, reference, time_index=time_index)
    frame, coords, crs = _standard_frame(table, data, mapping, spec)
    report = _columns_report(table, data, mapping, coords, geometry_col)
    return _Part(frame, coords, crs, report), mapping


def _no_rows(name: str) -> InputError:
    return InputError(f"{name}: has no data rows; give a table with at least one fix")


def _str_columns(data: pd.DataFrame) -> pd.DataFrame:
    """Return ``data`` with its column labels as strings."""
    if all(isinstance(c, str) for c in data.columns):
        return data
    return data.set_axis([str(c) for c in data.columns], axis=1)


def _file_kind(name: str) -> str:
    """Return the suffix naming a file's format, refusing formats that cannot be read."""
    suffix = _kind_suffix(name)
    if suffix not in _ALL_SUFFIXES:
        raise InputError(
            f"{name}: unknown file type {suffix or '(no extension)'!r}; use "
            f"{', '.join(_ALL_SUFFIXES)} (text files may be compressed: .gz, .bz2, .xz)"
        )
    return suffix


def _load(
    table: _Table, spec: ColumnSpec, reference: tuple[_Table, dict[str, str]] | None
) -> tuple[_Table, dict[str, str]]:
    """Read a file's data into the table; return it with the binding of a text file's columns.

    Tables in memory come back as they are; the binding is empty unless a text file was read
    (text files are read with only the columns they need).
    """
    if not table.is_file:
        return table, {}
    suffix = _file_kind(table.name)
    if suffix in TEXT_SUFFIXES:
        data, mapping = _read_text(table, spec, reference)
        return _Table(table.name, table.resolved, data), mapping
    return _read_table(table, spec), {}


def _bind_columns(
    table: _Table,
    visible: list[str],
    spec: ColumnSpec,
    reference: tuple[_Table, dict[str, str]] | None,
    *,
    time_index: bool,
) -> dict[str, str]:
    """Bind each standard field to one of the table's ``visible`` columns."""
    if reference is not None:
        return _check_same_columns(table, visible, reference)
    if table.fixed:
        sub = ColumnSpec(**{**_spec_dict(spec), "id": None, "time": None})
        return _resolve_fixed(table, visible, sub)
    return _resolve(table.name, visible, spec, geometry=table.geometry, time_index=time_index)


def _standard_frame(
    table: _Table,
    data: pd.DataFrame,
    mapping: dict[str, str],
    spec: ColumnSpec,
    *,
    decided: tuple[str, str | None] | None = None,
    first_row: int = 0,
) -> tuple[pd.DataFrame, str, str | None]:
    """Return the standard columns of ``data``, the kind of its coordinates and their CRS.

    ``data`` may be a block of a source whose first row is row ``first_row`` of the source
    (for messages); ``decided`` is the kind and CRS of coordinates already decided for the
    source's earlier blocks, which point geometries in a projected CRS keep.
    """
    # .array keeps time zones and assigns by position whatever the input's index is.
    time_values = data.index if mapping["time"] == _INDEX else data[mapping["time"]]
    for key in ("id", "time", "role"):
        if key in mapping and mapping[key] != _INDEX:
            _check_flat(table.name, data[mapping[key]], mapping[key], key)
    crs: str | None
    if "lon" in mapping or "x" in mapping:
        pair = ("lon", "lat") if "lon" in mapping else ("x", "y")
        a = _floats(data[mapping[pair[0]]])
        b = _floats(data[mapping[pair[1]]])
        coords, crs = _column_coords(table.name, spec, lonlat=pair[0] == "lon")
    else:
        a, b, coords, crs = _geometry_coords(table, spec, decided=decided, first_row=first_row)
    a_name, b_name = ("lon", "lat") if coords == "lonlat" else ("x", "y")
    role = (
        _labels(data[mapping["role"]]).array
        if "role" in mapping
        else pd.Categorical.from_codes(np.zeros(len(data), int), categories=pd.Index([""], "str"))
    )
    # one constructor call, no per-column copies: these columns can be millions of rows
    frame = pd.DataFrame(
        {
            "object": _labels(data[mapping["id"]]).array,
            "time": time_values.array,
            a_name: a,
            b_name: b,
            "role": role,
        },
        index=pd.RangeIndex(len(data)),
        copy=False,
    )
    return frame, coords, crs


def _check_flat(name: str, series: pd.Series, column: str, key: str) -> None:
    """Refuse a column of lists, arrays or structs where ids, times or roles are read."""
    if series.dtype != object:
        return
    first = series.dropna().head(100)
    if any(isinstance(v, (dict, list, tuple, np.ndarray)) for v in first):
        raise InputError(
            f"{name}: column {column!r} holds lists or structs, not {key} values; name a "
            f"column of text or numbers with --{key}"
        )


def _columns_report(
    table: _Table,
    data: pd.DataFrame,
    mapping: dict[str, str],
    coords: str,
    geometry_col: str | None,
) -> dict[str, str]:
    """Return which input column (or index, trajectory id, geometry) fed each standard field."""
    report = dict(mapping)
    if table.fixed:
        report["id"] = table.fixed["_id_label"]
        report["time"] = table.fixed["_time_label"]
    elif report["time"] == _INDEX:
        report["time"] = str(data.index.name) if data.index.name is not None else _INDEX
    if "x" not in report and "lon" not in report:
        keys = ("lon", "lat") if coords == "lonlat" else ("x", "y")
        report.update(dict.fromkeys(keys, str(geometry_col)))
    return report


def _spec_dict(spec: ColumnSpec) -> dict[str, Any]:
    return {k: getattr(spec, k) for k in ColumnSpec.__dataclass_fields__}


def _resolve_fixed(table: _Table, visible: list[str], spec: ColumnSpec) -> dict[str, str]:
    """Resolve only coordinates and role for inputs whose id and time are given by structure."""
    mapping: dict[str, str] = {"id": table.fixed["id"], "time": table.fixed["time"]}
    if spec.x is not None or spec.lon is not None:
        keys = ("x", "y") if spec.x is not None else ("lon", "lat")
        for key in keys:
            mapping[key] = _find_named(table.name, visible, getattr(spec, key), key)
    if spec.role is not None:
        mapping["role"] = _find_named(table.name, visible, spec.role, "role")
    else:
        role = _find_auto(visible, ROLE_NAMES, set())
        if role is not None:
            mapping["role"] = role
        elif spec.require_role:
            raise _missing(table.name, visible, "role")
    return mapping


def _floats(series: pd.Series) -> np.ndarray:
    if pd.api.types.is_numeric_dtype(series.dtype) and not pd.api.types.is_bool_dtype(series.dtype):
        return series.to_numpy(dtype=np.float64, na_value=np.nan)
    return pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)


def _labels(series: pd.Series) -> pd.Series:
    """Ids or roles as a categorical of stripped strings; blanks and NaN become missing.

    The values are factorised first and only the distinct values are turned into text,
    so millions of rows with a few dozen ids cost one factorisation. Integer-valued
    numbers print without a decimal point ("7", not "7.0").
    """
    if isinstance(series.dtype, pd.CategoricalDtype):
        codes = series.cat.codes.to_numpy()
        uniques = pd.Series(np.asarray(series.cat.categories))
    else:
        codes, uniq = pd.factorize(series, use_na_sentinel=True)
        uniques = pd.Series(np.asarray(uniq), dtype=series.dtype if len(uniq) else None)
    names = _label_text(uniques).to_numpy(dtype=object)
    valid = pd.notna(names)
    categories, inverse = np.unique(names[valid].astype(str), return_inverse=True)
    if valid.all() and np.array_equal(inverse, np.arange(names.size)):
        new_codes = codes  # already sorted distinct text: no pass over the rows
    else:
        remap = np.full(names.size + 1, -1, dtype=np.int64)
        remap[:-1][valid] = inverse
        new_codes = remap[np.where(codes >= 0, codes, names.size)]
    # the codes lie in -1..len(categories)-1 by construction
    categorical = pd.Categorical.from_codes(
        new_codes, categories=pd.Index(categories, dtype="str"), validate=False
    )
    return pd.Series(categorical, index=series.index)


def _label_text(series: pd.Series) -> pd.Series:
    """Distinct id or role values as strings; blank strings become missing."""
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return series.astype("str")
    if pd.api.types.is_integer_dtype(dtype):
        return _int_labels(series)
    if pd.api.types.is_float_dtype(dtype):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        finite = np.isfinite(values)
        # Integer-valued floats are integer ids that picked up NaNs along the way.
        if np.all(np.mod(values[finite], 1.0) == 0) and np.all(np.abs(values[finite]) < 2**53):
            return _int_labels(pd.Series(np.where(finite, values, np.nan), index=series.index))
        out = np.full(len(values), None, dtype=object)
        out[finite] = pd.Series(values[finite]).astype("str").to_numpy()
        return pd.Series(out, index=series.index, dtype="str")
    text = series.astype("str").str.strip()
    return text.where(text != "")


def _int_labels(series: pd.Series) -> pd.Series:
    present = series.notna().to_numpy()
    out = np.full(len(series), None, dtype=object)
    out[present] = series[present].astype("int64").astype("str").to_numpy()
    return pd.Series(out, index=series.index, dtype="str")


# --------------------------------------------------------------------------- coordinates


def _crs_string(crs: pyproj.CRS) -> str:
    authority = crs.to_authority()
    return f"{authority[0]}:{authority[1]}" if authority else crs.to_wkt()


def _is_wgs84_lonlat(crs: pyproj.CRS) -> bool:
    return crs.equals(pyproj.CRS.from_epsg(4326), ignore_axis_order=True)


def _describe_coords(coords: str, crs: str | None) -> str:
    return f"{coords} ({crs})" if crs else coords


def _column_coords(name: str, spec: ColumnSpec, *, lonlat: bool) -> tuple[str, str | None]:
    if spec.crs is None:
        return ("lonlat" if lonlat else "planar"), None
    crs = pyproj.CRS.from_user_input(spec.crs)
    if _is_wgs84_lonlat(crs):
        return "lonlat" if lonlat else "crs", None if lonlat else spec.crs
    if lonlat and not crs.is_geographic:
        raise InputError(
            f"{name}: --crs {spec.crs} is projected but the coordinates are longitude/latitude "
            "columns; name the projected columns with --x/--y or leave out --crs"
        )
    return "crs", spec.crs


def _geometry_coords(
    table: _Table,
    spec: ColumnSpec,
    *,
    decided: tuple[str, str | None] | None = None,
    first_row: int = 0,
) -> tuple[np.ndarray, np.ndarray, str, str | None]:
    """Return x, y, kind and CRS of the point geometries of ``table.data``.

    A projected CRS in metres is used as the working plane when its scale error over a
    sample of the points is small, unless ``decided`` already gives the kind and CRS.
    ``first_row`` is the row within its source of the data's first row (for messages).
    """
    import shapely

    data = table.data
    geoms = np.asarray(data.geometry.array, dtype=object)
    missing = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    kinds = shapely.get_type_id(geoms)
    bad = ~missing & (kinds != shapely.GeometryType.POINT)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        kind = shapely.GeometryType(int(kinds[first])).name.title()
        raise InputError(
            f"{table.name}: row {first_row + first + 1} has a {kind} geometry, not a point; "
            "comove reads point fixes — convert the features to points first"
        )
    x = np.full(len(geoms), np.nan)
    y = np.full(len(geoms), np.nan)
    x[~missing] = shapely.get_x(geoms[~missing])
    y[~missing] = shapely.get_y(geoms[~missing])

    crs_input = spec.crs if spec.crs is not None else data.crs
    if crs_input is None:
        return x, y, "planar", None
    crs = pyproj.CRS.from_user_input(crs_input)
    if crs.is_geographic:
        if not _is_wgs84_lonlat(crs):
            x, y = crs_to_lonlat(x, y, crs)
        return x, y, "lonlat", None
    text = _crs_string(crs)
    metres = all(axis.unit_name in ("metre", "meter") for axis in crs.axis_info)
    if metres and crs.is_projected:
        if decided is not None:
            return x, y, *decided
        ok = np.flatnonzero(~missing)
        sample = ok[:: max(1, ok.size // 2000)]
        lon, lat = crs_to_lonlat(x[sample], y[sample], crs)
        if max_scale_error(lon, lat, crs) <= PLANAR_SCALE_TOLERANCE:
            return x, y, "planar", text
    elif metres:
        # A local engineering CRS in metres cannot be taken to lon/lat; use it as it is.
        return x, y, "planar", text
    return x, y, "crs", text
