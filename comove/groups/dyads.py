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

Over chunks of time. :func:`dyad_tally` counts one chunk of snapshots;
:meth:`DyadTally.then` joins the tallies of consecutive chunks into the tally of
the whole run, exactly: counts add, the distances behind Do are summed as
integers of 2**-37 m (each distance rounded to the nearest; a float sum would
depend on where the chunks are cut and in which order they are added), and
runs together stitch across chunk edges. De pairs positions at any two times,
so it is computed from the tracks (:func:`expected_distances`) once the
tally is complete; :func:`dyad_rows` then builds the table.

Columns of the dyad table:

- ``object_a``, ``object_b``: object ids; ``role_a``, ``role_b``: each
  one's most frequent role (ties: the first in ``snaps.roles``);
- ``shared_snapshots`` (both present), ``together_snapshots`` (x),
  ``only_a_snapshots`` (y_a), ``only_b_snapshots`` (y_b);
- ``together_s`` (x times the step), ``longest_together_s``
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

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.spatial.distance import cdist

from comove.errors import InputError, bad_setting
from comove.tracks.alignment import Snapshots, longest_runs, most_frequent_roles
from comove.tracks.neighbours import NeighbourPairs

#: Bytes allowed for the per-object position grids of a stretch of snapshots and the
#: work buffers of a block of pairs (half each).
GRID_BYTES = 200_000_000

#: Distances evaluated by one ``cdist`` call for the expected distance; bounds its
#: memory (32 MB) whatever ``max_expected_pairs`` is.
EXPECTED_BLOCK = 4_000_000

#: Pairings of positions for the expected distances of all pairs together (about a
#: second of ``cdist`` on one core): with more pairs than this allows at
#: ``max_expected_pairs`` each, every pair gets ``EXPECTED_BUDGET // n_pairs``
#: pairings, but never fewer than ``MIN_EXPECTED_PAIRS`` (sampling errors measured in
#: docs/association.md).
EXPECTED_BUDGET = 200_000_000
MIN_EXPECTED_PAIRS = 2_500

#: Objects up to which every co-present pair may be listed (an objects x objects table
#: of 400 MB of booleans).
MAX_CO_PRESENT_OBJECTS = 20_000

#: Which pairs the dyad table lists.
PAIR_SELECTIONS = ("together", "co-present")

DYAD_COLUMNS = [
    "object_a", "object_b", "role_a", "role_b",
    "shared_snapshots", "together_snapshots", "only_a_snapshots", "only_b_snapshots",
    "together_s", "longest_together_s", "first_together", "last_together",
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


#: Distances are summed as integers of 2**-37 m (7 picometres; each distance rounded to the
#: nearest), held in two int64 halves of 32 bits, so that the sum over a run
#: of snapshots is the same number however the run is cut into chunks and in whatever
#: order the chunks' sums are added (a float sum would change in its last bits).
_FIXED_BITS = 37
_LOW_BITS = 32
_LOW_MASK = (1 << _LOW_BITS) - 1

#: Farthest two positions may be apart for the fixed-point sums (2**26 m, 67 000 km:
#: more than any two points on the Earth in any projection in metres).
_MAX_SPAN_M = 2.0 ** (63 - _FIXED_BITS)

#: Share of ``_MAX_SPAN_M`` that span x snapshots must stay below for the distances of
#: a chunk to be summed as whole integers, without splitting each into halves first
#: (0 always splits). Skipping the split saves two passes over each distance grid
#: (docs/performance.md).
_DIRECT_SUM_SHARE = 0.5


@dataclass(frozen=True)
class DyadTally:
    """Dyad counts of a stretch of consecutive snapshots; stretches combine exactly.

    One tally per chunk of time; :meth:`then` joins the tally of the chunk that
    follows. Counts and distance sums add (the distance sums are integers, see
    ``_FIXED_BITS``), runs of snapshots together stitch across the edge, so the
    joined tally equals the tally of the joined chunks, bit for bit.

    Attributes
    ----------
    first_index : int
        Grid index of the stretch's first snapshot (as ``Snapshots.first_index``).
    n_snapshots : int
        Snapshots in the stretch.
    n_objects, n_roles : int
        Sizes of the run's object and role tables (codes are the run's).
    selection : {"together", "co-present", "given"}
        How the pairs were chosen (see :func:`dyad_tally`).
    key : ndarray of int64
        ``a * n_objects + b`` (a < b), sorted: the pairs counted.
    shared, together : ndarray of int64
        Snapshots at which both are present; at which they are together.
    distance_high, distance_low : ndarray of int64
        Summed distance at the shared snapshots,
        ``(high * 2**32 + low) * 2**-37`` metres.
    longest, head, tail : ndarray of int64
        Longest run together; the run together that starts at the stretch's
        first snapshot and the one that ends at its last (0 when none).
    first, last : ndarray of int64
        Grid index of the first and last snapshot together (-1: never).
    present : ndarray of int64
        Snapshots at which each object is present.
    role_key, role_count : ndarray of int64
        ``object * n_roles + role`` codes that occur, sorted, and their entries.
    """

    first_index: int
    n_snapshots: int
    n_objects: int
    n_roles: int
    selection: str
    key: np.ndarray
    shared: np.ndarray
    together: np.ndarray
    distance_high: np.ndarray
    distance_low: np.ndarray
    longest: np.ndarray
    head: np.ndarray
    tail: np.ndarray
    first: np.ndarray
    last: np.ndarray
    present: np.ndarray
    role_key: np.ndarray
    role_count: np.ndarray

    def then(self, later: DyadTally) -> DyadTally:
        """Return the tally of this stretch followed directly by ``later``."""
        if (later.n_objects, later.n_roles) != (self.n_objects, self.n_roles):
            raise ValueError("tallies of different runs (object or role tables differ)")
        if later.first_index != self.first_index + self.n_snapshots:
            raise ValueError("tallies to join must be of consecutive stretches of snapshots")
        if "together" in (self.selection, later.selection):
            raise ValueError(
                "tallies of the pairs together in each chunk cannot be joined (a pair may be "
                "together only in a later chunk): count every chunk with the run's keys"
            )
        if self.selection != later.selection:
            raise ValueError("tallies of differently chosen pairs cannot be joined")
        if self.n_snapshots == 0 or later.n_snapshots == 0:
            return later if self.n_snapshots == 0 else self
        key = np.union1d(self.key, later.key)
        mine, theirs = np.searchsorted(key, self.key), np.searchsorted(key, later.key)

        def both(name: str, fill: int = 0) -> tuple[np.ndarray, np.ndarray]:
            a, b = np.full(key.size, fill, np.int64), np.full(key.size, fill, np.int64)
            a[mine], b[theirs] = getattr(self, name), getattr(later, name)
            return a, b

        (head_a, head_b), (tail_a, tail_b) = both("head"), both("tail")
        (first_a, first_b), (last_a, last_b) = both("first", -1), both("last", -1)
        high, low = _carried(*(sum(both(name)) for name in ("distance_high", "distance_low")))
        role_key, role_at = np.unique(np.r_[self.role_key, later.role_key], return_inverse=True)
        n_a, n_b = self.n_snapshots, later.n_snapshots
        return DyadTally(
            first_index=self.first_index, n_snapshots=n_a + n_b,
            n_objects=self.n_objects, n_roles=self.n_roles, selection=self.selection, key=key,
            shared=sum(both("shared")), together=sum(both("together")),
            distance_high=high, distance_low=low,
            longest=np.maximum(np.maximum(*both("longest")), tail_a + head_b),
            head=np.where(head_a == n_a, n_a + head_b, head_a),
            tail=np.where(tail_b == n_b, n_b + tail_a, tail_b),
            first=np.where(first_a >= 0, first_a, first_b),
            last=np.where(last_b >= 0, last_b, last_a),
            present=self.present + later.present, role_key=role_key,
            role_count=np.bincount(role_at, np.r_[self.role_count, later.role_count],
                                   minlength=role_key.size).astype(np.int64),
        )  # fmt: skip

    def pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Return the object codes (a, b), a < b, of the counted pairs."""
        return self.key // self.n_objects, self.key % self.n_objects

    def mean_distance(self) -> np.ndarray:
        """Return the mean distance (m) of each pair over its shared snapshots."""
        total = self.distance_high * 2.0 ** (_LOW_BITS - _FIXED_BITS)
        total += self.distance_low * 2.0**-_FIXED_BITS
        with np.errstate(invalid="ignore", divide="ignore"):
            return total / self.shared

    def main_roles(self) -> np.ndarray:
        """Return each object's most frequent role code (ties: lowest code)."""
        return most_frequent_roles(self.role_key, self.role_count, self.n_objects, self.n_roles)


def _carried(high: np.ndarray, low: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the fixed-point halves with the low half's carry moved into the high half."""
    return high + (low >> _LOW_BITS), low & _LOW_MASK


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


def _pair_sums(
    snaps: Snapshots, a: np.ndarray, b: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return, per pair (a[k], b[k]), the shared snapshots and the distance sums over them.

    The distance sums are the two fixed-point halves (see ``_FIXED_BITS``).
    Positions go into (objects x snapshots) grids for a stretch of snapshots
    at a time (``GRID_BYTES`` / 2 bytes), and the pairs are handled in blocks
    whose work buffers take as much again; only the given pairs are visited.
    """
    n_pairs, n_obj = a.size, len(snaps.objects)
    shared = np.zeros(n_pairs, dtype=np.int64)
    high, low = np.zeros(n_pairs, dtype=np.int64), np.zeros(n_pairs, dtype=np.int64)
    if n_pairs == 0 or snaps.n_entries == 0:
        return shared, high, low
    span = np.hypot(np.ptp(snaps.x), np.ptp(snaps.y))
    if not span < _MAX_SPAN_M:
        raise ValueError(f"positions {span:.3g} m apart: coordinates are not in metres")
    width = max(1, GRID_BYTES // (2 * 8 * 2 * n_obj))  # two float64 grids
    rows = max(1, GRID_BYTES // (2 * 8 * _WORK_ARRAYS * min(width, snaps.n_snapshots)))
    cells = min(rows, n_pairs) * min(width, snaps.n_snapshots)
    work = (np.empty(_WORK_ARRAYS * cells), np.empty(cells, dtype=bool))
    offsets = snaps.offsets()
    for c0 in range(0, snaps.n_snapshots, width):  # per stretch of snapshots
        c1 = min(c0 + width, snaps.n_snapshots)
        lo, hi = offsets[c0], offsets[c1]
        if hi == lo:
            continue
        obj, col = snaps.obj[lo:hi], snaps.snap[lo:hi] - c0
        gx = np.full((n_obj, c1 - c0), np.nan)
        gy = np.full((n_obj, c1 - c0), np.nan)
        # positions in fixed-point units (a power of two: the distances are those in
        # metres times the unit, bit for bit)
        gx[obj, col] = snaps.x[lo:hi] * 2.0**_FIXED_BITS
        gy[obj, col] = snaps.y[lo:hi] * 2.0**_FIXED_BITS
        # Few, large whole-array calls: each releases the interpreter lock and must win
        # it back, which is slow while the episode search runs in the other thread.
        for p0 in range(0, n_pairs, rows):  # per block of pairs
            p1 = min(p0 + rows, n_pairs)
            part = _block_sums(gx, gy, a[p0:p1], b[p0:p1], span, work)
            shared[p0:p1] += part[0]
            high[p0:p1] += part[1]
            low[p0:p1] += part[2]
    high, low = _carried(high, low)
    return shared, high, low


#: float64-sized work buffers per (pair, snapshot) cell of a block: two positions, a
#: temporary and the fixed-point copy.
_WORK_ARRAYS = 4


def _block_sums(
    gx: np.ndarray,
    gy: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    span: float,
    work: tuple[np.ndarray, np.ndarray],
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return shared snapshots and the fixed-point distance sums of the pairs (a[k], b[k]).

    ``gx``/``gy`` are (objects, snapshots) grids of positions in fixed-point
    units, NaN where an object is absent; a snapshot at which either is
    absent is not shared and adds nothing. Each distance is rounded to the
    nearest unit. ``span`` (m) bounds every distance: when no sum can reach
    2**63 units (span times snapshots below 2**25 m, e.g. a pitch for a whole
    match) the integers are summed as they are; otherwise each is split into
    its 32-bit halves first. Both give the same halves. ``work`` is reused
    from block to block (float64 cells for four arrays, and booleans), so that
    no pass allocates memory.
    """
    shape = (a.size, gx.shape[1])
    cells = shape[0] * shape[1]
    floats, flags = work
    dx, dy, tmp = (floats[k * cells : (k + 1) * cells].reshape(shape) for k in range(3))
    units = floats[3 * cells : 4 * cells].view(np.int64).reshape(shape)
    # mode="clip" (the codes are all valid): with out=, the default "raise" copies
    # through a buffer and takes twice as long
    np.take(gx, a, axis=0, out=dx, mode="clip")
    np.take(gx, b, axis=0, out=tmp, mode="clip")
    dx -= tmp
    np.take(gy, a, axis=0, out=dy, mode="clip")
    np.take(gy, b, axis=0, out=tmp, mode="clip")
    dy -= tmp
    dx *= dx
    dy *= dy
    dx += dy
    np.sqrt(dx, out=dx)
    absent = np.isnan(dx, out=flags[:cells].reshape(shape))  # NaN: one of the two absent
    shared = shape[1] - absent.sum(axis=1)
    np.fmax(dx, 0.0, out=dx)
    np.rint(dx, out=dx)  # to the nearest unit
    np.copyto(units, dx, casting="unsafe")
    if span * shape[1] < _MAX_SPAN_M * _DIRECT_SUM_SHARE:
        high, low = _carried(np.zeros(a.size, dtype=np.int64), units.sum(axis=1))
        return shared, high, low
    high = np.right_shift(units, _LOW_BITS).sum(axis=1)
    np.bitwise_and(units, _LOW_MASK, out=units)
    return shared, high, units.sum(axis=1)


def co_present_pairs(snaps: Snapshots) -> np.ndarray:
    """Return the keys ``a * n_objects + b`` (a < b, sorted) of the pairs present at one time.

    Counted with an (objects x objects) product per stretch of snapshots, so
    for small studies only: refused beyond ``MAX_CO_PRESENT_OBJECTS`` objects.
    """
    n_obj = len(snaps.objects)
    if n_obj > MAX_CO_PRESENT_OBJECTS:
        raise InputError(
            f"{n_obj} objects: listing every co-present pair needs objects x objects memory; "
            f"it is offered up to {MAX_CO_PRESENT_OBJECTS} objects (keep the pairs ever together)"
        )
    met = np.zeros((n_obj, n_obj), dtype=bool)
    width = max(1, GRID_BYTES // (4 * max(n_obj, 1)))
    offsets = snaps.offsets()
    for c0 in range(0, snaps.n_snapshots, width):  # per stretch of snapshots
        c1 = min(c0 + width, snaps.n_snapshots)
        lo, hi = offsets[c0], offsets[c1]
        present = np.zeros((n_obj, c1 - c0), dtype=np.float32)
        present[snaps.obj[lo:hi], snaps.snap[lo:hi] - c0] = 1.0
        met |= (present @ present.T) > 0
    a, b = np.nonzero(np.triu(met, 1))  # row-major: sorted by a, then b
    return a.astype(np.int64) * n_obj + b


def dyad_tally(
    snaps: Snapshots,
    together: NeighbourPairs,
    pairs: str = "together",
    keys: np.ndarray | None = None,
) -> DyadTally:
    """Return the dyad counts of the chosen pairs of objects in ``snaps``.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots: a whole run, or one chunk of it (:meth:`Snapshots.window`).
    together : NeighbourPairs
        The pairs of entries of ``snaps`` counted as together (see :func:`dyad_table`).
    pairs : {"together", "co-present"}, default "together"
        Which pairs to count: those together at one snapshot or more, or
        every pair present at one snapshot or more (objects x objects memory).
    keys : ndarray of int64, optional
        Count exactly these pairs, ``a * n_objects + b`` (a < b, sorted), instead:
        over chunks of time, the pairs ever together are known only after a
        first pass (the union of each chunk's :func:`together_keys`).

    Returns
    -------
    DyadTally
        Tallies of consecutive chunks join with :meth:`DyadTally.then` into
        the tally of the whole when their pairs are fixed in advance
        (``keys``) or are all co-present pairs; a pair first together in a
        later chunk would be missing from an earlier chunk's ``"together"``
        tally, so such tallies are not joined.
    """
    _check_together(snaps, together)
    n_obj = len(snaps.objects)
    if keys is not None:
        selection, key = "given", np.asarray(keys, dtype=np.int64)
        if np.setdiff1d(together_keys(snaps, together), key).size:
            raise ValueError("together holds pairs that are not among the keys")
    elif pairs == "co-present":
        selection, key = "co-present", co_present_pairs(snaps)
    elif pairs == "together":
        selection, key = "together", together_keys(snaps, together)
    else:
        raise bad_setting("dyad_pairs", f"must be one of {', '.join(PAIR_SELECTIONS)}")
    shared, high, low = _pair_sums(snaps, key // max(n_obj, 1), key % max(n_obj, 1))
    x, longest, head, tail, first, last = _together_runs(snaps, together, key)
    role_key, role_count = snaps.role_counts()
    return DyadTally(
        first_index=snaps.first_index, n_snapshots=snaps.n_snapshots,
        n_objects=n_obj, n_roles=snaps.n_roles, selection=selection, key=key,
        shared=shared, together=x, distance_high=high, distance_low=low,
        longest=longest, head=head, tail=tail,
        first=np.where(x > 0, first + snaps.first_index, -1),
        last=np.where(x > 0, last + snaps.first_index, -1),
        present=np.bincount(snaps.obj, minlength=n_obj).astype(np.int64),
        role_key=role_key, role_count=role_count,
    )  # fmt: skip


def pair_keys(snaps: Snapshots, together: NeighbourPairs) -> np.ndarray:
    """Return per pair of entries in ``together`` its objects' key ``a * n_objects + b``, a < b."""
    n_obj = np.int64(len(snaps.objects))
    oa, ob = snaps.obj[together.i].astype(np.int64), snaps.obj[together.j].astype(np.int64)
    return np.minimum(oa, ob) * n_obj + np.maximum(oa, ob)


def together_keys(snaps: Snapshots, together: NeighbourPairs) -> np.ndarray:
    """Return the keys ``a * n_objects + b`` (a < b, sorted) of the pairs in ``together``."""
    return _distinct(pair_keys(snaps, together))


def _distinct(keys: np.ndarray) -> np.ndarray:
    """Return the sorted distinct values of int64 ``keys`` (sorted in place).

    Sort-based: ``numpy.unique`` takes a hash path for int64 that is several times
    slower on millions of keys (15 s against 2 s for the 50 M neighbour pairs of a
    crowd of 2 000 over 25 snapshots).
    """
    keys.sort()
    if keys.size == 0:
        return keys
    first = np.empty(keys.size, dtype=bool)
    first[0] = True
    np.not_equal(keys[1:], keys[:-1], out=first[1:])
    return keys[first]


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


def expected_cap(n_pairs: int, max_expected_pairs: int) -> int:
    """Return the pairings of positions used per pair for De when ``n_pairs`` pairs need it.

    ``max_expected_pairs``, lowered so that all pairs together stay within
    ``EXPECTED_BUDGET``, but not below ``MIN_EXPECTED_PAIRS`` (nor above the
    setting).
    """
    shared = max(EXPECTED_BUDGET // max(int(n_pairs), 1), MIN_EXPECTED_PAIRS)
    return int(min(int(max_expected_pairs), shared))


class TrackSamples:
    """The positions De reads: each object's entries at the ranks of its even samples.

    De thins each track of a pair to an even sample of its entries in time
    order (:func:`_even_sample` of the track's entry count); which ranks a
    track needs depends only on the entry counts and the pairs. A run held in
    memory reads them from its snapshots (:meth:`of`); a run over time
    windows gathers them window by window (:meth:`needed`, :meth:`gather`,
    :meth:`joined`), with the same positions.

    Attributes
    ----------
    counts : ndarray of int64
        Entries of each object in the whole run.
    """

    def __init__(self, counts: np.ndarray, snaps: Snapshots | None = None,
                 keys: np.ndarray | None = None, xy: np.ndarray | None = None) -> None:  # fmt: skip
        self.counts = np.asarray(counts, dtype=np.int64)
        self._snaps, self._keys, self._xy = snaps, keys, xy
        self._cache: dict[tuple[int, int], np.ndarray] = {}

    @classmethod
    def of(cls, snaps: Snapshots) -> TrackSamples:
        """Return the samples of a run held in memory."""
        return cls(np.diff(snaps.object_bounds()), snaps=snaps)

    @staticmethod
    def needed(
        a: np.ndarray, b: np.ndarray, counts: np.ndarray, max_expected_pairs: int
    ) -> np.ndarray:
        """Return the ``object * 2**32 + rank`` keys of every entry De reads for pairs (a, b).

        ``counts`` holds each object's entries in the whole run.
        """
        a, b = np.asarray(a, dtype=np.int64), np.asarray(b, dtype=np.int64)
        if a.size == 0:
            return np.zeros(0, dtype=np.int64)
        counts = np.asarray(counts, dtype=np.int64)
        m_a, m_b = _subsample_sizes(counts[a], counts[b], expected_cap(a.size, max_expected_pairs))
        tracks = _distinct(np.concatenate([a * 2**32 + m_a, b * 2**32 + m_b]))
        keys = [o * 2**32 + _even_sample(int(counts[o]), m)
                for o, m in zip((tracks >> 32).tolist(), (tracks & (2**32 - 1)).tolist(),
                                strict=True)]  # fmt: skip
        return _distinct(np.concatenate(keys))

    @staticmethod
    def gather(snaps: Snapshots, before: np.ndarray, needed: np.ndarray) -> tuple[np.ndarray, ...]:
        """Return the keys and positions of a window's needed entries.

        ``before`` holds each object's entries in the windows before this one.
        """
        order = snaps.object_order()
        obj = snaps.obj[order].astype(np.int64)
        starts = snaps.object_bounds()[:-1]
        rank = before[obj] + np.arange(obj.size) - starts[obj]
        keys = obj * 2**32 + rank
        hit = np.isin(keys, needed, assume_unique=True)
        picked = order[hit]
        return keys[hit], np.column_stack([snaps.x[picked], snaps.y[picked]])

    @classmethod
    def joined(cls, counts: np.ndarray, parts: list[tuple[np.ndarray, np.ndarray]]) -> TrackSamples:
        """Return the samples gathered from every window (:meth:`gather`)."""
        keys = np.concatenate([k for k, _ in parts]) if parts else np.zeros(0, np.int64)
        xy = np.concatenate([p for _, p in parts]) if parts else np.zeros((0, 2))
        order = np.argsort(keys, kind="stable")
        return cls(counts, keys=keys[order], xy=xy[order])

    def track(self, o: int, m: int) -> np.ndarray:
        """Return the (m, 2) positions of object ``o``'s even sample of ``m`` entries."""
        if (o, m) not in self._cache:
            ranks = _even_sample(int(self.counts[o]), m)
            if self._snaps is not None:
                by_obj, start = self._snaps.object_order(), self._snaps.object_bounds()
                picked = by_obj[start[o] : start[o + 1]][ranks]
                xy = np.column_stack([self._snaps.x[picked], self._snaps.y[picked]])
            else:
                at = np.searchsorted(self._keys, o * 2**32 + ranks)
                xy = self._xy[at]
            self._cache[(o, m)] = xy
        return self._cache[(o, m)]


def expected_distances(
    tracks: Snapshots | TrackSamples, tally: DyadTally, max_expected_pairs: int
) -> np.ndarray:
    """Return De, the mean distance over all pairings of a position of a with one of b.

    Parameters
    ----------
    tracks : Snapshots or TrackSamples
        The whole run (De pairs positions at any times, so it is not a sum over
        chunks), or the samples of it De reads, gathered window by window.
    tally : DyadTally
        The pairs (the whole run's tally).
    max_expected_pairs : int
        Most pairings per pair; above it both tracks are thinned (module
        docstring). With many pairs it is lowered (:func:`expected_cap`).

    Returns
    -------
    ndarray
        De of each pair of ``tally``, in its order.
    """
    a, b = tally.pairs()
    if a.size == 0:
        return np.zeros(0)
    samples = tracks if isinstance(tracks, TrackSamples) else TrackSamples.of(tracks)
    cap = expected_cap(a.size, max_expected_pairs)
    counts = samples.counts
    track = samples.track
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
    snaps: Snapshots, together: NeighbourPairs, key: np.ndarray
) -> tuple[np.ndarray, ...]:
    """Return per dyad row (the sorted pair keys ``key``) the runs of snapshots together.

    Returns (snapshots together, longest run, run from the first snapshot,
    run to the last snapshot, first and last snapshot together), from one
    sort of (row, snapshot) keys of the together pairs.
    """
    n_rows = key.size
    # together pairs -> dyad rows; every together pair's key is among ``key``
    row = np.searchsorted(key, pair_keys(snaps, together))
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
    x = np.bincount(row, minlength=n_rows).astype(np.int64)
    longest, _ = longest_runs(row, snap, n_rows)
    edges = [np.zeros(n_rows, dtype=np.int64) for _ in range(4)]
    head, tail, first_snap, last_snap = edges
    if row.size:
        new_run = np.r_[True, (row[1:] != row[:-1]) | (snap[1:] != snap[:-1] + 1)]
        run_first = np.flatnonzero(new_run)
        run_len = np.diff(np.append(run_first, row.size))
        run_row, run_start = row[run_first], snap[run_first]
        at_start, at_end = run_start == 0, run_start + run_len == snaps.n_snapshots
        head[run_row[at_start]] = run_len[at_start]
        tail[run_row[at_end]] = run_len[at_end]
        brk = np.flatnonzero(row[1:] != row[:-1])
        first_snap[row[np.r_[0, brk + 1]]] = snap[np.r_[0, brk + 1]]
        last_snap[row[np.r_[brk, row.size - 1]]] = snap[np.r_[brk, row.size - 1]]
    return x, longest, head, tail, first_snap, last_snap


#: Columns of the table of objects (the nodes of the association network).
OBJECT_COLUMNS = ["object", "role", "present_snapshots", "present_s"]


def object_rows(tally: DyadTally, snaps: Snapshots) -> pd.DataFrame:
    """Return one row per object present in the run: its id, main role and time present.

    Parameters
    ----------
    tally : DyadTally
        Counts of the whole run (the tallies of its chunks joined).
    snaps : Snapshots
        The run or any chunk of it: only its object and role names and its step are read.

    Returns
    -------
    DataFrame
        ``object``, ``role`` (the object's most frequent role), ``present_snapshots``
        and ``present_s`` (snapshots with the object present, and that times the
        step), in object code order; objects never present are left out.
    """
    present = np.asarray(tally.present, dtype=np.int64)
    seen = np.flatnonzero(present > 0)
    roles = tally.main_roles()
    return pd.DataFrame(
        {
            "object": pd.array(np.asarray(snaps.objects).astype(str)[seen], dtype=str),
            "role": pd.array(np.asarray(snaps.roles).astype(str)[roles[seen]], dtype=str),
            "present_snapshots": present[seen],
            "present_s": present[seen] * snaps.step_s,
        },
        columns=OBJECT_COLUMNS,
    )


def dyad_rows(
    tally: DyadTally, snaps: Snapshots, expected: np.ndarray, max_expected_pairs: int
) -> pd.DataFrame:
    """Return the dyad table of a tally, given the expected distance of each of its pairs.

    Parameters
    ----------
    tally : DyadTally
        Counts of the whole run (the tallies of its chunks joined).
    snaps : Snapshots
        The run or any chunk of it: only its object and role names and its step are read.
    expected : ndarray
        Expected distance De of each pair of the tally (see :func:`expected_distances`).
    max_expected_pairs : int
        The cap De was computed with; ``attrs`` keeps the one used per pair
        (:func:`expected_cap`).

    Returns
    -------
    DataFrame
        As :func:`dyad_table`, without its ``radius_m`` attribute.
    """
    a, b = tally.pairs()
    if a.size == 0:
        table = _empty_table()
    else:
        table = _dyad_frame(tally, snaps, expected).sort_values(
            ["half_weight_index", "object_a", "object_b"],
            ascending=[False, True, True],
            kind="stable",
        )
    table = table.reset_index(drop=True)
    cap = expected_cap(tally.key.size, max_expected_pairs)
    table.attrs.update(step_s=snaps.step_s, max_expected_pairs=cap)
    return table


def _dyad_frame(tally: DyadTally, snaps: Snapshots, expected: np.ndarray) -> pd.DataFrame:
    """Return the dyad rows of a tally's pairs, in the tally's order."""
    a, b = tally.pairs()
    shared, x = tally.shared, tally.together
    only_a = tally.present[a] - shared
    only_b = tally.present[b] - shared
    mean_dist = tally.mean_distance()

    def utc(grid_index: np.ndarray) -> pd.DatetimeIndex:
        t = (grid_index * snaps.step_ns).astype("datetime64[ns]")
        t[grid_index < 0] = np.datetime64("NaT")
        return pd.DatetimeIndex(t).tz_localize("UTC")

    with np.errstate(invalid="ignore", divide="ignore"):
        cs = (expected - mean_dist) / (expected + mean_dist)
    apart = shared - x
    step = snaps.step_s
    roles = tally.main_roles()
    objects = np.asarray(snaps.objects).astype(str)
    role_names = np.asarray(snaps.roles).astype(str)
    return pd.DataFrame(
        {
            "object_a": pd.array(objects[a], dtype=str),
            "object_b": pd.array(objects[b], dtype=str),
            "role_a": pd.array(role_names[roles[a]], dtype=str),
            "role_b": pd.array(role_names[roles[b]], dtype=str),
            "shared_snapshots": shared,
            "together_snapshots": x,
            "only_a_snapshots": only_a,
            "only_b_snapshots": only_b,
            "together_s": x * step,
            "longest_together_s": tally.longest * step,
            "first_together": utc(tally.first),
            "last_together": utc(tally.last),
            "mean_distance_m": mean_dist,
            "expected_distance_m": expected,
            "simple_ratio_index": x / (x + apart + only_a + only_b),
            "half_weight_index": x / (x + apart + 0.5 * (only_a + only_b)),
            "proximity_index": x / shared,
            "coefficient_of_sociality": cs,
        },
        columns=DYAD_COLUMNS,
    )


@dataclass(frozen=True)
class DyadParams:
    """Settings of the dyad table.

    Parameters
    ----------
    dyad_pairs : {"together", "co-present"}, default "together"
        Pairs listed: those within the radius at one snapshot or more, or
        every pair present at one snapshot or more. The second grows with the
        square of the number of objects (for small studies; refused beyond
        ``MAX_CO_PRESENT_OBJECTS``).
    max_expected_pairs : int, default 62_500
        Most pairings of a position of a with one of b used for the expected
        distance De of one pair (250 x 250 positions); above it, both tracks
        are thinned evenly (module docstring). On a 90-minute match at 25 Hz
        this kept every pair's De within 0.5 % of the value from 4 000 000
        pairings (median 0.1 %); raise it for more precision at proportional cost.
        With more than 3 200 pairs it is lowered so that all pairs together use
        at most ``EXPECTED_BUDGET`` pairings, but never below
        ``MIN_EXPECTED_PAIRS`` (:func:`expected_cap`; errors in docs/association.md).
    """

    dyad_pairs: str = field(
        default="together",
        metadata={"help": "pairs in dyads.csv: together (within the radius at least once) or "
                  "co-present (every pair seen at one time; grows with objects squared)",
                  "choices": PAIR_SELECTIONS},
    )  # fmt: skip
    max_expected_pairs: int = field(
        default=62_500,
        metadata={"help": "most pairings of positions for a pair's expected distance "
                  "(coefficient of sociality); above it both tracks are thinned evenly"},
    )  # fmt: skip

    def __post_init__(self) -> None:
        if self.dyad_pairs not in PAIR_SELECTIONS:
            raise bad_setting("dyad_pairs", f"must be one of {', '.join(PAIR_SELECTIONS)}")
        if not isinstance(self.max_expected_pairs, int) or self.max_expected_pairs < 1:
            raise bad_setting("max_expected_pairs", "must be a whole number of at least 1")


def dyad_table(
    snaps: Snapshots, together: NeighbourPairs, params: DyadParams | None = None
) -> pd.DataFrame:
    """Return association counts and indices for pairs of objects.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    together : NeighbourPairs
        The pairs of entries counted as together, normally
        ``neighbour_pairs(snaps, radius)``; any subset of such pairs (for
        example those that also move alike) may be given. Pairs are used as
        given, never recomputed.
    params : DyadParams, optional
        Which pairs, and the cap of De's pairings; the defaults when omitted.

    Returns
    -------
    DataFrame
        One row per unordered pair of objects (``object_a`` has the lower
        object code) that are together at one snapshot or more (or, with
        ``dyad_pairs="co-present"``, present at one snapshot or more), with the
        columns listed in the module docstring.

        Sorted by half-weight index, descending, then ``object_a``,
        ``object_b``. ``attrs`` holds ``radius_m``, ``step_s`` and
        ``max_expected_pairs``.

    Notes
    -----
    The indices, the subsampling for De and their sources are in the module
    docstring. Time O(n_pairs x n_snapshots + P log P) for P together
    entry pairs, plus O(n_pairs x max_expected_pairs); memory O(GRID_BYTES +
    n_pairs + P): position grids of stretches of snapshots, never an
    objects x objects table (except for ``"co-present"``).

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
    return dyads_and_objects(snaps, together, params)[0]


def dyads_and_objects(
    snaps: Snapshots, together: NeighbourPairs, params: DyadParams | None = None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return :func:`dyad_table` and :func:`object_rows` from one tally."""
    params = params or DyadParams()
    tally = dyad_tally(snaps, together, pairs=params.dyad_pairs)
    cap = params.max_expected_pairs
    table = dyad_rows(tally, snaps, expected_distances(snaps, tally, cap), cap)
    table.attrs = {"radius_m": float(together.radius), **table.attrs}
    return table, object_rows(tally, snaps)


def dyad_matrix(dyads: pd.DataFrame, index: str = "half_weight_index") -> pd.DataFrame:
    """Return the symmetric object x object matrix of one dyad column.

    Parameters
    ----------
    dyads : DataFrame
        Output of :func:`dyad_table` (or a subset of its rows).
    index : str, default "half_weight_index"
        Numeric column to spread, e.g. ``simple_ratio_index``,
        ``proximity_index``, ``coefficient_of_sociality``, ``together_s``.

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
