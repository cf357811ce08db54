"""Role co-location per snapshot: row instances, participation ratio and index.

Definitions (for a set C of distinct roles and a snapshot t):

- a *row instance* of C at t is a set of |C| objects present at t, one of each
  role in C, pairwise within the radius (a clique of the neighbour graph);
- the *participation ratio* PR(C, f, t) is the share of the role-f objects
  present at t that belong to at least one row instance of C;
- the *participation index* PI(C, t) is the minimum of PR(C, f, t) over f in C;
- C is *prevalent at t* when PI(C, t) >= ``min_participation``.

PI is anti-monotone: a row instance of a superset contains a row instance of
every subset, so PR, PI and the set of prevalent snapshots can only shrink as C
grows. Candidates therefore grow level by level (Apriori) and a role set whose
number of prevalent snapshots is below a bound is never extended; the bound is
derived from the persistence thresholds so that the pruning loses nothing.
Row instances of size k are joined from those of size k-1 that share their
first k-2 objects, then checked for the one missing edge (the join-based
method).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from comove.errors import InputError, bad_setting
from comove.io.times import utc_iso
from comove.tracks.alignment import Snapshots, available_memory
from comove.tracks.neighbours import NeighbourPairs

#: Slack for comparing a ratio of counts with a decimal threshold (0.3 vs 3/10).
RATIO_EPS = 1e-9


@dataclass(frozen=True)
class ColocationParams:
    """Settings of the role co-location miner.

    Parameters
    ----------
    radius : float
        Neighbour distance in metres (inclusive).
    min_participation : float, default 0.5
        Participation-index threshold in (0, 1] for a role set to be prevalent at
        a snapshot.
    max_size : int, default 3
        Largest role set mined (at least 2).
    """

    radius: float = field(metadata={"help": "neighbour distance in metres (inclusive)"})
    min_participation: float = field(
        default=0.5,
        metadata={
            "help": "participation index at or above which a role set is prevalent "
            "at a snapshot, in (0, 1]"
        },
    )
    max_size: int = field(default=3, metadata={"help": "largest role set mined (>= 2)"})

    def __post_init__(self) -> None:
        if not (np.isfinite(self.radius) and self.radius > 0):
            raise bad_setting("radius", "must be a positive distance in metres")
        if not (0 < self.min_participation <= 1):
            raise bad_setting("min_participation", "must be in (0, 1]")
        if int(self.max_size) != self.max_size or self.max_size < 2:
            raise bad_setting("max_size", "must be a whole number of at least 2")


@dataclass
class LevelResult:
    """Per-snapshot co-location of the candidate role sets of one size.

    Attributes
    ----------
    roles : ndarray of int, shape (n_sets, k)
        Role codes of each candidate, ascending along each row.
    present : ndarray of int64
        Number of snapshots at which every role of the set has an object.
    prevalent : ndarray of int64
        Number of snapshots at which the set is prevalent.
    set_id, snap : ndarray of int64
        Sparse per-snapshot table: the (set, snapshot) pairs with at least one
        row instance, sorted by set then snapshot.
    pi : ndarray of float64
        Participation index of each (set, snapshot) row.
    pr : ndarray of float64, shape (n_rows, k)
        Participation ratio of each role (column order as in ``roles``).
    instances : ndarray of int64, shape (n_instances, k)
        Row instances as entry indices (ordered like the roles), kept for the
        next level's join; ``instance_set`` gives each one's set.
    """

    roles: np.ndarray
    present: np.ndarray
    prevalent: np.ndarray
    set_id: np.ndarray
    snap: np.ndarray
    pi: np.ndarray
    pr: np.ndarray
    instances: np.ndarray
    instance_set: np.ndarray

    @property
    def size(self) -> int:
        """Return the number of roles per set at this level."""
        return int(self.roles.shape[1])


def _unique(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the sorted distinct values of int64 ``keys`` and their counts.

    Sort-based: for the millions of int64 keys met here this is several times
    faster than ``numpy.unique``'s hash path.
    """
    return _runs(np.sort(keys))


def _runs(ordered: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the distinct values of the sorted array ``ordered`` and their counts."""
    first = np.ones(ordered.size, dtype=bool)
    first[1:] = ordered[1:] != ordered[:-1]
    starts = np.flatnonzero(first)
    return ordered[starts], np.diff(np.append(starts, ordered.size))


def encode_role_sets(roles: np.ndarray, n_roles: int) -> np.ndarray:
    """Return one int64 code per row of role codes (base ``n_roles`` digits)."""
    code = np.zeros(roles.shape[0], dtype=np.int64)
    for col in range(roles.shape[1]):
        code = code * n_roles + roles[:, col]
    return code


def _pairs_within_groups(group_start: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Return all index pairs (u, v), u < v, inside each run of equal group keys.

    ``group_start`` marks (True) the first element of every group in a sorted
    array of length ``n``.
    """
    starts = np.flatnonzero(group_start)
    ends = np.append(starts[1:], n)
    group_end = np.repeat(ends, ends - starts)  # exclusive end of each element's group
    partners = group_end - np.arange(n) - 1
    total = int(partners.sum())
    u = np.repeat(np.arange(n), partners)
    first_slot = np.cumsum(partners) - partners
    v = u + 1 + (np.arange(total) - first_slot[u])
    return u, v


class RolePresence:
    """Which snapshots each role is present at, as packed bits, for set counts."""

    def __init__(self, snaps: Snapshots) -> None:
        n_roles = len(snaps.roles)
        present = np.zeros((n_roles, snaps.n_snapshots), dtype=bool)
        present[snaps.role, snaps.snap] = True
        self.bits = np.packbits(present, axis=1)
        self.n_snapshots = snaps.n_snapshots

    @classmethod
    def joined(cls, parts: list[RolePresence]) -> RolePresence:
        """Return the presence of consecutive spans of snapshots, joined along time."""
        whole = cls.__new__(cls)
        present = np.hstack([np.unpackbits(p.bits, axis=1, count=p.n_snapshots) for p in parts])
        whole.bits = np.packbits(present, axis=1)
        whole.n_snapshots = sum(p.n_snapshots for p in parts)
        return whole

    def mask(self, roles: np.ndarray) -> np.ndarray:
        """Return packed bits of the snapshots where all ``roles`` are present."""
        return np.bitwise_and.reduce(self.bits[roles], axis=0)

    def count(self, role_sets: np.ndarray) -> np.ndarray:
        """Return, per row of role codes, the number of snapshots all are present."""
        out = np.empty(role_sets.shape[0], dtype=np.int64)
        for s, roles in enumerate(role_sets):  # per candidate set, not per snapshot
            out[s] = int(np.bitwise_count(self.mask(roles)).sum())
        return out

    def snapshots(self, roles: np.ndarray) -> np.ndarray:
        """Return the indices of snapshots where all ``roles`` are present."""
        bits = np.unpackbits(self.mask(roles), count=self.n_snapshots)
        return np.flatnonzero(bits)


class RoleCounts:
    """Number of present objects of each role at each snapshot (sparse lookup)."""

    def __init__(self, snaps: Snapshots) -> None:
        self.n_roles = len(snaps.roles)
        cells = snaps.n_snapshots * self.n_roles
        key = snaps.snap * self.n_roles + snaps.role
        # a dense table when it is no larger than the entries (few roles), else sorted keys
        self.dense = np.bincount(key, minlength=cells) if cells <= snaps.n_entries else None
        if self.dense is None:
            self.keys, self.counts = _unique(key)

    def lookup(self, snap: np.ndarray, role: np.ndarray) -> np.ndarray:
        """Return the count of role ``role`` at snapshot ``snap`` (elementwise)."""
        key = snap * self.n_roles + role
        if self.dense is not None:
            return self.dense[key]
        return self.counts[np.searchsorted(self.keys, key)]


def _level_from_instances(
    snaps: Snapshots,
    role_sets: np.ndarray,
    instances: np.ndarray,
    instance_set: np.ndarray,
    role_counts: RoleCounts,
    presence: RolePresence,
    min_participation: float,
) -> LevelResult:
    """Return the per-snapshot PR and PI of each set from its row instances."""
    n_sets, k = role_sets.shape
    n_entries = np.int64(max(snaps.n_entries, 1))
    n_snap = np.int64(max(snaps.n_snapshots, 1))
    keys = set_id = snap = np.empty(0, np.int64)
    pr = np.empty((0, k), dtype=np.float64)
    for col in range(k):  # per role position of the set, each a whole-array pass
        participant, _ = _unique(instance_set * n_entries + instances[:, col])
        p_set, p_entry = participant // n_entries, participant % n_entries
        # entries are in snapshot order, so these (set, snapshot) keys come out sorted:
        # each key's participants are one run, counted without another sort. Every
        # (set, snapshot) with an instance has participants at every position, so the
        # keys are the same at every position.
        p_key, n_part = _runs(p_set * n_snap + snaps.snap[p_entry])
        if col == 0:
            keys = p_key
            set_id, snap = keys // n_snap, keys % n_snap
            pr = np.empty((keys.size, k), dtype=np.float64)
        n_role = role_counts.lookup(snap, role_sets[set_id, col])
        pr[:, col] = n_part / n_role
    pi = pr.min(axis=1)
    prevalent_row = pi >= min_participation - RATIO_EPS
    prevalent = np.bincount(set_id[prevalent_row], minlength=n_sets).astype(np.int64)
    return LevelResult(
        roles=role_sets,
        present=presence.count(role_sets),
        prevalent=prevalent,
        set_id=set_id,
        snap=snap,
        pi=pi,
        pr=pr,
        instances=instances,
        instance_set=instance_set,
    )


def _pair_level(
    snaps: Snapshots, pairs: NeighbourPairs
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return size-2 role sets and their row instances (edges between roles)."""
    ri, rj = snaps.role[pairs.i], snaps.role[pairs.j]
    mixed = ri != rj
    i, j, ri, rj = pairs.i[mixed], pairs.j[mixed], ri[mixed], rj[mixed]
    swap = ri > rj
    lo = np.where(swap, j, i)
    hi = np.where(swap, i, j)
    roles = np.column_stack([np.minimum(ri, rj), np.maximum(ri, rj)]).astype(np.int64)
    n_roles = len(snaps.roles)
    code = encode_role_sets(roles, n_roles)
    if n_roles * n_roles <= max(code.size, 1):  # few roles: distinct codes by a dense count
        seen = np.bincount(code, minlength=n_roles * n_roles) > 0
        codes = np.flatnonzero(seen)
        instance_set = (np.cumsum(seen) - 1)[code]
    else:
        codes, instance_set = np.unique(code, return_inverse=True)
    role_sets = np.column_stack([codes // n_roles, codes % n_roles]).astype(np.int64)
    return role_sets, np.column_stack([lo, hi]).astype(np.int64), instance_set.astype(np.int64)


def apriori_candidates(
    prev_roles: np.ndarray,
    keep: np.ndarray,
    size_setting: str = "--max-size",
    threshold_setting: str = "--min-participation",
) -> np.ndarray:
    """Return the size-k candidates all of whose (k-1)-subsets are kept (Apriori-gen).

    ``size_setting`` and ``threshold_setting`` name the options the error
    below suggests.

    Raises
    ------
    InputError
        When the joins would try more than ``MAX_CANDIDATES`` sets (many roles
        all prevalent together): their number is counted before any is made.
    """
    kept = [tuple(int(r) for r in row) for row in prev_roles[keep]]
    kept_set = set(kept)
    by_prefix: dict[tuple[int, ...], list[int]] = {}
    for row in kept:
        by_prefix.setdefault(row[:-1], []).append(row[-1])
    joins = sum(len(lasts) * (len(lasts) - 1) // 2 for lasts in by_prefix.values())
    if joins > MAX_CANDIDATES:
        k = prev_roles.shape[1] + 1
        roles = len({r for row in kept for r in row})
        raise InputError(
            f"{len(kept):,} role sets of size {k - 1} among {roles:,} roles are prevalent, "
            f"which makes {joins:,} candidate sets of size {k} to try; give {size_setting} "
            f"{k - 1} or less, or a higher {threshold_setting}"
        )
    out = []
    for prefix, lasts in by_prefix.items():
        lasts.sort()
        for a in range(len(lasts)):
            for b in range(a + 1, len(lasts)):
                cand = (*prefix, lasts[a], lasts[b])
                if all(cand[:d] + cand[d + 1 :] in kept_set for d in range(len(cand) - 2)):
                    out.append(cand)
    k = prev_roles.shape[1] + 1
    return np.asarray(sorted(out), dtype=np.int64).reshape(-1, k)


def _join_instances(
    snaps: Snapshots,
    prev: LevelResult,
    keep: np.ndarray,
    candidates: np.ndarray,
    edge_keys: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Return row instances of ``candidates`` joined from the previous level's."""
    k = candidates.shape[1]
    n_roles = len(snaps.roles)
    n_entries = np.int64(snaps.n_entries)
    use = keep[prev.instance_set]
    inst = prev.instances[use]
    if inst.shape[0] == 0 or candidates.shape[0] == 0:
        return np.empty((0, k), np.int64), np.empty(0, np.int64)
    last_role = snaps.role[inst[:, -1]]
    # sort by shared prefix entries, then by the role of the last entry
    order = np.lexsort((last_role, *[inst[:, c] for c in range(k - 3, -1, -1)]))
    inst, last_role = inst[order], last_role[order]
    prefix = inst[:, : k - 2]
    new_group = np.ones(inst.shape[0], dtype=bool)
    new_group[1:] = np.any(prefix[1:] != prefix[:-1], axis=1)
    _check_joins(snaps, inst, new_group, k)
    u, v = _pairs_within_groups(new_group, inst.shape[0])
    distinct = last_role[u] < last_role[v]
    u, v = u[distinct], v[distinct]
    a, b = inst[u, -1], inst[v, -1]
    edge = np.minimum(a, b) * n_entries + np.maximum(a, b)
    pos = np.searchsorted(edge_keys, edge)
    linked = (pos < edge_keys.size) & (edge_keys[np.minimum(pos, edge_keys.size - 1)] == edge)
    u, v = u[linked], v[linked]
    rows = np.column_stack([inst[u], inst[v, -1]])
    roles = snaps.role[rows].astype(np.int64)
    cand_codes = encode_role_sets(candidates, n_roles)
    codes = encode_role_sets(roles, n_roles)
    pos = np.searchsorted(cand_codes, codes)
    found = (pos < cand_codes.size) & (cand_codes[np.minimum(pos, cand_codes.size - 1)] == codes)
    return rows[found], pos[found].astype(np.int64)


#: Most candidate role sets one level may try (about a microsecond and a hundred bytes
#: each while they are made; beyond this, many roles are all together and the sets of
#: the next size are counted in billions).
MAX_CANDIDATES = 1_000_000

#: Bytes per pair of row instances tried by the join of one level (the pair's two
#: indices, its edge key and lookups).
BYTES_PER_JOIN = 64


def _check_joins(snaps: Snapshots, inst: np.ndarray, new_group: np.ndarray, k: int) -> None:
    """Refuse a join whose pairs of row instances would not fit in the available memory.

    Instances sharing all but their last entry are joined pair by pair; in a
    dense crowd (thousands of objects within the radius of each other) their
    number grows like the cube of the crowd. Counted before any is made.
    """
    starts = np.flatnonzero(new_group)
    sizes = np.diff(np.append(starts, new_group.size))
    joins = int((sizes * (sizes - 1) // 2).sum())
    need, budget = joins * BYTES_PER_JOIN, available_memory()
    if need <= budget:
        return
    densest = int(starts[np.argmax(sizes)])
    at = snaps.first_index + int(snaps.snap[inst[densest, 0]])
    raise InputError(
        f"row instances of {k} roles would be joined from {joins:,} pairs (about "
        f"{need / 2**30:.3g} GiB), more than the {budget / 2**30:.3g} GiB of memory available: "
        f"at {utc_iso(at * snaps.step_ns)}, one object has {int(sizes.max()):,} neighbours "
        f"of other roles to join pairwise; give a smaller --radius or --max-size {k - 1}"
    )


def mine_levels(
    snaps: Snapshots,
    pairs: NeighbourPairs,
    params: ColocationParams,
    min_prevalent_snapshots: int = 1,
    presence: RolePresence | None = None,
    only: dict[int, np.ndarray] | None = None,
) -> list[LevelResult]:
    """Return per-snapshot co-location of every candidate role set, level by level.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    pairs : NeighbourPairs
        Neighbour pairs at ``params.radius``.
    params : ColocationParams
        Miner settings.
    min_prevalent_snapshots : int, default 1
        A set with fewer prevalent snapshots is not extended. Because prevalent
        snapshots are anti-monotone, any bound implied by the persistence
        thresholds keeps the result exact. 0 extends every set with a row
        instance (what a time chunk needs, see :mod:`comove.roles.chain`).
    presence : RolePresence, optional
        Role presence of ``snaps``, when the caller already has it.
    only : dict, optional
        Size -> codes (:func:`encode_role_sets`) of the only sets of that size
        (3 and more) to extend to; a family closed under subsets (a set of
        tested role sets) keeps every one of its sets exact.

    Returns
    -------
    list of LevelResult
        One per size from 2 up to ``params.max_size`` (fewer when no candidate
        is left). Each level lists every candidate that has a row instance.

    Notes
    -----
    Time and memory are linear in the number of row instances, which for
    dense scenes grows with the number of cliques of the neighbour graphs.

    Examples
    --------
    A dog beside its owner, a second dog alone: PR(dog) = 1/2, PR(owner) = 1, PI = 1/2.

    >>> import numpy as np
    >>> from comove.tracks.alignment import Snapshots
    >>> from comove.tracks.neighbours import neighbour_pairs
    >>> snaps = Snapshots(step_ns=10**9, first_index=0, n_snapshots=1, snap=np.zeros(3, int),
    ...     obj=np.arange(3, dtype=np.int32), role=np.array([0, 1, 0], dtype=np.int32),
    ...     x=np.array([0.0, 1.0, 50.0]), y=np.zeros(3), objects=np.array(["d1", "o", "d2"]),
    ...     roles=np.array(["dog", "owner"]), max_gap_ns=0)
    >>> pair = mine_levels(snaps, neighbour_pairs(snaps, 2.0), ColocationParams(radius=2.0))[0]
    >>> pair.pr.tolist(), pair.pi.tolist(), pair.prevalent.tolist()
    ([[0.5, 1.0]], [0.5], [1])

    References
    ----------
    .. [1] Y. Huang, S. Shekhar, H. Xiong, "Discovering colocation patterns from
       spatial data sets: a general approach", IEEE Transactions on Knowledge
       and Data Engineering 16(12), 2004. doi:10.1109/TKDE.2004.90 (DOI from memory)
    .. [2] R. Agrawal, R. Srikant, "Fast algorithms for mining association
       rules", VLDB 1994. (from memory, not checked)
    """
    if pairs.radius != params.radius:
        raise ValueError("neighbour pairs were computed at another radius")
    role_counts = RoleCounts(snaps)
    presence = presence or RolePresence(snaps)
    level = _level_from_instances(snaps, *_pair_level(snaps, pairs), role_counts, presence,
                                  params.min_participation)  # fmt: skip
    levels, edge_keys = [level], pairs.keys(snaps.n_entries)
    for size in range(3, params.max_size + 1):  # one pass per set size
        keep = level.prevalent >= int(min_prevalent_snapshots)
        candidates = _among(apriori_candidates(level.roles, keep), only, size, len(snaps.roles))
        if candidates.shape[0] == 0:
            break
        level = _next_level(snaps, level, keep, candidates, edge_keys, role_counts, presence,
                            params.min_participation)  # fmt: skip
        levels.append(level)
    return levels


def _among(
    candidates: np.ndarray, only: dict[int, np.ndarray] | None, size: int, n_roles: int
) -> np.ndarray:
    """Return the candidates of ``size`` roles that ``only`` allows (all when it is None)."""
    if only is None:
        return candidates
    allowed = only.get(size, np.zeros(0, dtype=np.int64))
    return candidates[np.isin(encode_role_sets(candidates, n_roles), allowed)]


def _next_level(
    snaps: Snapshots,
    level: LevelResult,
    keep: np.ndarray,
    candidates: np.ndarray,
    edge_keys: np.ndarray,
    role_counts: RoleCounts,
    presence: RolePresence,
    min_participation: float,
) -> LevelResult:
    """Return the level of ``candidates`` joined from the kept sets of ``level``."""
    instances, instance_set = _join_instances(snaps, level, keep, candidates, edge_keys)
    # candidates without any row instance can never be prevalent: drop them
    has, _ = _unique(instance_set)
    remap = np.full(candidates.shape[0], -1, dtype=np.int64)
    remap[has] = np.arange(has.size)
    return _level_from_instances(snaps, candidates[has], instances, remap[instance_set],
                                 role_counts, presence, min_participation)  # fmt: skip
