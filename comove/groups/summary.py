"""Episode summaries: one row per episode, its centroid path, and roll-ups by role set.

Everything here reads the episodes found by :func:`comove.groups.episodes.find_episodes`
and the snapshots they were found in; nothing feeds back into the search.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from comove.groups.episodes import MEMBER_SEP, Episodes
from comove.io.projection import working_to_input
from comove.tracks.alignment import Snapshots
from comove.tracks.motion import Motion
from comove.tracks.neighbours import worker_count


class _EntryLookup:
    """Entry index of (snapshot, object) pairs, -1 where the object is absent."""

    #: Cells of the dense (snapshot x object) table used when it fits (int32: 200 MB).
    MAX_DENSE = 50_000_000

    def __init__(self, snaps: Snapshots) -> None:
        self.n_obj = len(snaps.objects)
        if snaps.n_snapshots * self.n_obj <= self.MAX_DENSE:
            self.dense = np.full((snaps.n_snapshots, self.n_obj), -1, dtype=np.int32)
            self.dense[snaps.snap, snaps.obj] = np.arange(snaps.n_entries, dtype=np.int32)
        else:
            self.dense = None
            # sorted, since entries are in (snapshot, object) order
            self.keys = snaps.snap * self.n_obj + snaps.obj

    def entries(self, snapshots: np.ndarray, objects: np.ndarray) -> np.ndarray:
        """Return the entry index of each (object, snapshot) cell, or -1.

        ``snapshots`` has shape (n,) and ``objects`` shape (k, n): column r
        asks for objects ``objects[:, r]`` at snapshot ``snapshots[r]``. The
        result has shape (k, n), so that sums over the objects are sums of
        contiguous rows.
        """
        if self.dense is not None:
            return self.dense[snapshots[None, :], objects].astype(np.int64)
        if self.keys.size == 0:
            return np.full(objects.shape, -1, dtype=np.int64)
        want = snapshots[None, :] * self.n_obj + objects
        pos = np.minimum(np.searchsorted(self.keys, want), self.keys.size - 1)
        return np.where(self.keys[pos] == want, pos, -1)


#: Cells (rows x member pairs) handled at once by the episode table; bounds its memory.
TABLE_BLOCK = 1_000_000


class _RowStats:
    """Per-row statistics of episodes: one row per (episode, snapshot of its span)."""

    FIELDS = ("n_present", "cx", "cy", "d_sum", "n_both", "d_max", "moving")

    def __init__(self, n_rows: int) -> None:
        self.n_present = np.zeros(n_rows, dtype=np.int64)
        self.cx = np.full(n_rows, np.nan)
        self.cy = np.full(n_rows, np.nan)
        self.d_sum = np.zeros(n_rows)
        self.n_both = np.zeros(n_rows, dtype=np.int64)
        self.d_max = np.zeros(n_rows)
        self.moving = np.zeros(n_rows, dtype=bool)

    @classmethod
    def stacked(cls, parts: list[_RowStats]) -> _RowStats:
        """Return the rows of ``parts`` one after the other."""
        out = cls(0)
        for name in cls.FIELDS:
            setattr(out, name, np.concatenate([getattr(p, name) for p in parts]))
        return out

    def placed(self, rows: np.ndarray, n_rows: int) -> _RowStats:
        """Return these statistics moved to positions ``rows`` of ``n_rows`` rows.

        ``rows`` must name every row once; when they are already in order
        (one chunk, or chunks joined in time order with one episode each) the
        statistics are returned as they are.
        """
        filled = np.zeros(n_rows, dtype=bool)
        filled[rows] = True
        if rows.size != n_rows or not filled.all():
            raise ValueError("the chunks' episode rows do not cover each episode snapshot once")
        if n_rows == 0 or np.all(rows[1:] > rows[:-1]):
            return self
        out = _RowStats(n_rows)
        for name in self.FIELDS:
            getattr(out, name)[rows] = getattr(self, name)
        return out

    def fill(
        self,
        rows: np.ndarray,
        entry: np.ndarray,
        pairs: tuple[np.ndarray, np.ndarray],
        snaps: Snapshots,
        motion: Motion,
        min_speed: float,
    ) -> None:
        """Fill ``rows`` from their members' entries (shape (size, rows), -1 if absent)."""
        present = entry >= 0
        safe = np.maximum(entry, 0)  # absent cells read entry 0, masked out below
        ex, ey = snaps.x[safe], snaps.y[safe]
        n_present = present.sum(axis=0)
        self.n_present[rows] = n_present
        iu, ju = pairs
        both = present[iu] & present[ju]
        d = ex[iu] - ex[ju]
        d *= d
        dy = ey[iu] - ey[ju]
        dy *= dy
        d += dy
        np.sqrt(d, out=d)
        d *= both
        self.d_sum[rows] = _row_sum(d)
        self.n_both[rows] = both.sum(axis=0)
        self.d_max[rows] = d.max(axis=0)
        ex *= present
        ey *= present
        with np.errstate(invalid="ignore", divide="ignore"):
            self.cx[rows] = _row_sum(ex) / n_present
            self.cy[rows] = _row_sum(ey) / n_present
        # most present members faster than min_speed (NaN speeds count as not moving)
        fast = present & (motion.speed[safe] > min_speed)
        self.moving[rows] = 2 * fast.sum(axis=0) > n_present


def _row_sum(values: np.ndarray) -> np.ndarray:
    """Return the sums over axis 0, added in row order whatever the array's shape.

    numpy sums a column of a one-column array pairwise but the columns of a
    wider one row by row; adding row by row here keeps every sum the same
    bit for bit however the rows are cut into blocks.
    """
    total = values[0].copy() if values.shape[0] else np.zeros(values.shape[1:])
    for row in values[1:]:  # one pass per member or member pair
        total += row
    return total


def _per_episode_mean(owner: np.ndarray, values: np.ndarray, use: np.ndarray, n: int) -> np.ndarray:
    """Return per episode the mean of ``values`` over its rows where ``use``; NaN if none."""
    total = np.bincount(owner, weights=np.where(use, values, 0.0), minlength=n)
    count = np.bincount(owner, weights=use, minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def episode_role_sets(snaps: Snapshots, episodes: Episodes) -> list[str]:
    """Return per episode the roles its members had at their fixes within the episode.

    This is the one definition of an episode's role set, used by the episode
    table and by the tests of episode counts: the names of every role held
    by a member at a snapshot of the episode where it has data, sorted and
    joined by ``MEMBER_SEP``.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots the episodes were found in.
    episodes : Episodes
        Output of :func:`find_episodes`.

    Returns
    -------
    list of str
        One label per episode.
    """
    return _role_labels(snaps, _role_keys(snaps, episodes), episodes.n_episodes)


def _role_keys(snaps: Snapshots, episodes: Episodes, offset: int = 0) -> np.ndarray:
    """Return the sorted ``episode * n_roles + role`` codes held at members' fixes in episodes.

    ``snaps`` may be a chunk of the run the episodes were found in whose
    snapshot 0 is the run's snapshot ``offset``: only its fixes are read, so
    the codes of consecutive chunks unite into the whole run's.
    """
    n_roles = snaps.n_roles
    if episodes.n_episodes == 0 or snaps.n_entries == 0:
        return np.zeros(0, dtype=np.int64)
    sizes = np.array([m.size for m in episodes.members], dtype=np.int64)
    ep = np.repeat(np.arange(sizes.size, dtype=np.int64), sizes)
    member = np.concatenate(episodes.members).astype(np.int64)
    first = np.maximum(episodes.start[ep] - offset, 0)
    after = np.clip(episodes.end[ep] - offset + 1, first, snaps.n_snapshots)
    # each object's fixes in time order; (object, snapshot) keys sorted
    order = snaps.object_order()
    width = np.int64(snaps.n_snapshots + 1)
    key = snaps.obj[order].astype(np.int64) * width + snaps.snap[order]
    role = snaps.role[order].astype(np.int64)
    lo, hi = (
        np.searchsorted(key, member * width + first),
        np.searchsorted(key, member * width + after),
    )
    changes = np.r_[0, np.cumsum(role[1:] != role[:-1])]  # role changes before each fix
    seen = hi > lo
    single = seen & (changes[np.maximum(hi - 1, 0)] == changes[lo.clip(max=role.size - 1)])
    keys = [ep[single] * n_roles + role[lo[single]]]
    several = np.flatnonzero(seen & ~single)  # members whose role changes inside: every fix
    if several.size:
        length = hi[several] - lo[several]
        ends = np.cumsum(length)
        fix = np.arange(ends[-1]) - np.repeat(ends - length - lo[several], length)
        keys.append(np.repeat(ep[several], length) * n_roles + role[fix])
    return np.unique(np.concatenate(keys))


def _role_labels(snaps: Snapshots, keys: np.ndarray, n_episodes: int) -> list[str]:
    """Return per episode its role names from ``_role_keys`` codes, sorted and joined."""
    if n_episodes == 0:
        return []
    n_roles = snaps.n_roles
    names = np.array([str(r) for r in snaps.roles] or [""], dtype=object)
    cuts = np.searchsorted(keys // n_roles, np.arange(1, n_episodes))
    return [MEMBER_SEP.join(sorted(names[k % n_roles])) for k in np.split(keys, cuts)]


@dataclass
class EpisodeRows:
    """What the episode table reads from the snapshots, for the part of a run in one chunk.

    The table has one row per (episode, snapshot of its span); a chunk of
    time holds some of those rows. :meth:`then` joins the rows of two chunks;
    once every chunk's rows are joined, :func:`episode_table` builds the table
    from them, exactly as from the whole run.

    Attributes
    ----------
    rows : ndarray of int64
        Which rows of the run (episodes in order, each one's span in time order).
    stats : _RowStats
        Their statistics (members present, centroid, spacing, moving), in ``rows`` order.
    role_keys : ndarray of int64
        Sorted ``episode * n_roles + role`` codes of roles held at members' fixes here.
    """

    rows: np.ndarray
    stats: _RowStats
    role_keys: np.ndarray

    def then(self, later: EpisodeRows) -> EpisodeRows:
        """Return the rows of this chunk and of ``later`` together."""
        return EpisodeRows(
            rows=np.concatenate([self.rows, later.rows]),
            stats=_RowStats.stacked([self.stats, later.stats]),
            role_keys=np.union1d(self.role_keys, later.role_keys),
        )


def _spans(episodes: Episodes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return, per row of the episode table's rows, its episode and snapshot; and row offsets."""
    start = np.asarray(episodes.start, dtype=np.int64)
    length = np.asarray(episodes.end, dtype=np.int64) - start + 1
    first_row = np.concatenate([[0], np.cumsum(length)])
    row_ep = np.repeat(np.arange(start.size), length)  # one row per (episode, snapshot of its span)
    row_snap = np.arange(first_row[-1], dtype=np.int64) - first_row[row_ep] + start[row_ep]
    return row_ep, row_snap, first_row


def episode_rows(
    snaps: Snapshots,
    episodes: Episodes,
    motion: Motion,
    min_speed: float,
    offset: int = 0,
    workers: int = 1,
) -> EpisodeRows:
    """Return the episode-table rows that fall in ``snaps``.

    Parameters
    ----------
    snaps : Snapshots
        The run the episodes were found in, or a chunk of it whose snapshot 0
        is the run's snapshot ``offset`` (:meth:`Snapshots.window`).
    episodes : Episodes
        The run's episodes (:func:`comove.groups.episodes.find_episodes`).
    motion : Motion
        Velocity of every entry of ``snaps``.
    min_speed : float
        Speed in m/s above which a member counts as moving.
    offset : int, default 0
        The run's snapshot at which ``snaps`` starts.
    workers : int, default 1
        Threads filling the rows (whole-array numpy, which releases the
        interpreter lock; -1: one per core); the result does not depend on it.

    Returns
    -------
    EpisodeRows
    """
    workers = worker_count(workers)
    row_ep, row_snap, _ = _spans(episodes)
    local = row_snap - offset
    rows = np.flatnonzero((local >= 0) & (local < snaps.n_snapshots))
    sizes = np.array([m.size for m in episodes.members], dtype=np.int64)
    blocks = _row_blocks(episodes, sizes, row_ep[rows], workers)
    stats = _RowStats(rows.size)
    fill = _block_filler(snaps, row_ep[rows], local[rows], motion, min_speed, stats)
    if workers > 1 and len(blocks) > 1:  # each block fills rows of its own
        with ThreadPoolExecutor(max_workers=workers) as pool:
            role_keys = pool.submit(_role_keys, snaps, episodes, offset)
            list(pool.map(fill, blocks))
            return EpisodeRows(rows=rows, stats=stats, role_keys=role_keys.result())
    for block in blocks:
        fill(block)
    return EpisodeRows(rows=rows, stats=stats, role_keys=_role_keys(snaps, episodes, offset))


def _text_column(values: list[str]) -> pd.Series:
    """Return a text column, typed as text also when it is empty."""
    return pd.Series(values, dtype="str")


#: A block of episode-table rows: the rows, the episodes of their size, and those
#: episodes' members (shape (size, episodes)).
_Block = tuple[np.ndarray, np.ndarray, np.ndarray]


def _row_blocks(
    episodes: Episodes, sizes: np.ndarray, row_ep: np.ndarray, workers: int = 1
) -> list[_Block]:
    """Return the blocks of (episode, snapshot) rows to fill, by episode size.

    Rows of equal width, at most ``TABLE_BLOCK`` (row, member pair) cells a
    block, and with several workers at least as many blocks of each size as
    workers.
    """
    blocks = []
    for size in np.unique(sizes).tolist():  # per episode size: rows of equal width
        eps = np.flatnonzero(sizes == size)
        members = np.stack([episodes.members[k] for k in eps], axis=1)
        rows = np.flatnonzero(sizes[row_ep] == size)
        step = max(1, TABLE_BLOCK // max(size, size * (size - 1) // 2))
        step = min(step, max(1, -(-rows.size // workers)))
        blocks += [(rows[r0 : r0 + step], eps, members) for r0 in range(0, rows.size, step)]
    return blocks


def _block_filler(
    snaps: Snapshots,
    row_ep: np.ndarray,
    row_snap: np.ndarray,
    motion: Motion,
    min_speed: float,
    stats: _RowStats,
) -> Callable[[_Block], None]:
    """Return a function that fills the statistics of one block of :func:`_row_blocks`."""
    lookup = _EntryLookup(snaps)

    def fill(block: _Block) -> None:
        rows, eps, members = block
        # each row's members' entries: (size, rows), -1 where absent
        entry = lookup.entries(row_snap[rows], members[:, np.searchsorted(eps, row_ep[rows])])
        stats.fill(rows, entry, np.triu_indices(members.shape[0], 1), snaps, motion, min_speed)

    return fill


def episode_table(
    snaps: Snapshots,
    episodes: Episodes,
    motion: Motion,
    min_speed: float,
    rows: EpisodeRows | None = None,
    workers: int = 1,
) -> tuple[pd.DataFrame, list[np.ndarray]]:
    """Return one row per episode and the centroid path of each.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots the episodes were found in.
    episodes : Episodes
        Output of :func:`find_episodes`.
    motion : Motion
        Velocity of every entry.
    min_speed : float
        Speed in m/s above which a member counts as moving.
    rows : EpisodeRows, optional
        The rows read chunk by chunk (:func:`episode_rows` of each chunk,
        joined); read from ``snaps`` and ``motion`` when omitted. Given, only
        the names, step and first snapshot of ``snaps`` are used.
    workers : int, default 1
        Threads reading the rows when ``rows`` is omitted (see :func:`episode_rows`).

    Returns
    -------
    table : DataFrame
        Columns ``episode``, ``start``, ``end`` (UTC, first and last
        snapshot), ``duration_s``, ``size``, ``members`` and ``roles`` (sorted,
        joined by ';'), ``together_s`` (time together: the duration less the
        tolerated separations), ``mean_spacing_m`` and ``max_spacing_m`` (pairwise
        distances of present members), ``moving_share`` (share of snapshots at
        which most present members move faster than ``min_speed``), ``came_from``
        and ``went_into`` (episode ids joined by ';').
    paths : list of ndarray, shape (n_snapshots, 3)
        Per episode: snapshot time (ns), centroid x and y in the working plane.

    Notes
    -----
    Whole-array over all episodes at once: one row per (episode, snapshot of
    its span), episodes of one size together, in blocks of at most
    ``TABLE_BLOCK`` (row, member pair) cells. The mean spacing is the mean over
    snapshots (with two or more members present) of the mean pairwise distance.
    """
    n_ep = episodes.n_episodes
    start = np.asarray(episodes.start, dtype=np.int64)
    length = np.asarray(episodes.end, dtype=np.int64) - start + 1
    row_ep, row_snap, first_row = _spans(episodes)
    if rows is None:
        rows = episode_rows(snaps, episodes, motion, min_speed, workers=workers)
    stats = rows.stats.placed(rows.rows, row_ep.size)
    mean_spacing, max_spacing = _spacings(stats, row_ep, first_row, n_ep)
    observed = stats.n_present > 0  # in a tolerated gap no member may have data
    text = _episode_text(snaps, episodes, rows.role_keys)

    def utc(snapshot: np.ndarray) -> pd.DatetimeIndex:
        return pd.to_datetime(snaps.times(snapshot).astype("datetime64[ns]"), utc=True)

    table = pd.DataFrame(
        {
            "episode": text["episode"],
            "start": utc(start),
            "end": utc(episodes.end),
            "duration_s": length * snaps.step_s,
            "size": np.array([m.size for m in episodes.members], dtype=np.int64),
            "members": text["members"],
            "roles": text["roles"],
            "together_s": np.asarray(episodes.together, dtype=np.int64) * snaps.step_s,
            "mean_spacing_m": mean_spacing,
            "max_spacing_m": max_spacing,
            "moving_share": _per_episode_mean(row_ep, stats.moving, observed, n_ep),
            "came_from": text["came_from"],
            "went_into": text["went_into"],
        },
        columns=EPISODE_COLUMNS,
    )
    return table, _centroid_paths(snaps, stats, row_ep, row_snap, n_ep)


def _episode_text(snaps: Snapshots, episodes: Episodes, role_keys: np.ndarray) -> dict:
    """Return the episode table's text columns: ids, members, roles and lineage."""
    ids = [f"E{k + 1:04d}" for k in range(episodes.n_episodes)]
    names = np.array([str(o) for o in snaps.objects], dtype=object)
    text = _text_column
    return {
        "episode": text(ids),
        "members": text([MEMBER_SEP.join(names[m]) for m in episodes.members]),
        "roles": text(_role_labels(snaps, role_keys, episodes.n_episodes)),
        "came_from": text([MEMBER_SEP.join(ids[f] for f in c) for c in episodes.came_from]),
        "went_into": text([MEMBER_SEP.join(ids[f] for f in w) for w in episodes.went_into]),
    }


def _spacings(
    stats: _RowStats, row_ep: np.ndarray, first_row: np.ndarray, n_ep: int
) -> tuple[np.ndarray, np.ndarray]:
    """Return per episode the mean and the largest spacing of its members (NaN if never two)."""
    spaced = stats.n_both > 0  # snapshots with one member present have no spacing
    with np.errstate(invalid="ignore", divide="ignore"):
        row_spacing = stats.d_sum / stats.n_both
    max_spacing = np.full(n_ep, np.nan)
    if n_ep:
        max_spacing = np.maximum.reduceat(stats.d_max, first_row[:-1])
        max_spacing[np.bincount(row_ep, weights=spaced, minlength=n_ep) == 0] = np.nan
    return _per_episode_mean(row_ep, row_spacing, spaced, n_ep), max_spacing


def _centroid_paths(
    snaps: Snapshots, stats: _RowStats, row_ep: np.ndarray, row_snap: np.ndarray, n_ep: int
) -> list[np.ndarray]:
    """Return per episode its (time ns, centroid x, centroid y) rows where a member has data."""
    kept = np.flatnonzero(stats.n_present > 0)
    path = np.column_stack([snaps.times(row_snap[kept]), stats.cx[kept], stats.cy[kept]])
    cuts = np.cumsum(np.bincount(row_ep[kept], minlength=n_ep))[:-1]
    return np.split(path, cuts) if n_ep else []


EPISODE_COLUMNS = [
    "episode", "start", "end", "duration_s", "size", "members", "roles", "together_s",
    "mean_spacing_m", "max_spacing_m", "moving_share", "came_from", "went_into",
]  # fmt: skip


#: Display paths keep at most one vertex per this many seconds (plus each path's ends).
DISPLAY_INTERVAL_S = 1.0


def episode_paths(
    snaps: Snapshots, table: pd.DataFrame, centroids: list[np.ndarray]
) -> tuple[Any, Any]:
    """Return the episode centroid paths as LineStrings: full, and thinned for display.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots (for the coordinate reference systems).
    table : DataFrame
        Output of :func:`episode_table`.
    centroids : list of ndarray
        The per-episode centroid arrays from :func:`episode_table`.

    Returns
    -------
    paths, display : GeoDataFrame
        One row per episode, geometry in the input's CRS. ``paths`` has a vertex
        at every snapshot; ``display`` keeps the first vertex in each
        ``DISPLAY_INTERVAL_S`` of time and each path's last vertex, for files
        meant for viewing such as GeoJSON (a match at 25 Hz would otherwise
        put a million vertices in one).
    """
    import geopandas as gpd
    import shapely

    attrs = table[["episode", "start", "end", "duration_s", "size", "members", "roles"]]
    if not centroids:
        empty = gpd.GeoDataFrame(attrs.copy(), geometry=[], crs=snaps.input_crs)
        return empty, empty.copy()
    # a one-snapshot episode becomes a line of two equal points
    parts = [c if len(c) > 1 else np.repeat(c, 2, axis=0) for c in centroids]
    counts = np.array([len(c) for c in parts])
    owner = np.repeat(np.arange(counts.size), counts)
    allc = np.concatenate(parts)
    x, y = working_to_input(snaps, allc[:, 1], allc[:, 2])
    xy = np.column_stack([x, y])
    slot = np.floor(allc[:, 0] * (1e-9 / DISPLAY_INTERVAL_S))  # not //: slow on floats
    first = np.r_[True, (owner[1:] != owner[:-1]) | (slot[1:] != slot[:-1])]
    last = np.r_[owner[1:] != owner[:-1], True]
    keep = first | last
    return (
        gpd.GeoDataFrame(attrs.copy(), geometry=shapely.linestrings(xy, indices=owner),
                         crs=snaps.input_crs),
        gpd.GeoDataFrame(attrs.copy(), geometry=shapely.linestrings(xy[keep],
                         indices=owner[keep]), crs=snaps.input_crs),
    )  # fmt: skip


def role_rollup(table: pd.DataFrame) -> pd.DataFrame:
    """Return, per role set of episodes, their count and total and longest time.

    Parameters
    ----------
    table : DataFrame
        Output of :func:`episode_table`.

    Returns
    -------
    DataFrame
        Columns ``roles``, ``episodes``, ``total_s``, ``longest_s``,
        ``mean_size``; sorted by total time, descending.
    """
    if table.empty:
        return pd.DataFrame(columns=["roles", "episodes", "total_s", "longest_s", "mean_size"])
    out = (
        table.groupby("roles", sort=True)
        .agg(
            episodes=("episode", "size"),
            total_s=("duration_s", "sum"),
            longest_s=("duration_s", "max"),
            mean_size=("size", "mean"),
        )
        .reset_index()
        .sort_values(["total_s", "roles"], ascending=[False, True], kind="stable")
        .reset_index(drop=True)
    )
    return out
