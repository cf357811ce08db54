"""The quality report: what was read, dropped and kept, in a form that joins across time windows.

Cleaning (:mod:`comove.tracks.cleaning`) counts; this module turns the counts
into the report, for tracks cleaned at once and for tracks cleaned window by
window (:mod:`comove.tracks.streaming`), with one definition of each figure:
the sampling-interval percentiles come from :func:`percentiles` whether the
gaps are held in memory or tallied window by window (:class:`GapTally`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyproj

from comove.io.times import human_seconds, utc_iso

__all__ = ["GapTally", "format_quality_summary", "percentiles", "quality_report"]

#: Percentiles of the sampling interval in the quality report.
INTERVAL_PERCENTILES = (10, 25, 50, 75, 90)


def percentile_ranks(n: int, q: float) -> tuple[int, int, float]:
    """Return the order statistics (0-based ranks) and weight of the ``q``-th percentile of n.

    The linear rule (numpy's default): the virtual rank ``q / 100 * (n - 1)``
    lies between ranks ``lo`` and ``hi``, weighted ``frac`` towards ``hi``.
    """
    virtual = q / 100.0 * (n - 1)
    lo = int(math.floor(virtual))
    return lo, min(lo + 1, n - 1), virtual - lo


def percentiles(n: int, order_stat, per: float = 1.0) -> dict[str, float | None]:
    """Return the median, 10th and 90th percentiles and IQR of n values, divided by ``per``.

    ``order_stat(rank)`` gives the value of 0-based rank ``rank`` in sorted order.
    One formula for values held in memory and for values tallied window by
    window (:class:`GapTally`), so both give the same numbers.
    """
    if n == 0:
        return {"median": None, "p10": None, "p90": None, "iqr": None}
    q = {}
    for p in INTERVAL_PERCENTILES:
        lo, hi, frac = percentile_ranks(n, p)
        a, b = float(order_stat(lo)), float(order_stat(hi))
        q[p] = (a + (b - a) * frac) / per
    return {"median": q[50], "p10": q[10], "p90": q[90], "iqr": q[75] - q[25]}


def _quantiles(values: np.ndarray, per: float = 1.0) -> dict[str, float | None]:
    """Return :func:`percentiles` of ``values`` (reordered in place: no copy of millions)."""
    ranks = sorted({r for p in INTERVAL_PERCENTILES for r in percentile_ranks(values.size, p)[:2]})
    if values.size:
        values.partition(ranks)
    return percentiles(values.size, lambda r: values[r], per)


_NO_TIME = np.iinfo(np.int64).max


def gap_bins(gaps: np.ndarray) -> np.ndarray:
    """Return the histogram bins of positive int64 gaps: float64 exponent, top 12 mantissa bits.

    Bins are about 0.02 % wide relative to their values.
    """
    return gaps.astype(np.float64).view(np.int64) >> 40


@dataclass
class GapTally:
    """The gaps between consecutive kept fixes of each object, joinable along time.

    A window's tally holds a histogram of its gaps (bins about 0.02 % wide,
    with the least and greatest gap in each bin) and each object's first and
    last kept time, so that joining it to the next window's (:meth:`then`)
    adds the gaps across the edge. Percentiles then need the exact values of
    at most a few bins (:meth:`order_stat`).

    Attributes
    ----------
    key, count, low, high : ndarray of int64
        Occupied bins (sorted), their gap counts, least and greatest gap (ns).
    first, last : ndarray of int64
        Per object code, first and last kept time (``first`` int64 max when none).
    """

    key: np.ndarray
    count: np.ndarray
    low: np.ndarray
    high: np.ndarray
    first: np.ndarray
    last: np.ndarray

    @classmethod
    def of(cls, obj: np.ndarray, t: np.ndarray, n_objects: int) -> GapTally:
        """Return the tally of fixes sorted by (object, time)."""
        same = obj[1:] == obj[:-1]
        tally = cls._histogram(np.diff(t)[same])
        first = np.full(n_objects, _NO_TIME, dtype=np.int64)
        last = np.full(n_objects, -_NO_TIME, dtype=np.int64)
        if obj.size:
            starts = np.flatnonzero(np.r_[True, ~same])
            ends = np.r_[starts[1:], obj.size] - 1
            first[obj[starts]], last[obj[starts]] = t[starts], t[ends]
        return cls(*tally, first, last)

    @staticmethod
    def _histogram(gaps: np.ndarray) -> tuple[np.ndarray, ...]:
        if gaps.size == 0:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty, empty, empty
        keys = gap_bins(gaps)
        base = int(keys.min())
        at = keys - base  # a few thousand bins per octave of gaps: counted densely
        count = np.bincount(at)
        used = np.flatnonzero(count)
        low = np.full(count.size, np.iinfo(np.int64).max, dtype=np.int64)
        high = np.full(count.size, np.iinfo(np.int64).min, dtype=np.int64)
        np.minimum.at(low, at, gaps)
        np.maximum.at(high, at, gaps)
        return used + base, count[used].astype(np.int64), low[used], high[used]

    @property
    def n(self) -> int:
        """Return the number of gaps."""
        return int(self.count.sum())

    def then(self, later: GapTally) -> GapTally:
        """Return the tally of this window and the ``later`` one that follows it in time."""
        both = (self.first != _NO_TIME) & (later.first != _NO_TIME)
        cross = GapTally._histogram(later.first[both] - self.last[both])
        key = np.concatenate([self.key, later.key, cross[0]])
        order = np.argsort(key, kind="stable")
        key = key[order]
        starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]]) if key.size else order[:0]

        def merged(parts: list[np.ndarray], reduce) -> np.ndarray:
            values = np.concatenate(parts)[order]
            return reduce.reduceat(values, starts) if values.size else values

        return GapTally(
            key[starts],
            merged([self.count, later.count, cross[1]], np.add),
            merged([self.low, later.low, cross[2]], np.minimum),
            merged([self.high, later.high, cross[3]], np.maximum),
            np.where(self.first != _NO_TIME, self.first, later.first),
            np.where(later.first != _NO_TIME, later.last, self.last),
        )

    def bins_needed(self, ranks: list[int]) -> np.ndarray:
        """Return the bins whose values are needed for the gaps of ``ranks`` (unequal extremes)."""
        ends = np.cumsum(self.count)
        where = np.searchsorted(ends, np.asarray(ranks, dtype=np.int64), side="right")
        return np.unique(self.key[where[self.low[where] != self.high[where]]])

    def order_stat(self, rank: int, values: dict[int, np.ndarray] | None = None) -> int:
        """Return the gap of ``rank``; ``values`` holds the sorted gaps of bins that need them."""
        ends = np.cumsum(self.count)
        b = int(np.searchsorted(ends, rank, side="right"))
        if self.low[b] == self.high[b]:
            return int(self.low[b])
        if values is None or int(self.key[b]) not in values:
            raise KeyError(f"the gaps of bin {int(self.key[b])} are needed")
        return int(values[int(self.key[b])][rank - (ends[b] - self.count[b])])


def gaps_in_bins(obj: np.ndarray, t: np.ndarray, bins: np.ndarray) -> np.ndarray:
    """Return the gaps of fixes sorted by (object, time) that fall in the histogram ``bins``."""
    gaps = np.diff(t)[obj[1:] == obj[:-1]]
    return gaps[np.isin(gap_bins(gaps), bins)]


def quality_report(
    *,
    rows_read: int,
    dropped: dict[str, int],
    examples: dict[str, list[dict]],
    objects: np.ndarray,
    roles: np.ndarray,
    span: tuple[int, int],
    interval: dict[str, float | None],
    zone_less: int,
    time_input: str,
    coords: str,
    crs: tuple[str | None, pyproj.CRS | None],
    max_speed: float | None,
    passes: int,
    sources: list[str],
) -> dict:
    """Return the quality report (see :func:`clean_fixes`) from what cleaning counted.

    One report for tracks cleaned at once and for tracks cleaned window by
    window (:mod:`comove.tracks.streaming`), which count the same things.
    """
    t0, t1 = span
    input_crs, metric_crs = crs
    return {
        "rows_read": int(rows_read),
        "rows_kept": int(rows_read - sum(dropped.values())),
        "dropped": dropped,
        "merged": {"exact_duplicate": dropped["exact_duplicate"]},
        "examples": examples,
        "objects": int(len(objects)),
        "roles": int(len(roles)),
        "role_names": [str(r) for r in roles],
        "time_start": utc_iso(t0),
        "time_end": utc_iso(t1),
        "time_span_s": (t1 - t0) / 1e9,
        "sampling_interval_s": interval,
        "zone_less_times": zone_less,
        "time_note": (
            f"{zone_less} kept {'row' if zone_less == 1 else 'rows'} had times without a "
            "time zone; they were read as UTC."
            if zone_less
            else None
        ),
        "time_input": time_input,
        "coordinates": {
            "input": coords,
            "input_crs": input_crs,
            "working_crs": metric_crs.to_string() if metric_crs is not None else "planar metres",
        },
        "max_speed_m_s": max_speed,
        "speed_spike_passes": passes,
        "sources": [str(s) for s in sources],
    }


def format_quality_summary(quality: dict) -> str:
    """Summarise a quality report from :func:`clean_fixes` in a few lines for people.

    Parameters
    ----------
    quality : dict
        The report returned by :func:`clean_fixes`.

    Returns
    -------
    str
        Lines on rows read and kept, rows dropped by reason (only reasons that occurred),
        objects, roles, time span, sampling interval and any time-zone note, without a
        trailing newline.
    """
    read, kept = quality["rows_read"], quality["rows_kept"]
    lines = [f"rows: {read:,} read, {kept:,} kept, {read - kept:,} dropped"]
    dropped = {k: v for k, v in quality["dropped"].items() if v > 0}
    if dropped:
        parts = []
        for name, count in dropped.items():
            label = name.replace("_", " ")
            if name == "exact_duplicate":
                label += " (merged)"
            parts.append(f"{label} {count:,}")
        lines.append("dropped: " + ", ".join(parts))
    names = quality.get("role_names") or []
    if names in ([], [""]):  # read without a role column
        lines.append(f"objects: {quality['objects']:,}; no role column: every object has one role")
    else:
        shown = ", ".join(repr(r) if r == "" else r for r in names[:8])
        if len(names) > 8:
            shown += ", …"
        lines.append(f"objects: {quality['objects']:,}; roles: {quality['roles']:,} ({shown})")
    lines.append(
        f"time: {quality['time_start']} to {quality['time_end']} "
        f"({human_seconds(quality['time_span_s'])})"
    )
    interval = quality["sampling_interval_s"]
    if interval["median"] is None:
        lines.append("sampling interval: no object has two fixes")
    else:
        lines.append(
            f"sampling interval: median {human_seconds(interval['median'])} "
            f"(10-90 %: {human_seconds(interval['p10'])} to {human_seconds(interval['p90'])}, "
            f"IQR {human_seconds(interval['iqr'])})"
        )
    if quality.get("time_note"):
        lines.append("note: " + quality["time_note"])
    return "\n".join(lines)
