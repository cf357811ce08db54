"""Episodes: sets of objects that stay grouped over time, with their splits and merges.

An *episode* is a set S of at least ``min_size`` objects and a time span such
that at every snapshot of the span all of S lie in one group (see
:mod:`comove.groups.grouping`), except for separations no longer than ``tolerance``
seconds, and whose members are together for at least ``min_together_time``
seconds in all: a tolerated separation does not break an episode, but it does
not count as time together either. A member with no data at a snapshot (a
missed fix beyond the interpolation gap) is not taken to have left: while its
absence lasts no longer than ``tolerance``, and if it was with the others at
its last fix, the others being grouped is enough. The episode's end is the
last snapshot at which every member has data. Only maximal episodes are
reported: none whose members and time span are both contained in another
episode's. With DBSCAN groups this is a convoy (Jeung et al. 2008);
with ``tolerance > 0`` short separations do not break it, in the spirit of
the evolving and gathering variants of convoy discovery.

The search follows the candidate-intersection scheme of convoy discovery:
live candidates are intersected with the groups of each snapshot, a subset
that stays together inherits its parent's start, and a candidate closes once
it has been separated for longer than the tolerance. Because group structure
changes much less often than snapshots tick (at 25 Hz, most consecutive
snapshots have identical groups), snapshots with the same groups are first
merged into *spans* with one vectorised hashing pass (a span also ends where
an object appears, disappears or has been missing longer than the tolerance),
and the scheme runs per span rather than per snapshot. Within a span, only the
candidates whose group changed are looked at: in a fleet, where some group
changes somewhere at almost every snapshot, most groups carry on unchanged.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from functools import lru_cache
from itertools import chain
from typing import ClassVar

import numpy as np

from comove.errors import bad_setting
from comove.groups.grouping import GroupTimeline

MEMBER_SEP = ";"

#: Live candidates above which dominated ones are pruned during the search.
PRUNE_ABOVE = 64

#: After a pruning, the next waits until the live candidates have grown this many
#: times over what it kept: where little is dominated (a fleet's hundreds of separate
#: small groups), pruning every span would cost more than it saves.
PRUNE_GROWTH = 2

#: Spans with remembered "together" answers above which the stale ones are dropped.
FORGET_ABOVE = 256

#: Groups in a span above which a candidate is tested only against the groups that
#: hold one of its members, found through an object -> group index of the span.
INDEX_GROUPS_ABOVE = 16

#: Spans whose object -> group index is kept (the current one and a few looked back at).
OWNER_SPANS = 8

# flags of a live candidate (see find_episodes)
GAPPED = 1
EXCUSED = 2
UNSURE = 4


@dataclass(frozen=True)
class EpisodeParams:
    """Settings of episode discovery.

    Parameters
    ----------
    min_size : int, default 2
        Least number of objects in an episode.
    min_together_time : float, default 0.0
        Least time in seconds for which an episode's members are together;
        tolerated separations do not count towards it.
    tolerance : float, default 0.0
        Longest separation in seconds that does not break an episode.
    """

    min_size: int = field(default=2, metadata={"help": "least number of objects in an episode"})
    min_together_time: float = field(
        default=0.0,
        metadata={
            "help": "least time together of an episode in seconds (together_s in "
            "episodes.csv; separations bridged by --tolerance do not count)"
        },
    )
    tolerance: float = field(
        default=0.0, metadata={"help": "longest separation in seconds that does not break one"}
    )

    #: Former names of settings, still read for one release.
    FORMER_NAMES: ClassVar[dict[str, str]] = {"min_duration": "min_together_time"}

    def __post_init__(self) -> None:
        if int(self.min_size) != self.min_size or self.min_size < 2:
            raise bad_setting("min_size", "must be a whole number of at least 2")
        if not (np.isfinite(self.min_together_time) and self.min_together_time >= 0):
            raise bad_setting("min_together_time", "must be zero or a positive number of seconds")
        if not (np.isfinite(self.tolerance) and self.tolerance >= 0):
            raise bad_setting("tolerance", "must be zero or a positive number of seconds")


@dataclass
class Episodes:
    """Maximal episodes as arrays (one row per episode, sorted by start).

    Attributes
    ----------
    members : list of ndarray of int
        Object codes of each episode, ascending.
    start, end : ndarray of int64
        First and last snapshot of each episode.
    together : ndarray of int64
        Snapshots of [start, end] at which the members are together (all but
        the tolerated separations).
    came_from, went_into : list of list of int
        Indices of the episodes each one was formed from (smaller episodes
        running when it began, whose members it contains) and split into
        (smaller episodes of its members still running after it ended).
    """

    members: list[np.ndarray]
    start: np.ndarray
    end: np.ndarray
    together: np.ndarray
    came_from: list[list[int]]
    went_into: list[list[int]]

    @property
    def n_episodes(self) -> int:
        """Return the number of episodes."""
        return int(self.start.size)


class _Timeline:
    """Spans of constant groups and presence, and which member sets are together when.

    A *span* is a maximal run of consecutive snapshots with identical groups and
    no presence change (an object appearing, disappearing, or being missing for
    longer than the tolerance), so that whether a set of objects is together is
    the same at every snapshot of a span. Member sets are Python ints used as
    bitmasks (bit o = object o): intersections, sizes and subset tests are then
    single integer operations, whatever the number of objects.
    """

    def __init__(self, line: GroupTimeline, min_size: int, tol_snaps: int):
        self.min_size = min_size
        self.tol = tol_snaps
        n_obj = line.n_objects
        self.n_obj = n_obj
        # each object's presence runs, for telling absence (no data) from separation
        self.runs = [line.runs(o) for o in range(n_obj)]
        events = _presence_changes(line, tol_snaps)
        self.first, self.last, first_group, group_hash = _spans(line, events)
        spans = _span_groups(line, self.first, first_group, group_hash, min_size)
        self._masks, self._bounds, self.group_span, self.group_words = spans[:4]
        self._new, self._ended = spans[4:]
        if n_obj <= 63:
            self.presence = _presence_masks(line, self.first)
            self.presence_words = np.asarray(self.presence, dtype=np.uint64)
        else:
            self._cursor = _PresenceCursor(line)
            self.presence_words = None
        # together(members, k) per span, kept while a later span may look back at it
        self._memo: dict[int, dict[int, bool]] = {}
        # which group holds each object, for the last few spans asked (see groups_meeting)
        self._owners: dict[int, dict[int, int]] = {}

    def groups(self, k: int) -> list[int]:
        """Return the member bitmasks of the groups of at least ``min_size`` in span k."""
        return self._masks[self._bounds[k] : self._bounds[k + 1]]

    def new_groups(self, k: int) -> list[int]:
        """Return the groups of span k that were not groups of span k - 1 (all, for k = 0)."""
        new, bounds = self._new
        return new[bounds[k] : bounds[k + 1]]

    def ended_groups(self, k: int) -> list[int]:
        """Return the groups of span k - 1 that are not groups of span k (none, for k = 0)."""
        ended, bounds = self._ended
        return ended[bounds[k] : bounds[k + 1]]

    def groups_meeting(self, members: int, k: int) -> list[int]:
        """Return the groups of span k that hold a member of ``members``, in group order.

        With few groups in the span, all of them (testing each is cheaper than
        looking members up); with more than ``INDEX_GROUPS_ABOVE``, those found
        through each member's group, so that a fleet's thousands of groups are
        not all tested against every candidate.
        """
        groups = self.groups(k)
        if len(groups) <= INDEX_GROUPS_ABOVE:
            return groups
        owner = self._owner(k)
        found = {owner[o] for o in _bits(members) if o in owner}
        return [groups[g] for g in sorted(found)]

    def holding(self, members: int, k: int) -> int:
        """Return the group of span k that holds all of ``members``, or 0 if none does."""
        groups = self.groups(k)
        if len(groups) <= INDEX_GROUPS_ABOVE:
            for grp in groups:
                if members & grp == members:
                    return grp
            return 0
        # the group of its lowest member, if any, is the only one that can
        g = self._owner(k).get((members & -members).bit_length() - 1)
        if g is not None and members & groups[g] == members:
            return groups[g]
        return 0

    def _owner(self, k: int) -> dict[int, int]:
        """Return span k's object -> group index (of ``groups(k)``), for many groups."""
        owner = self._owners.get(k)
        if owner is None:
            if len(self._owners) >= OWNER_SPANS:  # the search looks back only a few spans
                del self._owners[next(iter(self._owners))]
            owner = self._owners[k] = {
                o: g for g, grp in enumerate(self.groups(k)) for o in _bits(grp)
            }
        return owner

    @property
    def n_spans(self) -> int:
        """Return the number of spans."""
        return int(self.first.size)

    def present(self, k: int) -> int:
        """Return the objects with data in span k as a bitmask."""
        if self.presence_words is not None:
            return self.presence[k]
        return self._cursor.at(int(self.first[k]))  # more than 63 objects

    def last_fix_span(self, obj: int, k: int) -> int:
        """Return the span of the last fix of ``obj``, or -1 unless it is missing in span k.

        Missing: no data in the span, for no longer than the tolerance.
        """
        a, b = int(self.first[k]), int(self.last[k])
        run_first, run_last = self.runs[obj]
        i = int(np.searchsorted(run_last, a))  # the first run that ends at a or later
        if i < run_first.size and run_first[i] <= b:
            return -1  # it has data in the span, so it is present
        if i == 0 or b - int(run_last[i - 1]) > self.tol:
            return -1
        return int(np.searchsorted(self.first, run_last[i - 1], side="right")) - 1

    def together(self, members: int, k: int) -> bool:
        """Tell whether ``members`` are together in span k.

        At least ``min_size`` of them lie in one group, and every other member is
        missing (no data, for no longer than the tolerance) and was together with
        the set at its last fix.
        """
        at_k = self._memo.setdefault(k, {})
        known = at_k.get(members)
        if known is not None:
            return known
        result = False
        for grp in self.groups_meeting(members, k):
            common = members & grp
            if common.bit_count() < self.min_size:
                continue
            if all(
                (j := self.last_fix_span(m, k)) >= 0 and self.together(members, j)
                for m in _bits(members & ~common)
            ):
                result = True
                break
        at_k[members] = result
        return result

    def forget_before(self, k: int) -> None:
        """Drop remembered answers for spans that no span from k on can look back at."""
        if len(self._memo) > FORGET_ABOVE:
            horizon = int(self.first[k]) - self.tol - 1
            for old in [j for j in self._memo if self.last[j] < horizon]:
                del self._memo[old]

    def with_missing(self, part: int, others: int, k: int) -> int:
        """Return ``part`` (together in span k) with its missing companions.

        Those are the members of ``others`` that are missing in span k and were
        together with the grown part at their last fix.
        """
        missing = {m: j for m in _bits(others) if (j := self.last_fix_span(m, k)) >= 0}
        while missing:  # drop those not together with the rest at their last fix
            grown = part
            for m in missing:
                grown |= 1 << m
            stay = {m: j for m, j in missing.items() if self.together(grown, j)}
            if len(stay) == len(missing):
                return grown
            missing = stay
        return part

    def last_present(self, members: int, seen: int) -> int:
        """Return the last snapshot up to ``seen`` at which every member has data (or -1)."""
        bits = _bits(members)
        t = seen
        while t >= 0:  # step back to each member's latest data until all agree
            latest = []
            for m in bits:
                run_first, run_last = self.runs[m]
                i = int(np.searchsorted(run_first, t, side="right")) - 1
                latest.append(min(t, int(run_last[i])) if i >= 0 else -1)
            earliest = min(latest)
            if earliest == t:
                return t
            t = earliest
        return -1

    def time_together(self, members: int, start: int, end: int) -> int:
        """Return the number of snapshots in [start, end] at which ``members`` are together."""
        k0 = int(np.searchsorted(self.first, start, side="right")) - 1
        k1 = int(np.searchsorted(self.first, end, side="right"))
        if self.group_words is None:  # more than 63 objects: span by span
            spans = np.asarray([k for k in range(k0, k1) if self.together(members, k)], int)
        else:
            # spans where a group holds every member, as whole-array tests; only spans
            # where a member has no data need the excusing rule
            g0, g1 = np.searchsorted(self.group_span, [k0, k1])
            word = np.uint64(members)
            hit = np.zeros(k1 - k0, dtype=bool)
            holds = (self.group_words[g0:g1] & word) == word
            hit[self.group_span[g0:g1][holds] - k0] = True
            lacking = (self.presence_words[k0:k1] & word) != word
            for j in np.flatnonzero(lacking & ~hit).tolist():  # spans with a member missing
                hit[j] = self.together(members, k0 + j)
            spans = np.flatnonzero(hit) + k0
        overlap = np.minimum(self.last[spans], end) - np.maximum(self.first[spans], start) + 1
        return int(overlap.sum())

    def run_start(self, members: int, k: int, lower: int) -> int:
        """Return where the run of togetherness of ``members`` that reaches span k began.

        ``members`` are together in span k; the run goes back through separations
        of at most the tolerance, but not before ``lower``.
        """
        start = int(self.first[k])
        for j in range(k - 1, -1, -1):  # per earlier span, back to a long separation
            if self.last[j] < lower:
                break
            if self.together(members, j):
                if start - int(self.last[j]) - 1 > self.tol:
                    break
                start = max(int(self.first[j]), lower)
            elif start - max(int(self.first[j]), lower) > self.tol:
                break
        return start


def _presence_changes(line: GroupTimeline, tol_snaps: int) -> np.ndarray:
    """Return the snapshots at which some object's presence or excuse changes.

    These are where an object appears, where it disappears (the first snapshot
    without data after a stretch with data), and where an absence grows longer
    than the tolerance (so the absent member is no longer excused).
    """
    out = np.concatenate([line.run_first, line.run_last + 1, line.run_last + tol_snaps + 1])
    return out[out < line.n_snapshots]


def _spans(
    line: GroupTimeline, events: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return (first snapshot, last snapshot, first group index) of each span, and group hashes.

    Spans end where the groups change or at ``events`` (see
    :func:`_presence_changes`). Group identity is tested with Zobrist hashing:
    each object draws a fixed random 64-bit key; a group's hash is the XOR of
    its members' keys and a snapshot's the wrapping sum of mixed group hashes,
    so equal group sets give equal hashes (a collision is ~2^-64 per
    comparison). The groups' own hashes are returned too (one per group of
    ``line``), for telling which groups carry on from one span to the next.
    """
    rng = np.random.default_rng(0x5EED)
    keys = rng.integers(1, 2**63 - 1, size=line.n_objects, dtype=np.int64).astype(np.uint64)
    n_snap = line.n_snapshots
    snap_hash = np.zeros(n_snap, dtype=np.uint64)
    group_hash = np.zeros(line.group_snap.size, dtype=np.uint64)
    if line.group_snap.size:
        obj_keys = keys[line.group_objects]
        group_hash = np.bitwise_xor.reduceat(obj_keys, line.group_offsets[:-1])
        # a multiply-xorshift mix, so that sums of group hashes do not cancel
        mixed = group_hash * np.uint64(0x9E3779B97F4A7C15)
        mixed ^= mixed >> np.uint64(29)
        with np.errstate(over="ignore"):
            np.add.at(snap_hash, line.group_snap, mixed)
    change = np.ones(n_snap, dtype=bool)
    change[1:] = snap_hash[1:] != snap_hash[:-1]
    change[events] = True
    first = np.flatnonzero(change)
    last = np.append(first[1:] - 1, n_snap - 1)
    first_group = np.searchsorted(line.group_snap, first, side="left")
    return first, last, first_group, group_hash


def _presence_masks(line: GroupTimeline, first: np.ndarray) -> list[int]:
    """Return, per span start, the objects with data as an int bitmask (63 objects at most)."""
    masks = np.zeros(first.size, dtype=np.uint64)
    for o in range(line.n_objects):  # per object: one search of its runs for every span
        run_first, run_last = line.runs(o)
        if run_first.size == 0:
            continue
        i = np.searchsorted(run_last, first)  # the first run that ends at the span or later
        inside = (i < run_first.size) & (run_first[np.minimum(i, run_first.size - 1)] <= first)
        masks[inside] |= np.uint64(1 << o)
    return masks.tolist()


class _PresenceCursor:
    """The objects with data at a snapshot, as an int bitmask, for any number of objects.

    Presence changes only where a run starts or ends, so the mask is kept at
    the last snapshot asked for and updated by the changes since; the search
    asks for span starts in increasing order.
    """

    def __init__(self, line: GroupTimeline) -> None:
        owner = np.repeat(np.arange(line.n_objects), np.diff(line.run_bounds))
        when = np.concatenate([line.run_first, line.run_last + 1])
        order = np.argsort(when, kind="stable")
        self.when = when[order]
        self.who = np.concatenate([owner, owner])[order].tolist()
        self.t = -1
        self.done = 0
        self.mask = 0

    def at(self, t: int) -> int:
        """Return the bitmask of the objects with data at snapshot ``t``."""
        if t < self.t:
            self.t, self.done, self.mask = -1, 0, 0
        upto = int(np.searchsorted(self.when, t, side="right"))
        for o in self.who[self.done : upto]:  # each run's start and end, once
            self.mask ^= 1 << o
        self.t, self.done = t, upto
        return self.mask


def _span_groups(
    line: GroupTimeline,
    first: np.ndarray,
    first_group: np.ndarray,
    group_hash: np.ndarray,
    min_size: int,
) -> tuple[
    list[int], list[int], np.ndarray, np.ndarray | None,
    tuple[list[int], list[int]], tuple[list[int], list[int]],
]:  # fmt: skip
    """Return the groups of at least ``min_size`` members at each span start.

    Returns
    -------
    masks : list of int
        The member bitmasks of those groups, span after span.
    bounds : list of int
        Span k's groups are ``masks[bounds[k]:bounds[k + 1]]``.
    span_of : ndarray of int64
        The span of each of those groups, in order (ascending).
    words : ndarray of uint64 or None
        The same bitmasks as one array, when objects fit in 63 bits.
    new, ended : (list of int, list of int)
        The groups of each span that the span before did not have, and those
        of the span before that it does not have, as (masks, bounds) like
        ``masks`` and ``bounds``. A group carried on from span to span is one
        int object, built once: at fleet scale most groups carry on, and each
        mask of thousands of objects takes a kilobyte.
    """
    n_spans = first.size
    count = np.searchsorted(line.group_snap, first, side="right") - first_group
    total = int(count.sum())
    # the group indices of every span, in order: first_group[k] + 0, 1, ..., count[k] - 1
    start_at = np.repeat(np.cumsum(count) - count, count)
    idx = np.arange(total) - start_at + np.repeat(first_group, count)
    span_of = np.repeat(np.arange(n_spans), count)
    big = np.diff(line.group_offsets)[idx] >= min_size
    idx, span_of = idx[big], span_of[big]
    # the same group in consecutive spans: equal hashes in spans k - 1 and k
    order = np.lexsort((span_of, group_hash[idx]))
    h, sp = group_hash[idx][order], span_of[order]
    carried = (h[1:] == h[:-1]) & (sp[1:] == sp[:-1] + 1)
    is_new = np.ones(idx.size, dtype=bool)
    is_new[order[1:][carried]] = False
    ends = np.ones(idx.size, dtype=bool)
    ends[order[:-1][carried]] = False
    # each group's first appearance in its run of consecutive spans, where its mask is built
    starts_run = np.concatenate([[True], ~carried]) if idx.size else np.zeros(0, dtype=bool)
    first_of = np.empty(idx.size, dtype=np.int64)
    first_of[order] = order[np.flatnonzero(starts_run)][np.cumsum(starts_run) - 1]
    built = _group_masks(line.group_objects, line.group_offsets, line.n_objects, idx[is_new])
    slot = np.cumsum(is_new) - 1  # the built mask of each first appearance
    masks = [built[j] for j in slot[first_of].tolist()]
    bounds = np.searchsorted(span_of, np.arange(n_spans + 1)).tolist()
    words = np.asarray(masks, dtype=np.uint64) if line.n_objects <= 63 else None
    new_at = np.flatnonzero(is_new)
    new = ([masks[i] for i in new_at.tolist()],
           np.searchsorted(span_of[new_at], np.arange(n_spans + 1)).tolist())  # fmt: skip
    ended_at = np.flatnonzero(ends)  # ended with span k: listed at span k + 1
    ended = ([masks[i] for i in ended_at.tolist()],
             np.searchsorted(span_of[ended_at] + 1, np.arange(n_spans + 1)).tolist())  # fmt: skip
    return masks, bounds, span_of, words, new, ended


def find_episodes(timeline: GroupTimeline, params: EpisodeParams) -> Episodes:
    """Return the maximal episodes of objects that stay grouped.

    Parameters
    ----------
    timeline : GroupTimeline
        Groups at every snapshot and each object's presence, of a whole run or
        of consecutive chunks joined (:meth:`GroupTimeline.joined`).
    params : EpisodeParams
        Size, duration and tolerance.

    Returns
    -------
    Episodes

    Notes
    -----
    A set is *together* at a snapshot when at least ``min_size`` of its
    members lie in one group and every other member is *missing*: it has no
    data there, has had none for no longer than the tolerance, and was
    together with the set at its last fix. Runs of together snapshots joined
    across separations of at most the tolerance are episodes; only the
    snapshots at which the set is together count towards ``min_together_time``.
    The result equals a brute-force search that tries every set of objects at
    every snapshot (``tests/scenes.py``).

    The search is the candidate-intersection scheme of convoy discovery, run
    per span of constant groups and presence rather than per snapshot: live
    candidates are intersected with each span's groups, a part that stays
    together inherits its set's start (and its missing members, when they were
    with it at their last fix), and a candidate closes once it has been apart
    for longer than the tolerance. A candidate held whole by a group is looked
    at again only when that group changes, so time is proportional to the
    candidates whose groups change, span by span, with candidates as integer
    bitmasks; a candidate whose time together is not known from its own history
    (a part of a set that was once apart) is recounted when it closes, span by
    span, as whole-array tests when objects fit in 63 bits.

    Examples
    --------
    Objects 0 and 1 grouped at snapshots 0-5, then 0 alone with data:

    >>> import numpy as np
    >>> from comove.groups.grouping import GroupTimeline
    >>> line = GroupTimeline(
    ...     n_objects=2, n_snapshots=8, step_ns=10**9, first_index=0,
    ...     group_snap=np.arange(6), group_offsets=np.arange(0, 13, 2),
    ...     group_objects=np.tile([0, 1], 6), run_first=np.array([0, 0]),
    ...     run_last=np.array([7, 7]), run_bounds=np.array([0, 1, 2]))
    >>> found = find_episodes(line, EpisodeParams(min_together_time=3))
    >>> [m.tolist() for m in found.members], found.start.tolist(), found.end.tolist()
    ([[0, 1]], [0], [5])

    References
    ----------
    .. [1] H. Jeung, M. L. Yiu, X. Zhou, C. S. Jensen, H. T. Shen, "Discovery
       of convoys in trajectory databases", PVLDB 1(1), 2008. (from memory, not checked)
    .. [2] K. Zheng, Y. Zheng, N. J. Yuan, S. Shang, X. Zhou, "Online discovery
       of gathering patterns over trajectories", IEEE TKDE 26(8), 2014. (from memory, not checked)
    .. [3] A. L. Zobrist, "A new hashing method with application for game
       playing", Technical Report 88, University of Wisconsin, 1970. (from memory, not checked)
    """
    step = timeline.step_s
    tol_snaps = int(np.floor(params.tolerance / step + 1e-9))
    min_snaps = max(1, int(np.ceil(params.min_together_time / step - 1e-9)))
    min_size = int(params.min_size)
    line = _Timeline(timeline, min_size, tol_snaps)

    search = _Search(line, min_size, min_snaps, tol_snaps)
    for k in range(line.n_spans):  # per span of constant groups, not per snapshot
        search.span(k)
        line.forget_before(k)
    search.close_all()
    return _maximal(search.closed, tol_snaps)


class _Search:
    """The candidate-intersection search over spans (see :func:`find_episodes`).

    Live candidates map members -> [start, last snapshot seen together, flags,
    snapshots together in [start, seen]]. Flags: GAPPED, the set was not
    together at every snapshot since its start (a tolerated separation, or
    missing members excused); EXCUSED, missing members were excused, so a part
    of the set was not necessarily together whenever the set was and a part's
    own run must be looked up; UNSURE, the count is only a lower bound (a part
    of a gapped set may have been together while the set was apart) and is
    recounted when the candidate closes.

    A candidate that one group held whole at the last span it was looked at is
    *quiet*: while that group carries on unchanged, the candidate stays whole
    and only its sighting and count grow, so it is looked at again only when
    the group ends (its record is brought up to date then, or when another way
    reaches the same set). At fleet scale most groups carry on from span to
    span, so each span looks at the few candidates whose groups changed rather
    than at every live one. The others (apart for a tolerated while, or
    together only by excusing missing members) are *restless* and looked at
    every span.
    """

    def __init__(self, line: _Timeline, min_size: int, min_snaps: int, tol_snaps: int) -> None:
        self.line = line
        self.min_size = min_size
        self.min_snaps = min_snaps
        self.tol = tol_snaps
        self.closed: list[tuple[frozenset, int, int, int]] = []
        self.prune_at = PRUNE_ABOVE
        self.live: dict[int, list[int]] = {}
        self.holder: dict[int, int] = {}  # quiet candidate -> the group that holds it
        self.held: dict[int, list[int]] = {}  # group -> candidates it held (some since moved)
        self.restless: list[int] = []
        # candidates that became live in this span -> the group that holds them (or 0)
        self.fresh: dict[int, int] = {}
        self.b = -1  # the last snapshot of the span being searched

    def close(self, members: int, start: int, seen: int, flags: int, count: int) -> None:
        """Record a candidate that has ended, if it lasts long enough."""
        line = self.line
        end = line.last_present(members, seen)
        if end - start + 1 < self.min_snaps:
            return
        if flags & UNSURE:
            count = line.time_together(members, start, end)
        elif end < seen:  # the last snapshots lacked a member's data: not in the span
            count -= line.time_together(members, end + 1, seen)
        if count >= self.min_snaps:
            self.closed.append((frozenset(_bits(members)), start, end, count))

    def close_all(self) -> None:
        """Close every live candidate (after the last span)."""
        self._catch_up()
        for members, (start, seen, flags, count) in self.live.items():
            self.close(members, start, seen, flags, count)

    def span(self, k: int) -> None:
        """Carry the live candidates through span k."""
        line, min_size, live, holder = self.line, self.min_size, self.live, self.holder
        a, b = int(line.first[k]), int(line.last[k])
        n_k = b - a + 1
        # the candidates to look at: those whose group ended with the span before
        # (whole through it: brought up to date there), and the restless ones
        todo = []
        for grp in line.ended_groups(k):
            for members in self.held.pop(grp, ()):
                if holder.get(members) == grp:
                    del holder[members]
                    record = live.pop(members)
                    record[3] += a - 1 - record[1]
                    record[1] = a - 1
                    todo.append((members, record))
        todo.extend((members, live.pop(members)) for members in self.restless)
        self.restless = []
        self.b = b
        for members, record in todo:
            grp = line.holding(members, k)
            if grp:
                start, _, flags, count = record
                self._offer(members, start, b, flags, count + n_k, grp)
            else:  # no group holds the whole set
                parts = []
                for grp in line.groups_meeting(members, k):
                    common = members & grp
                    if common.bit_count() >= min_size:
                        parts.append((common, grp))
                self._not_whole(members, record, parts, k)
        for grp in line.new_groups(k):  # a group carried on is a quiet candidate already
            self._offer(grp, a, b, 0, n_k, grp)
        for members, grp in self.fresh.items():  # quiet or restless from now on
            if grp:
                holder[members] = grp
                self.held.setdefault(grp, []).append(members)
            else:
                self.restless.append(members)
        self.fresh = {}
        # Candidates contained in another that started no later, is seen as late and
        # was together throughout can go: the final maximality filter would remove them
        # anyway. Only pruned when many are live, and again only once they have grown
        # well past what the last pruning kept.
        if len(live) > self.prune_at:
            self._prune()

    def _offer(
        self, members: int, start: int, seen: int, flags: int, count: int, grp: int = 0
    ) -> None:
        """Add a candidate, merging it with the same set reached another way.

        ``grp`` is the group of this span that holds the set whole, if one does
        (a set together only by excusing missing members, or apart, has none).
        """
        held = self.live.get(members)
        if held is None:
            self.live[members] = [start, seen, flags, count]
            self.fresh[members] = grp
            return
        if members in self.holder:  # quiet: whole up to the end of this span
            held[3] += self.b - held[1]
            held[1] = self.b
        _merge(held, start, seen, flags, count)

    def _catch_up(self) -> None:
        """Bring every quiet candidate's record up to the end of the current span."""
        b, live = self.b, self.live
        for members in self.holder:
            record = live[members]
            record[3] += b - record[1]
            record[1] = b

    def _prune(self) -> None:
        """Drop dominated candidates (see :func:`_prune_dominated`)."""
        self._catch_up()
        kept = _prune_dominated(self.live)
        if len(kept) < len(self.live):
            for members in self.live.keys() - kept.keys():
                self.holder.pop(members, None)
            self.restless = [m for m in self.restless if m in kept]
        self.live = kept
        self.prune_at = max(PRUNE_ABOVE, PRUNE_GROWTH * len(kept))

    def _not_whole(
        self, members: int, record: list[int], parts: list[tuple[int, int]], k: int
    ) -> None:
        """Carry on a candidate no group of span k holds whole: excused, split, or apart.

        ``parts`` are its (members, group) of at least ``min_size`` in one group.
        """
        line = self.line
        start, seen, flags, count = record
        b = int(line.last[k])
        n_k = b - int(line.first[k]) + 1
        whole = False
        missing = members & ~line.present(k) if parts else 0
        if missing and line.together(members, k):  # by excusing missing members
            whole = True
            self._offer(members, start, b, flags | GAPPED | EXCUSED, count + n_k)
        # The parts still together (when the set is together by excusing missing
        # members, its present part, which may outlast the whole set's end). A part was
        # together whenever the set was; more often if the set was ever apart.
        part_flags = flags | UNSURE if flags & GAPPED else flags
        for common, grp in parts:
            if flags & EXCUSED:  # not even whenever the set was: look its run up
                run = line.run_start(common, k, start)
                self._offer(common, run, b, part_flags | UNSURE, 0, grp)
            else:
                self._offer(common, start, b, part_flags, count + n_k, grp)
            if not whole and missing:  # and the part with its missing members
                grown = line.with_missing(common, missing, k)
                if grown != common:
                    run = line.run_start(grown, k, start)
                    self._offer(grown, run, b, part_flags | GAPPED | EXCUSED | UNSURE, 0)
        if whole:
            return
        # apart for this whole span (nothing changes within it)
        if b - seen <= self.tol:
            self._offer(members, start, seen, flags | GAPPED, count)
        else:
            self.close(members, start, seen, flags, count)


def _merge(held: list[int], start: int, seen: int, flags: int, count: int) -> None:
    """Merge a way of reaching a candidate into its record ``held`` (changed in place)."""
    if (start, seen) == (held[0], held[1]):  # two ways over the same stretch
        if held[2] & UNSURE and not flags & UNSURE:
            held[3] = count  # an exact count beats a lower bound
        elif (held[2] ^ flags) & UNSURE == 0:
            held[3] = max(held[3], count)
        held[2] &= flags  # either way's guarantee holds
        return
    # the set has been together since the earlier start; the way with the earlier start
    # (then the later sighting) carries the facts
    if start < held[0] or (start == held[0] and seen > held[1]):
        other_seen = held[1]
        held[:] = [start, seen, flags, count]
    else:
        other_seen = seen
    if other_seen > held[1]:  # together later than the carrying way knew
        held[1] = other_seen
        held[2] |= GAPPED | UNSURE


@lru_cache(maxsize=1 << 16)
def _bits(mask: int) -> tuple[int, ...]:
    """Return the positions of the set bits of ``mask``, ascending.

    Remembered for the most recent masks: live candidates and groups are asked
    for again span after span, and with thousands of objects each step below
    works on integers of thousands of bits.
    """
    out = []
    while mask:
        low = mask & -mask
        out.append(low.bit_length() - 1)
        mask ^= low
    return tuple(out)


def _group_masks(
    member_obj: np.ndarray, offsets: np.ndarray, n_obj: int, which: np.ndarray
) -> list[int]:
    """Return the members of groups ``which`` as int bitmasks (bit o = object o)."""
    if which.size == 0:
        return []
    if n_obj <= 63:  # one machine word per group: vectorised
        return _word_masks(member_obj, offsets[:-1])[which].tolist()
    # per group; only for more than 63 objects
    return [_mask(member_obj[offsets[g] : offsets[g + 1]]) for g in which.tolist()]


def _mask(objects: np.ndarray) -> int:
    """Return ``objects`` as an int bitmask (bit o = object o), whatever their number."""
    mask = 0
    for o in objects.tolist():
        mask |= 1 << o
    return mask


def _word_masks(objects: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Return the objects of each segment of ``objects`` (from ``starts``) as uint64 masks.

    For codes below 64 only; segments must be non-empty.
    """
    return np.bitwise_or.reduceat(np.left_shift(np.uint64(1), objects.astype(np.uint64)), starts)


def _prune_dominated(cands: dict[int, list]) -> dict[int, list]:
    """Return candidates not contained in another that is together throughout them.

    A candidate goes when another has all of its members, started no later, was
    seen as late and has not been apart since its start: the other then holds it
    over its whole time, with at least its time together.
    """
    if len(cands) < 2:
        return cands
    items = sorted(cands.items(), key=lambda kv: -kv[0].bit_count())
    kept: dict[int, list] = {}
    # a candidate that holds another holds its lowest member: look only at those
    holding: dict[int, list[tuple[int, list]]] = {}
    for members, record in items:
        start, seen = record[0], record[1]
        low = (members & -members).bit_length() - 1
        if any(
            members != other and members & other == members and o[0] <= start
            and o[1] >= seen and not o[2]
            for other, o in holding.get(low, ())
        ):  # fmt: skip
            continue
        kept[members] = record
        for m in _bits(members):
            holding.setdefault(m, []).append((members, record))
    return kept


def _overlaps(
    members: list[frozenset], n_obj: int, block: int = 4096
) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Yield (i, j, common) for the pairs of sets that share members: ``|members[i] & members[j]|``.

    A sparse (sets x objects) incidence matrix times its transpose, a block
    of rows at a time: memory follows the number of overlapping pairs, never
    sets x objects or sets x sets. Each block is sorted by i, then j.
    """
    from scipy.sparse import csr_matrix

    indptr = np.concatenate([[0], np.cumsum([len(m) for m in members])])
    indices = np.fromiter(chain.from_iterable(members), dtype=np.int64, count=int(indptr[-1]))
    incidence = csr_matrix(
        (np.ones(indices.size, dtype=np.int32), indices, indptr), shape=(len(members), n_obj)
    )
    by_object = incidence.T.tocsr()
    for lo in range(0, len(members), block):  # bounded memory: a block of rows at a time
        common = (incidence[lo : lo + block] @ by_object).tocoo()
        order = np.lexsort((common.col, common.row))
        yield common.row[order] + lo, common.col[order].astype(np.int64), common.data[order]


def _lists(owner: np.ndarray, item: np.ndarray, n: int) -> list[list[int]]:
    """Return for each owner 0..n-1 its items, given (owner, item) sorted by owner then item."""
    cuts = np.cumsum(np.bincount(owner, minlength=n))[:-1]
    return [part.tolist() for part in np.split(item, cuts)]


def _maximal(closed: list[tuple[frozenset, int, int, int]], tol_snaps: int) -> Episodes:
    """Return the closed candidates that no other contains, with splits and merges."""
    # (members, start, end) fixes the time together too, so duplicates are exact
    closed = sorted(set(closed), key=lambda e: (e[1], -len(e[0]), e[2], sorted(e[0])))
    if not closed:
        empty = np.empty(0, np.int64)
        return Episodes([], empty, empty.copy(), empty.copy(), [], [])
    sets = [m for m, _, _, _ in closed]
    n_obj = max(max(m) for m in sets) + 1
    size = np.array([len(m) for m in sets])
    start = np.array([c[1] for c in closed])
    end = np.array([c[2] for c in closed])
    together = np.array([c[3] for c in closed])
    contained = np.zeros(len(closed), dtype=bool)
    for i, j, common in _overlaps(sets, n_obj):
        # another candidate holds all of its members over at least its whole span
        inside = (common == size[i]) & (start[j] <= start[i]) & (end[j] >= end[i]) & (i != j)
        contained[i[inside]] = True  # i != j: not itself (duplicates were merged)
    keep = np.flatnonzero(~contained)
    sets = [sets[k] for k in keep]
    size, start, end, together = size[keep], start[keep], end[keep], together[keep]
    formed_pairs: list[tuple[np.ndarray, np.ndarray]] = []
    broke_pairs: list[tuple[np.ndarray, np.ndarray]] = []
    for e, f, common in _overlaps(sets, n_obj):
        # f is a smaller episode of members of e: common == |f| and |f| < |e|
        sub = (common == size[f]) & (size[f] < size[e])
        formed = sub & (start[f] < start[e]) & (start[e] <= end[f] + 1 + tol_snaps)  # f ran then
        broke = sub & (start[f] <= end[e]) & (end[e] < end[f])
        formed_pairs.append((e[formed], f[formed]))
        broke_pairs.append((e[broke], f[broke]))
    came_from = _lists(*(np.concatenate(c) for c in zip(*formed_pairs, strict=True)), len(sets))
    went_into = _lists(*(np.concatenate(c) for c in zip(*broke_pairs, strict=True)), len(sets))
    return Episodes(
        members=[np.asarray(sorted(m), dtype=np.int64) for m in sets],
        start=start.astype(np.int64),
        end=end.astype(np.int64),
        together=together.astype(np.int64),
        came_from=came_from,
        went_into=went_into,
    )
