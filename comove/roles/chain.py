"""The role chain: aligned snapshots -> neighbour pairs -> level-wise co-location miner.

:func:`role_chain` is the one place where these stages are wired together;
``mine``, the null replicates of its tests and every grid point of a sweep
call it. It works on any time chunk of snapshots (see
:meth:`comove.tracks.alignment.Snapshots.window`), and the tallies of consecutive
chunks combine exactly (:func:`combine_role_tallies`): per-snapshot rows are
concatenated, snapshot counts add, role presence is joined along time, and
runs are found on the combined rows, so they stitch across chunk edges.

Why a chunk is mined without pruning. The miner extends a role set only when
it has enough prevalent snapshots; that bound is exact for the whole period
(prevalent snapshots are anti-monotone), but a chunk sees only part of the
period, so a set that is rare in one chunk may be needed for the whole. A
chunk tally therefore extends every set that has a row instance in the chunk
(``min_prevalent_snapshots=0``): a row instance of a set at a snapshot is a
clique of the neighbour graph there, so every subset has one too and nothing
with a row instance is missed. :func:`prune_levels` then applies the whole
period's bound to the combined tally, leaving exactly the candidates that
mining the whole period at once would have kept. This is the count
distribution scheme of parallel association-rule mining [1]_, with the local
candidate sets made complete instead of synchronised per level, so that one
pass over the data suffices.

References
----------
.. [1] R. Agrawal, J. C. Shafer, "Parallel mining of association rules", IEEE
   Transactions on Knowledge and Data Engineering 8(6), 962-969, 1996.
   doi:10.1109/69.553164
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from comove.roles.colocation import (
    ColocationParams,
    LevelResult,
    RolePresence,
    encode_role_sets,
    mine_levels,
)
from comove.tracks.alignment import Snapshots
from comove.tracks.neighbours import NeighbourPairs, neighbour_pairs


@dataclass
class RoleTally:
    """Per-snapshot co-location of role sets over a span of snapshots.

    Attributes
    ----------
    levels : list of LevelResult
        One per set size; snapshot indices count from this tally's first
        snapshot. Row instances are not kept (``instances`` is empty).
    presence : RolePresence
        Which roles are present at each snapshot of the span.
    roles : ndarray of str
        Names behind the role codes.
    step_ns : int
        Snapshot spacing in nanoseconds.
    first_index : int
        Grid index (time // step) of the span's first snapshot.
    n_snapshots : int
        Snapshots in the span.
    min_prevalent_snapshots : int
        The pruning bound the levels were mined with; 0 when every set with a
        row instance was extended (a tally that combines with others).
    """

    levels: list[LevelResult]
    presence: RolePresence
    roles: np.ndarray
    step_ns: int
    first_index: int
    n_snapshots: int
    min_prevalent_snapshots: int

    @property
    def step_s(self) -> float:
        """Return the snapshot spacing in seconds."""
        return self.step_ns / 1e9

    def times(self, snapshot: np.ndarray) -> np.ndarray:
        """Return the times of the span's ``snapshot`` indices, int64 ns UTC."""
        return (np.asarray(snapshot, dtype=np.int64) + self.first_index) * self.step_ns


def role_chain(
    snaps: Snapshots,
    colocation: ColocationParams,
    *,
    min_prevalent_snapshots: int = 0,
    pairs: NeighbourPairs | None = None,
    workers: int = 1,
    only: dict[int, np.ndarray] | None = None,
) -> RoleTally:
    """Return the co-location tally of the role sets in ``snaps`` (a chunk or a whole run).

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots: a whole run, or one time chunk of it.
    colocation : ColocationParams
        Radius, participation threshold and largest set size.
    min_prevalent_snapshots : int, default 0
        Extend only sets with at least this many prevalent snapshots. Give the
        bound implied by the persistence thresholds to mine a whole run
        quickly; 0 extends every set with a row instance, which a chunk needs
        for its tally to combine exactly with others.
    pairs : NeighbourPairs, optional
        Neighbour pairs within ``colocation.radius`` when the caller already
        has them (a sweep takes them from one search at its largest radius).
    workers : int, default 1
        Threads of the neighbour search (-1: every core).
    only : dict, optional
        Size -> codes of the only sets of 3 or more roles to mine (see
        :func:`~comove.roles.colocation.mine_levels`): what a null replicate
        needs of the tested sets.

    Returns
    -------
    RoleTally

    Examples
    --------
    Two dogs, each beside its owner at both snapshots:

    >>> import numpy as np
    >>> from comove.tracks.alignment import Snapshots
    >>> snaps = Snapshots(
    ...     step_ns=10**9, first_index=0, n_snapshots=2,
    ...     snap=np.array([0, 0, 0, 0, 1, 1, 1, 1]),
    ...     obj=np.array([0, 1, 2, 3, 0, 1, 2, 3], dtype=np.int32),
    ...     role=np.array([0, 1, 0, 1, 0, 1, 0, 1], dtype=np.int32),
    ...     x=np.array([0.0, 1, 50, 51, 5, 6, 55, 56]), y=np.zeros(8),
    ...     objects=np.array(["d1", "o1", "d2", "o2"]), roles=np.array(["dog", "owner"]),
    ...     max_gap_ns=0)
    >>> tally = role_chain(snaps, ColocationParams(radius=2.0))
    >>> pair = tally.levels[0]
    >>> pair.roles.tolist(), pair.prevalent.tolist(), pair.present.tolist()
    ([[0, 1]], [2], [2])
    """
    if pairs is None:
        pairs = neighbour_pairs(snaps, colocation.radius, workers=workers)
    presence = RolePresence(snaps)
    levels = mine_levels(snaps, pairs, colocation, min_prevalent_snapshots=min_prevalent_snapshots,
                         presence=presence, only=only)  # fmt: skip
    return RoleTally(
        levels=[_without_instances(level) for level in levels],
        presence=presence,
        roles=snaps.roles,
        step_ns=snaps.step_ns,
        first_index=snaps.first_index,
        n_snapshots=snaps.n_snapshots,
        min_prevalent_snapshots=int(min_prevalent_snapshots),
    )


def _without_instances(level: LevelResult) -> LevelResult:
    """Return ``level`` without its row instances (only the next level's join needs them)."""
    k = level.size
    return replace(level, instances=np.empty((0, k), np.int64), instance_set=np.empty(0, np.int64))


def combine_role_tallies(tallies: Sequence[RoleTally]) -> RoleTally:
    """Return the tally of consecutive chunks, exactly as if mined in one piece.

    Parameters
    ----------
    tallies : sequence of RoleTally
        Tallies of consecutive, non-overlapping spans of one run, in time
        order, each mined with ``min_prevalent_snapshots=0``.

    Returns
    -------
    RoleTally
        Still unpruned (``min_prevalent_snapshots=0``); see :func:`prune_levels`.

    Raises
    ------
    ValueError
        When a tally was pruned, or the spans are not consecutive.
    """
    if not tallies:
        raise ValueError("no tallies to combine")
    first = tallies[0]
    for before, after in zip(tallies[:-1], tallies[1:], strict=True):
        if after.first_index != before.first_index + before.n_snapshots:
            raise ValueError("tallies must cover consecutive spans of snapshots, in order")
    if any(t.min_prevalent_snapshots != 0 for t in tallies):
        raise ValueError("only unpruned tallies (min_prevalent_snapshots=0) combine exactly")
    shift = [t.first_index - first.first_index for t in tallies]
    presence = RolePresence.joined([t.presence for t in tallies])
    max_size = max((len(t.levels) for t in tallies), default=0)
    levels = []
    for depth in range(max_size):
        parts = [(t.levels[depth], s) for t, s in zip(tallies, shift, strict=True)
                 if depth < len(t.levels)]  # fmt: skip
        levels.append(_combined_level(parts, presence, len(first.roles)))
    n_snapshots = sum(t.n_snapshots for t in tallies)
    return replace(first, levels=levels, presence=presence, n_snapshots=n_snapshots)


def _combined_level(
    parts: list[tuple[LevelResult, int]], presence: RolePresence, n_roles: int
) -> LevelResult:
    """Return one level of several chunks: sets united, rows concatenated, counts added."""
    k = parts[0][0].size
    codes = [encode_role_sets(level.roles, n_roles) for level, _ in parts]
    union = np.unique(np.concatenate(codes)) if codes else np.empty(0, np.int64)
    roles = np.empty((union.size, k), dtype=np.int64)
    rest = union.copy()
    for col in range(k - 1, -1, -1):  # decode base-n_roles digits, last role first
        roles[:, col] = rest % n_roles
        rest //= n_roles
    set_id = np.concatenate([np.searchsorted(union, c)[level.set_id]
                             for c, (level, _) in zip(codes, parts, strict=True)])  # fmt: skip
    snap = np.concatenate([level.snap + s for level, s in parts])
    order = np.lexsort((snap, set_id))  # by set, then snapshot, as a level keeps them
    prevalent = np.zeros(union.size, dtype=np.int64)
    for c, (level, _) in zip(codes, parts, strict=True):
        np.add.at(prevalent, np.searchsorted(union, c), level.prevalent)
    return LevelResult(
        roles=roles,
        present=presence.count(roles),
        prevalent=prevalent,
        set_id=set_id[order],
        snap=snap[order],
        pi=np.concatenate([level.pi for level, _ in parts])[order],
        pr=np.concatenate([level.pr for level, _ in parts])[order],
        instances=np.empty((0, k), np.int64),
        instance_set=np.empty(0, np.int64),
    )


def prune_levels(tally: RoleTally, min_prevalent_snapshots: int) -> RoleTally:
    """Return ``tally`` with only the candidates a pruned miner of the whole span keeps.

    A set of size k >= 3 is a candidate when every subset of size k - 1 is a
    candidate with at least ``min_prevalent_snapshots`` prevalent snapshots
    (Apriori's rule, as :func:`comove.roles.colocation.mine_levels` applies it).

    Parameters
    ----------
    tally : RoleTally
        An unpruned tally (one chunk, or chunks combined).
    min_prevalent_snapshots : int
        The bound (at least 1 prunes; 0 returns the tally as it is).
    """
    bound = int(min_prevalent_snapshots)
    if bound <= tally.min_prevalent_snapshots:
        return tally
    n_roles = len(tally.roles)
    levels = [tally.levels[0]] if tally.levels else []
    for level in tally.levels[1:]:
        prev = levels[-1]
        passing = np.sort(encode_role_sets(prev.roles[prev.prevalent >= bound], n_roles))
        if passing.size == 0:
            break
        keep = np.ones(level.roles.shape[0], dtype=bool)
        for drop in range(level.size):  # every (k-1)-subset must pass
            sub = encode_role_sets(np.delete(level.roles, drop, axis=1), n_roles)
            pos = np.minimum(np.searchsorted(passing, sub), passing.size - 1)
            keep &= passing[pos] == sub
        if not keep.any():
            break
        levels.append(_subset_level(level, keep))
    return replace(tally, levels=levels, min_prevalent_snapshots=bound)


def _subset_level(level: LevelResult, keep: np.ndarray) -> LevelResult:
    """Return ``level`` restricted to the sets where ``keep`` is true (set ids renumbered)."""
    new_id = np.cumsum(keep) - 1
    rows = keep[level.set_id]
    return replace(
        level,
        roles=level.roles[keep],
        present=level.present[keep],
        prevalent=level.prevalent[keep],
        set_id=new_id[level.set_id[rows]],
        snap=level.snap[rows],
        pi=level.pi[rows],
        pr=level.pr[rows],
    )
