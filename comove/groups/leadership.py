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
    "moving_together_s", "clear_leader",
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

    def lags(self, step_s: float) -> int:
        """Return the delays looked for each way, in snapshots."""
        lags = 10 if self.max_delay is None else int(np.floor(self.max_delay / step_s + 1e-9))
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
        return 10.0 * self.lags(step_s) * step_s


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
    i, j = np.asarray(together.i), np.asarray(together.j)
    t = snaps.snap[i]
    speed = motion.speed
    with np.errstate(invalid="ignore"):
        rows = (t >= lo) & (t < hi) & (speed[i] > min_speed) & (speed[j] > min_speed)
    i, j, t = i[rows], j[rows], t[rows]
    swap = snaps.obj[i] > snaps.obj[j]  # a: the lower object code
    ea, eb = np.where(swap, j, i), np.where(swap, i, j)
    a, b = snaps.obj[ea].astype(np.int64), snaps.obj[eb].astype(np.int64)
    n_obj = len(snaps.objects)
    key, pair = np.unique(a * n_obj + b, return_inverse=True)
    width = 2 * lags + 1
    sums = np.zeros((key.size, width), dtype=np.int64)
    counts = np.zeros((key.size, width), dtype=np.int64)
    # rows grouped by pair, so that each pair's sum is one reduceat segment
    by_pair = np.argsort(pair, kind="stable")
    starts = np.flatnonzero(np.r_[True, np.diff(pair[by_pair]) != 0]) if pair.size else pair
    ux, uy = motion.vx[ea] / speed[ea], motion.vy[ea] / speed[ea]
    lookup = _EntryLookup(snaps)
    for k, tau in enumerate(range(-lags, lags + 1)):  # one pass per delay
        later = t + tau
        inside = np.flatnonzero((later >= 0) & (later < snaps.n_snapshots))
        e = np.full(t.size, -1, dtype=np.int64)
        e[inside] = lookup.entries(later[inside], b[None, inside])[0]
        with np.errstate(invalid="ignore"):
            ok = (e >= 0) & (speed[np.maximum(e, 0)] > min_speed)
        safe = np.where(ok, e, 0)
        with np.errstate(invalid="ignore", divide="ignore"):  # rows not ok are left out
            dot = (ux * motion.vx[safe] + uy * motion.vy[safe]) / speed[safe]
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
        ``correlation`` (the peak of C, in [-1, 1]), ``moving_together_s`` and
        ``clear_leader`` (the peak lies at least half a snapshot from zero).
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
            "moving_together_s": tally.moving[judged] * step,
            "clear_leader": clear,
        },
        columns=LEADERSHIP_COLUMNS,
    )
    table = table.sort_values(["correlation", "delay_s", "leader", "follower"],
                              ascending=[False, False, True, True], kind="stable")  # fmt: skip
    return table.reset_index(drop=True), _role_rollup(table)


def _role_rollup(table: pd.DataFrame) -> pd.DataFrame:
    """Return the pairs with a clear leader rolled up by (leader role, follower role)."""
    clear = table[table["clear_leader"]]
    if clear.empty:
        return pd.DataFrame(columns=LEADERSHIP_ROLE_COLUMNS)
    out = clear.groupby(["leader_role", "follower_role"], sort=True).agg(
        pairs=("leader", "size"),
        median_delay_s=("delay_s", "median"),
        mean_correlation=("correlation", "mean"),
        moving_together_s=("moving_together_s", "sum"),
    )
    return out.reset_index()[LEADERSHIP_ROLE_COLUMNS]


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
