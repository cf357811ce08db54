"""Cleaning read fixes: parse times, drop unusable rows (counting each), project to metres.

The result is a compact column store of fixes sorted by object and time, plus a quality
report that accounts for every row read.

Each row is dropped for the first reason that applies, tested in this order:
``missing_id``; ``missing_role`` (only when roles are required; otherwise a missing role
becomes ``""``); ``missing_coordinates`` (NaN or infinite); ``coordinates_out_of_range``
(lon/lat input outside [-180, 180] x [-90, 90], "crs" input the transformation cannot
take to lon/lat, or planar x/y beyond ``MAX_PLANAR_M`` metres); ``time_out_of_range``
(a valid ISO 8601 date or epoch outside the years 1678-2261 that int64 nanoseconds
hold); ``unparseable_time``;
``exact_duplicate`` (same object, time, position and role as a kept row: merged into
it); ``conflicting_duplicate`` (same object and time, different position or role: all
such rows go, since the true position is unknown);
``speed_spike`` (only with ``max_speed``: a fix reached and left faster than
``max_speed``, or a track's first or last fix whose one adjacent speed is too fast;
repeated for at most ten passes). A first or last fix whose neighbour is itself an
interior spike waits for the next pass, when that spike is gone, so that one bad fix does
not take a good end fix with it. A two-fix track that is too fast loses both fixes, since
nothing tells which one is wrong.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyproj

from comove.errors import ComoveNote, InputError
from comove.io.projection import LonLatExtent, crs_to_lonlat, metric_crs_of, to_metric
from comove.io.reading import RawTracks
from comove.io.times import ParsedTimes, parse_times
from comove.tracks.quality import GapTally, _quantiles, quality_report

__all__ = ["DROP_REASONS", "CleanParams", "Fixes", "clean_fixes", "clean_window"]

#: Every reason a row can be dropped for, in the order rows are tested.
DROP_REASONS = (
    "missing_id",
    "missing_role",
    "missing_coordinates",
    "coordinates_out_of_range",
    "time_out_of_range",
    "unparseable_time",
    "exact_duplicate",
    "conflicting_duplicate",
    "speed_spike",
)
_CODE = {name: i for i, name in enumerate(DROP_REASONS)}

MAX_SPIKE_PASSES = 10

#: Largest planar coordinate kept, metres. Projected coordinates of places on Earth
#: stay within about 2e7 m of any projection's origin (half the equator, 20 037 km;
#: false eastings and northings add at most a few thousand km), so anything beyond
#: 1e8 m is not a position in metres (and would break the spatial index's arithmetic).
MAX_PLANAR_M = 1e8
MAX_EXAMPLES = 5

_ADVICE = {
    "missing_id": "fill in the object ids or name another column with --id",
    "missing_role": "fill in the roles or name another column with --role",
    "missing_coordinates": "check the coordinate columns (--x/--y or --lon/--lat)",
    "coordinates_out_of_range": (
        "longitudes must lie in [-180, 180], latitudes in [-90, 90] and planar x/y within "
        "1e8 m; check --lon/--lat, or give projected x/y in metres with --x/--y and --crs"
    ),
    "time_out_of_range": (
        "times must lie in the years 1678-2261 (what nanoseconds since 1970 in 64 bits "
        "hold); correct those rows or leave them out"
    ),
    "unparseable_time": (
        "give times as ISO 8601 (e.g. 2026-03-01T12:00:00Z) or epoch seconds or "
        "milliseconds, or their format with --time-format, or name another column with --time"
    ),
    "exact_duplicate": "each object needs fixes at distinct times",
    "conflicting_duplicate": "each object needs one position per time",
    "speed_spike": "raise --max-speed",
}


@dataclass(frozen=True)
class CleanParams:
    """Cleaning: fixes dropped as implausible.

    Options for :func:`clean_fixes`.

    Parameters
    ----------
    max_speed : float or None
        Largest plausible speed in metres per second (``--max-speed``). When given, fixes
        reached and left faster than this (speed spikes) are dropped.

    Raises
    ------
    InputError
        If ``max_speed`` is not a positive finite number.
    """

    max_speed: float | None = field(
        default=None,
        metadata={
            "help": "largest plausible speed in m/s: a fix that its track reaches and leaves "
            "faster than this is a spike and is dropped (default: no speed filter)"
        },
    )

    def __post_init__(self) -> None:
        if self.max_speed is None:
            return
        ok = isinstance(self.max_speed, (int, float)) and not isinstance(self.max_speed, bool)
        if not ok or not math.isfinite(self.max_speed) or self.max_speed <= 0:
            raise InputError(
                f"--max-speed {self.max_speed!r} is not a positive number; give the largest "
                "plausible speed in metres per second, e.g. --max-speed 12"
            )


@dataclass
class Fixes:
    """Cleaned fixes, sorted by (object, time) with strictly increasing time per object.

    Attributes
    ----------
    obj : numpy.ndarray
        int32 object codes, ``0 .. len(objects) - 1``.
    time : numpy.ndarray
        int64 nanoseconds since the Unix epoch, UTC.
    x, y : numpy.ndarray
        float64 metres in the working plane.
    role : numpy.ndarray
        int32 role codes, ``0 .. len(roles) - 1``.
    objects : numpy.ndarray
        Object ids (str), sorted; the index is the code.
    roles : numpy.ndarray
        Role names (str), sorted; the index is the code.
    metric_crs : pyproj.CRS or None
        The CRS ``x`` and ``y`` are in: the local Lambert azimuthal equal-area CRS for lon/lat and
        other-CRS input; the file's own CRS for planar input that came with one; ``None`` for
        plain planar input.
    input_crs : str or None
        ``"EPSG:4326"`` for lon/lat input, the input CRS for ``"crs"`` input (and for planar
        input that came with one), ``None`` for plain planar input.
    """

    obj: np.ndarray
    time: np.ndarray
    x: np.ndarray
    y: np.ndarray
    role: np.ndarray
    objects: np.ndarray
    roles: np.ndarray
    metric_crs: pyproj.CRS | None
    input_crs: str | None

    @property
    def n_fixes(self) -> int:
        """Number of fixes."""
        return int(self.obj.size)


# --------------------------------------------------------------------------- helpers


def _label_codes(series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Return integer codes (-1 where missing or blank) and the sorted names behind them."""
    if not isinstance(series.dtype, pd.CategoricalDtype):
        text = series.astype("str").str.strip()
        series = text.where(text != "").astype("category")
    codes = series.cat.codes.to_numpy()
    names = np.asarray(series.cat.categories, dtype=object).astype(str)
    order = np.argsort(names, kind="stable")
    if np.array_equal(order, np.arange(order.size)):  # already sorted (as the reader makes them)
        return codes.astype(np.int32), names
    rank = np.empty(order.size + 1, dtype=np.int32)
    rank[order] = np.arange(order.size)
    rank[-1] = -1
    return rank[codes], names[order]


def _sort_by_object_time(obj: np.ndarray, t: np.ndarray) -> np.ndarray | None:
    """Return the stable order of rows by (object, time); None when they are in it already.

    Two stable sorts instead of a lexsort: tracking files are usually already in
    time order or object order, which the time sort's run detection makes cheap,
    and the object codes are small integers.
    """
    small = obj.astype(np.int16) if obj.size and obj.max() < 2**15 else obj
    same = small[1:] == small[:-1]
    if np.all((small[1:] > small[:-1]) | (same & (t[1:] >= t[:-1]))):
        return None
    if np.all((t[1:] > t[:-1]) | ((t[1:] == t[:-1]) & (small[1:] >= small[:-1]))):
        return np.argsort(small, kind="stable")  # in time order: sort by object only
    by_time = np.argsort(t, kind="stable")
    return by_time[np.argsort(small[by_time], kind="stable")]


def _coordinate(series: pd.Series) -> np.ndarray:
    """Return a coordinate column as float64 (NaN where not a number), without a copy if it is."""
    if series.dtype == np.float64:
        return series.to_numpy()
    return pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)


def _take(values: np.ndarray, index: np.ndarray, whole: bool) -> np.ndarray:
    """Return ``values[index]``, or ``values`` itself when ``index`` is known to be 0..n-1."""
    return values if whole else values[index]


def _compact_codes(codes: np.ndarray, n_names: int) -> tuple[np.ndarray, np.ndarray]:
    """Return the codes in use and the codes renumbered 0..k-1 in the same order."""
    used = np.bincount(codes, minlength=n_names) > 0
    if used.all():
        return np.arange(n_names), codes
    remap = np.cumsum(used) - 1
    return np.flatnonzero(used), remap[codes]


def _describe_sources(sources: list[str]) -> str:
    if not sources:
        return "<input>"
    if len(sources) == 1:
        return sources[0]
    return f"{sources[0]} (and {len(sources) - 1} more files)"


def _spike_mask(
    obj: np.ndarray, t: np.ndarray, x: np.ndarray, y: np.ndarray, max_speed: float
) -> np.ndarray:
    """One pass of the speed-spike rule over fixes sorted by (object, time)."""
    same = obj[1:] == obj[:-1]
    dt_s = (t[1:] - t[:-1]) / 1e9
    dx, dy = x[1:] - x[:-1], y[1:] - y[:-1]
    fast = same & (np.sqrt(dx * dx + dy * dy) > max_speed * dt_s)  # not np.hypot: 5x slower
    no = np.zeros(1, dtype=bool)
    has_prev = np.concatenate([no, same])
    has_next = np.concatenate([same, no])
    fast_prev = np.concatenate([no, fast])
    fast_next = np.concatenate([fast, no])
    interior = has_prev & has_next & fast_prev & fast_next
    first = ~has_prev & has_next & fast_next
    last = has_prev & ~has_next & fast_prev
    # An end fix beside an interior spike only looks fast because of that spike; it is judged
    # again in the next pass, once the spike is gone.
    first &= ~np.concatenate([interior[1:], no])
    last &= ~np.concatenate([no, interior[:-1]])
    return interior | first | last


# --------------------------------------------------------------------------- cleaning


def clean_fixes(
    raw: RawTracks, params: CleanParams | None = None, workers: int = 1
) -> tuple[Fixes, dict]:
    """Parse times, drop unusable rows, and project the fixes into a metric plane.

    Parameters
    ----------
    raw : RawTracks
        Fixes as read by :func:`comove.io.reading.read_tracks`.
    params : CleanParams, optional
        Cleaning options; by default no speed filter.
    workers : int, default 1
        Threads of the projection of longitude/latitude (-1: one per core).

    Returns
    -------
    fixes : Fixes
        The kept fixes, sorted by (object, time), strictly increasing in time per object.
    quality : dict
        JSON-serialisable report: ``rows_read``, ``rows_kept``, ``dropped`` (count per reason
        in :data:`DROP_REASONS`), ``merged``, ``examples`` (up to five ``{"source", "row"}``
        per reason), ``objects``, ``roles``, ``role_names``, ``time_start``, ``time_end``,
        ``time_span_s``, ``sampling_interval_s`` (``median``, ``p10``, ``p90``, ``iqr`` of the
        gaps between consecutive fixes of an object), ``zone_less_times`` (kept rows whose
        times carried no zone and were read as UTC), ``time_note``,
        ``time_input``, ``coordinates``, ``max_speed_m_s``, ``speed_spike_passes`` and
        ``sources``. ``rows_read == rows_kept + sum(dropped.values())``.

    Raises
    ------
    InputError
        If no row survives; the message names the source and the main reason.

    Notes
    -----
    Each row is dropped for the first reason in :data:`DROP_REASONS` that applies; the
    module docstring defines each. Lon/lat input is projected to
    :func:`comove.io.projection.local_metric_crs`; "crs" input is first taken to lon/lat, so
    distances are true metres even for distorting CRSs such as Web Mercator; planar input is
    used as it is.

    Examples
    --------
    >>> import pandas as pd
    >>> from comove.io.reading import read_tracks
    >>> frame = pd.DataFrame({"id": ["a", "a", "a", "b"], "time": [1, 0, 1, 0],
    ...                       "x": [1.0, 0.0, 1.0, None], "y": 0.0, "role": "r"})
    >>> fixes, quality = clean_fixes(read_tracks(frame))
    >>> fixes.objects.tolist(), fixes.time.tolist(), fixes.x.tolist()
    (['a'], [0, 1000000000], [0.0, 1.0])
    >>> {reason: n for reason, n in quality["dropped"].items() if n}
    {'missing_coordinates': 1, 'exact_duplicate': 1}
    """
    params = params if params is not None else CleanParams()
    frame = raw.frame.reset_index(drop=True)
    rows = _mark_invalid(raw, frame)
    plane = _plane(rows)  # before duplicates are judged: see _extent
    kept = _resolve_duplicates(rows)
    metric_crs, input_crs = _project(raw, rows, kept, workers, plane)
    passes = _drop_speed_spikes(rows, kept, params.max_speed)[0]
    dropped, examples = _drop_counts(raw, frame, rows.reason)
    if kept.rows.size == 0:
        raise _nothing_kept(raw, dropped, examples)
    fixes = _kept_fixes(rows, kept, metric_crs, input_crs)
    quality = _quality_report(raw, params, rows, kept, fixes, dropped, examples, passes)
    note_drops(quality)
    return fixes, quality


@dataclass
class _Rows:
    """Every row read, as arrays of one value per row of the raw frame."""

    reason: np.ndarray  # int8 index into DROP_REASONS of why the row is dropped; -1: not (yet)
    obj: np.ndarray  # object codes, -1 where missing
    objects: np.ndarray  # sorted names behind the object codes
    role: np.ndarray  # role codes, -1 where missing (and required)
    roles: np.ndarray  # sorted names behind the role codes
    a: np.ndarray  # first and second coordinate as read (lon/lat or x/y), float64
    b: np.ndarray
    lon: np.ndarray | None  # lon/lat of lon/lat and "crs" input; None for planar input
    lat: np.ndarray | None
    times: ParsedTimes


@dataclass
class _Kept:
    """The rows kept so far, sorted by (object, time); each step narrows them."""

    rows: np.ndarray  # original row numbers
    whole: bool  # rows is 0..n-1: per-row arrays serve as they are, without a gather
    obj: np.ndarray
    role: np.ndarray
    x: np.ndarray | None = None  # working-plane metres, once projected
    y: np.ndarray | None = None

    def take(self, values: np.ndarray) -> np.ndarray:
        """Return the kept rows' values of a per-row array."""
        return _take(values, self.rows, self.whole)


def _mark(reason: np.ndarray, mask: np.ndarray, name: str) -> None:
    """Drop the rows in ``mask`` not dropped yet, for the reason ``name``."""
    reason[mask & (reason < 0)] = _CODE[name]


def row_checks(raw: RawTracks, frame: pd.DataFrame | None = None) -> _Rows:
    """Return every row's codes, coordinates and times, with the rows unusable on their own marked.

    ``rows.reason`` is -1 for a row kept so far, else the index in
    :data:`DROP_REASONS` of why it goes (missing id, role or coordinates,
    impossible coordinates, unreadable time): the checks that need no other row.
    """
    return _mark_invalid(raw, raw.frame.reset_index(drop=True) if frame is None else frame)


def _mark_invalid(raw: RawTracks, frame: pd.DataFrame) -> _Rows:
    """Read ids, roles, coordinates and times, marking the rows that lack a usable one."""
    reason = np.full(len(frame), -1, dtype=np.int8)
    obj, objects = _label_codes(frame["object"])
    role, roles = _label_codes(frame["role"])
    check_names(objects, roles, raw.sources)
    _mark(reason, obj < 0, "missing_id")
    if raw.role_required:
        _mark(reason, role < 0, "missing_role")
    elif (role < 0).any():
        # roles are optional here: a missing one is the role "", which sorts first
        roles = np.append([""], roles)
        role = role + 1
    a, b, lon, lat = _mark_coordinates(raw, frame, reason)
    try:
        times = parse_times(frame["time"], raw.time_unit, raw.time_format, raw.time_zone)
    except InputError as exc:  # say where: the file and its time column
        where = raw.sources[raw.source_index] if raw.sources else "input"
        raise InputError(f"{where}: time column {raw.columns.get('time', 'time')!r}: "
                         f"{exc.worded_for()}") from None  # fmt: skip
    if times.out_of_range is not None:
        _mark(reason, times.out_of_range, "time_out_of_range")
    _mark(reason, ~times.ok, "unparseable_time")
    return _Rows(reason, obj, objects, role, roles, a, b, lon, lat, times)


def _mark_coordinates(
    raw: RawTracks, frame: pd.DataFrame, reason: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Return the coordinates as read and as lon/lat, marking missing and impossible ones."""
    lonlat = raw.coords == "lonlat"
    a_col, b_col = ("lon", "lat") if lonlat else ("x", "y")
    a, b = _coordinate(frame[a_col]), _coordinate(frame[b_col])
    finite = np.isfinite(a) & np.isfinite(b)
    _mark(reason, ~finite, "missing_coordinates")

    lon = lat = None
    if lonlat:
        lon, lat = a, b
    elif raw.coords == "crs":
        lon = np.full(a.size, np.nan)
        lat = np.full(a.size, np.nan)
        lon[finite], lat[finite] = crs_to_lonlat(a[finite], b[finite], raw.crs)
    elif raw.coords != "planar":
        raise ValueError(f"unknown coordinate kind {raw.coords!r}")
    else:  # planar metres: no place on Earth is further than this from any origin
        with np.errstate(invalid="ignore"):
            far = (np.abs(a) > MAX_PLANAR_M) | (np.abs(b) > MAX_PLANAR_M)
        _mark(reason, finite & far, "coordinates_out_of_range")
    if lon is not None:
        with np.errstate(invalid="ignore"):
            inside = (
                np.isfinite(lon) & np.isfinite(lat) & (np.abs(lon) <= 180) & (np.abs(lat) <= 90)
            )
        _mark(reason, finite & ~inside, "coordinates_out_of_range")
    return a, b, lon, lat


def _resolve_duplicates(rows: _Rows) -> _Kept:
    """Sort the rows still valid by (object, time) and drop duplicate (object, time) rows."""
    reason = rows.reason
    valid = np.flatnonzero(reason < 0)
    # clean, sorted input is the common case: gathers of millions of rows are then skipped
    every = valid.size == reason.size
    obj, role = _take(rows.obj, valid, every), _take(rows.role, valid, every)
    t = _take(rows.times.ns, valid, every)
    order = _sort_by_object_time(obj, t)
    if order is None:  # already sorted, the usual case: no gathers of millions of rows
        order, so, st = np.arange(obj.size), obj, t
    else:
        so, st = obj[order], t[order]
    tie = (so[1:] == so[:-1]) & (st[1:] == st[:-1])
    if tie.any():
        # only rows sharing an (object, time) need their positions and roles compared
        in_tie = np.zeros(order.size, dtype=bool)
        in_tie[1:] |= tie
        in_tie[:-1] |= tie
        a, b = _take(rows.a, valid, every), _take(rows.b, valid, every)
        _mark_duplicates(reason, valid, order[in_tie], (obj, t, a, b, role))
        order = order[reason[valid[order]] < 0]
    in_order = bool(np.all(order[1:] > order[:-1]) and order.size == valid.size)
    return _Kept(
        rows=_take(valid, order, in_order),
        whole=every and in_order,
        obj=_take(obj, order, in_order),
        role=_take(role, order, in_order),
    )


def _mark_duplicates(
    reason: np.ndarray,
    valid: np.ndarray,
    sub: np.ndarray,
    columns: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray],
) -> None:
    """Mark exact and conflicting duplicates among rows that share an (object, time).

    ``sub`` indexes the valid rows ``valid`` and ``columns`` (object, time, the two
    coordinates and role of each valid row); the first copy in file order of an exact
    duplicate is kept, every row of a conflict is dropped.
    """
    obj, t, a, b, role = columns
    sub = sub[np.lexsort((role[sub], b[sub], a[sub], t[sub], obj[sub]))]
    same_key = (obj[sub][1:] == obj[sub][:-1]) & (t[sub][1:] == t[sub][:-1])
    identical = (
        same_key
        & (a[sub][1:] == a[sub][:-1])
        & (b[sub][1:] == b[sub][:-1])
        & (role[sub][1:] == role[sub][:-1])
    )
    # lexsort is stable, so the first copy in file order is the one kept.
    exact = np.zeros(sub.size, dtype=bool)
    exact[1:] = identical
    reason[valid[sub[exact]]] = _CODE["exact_duplicate"]
    rest = sub[~exact]
    clash = (obj[rest][1:] == obj[rest][:-1]) & (t[rest][1:] == t[rest][:-1])
    conflict = np.zeros(rest.size, dtype=bool)
    conflict[1:] |= clash
    conflict[:-1] |= clash
    reason[valid[rest[conflict]]] = _CODE["conflicting_duplicate"]


def _extent(rows: _Rows) -> LonLatExtent:
    """Return the extent of the rows still valid: the rows that are well-formed on their own.

    The working plane is centred on these, before duplicates and speed spikes
    are judged, so that tracks read in blocks get the same plane from the
    extents of their blocks.
    """
    assert rows.lon is not None and rows.lat is not None
    valid = rows.reason < 0
    lon, lat = (rows.lon, rows.lat) if valid.all() else (rows.lon[valid], rows.lat[valid])
    extent = LonLatExtent.of(lon, lat)
    return LonLatExtent.of(lon, lat, bins=True) if extent.needs_bins else extent


def _plane(rows: _Rows) -> pyproj.CRS | None:
    """Return the working plane of lon/lat rows (None for planar input or no valid row)."""
    if rows.lon is None or not (rows.reason < 0).any():
        return None
    return metric_crs_of(_extent(rows))


def _project(
    raw: RawTracks,
    rows: _Rows,
    kept: _Kept,
    workers: int = 1,
    working_crs: pyproj.CRS | None = None,
) -> tuple[pyproj.CRS | None, str | None]:
    """Set the kept rows' working-plane coordinates; return the working and the input CRS.

    ``working_crs`` is the plane of lon/lat input when already chosen (tracks
    cleaned window by window); otherwise it is centred on the rows (:func:`_extent`).
    """
    metric_crs: pyproj.CRS | None
    if rows.lon is not None:
        if kept.rows.size:
            lon, lat = kept.take(rows.lon), kept.take(rows.lat)
            metric_crs = working_crs if working_crs is not None else _plane(rows)
            kept.x, kept.y = to_metric(lon, lat, metric_crs, workers)
        else:
            metric_crs, kept.x, kept.y = None, np.empty(0), np.empty(0)
        input_crs = "EPSG:4326" if raw.coords == "lonlat" else raw.crs
    else:
        metric_crs = pyproj.CRS.from_user_input(raw.crs) if raw.crs else None
        kept.x, kept.y = kept.take(rows.a), kept.take(rows.b)
        input_crs = raw.crs
    return metric_crs, input_crs


def _spread(mark: np.ndarray, obj: np.ndarray, hops: int) -> np.ndarray:
    """Return ``mark`` widened by ``hops`` neighbours on each side within each object."""
    same = obj[1:] == obj[:-1]
    for _ in range(hops):
        wider = mark.copy()
        wider[1:] |= mark[:-1] & same
        wider[:-1] |= mark[1:] & same
        mark = wider
    return mark


def _drop_speed_spikes(
    rows: _Rows, kept: _Kept, max_speed: float | None, cut: np.ndarray | None = None
) -> tuple[int, int, np.ndarray | None]:
    """Drop speed spikes from the kept rows, each pass over all of them.

    ``cut`` marks kept rows whose track may go on beyond the rows at hand (a
    time window's first and last fix of an object): their neighbours are
    unknown, so the decisions that could depend on them are not taken. A
    pass's decision at a fix reads its neighbours and theirs, so the doubt
    spreads two fixes per pass, over every pass the whole track could take.

    Returns
    -------
    passes : int
        Passes made (at most ``MAX_SPIKE_PASSES``; 0 without ``max_speed``).
    last : int
        The last pass that dropped a fix (0: none).
    doubt : ndarray of bool or None
        Per kept row before the passes, whether its fate is unknown (None without ``cut``).
    """
    passes = last = 0
    if max_speed is None or not kept.rows.size:
        return passes, last, None
    doubt = None if cut is None else cut.copy()
    alive = np.arange(kept.rows.size)
    t = kept.take(rows.times.ns)
    while passes < MAX_SPIKE_PASSES:
        passes += 1
        obj = kept.obj[alive]
        spike = _spike_mask(obj, t[alive], kept.x[alive], kept.y[alive], max_speed)
        if doubt is not None:
            unsure = _spread(doubt[alive], obj, 2)
            doubt[alive] = unsure
            spike &= ~unsure
        if not spike.any():
            break
        last = passes
        rows.reason[kept.rows[alive[spike]]] = _CODE["speed_spike"]
        alive = alive[~spike]
    if doubt is not None:
        # the whole track may take more passes, each spreading the doubt further
        doubt[alive] = _spread(doubt[alive], kept.obj[alive], 2 * (MAX_SPIKE_PASSES - passes))
    if alive.size < kept.rows.size:
        kept.rows, kept.obj, kept.role = kept.rows[alive], kept.obj[alive], kept.role[alive]
        kept.x, kept.y = kept.x[alive], kept.y[alive]
        kept.whole = False
        if doubt is not None:
            doubt = doubt[alive]
    return passes, last, doubt


def _drop_counts(
    raw: RawTracks, frame: pd.DataFrame, reason: np.ndarray
) -> tuple[dict[str, int], dict[str, list[dict]]]:
    """Return the rows dropped per reason, and up to ``MAX_EXAMPLES`` of them per reason."""
    counts = np.bincount(reason[reason >= 0].astype(np.intp), minlength=len(DROP_REASONS))
    dropped = {name: int(counts[i]) for i, name in enumerate(DROP_REASONS)}
    examples = {}
    for i, name in enumerate(DROP_REASONS):
        where = np.flatnonzero(reason == i)[:MAX_EXAMPLES]
        src = (
            frame["source"].iloc[where].astype("str").tolist()
            if "source" in frame
            else [_describe_sources(raw.sources)] * where.size
        )
        rows = raw.source_rows(where).tolist() if "source" in frame else (where + 1).tolist()
        examples[name] = [{"source": str(f), "row": int(r)} for f, r in zip(src, rows, strict=True)]
    return dropped, examples


#: The separator of role sets and member lists in the results' tables (the same as
#: ``roles.persistence.ROLE_SEP`` and ``groups.episodes.MEMBER_SEP``): no id or role may
#: hold it, or "a;b" would read as two roles.
NAME_SEP = ";"


def check_names(objects: np.ndarray, roles: np.ndarray, sources: list[str]) -> None:
    """Refuse object ids or roles holding :data:`NAME_SEP`, naming the first of each.

    Raises
    ------
    InputError
        Naming the value and what to do.
    """
    for kind, names, flag in (("object id", objects, "--id"), ("role", roles, "--role")):
        bad = [str(n) for n in names if NAME_SEP in str(n)]
        if bad:
            raise InputError(
                f"{_describe_sources(sources)}: the {kind} {bad[0]!r}"
                + (f" (and {len(bad) - 1} more)" if len(bad) > 1 else "")
                + f" holds {NAME_SEP!r}, which separates {kind}s in the results; replace it "
                f"in the data (or name another column with {flag})"
            )


#: Share of the rows read above which the rows dropped for one reason get a note, even
#: with --quiet: more than a stray row or two is lost (common practice for a warning of
#: data loss; exact duplicates are merged, not lost, and get none).
DROP_NOTE_SHARE = 0.01


def note_drops(quality: dict) -> None:
    """Warn (:class:`ComoveNote`) of each reason that dropped more than a small share of rows.

    Each note names the reason, the count and share, an example row and what to do.
    """
    read = int(quality["rows_read"])
    for reason in DROP_REASONS:
        n = int(quality["dropped"][reason])
        if reason == "exact_duplicate" or n == 0 or n <= DROP_NOTE_SHARE * read:
            continue
        shown = quality["examples"].get(reason) or []
        where = f" (e.g. {shown[0]['source']} row {shown[0]['row']})" if shown else ""
        warnings.warn(
            ComoveNote(
                f"{n:,} of {read:,} rows ({n / read:.1%}) were dropped for "
                f"{reason.replace('_', ' ')}{where}; {_ADVICE[reason]}"
            ),
            stacklevel=2,
        )


def _nothing_kept(raw: RawTracks, dropped: dict[str, int], examples: dict) -> InputError:
    """Return the error for input of which no row survives, naming the main reason."""
    return nothing_kept(raw.sources, dropped, examples)


def nothing_kept(sources: list[str], dropped: dict[str, int], examples: dict) -> InputError:
    """Return the error for input of which no row survives, naming the main reason.

    ``dropped`` counts the rows per reason and ``examples`` lists, per reason,
    ``{"source", "row"}`` of the first rows dropped for it (as the quality report).
    """
    n = sum(dropped.values())  # every row read was dropped
    main = max(DROP_REASONS, key=lambda r: dropped[r]) if n else None
    where = _describe_sources(sources)
    if main is None:
        return InputError(f"{where}: no rows to clean; give a file with data rows")
    example = examples[main][0]
    return InputError(
        f"{where}: no usable rows — all {n} were dropped, most ({dropped[main]}) for "
        f"{main.replace('_', ' ')} (e.g. {example['source']} row {example['row']}); "
        f"{_ADVICE[main]}"
    )


def _kept_fixes(
    rows: _Rows, kept: _Kept, metric_crs: pyproj.CRS | None, input_crs: str | None
) -> Fixes:
    """Return the kept rows as fixes, with codes re-made to run 0..n-1 without gaps."""
    obj_used, obj_final = _compact_codes(kept.obj, len(rows.objects))
    role_used, role_final = _compact_codes(kept.role, len(rows.roles))
    return Fixes(
        obj=obj_final.astype(np.int32),
        time=np.asarray(kept.take(rows.times.ns), dtype=np.int64),
        x=np.asarray(kept.x, dtype=np.float64),
        y=np.asarray(kept.y, dtype=np.float64),
        role=role_final.astype(np.int32),
        objects=np.asarray(rows.objects, dtype=object)[obj_used].astype(str),
        roles=np.asarray(rows.roles, dtype=object)[role_used].astype(str),
        metric_crs=metric_crs,
        input_crs=input_crs,
    )


def _quality_report(
    raw: RawTracks,
    params: CleanParams,
    rows: _Rows,
    kept: _Kept,
    fixes: Fixes,
    dropped: dict[str, int],
    examples: dict[str, list[dict]],
    passes: int,
) -> dict:
    """Return the quality report of :func:`clean_fixes`."""
    kt = fixes.time
    gaps = np.diff(kt)[fixes.obj[1:] == fixes.obj[:-1]]  # ns; quantiles scaled below
    return quality_report(
        rows_read=int(rows.reason.size),
        dropped=dropped,
        examples=examples,
        objects=fixes.objects,
        roles=fixes.roles,
        span=(int(kt.min()), int(kt.max())),
        interval=_quantiles(gaps, 1e9),
        zone_less=int(kept.take(rows.times.zone_less).sum()),
        time_input=rows.times.kind,
        coords=raw.coords,
        crs=(fixes.input_crs, fixes.metric_crs),
        max_speed=params.max_speed,
        passes=passes,
        sources=raw.sources,
    )


# --------------------------------------------------------------------------- windows


@dataclass
class WindowRows:
    """The rows of a time window and its margins, read in blocks, each well-formed on its own.

    Rows dropped for reasons that need no other row (missing id, role or
    coordinates, impossible coordinates, unreadable time) are counted while
    reading and never reach a window.

    Attributes
    ----------
    obj, role : ndarray of int32
        Object and role codes of the whole input (:class:`WindowPlan`).
    t : ndarray of int64
        Times, ns UTC.
    a, b : ndarray of float64
        Coordinates as read (lon/lat, or x/y).
    lon, lat : ndarray of float64 or None
        Lon/lat of lon/lat and "crs" input; None for planar input.
    zone_less : ndarray of bool
        Times written without a zone.
    seq : ndarray of int64
        Each row's number in reading order (sources one after the other, from 0).
    """

    obj: np.ndarray
    role: np.ndarray
    t: np.ndarray
    a: np.ndarray
    b: np.ndarray
    lon: np.ndarray | None
    lat: np.ndarray | None
    zone_less: np.ndarray
    seq: np.ndarray


@dataclass
class WindowPlan:
    """What is decided once for the whole input before its windows are cleaned.

    Attributes
    ----------
    objects, roles : ndarray of str
        Sorted names behind the codes of :class:`WindowRows`.
    coords : str
        ``"lonlat"``, ``"planar"`` or ``"crs"`` (as :class:`~comove.io.reading.RawTracks`).
    input_crs : str or None
        The input's CRS (``"EPSG:4326"`` for lon/lat).
    metric_crs : pyproj.CRS or None
        The working plane: centred on the extent of every well-formed row.
    time_kind : str
        How the times were written.
    """

    objects: np.ndarray
    roles: np.ndarray
    coords: str
    input_crs: str | None
    metric_crs: pyproj.CRS | None
    time_kind: str


@dataclass
class CleanedWindow:
    """The fixes a time window owns after cleaning, and what cleaning counted there.

    Attributes
    ----------
    obj, t, x, y, role : ndarray
        The kept fixes with times in the window, sorted by (object, time);
        ``x``, ``y`` in the working plane.
    dropped : ndarray of int64
        Rows of the window dropped, per reason of :data:`DROP_REASONS`.
    examples : list of ndarray
        Per reason, the reading-order numbers of its first dropped rows (at most
        ``MAX_EXAMPLES``).
    zone_less : int
        Kept rows whose times had no zone.
    last_spike_pass : int
        The last speed-spike pass that dropped a fix of the window (0: none).
    gaps : GapTally
        The gaps between the window's kept fixes.
    """

    obj: np.ndarray
    t: np.ndarray
    x: np.ndarray
    y: np.ndarray
    role: np.ndarray
    dropped: np.ndarray
    examples: list[np.ndarray]
    zone_less: int
    last_spike_pass: int
    gaps: GapTally


def clean_window(
    part: WindowRows,
    plan: WindowPlan,
    params: CleanParams,
    owned: tuple[int, int],
    cut: tuple[bool, bool],
    workers: int = 1,
) -> CleanedWindow | None:
    """Clean the rows of a time window with its margins as :func:`clean_fixes` cleans them all.

    Parameters
    ----------
    part : WindowRows
        The window's rows and rows of its margins.
    plan : WindowPlan
        Names, coordinates and working plane of the whole input.
    params : CleanParams
        Cleaning options.
    owned : (int, int)
        The window, ns: rows at times ``start <= t < stop`` are its own.
    cut : (bool, bool)
        Whether the input may have rows before, and after, the rows in ``part``.
    workers : int, default 1
        Threads of the projection of longitude/latitude (-1: one per core).

    Returns
    -------
    CleanedWindow or None
        None when a speed-spike decision on a fix of the window could depend on
        fixes beyond the margins: the caller widens them and tries again.

    Notes
    -----
    Duplicates share a time, so they fall in one window. A speed-spike pass
    reads each fix's neighbours and theirs; fixes whose fate could depend on
    the unknown neighbours beyond a cut are left undecided (see
    :func:`_drop_speed_spikes`), so every decision taken equals the one on the
    whole input.
    """
    times = ParsedTimes(part.t, np.ones(part.t.size, dtype=bool), part.zone_less, plan.time_kind)
    reason = np.full(part.t.size, -1, dtype=np.int8)
    rows = _Rows(reason, part.obj, plan.objects, part.role, plan.roles, part.a, part.b,
                 part.lon, part.lat, times)  # fmt: skip
    kept = _resolve_duplicates(rows)
    if rows.lon is not None:
        lon, lat = kept.take(rows.lon), kept.take(rows.lat)
        kept.x, kept.y = to_metric(lon, lat, plan.metric_crs, workers)
    else:
        kept.x, kept.y = kept.take(rows.a), kept.take(rows.b)
    ends = np.zeros(kept.rows.size, dtype=bool)
    if kept.rows.size:
        change = kept.obj[1:] != kept.obj[:-1]
        ends[np.r_[True, change]] |= cut[0]  # first fix of an object: its past is unknown
        ends[np.r_[change, True]] |= cut[1]
    _, last, doubt = _drop_speed_spikes(rows, kept, params.max_speed, ends)
    kt = kept.take(part.t)
    mine = (kt >= owned[0]) & (kt < owned[1])
    if doubt is not None and (doubt & mine).any():
        return None
    row_mine = (part.t >= owned[0]) & (part.t < owned[1])
    gone = row_mine & (reason >= 0)
    order = np.argsort(part.seq[gone], kind="stable")
    seq, why = part.seq[gone][order], reason[gone][order]
    obj, t = kept.obj[mine], kt[mine]
    return CleanedWindow(
        obj=obj.astype(np.int32), t=t.astype(np.int64),
        x=np.asarray(kept.x)[mine], y=np.asarray(kept.y)[mine],
        role=kept.role[mine].astype(np.int32),
        dropped=np.bincount(why.astype(np.intp), minlength=len(DROP_REASONS)).astype(np.int64),
        examples=[seq[why == i][:MAX_EXAMPLES] for i in range(len(DROP_REASONS))],
        zone_less=int(kept.take(part.zone_less)[mine].sum()),
        last_spike_pass=last,
        gaps=GapTally.of(obj, t, len(plan.objects)),
    )  # fmt: skip
