"""Per-snapshot neighbour graphs: pairs of present objects within a radius.

All snapshots are searched with one k-d tree per chunk of snapshots: the
snapshots of a chunk are laid side by side along x, each shifted by more than
the extent of the data plus twice the radius, so that no pair can form across
snapshots. One tree query then finds the pairs of every snapshot in the chunk,
which is far faster than one tree per snapshot when snapshots hold few objects.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from comove.alignment import Snapshots

#: Entries per k-d tree; bounds the memory of the search (a few hundred MB).
DEFAULT_CHUNK_ENTRIES = 4_000_000


@dataclass
class NeighbourPairs:
    """Undirected edges of the neighbour graphs of all snapshots.

    Attributes
    ----------
    i, j : ndarray of int64
        Entry indices (into :class:`~comove.alignment.Snapshots`) of the two
        ends, ``i < j``, both in the same snapshot; sorted by ``i`` then ``j``.
    radius : float
        Search radius in metres (pairs at exactly this distance are included).
    """

    i: np.ndarray
    j: np.ndarray
    radius: float

    @property
    def n_pairs(self) -> int:
        """Return the number of pairs."""
        return int(self.i.size)

    def keys(self, n_entries: int) -> np.ndarray:
        """Return sorted int64 keys ``i * n_entries + j`` for membership tests."""
        return self.i * np.int64(n_entries) + self.j


def neighbour_pairs(
    snaps: Snapshots, radius: float, chunk_entries: int = DEFAULT_CHUNK_ENTRIES
) -> NeighbourPairs:
    """Return all pairs of entries in the same snapshot within ``radius`` metres.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    radius : float
        Distance in metres; inclusive.
    chunk_entries : int, default 4_000_000
        Approximate number of entries searched with one tree.

    Returns
    -------
    NeighbourPairs
        The edges, sorted.

    Notes
    -----
    Candidate pairs are found with a slightly widened radius in the shifted
    coordinates and then re-tested on the original coordinates, so the
    inclusive ``<= radius`` test is exact and unaffected by the shift's
    rounding. Time is O(E log E) for E entries in a chunk plus the output;
    memory is O(E + pairs).

    References
    ----------
    .. [1] J. L. Bentley, "Multidimensional binary search trees used for
       associative searching", Communications of the ACM 18(9), 1975.
    """
    if not (np.isfinite(radius) and radius > 0):
        raise ValueError("radius must be a positive number of metres")
    n = snaps.n_entries
    empty = np.empty(0, dtype=np.int64)
    if n < 2:
        return NeighbourPairs(empty, empty, float(radius))

    x0 = snaps.x - snaps.x.min()
    pitch = float(x0.max()) + 2.0 * radius + 1.0  # shift between consecutive snapshots
    offsets = snaps.offsets()
    # cut at snapshot boundaries so that every snapshot is searched whole
    bounds = np.unique(
        np.append(offsets[np.searchsorted(offsets, np.arange(0, n, chunk_entries))], n)
    )
    found_i, found_j = [], []
    widened = radius * (1.0 + 1e-9) + 1e-9
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        s = snaps.snap[lo:hi]
        xs = x0[lo:hi] + (s - s[0]) * pitch
        tree = cKDTree(
            np.column_stack([xs, snaps.y[lo:hi]]), balanced_tree=False, compact_nodes=False
        )
        pairs = tree.query_pairs(widened, output_type="ndarray").astype(np.int64)
        if pairs.size == 0:
            continue
        a, b = pairs[:, 0] + lo, pairs[:, 1] + lo
        keep = (snaps.x[a] - snaps.x[b]) ** 2 + (snaps.y[a] - snaps.y[b]) ** 2 <= radius * radius
        a, b = a[keep], b[keep]
        found_i.append(np.minimum(a, b))
        found_j.append(np.maximum(a, b))
    if not found_i:
        return NeighbourPairs(empty, empty, float(radius))
    i = np.concatenate(found_i)
    j = np.concatenate(found_j)
    order = np.lexsort((j, i))
    return NeighbourPairs(i[order], j[order], float(radius))
