"""Who leads whom: the directional correlation delay of pairs that move together.

For two objects a and b, the directional correlation function is the mean,
over the snapshots at which they are together (within the neighbour distance)
and both moving, of the dot product of a's heading then and b's heading τ
later::

    C_ab(τ) = < u_a(t) · u_b(t + τ) >_t

where u is the unit vector of an object's velocity. Its maximum at τ* says
how much later b heads where a headed: τ* > 0, a leads and b follows by τ*;
τ* < 0, b leads; τ* near 0, neither leads clearly (Nagy et al. 2010, who used it
for the flight of pigeon flocks). τ* is refined below the snapshot step by the
parabola through the maximum and its two neighbours.

Every pair counts its sums per delay over the snapshots it is given; sums of
consecutive stretches of time add up (:meth:`LeadTally.then`), so a run over
time windows gives the whole run's table.

References
----------
.. [1] M. Nagy, Z. Ákos, D. Biro, T. Vicsek, "Hierarchical group dynamics in
   pigeon flocks", Nature 464, 890-893, 2010. doi:10.1038/nature08891
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from comove.errors import ComoveNote, bad_setting
from comove.groups.summary import _EntryLookup
from comove.tracks.alignment import Snapshots, most_frequent_roles
from comove.tracks.motion import Motion
from comove.tracks.neighbours import NeighbourPairs

#: Most delays on each side of zero that one run correlates (bounds time and memory).
MAX_LAGS = 1000

#: Heading products are summed as integers of 2**-FIXED_BITS: exact whatever the order
#: (|sum| < 2**63 for up to 2**31 snapshots per pair and delay).
FIXED_BITS = 32

LEADERSHIP_COLUMNS = [
    "leader", "follower", "leader_role", "follower_role", "delay_s", "correlation",
    "lead_asymmetry", "moving_together_s", "clear_leader",
]  # fmt: skip
LEADERSHIP_ROLE_COLUMNS = [
    "leader_role", "follower_role", "pairs", "median_delay_s", "mean_correlation",
    "moving_together_s",
]  # fmt: skip


@dataclass(frozen=True)
class LeadershipParams:
    """Settings of the leadership table (directional correlation delays).

    Parameters
    ----------
    max_delay : float or None, default None
        Longest delay in seconds looked for, each way; None: ten snapshots. At
        most ``MAX_LAGS`` snapshots are looked at (a note says so).
    min_moving_together : float or None, default None
        Least time in seconds a pair must be together and both moving to be
        judged; None: ten times the longest delay, so that the correlation at
        every delay rests on many snapshots (common practice).
    """

    max_delay: float | None = field(
        default=None,
        metadata={"help": "leadership: longest delay in seconds looked for, each way "
                  "(default: ten snapshots)"},
    )  # fmt: skip
    min_moving_together: float | None = field(
        default=None,
        metadata={"help": "leadership: least time in seconds a pair is together and both "
                  "moving to be judged (default: ten times --max-delay)"},
    )  # fmt: skip

    def __post_init__(self) -> None:
        for name in ("max_delay", "min_moving_together"):
            value = getattr(self, name)
            if value is not None and not (np.isfinite(value) and value >= 0):
                raise bad_setting(name, "must be zero or a positive number of seconds")

    def _asked(self, step_s: float) -> int:
        """Return the delays asked for each way, in snapshots (before the limit)."""
        return 10 if self.max_delay is None else int(np.floor(self.max_delay / step_s + 1e-9))

    def lags(self, step_s: float) -> int:
        """Return the delays looked for each way, in snapshots (a note when limited)."""
        lags = self._asked(step_s)
        if lags > MAX_LAGS:
            warnings.warn(ComoveNote(
                f"leadership: --max-delay is {lags:,} snapshots; delays up to {MAX_LAGS:,} "
                f"snapshots ({MAX_LAGS * step_s:g} s) are looked at (give a longer --step to "
                "look further)"), stacklevel=2)  # fmt: skip
            return MAX_LAGS
        return lags

    def least_time(self, step_s: float) -> float:
        """Return the least time together and moving, in seconds."""
        if self.min_moving_together is not None:
            return float(self.min_moving_together)
        return 10.0 * min(self._asked(step_s), MAX_LAGS) * step_s


@dataclass
class LeadTally:
    """Heading correlations per pair and delay, summed over a stretch of snapshots.

    Attributes
    ----------
    lags : int
        Delays -lags .. lags snapshots are counted.
    n_objects, n_roles : int
        Sizes of the run's object and role tables.
    key : ndarray of int64
        ``a * n_objects + b`` (a < b), sorted.
    sums, counts : ndarray of int64, shape (pairs, 2 * lags + 1)
        Summed heading dot products (in units of ``2**-FIXED_BITS``) and how
        many, per delay.
    moving : ndarray of int64
        Snapshots at which the pair is together and both move.
    role_key, role_count : ndarray of int64
        ``object * n_roles + role`` codes that occur, and their entries.
    """

    lags: int
    n_objects: int
    n_roles: int
    key: np.ndarray
    sums: np.ndarray
    counts: np.ndarray
    moving: np.ndarray
    role_key: np.ndarray
    role_count: np.ndarray

    def then(self, later: LeadTally) -> LeadTally:
        """Return this stretch's tally and that of ``later`` added up."""
        key = np.union1d(self.key, later.key)
        out = []
        for name in ("sums", "counts", "moving"):
            total = np.zeros((key.size, *getattr(self, name).shape[1:]), dtype=np.int64)
            for part in (self, later):
                total[np.searchsorted(key, part.key)] += getattr(part, name)
            out.append(total)
        roles = np.concatenate([self.role_key, later.role_key])
        role_key, where = np.unique(roles, return_inverse=True)
        role_count = np.zeros(role_key.size, dtype=np.int64)
        np.add.at(role_count, where, np.concatenate([self.role_count, later.role_count]))
        return LeadTally(self.lags, self.n_objects, self.n_roles, key, *out, role_key,
                         role_count)  # fmt: skip


def lead_tally(
    snaps: Snapshots,
    motion: Motion,
    together: NeighbourPairs,
    min_speed: float,
    lags: int,
    span: tuple[int, int] | None = None,
) -> LeadTally:
    """Return the heading correlations of the pairs in ``together``, per delay.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots: a run, or a window of one with ``lags`` snapshots of
        context on each side.
    motion : Motion
        Velocity of every entry of ``snaps``.
    together : NeighbourPairs
        Entry pairs of ``snaps`` within the neighbour distance.
    min_speed : float
        Speed in m/s above which an object moves (its heading is counted).
    lags : int
        Delays -lags .. lags snapshots are counted.
    span : (int, int), optional
        Only pairs at snapshots ``span[0] <= t < span[1]`` count (a window's own
        snapshots); b's heading at t + τ is read anywhere in ``snaps``.

    Returns
    -------
    LeadTally

    Notes
    -----
    One pass per delay over the pairs together and both moving: b's entry at
    t + τ is looked up in a dense (snapshot, object) table or by binary search,
    so time is O(rows × delays) and memory O(rows + pairs × delays).
    """
    lo, hi = span if span is not None else (0, snaps.n_snapshots)
    t, ea, _, a, b = _moving_rows(snaps, motion, together, min_speed, lo, hi)
    n_obj = len(snaps.objects)
    key, pair = np.unique(a * n_obj + b, return_inverse=True)
    width = 2 * lags + 1
    sums = np.zeros((key.size, width), dtype=np.int64)
    counts = np.zeros((key.size, width), dtype=np.int64)
    # rows grouped by pair, so that each pair's sum is one reduceat segment
    by_pair = np.argsort(pair, kind="stable")
    starts = np.flatnonzero(np.r_[True, np.diff(pair[by_pair]) != 0]) if pair.size else pair
    lookup = _EntryLookup(snaps)
    for k, dot, ok in _heading_products(snaps, motion, lookup, t, ea, b, min_speed, lags):
        # in units of 2**-FIXED_BITS as integers: sums of stretches add up exactly
        fixed = np.where(ok, np.rint(dot * 2.0**FIXED_BITS), 0).astype(np.int64)
        if pair.size:
            sums[:, k] = np.add.reduceat(fixed[by_pair], starts)
            counts[:, k] = np.add.reduceat(ok[by_pair].astype(np.int64), starts)
    own = snaps.window(lo, hi)  # the roles held at the counted snapshots
    role_key, role_count = own.role_counts()
    return LeadTally(lags, n_obj, own.n_roles, key, sums, counts,
                     np.bincount(pair, minlength=key.size).astype(np.int64), role_key,
                     role_count.astype(np.int64))  # fmt: skip


def _moving_rows(
    snaps: Snapshots, motion: Motion, together: NeighbourPairs, min_speed: float, lo: int, hi: int
) -> tuple[np.ndarray, ...]:
    """Return the pairs together with both moving at snapshots lo..hi-1.

    Returns ``t`` (snapshot), ``ea``, ``eb`` (entries of a and b) and ``a``,
    ``b`` (object codes, a < b) per row.
    """
    i, j = np.asarray(together.i), np.asarray(together.j)
    t = snaps.snap[i]
    speed = motion.speed
    with np.errstate(invalid="ignore"):
        rows = (t >= lo) & (t < hi) & (speed[i] > min_speed) & (speed[j] > min_speed)
    i, j, t = i[rows], j[rows], t[rows]
    swap = snaps.obj[i] > snaps.obj[j]  # a: the lower object code
    ea, eb = np.where(swap, j, i), np.where(swap, i, j)
    return t, ea, eb, snaps.obj[ea].astype(np.int64), snaps.obj[eb].astype(np.int64)


def _heading_products(
    snaps: Snapshots,
    motion: Motion,
    lookup: _EntryLookup,
    t: np.ndarray,
    first: np.ndarray,
    second: np.ndarray,
    min_speed: float,
    lags: int,
) -> Iterator[tuple[int, np.ndarray, np.ndarray]]:
    """Yield per delay the heading products of rows, one pass per delay.

    Row r's product at delay τ (column k = τ + lags) is the dot product of the
    heading of entry ``first[r]`` (at snapshot ``t[r]``) and that of object
    ``second[r]`` at snapshot ``t[r] + τ``; ``ok`` says where that object is
    present and moving (elsewhere the product is meaningless).
    """
    speed = motion.speed
    ux, uy = motion.vx[first] / speed[first], motion.vy[first] / speed[first]
    for k, tau in enumerate(range(-lags, lags + 1)):
        later = t + tau
        inside = np.flatnonzero((later >= 0) & (later < snaps.n_snapshots))
        e = np.full(t.size, -1, dtype=np.int64)
        e[inside] = lookup.entries(later[inside], second[None, inside])[0]
        with np.errstate(invalid="ignore"):
            ok = (e >= 0) & (speed[np.maximum(e, 0)] > min_speed)
        safe = np.where(ok, e, 0)
        with np.errstate(invalid="ignore", divide="ignore"):  # rows not ok are left out
            dot = (ux * motion.vx[safe] + uy * motion.vy[safe]) / speed[safe]
        yield k, dot, ok


def peak_delays(sums: np.ndarray, counts: np.ndarray, lags: int) -> tuple[np.ndarray, np.ndarray]:
    """Return per pair the delay (in snapshots, refined) of the largest correlation, and it.

    Ties go to the delay nearest zero; the parabola through the largest value
    and its neighbours places the peak between snapshots (not at the ends).
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = sums / counts / 2.0**FIXED_BITS
    filled = np.where(np.isfinite(corr), corr, -np.inf)
    delays = np.arange(-lags, lags + 1)
    # among equal largest values the one nearest zero delay
    order = np.argsort(np.abs(delays), kind="stable")
    best = order[np.argmax(filled[:, order], axis=1)]
    rows = np.arange(best.size)
    peak = filled[rows, best]
    inner = (best > 0) & (best < 2 * lags)
    shift = np.zeros(best.size)
    if inner.any():
        left = filled[rows[inner], best[inner] - 1]
        right = filled[rows[inner], best[inner] + 1]
        centre = peak[inner]
        bend = left - 2 * centre + right
        with np.errstate(invalid="ignore", divide="ignore"):
            step = np.where(np.isfinite(bend) & (bend < 0), 0.5 * (left - right) / bend, 0.0)
        shift[inner] = np.clip(step, -0.5, 0.5)
    return best - lags + shift, np.where(np.isfinite(peak), peak, np.nan)


@dataclass
class LeadBlocks:
    """Heading correlation sums of judged pairs per block of time, both ways round.

    For the swap test of a lead (:func:`comove.stats.significance.lead_tests`):
    in a block, ``forward`` sums u_a(t) · u_b(t + τ) (as counted for the
    table) and ``reverse`` sums u_b(t) · u_a(t + τ) (a and b swapped).

    Attributes
    ----------
    lags : int
        Delays -lags .. lags snapshots are counted.
    block : int
        Snapshots per block (2 lags + 1: a block holds every delay's span).
    key : ndarray of int64
        ``a * n_objects + b`` (a < b) of each pair, sorted.
    starts : ndarray of int64
        Index of each pair's first block in the block arrays (blocks of a pair
        are consecutive).
    forward, forward_n, reverse, reverse_n : ndarray of float64, shape (blocks, 2 lags + 1)
        Summed heading products per block and delay, and how many.
    """

    lags: int
    block: int
    key: np.ndarray
    starts: np.ndarray
    forward: np.ndarray
    forward_n: np.ndarray
    reverse: np.ndarray
    reverse_n: np.ndarray

    def swapped(self, swap: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Return per pair the sums and counts per delay with the blocks ``swap`` swapped."""
        if self.key.size == 0:
            empty = np.zeros((0, 2 * self.lags + 1))
            return empty, empty
        pick = swap[:, None]
        sums = np.add.reduceat(np.where(pick, self.reverse, self.forward), self.starts)
        counts = np.add.reduceat(np.where(pick, self.reverse_n, self.forward_n), self.starts)
        return sums, counts


def lead_blocks(
    snaps: Snapshots,
    motion: Motion,
    together: NeighbourPairs,
    min_speed: float,
    lags: int,
    keys: np.ndarray,
) -> LeadBlocks:
    """Return the heading correlation sums of the pairs ``keys`` per block of time, both ways.

    Parameters
    ----------
    snaps, motion, together, min_speed, lags
        As for :func:`lead_tally` (a whole run).
    keys : ndarray of int64
        ``a * n_objects + b`` (a < b) of the pairs wanted (the judged ones).

    Returns
    -------
    LeadBlocks
        Blocks are snapshots ``[k B, (k + 1) B)`` with B = 2 lags + 1; a block
        a pair is never together and moving in is left out.

    Notes
    -----
    Two passes per delay over the wanted pairs' rows, so time is
    O(rows × delays) and memory O(rows + blocks × delays).
    """
    t, ea, eb, a, b = _moving_rows(snaps, motion, together, min_speed, 0, snaps.n_snapshots)
    n_obj = len(snaps.objects)
    keys = np.unique(np.asarray(keys, dtype=np.int64))
    wanted = np.isin(a * n_obj + b, keys)
    t, ea, eb, a, b = t[wanted], ea[wanted], eb[wanted], a[wanted], b[wanted]
    key, pair = np.unique(a * n_obj + b, return_inverse=True)
    size = 2 * lags + 1
    n_blocks = snaps.n_snapshots // size + 1
    block, row_block = np.unique(pair * n_blocks + t // size, return_inverse=True)
    order = np.argsort(row_block, kind="stable")
    first = np.flatnonzero(np.r_[True, np.diff(row_block[order]) != 0]) if t.size else t
    sums = {name: np.zeros((block.size, size)) for name in ("f", "fn", "r", "rn")}
    lookup = _EntryLookup(snaps)
    ways = (("f", "fn", ea, b), ("r", "rn", eb, a))
    for total, count, entry, other in ways:
        for k, dot, ok in _heading_products(snaps, motion, lookup, t, entry, other, min_speed,
                                            lags):  # fmt: skip
            if t.size:
                sums[total][:, k] = np.add.reduceat(np.where(ok, dot, 0.0)[order], first)
                sums[count][:, k] = np.add.reduceat(ok[order].astype(np.float64), first)
    starts = np.flatnonzero(np.r_[True, np.diff(block // n_blocks) != 0]) if block.size else block
    return LeadBlocks(lags, size, key, starts.astype(np.int64), sums["f"], sums["fn"], sums["r"],
                      sums["rn"])  # fmt: skip


def table_keys(leaders: pd.DataFrame, snaps: Snapshots) -> np.ndarray:
    """Return ``a * n_objects + b`` (a < b) of each row of a leadership table."""
    index = {str(name): k for k, name in enumerate(snaps.objects)}
    one = leaders["leader"].map(index).to_numpy(np.int64)
    two = leaders["follower"].map(index).to_numpy(np.int64)
    return np.minimum(one, two) * len(snaps.objects) + np.maximum(one, two)


def lead_asymmetry(sums: np.ndarray, counts: np.ndarray, lags: int) -> np.ndarray:
    """Return per pair how much more the headings agree at the lead than at the mirrored delay.

    A = C(τ̂) − C(−τ̂), with τ̂ the whole-snapshot delay of the largest
    correlation C (ties to the delay nearest zero, as for the table). A is 0
    when τ̂ = 0 (no lead), and at most 2; a delay at which C is undefined
    counts as C = −1 at the mirrored side.

    Parameters
    ----------
    sums, counts : ndarray, shape (..., 2 lags + 1)
        Summed heading products per delay and how many.
    lags : int
        Delays -lags .. lags snapshots.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = np.asarray(sums, dtype=np.float64) / counts
    filled = np.where(np.isfinite(corr), corr, -np.inf)
    delays = np.arange(-lags, lags + 1)
    order = np.argsort(np.abs(delays), kind="stable")
    best = order[np.argmax(filled[..., order], axis=-1)]
    peak = np.take_along_axis(filled, best[..., None], axis=-1)[..., 0]
    mirror = np.take_along_axis(filled, (2 * lags - best)[..., None], axis=-1)[..., 0]
    mirror = np.where(np.isfinite(mirror), mirror, -1.0)
    return np.where(np.isfinite(peak), peak - mirror, 0.0)


def leadership_tables(
    tally: LeadTally, snaps: Snapshots, params: LeadershipParams
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return the leadership table of the pairs that move together long enough, and its roll-up.

    Parameters
    ----------
    tally : LeadTally
        Sums of the whole run.
    snaps : Snapshots
        The run or any window of it: only its names and step are read.
    params : LeadershipParams
        The least time together and moving.

    Returns
    -------
    table : DataFrame
        One row per pair judged (columns ``LEADERSHIP_COLUMNS``): ``leader``
        and ``follower`` (object ids; with no clear leader, the pair in id
        code order), their most frequent roles, ``delay_s`` (≥ 0),
        ``correlation`` (the peak of C, in [-1, 1]), ``lead_asymmetry``
        (:func:`lead_asymmetry`), ``moving_together_s`` and ``clear_leader``
        (the peak lies at least half a snapshot from zero).
        Sorted by correlation, then delay, descending.
    roles : DataFrame
        Per (leader role, follower role) of the pairs with a clear leader:
        ``pairs``, ``median_delay_s``, ``mean_correlation``, ``moving_together_s``.

    References
    ----------
    .. [1] M. Nagy, Z. Ákos, D. Biro, T. Vicsek, "Hierarchical group dynamics in
       pigeon flocks", Nature 464, 890-893, 2010. doi:10.1038/nature08891
    """
    step = snaps.step_s
    judged = tally.moving * step >= params.least_time(step) - 1e-9
    delay, corr = peak_delays(tally.sums[judged], tally.counts[judged], tally.lags)
    key = tally.key[judged]
    a, b = key // tally.n_objects, key % tally.n_objects
    clear = np.abs(delay) >= 0.5
    b_leads = clear & (delay < 0)
    leader, follower = np.where(b_leads, b, a), np.where(b_leads, a, b)
    roles = most_frequent_roles(tally.role_key, tally.role_count, tally.n_objects, tally.n_roles)
    names = np.asarray(snaps.objects).astype(str)
    role_names = np.asarray(snaps.roles).astype(str)
    table = pd.DataFrame(
        {
            "leader": pd.array(names[leader], dtype=str),
            "follower": pd.array(names[follower], dtype=str),
            "leader_role": pd.array(role_names[roles[leader]], dtype=str),
            "follower_role": pd.array(role_names[roles[follower]], dtype=str),
            "delay_s": np.abs(delay) * step,
            "correlation": corr,
            "lead_asymmetry": lead_asymmetry(
                tally.sums[judged] / 2.0**FIXED_BITS, tally.counts[judged], tally.lags
            ),
            "moving_together_s": tally.moving[judged] * step,
            "clear_leader": clear,
        },
        columns=LEADERSHIP_COLUMNS,
    )
    table = table.sort_values(["correlation", "delay_s", "leader", "follower"],
                              ascending=[False, False, True, True], kind="stable")  # fmt: skip
    return table.reset_index(drop=True), lead_rollup(table)


def lead_rollup(table: pd.DataFrame) -> pd.DataFrame:
    """Return the pairs with a clear leader rolled up by (leader role, follower role).

    Columns ``LEADERSHIP_ROLE_COLUMNS``; when the leads were tested (the table
    has ``significant``), also ``significant_pairs``: how many of those pairs
    lead significantly.
    """
    tested = "significant" in table.columns
    columns = LEADERSHIP_ROLE_COLUMNS + (["significant_pairs"] if tested else [])
    clear = table[table["clear_leader"].astype(bool)]
    if clear.empty:
        return pd.DataFrame(columns=columns)
    sums = {"significant_pairs": ("significant", "sum")} if tested else {}
    out = clear.groupby(["leader_role", "follower_role"], sort=True).agg(
        pairs=("leader", "size"),
        median_delay_s=("delay_s", "median"),
        mean_correlation=("correlation", "mean"),
        moving_together_s=("moving_together_s", "sum"),
        **sums,
    )
    return out.reset_index()[columns]


def leadership(
    snaps: Snapshots,
    motion: Motion,
    together: NeighbourPairs,
    min_speed: float,
    params: LeadershipParams,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return :func:`leadership_tables` of a whole run (one :func:`lead_tally`)."""
    tally = lead_tally(snaps, motion, together, min_speed, params.lags(snaps.step_s))
    return leadership_tables(tally, snaps, params)


def tested_leadership(
    snaps: Snapshots,
    motion: Motion,
    together: NeighbourPairs,
    min_speed: float,
    params: LeadershipParams,
) -> tuple[pd.DataFrame, pd.DataFrame, LeadBlocks]:
    """Return :func:`leadership` and the judged pairs' :func:`lead_blocks` for their tests."""
    table, roles = leadership(snaps, motion, together, min_speed, params)
    lags = min(params._asked(snaps.step_s), MAX_LAGS)  # the note on a limit was given above
    blocks = lead_blocks(snaps, motion, together, min_speed, lags, table_keys(table, snaps))
    return table, roles, blocks
