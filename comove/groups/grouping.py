"""Which objects move together at each snapshot: links and per-snapshot groups.

Two present objects are *linked* at a snapshot when they are within the radius
and, when both move faster than ``min_speed``, their headings differ by at most
``max_heading`` degrees and the faster is at most ``max_speed_ratio`` times as
fast as the slower. The motion predicates separate moving together from
crossing paths; either can be switched off (``None``).

Groups are formed on the link graph of each snapshot in one of three ways:

- ``"clique"``: maximal sets in which every two objects are linked;
- ``"component"``: objects connected through a chain of links;
- ``"dbscan"``: density-connected sets (Ester et al. 1996) on the link graph:
  an object with at least ``min_members - 1`` linked objects is a core; cores
  linked to each other share a group, and a non-core linked to a core joins
  that core's group. With ``min_members = m`` this gives the snapshot clusters
  of convoys (Jeung et al. 2008).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from comove.errors import bad_setting
from comove.tracks.alignment import Snapshots
from comove.tracks.motion import Motion
from comove.tracks.neighbours import NeighbourPairs

GROUP_MODES = ("clique", "component", "dbscan")
LINK_RULES = ("evidence", "snapshot")
STANDING = ("together", "ignored", "apart")


@dataclass(frozen=True)
class GroupParams:
    """Settings of links and per-snapshot groups.

    Parameters
    ----------
    radius : float
        Neighbour distance in metres (inclusive): only objects this close are linked.
    mode : {"clique", "component", "dbscan"}, default "component"
        How linked objects form a group at a snapshot.
    min_members : int, default 2
        For ``"dbscan"``: least number of objects, itself included, within
        links of an object for it to be a core (DBSCAN's ``min_samples``).
    min_speed : float, default 0.5
        Speed in m/s above which an object counts as moving; the heading and
        speed predicates apply only when both objects are moving.
    max_heading : float or None, default 45.0
        Largest heading difference in degrees for moving objects to link;
        ``None`` switches the predicate off.
    max_speed_ratio : float or None, default 2.0
        Largest ratio of the faster to the slower speed for moving objects to
        link; ``None`` switches the predicate off.
    velocity_window : float, default 1.0
        Width in seconds of the window over which velocities are differenced.
    links : {"evidence", "snapshot"}, default "evidence"
        How a link is decided: from the pair's own evidence over a window of
        time (:mod:`comove.groups.evidence`), or from the snapshot alone
        (distance and the motion predicates at that moment).
    evidence_window : float, default 8.0
        ``"evidence"``: width in seconds of the centred window over which a
        pair's evidence is gathered.
    evidence_share : float, default 0.5
        ``"evidence"``: least share of the window's co-present snapshots at
        which the pair must be together.
    nearest : int, default 3
        ``"evidence"``: each of the pair must be among the other's ``nearest``
        nearest neighbours to count as near (0: any distance within the radius).
    min_abreast : float or None, default None
        ``"evidence"``: least angle in degrees between the line joining two
        moving objects and their common heading (side by side is 90); ``None``
        switches the predicate off.
    standing : {"together", "ignored", "apart"}, default "together"
        ``"evidence"``: how a snapshot at which the two are near but not both
        faster than ``min_speed`` is weighed: as together (as distance alone links slow
        objects in ``"snapshot"`` links), left out of the evidence, or as apart.
    """

    radius: float = field(
        metadata={"help": "neighbour distance in metres (inclusive): only objects this close "
                  "can be linked into a group"}
    )  # fmt: skip
    mode: str = field(
        default="component",
        metadata={"help": "group structure per snapshot", "choices": GROUP_MODES},
    )
    min_members: int = field(
        default=2, metadata={"help": "dbscan: objects (itself included) linked to a core"}
    )
    min_speed: float = field(
        default=0.5, metadata={"help": "m/s above which heading and speed predicates apply"}
    )
    max_heading: float | None = field(
        default=45.0,
        metadata={"help": "largest heading difference in degrees of moving linked objects "
                  "(negative: off)"},
    )  # fmt: skip
    max_speed_ratio: float | None = field(
        default=2.0,
        metadata={"help": "largest faster/slower speed ratio of moving linked objects "
                  "(negative: off)"},
    )  # fmt: skip
    velocity_window: float = field(
        default=1.0, metadata={"help": "seconds over which velocities are differenced"}
    )
    links: str = field(
        default="evidence",
        metadata={"help": "how links are decided: evidence (the pair's own history around "
                  "each snapshot) or snapshot (that moment alone)", "choices": LINK_RULES},
    )  # fmt: skip
    evidence_window: float = field(
        default=8.0, metadata={"help": "evidence links: seconds of history weighed, centred"}
    )
    evidence_share: float = field(
        default=0.5,
        metadata={"help": "evidence links: least share of the window the pair is together"},
    )
    nearest: int = field(
        default=3,
        metadata={"help": "evidence links: each must be among the other's N nearest "
                  "neighbours (0: off)"},
    )  # fmt: skip
    min_abreast: float | None = field(
        default=None,
        metadata={"help": "evidence links: least angle in degrees between the line joining "
                  "two movers and their heading (negative: off)"},
    )  # fmt: skip
    standing: str = field(
        default="together",
        metadata={"help": "evidence links: nearness while not both move counts as together, "
                  "is ignored, or counts as apart", "choices": STANDING},
    )  # fmt: skip

    def __post_init__(self) -> None:
        # a negative value switches a predicate off, so that flags can say so too
        for name in ("max_heading", "max_speed_ratio", "min_abreast"):
            value = getattr(self, name)
            if value is not None and value < 0:
                object.__setattr__(self, name, None)
        if not (np.isfinite(self.radius) and self.radius > 0):
            raise bad_setting("radius", "must be a positive distance in metres")
        if self.mode not in GROUP_MODES:
            raise bad_setting("mode", f"must be one of {', '.join(GROUP_MODES)}, not {self.mode!r}")
        if int(self.min_members) != self.min_members or self.min_members < 2:
            raise bad_setting("min_members", "must be a whole number of at least 2")
        if not (np.isfinite(self.min_speed) and self.min_speed >= 0):
            raise bad_setting("min_speed", "must be zero or a positive speed in m/s")
        if self.max_heading is not None and not (0 <= self.max_heading <= 180):
            raise bad_setting("max_heading", "must be between 0 and 180 degrees")
        if self.max_speed_ratio is not None and not (self.max_speed_ratio >= 1):
            raise bad_setting("max_speed_ratio", "must be at least 1")
        if not (np.isfinite(self.velocity_window) and self.velocity_window > 0):
            raise bad_setting("velocity_window", "must be a positive number of seconds")
        if self.links not in LINK_RULES:
            rules = ", ".join(LINK_RULES)
            raise bad_setting("links", f"must be one of {rules}, not {self.links!r}")
        if not (np.isfinite(self.evidence_window) and self.evidence_window >= 0):
            raise bad_setting("evidence_window", "must be zero or a positive number of seconds")
        if not (0 < self.evidence_share <= 1):
            raise bad_setting("evidence_share", "must be a share above 0 and at most 1")
        if int(self.nearest) != self.nearest or self.nearest < 0:
            raise bad_setting("nearest", "must be a whole number, 0 to switch it off")
        if self.standing not in STANDING:
            raise bad_setting("standing", f"must be one of {', '.join(STANDING)}, "
                              f"not {self.standing!r}")  # fmt: skip
        if self.min_abreast is not None and not (0 <= self.min_abreast <= 90):
            raise bad_setting("min_abreast", "must be between 0 and 90 degrees")


@dataclass
class SnapshotGroups:
    """Groups of entries at each snapshot, as a compressed membership table.

    Attributes
    ----------
    snap : ndarray of int64
        Snapshot of each group, non-decreasing.
    offsets : ndarray of int64
        Members of group ``g`` are ``entries[offsets[g]:offsets[g+1]]``.
    entries : ndarray of int64
        Entry indices, ascending within each group (so ascending by object).
    """

    snap: np.ndarray
    offsets: np.ndarray
    entries: np.ndarray

    @property
    def n_groups(self) -> int:
        """Return the number of groups."""
        return int(self.snap.size)

    def sizes(self) -> np.ndarray:
        """Return the number of members of each group."""
        return np.diff(self.offsets)


@dataclass
class GroupTimeline:
    """Which objects are grouped at every snapshot, and when each object has data.

    This is all the episode search reads: groups by object code rather than
    by entry, and each object's presence as runs of consecutive snapshots,
    so a timeline holds no positions, and the timelines of consecutive time
    chunks join into the whole run's (:meth:`joined`).

    Attributes
    ----------
    n_objects, n_snapshots : int
        Object codes are ``0 .. n_objects - 1``; snapshots ``0 .. n_snapshots - 1``.
    step_ns, first_index : int
        Snapshot spacing (ns) and grid index of snapshot 0, as in Snapshots.
    group_snap : ndarray of int64
        Snapshot of each group, non-decreasing.
    group_offsets : ndarray of int64
        Members of group ``g`` are ``group_objects[group_offsets[g]:group_offsets[g+1]]``.
    group_objects : ndarray of int64
        Member object codes, ascending within each group.
    run_first, run_last : ndarray of int64
        Maximal runs of consecutive snapshots at which an object has data,
        sorted by object, then time.
    run_bounds : ndarray of int64
        Object o's runs are ``run_bounds[o]:run_bounds[o + 1]``.
    """

    n_objects: int
    n_snapshots: int
    step_ns: int
    first_index: int
    group_snap: np.ndarray
    group_offsets: np.ndarray
    group_objects: np.ndarray
    run_first: np.ndarray
    run_last: np.ndarray
    run_bounds: np.ndarray

    @property
    def step_s(self) -> float:
        """Return the snapshot spacing in seconds."""
        return self.step_ns / 1e9

    @classmethod
    def of(cls, snaps: Snapshots, groups: SnapshotGroups) -> GroupTimeline:
        """Return the timeline of ``groups`` found in ``snaps``."""
        order = snaps.object_order()
        snap, obj = snaps.snap[order], snaps.obj[order]
        new_run = np.ones(snap.size, dtype=bool)
        new_run[1:] = (obj[1:] != obj[:-1]) | (snap[1:] - snap[:-1] != 1)
        starts = np.flatnonzero(new_run)
        ends = np.append(starts[1:], snap.size) - 1
        n_obj = len(snaps.objects)
        counts = np.bincount(obj[starts], minlength=n_obj)
        return cls(
            n_objects=n_obj,
            n_snapshots=snaps.n_snapshots,
            step_ns=snaps.step_ns,
            first_index=snaps.first_index,
            group_snap=groups.snap,
            group_offsets=groups.offsets,
            group_objects=snaps.obj[groups.entries].astype(np.int64),
            run_first=snap[starts].astype(np.int64),
            run_last=snap[ends].astype(np.int64),
            run_bounds=np.concatenate([[0], np.cumsum(counts)]).astype(np.int64),
        )

    def runs(self, obj: int) -> tuple[np.ndarray, np.ndarray]:
        """Return the first and last snapshots of the presence runs of object ``obj``."""
        lo, hi = self.run_bounds[obj], self.run_bounds[obj + 1]
        return self.run_first[lo:hi], self.run_last[lo:hi]

    @classmethod
    def joined(cls, parts: list[GroupTimeline]) -> GroupTimeline:
        """Return the timeline of consecutive time chunks, as if found in one piece.

        Groups are concatenated; presence runs that meet at a chunk edge are
        joined into one.

        Raises
        ------
        ValueError
            When the chunks are not consecutive or differ in their objects.
        """
        first = parts[0]
        for before, after in zip(parts[:-1], parts[1:], strict=True):
            if after.first_index != before.first_index + before.n_snapshots:
                raise ValueError("timelines must cover consecutive spans of snapshots, in order")
            if after.n_objects != first.n_objects or after.step_ns != first.step_ns:
                raise ValueError("timelines must share their objects and step")
        shift = [p.first_index - first.first_index for p in parts]
        sizes = [np.diff(p.group_offsets) for p in parts]
        run_obj = np.concatenate([np.repeat(np.arange(p.n_objects), np.diff(p.run_bounds))
                                  for p in parts])  # fmt: skip
        run_first = np.concatenate([p.run_first + s for p, s in zip(parts, shift, strict=True)])
        run_last = np.concatenate([p.run_last + s for p, s in zip(parts, shift, strict=True)])
        order = np.lexsort((run_first, run_obj))
        run_obj, run_first, run_last = run_obj[order], run_first[order], run_last[order]
        # a run that ends on a chunk's last snapshot goes on if the next chunk starts with one
        goes_on = (run_obj[1:] == run_obj[:-1]) & (run_first[1:] == run_last[:-1] + 1)
        keep_first = np.r_[True, ~goes_on]
        keep_last = np.r_[~goes_on, True]
        counts = np.bincount(run_obj[keep_first], minlength=first.n_objects)
        return cls(
            n_objects=first.n_objects,
            n_snapshots=sum(p.n_snapshots for p in parts),
            step_ns=first.step_ns,
            first_index=first.first_index,
            group_snap=np.concatenate([p.group_snap + s for p, s in zip(parts, shift,
                                                                          strict=True)]),
            group_offsets=np.concatenate([[0], np.cumsum(np.concatenate(sizes))]).astype(np.int64),
            group_objects=np.concatenate([p.group_objects for p in parts]),
            run_first=run_first[keep_first],
            run_last=run_last[keep_last],
            run_bounds=np.concatenate([[0], np.cumsum(counts)]).astype(np.int64),
        )  # fmt: skip


def linked_pairs(pairs: NeighbourPairs, motion: Motion, params: GroupParams) -> NeighbourPairs:
    """Return the neighbour pairs that also satisfy the motion predicates.

    Parameters
    ----------
    pairs : NeighbourPairs
        Pairs within ``params.radius``.
    motion : Motion
        Velocity of every entry.
    params : GroupParams
        Predicate settings.

    Returns
    -------
    NeighbourPairs
        The linked pairs (a subset of ``pairs``, same order).
    """
    i, j = pairs.i, pairs.j
    xi, yi, xj, yj = motion.vx[i], motion.vy[i], motion.vx[j], motion.vy[j]
    si, sj = motion.speed[i], motion.speed[j]
    with np.errstate(invalid="ignore"):
        moving = (si > params.min_speed) & (sj > params.min_speed)
    keep = np.ones(i.size, dtype=bool)
    if params.max_heading is not None:
        # the angle between the velocities, in [0, pi], from their cross and dot products
        diff = np.arctan2(np.abs(xi * yj - yi * xj), xi * xj + yi * yj)
        keep &= ~moving | (np.degrees(diff) <= params.max_heading + 1e-9)
    if params.max_speed_ratio is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.maximum(si, sj) / np.minimum(si, sj)
        keep &= ~moving | (ratio <= params.max_speed_ratio * (1 + 1e-12))
    return NeighbourPairs(i[keep], j[keep], pairs.radius)


def _components(n: int, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    graph = coo_matrix((np.ones(i.size, dtype=np.int8), (i, j)), shape=(n, n))
    return connected_components(graph, directed=False)[1]


def _table(snaps: Snapshots, member: np.ndarray, label: np.ndarray) -> SnapshotGroups:
    """Return groups from (entry, label) rows, dropping groups of a single entry."""
    if label.size:  # single entries first: most entries are alone, and sorting costs
        shared = np.bincount(label)[label] >= 2
        member, label = member[shared], label[shared]
    # every member of a group is in one snapshot, so the entry's snapshot orders groups
    order = np.lexsort((member, label, snaps.snap[member]))
    member, label = member[order], label[order]
    first = np.ones(label.size, dtype=bool)
    first[1:] = label[1:] != label[:-1]
    starts = np.flatnonzero(first)
    sizes = np.diff(np.append(starts, label.size))
    big = sizes >= 2
    member = member[np.repeat(big, sizes)]
    sizes = sizes[big]
    offsets = np.append(0, np.cumsum(sizes)).astype(np.int64)
    return SnapshotGroups(
        snap=snaps.snap[member[offsets[:-1]]].astype(np.int64),
        offsets=offsets,
        entries=member.astype(np.int64),
    )


def snapshot_groups(snaps: Snapshots, links: NeighbourPairs, params: GroupParams) -> SnapshotGroups:
    """Return the groups of linked objects at every snapshot.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    links : NeighbourPairs
        Linked pairs (see :func:`linked_pairs`).
    params : GroupParams
        ``mode`` and ``min_members``.

    Returns
    -------
    SnapshotGroups
        Groups of two or more entries. In ``"component"`` and ``"dbscan"``
        modes an entry is in at most one group; in ``"clique"`` mode in every
        maximal clique it belongs to.

    Notes
    -----
    Components and DBSCAN clusters of all snapshots come from one call of
    ``scipy.sparse.csgraph.connected_components`` on the links of every
    snapshot at once (links never cross snapshots). Maximal cliques: a
    component whose every two members are linked is its own maximal clique;
    only the other components are searched with ``networkx.find_cliques``
    (Bron–Kerbosch), one call per such component.

    References
    ----------
    .. [1] M. Ester, H.-P. Kriegel, J. Sander, X. Xu, "A density-based
       algorithm for discovering clusters in large spatial databases with
       noise", KDD 1996. (from memory, not checked)
    .. [2] H. Jeung, M. L. Yiu, X. Zhou, C. S. Jensen, H. T. Shen, "Discovery
       of convoys in trajectory databases", PVLDB 1(1), 2008. (from memory, not checked)
    .. [3] C. Bron, J. Kerbosch, "Algorithm 457: finding all cliques of an
       undirected graph", Communications of the ACM 16(9), 1973. (from memory, not checked)
    """
    n = snaps.n_entries
    i, j = links.i, links.j
    if params.mode == "dbscan":
        degree = np.bincount(i, minlength=n) + np.bincount(j, minlength=n)
        core = degree + 1 >= params.min_members
        both = core[i] & core[j]
        label = _components(n, i[both], j[both])
        # a border entry joins the group of its linked core with the smallest index
        border_i = core[j] & ~core[i]
        border_j = core[i] & ~core[j]
        b_entry = np.concatenate([i[border_i], j[border_j]])
        b_core = np.concatenate([j[border_i], i[border_j]])
        order = np.lexsort((b_core, b_entry))
        b_entry, b_core = b_entry[order], b_core[order]
        first = np.ones(b_entry.size, dtype=bool)
        first[1:] = b_entry[1:] != b_entry[:-1]
        assigned = np.full(n, -1, dtype=np.int64)
        assigned[core] = label[core]
        assigned[b_entry[first]] = label[b_core[first]]
        member = np.flatnonzero(assigned >= 0)
        return _table(snaps, member, assigned[member])
    label = _components(n, i, j)
    if params.mode == "component":
        return _table(snaps, np.arange(n), label)
    return _maximal_cliques(snaps, links, label)


def _maximal_cliques(snaps: Snapshots, links: NeighbourPairs, label: np.ndarray) -> SnapshotGroups:
    import networkx as nx

    n = snaps.n_entries
    size = np.bincount(label, minlength=label.max() + 1 if n else 0)
    edges = np.bincount(label[links.i], minlength=size.size)
    complete = edges == size * (size - 1) // 2
    whole = complete[label] & (size[label] >= 2)
    member = [np.flatnonzero(whole)]
    group = [label[whole]]
    next_label = int(size.size)
    # components that are not cliques: usually few; search each one on its own
    open_comp = np.flatnonzero(~complete & (size >= 3))
    if open_comp.size:
        in_open = np.isin(label[links.i], open_comp)
        sub_i, sub_j = links.i[in_open], links.j[in_open]
        comp_of_edge = label[sub_i]
        order = np.argsort(comp_of_edge, kind="stable")
        sub_i, sub_j, comp_of_edge = sub_i[order], sub_j[order], comp_of_edge[order]
        bounds = np.searchsorted(comp_of_edge, np.append(open_comp, open_comp[-1] + 1))
        for c in range(open_comp.size):  # per component that is not already a clique
            lo, hi = bounds[c], bounds[c + 1]
            graph = nx.Graph()
            graph.add_edges_from(zip(sub_i[lo:hi].tolist(), sub_j[lo:hi].tolist(), strict=True))
            for clique in nx.find_cliques(graph):
                member.append(np.asarray(clique, dtype=np.int64))
                group.append(np.full(len(clique), next_label, dtype=np.int64))
                next_label += 1
    return _table(snaps, np.concatenate(member), np.concatenate(group))
