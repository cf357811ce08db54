"""A focal role's surroundings: which role sets are around its objects, and how durably.

Definitions (for the focal role F, a snapshot t and a set S of roles):

- the *neighbourhood* of an object o of role F at t is the set of roles of the
  other objects within the radius of o at t (its star neighbourhood [1]_); it
  may hold F itself when another object of role F is near;
- the *share* of S at t is the share of the role-F objects present at t whose
  neighbourhood contains every role of S. Each (focal object, snapshot) counts
  once, however many objects of a role are around it and however the
  neighbourhoods of several focal objects overlap, so no neighbour is counted
  into two baskets and no basket is cut out of space [2]_;
- S *surrounds* F at t when its share reaches ``min_share``;
- present(S) is the set of snapshots at which F and every role of S have an
  object (two objects of role F when S holds F), and the time prevalence of S
  is the share of present(S) at which S surrounds F. S is kept by the same
  persistence thresholds as a durable role set
  (:class:`~comove.roles.persistence.PersistenceParams`).

For S = {A}, A not F, the share equals the participation ratio of F in the
pair {F, A} (:mod:`comove.roles.colocation`): a pair's row instance is an
edge, so an F object takes part in one exactly when an A object is its
neighbour. For larger S the share is at least the participation ratio of F in
S + {F}, since the roles around F need not be each other's neighbours.

The share is anti-monotone (a neighbourhood holding S holds every subset), so
the snapshots at which S surrounds F can only shrink as S grows, and sets are
grown level by level with the Apriori rule, pruned by the fewest prevalent
snapshots a kept set can have.

The tally of a span of snapshots is the number of focal objects with each
exact neighbourhood at each snapshot; tallies of consecutive spans join by
concatenation, so time windows and engines give exactly the whole run's result.

References
----------
.. [1] J. S. Yoo, S. Shekhar, "A joinless approach for mining spatial colocation
   patterns", IEEE Transactions on Knowledge and Data Engineering 18(10),
   1323-1337, 2006. doi:10.1109/TKDE.2006.150
.. [2] Y. Huang, S. Shekhar, H. Xiong, "Discovering colocation patterns from
   spatial data sets: a general approach", IEEE Transactions on Knowledge and
   Data Engineering 16(12), 1472-1485, 2004. doi:10.1109/TKDE.2004.90
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from comove.errors import InputError, bad_setting
from comove.roles.colocation import RATIO_EPS, RolePresence, apriori_candidates
from comove.roles.persistence import PersistenceParams, role_label
from comove.tracks.alignment import Snapshots, longest_runs
from comove.tracks.neighbours import NeighbourPairs, neighbour_pairs, neighbours_of

#: Largest share of focal entries for which the neighbours are searched from the focal
#: entries only (``neighbours_of``); above it every pair is searched. Measured by
#: benchmarks/focal_search.py (docs/performance.md): 2.3x faster at 2 % focal, 1.11x at
#: 25 %, 1.04x at 35 % (within noise), 0.88x at 50 %.
FROM_FOCAL_SHARE = 0.25

#: Bits per word of a neighbourhood mask.
WORD = 64


@dataclass(frozen=True)
class FocalParams:
    """Settings of a focal role's surroundings.

    Parameters
    ----------
    focal_role : str
        The role whose objects' neighbourhoods are counted.
    radius : float
        Neighbour distance in metres (inclusive).
    min_share : float, default 0.5
        Share of the focal role's objects with a role set among their
        neighbours at or above which the set surrounds the focal role at a
        snapshot, in (0, 1].
    max_around : int, default 3
        Most roles in a set around the focal role (at least 1).
    """

    focal_role: str = field(metadata={"help": "the role whose objects' surroundings are counted"})
    radius: float = field(metadata={"help": "neighbour distance in metres (inclusive)"})
    min_share: float = field(
        default=0.5,
        metadata={
            "help": "share of the focal role's objects with a role set among their neighbours "
            "at or above which the set surrounds the focal role at a snapshot, in (0, 1]"
        },
    )
    max_around: int = field(
        default=3, metadata={"help": "most roles in a set around the focal role (>= 1)"}
    )

    def __post_init__(self) -> None:
        if not str(self.focal_role).strip():
            raise bad_setting("focal_role", "must name a role of the input")
        if not (np.isfinite(self.radius) and self.radius > 0):
            raise bad_setting("radius", "must be a positive distance in metres")
        if not (0 < self.min_share <= 1):
            raise bad_setting("min_share", "must be in (0, 1]")
        if int(self.max_around) != self.max_around or self.max_around < 1:
            raise bad_setting("max_around", "must be a whole number of at least 1")

    def code(self, roles: np.ndarray) -> int:
        """Return the focal role's code among ``roles``.

        Raises
        ------
        InputError
            When no object has the focal role.
        """
        hit = np.flatnonzero(np.asarray(roles, dtype=str) == str(self.focal_role))
        if hit.size == 0:
            listed = ", ".join(sorted(str(r) for r in roles)[:12])
            more = ", ..." if len(roles) > 12 else ""
            raise InputError(
                f"no object has the role {self.focal_role!r}; give --focal-role one of the "
                f"input's roles: {listed}{more}",
                setting="focal_role",
            )
        return int(hit[0])


@dataclass
class FocalTally:
    """How many focal objects have each exact neighbourhood, per snapshot.

    Attributes
    ----------
    snap : ndarray of int64
        Snapshot of each row, counted from the tally's first snapshot; rows
        are sorted by snapshot, then mask, and no two are equal.
    masks : ndarray of uint64, shape (n_rows, words)
        The neighbourhood: bit ``r % 64`` of word ``r // 64`` is set when an
        object of role ``r`` is around.
    count : ndarray of int64
        Focal objects with that neighbourhood at that snapshot.
    presence : RolePresence
        Which roles are present at each snapshot of the span.
    focal : int
        The focal role's code.
    roles : ndarray of str
        Names behind the role codes.
    step_ns, first_index, n_snapshots : int
        Snapshot spacing, grid index of the first snapshot, snapshots in the span.
    """

    snap: np.ndarray
    masks: np.ndarray
    count: np.ndarray
    presence: RolePresence
    focal: int
    roles: np.ndarray
    step_ns: int
    first_index: int
    n_snapshots: int

    @property
    def step_s(self) -> float:
        """Return the snapshot spacing in seconds."""
        return self.step_ns / 1e9

    def times(self, snapshot: np.ndarray) -> np.ndarray:
        """Return the times of the span's ``snapshot`` indices, int64 ns UTC."""
        return (np.asarray(snapshot, dtype=np.int64) + self.first_index) * self.step_ns

    @classmethod
    def joined(cls, tallies: Sequence[FocalTally]) -> FocalTally:
        """Return the tally of consecutive spans, as if counted in one piece.

        Raises
        ------
        ValueError
            When the spans are not consecutive and in time order.
        """
        if not tallies:
            raise ValueError("no tallies to join")
        first = tallies[0]
        for before, after in zip(tallies[:-1], tallies[1:], strict=True):
            if after.first_index != before.first_index + before.n_snapshots:
                raise ValueError("tallies must cover consecutive spans of snapshots, in order")
        return replace(
            first,
            snap=np.concatenate([t.snap + (t.first_index - first.first_index) for t in tallies]),
            masks=np.concatenate([t.masks for t in tallies]),
            count=np.concatenate([t.count for t in tallies]),
            presence=RolePresence.joined([t.presence for t in tallies]),
            n_snapshots=sum(t.n_snapshots for t in tallies),
        )


def words_for(n_roles: int) -> int:
    """Return the uint64 words a neighbourhood mask of ``n_roles`` roles takes."""
    return max(1, -(-int(n_roles) // WORD))


def role_masks(role_sets: np.ndarray, n_roles: int) -> np.ndarray:
    """Return the neighbourhood masks (uint64, one row per set) of rows of role codes."""
    role_sets = np.asarray(role_sets, dtype=np.int64)
    masks = np.zeros((role_sets.shape[0], words_for(n_roles)), dtype=np.uint64)
    for col in range(role_sets.shape[1]):
        r = role_sets[:, col]
        masks[np.arange(r.size), r // WORD] |= np.left_shift(
            np.uint64(1), (r % WORD).astype(np.uint64)
        )
    return masks


def focal_chain(
    snaps: Snapshots,
    params: FocalParams,
    *,
    pairs: NeighbourPairs | None = None,
    workers: int = 1,
) -> FocalTally:
    """Return the focal role's neighbourhoods in ``snaps`` (a chunk or a whole run).

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    params : FocalParams
        Focal role and radius.
    pairs : NeighbourPairs, optional
        Neighbour pairs within ``params.radius``, when the caller has them.
    workers : int, default 1
        Threads of the neighbour search (-1: every core).

    Returns
    -------
    FocalTally

    Examples
    --------
    A calf beside its mother at both snapshots, and beside a yearling at the second:

    >>> import numpy as np
    >>> snaps = Snapshots(
    ...     step_ns=10**9, first_index=0, n_snapshots=2,
    ...     snap=np.array([0, 0, 0, 1, 1, 1]), obj=np.array([0, 1, 2, 0, 1, 2], dtype=np.int32),
    ...     role=np.array([0, 1, 2, 0, 1, 2], dtype=np.int32),
    ...     x=np.array([0.0, 1, 50, 0, 1, 2]), y=np.zeros(6),
    ...     objects=np.array(["c", "m", "y"]), roles=np.array(["calf", "mother", "yearling"]),
    ...     max_gap_ns=0)
    >>> tally = focal_chain(snaps, FocalParams(focal_role="calf", radius=5.0))
    >>> tally.snap.tolist(), tally.masks[:, 0].tolist(), tally.count.tolist()
    ([0, 1], [2, 6], [1, 1])
    """
    focal = params.code(snaps.roles)
    n_roles = len(snaps.roles)
    is_focal = snaps.role == focal
    entries = np.flatnonzero(is_focal)
    # directed (focal entry, a neighbour), each pair at most once
    if pairs is None and entries.size <= FROM_FOCAL_SHARE * snaps.n_entries:
        around, other = neighbours_of(snaps, params.radius, is_focal, workers=workers)
    else:
        if pairs is None:
            pairs = neighbour_pairs(snaps, params.radius, workers=workers)
        from_i, from_j = is_focal[pairs.i], is_focal[pairs.j]
        around = np.concatenate([pairs.i[from_i], pairs.j[from_j]])
        other = np.concatenate([pairs.j[from_i], pairs.i[from_j]])
    role = snaps.role[other]
    key = np.unique(around * np.int64(n_roles) + role.astype(np.int64))
    at = np.searchsorted(entries, key // n_roles)
    role = key % n_roles
    masks = np.zeros((entries.size, words_for(n_roles)), dtype=np.uint64)
    bits = np.left_shift(np.uint64(1), (role % WORD).astype(np.uint64))
    for w in range(masks.shape[1]):  # per word of 64 roles
        sel = role // WORD == w
        if sel.any():
            # the distinct roles of one entry are distinct bits: their sum is their union
            first = np.flatnonzero(np.r_[True, at[sel][1:] != at[sel][:-1]])
            masks[at[sel][first], w] = np.add.reduceat(bits[sel], first)
    snap, masks, count = _distinct_rows(snaps.snap[entries], masks)
    return FocalTally(snap, masks, count, RolePresence(snaps), focal, snaps.roles, snaps.step_ns,
                      snaps.first_index, snaps.n_snapshots)  # fmt: skip


def _distinct_rows(snap: np.ndarray, masks: np.ndarray) -> tuple[np.ndarray, ...]:
    """Return the distinct (snapshot, mask) rows, sorted, and how often each occurs."""
    if snap.size == 0:
        return snap.astype(np.int64), masks, np.zeros(0, dtype=np.int64)
    order = np.lexsort((*[masks[:, w] for w in range(masks.shape[1] - 1, -1, -1)], snap))
    snap, masks = snap[order], masks[order]
    new = np.r_[True, (snap[1:] != snap[:-1]) | (masks[1:] != masks[:-1]).any(axis=1)]
    starts = np.flatnonzero(new)
    return snap[starts].astype(np.int64), masks[starts], np.diff(np.append(starts, snap.size))


def _focal_counts(tally: FocalTally) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return the snapshots with focal objects, each row's place among them, and their counts."""
    snapshots, inverse = np.unique(tally.snap, return_inverse=True)
    focal_n = np.bincount(inverse, weights=tally.count, minlength=snapshots.size).astype(np.int64)
    return snapshots, inverse, focal_n


def _present(
    tally: FocalTally, roles: np.ndarray, snapshots: np.ndarray, focal_n: np.ndarray
) -> np.ndarray:
    """Return which of ``snapshots`` are in present(S) for the role set ``roles``.

    The focal role and every other role of S have an object there; two focal
    objects when S holds the focal role.
    """
    others = roles[roles != tally.focal]
    present = focal_n >= 1 + int(others.size < roles.size)
    if others.size:
        bits = np.unpackbits(tally.presence.mask(others), count=tally.presence.n_snapshots)
        present &= bits[snapshots].astype(bool)
    return present


@dataclass
class FocalLevel:
    """The sets of one size around the focal role, with their per-snapshot shares.

    Attributes
    ----------
    roles : ndarray of int64, shape (n_sets, k)
        Role codes of each set, ascending along each row.
    present, prevalent : ndarray of int64
        Snapshots in present(S), and those at which S surrounds the focal role.
    set_id, snap : ndarray of int64
        Sparse per-snapshot table: the (set, snapshot) pairs at which a focal
        object has the set around, sorted by set then snapshot.
    hits : ndarray of int64
        Focal objects with the set around, per row.
    share : ndarray of float64
        ``hits`` over the focal objects present at the row's snapshot.
    """

    roles: np.ndarray
    present: np.ndarray
    prevalent: np.ndarray
    set_id: np.ndarray
    snap: np.ndarray
    hits: np.ndarray
    share: np.ndarray


def surrounding_sets(
    tally: FocalTally,
    params: FocalParams,
    min_prevalent_snapshots: int = 1,
    only: Sequence[np.ndarray] | None = None,
) -> list[FocalLevel]:
    """Return the role sets around the focal role, level by level (Apriori).

    Parameters
    ----------
    tally : FocalTally
        The neighbourhoods (a whole run, or chunks joined).
    params : FocalParams
        ``min_share`` and ``max_around``.
    min_prevalent_snapshots : int, default 1
        A set is extended only when it surrounds the focal role at this many
        snapshots (exact pruning: the count is anti-monotone).
    only : sequence of ndarray, optional
        The only sets to count, one array of role-code rows per size (no
        candidate generation): what a null replicate needs of the tested sets.
    """
    n_roles = len(tally.roles)
    snapshots, inverse, focal_n = _focal_counts(tally)
    bound = max(int(min_prevalent_snapshots), 1)
    levels: list[FocalLevel] = []
    sets = np.arange(n_roles, dtype=np.int64)[:, None] if only is None else None
    for size in range(1, int(params.max_around) + 1):
        if only is not None:
            sets = next((s for s in only if s.shape[1] == size), np.empty((0, size), np.int64))
        if sets is None or sets.shape[0] == 0:
            if only is None:
                break
            continue
        level = _count_level(tally, sets, snapshots, inverse, focal_n, params.min_share)
        levels.append(level)
        if only is None:
            keep = level.prevalent >= bound
            if not keep.any() or size == params.max_around:
                break
            sets = apriori_candidates(level.roles, keep, "--max-around", "--min-share")
    return levels


def _count_level(
    tally: FocalTally,
    sets: np.ndarray,
    snapshots: np.ndarray,
    inverse: np.ndarray,
    focal_n: np.ndarray,
    min_share: float,
) -> FocalLevel:
    """Return the shares of the role sets ``sets`` at every snapshot with focal objects."""
    n_roles, n_snap = len(tally.roles), snapshots.size
    wanted = role_masks(sets, n_roles)
    present = np.zeros(sets.shape[0], dtype=np.int64)
    prevalent = np.zeros(sets.shape[0], dtype=np.int64)
    parts: list[tuple[np.ndarray, ...]] = []
    for s in range(sets.shape[0]):  # per candidate set, never per snapshot
        hit = ((tally.masks & wanted[s]) == wanted[s]).all(axis=1)
        hits = np.bincount(inverse[hit], weights=tally.count[hit], minlength=n_snap)
        share = hits / np.maximum(focal_n, 1)
        present[s] = int(_present(tally, sets[s], snapshots, focal_n).sum())
        prevalent[s] = int((share >= min_share - RATIO_EPS).sum())
        rows = np.flatnonzero(hits > 0)
        parts.append((np.full(rows.size, s, dtype=np.int64), snapshots[rows],
                      hits[rows].astype(np.int64), share[rows]))  # fmt: skip
    set_id, snap, hits, share = (np.concatenate(p) for p in zip(*parts, strict=True))
    return FocalLevel(sets, present, prevalent, set_id, snap, hits, share)


@dataclass
class FocalTables:
    """What surrounds the focal role, as tables.

    Attributes
    ----------
    sets : DataFrame
        One row per kept role set around the focal role (``focal.csv``).
    neighbourhoods : DataFrame
        Every exact neighbourhood seen, with how often (``focal_neighbourhoods.csv``).
    series : DataFrame
        The share of every kept set at every snapshot of present(S).
    """

    sets: pd.DataFrame
    neighbourhoods: pd.DataFrame
    series: pd.DataFrame


FOCAL_COLUMNS = [
    "focal_role", "around", "size", "present_snapshots", "prevalent_snapshots",
    "time_prevalence", "prevalent_s", "longest_run_s", "longest_run_start", "mean_share",
    "exact_share",
]  # fmt: skip
NEIGHBOURHOOD_COLUMNS = ["focal_role", "around", "size", "focal_snapshots", "share"]
FOCAL_SERIES_DTYPES = {
    "around": "object", "time": "datetime64[ns, UTC]", "share": "float32", "surrounds": "bool",
}  # fmt: skip


def focal_tables(
    tally: FocalTally,
    levels: list[FocalLevel],
    params: FocalParams,
    persistence: PersistenceParams,
) -> FocalTables:
    """Return the kept sets around the focal role, every exact neighbourhood, and the series.

    ``focal.csv`` (:attr:`FocalTables.sets`) has ``focal_role``, ``around``
    (the roles of S sorted, joined by ';'), ``size`` (roles in S),
    ``present_snapshots``, ``prevalent_snapshots`` (at which S surrounds the
    focal role), ``time_prevalence``, ``prevalent_s``, ``longest_run_s``,
    ``longest_run_start`` (UTC), ``mean_share`` (over present(S)) and
    ``exact_share`` (share of all focal object-snapshots whose neighbourhood
    is S and nothing else); sorted by time prevalence, descending.
    """
    names, step_s, focal_name = tally.roles, tally.step_s, str(tally.roles[tally.focal])
    rows, series = [], []
    hoods = neighbourhood_table(tally)
    exact = dict(zip(hoods["around"], hoods["share"], strict=True))
    snapshots, _, focal_n = _focal_counts(tally)
    for level in levels:
        kept = persistence.keeps(level.prevalent, level.present, step_s)
        n_sets = level.roles.shape[0]
        surrounds = level.share >= params.min_share - RATIO_EPS
        longest, start = longest_runs(level.set_id[surrounds], level.snap[surrounds], n_sets)
        share_sum = np.bincount(level.set_id, weights=level.share, minlength=n_sets)
        for s in np.flatnonzero(kept):  # per kept set
            label = role_label(level.roles[s], names)
            present = int(level.present[s])
            rows.append({
                "focal_role": focal_name, "around": label, "size": level.roles.shape[1],
                "present_snapshots": present, "prevalent_snapshots": int(level.prevalent[s]),
                "time_prevalence": level.prevalent[s] / max(present, 1),
                "prevalent_s": float(level.prevalent[s] * step_s),
                "longest_run_s": float(longest[s] * step_s),
                "longest_run_start": pd.Timestamp(int(tally.times(start[s : s + 1])[0]), tz="UTC"),
                "mean_share": float(share_sum[s] / max(present, 1)),
                "exact_share": float(exact.get(label, 0.0)),
            })  # fmt: skip
            present_at = snapshots[_present(tally, level.roles[s], snapshots, focal_n)]
            series.append(_series(tally, level, s, label, present_at, params.min_share))
    sets = pd.DataFrame(rows, columns=FOCAL_COLUMNS)
    if len(sets):
        sets = sets.sort_values(["time_prevalence", "size", "around"],
                                ascending=[False, True, True], kind="stable")  # fmt: skip
        sets = sets.reset_index(drop=True).astype({"size": "int64"})
    frame = (
        pd.concat(series, ignore_index=True)
        if series
        else pd.DataFrame({c: pd.Series(dtype=t) for c, t in FOCAL_SERIES_DTYPES.items()})
    )
    frame["around"] = frame["around"].astype("category")
    return FocalTables(sets, hoods, frame)


def _neighbourhoods(tally: FocalTally) -> tuple[list[np.ndarray], np.ndarray]:
    """Return every distinct neighbourhood (role codes, ascending) and its object-snapshots."""
    if tally.count.size == 0:
        return [], np.zeros(0, dtype=np.int64)
    masks, inverse = np.unique(tally.masks, axis=0, return_inverse=True)
    counts = np.bincount(inverse.ravel(), weights=tally.count, minlength=masks.shape[0])
    # bit r of the little-endian bytes is role r
    words = np.unpackbits(masks.astype("<u8").view(np.uint8), axis=1, bitorder="little")
    roles = [np.flatnonzero(row).astype(np.int64) for row in words]  # per distinct neighbourhood
    return roles, counts.astype(np.int64)


def neighbourhood_table(tally: FocalTally) -> pd.DataFrame:
    """Return every exact neighbourhood of the focal role and how often it occurs.

    Columns ``focal_role``, ``around`` (roles joined by ';'; empty when no
    object is around), ``size``, ``focal_snapshots`` (focal object-snapshots
    with exactly this neighbourhood) and ``share`` (of all focal
    object-snapshots; the shares add up to 1), sorted by share, descending.
    """
    roles, counts = _neighbourhoods(tally)
    total = max(int(counts.sum()), 1)
    table = pd.DataFrame({
        "focal_role": pd.Series([str(tally.roles[tally.focal])] * len(roles), dtype=object),
        "around": pd.Series([role_label(r, tally.roles) for r in roles], dtype=object),
        "size": np.asarray([r.size for r in roles], dtype=np.int64),
        "focal_snapshots": counts,
        "share": counts / total,
    }, columns=NEIGHBOURHOOD_COLUMNS)  # fmt: skip
    return table.sort_values(["share", "size", "around"], ascending=[False, True, True],
                             kind="stable").reset_index(drop=True)  # fmt: skip


def _series(
    tally: FocalTally, level: FocalLevel, s: int, label: str, snap: np.ndarray, min_share: float
) -> pd.DataFrame:
    """Return the share of set ``s`` at every snapshot ``snap`` of present(S), zeros included."""
    lo, hi = np.searchsorted(level.set_id, [s, s + 1])
    share = np.zeros(snap.size)
    share[np.searchsorted(snap, level.snap[lo:hi])] = level.share[lo:hi]
    return pd.DataFrame({
        "around": np.full(snap.size, label, dtype=object),
        "time": pd.to_datetime(tally.times(snap), utc=True),
        "share": share.astype(np.float32),
        "surrounds": share >= min_share - RATIO_EPS,
    })  # fmt: skip


def focal_values(
    levels: list[FocalLevel], tested: Sequence[np.ndarray], statistic: str
) -> np.ndarray:
    """Return each tested set's statistic: mean share over present(S), or time prevalence.

    ``levels`` must hold the tested sets in the same order (as
    :func:`surrounding_sets` with ``only=tested`` returns them).
    """
    out = []
    by_size = {lv.roles.shape[1]: lv for lv in levels}
    for sets in tested:
        level = by_size.get(sets.shape[1])
        if level is None or sets.shape[0] == 0:
            out.append(np.zeros(sets.shape[0]))
            continue
        if statistic == "continuous":
            total = np.bincount(level.set_id, weights=level.share, minlength=sets.shape[0])
        else:
            total = level.prevalent.astype(np.float64)
        out.append(np.where(level.present > 0, total / np.maximum(level.present, 1), 0.0))
    return np.concatenate(out) if out else np.empty(0)
