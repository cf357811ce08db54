"""Pair evidence: whether two objects travel together, judged on their own recent history.

A link decided at one snapshot from distance and velocity alone chains
strangers together wherever people stand, queue or crowd: a stranger a metre
away, walking the same way for a moment, looks like a companion. Here a pair is
linked at a snapshot only when its own evidence over a window of time around
that snapshot says so:

1. **Close, and closer than the crowd.** At each snapshot the pair is *near*
   when their distance is at most the neighbour distance and, with ``nearest = k``,
   each is among the other's k nearest neighbours (a mutual k-nearest-neighbour
   relation, Brito et al. 1997): in a crowd, close means closer than the
   strangers around.
2. **Moving alike.** When both move faster than ``min_speed``, their headings
   and speeds agree (``max_heading``, ``max_speed_ratio``) and, with
   ``min_abreast``, they walk side by side rather than in file: the line
   joining them makes at least that angle with their common heading
   (companions walk abreast or in a V, Moussaïd et al. 2010, while strangers
   in a stream follow one another). When they are not both moving, nearness
   is weighed as ``standing`` says: ``"together"`` (resting animals, players
   marking at a stoppage), ``"ignored"`` (neither for nor against: people who
   walked together and stop keep their evidence, strangers standing side by
   side gain none) or ``"apart"`` (queues of vehicles at lights).
3. **Persistently.** A snapshot at which the pair is near and moves alike is a
   *together* snapshot. The pair is linked at snapshot t when together
   snapshots make up at least ``evidence_share`` of the snapshots within
   ``evidence_window / 2`` of t at which both are present without a break
   (ignored snapshots left out; with none left there is no evidence).
   The window is centred, so the rule reads the same forwards and backwards in
   time.

Links exist only where the pair is within the neighbour distance, so groups still
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


def _kth_nearest(ends: np.ndarray, dist: np.ndarray, n_entries: int, k: int) -> np.ndarray:
    """Return per entry the k-th smallest of its neighbour distances (inf with fewer than k).

    ``ends`` and ``dist`` list each neighbour of each entry (both directions
    of every pair). Ties count as often as they occur, so a partner at
    distance d has fewer than k neighbours strictly closer exactly when
    d <= the k-th smallest distance: the rank test needs no sort, only k
    passes of a minimum per entry.
    """
    degree = np.bincount(ends, minlength=n_entries)
    # with k neighbours or fewer every partner is among the k nearest: only the
    # busier entries are looked at, renumbered compactly
    busy = np.flatnonzero(degree > k)
    kth = np.full(n_entries, np.inf)
    if busy.size == 0:
        return kth
    compact = np.full(n_entries, -1, dtype=np.int64)
    compact[busy] = np.arange(busy.size)
    rows = np.flatnonzero(degree[ends] > k)
    e, d = compact[ends[rows]], dist[rows]
    found = np.full(busy.size, np.inf)
    need = np.full(busy.size, k, dtype=np.int64)
    for _ in range(k):
        if e.size == 0:
            break
        low = np.full(busy.size, np.inf)
        np.minimum.at(low, e, d)
        at_low = d == low[e]
        count = np.bincount(e[at_low], minlength=busy.size)
        reached = (count >= need) & (need > 0)
        found[reached] = low[reached]
        need = np.where(count >= need, 0, need - count)
        keep = ~at_low & (need[e] > 0)
        e, d = e[keep], d[keep]
    kth[busy] = found
    return kth


def together_snapshots(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, params
) -> tuple[np.ndarray, np.ndarray]:
    """Return, per neighbour pair, whether the pair is near and moves alike there.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    pairs : NeighbourPairs
        Entry pairs within the neighbour distance (every pair of a snapshot, so
        that neighbour ranks are complete).
    motion : Motion
        Velocity of every entry.
    params : GroupParams
        ``radius``, ``nearest``, ``min_speed``, ``max_heading``,
        ``max_speed_ratio``, ``min_abreast`` and ``standing``.

    Returns
    -------
    together, ignored : ndarray of bool
        Per pair, in the order of ``pairs``: whether the pair is together
        there, and whether the snapshot is left out of its evidence (near,
        not both moving, with ``standing="ignored"``).
    """
    i, j = pairs.i, pairs.j
    dx = snaps.x[j] - snaps.x[i]
    dy = snaps.y[j] - snaps.y[i]
    d = np.sqrt(dx * dx + dy * dy)
    near = d <= params.radius
    if params.nearest:  # each among the other's k nearest: fewer than k strictly closer
        kth = _kth_nearest(np.concatenate([i, j]), np.concatenate([d, d]), snaps.n_entries,
                           int(params.nearest))  # fmt: skip
        near &= (d <= kth[i]) & (d <= kth[j])
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
    resting = near & ~moving  # not both moving (unknown speeds count as slow)
    if params.standing == "together":
        together |= resting
    ignored = resting if params.standing == "ignored" else np.zeros(i.size, dtype=bool)
    return together, ignored


def _presence_runs(snaps: Snapshots) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return every unbroken run of presence: sorted keys ``object * width + first``, first, last.

    ``width`` is ``n_snapshots + 1``; the run holding object o at snapshot t is
    the last whose key is at most ``o * width + t``.
    """
    order = snaps.object_order()
    if order.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, empty
    obj, snap = snaps.obj[order].astype(np.int64), snaps.snap[order]
    start = np.ones(order.size, dtype=bool)
    start[1:] = (obj[1:] != obj[:-1]) | (snap[1:] != snap[:-1] + 1)
    starts = np.flatnonzero(start)
    ends = np.append(starts[1:] - 1, order.size - 1)
    width = np.int64(snaps.n_snapshots + 1)
    return obj[starts] * width + snap[starts], snap[starts], snap[ends]


def evidence_links(
    snaps: Snapshots, pairs: NeighbourPairs, motion: Motion, params
) -> NeighbourPairs:
    """Return the neighbour pairs whose own evidence around each snapshot links them.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    pairs : NeighbourPairs
        Entry pairs within the neighbour distance.
    motion : Motion
        Velocity of every entry.
    params : GroupParams
        Neighbour distance, motion predicates and the evidence settings
        (``evidence_window``, ``evidence_share``, ``nearest``, ``min_abreast``,
        ``standing``).

    Returns
    -------
    NeighbourPairs
        The linked pairs (a subset of ``pairs``, same order).

    Notes
    -----
    With ``h`` = :func:`evidence_reach` snapshots, pair (a, b) at snapshot t is
    linked when ``P > 0`` and ``T >= evidence_share * P``, where P counts the
    snapshots ``max(t - h, fa, fb) .. min(t + h, la, lb)`` (``[fa, la]`` and
    ``[fb, lb]`` are the unbroken presence runs of a and b that hold t) less
    the ignored ones, and T counts those at which the pair is together
    (:func:`together_snapshots`). Every
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
    together, ignored = together_snapshots(snaps, pairs, motion, params)
    oi, oj = snaps.obj[i].astype(np.int64), snaps.obj[j].astype(np.int64)
    n_obj = np.int64(len(snaps.objects))
    width = np.int64(snaps.n_snapshots + 1)
    pair_key = np.minimum(oi, oj) * n_obj + np.maximum(oi, oj)
    if float(n_obj) ** 2 * float(width) >= 2.0**62:  # too wide for one integer key: renumber
        pair_key = np.unique(pair_key, return_inverse=True)[1].astype(np.int64)
    t = snaps.snap[i].astype(np.int64)
    # rows in (pair, snapshot) order: each pair's snapshots in time, searched in order
    key = pair_key * width + t
    order = np.argsort(key)
    key, t, oi, oj = key[order], t[order], oi[order], oj[order]
    count = np.concatenate([[0], np.cumsum(together[order], dtype=np.int64)])
    left_out = np.concatenate([[0], np.cumsum(ignored[order], dtype=np.int64)])
    run_key, run_first, run_last = _presence_runs(snaps)
    ri = np.searchsorted(run_key, oi * width + t, side="right") - 1
    rj = np.searchsorted(run_key, oj * width + t, side="right") - 1
    h = evidence_reach(params.evidence_window, snaps.step_s)
    lo = np.maximum(np.maximum(t - h, run_first[ri]), run_first[rj])
    hi = np.minimum(np.minimum(t + h, run_last[ri]), run_last[rj])
    base = key - t
    upper = np.searchsorted(key, base + hi, side="right")
    lower = np.searchsorted(key, base + lo, side="left")
    weighed = hi - lo + 1 - (left_out[upper] - left_out[lower])
    link = np.zeros(i.size, dtype=bool)
    link[order] = (weighed > 0) & (count[upper] - count[lower]
                                   >= params.evidence_share * weighed - 1e-9)  # fmt: skip
    return NeighbourPairs(i[link], j[link], pairs.radius)
