"""Pair evidence: whether two objects travel together, judged on their own recent history.

A link decided at one snapshot from distance and velocity alone chains
strangers together wherever people stand, queue or crowd: a stranger a metre
away, walking the same way for a moment, looks like a companion. Here a pair is
linked at a snapshot only when its own evidence over a window of time around
that snapshot says so:

1. **Close, and closer than the crowd.** At each snapshot the pair is *near*
   when their distance is at most the link distance and, with ``nearest = k``,
   each is among the other's k nearest neighbours (a mutual k-nearest-neighbour
   relation, Brito et al. 1997): in a crowd, close means closer than the
   strangers around.
2. **Moving alike.** When both move faster than ``min_speed``, their headings
   and speeds agree (``max_heading``, ``max_speed_ratio``) and, with
   ``min_abreast``, they walk side by side rather than in file: the line
   joining them makes at least that angle with their common heading
   (companions walk abreast or in a V, Moussaïd et al. 2010, while strangers
   in a stream follow one another). When both are slower, nearness counts as
   evidence only with ``standing_counts``: proximity of people standing,
   queueing or parked says little about company.
3. **Persistently.** A snapshot at which the pair is near and moves alike is a
   *together* snapshot. The pair is linked at snapshot t when together
   snapshots make up at least ``evidence_share`` of the snapshots within
   ``evidence_window / 2`` of t at which both are present without a break.
   The window is centred, so the rule reads the same forwards and backwards in
   time.

Links exist only where the pair is within the link distance, so groups still
form, split and merge snapshot by snapshot (the per-snapshot groups and the
episode search downstream are unchanged); a pair that meets for a moment, or
walks beside a stranger for a moment, is not linked.

References
----------
.. [1] M. R. Brito, E. L. Chávez, A. J. Quiroz, J. E. Yukich, "Connectivity of the
   mutual k-nearest-neighbor graph in clustering and outlier detection",
   Statistics & Probability Letters 35(1), 1997. (from memory, not checked)
.. [2] M. Moussaïd, N. Perozo, S. Garnier, D. Helbing, G. Theraulaz, "The walking
   behaviour of pedestrian social groups and its impact on crowd dynamics",
   PLoS ONE 5(4): e10047, 2010. (from memory, not checked)
.. [3] E. T. Hall, "The Hidden Dimension", Doubleday, 1966. (from memory, not checked)
"""

from __future__ import annotations

import numpy as np

from comove.tracks.alignment import Snapshots
from comove.tracks.motion import Motion
from comove.tracks.neighbours import NeighbourPairs


def evidence_reach(window_s: float, step_s: float) -> int:
    """Return how many snapshots the evidence window reaches on each side of a snapshot."""
    return max(0, int(np.floor(window_s / 2 / step_s + 1e-9)))


def _mutual_ranks(i: np.ndarray, j: np.ndarray, d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return, per pair, how many neighbours of ``i`` and of ``j`` are strictly closer.

    Ties share a rank, so the ranks do not depend on how objects are numbered.
    """
    n = i.size
    ends = np.concatenate([i, j])
    dist = np.concatenate([d, d])
    order = np.lexsort((dist, ends))
    e, dd = ends[order], dist[order]
    pos = np.arange(e.size)
    new_end = np.ones(e.size, dtype=bool)
    new_end[1:] = e[1:] != e[:-1]
    new_value = new_end.copy()
    new_value[1:] |= dd[1:] != dd[:-1]
    # rank = index of the first neighbour at this distance, counted from the entry's first
    first_at = np.maximum.accumulate(np.where(new_value, pos, 0))
    first_of_end = np.maximum.accumulate(np.where(new_end, pos, 0))
    rank = np.empty(e.size, dtype=np.int64)
    rank[order] = first_at - first_of_end
    return rank[:n], rank[n:]


def together_snapshots(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, params
) -> np.ndarray:
    """Return, per neighbour pair, whether the pair is near and moves alike there.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    pairs : NeighbourPairs
        Entry pairs within the link distance (every pair of a snapshot, so
        that neighbour ranks are complete).
    motion : Motion
        Velocity of every entry.
    params : GroupParams
        ``radius``, ``nearest``, ``min_speed``, ``max_heading``,
        ``max_speed_ratio``, ``min_abreast`` and ``standing_counts``.

    Returns
    -------
    ndarray of bool
        One value per pair, in the order of ``pairs``.
    """
    i, j = pairs.i, pairs.j
    dx = snaps.x[j] - snaps.x[i]
    dy = snaps.y[j] - snaps.y[i]
    d = np.sqrt(dx * dx + dy * dy)
    near = d <= params.radius
    if params.nearest:
        rank_i, rank_j = _mutual_ranks(i, j, d)
        near &= (rank_i < params.nearest) & (rank_j < params.nearest)
    vxi, vyi, vxj, vyj = motion.vx[i], motion.vy[i], motion.vx[j], motion.vy[j]
    si, sj = motion.speed[i], motion.speed[j]
    with np.errstate(invalid="ignore", divide="ignore"):
        moving = (si > params.min_speed) & (sj > params.min_speed)
        alike = moving.copy()
        if params.max_heading is not None:
            diff = np.degrees(np.arctan2(np.abs(vxi * vyj - vyi * vxj), vxi * vxj + vyi * vyj))
            alike &= diff <= params.max_heading + 1e-9
        if params.max_speed_ratio is not None:
            ratio = np.maximum(si, sj) / np.minimum(si, sj)
            alike &= ratio <= params.max_speed_ratio * (1 + 1e-12)
        if params.min_abreast is not None:
            # |sin| of the angle between the line joining them and their common heading
            hx, hy = vxi + vxj, vyi + vyj
            sine = np.abs(dx * hy - dy * hx) / (np.sqrt(hx * hx + hy * hy) * d)
            alike &= ~(sine < np.sin(np.radians(params.min_abreast)) - 1e-12)
    together = near & alike
    if params.standing_counts:
        together |= near & ~moving
    return together


def _presence_runs(snaps: Snapshots) -> tuple[np.ndarray, np.ndarray]:
    """Return, per entry, the first and last snapshot of its object's unbroken presence there."""
    order = snaps.object_order()
    if order.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    obj, snap = snaps.obj[order], snaps.snap[order]
    start = np.ones(order.size, dtype=bool)
    start[1:] = (obj[1:] != obj[:-1]) | (snap[1:] != snap[:-1] + 1)
    run = np.cumsum(start) - 1
    starts = np.flatnonzero(start)
    ends = np.append(starts[1:] - 1, order.size - 1)
    first = np.empty(order.size, dtype=np.int64)
    last = np.empty(order.size, dtype=np.int64)
    first[order] = snap[starts][run]
    last[order] = snap[ends][run]
    return first, last


def evidence_links(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, params
) -> NeighbourPairs:
    """Return the neighbour pairs whose own evidence around each snapshot links them.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    pairs : NeighbourPairs
        Entry pairs within the link distance.
    motion : Motion
        Velocity of every entry.
    params : GroupParams
        Link distance, motion predicates and the evidence settings
        (``evidence_window``, ``evidence_share``, ``nearest``, ``min_abreast``,
        ``standing_counts``).

    Returns
    -------
    NeighbourPairs
        The linked pairs (a subset of ``pairs``, same order).

    Notes
    -----
    With ``h`` = :func:`evidence_reach` snapshots, pair (a, b) at snapshot t is
    linked when ``T >= evidence_share * P``, where P counts the snapshots
    ``max(t - h, fa, fb) .. min(t + h, la, lb)`` (``[fa, la]`` and ``[fb, lb]``
    are the unbroken presence runs of a and b that hold t) and T counts those of
    them at which the pair is together (:func:`together_snapshots`). Every
    pair of every snapshot is counted at once: the together flags are summed
    cumulatively per object pair, in time order, and each window is a
    difference of two cumulative sums found by binary search.

    References
    ----------
    .. [1] M. R. Brito, E. L. Chávez, A. J. Quiroz, J. E. Yukich, "Connectivity of
       the mutual k-nearest-neighbor graph in clustering and outlier detection",
       Statistics & Probability Letters 35(1), 1997. (from memory, not checked)
    .. [2] M. Moussaïd, N. Perozo, S. Garnier, D. Helbing, G. Theraulaz, "The
       walking behaviour of pedestrian social groups and its impact on crowd
       dynamics", PLoS ONE 5(4): e10047, 2010. (from memory, not checked)
    """
    i, j = pairs.i, pairs.j
    if i.size == 0:
        return NeighbourPairs(i, j, pairs.radius)
    together = together_snapshots(snaps, pairs, motion, params)
    oi, oj = snaps.obj[i].astype(np.int64), snaps.obj[j].astype(np.int64)
    n_obj = np.int64(len(snaps.objects))
    _, pair_id = np.unique(np.minimum(oi, oj) * n_obj + np.maximum(oi, oj), return_inverse=True)
    t = snaps.snap[i].astype(np.int64)
    width = np.int64(snaps.n_snapshots + 1)
    key = pair_id.astype(np.int64) * width + t
    # pairs come in snapshot order: a stable sort by pair gives (pair, snapshot) order
    order = np.argsort(pair_id, kind="stable")
    key_sorted = key[order]
    count = np.concatenate([[0], np.cumsum(together[order], dtype=np.int64)])
    first, last = _presence_runs(snaps)
    h = evidence_reach(params.evidence_window, snaps.step_s)
    lo = np.maximum(np.maximum(t - h, first[i]), first[j])
    hi = np.minimum(np.minimum(t + h, last[i]), last[j])
    base = key - t
    n_together = (count[np.searchsorted(key_sorted, base + hi, side="right")]
                  - count[np.searchsorted(key_sorted, base + lo, side="left")])  # fmt: skip
    link = n_together >= params.evidence_share * (hi - lo + 1) - 1e-9
    return NeighbourPairs(i[link], j[link], pairs.radius)
