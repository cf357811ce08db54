"""Times of fixes: parsing a time column to UTC nanoseconds, and time texts for people.

A time column may hold ISO 8601 text (zone-less times are UTC), epoch seconds or
milliseconds as numbers or text, or datetimes; :func:`parse_times` turns any of them
into int64 nanoseconds since the Unix epoch and says which values it could not read.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from comove.errors import ComoveNote, InputError, bad_setting

__all__ = ["MS_THRESHOLD", "ParsedTimes", "human_seconds", "parse_times", "utc_iso"]

MS_THRESHOLD = 1e11  # epoch seconds this large would lie after the year 5000

_NS_PER = {"s": 1_000_000_000, "ms": 1_000_000, "us": 1_000, "ns": 1}
_INT64_MAX = np.iinfo(np.int64).max
_NULL_TOKENS = ("", "na", "nan", "nat", "null", "none")
_NUMBER_PATTERN = r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$"
# A zone designator after a time part: Z, +hh, +hhmm or +hh:mm (and minus).
_ZONE_PATTERN = r"(?:T\d{2}|\d:\d{2})[\d:.,]*\s*(?:[zZ]|[+-]\d{2}(?::?\d{2})?)$"


@dataclass
class ParsedTimes:
    """A time column read as nanoseconds.

    Attributes
    ----------
    ns : numpy.ndarray
        int64 nanoseconds since the Unix epoch, UTC; 0 where not ``ok``.
    ok : numpy.ndarray
        bool: the value was read.
    zone_less : numpy.ndarray
        bool: read, but written without a time zone (taken as UTC).
    kind : str
        How the times were written, for the quality report (``"ISO 8601 text"``,
        ``"epoch seconds"``, ``"epoch milliseconds"``, ``"datetimes"``, ``"booleans"``).
    out_of_range : numpy.ndarray or None
        bool: not read, but a valid date or epoch outside the years 1678-2261 that
        nanoseconds since the epoch in 64 bits can hold (``None``: no such value).
    """

    ns: np.ndarray
    ok: np.ndarray
    zone_less: np.ndarray
    kind: str
    out_of_range: np.ndarray | None = None


def _datetimes_to_ns(series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Naive (UTC) datetime64 values of any unit to int64 ns, flagging NaT and overflow."""
    values = series.to_numpy()
    unit = np.datetime_data(values.dtype)[0]
    ints = values.view(np.int64)
    ok = ~np.isnat(values)
    factor = _NS_PER.get(unit)
    if factor is None:  # coarser units (days, ...) are rare; numpy converts them exactly
        factor = int(np.timedelta64(1, unit) / np.timedelta64(1, "ns"))
    ok &= np.abs(ints) <= _INT64_MAX // factor
    return np.where(ok, ints * factor, 0).astype(np.int64), ok


def _parse_datetimes(series: pd.Series) -> ParsedTimes:
    zone_less = np.zeros(len(series), dtype=bool)
    if isinstance(series.dtype, pd.DatetimeTZDtype):
        series = series.dt.tz_convert("UTC").dt.tz_localize(None)
        ns, ok = _datetimes_to_ns(series)
    else:
        ns, ok = _datetimes_to_ns(series)
        zone_less = ok.copy()
    return ParsedTimes(ns, ok, zone_less, "datetimes")


def _parse_numbers(values: pd.Series | np.ndarray, unit: str | None) -> ParsedTimes:
    if isinstance(values, pd.Series) and pd.api.types.is_integer_dtype(values.dtype):
        present = values.notna().to_numpy()
        ints = values.to_numpy(dtype=np.int64, na_value=0)
        floats = np.where(present, ints.astype(np.float64), np.nan)
    else:
        floats = np.asarray(values, dtype=np.float64)
        ints = None
    finite = np.isfinite(floats)
    if unit is None:
        # no temporary arrays: millions of rows are scanned twice in place
        biggest = max(np.max(floats, where=finite, initial=0.0),
                      -np.min(floats, where=finite, initial=0.0))  # fmt: skip
        unit = "ms" if biggest > MS_THRESHOLD else "s"
    factor = _NS_PER[unit]
    with np.errstate(invalid="ignore"):  # NaN compares false: not ok
        ok = np.abs(floats) < (_INT64_MAX // factor) - 1
    if ints is not None:
        ns = np.where(ok, ints * factor, 0)
    else:
        # Counted in whole microseconds: a float64 epoch in seconds carries only ~0.2 us
        # near the present, so finer digits are representation noise that would put
        # regularly sampled fixes a few ns off their grid. Microsecond counts of epochs
        # before the year 2255 stay below 2**53, so integer epochs convert exactly.
        # In place: millions of rows.
        micro = floats * (factor / 1000)
        micro[~ok] = 0.0
        np.round(micro, out=micro)
        ns = micro.astype(np.int64)
        del micro
        ns *= 1000
    kind = "epoch seconds" if unit == "s" else "epoch milliseconds"
    return ParsedTimes(ns.astype(np.int64), ok, np.zeros(floats.size, dtype=bool), kind,
                       finite & ~ok)  # fmt: skip


def _parse_text(values: pd.Series, unit: str | None) -> ParsedTimes:
    # pyarrow's compute kernels do the string work; pandas' .str methods would fall back to
    # a Python loop per value for these patterns.
    text = pc.utf8_trim_whitespace(pa.array(values.astype("str"), type=pa.large_string()))
    blank = pc.fill_null(
        pc.is_in(pc.utf8_lower(text), value_set=pa.array(_NULL_TOKENS, pa.large_string())),
        True,
    )
    text = pc.if_else(blank, pa.scalar(None, pa.large_string()), text)
    n = len(text)
    numeric_like = pc.fill_null(pc.match_substring_regex(text, _NUMBER_PATTERN), False)
    n_numeric = pc.sum(numeric_like).as_py() or 0
    n_present = n - (pc.sum(blank).as_py() or 0)
    numbers = np.full(n, np.nan)
    if n_numeric:
        mask = numeric_like.to_numpy(zero_copy_only=False)
        numbers[mask] = pc.cast(pc.filter(text, numeric_like), pa.float64()).to_numpy()
        if n_numeric == n_present:
            return _parse_numbers(numbers, unit)
    # "... UTC"/"... GMT" suffixes are common in exports; ISO 8601 spells them "Z".
    text = pc.replace_substring_regex(text, r"\s*(?:UTC|GMT)$", "Z")
    parsed = pd.to_datetime(
        pd.Series(text.to_pandas(), dtype="str"), utc=True, format="ISO8601", errors="coerce"
    )
    ns, ok = _datetimes_to_ns(parsed.dt.tz_localize(None))
    # A column is either epoch numbers or ISO 8601 text; the reading that parses more rows
    # wins, so a stray bad cell only costs its own row.
    if n_numeric > ok.sum():
        return _parse_numbers(numbers, unit)
    has_zone = pc.fill_null(pc.match_substring_regex(text, _ZONE_PATTERN), False)
    zone_less = ok & ~has_zone.to_numpy(zero_copy_only=False)
    return ParsedTimes(ns, ok, zone_less, "ISO 8601 text", _iso_out_of_range(text, ok))


#: An ISO 8601 date at the start of a text, its year captured.
_ISO_YEAR = r"^[+-]?(?P<year>\d{4,})-\d{2}-\d{2}"


def _iso_out_of_range(text: pa.Array, ok: np.ndarray) -> np.ndarray | None:
    """Return which texts not read are ISO 8601 dates of years beyond 1678-2261 (or None)."""
    failed = ~ok & pc.fill_null(pc.match_substring_regex(text, _ISO_YEAR), False).to_numpy(
        zero_copy_only=False
    )
    if not failed.any():
        return None
    at = np.flatnonzero(failed)
    years = pc.struct_field(pc.extract_regex(pc.take(text, pa.array(at)), _ISO_YEAR), "year")
    year = np.asarray(years.to_numpy(zero_copy_only=False), dtype=object).astype(np.int64)
    out = np.zeros(ok.size, dtype=bool)
    out[at] = (year <= 1677) | (year >= 2262)
    return out


def parse_times(
    values: pd.Series,
    unit: str | None,
    time_format: str | None = None,
    time_zone: str | None = None,
) -> ParsedTimes:
    """Turn the time column as read into int64 ns since the epoch, UTC.

    Parameters
    ----------
    values : pandas.Series
        The time column as read: text, numbers, datetimes or a categorical of any of these.
    unit : {None, "s", "ms"}
        Unit of epoch numbers; ``None`` detects it.
    time_format : str, optional
        The standard strftime codes the times are written in (``"%d/%m/%Y %H:%M"``);
        without it ISO 8601 text is read, and local day-first or month-first dates
        (``20/03/2021 00:22``) when the dates themselves tell which (a note says
        which was assumed; when they cannot, an error asks for the format).
    time_zone : str, optional
        IANA zone of times written without one (``"Europe/Lisbon"``); without it
        they are UTC. Epoch numbers are UTC whatever it says.

    Returns
    -------
    ParsedTimes
        One value per row, in the order of ``values``.

    Notes
    -----
    Strings must be ISO 8601 (zone-less ones are UTC), numbers are epoch seconds or
    milliseconds (milliseconds when the largest magnitude exceeds ``MS_THRESHOLD``,
    unless ``unit`` says), and datetimes are taken as they are (naive ones are UTC).
    A text column is read as epoch numbers or as ISO 8601, whichever reads more rows.
    A categorical column is parsed once per distinct value.
    """
    parsed = _parse_any(values.reset_index(drop=True), unit, time_format)
    if time_zone is not None and parsed.zone_less.any():
        parsed = _in_zone(parsed, time_zone)
    return parsed


def _parse_any(values: pd.Series, unit: str | None, time_format: str | None) -> ParsedTimes:
    """Return :func:`parse_times` of ``values`` with zone-less times taken as UTC."""
    if time_format is not None and not isinstance(values.dtype, pd.CategoricalDtype):
        if not pd.api.types.is_datetime64_any_dtype(values.dtype):
            return _parse_format(values, time_format)
    dtype = values.dtype
    if isinstance(dtype, pd.CategoricalDtype):
        # parse each distinct value once: fixes of one snapshot share their time text
        codes = values.cat.codes.to_numpy()
        distinct = _parse_any(pd.Series(np.asarray(values.cat.categories)), unit, time_format)
        at = np.where(codes >= 0, codes, 0)
        ok = distinct.ok[at] & (codes >= 0)
        return ParsedTimes(
            np.where(ok, distinct.ns[at], 0), ok, distinct.zone_less[at] & ok, distinct.kind
        )
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return _parse_datetimes(values)
    if pd.api.types.is_bool_dtype(dtype):
        none = np.zeros(len(values), dtype=bool)
        return ParsedTimes(np.zeros(len(values), dtype=np.int64), none, none, "booleans")
    if pd.api.types.is_numeric_dtype(dtype):
        return _parse_numbers(values, unit)
    inferred = pd.api.types.infer_dtype(values, skipna=True)
    if inferred in ("integer", "floating", "mixed-integer-float", "decimal"):
        return _parse_numbers(pd.to_numeric(values, errors="coerce").to_numpy(float), unit)
    if inferred in ("datetime", "datetime64", "date"):
        # Python datetime objects: naive ones are UTC. Telling them from aware ones would take
        # a loop per value, so they are not counted as zone-less.
        parsed = pd.to_datetime(values, errors="coerce", utc=True)
        ns, ok = _datetimes_to_ns(parsed.dt.tz_localize(None))
        return ParsedTimes(ns, ok, np.zeros(len(values), dtype=bool), "datetimes")
    parsed = _parse_text(values, unit)
    if parsed.kind == "ISO 8601 text" and not parsed.ok.all():
        return _day_or_month_first(values, parsed)
    return parsed


def _parse_format(values: pd.Series, time_format: str) -> ParsedTimes:
    """Return times written in ``time_format`` (strftime codes); the others are not read."""
    text = values.astype("str").str.strip()
    try:
        parsed = pd.to_datetime(text, format=time_format, errors="coerce")
    except ValueError as exc:  # a format pandas cannot use at all
        problem = f"{time_format!r} is not a format of strftime codes pandas can read ({exc})"
        raise bad_setting("time_format", problem + "; give e.g. %d/%m/%Y %H:%M") from None
    if isinstance(parsed.dtype, pd.DatetimeTZDtype):
        ns, ok = _datetimes_to_ns(parsed.dt.tz_convert("UTC").dt.tz_localize(None))
        return ParsedTimes(ns, ok, np.zeros(len(values), dtype=bool), f"text as {time_format}")
    ns, ok = _datetimes_to_ns(parsed)
    return ParsedTimes(ns, ok, ok.copy(), f"text as {time_format}")


#: A local date written day and month first or month and day first: 20/03/2021 00:22.
_LOCAL_DATE = (
    r"^\s*(\d{1,2})[/.-](\d{1,2})[/.-](\d{4})(?:[ T]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?\s*$"
)


def _day_or_month_first(values: pd.Series, iso: ParsedTimes) -> ParsedTimes:
    """Return ``iso``, or local d/m/y or m/d/y dates when most rows are written so."""
    parts = values.astype("str").str.extract(_LOCAL_DATE)
    dated = parts[0].notna().to_numpy()
    present = int(values.notna().sum())
    if dated.sum() <= iso.ok.sum() or 2 * dated.sum() <= present:  # not mostly such dates
        return iso
    first = parts[0][dated].astype(int)
    second = parts[1][dated].astype(int)
    day_first, month_first = bool((first > 12).any()), bool((second > 12).any())
    example = str(values[dated].iloc[0]).strip()
    if day_first == month_first:  # both days above 12 (not dates), or none: cannot tell
        raise InputError(f"dates such as {example!r} may be day-first or month-first; give "
                         "their format with --time-format, e.g. '%d/%m/%Y %H:%M'")  # fmt: skip
    order = "day-first" if day_first else "month-first"
    warnings.warn(ComoveNote(f"times such as {example!r} read as local {order} dates "
                             "(the dates tell which); give --time-format to say otherwise"),
                  stacklevel=3)  # fmt: skip
    parsed = pd.to_datetime(values.astype("str").str.strip(), dayfirst=day_first,
                            errors="coerce", format="mixed")  # fmt: skip
    ns, ok = _datetimes_to_ns(parsed)
    return ParsedTimes(ns, ok, ok.copy(), f"local {order} dates")


def _in_zone(parsed: ParsedTimes, time_zone: str) -> ParsedTimes:
    """Return ``parsed`` with its zone-less times read as local times of ``time_zone``."""
    local = pd.Series(np.where(parsed.zone_less, parsed.ns, 0).astype("datetime64[ns]"))
    try:
        utc = local.dt.tz_localize(time_zone, ambiguous="NaT", nonexistent="NaT")
    except Exception:  # pytz/zoneinfo raise several kinds for an unknown zone
        raise bad_setting("time_zone", f"{time_zone!r} is not a time zone; give an IANA "
                          "name such as Europe/Lisbon, or UTC") from None  # fmt: skip
    ns, ok = _datetimes_to_ns(utc.dt.tz_convert("UTC").dt.tz_localize(None))
    # a local time that the clock skipped or passed twice (a change of daylight
    # saving time) has no single UTC time: it is not read
    keep = ~parsed.zone_less | ok
    return ParsedTimes(np.where(parsed.zone_less, ns, parsed.ns), parsed.ok & keep,
                       np.zeros_like(parsed.zone_less), parsed.kind,
                       parsed.out_of_range)  # fmt: skip


# --------------------------------------------------------------------------- texts


def utc_iso(ns: int) -> str:
    """Return nanoseconds since the epoch as ISO 8601 UTC text, e.g. ``2026-03-01T12:00:00.5Z``.

    Whole seconds carry no fraction; fractions carry no trailing zeros.
    """
    stamp = pd.Timestamp(int(ns), unit="ns", tz="UTC")
    text = stamp.strftime("%Y-%m-%dT%H:%M:%S")
    fraction = int(ns) % 1_000_000_000
    if fraction:
        text += f".{fraction:09d}".rstrip("0")
    return text + "Z"


def human_seconds(seconds: float) -> str:
    """Return a short duration text for people, such as ``"2.5 s"`` or ``"3 h"``."""
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.3g} h"
    if seconds < 2 * 365.25 * 86400:
        return f"{seconds / 86400:.3g} days"
    return f"{seconds / (365.25 * 86400):.3g} years"
