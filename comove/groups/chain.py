"""The group chain: snapshots -> neighbour pairs -> links -> per-snapshot groups -> episodes.

:func:`group_chain` is the one place where these stages are wired together;
``groups`` and the null replicates of its tests call it. What it returns,
:class:`GroupTally`, carries every intermediate result a caller may reuse
(the neighbour pairs for the dyads, the velocities for the episode table).

Over time chunks. Everything up to the per-snapshot groups is local to a
snapshot, except velocities, which reach :func:`~comove.tracks.motion.half_window_snapshots`
snapshots to each side, and evidence links, which weigh
:func:`~comove.groups.evidence.evidence_reach` snapshots to each side:
:func:`chunk_timeline` works on a chunk with that much context on each side
and keeps only its own snapshots, so its groups are exactly the whole run's.
The chunks' timelines join
(:meth:`~comove.groups.grouping.GroupTimeline.joined`: groups concatenated, each
object's presence runs stitched where they meet at a chunk edge), and the
episode search runs over the joined timeline, so episodes that cross chunk
edges, or tolerated gaps that do, are found as in one piece. The dyad counts
of a chunk (:func:`chunk_dyads`) join likewise (:meth:`~comove.groups.dyads.DyadTally.then`:
counts and exact distance sums add, runs together stitch at the edge), once
the pairs to count are fixed: the pairs ever together are found by a first
pass (:func:`chunk_together_keys`). The expected distance of the coefficient
of sociality pairs positions across the whole run and is computed from the
tracks once the chunks are joined.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from comove.groups.dyads import DyadTally, dyad_tally, pair_keys, together_keys
from comove.groups.episodes import EpisodeParams, Episodes, find_episodes
from comove.groups.evidence import evidence_links, evidence_reach
from comove.groups.grouping import (
    GroupParams,
    GroupTimeline,
    SnapshotGroups,
    linked_pairs,
    snapshot_groups,
)
from comove.groups.leadership import LeadTally, lead_tally
from comove.groups.summary import EpisodeRows, episode_rows
from comove.tracks.alignment import Snapshots
from comove.tracks.motion import Motion, entry_motion, half_window_snapshots
from comove.tracks.neighbours import NeighbourPairs, neighbour_pairs


@dataclass
class GroupTally:
    """Everything the group chain found in a run of snapshots.

    Attributes
    ----------
    pairs : NeighbourPairs
        Entry pairs within the radius.
    motion : Motion
        Velocity of every entry.
    groups : SnapshotGroups
        Groups of linked entries at every snapshot.
    episodes : Episodes
        Maximal episodes of objects that stay grouped.
    """

    pairs: NeighbourPairs
    motion: Motion
    groups: SnapshotGroups
    episodes: Episodes

    def together(self, snaps: Snapshots, keys: np.ndarray) -> np.ndarray:
        """Return the snapshots within the radius of each object pair in ``keys``.

        ``keys`` are ``object_a * n_objects + object_b`` (a < b); sparse: only
        pairs that were ever within the radius are counted, the others get 0.
        """
        found = np.sort(pair_keys(snaps, self.pairs))
        start = np.searchsorted(found, keys, side="left")
        return (np.searchsorted(found, keys, side="right") - start).astype(np.float64)


def group_chain(
    snaps: Snapshots,
    grouping: GroupParams,
    episodes: EpisodeParams,
    *,
    motion: Motion | None = None,
    workers: int = 1,
    before_search: Callable[[NeighbourPairs, Motion], None] | None = None,
) -> GroupTally:
    """Return the groups and episodes of the objects in ``snaps``.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    grouping : GroupParams
        Radius, motion predicates and group mode.
    episodes : EpisodeParams
        Size, duration and tolerance of episodes.
    motion : Motion, optional
        Velocities of the entries when already known (a time-shift replicate
        carries the observed ones along with its entries); computed otherwise.
    workers : int, default 1
        Threads of the neighbour search and velocities (-1: every core).
    before_search : callable, optional
        Called with the neighbour pairs and velocities before the (mostly
        Python) episode search starts, so that a caller can start other work
        on them in a helper thread meanwhile.

    Returns
    -------
    GroupTally

    Examples
    --------
    Three walkers side by side for ten seconds, a fourth far away:

    >>> import numpy as np
    >>> from comove.tracks.alignment import Snapshots
    >>> t = np.repeat(np.arange(10), 4)
    >>> snaps = Snapshots(
    ...     step_ns=10**9, first_index=0, n_snapshots=10, snap=t,
    ...     obj=np.tile(np.arange(4, dtype=np.int32), 10),
    ...     role=np.zeros(40, dtype=np.int32),
    ...     x=t * 1.2 + np.tile([0.0, 0.0, 0.0, 500.0], 10),
    ...     y=np.tile([0.0, 1.0, 2.0, 0.0], 10),
    ...     objects=np.array(["a", "b", "c", "d"]), roles=np.array([""]), max_gap_ns=0)
    >>> tally = group_chain(snaps, GroupParams(radius=1.5), EpisodeParams(min_together_time=5))
    >>> [m.tolist() for m in tally.episodes.members], tally.episodes.together.tolist()
    ([[0, 1, 2]], [10])
    """
    pairs = neighbour_pairs(snaps, grouping.radius, workers=workers)
    if motion is None:
        motion = entry_motion(snaps, grouping.velocity_window, workers=workers)
    if before_search is not None:
        before_search(pairs, motion)
    groups = _groups(snaps, pairs, motion, grouping)
    found = find_episodes(GroupTimeline.of(snaps, groups), episodes)
    return GroupTally(pairs=pairs, motion=motion, groups=groups, episodes=found)


def _groups(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, grouping: GroupParams
) -> SnapshotGroups:
    """Return the per-snapshot groups of the linked pairs."""
    return snapshot_groups(snaps, _links(snaps, pairs, motion, grouping), grouping)


def _links(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, grouping: GroupParams
) -> NeighbourPairs:
    """Return the pairs linked by the pair evidence or by the snapshot alone."""
    if grouping.links == "evidence":
        return evidence_links(snaps, pairs, motion, grouping)
    return linked_pairs(pairs, motion, grouping)


def link_reach(grouping: GroupParams, step_s: float) -> int:
    """Return how many snapshots on each side a snapshot's links depend on (velocities aside)."""
    if grouping.links == "evidence":
        return evidence_reach(grouping.evidence_window, step_s)
    return 0


def _entries_between(pairs: NeighbourPairs, lo: int, hi: int) -> NeighbourPairs:
    """Return the pairs of entries ``lo .. hi - 1``, renumbered from ``lo``.

    Both ends of a pair lie in one snapshot, and entries are in snapshot
    order, so they are the pairs whose first end lies there.
    """
    a, b = np.searchsorted(pairs.i, [lo, hi])
    return NeighbourPairs(pairs.i[a:b] - lo, pairs.j[a:b] - lo, pairs.radius)


def chunk_timeline(
    snaps: Snapshots, start: int, stop: int, grouping: GroupParams, workers: int = 1
) -> GroupTimeline:
    """Return the group timeline of snapshots ``start`` to ``stop - 1`` of ``snaps``.

    Velocities are computed with the snapshots around the chunk that they
    depend on, so the chunk's groups equal those of the whole run there; the
    timelines of consecutive chunks join into the whole run's
    (:meth:`~comove.groups.grouping.GroupTimeline.joined`), for :func:`find_episodes`.

    Parameters
    ----------
    snaps : Snapshots
        The aligned snapshots (only the chunk and its context are read).
    start, stop : int
        The chunk's snapshots.
    grouping : GroupParams
        Radius, motion predicates and group mode.
    workers : int, default 1
        Threads of the neighbour search and velocities (-1: every core).
    """
    return chunk_timeline_and_keys(snaps, start, stop, grouping, workers, keys=False)[0]


def chunk_timeline_and_keys(
    snaps: Snapshots,
    start: int,
    stop: int,
    grouping: GroupParams,
    workers: int = 1,
    keys: bool = True,
) -> tuple[GroupTimeline, np.ndarray | None, NeighbourPairs]:
    """Return :func:`chunk_timeline` and :func:`chunk_together_keys` from one neighbour search.

    The first pass of a run over time windows needs both; the chunk's
    neighbour pairs come third, for :func:`chunk_dyads` to reuse.
    """
    reach = link_reach(grouping, snaps.step_s)
    if reach == 0:
        chunk, motion = _chunk_motion(snaps, start, stop, grouping, workers)
        pairs = neighbour_pairs(chunk, grouping.radius, workers=workers)
        groups = _groups(chunk, pairs, motion, grouping)
    else:  # links weigh the snapshots around: work on the chunk with that context
        outer, around = _chunk_motion(snaps, start - reach, stop + reach, grouping, workers)
        chunk = snaps.window(start, stop)
        before = chunk.first_index - outer.first_index
        lo, hi = (int(v) for v in outer.offsets()[[before, before + chunk.n_snapshots]])
        outer_pairs = neighbour_pairs(outer, grouping.radius, workers=workers)
        links = _entries_between(_links(outer, outer_pairs, around, grouping), lo, hi)
        pairs = _entries_between(outer_pairs, lo, hi)
        groups = snapshot_groups(chunk, links, grouping)
    timeline = GroupTimeline.of(chunk, groups)
    return timeline, together_keys(chunk, pairs) if keys else None, pairs


def chunk_episode_rows(
    snaps: Snapshots,
    start: int,
    stop: int,
    episodes: Episodes,
    grouping: GroupParams,
    workers: int = 1,
    offset: int | None = None,
) -> EpisodeRows:
    """Return the episode-table rows of snapshots ``start`` to ``stop - 1`` of ``snaps``.

    The second pass of a chunked run: once the episodes of the whole run are
    found, each chunk gives the statistics of the episodes' snapshots within
    it; joined (:meth:`~comove.groups.summary.EpisodeRows.then`), they make the
    episode table (:func:`~comove.groups.summary.episode_table`) of the whole run.

    Parameters
    ----------
    snaps : Snapshots
        The aligned snapshots (only the chunk and its velocity context are read).
    start, stop : int
        The chunk's snapshots.
    episodes : Episodes
        The whole run's episodes.
    grouping : GroupParams
        Its velocity window and moving speed are used.
    workers : int, default 1
        Threads of the velocities and of the rows (-1: every core).
    offset : int, optional
        The chunk's first snapshot counted from the run's first; ``start`` when
        ``snaps`` is the whole run (the default), else the caller says.
    """
    chunk, motion = _chunk_motion(snaps, start, stop, grouping, workers)
    offset = max(int(start), 0) if offset is None else int(offset)
    return episode_rows(chunk, episodes, motion, grouping.min_speed, offset=offset, workers=workers)


def chunk_lead_tally(
    snaps: Snapshots,
    start: int,
    stop: int,
    grouping: GroupParams,
    lags: int,
    workers: int = 1,
    pairs: NeighbourPairs | None = None,
) -> LeadTally:
    """Return the heading correlations per pair and delay of snapshots ``start`` to ``stop - 1``.

    The pairs together at those snapshots count; the partner's heading is read
    up to ``lags`` snapshots beyond, with velocities as in the whole run, so
    that the tallies of consecutive chunks joined (:meth:`LeadTally.then`)
    equal the whole run's. ``pairs``, when given, are the neighbour pairs of
    ``snaps.window(start, stop)`` (numbered from its first entry), as a first
    pass kept them; otherwise they are searched.
    """
    chunk, motion = _chunk_motion(snaps, start - lags, stop + lags, grouping, workers)
    own = snaps.first_index + max(int(start), 0) - chunk.first_index
    width = min(int(stop), snaps.n_snapshots) - max(int(start), 0)
    if pairs is None:
        pairs = neighbour_pairs(chunk.window(own, own + width), grouping.radius, workers=workers)
    first = int(chunk.offsets()[own])  # the window's first entry within the chunk
    shifted = NeighbourPairs(pairs.i + first, pairs.j + first, pairs.radius)
    return lead_tally(chunk, motion, shifted, grouping.min_speed, lags, span=(own, own + width))


def _chunk_motion(
    snaps: Snapshots, start: int, stop: int, grouping: GroupParams, workers: int
) -> tuple[Snapshots, Motion]:
    """Return a chunk of ``snaps`` and the velocities of its entries, as in the whole run.

    Velocities reach ``half_window_snapshots`` to each side, so they are
    computed on the chunk with that many snapshots of context around it.
    """
    reach = half_window_snapshots(grouping.velocity_window, snaps.step_s)
    chunk = snaps.window(start, stop)
    outer = snaps.window(start - reach, stop + reach)
    before = chunk.first_index - outer.first_index
    lo, hi = outer.offsets()[[before, before + chunk.n_snapshots]]
    around = entry_motion(outer, grouping.velocity_window, workers=workers)
    return chunk, Motion(vx=around.vx[lo:hi], vy=around.vy[lo:hi])


def chunk_dyads(
    snaps: Snapshots,
    start: int,
    stop: int,
    radius: float,
    keys: np.ndarray | None = None,
    workers: int = 1,
    pairs: NeighbourPairs | None = None,
) -> DyadTally:
    """Return the dyad counts of snapshots ``start`` to ``stop - 1`` of ``snaps``.

    Counted for the pairs ``keys`` (``a * n_objects + b``, a < b, sorted),
    normally the pairs ever together in the whole run, from a first pass
    (:func:`chunk_together_keys` of every chunk, united); without ``keys``,
    every pair present in the chunk at one time (objects x objects memory).
    The tallies of consecutive chunks join (:meth:`~comove.groups.dyads.DyadTally.then`)
    into the tally of the whole run, exactly.

    Parameters
    ----------
    snaps : Snapshots
        The aligned snapshots (only the chunk is read).
    start, stop : int
        The chunk's snapshots.
    radius : float
        Distance (m) within which two objects are together.
    keys : ndarray of int64, optional
        The pairs to count.
    workers : int, default 1
        Threads of the neighbour search (-1: every core).
    pairs : NeighbourPairs, optional
        The chunk's neighbour pairs within ``radius``, when a first pass found
        them (:func:`chunk_timeline_and_keys`); else they are searched here.
    """
    chunk = snaps.window(start, stop)
    if pairs is None:
        pairs = neighbour_pairs(chunk, radius, workers=workers)
    if keys is None:
        return dyad_tally(chunk, pairs, pairs="co-present")
    return dyad_tally(chunk, pairs, keys=keys)


def chunk_together_keys(
    snaps: Snapshots, start: int, stop: int, radius: float, workers: int = 1
) -> np.ndarray:
    """Return the keys of the pairs within ``radius`` at a snapshot ``start`` to ``stop - 1``."""
    chunk = snaps.window(start, stop)
    return together_keys(chunk, neighbour_pairs(chunk, radius, workers=workers))
