"""Put every track on one common time grid: the aligned snapshots.

The grid is the multiples of ``step`` seconds since the Unix epoch, so two runs
with the same step share snapshots whatever their start. Positions between two
consecutive fixes of an object are linearly interpolated, never across a gap
longer than ``max_gap`` and never beyond a track's first or last fix. An object
is *present* at a snapshot when it has an aligned position there; its role at a
snapshot is the role of its latest fix at or before that snapshot.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj

from comove.errors import ComoveNote, InputError
from comove.io.times import human_seconds, utc_iso
from comove.tracks.quality import _quantiles

if TYPE_CHECKING:
    from comove.tracks.cleaning import Fixes

NS_PER_S = 1_000_000_000

#: Default ``max_gap`` as a multiple of the step: bridging one or two missed
#: fixes is harmless for smooth movement; longer holes are treated as absence.
DEFAULT_GAP_STEPS = 3

#: Round step values (seconds) the default step is chosen from. 0.04 s is in the
#: list because 25 Hz is the usual rate of optical player tracking.
ROUND_STEPS_S = (
    0.001, 0.002, 0.005, 0.01, 0.02, 0.04, 0.05, 0.1, 0.2, 0.25, 0.5,
    1.0, 2.0, 5.0, 10.0, 15.0, 20.0, 30.0, 60.0, 120.0, 300.0, 600.0, 900.0,
    1800.0, 3600.0, 7200.0, 10800.0, 21600.0, 43200.0, 86400.0,
)  # fmt: skip


def _positive_or_none(value: float | None, name: str) -> None:
    if value is not None and not (np.isfinite(value) and value > 0):
        raise InputError(f"--{name.replace('_', '-')} must be a positive number of seconds")


@dataclass(frozen=True)
class AlignParams:
    """Settings of the alignment stage.

    Parameters
    ----------
    step : float or None, default None
        Snapshot spacing in seconds. ``None`` picks the round value nearest (on a
        log scale) to the median sampling interval, see :func:`default_step`.
    max_gap : float or None, default None
        Longest interval between two fixes, in seconds, that is bridged by
        interpolation. ``None`` means ``DEFAULT_GAP_STEPS`` times the step.
    """

    step: float | None = field(
        default=None,
        metadata={
            "help": "snapshot spacing in seconds (default: a round value near the "
            "median sampling interval)"
        },
    )
    max_gap: float | None = field(
        default=None,
        metadata={
            "help": f"longest gap between fixes bridged by interpolation, seconds "
            f"(default: {DEFAULT_GAP_STEPS} x step)"
        },
    )

    def __post_init__(self) -> None:
        _positive_or_none(self.step, "step")
        _positive_or_none(self.max_gap, "max_gap")


@dataclass
class Snapshots:
    """Aligned positions of every present object at every snapshot.

    One *entry* per (snapshot, present object), sorted by snapshot then object.
    Entry indices are the node ids of the per-snapshot neighbour graphs.

    Attributes
    ----------
    step_ns : int
        Snapshot spacing in nanoseconds.
    first_index : int
        Grid index (time // step) of snapshot 0.
    n_snapshots : int
        Number of grid snapshots from the first to the last with an entry.
    snap : ndarray of int64
        Snapshot index of each entry (0 .. n_snapshots-1), non-decreasing.
    obj, role : ndarray of int32
        Object and role code of each entry.
    x, y : ndarray of float64
        Position of each entry in metres in the working plane.
    objects, roles : ndarray of str
        Names behind the object and role codes.
    max_gap_ns : int
        Gap bridged by interpolation, in nanoseconds.
    metric_crs, input_crs
        Passed on from :class:`comove.tracks.cleaning.Fixes`.
    """

    step_ns: int
    first_index: int
    n_snapshots: int
    snap: np.ndarray
    obj: np.ndarray
    role: np.ndarray
    x: np.ndarray
    y: np.ndarray
    objects: np.ndarray
    roles: np.ndarray
    max_gap_ns: int
    metric_crs: pyproj.CRS | None = None
    input_crs: str | None = None

    @property
    def n_entries(self) -> int:
        """Return the number of (snapshot, present object) entries."""
        return int(self.snap.size)

    @property
    def step_s(self) -> float:
        """Return the snapshot spacing in seconds."""
        return self.step_ns / NS_PER_S

    def times(self, snapshot: np.ndarray | None = None) -> np.ndarray:
        """Return snapshot times as int64 nanoseconds since the epoch (UTC).

        Parameters
        ----------
        snapshot : ndarray of int, optional
            Snapshot indices; all snapshots when omitted.
        """
        if snapshot is None:
            snapshot = np.arange(self.n_snapshots, dtype=np.int64)
        return (np.asarray(snapshot, dtype=np.int64) + self.first_index) * self.step_ns

    def main_roles(self) -> np.ndarray:
        """Return each object's most frequent role code (ties: lowest code)."""
        return most_frequent_roles(*self.role_counts(), len(self.objects), self.n_roles)

    @property
    def n_roles(self) -> int:
        """Return the size of the role code space (the role table, at least one)."""
        return max(len(self.roles), int(self.role.max()) + 1 if self.n_entries else 1)

    def role_counts(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the ``object * n_roles + role`` codes that occur, sorted, and their entries.

        Counted in a dense table when objects x roles fit ``DENSE_ROLE_CELLS``
        (a bincount, O(n)); otherwise by sorting the codes (O(n log n)).
        """
        codes = self.obj.astype(np.int64) * self.n_roles + self.role
        cells = len(self.objects) * self.n_roles
        if cells <= DENSE_ROLE_CELLS:
            counts = np.bincount(codes, minlength=cells)
            key = np.flatnonzero(counts)
            return key, counts[key]
        key, count = np.unique(codes, return_counts=True)
        return key, count.astype(np.int64)

    def offsets(self) -> np.ndarray:
        """Return CSR offsets: entries of snapshot ``s`` are ``offsets[s]:offsets[s+1]``.

        Computed once per ``snap`` array and returned read-only.
        """
        return self._derived(
            "offsets",
            (self.snap, self.n_snapshots),
            lambda: np.searchsorted(self.snap, np.arange(self.n_snapshots + 1), side="left"),
        )

    def object_order(self) -> np.ndarray:
        """Return the entries in (object, snapshot) order: each object's track is one run.

        A stable sort of the object codes, so snapshot order is kept within each
        object; with fewer than 2**15 objects the codes are sorted as 16-bit
        integers, which numpy does as a radix sort (O(n)). Computed once per
        ``obj`` array and returned read-only.
        """

        def order() -> np.ndarray:
            codes = self.obj.astype(np.int16) if len(self.objects) < 2**15 else self.obj
            return np.argsort(codes, kind="stable")

        return self._derived("object_order", (self.obj,), order)

    def object_bounds(self) -> np.ndarray:
        """Return where each object's run starts in :meth:`object_order` (n_objects + 1 values).

        Object o's entries are ``object_order()[bounds[o]:bounds[o + 1]]``.
        Computed once per ``obj`` array and returned read-only.
        """
        return self._derived(
            "object_bounds",
            (self.obj,),
            lambda: np.concatenate(
                [[0], np.cumsum(np.bincount(self.obj, minlength=len(self.objects)))]
            ),
        )

    def window(self, start: int, stop: int) -> Snapshots:
        """Return the snapshots ``start`` to ``stop - 1`` as a chunk of their own.

        The chunk keeps the object and role codes and names, so results of
        chunks of one run can be combined; its snapshot 0 is this run's
        snapshot ``start`` (``first_index`` moves with it). The entry arrays
        are views, not copies.
        """
        start, stop = max(int(start), 0), min(int(stop), self.n_snapshots)
        lo, hi = self.offsets()[[start, max(stop, start)]]
        return replace(
            self,
            first_index=self.first_index + start,
            n_snapshots=max(stop - start, 0),
            snap=self.snap[lo:hi] - start,
            obj=self.obj[lo:hi],
            role=self.role[lo:hi],
            x=self.x[lo:hi],
            y=self.y[lo:hi],
        )

    def subset(self, keep: np.ndarray) -> Snapshots:
        """Return only the entries where ``keep`` is true, on the same snapshot grid.

        Object and role codes and names are kept, so results on subsets of one
        run read alike (the periods and areas of :mod:`comove.tracks.zones`).
        """
        keep = np.asarray(keep, dtype=bool)
        return replace(self, snap=self.snap[keep], obj=self.obj[keep], role=self.role[keep],
                       x=self.x[keep], y=self.y[keep])  # fmt: skip

    def thinned(self, every: int) -> Snapshots:
        """Return every ``every``-th snapshot (0, every, 2 every, ...) as snapshots of their own.

        The step grows ``every`` times; snapshot ``s`` of the result is this run's
        snapshot ``s * every``. For statistics that compare snapshots among
        themselves (the Monte Carlo tests); the grid index of the first
        snapshot is rounded down, so the absolute times of the result are not
        meant to be read.
        """
        every = int(every)
        if every <= 1:
            return self
        keep = self.snap % every == 0
        return replace(
            self,
            step_ns=self.step_ns * every,
            first_index=self.first_index // every,
            n_snapshots=(self.n_snapshots - 1) // every + 1 if self.n_snapshots else 0,
            snap=self.snap[keep] // every,
            obj=self.obj[keep],
            role=self.role[keep],
            x=self.x[keep],
            y=self.y[keep],
        )

    def _derived(self, name: str, inputs: tuple, compute: Callable[[], np.ndarray]) -> np.ndarray:
        """Return ``compute()``, kept while the attributes it derives from are the same objects.

        Several stages ask for the same orders; the inputs are compared by
        identity, so an attribute given a new array is never answered from the old.
        """
        held = self.__dict__.get("_cache_" + name)
        if held is not None and all(a is b for a, b in zip(held[0], inputs, strict=True)):
            return held[1]
        value = compute()
        value.flags.writeable = False
        self.__dict__["_cache_" + name] = (inputs, value)
        return value


#: Objects x roles up to which role entries are counted in a dense table (400 MB of int64).
DENSE_ROLE_CELLS = 50_000_000


def most_frequent_roles(
    key: np.ndarray, count: np.ndarray, n_objects: int, n_roles: int
) -> np.ndarray:
    """Return each object's most frequent role code (ties: lowest code; 0 when never seen).

    ``key`` lists distinct ``object * n_roles + role`` codes and ``count`` how
    many entries hold each.
    """
    key, count = np.asarray(key, dtype=np.int64), np.asarray(count)
    order = np.lexsort((key % n_roles, -count, key // n_roles))
    obj = key[order] // n_roles
    best = order[np.r_[True, obj[1:] != obj[:-1]]] if order.size else order
    roles = np.zeros(n_objects, dtype=np.int64)
    roles[key[best] // n_roles] = key[best] % n_roles
    return roles


def longest_runs(
    set_id: np.ndarray, snap: np.ndarray, n_sets: int
) -> tuple[np.ndarray, np.ndarray]:
    """Return the longest run length and its first snapshot per set.

    ``set_id``/``snap`` list the snapshots at which each set (a role set, a
    pair of objects) holds, sorted by set then snapshot; a run is a stretch
    of consecutive snapshots.
    """
    longest = np.zeros(n_sets, dtype=np.int64)
    start = np.full(n_sets, -1, dtype=np.int64)
    if set_id.size == 0:
        return longest, start
    brk = np.ones(set_id.size, dtype=bool)
    brk[1:] = (set_id[1:] != set_id[:-1]) | (snap[1:] != snap[:-1] + 1)
    run_first = np.flatnonzero(brk)
    run_len = np.diff(np.append(run_first, set_id.size))
    run_set = set_id[run_first]
    # longest per set; ties go to the earliest run
    order = np.lexsort((run_first, -run_len, run_set))
    best = order[np.r_[True, run_set[order][1:] != run_set[order][:-1]]]
    longest[run_set[best]] = run_len[best]
    start[run_set[best]] = snap[run_first[best]]
    return longest, start


def default_step(fixes: Fixes) -> float:
    """Return a round snapshot step (seconds) near the median sampling interval.

    Parameters
    ----------
    fixes : Fixes
        Cleaned fixes, sorted by object then time.

    Returns
    -------
    float
        The value of ``ROUND_STEPS_S`` nearest on a log scale to the median
        interval between consecutive fixes of the same object.
    """
    return _step_near(_median_interval(fixes))


def _median_interval(fixes: Fixes) -> float | None:
    """Return the median interval (s) between consecutive fixes of an object (None: none)."""
    same = fixes.obj[1:] == fixes.obj[:-1]
    dt = np.diff(fixes.time)[same]
    dt = dt[dt > 0]
    return _quantiles(dt, NS_PER_S)["median"] if dt.size else None


def _step_near(median_s: float | None) -> float:
    """Return :func:`round_step` of a median interval, refusing when there is none."""
    if median_s is None:
        raise InputError(
            "cannot choose a time step: no object has two fixes at different times; give --step"
        )
    return round_step(float(median_s))


def round_step(median_s: float) -> float:
    """Return the value of ``ROUND_STEPS_S`` nearest on a log scale to ``median_s`` seconds."""
    steps = np.asarray(ROUND_STEPS_S)
    return float(steps[np.argmin(np.abs(np.log(steps) - np.log(median_s)))])


def grid_ns(params: AlignParams, median_s: Callable[[], float | None]) -> tuple[int, int]:
    """Return the step and the bridged gap in ns, their defaults resolved.

    Parameters
    ----------
    params : AlignParams
        The settings.
    median_s : callable
        Returns the median sampling interval (s), or None when no object has
        two fixes; called only when ``params.step`` is not given. The run in one
        piece reads it from its fixes, a run over windows from its gap tally.
    """
    step_s = params.step if params.step is not None else _step_near(median_s())
    step_ns = int(round(step_s * NS_PER_S))
    if step_ns <= 0:
        raise InputError("--step is below one nanosecond; give a larger --step")
    max_gap_s = params.max_gap if params.max_gap is not None else DEFAULT_GAP_STEPS * step_s
    return step_ns, int(round(max_gap_s * NS_PER_S))


#: Bytes a run holds per snapshot of its grid, besides one per role: the snapshot
#: offsets, the group timeline's hashes and spans, role presence (an estimate from the
#: arrays allocated per snapshot, rounded up).
BYTES_PER_SNAPSHOT = 64

#: Snapshots per fix above which the grid gets a note: nearly all of it empty, from a
#: step far below the sampling interval or a stray time stamp far from the rest.
SPARSE_GRID = 1000

#: A gap between consecutive fix times longer than this share of the whole period marks
#: the fixes on its smaller side as outlying (stray timestamps).
OUTLYING_GAP_SHARE = 0.5


def available_memory() -> int:
    """Return the bytes of memory available to this process (8 GiB when it cannot be read)."""
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return 8 * 2**30


def check_grid(
    first_ns: int,
    last_ns: int,
    step_ns: int,
    n_roles: int,
    times_ns: np.ndarray,
    budget: int | None = None,
    n_fixes: int | None = None,
    owners: Any = None,
) -> int:
    """Return the number of snapshots of the grid, refusing one too large for memory.

    Parameters
    ----------
    first_ns, last_ns : int
        The first and last fix time of the run.
    step_ns : int
        The step.
    n_roles : int
        Number of roles (role presence is kept per role and snapshot).
    times_ns : ndarray of int64
        Fix times to explain a refusal with (all of them, or each object's first
        and last): a few fixes far from the rest, such as a stray timestamp at
        the epoch or a century away, are named.
    budget : int, optional
        Bytes the grid may take (default: the available memory).
    n_fixes : int, optional
        Number of fixes (default: the size of ``times_ns``). A grid of more than
        ``SPARSE_GRID`` snapshots per fix gets a note (:class:`ComoveNote`).
    owners : indexable, optional
        The object id of each of ``times_ns`` (``owners[i]``), to name with an
        outlying fix.

    Raises
    ------
    InputError
        When the grid's per-snapshot arrays alone would take more than the budget.
    """
    n_snap = (int(last_ns) - int(first_ns)) // int(step_ns) + 1
    need = n_snap * (BYTES_PER_SNAPSHOT + int(n_roles))
    budget = available_memory() if budget is None else int(budget)
    span = (
        f"{human_seconds((int(last_ns) - int(first_ns)) / NS_PER_S)} at a step of "
        f"{human_seconds(step_ns / NS_PER_S)}"
    )
    if need > budget:
        advice = outlying_times(times_ns, owners=owners)
        raise InputError(
            f"the time grid would hold {n_snap:,} snapshots ({span}), about {_gib(need)} for "
            f"them alone, more than the {_gib(budget)} of memory available; "
            f"{advice + ', or give' if advice else 'give'} a larger --step"
        )
    n_fixes = int(times_ns.size) if n_fixes is None else int(n_fixes)
    if n_snap > SPARSE_GRID * max(n_fixes, 1):
        advice = outlying_times(times_ns, owners=owners)
        warnings.warn(
            ComoveNote(
                f"the time grid holds {n_snap:,} snapshots for {n_fixes:,} fixes ({span}); "
                f"{advice + ', or give' if advice else 'give'} a larger --step if that "
                "is not meant"
            ),
            stacklevel=2,
        )
    return n_snap


def _gib(n_bytes: int) -> str:
    return f"{n_bytes / 2**30:.3g} GiB" if n_bytes >= 2**30 else f"{n_bytes / 2**20:.3g} MiB"


def outlying_times(
    times_ns: np.ndarray, counts: np.ndarray | None = None, owners: Any = None
) -> str:
    """Return advice naming fixes far from the rest in time, or "" when there are none.

    Outlying: on the smaller side of a gap between consecutive times that is
    longer than ``OUTLYING_GAP_SHARE`` of the whole period. ``counts`` gives
    how many fixes each time stands for (default one each); ``owners``, the
    object id of each time, names the object of the first outlying fix.
    """
    times_ns = np.asarray(times_ns, dtype=np.int64)
    order = np.argsort(times_ns, kind="stable")
    t = times_ns[order]
    weight = np.ones(t.size, np.int64) if counts is None else np.asarray(counts)[order]
    if t.size < 2 or t[-1] == t[0]:
        return ""
    gaps = np.diff(t)
    g = int(np.argmax(gaps))
    if gaps[g] <= OUTLYING_GAP_SHARE * (t[-1] - t[0]):
        return ""
    before, after = int(weight[: g + 1].sum()), int(weight[g + 1 :].sum())
    gap = human_seconds(int(gaps[g]) / NS_PER_S)
    if before <= after:
        lone, at, other = before, 0, f"from {utc_iso(int(t[g + 1]))}"
        side = "before"
    else:
        lone, at, other = after, g + 1, f"up to {utc_iso(int(t[g]))}"
        side = "after"
    first = utc_iso(int(t[at]))
    if owners is not None:
        first += f" (object {str(owners[int(order[at])])!r})"
    rows = f"1 fix at {first} lies" if lone == 1 else f"{lone:,} fixes from {first} lie"
    return (
        f"{rows} {gap} {side} the other {max(before, after):,} ({other}): correct or "
        "remove those rows"
    )


class _Owners:
    """The object id of each fix, looked up only where asked (``owners[i]``)."""

    def __init__(self, fixes: Fixes) -> None:
        self.obj, self.objects = fixes.obj, fixes.objects

    def __getitem__(self, index: object) -> object:
        return self.objects[self.obj[index]]


def no_grid_point(step_ns: int) -> InputError:
    """Return the error for fixes of which none falls on or spans a grid point."""
    return InputError(
        f"no fix falls on or spans a grid point of step {step_ns / NS_PER_S:g} s; "
        "give a smaller --step or a larger --max-gap"
    )


def align(fixes: Fixes, params: AlignParams | None = None) -> Snapshots:
    """Return the tracks interpolated onto the common snapshot grid.

    Parameters
    ----------
    fixes : Fixes
        Cleaned fixes sorted by object then strictly increasing time.
    params : AlignParams, optional
        Step and maximum bridged gap.

    Returns
    -------
    Snapshots
        One entry per (snapshot, present object).

    Notes
    -----
    Fully vectorised: each fix owns the grid points in the half-open interval up
    to the next fix of the same object when that interval is bridged (no longer
    than ``max_gap``), otherwise only a grid point exactly at its own time. Grid
    points are generated with one ``numpy.repeat`` over all fixes, so time and
    memory are O(n_fixes + n_entries). The interpolation equals ``numpy.interp``
    on each track with gaps masked.

    Examples
    --------
    Fixes 2 s apart on a 1 s grid: the snapshot between them is interpolated.

    >>> import pandas as pd
    >>> from comove.tracks.cleaning import clean_fixes
    >>> from comove.io.reading import read_tracks
    >>> frame = pd.DataFrame({"id": "a", "time": [10, 12], "x": [0.0, 4.0], "y": 0.0,
    ...                       "role": "r"})
    >>> snaps = align(clean_fixes(read_tracks(frame))[0], AlignParams(step=1.0))
    >>> snaps.first_index, snaps.snap.tolist(), snaps.x.tolist()
    (10, [0, 1, 2], [0.0, 2.0, 4.0])
    """
    step_ns, max_gap_ns = grid_ns(params or AlignParams(), lambda: _median_interval(fixes))
    if fixes.time.size:
        check_grid(int(fixes.time.min()), int(fixes.time.max()), step_ns, len(fixes.roles),
                   fixes.time, owners=_Owners(fixes))  # fmt: skip
    first, count, on_grid, t_next = _owned_grid_points(fixes, step_ns, max_gap_ns)
    total = int(count.sum())
    if total == 0:
        raise no_grid_point(step_ns)
    if total == fixes.time.size and on_grid.all() and (count == 1).all():
        # every fix sits on its own grid point (regular sampling at the step, the usual
        # case for 10-25 Hz tracking): nothing to interpolate
        entries = (first, fixes.x, fixes.y, fixes.obj, fixes.role)
    else:
        entries = _interpolate(fixes, first, count, t_next, step_ns)
    return _in_snapshot_order(fixes, entries, step_ns, max_gap_ns)


def _owned_grid_points(
    fixes: Fixes, step_ns: int, max_gap_ns: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return the grid points each fix owns, as a first grid index and a count.

    Also returns whether each fix lies on a grid point, and the time it is interpolated
    towards: the next fix's when the gap to it is bridged, else its own.
    """
    t = fixes.time
    n = t.size
    bridged = np.zeros(n, dtype=bool)
    if n > 1:
        bridged[:-1] = (fixes.obj[1:] == fixes.obj[:-1]) & (np.diff(t) <= max_gap_ns)
    t_next = np.where(bridged, np.roll(t, -1), t)

    # one integer division (slow in numpy): first grid index at or after each fix
    below = t // step_ns
    on_grid = t == below * step_ns
    first = below + ~on_grid
    # bridged: grid points g with t <= g*step < t_next, where t_next is the next fix and
    # its first grid index the next entry of ``first``; otherwise only g*step == t
    last = np.where(bridged, np.roll(first, -1) - 1, first - ~on_grid)
    count = np.maximum(last - first + 1, 0)
    return first, count, on_grid, t_next


def _interpolate(
    fixes: Fixes, first: np.ndarray, count: np.ndarray, t_next: np.ndarray, step_ns: int
) -> tuple[np.ndarray, ...]:
    """Return grid index, x, y, object and role of every grid point the fixes own."""
    t = fixes.time
    n = t.size
    owner = np.repeat(np.arange(n), count)
    start = np.cumsum(count) - count
    grid = first[owner] + (np.arange(owner.size) - start[owner])
    x0, y0 = fixes.x[owner], fixes.y[owner]
    nxt = np.minimum(owner + 1, n - 1)
    span = (t_next - t)[owner]
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(span > 0, (grid * step_ns - t[owner]) / np.where(span > 0, span, 1), 0.0)
    x = x0 + w * (fixes.x[nxt] - x0)
    y = y0 + w * (fixes.y[nxt] - y0)
    return grid, x, y, fixes.obj[owner], fixes.role[owner]


def align_window(fixes: Fixes, step_ns: int, max_gap_ns: int, span: tuple[int, int]) -> Snapshots:
    """Return the snapshots at grid indices ``span[0] <= g < span[1]`` of some fixes.

    Parameters
    ----------
    fixes : Fixes
        Cleaned fixes of a time window with margins of ``max_gap`` on each
        side, sorted by object then time.
    step_ns, max_gap_ns : int
        The whole run's step and bridged gap.
    span : (int, int)
        Grid indices of the window's first snapshot and one past its last.

    Returns
    -------
    Snapshots
        With ``first_index = span[0]`` and ``span[1] - span[0]`` snapshots
        (some may be empty): equal to the same window of the whole run's
        snapshots (:meth:`Snapshots.window`).

    Notes
    -----
    A grid point is owned by the last fix at or before it, when the next fix
    is at most ``max_gap`` later; both lie within ``max_gap`` of the window,
    so margins of ``max_gap`` give each grid point its owner and its
    interpolation partner exactly, and the positions equal the whole run's.
    """
    g0, g1 = int(span[0]), int(span[1])
    first, count, _, t_next = _owned_grid_points(fixes, step_ns, max_gap_ns)
    lo = np.maximum(first, g0)
    count = np.maximum(np.minimum(first + count, g1) - lo, 0)
    entries = _interpolate(fixes, lo, count, t_next, step_ns)
    return _in_snapshot_order(fixes, entries, step_ns, max_gap_ns, span=(g0, g1))


def _in_snapshot_order(
    fixes: Fixes,
    entries: tuple[np.ndarray, ...],
    step_ns: int,
    max_gap_ns: int,
    span: tuple[int, int] | None = None,
) -> Snapshots:
    """Return the entries (grid index, x, y, object, role), grouped by object, as snapshots.

    The snapshots run from the first entry to the last, or over ``span`` when given.
    """
    grid, x, y, obj, role = entries
    first_index = int(grid.min()) if span is None else span[0]
    snap = grid - first_index
    # entries come grouped by object with increasing snapshots: a stable sort by
    # snapshot only merges those runs, giving (snapshot, object) order cheaply
    order = np.argsort(snap, kind="stable")
    return Snapshots(
        step_ns=step_ns,
        first_index=first_index,
        n_snapshots=int(snap.max()) + 1 if span is None else span[1] - span[0],
        snap=snap[order].astype(np.int64, copy=False),
        obj=obj[order].astype(np.int32, copy=False),
        role=role[order].astype(np.int32, copy=False),
        x=x[order],
        y=y[order],
        objects=fixes.objects,
        roles=fixes.roles,
        max_gap_ns=max_gap_ns,
        metric_crs=fixes.metric_crs,
        input_crs=fixes.input_crs,
    )


def alignment_summary(snaps: Snapshots) -> dict:
    """Return plain-typed facts about the alignment for the quality report."""
    per_obj = np.bincount(snaps.obj, minlength=len(snaps.objects))
    return {
        "step_s": snaps.step_s,
        "max_gap_s": snaps.max_gap_ns / NS_PER_S,
        "snapshots": snaps.n_snapshots,
        "entries": snaps.n_entries,
        "mean_objects_per_snapshot": float(snaps.n_entries / max(snaps.n_snapshots, 1)),
        "objects_never_present": int((per_obj == 0).sum()),
    }


#: Most positions kept in a results folder's track sample (for drawing only).
SAMPLE_POSITIONS = 200_000


def sample_every(
    first_ns: np.ndarray, last_ns: np.ndarray, step_ns: int, limit: int = SAMPLE_POSITIONS
) -> int:
    """Return the stride of the track sample: every k-th grid index brings it under ``limit``.

    ``first_ns`` and ``last_ns`` are each object's first and last kept fix
    (objects without one are skipped); an object has at most one entry per
    grid point between them, so k is the smallest whole number with
    (grid points within the objects' spans) / k <= limit. It depends on the
    cleaned fixes only, so a run over time windows knows it before aligning.
    """
    has = first_ns <= last_ns
    first = -(-first_ns[has] // step_ns)
    last = last_ns[has] // step_ns
    bound = int(np.maximum(last - first + 1, 0).sum())
    return max(1, -(-bound // max(limit, 1)))


def fix_extents(fixes: Fixes) -> tuple[np.ndarray, np.ndarray]:
    """Return each object's first and last fix time (fixes sorted by object, then time)."""
    n = len(fixes.objects)
    first = np.full(n, np.iinfo(np.int64).max, dtype=np.int64)
    last = np.full(n, np.iinfo(np.int64).min, dtype=np.int64)
    if fixes.obj.size:
        starts = np.flatnonzero(np.r_[True, fixes.obj[1:] != fixes.obj[:-1]])
        ends = np.r_[starts[1:], fixes.obj.size] - 1
        first[fixes.obj[starts]], last[fixes.obj[starts]] = fixes.time[starts], fixes.time[ends]
    return first, last


def track_sample(snaps: Snapshots, to_input=None, every: int = 1):
    """Return an evenly thinned sample of the aligned positions, for drawing maps.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots (a whole run, or one window of it).
    to_input : callable, optional
        ``to_input(x, y) -> (x, y)`` taking working-plane metres to the input's
        CRS (lon/lat for lon/lat input); identity when omitted.
    every : int, default 1
        Keep the snapshots whose grid index (time // step) is a multiple of
        ``every`` (:func:`sample_every`), so windows of a run give parts of the
        same sample.

    Returns
    -------
    DataFrame
        ``object``, ``role``, ``time`` (UTC), ``x``, ``y``; ``attrs["every"]``
        holds the stride. Only drawing uses it; every computation uses all snapshots.
    """
    import pandas as pd

    every = max(1, int(every))
    keep = (snaps.snap + snaps.first_index) % every == 0
    x, y = snaps.x[keep], snaps.y[keep]
    if to_input is not None:
        x, y = to_input(x, y)
    frame = pd.DataFrame({
        "object": pd.Categorical.from_codes(snaps.obj[keep], categories=snaps.objects),
        "role": pd.Categorical.from_codes(snaps.role[keep], categories=snaps.roles),
        "time": pd.to_datetime(snaps.times(snaps.snap[keep]), utc=True),
        "x": x, "y": y,
    })  # fmt: skip
    frame.attrs["every"] = every
    return frame
