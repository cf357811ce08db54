"""Association of pairs of objects (dyads): how often and how closely two stay together.

For every unordered pair of objects that are both present at one snapshot or
more, the counts of the pair over the common time grid are

    x    = snapshots at which the pair is *together* (a pair of ``together``),
    y_ab = snapshots at which both are present but not together,
    y_a  = snapshots at which a is present and b is not,
    y_b  = snapshots at which b is present and a is not,

and the association indices are computed from them and from the distances
between the two tracks. See ``docs/association.md`` for the definitions.

With y_ab = shared - x (both present, not together):

- SRI = x / (x + y_ab + y_a + y_b) and HWI = x / (x + y_ab + (y_a + y_b) / 2)
  (Cairns & Schwager 1987). All objects are located on one common grid, so a
  snapshot at which only one of the two is present counts as one at which
  they were seen apart (y_a or y_b); snapshots with neither present do not
  count.
- Prox = x / shared: the share of simultaneous fixes at which the two are
  together (Bertrand et al. 1996; reviewed by Joo et al. 2018).
- Cs = (De - Do) / (De + Do) (Kenward et al. 1993), where Do is the mean
  distance between the two at their shared snapshots and De the mean
  distance between every aligned position of a and every aligned position
  of b, at any times. Cs is NaN when De + Do is 0.

When n_a * n_b (present snapshots of a times those of b) exceeds
``max_expected_pairs``, De uses evenly spaced subsamples of both tracks: a
track of n positions thinned to m keeps, in time order, the middle position
of each of m equal strata, with m_a * m_b <= ``max_expected_pairs`` and
both tracks thinned by the same factor where possible. The result is
deterministic; it approximates the exact De closely for tracks that do not
oscillate in step with the stride.

Columns of the dyad table:

- ``object_a``, ``object_b``: object ids; ``role_a``, ``role_b``: each
  one's most frequent role (ties: the first in ``snaps.roles``);
- ``shared_snapshots`` (both present), ``together_snapshots`` (x),
  ``only_a_snapshots`` (y_a), ``only_b_snapshots`` (y_b);
- ``together_seconds`` (x times the step), ``longest_together_seconds``
  (longest run of consecutive grid snapshots together, times the step),
  ``first_together``, ``last_together`` (UTC; NaT when never together);
- ``mean_distance_m`` (Do), ``expected_distance_m`` (De);
- ``simple_ratio_index``, ``half_weight_index``, ``proximity_index``,
  ``coefficient_of_sociality``.

References
----------
.. [1] R. J. Cairns, S. J. Schwager, "A comparison of association indices",
   Animal Behaviour 35(5), 1454-1469, 1987. (from memory, not checked)
.. [2] R. E. Kenward, V. Marcström, M. Karlbom, "Post-nestling behaviour in
   goshawks, Accipiter gentilis: II. Sex differences in sociality and
   nest-switching", Animal Behaviour 46(2), 371-378, 1993 (details from memory).
.. [3] M. R. Bertrand, A. J. DeNicola, S. R. Beissinger, R. K. Swihart,
   "Effects of parturition on home ranges and social affiliations of female
   white-tailed deer", Journal of Wildlife Management 60(4), 899-909, 1996 (from
   memory).
.. [4] R. Joo, M.-P. Etienne, N. Bez, S. Mahévas, "Metrics for describing
   dyadic movement: a review", Movement Ecology 6, 26, 2018. (from memory, not checked)
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial.distance import cdist

from comove.errors import InputError
from comove.tracks.alignment import Snapshots, longest_runs
from comove.tracks.neighbours import NeighbourPairs

#: Bytes allowed for the dense per-object grids of one chunk of snapshots (positions,
#: presence and the temporaries of one distance pass).
GRID_BYTES = 200_000_000

#: Distances evaluated by one ``cdist`` call for the expected distance; bounds its
#: memory (32 MB) whatever ``max_expected_pairs`` is.
EXPECTED_BLOCK = 4_000_000

#: float64 arrays alive at once per grid cell in a chunk: x, y, presence and the
#: two differences of a distance pass.
_GRID_ARRAYS = 5

DYAD_COLUMNS = [
    "object_a", "object_b", "role_a", "role_b",
    "shared_snapshots", "together_snapshots", "only_a_snapshots", "only_b_snapshots",
    "together_seconds", "longest_together_seconds", "first_together", "last_together",
    "mean_distance_m", "expected_distance_m",
    "simple_ratio_index", "half_weight_index", "proximity_index", "coefficient_of_sociality",
]  # fmt: skip
_COUNT_COLUMNS = {
    "shared_snapshots",
    "together_snapshots",
    "only_a_snapshots",
    "only_b_snapshots",
}
_TIME_COLUMNS = {"first_together", "last_together"}
_TEXT_COLUMNS = {"object_a", "object_b", "role_a", "role_b"}


def _check_together(snaps: Snapshots, together: NeighbourPairs) -> None:
    """Raise ValueError unless every pair joins two entries of one snapshot."""
    i, j = np.asarray(together.i), np.asarray(together.j)
    if i.shape != j.shape or i.ndim != 1:
        raise ValueError("together.i and together.j must be 1-d arrays of the same length")
    if i.size == 0:
        return
    n = snaps.n_entries
    if min(int(i.min()), int(j.min())) < 0 or max(int(i.max()), int(j.max())) >= n:
        raise ValueError("together holds entry indices outside these snapshots")
    if np.any(snaps.snap[i] != snaps.snap[j]):
        raise ValueError("together joins entries of different snapshots")
    if np.any(snaps.obj[i] == snaps.obj[j]):
        raise ValueError("together joins an object with itself")


def _shared_and_distance_sums(snaps: Snapshots, n_obj: int) -> tuple[np.ndarray, np.ndarray]:
    """Return (shared snapshot counts, summed distance over them), both (n_obj, n_obj).

    Only the upper triangle (a < b) of the distance sums is filled.
    """
    shared = np.zeros((n_obj, n_obj), dtype=np.float64)
    dist_sum = np.zeros((n_obj, n_obj), dtype=np.float64)
    n_snap = snaps.n_snapshots
    if snaps.n_entries == 0:
        return shared.astype(np.int64), dist_sum
    width = max(1, GRID_BYTES // (8 * _GRID_ARRAYS * max(n_obj, 1)))
    offsets = snaps.offsets()
    for c0 in range(0, n_snap, width):  # per chunk of snapshots
        c1 = min(c0 + width, n_snap)
        lo, hi = offsets[c0], offsets[c1]
        if hi == lo:
            continue
        obj, col = snaps.obj[lo:hi], snaps.snap[lo:hi] - c0
        gx = np.full((n_obj, c1 - c0), np.nan)
        gy = np.full((n_obj, c1 - c0), np.nan)
        present = np.zeros((n_obj, c1 - c0), dtype=np.float64)
        gx[obj, col] = snaps.x[lo:hi]
        gy[obj, col] = snaps.y[lo:hi]
        present[obj, col] = 1.0
        # a matrix product of 0/1 float64 rows counts exactly (far below 2**53)
        chunk_shared = present @ present.T
        shared += chunk_shared
        # One pass per object over the whole chunk: few, large whole-array calls matter,
        # since each releases the interpreter lock and must win it back, which is slow
        # while the episode search runs in the other thread (measured: 8 192-snapshot
        # blocks, ten times the calls, were no faster alone).
        with_partner = chunk_shared.sum(axis=1) > np.diag(chunk_shared)
        for a in np.flatnonzero(with_partner[:-1]).tolist():  # per object: the later ones
            dx = gx[a + 1 :] - gx[a]
            dy = gy[a + 1 :] - gy[a]
            dx *= dx
            dy *= dy
            dx += dy
            np.sqrt(dx, out=dx)
            # NaN marks "one of the two absent"; such snapshots are not shared
            np.fmax(dx, 0.0, out=dx)
            dist_sum[a, a + 1 :] += dx.sum(axis=1)
    return np.rint(shared).astype(np.int64), dist_sum


def _subsample_sizes(n_a: np.ndarray, n_b: np.ndarray, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """Return track sample sizes (m_a, m_b) with m_a * m_b <= cap, as balanced as possible.

    Both tracks are thinned by the same factor sqrt(cap / (n_a n_b)); a track
    that would drop below one fix keeps one, and the other takes up the slack.
    Element-wise over arrays of pairs.
    """
    n_a, n_b = np.asarray(n_a, dtype=np.int64), np.asarray(n_b, dtype=np.int64)
    f = np.sqrt(cap / (n_a * n_b).astype(np.float64))
    m_a = np.minimum(n_a, np.maximum(1, np.floor(n_a * f).astype(np.int64)))
    m_b = np.minimum(n_b, np.maximum(1, cap // m_a))
    m_a = np.minimum(n_a, np.maximum(1, cap // m_b))
    small = n_a * n_b <= cap
    return np.where(small, n_a, m_a), np.where(small, n_b, m_b)


def _even_sample(n: int, m: int) -> np.ndarray:
    """Return m indices into 0..n-1, the middles of m equal strata (all when m == n)."""
    return (2 * np.arange(m, dtype=np.int64) + 1) * n // (2 * m)


def _expected_distances(
    snaps: Snapshots, n_obj: int, a: np.ndarray, b: np.ndarray, cap: int
) -> np.ndarray:
    """Return the mean distance over all pairings of a fix of a with a fix of b, per pair."""
    # each object's entries stay in time order, so strata are stretches of time
    by_obj, start = snaps.object_order(), snaps.object_bounds()
    counts = np.diff(start)
    cache: dict[tuple[int, int], np.ndarray] = {}

    def track(o: int, m: int) -> np.ndarray:
        if (o, m) not in cache:
            entries = by_obj[start[o] : start[o + 1]]
            picked = entries[_even_sample(entries.size, m)]
            cache[(o, m)] = np.column_stack([snaps.x[picked], snaps.y[picked]])
        return cache[(o, m)]

    m_a, m_b = _subsample_sizes(counts[a], counts[b], cap)
    total = np.zeros(a.size, dtype=np.float64)
    # pairs sharing a first track and its sample size: one cdist against the concatenated
    # samples of their second tracks, in batches that bound the memory
    order = np.lexsort((b, m_a, a))
    key = a[order] * (int(m_a.max()) + 1) + m_a[order]
    cuts = np.flatnonzero(np.diff(key)) + 1
    for group in np.split(order, cuts):  # per (first track, sample size)
        rows_of_a = track(int(a[group[0]]), int(m_a[group[0]]))
        cols = m_b[group]
        budget = max(EXPECTED_BLOCK // rows_of_a.shape[0], int(cols.max()))
        batch = np.cumsum(cols) // budget  # consecutive partners, about budget columns each
        for part in np.split(group, np.flatnonzero(np.diff(batch)) + 1):
            partners = np.concatenate([track(int(b[k]), int(m_b[k])) for k in part])
            step = max(1, EXPECTED_BLOCK // partners.shape[0])
            colsum = np.zeros(partners.shape[0])
            for r0 in range(0, rows_of_a.shape[0], step):  # per block of rows
                colsum += cdist(rows_of_a[r0 : r0 + step], partners).sum(axis=0)
            starts = np.concatenate([[0], np.cumsum(m_b[part])[:-1]])
            total[part] = np.add.reduceat(colsum, starts)
    return total / (m_a * m_b)


def _empty_table() -> pd.DataFrame:
    data: dict[str, pd.Series] = {}
    for c in DYAD_COLUMNS:
        if c in _TEXT_COLUMNS:
            data[c] = pd.Series(dtype=str)
        elif c in _COUNT_COLUMNS:
            data[c] = pd.Series(dtype=np.int64)
        elif c in _TIME_COLUMNS:
            data[c] = pd.Series(dtype="datetime64[ns, UTC]")
        else:
            data[c] = pd.Series(dtype=np.float64)
    return pd.DataFrame(data)


def _together_runs(
    snaps: Snapshots, together: NeighbourPairs, a: np.ndarray, b: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return per dyad row (pairs ``a`` < ``b``): snapshots together, longest run, first, last.

    Runs come from one sort of (row, snapshot) keys of the together pairs.
    """
    n_obj = len(snaps.objects)
    n_rows = a.size
    # together pairs -> dyad rows; both ends are present, so the pair has a row
    oa, ob = snaps.obj[together.i].astype(np.int64), snaps.obj[together.j].astype(np.int64)
    pair_key = np.minimum(oa, ob) * n_obj + np.maximum(oa, ob)
    row = np.searchsorted(a.astype(np.int64) * n_obj + b, pair_key)
    snap = snaps.snap[together.i]
    n_snap = max(snaps.n_snapshots, 1)
    if n_rows < 2**15 and np.all(snap[1:] >= snap[:-1]):
        # pairs in entry order are in snapshot order: a stable sort by row suffices,
        # which numpy does as a radix sort for 16-bit codes
        order = np.argsort(row.astype(np.int16), kind="stable")
        row, snap = row[order], snap[order]
    elif n_rows * n_snap < 2**62:
        key = np.sort(row * n_snap + snap)
        row, snap = key // n_snap, key % n_snap
    else:
        order = np.lexsort((snap, row))
        row, snap = row[order], snap[order]
    if row.size > 1 and np.any((row[1:] == row[:-1]) & (snap[1:] == snap[:-1])):
        raise ValueError("together lists the same pair of objects twice in one snapshot")
    x = np.bincount(row, minlength=n_rows)
    longest, _ = longest_runs(row, snap, n_rows)
    first_snap = np.zeros(n_rows, dtype=np.int64)
    last_snap = np.zeros(n_rows, dtype=np.int64)
    if row.size:
        brk = np.flatnonzero(row[1:] != row[:-1])
        first_snap[row[np.r_[0, brk + 1]]] = snap[np.r_[0, brk + 1]]
        last_snap[row[np.r_[brk, row.size - 1]]] = snap[np.r_[brk, row.size - 1]]
    return x, longest, first_snap, last_snap


def _dyad_frame(
    snaps: Snapshots,
    a: np.ndarray,
    b: np.ndarray,
    shared: np.ndarray,
    x: np.ndarray,
    longest: np.ndarray,
    first_snap: np.ndarray,
    last_snap: np.ndarray,
    mean_dist: np.ndarray,
    expected: np.ndarray,
) -> pd.DataFrame:
    """Return the dyad rows of pairs ``a`` < ``b`` from their counts and distances."""
    present = np.bincount(snaps.obj, minlength=len(snaps.objects))
    only_a = present[a] - shared
    only_b = present[b] - shared
    never = x == 0

    def utc(s: np.ndarray) -> pd.DatetimeIndex:
        t = snaps.times(s).astype("datetime64[ns]")
        t[never] = np.datetime64("NaT")
        return pd.DatetimeIndex(t).tz_localize("UTC")

    with np.errstate(invalid="ignore", divide="ignore"):
        cs = (expected - mean_dist) / (expected + mean_dist)
    apart = shared - x
    step = snaps.step_s
    roles = snaps.main_roles()
    objects = np.asarray(snaps.objects).astype(str)
    role_names = np.asarray(snaps.roles).astype(str)
    return pd.DataFrame(
        {
            "object_a": pd.array(objects[a], dtype=str),
            "object_b": pd.array(objects[b], dtype=str),
            "role_a": pd.array(role_names[roles[a]], dtype=str),
            "role_b": pd.array(role_names[roles[b]], dtype=str),
            "shared_snapshots": shared.astype(np.int64),
            "together_snapshots": x.astype(np.int64),
            "only_a_snapshots": only_a.astype(np.int64),
            "only_b_snapshots": only_b.astype(np.int64),
            "together_seconds": x * step,
            "longest_together_seconds": longest * step,
            "first_together": utc(first_snap),
            "last_together": utc(last_snap),
            "mean_distance_m": mean_dist,
            "expected_distance_m": expected,
            "simple_ratio_index": x / (x + apart + only_a + only_b),
            "half_weight_index": x / (x + apart + 0.5 * (only_a + only_b)),
            "proximity_index": x / shared,
            "coefficient_of_sociality": cs,
        },
        columns=DYAD_COLUMNS,
    )


def dyad_table(
    snaps: Snapshots, together: NeighbourPairs, max_expected_pairs: int = 62_500
) -> pd.DataFrame:
    """Return association counts and indices for every pair of objects seen at the same time.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    together : NeighbourPairs
        The pairs of entries counted as together, normally
        ``neighbour_pairs(snaps, radius)``; any subset of such pairs (for
        example those that also move alike) may be given. Pairs are used as
        given, never recomputed.
    max_expected_pairs : int, default 62_500
        Most pairings of a fix of a with a fix of b used for the expected
        distance of one pair (250 x 250 positions); above it, both tracks are
        thinned (see Notes). On a 90-minute match at 25 Hz this kept every
        pair's De within 0.5 % of the value from 4 000 000 pairings (median
        0.1 %); raise it for more precision at proportional cost.

    Returns
    -------
    DataFrame
        One row per unordered pair of objects (``object_a`` has the lower
        object code) that are both present at one snapshot or more, with the
        columns listed in the module docstring.

        Sorted by half-weight index, descending, then ``object_a``,
        ``object_b``. ``attrs`` holds ``radius_m``, ``step_s`` and
        ``max_expected_pairs``.

    Notes
    -----
    The indices, the subsampling for De and their sources are in the module
    docstring. Time O(n_objects^2 x n_snapshots + P log P) for P together
    pairs, plus O(n_pairs x max_expected_pairs); memory O(GRID_BYTES +
    n_objects^2 + P) (dense per-object grids in chunks of snapshots).

    Examples
    --------
    >>> import numpy as np
    >>> from comove.tracks.alignment import Snapshots
    >>> from comove.tracks.neighbours import neighbour_pairs
    >>> snaps = Snapshots(step_ns=10**9, first_index=0, n_snapshots=4,
    ...     snap=np.repeat(np.arange(4), 2), obj=np.tile(np.arange(2, dtype=np.int32), 4),
    ...     role=np.zeros(8, np.int32), x=np.array([0, 1, 0, 1, 0, 9, 0, 9.0]),
    ...     y=np.zeros(8), objects=np.array(["a", "b"]), roles=np.array([""]), max_gap_ns=0)
    >>> row = dyad_table(snaps, neighbour_pairs(snaps, 2.0)).iloc[0]
    >>> int(row.together_snapshots), float(row.half_weight_index)
    (2, 0.5)
    """
    if max_expected_pairs < 1:
        raise ValueError("max_expected_pairs must be at least 1")
    _check_together(snaps, together)
    n_obj = len(snaps.objects)
    shared_m, dist_sum = _shared_and_distance_sums(snaps, n_obj)
    a, b = np.nonzero(np.triu(shared_m, 1))  # row-major: sorted by a, then b
    attrs = {"radius_m": float(together.radius), "step_s": snaps.step_s,
             "max_expected_pairs": int(max_expected_pairs)}  # fmt: skip
    if a.size == 0:
        table = _empty_table()
        table.attrs.update(attrs)
        return table
    shared = shared_m[a, b]
    mean_dist = dist_sum[a, b] / shared

    x, longest, first_snap, last_snap = _together_runs(snaps, together, a, b)
    expected = _expected_distances(snaps, n_obj, a, b, int(max_expected_pairs))
    table = _dyad_frame(snaps, a, b, shared, x, longest, first_snap, last_snap, mean_dist,
                        expected)  # fmt: skip
    table = table.sort_values(
        ["half_weight_index", "object_a", "object_b"],
        ascending=[False, True, True],
        kind="stable",
    ).reset_index(drop=True)
    table.attrs.update(attrs)
    return table


def dyad_matrix(dyads: pd.DataFrame, index: str = "half_weight_index") -> pd.DataFrame:
    """Return the symmetric object x object matrix of one dyad column.

    Parameters
    ----------
    dyads : DataFrame
        Output of :func:`dyad_table` (or a subset of its rows).
    index : str, default "half_weight_index"
        Numeric column to spread, e.g. ``simple_ratio_index``,
        ``proximity_index``, ``coefficient_of_sociality``, ``together_seconds``.

    Returns
    -------
    DataFrame
        Square, indexed and columned by the object ids of ``dyads`` (sorted);
        cell (a, b) = cell (b, a) = the value of the pair. The diagonal and
        pairs without a row (never present at the same time) are NaN.

    Notes
    -----
    O(n_objects^2 + n_rows) time and memory.
    """
    numeric = [
        c
        for c in dyads.columns
        if c not in _TEXT_COLUMNS and pd.api.types.is_numeric_dtype(dyads[c])
    ]
    if index not in numeric:
        raise InputError(
            f"dyad table: no numeric column {index!r}; choose one of {', '.join(numeric)}"
        )
    id_a = dyads["object_a"].to_numpy().astype(str)
    id_b = dyads["object_b"].to_numpy().astype(str)
    ids = np.unique(np.concatenate([id_a, id_b]))
    ia, ib = np.searchsorted(ids, id_a), np.searchsorted(ids, id_b)
    if np.any(ia == ib):
        raise ValueError("dyads pairs an object with itself")
    lo, hi = np.minimum(ia, ib), np.maximum(ia, ib)
    if np.unique(lo * ids.size + hi).size != lo.size:
        raise ValueError("dyads holds the same pair of objects more than once")
    values = dyads[index].to_numpy(dtype=np.float64)
    matrix = np.full((ids.size, ids.size), np.nan)
    matrix[ia, ib] = values
    matrix[ib, ia] = values
    labels = pd.Index(ids, name="object")
    return pd.DataFrame(matrix, index=labels, columns=labels.rename("object"))
