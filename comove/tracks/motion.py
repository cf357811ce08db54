"""Velocity of every aligned entry, from the object's own aligned track.

Velocity at a snapshot is the displacement across a window of snapshots
centred on it, divided by the time between the window's ends. The window is
clipped to the stretch of consecutive snapshots at which the object is present,
so it never spans a gap; where an object is present at a single snapshot only,
its velocity is unknown (NaN).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from comove.tracks.alignment import Snapshots
from comove.tracks.neighbours import worker_count


@dataclass
class Motion:
    """Velocity of each entry of a :class:`~comove.tracks.alignment.Snapshots`.

    Attributes
    ----------
    vx, vy : ndarray of float64
        Velocity components in metres per second (NaN where unknown).
    """

    vx: np.ndarray
    vy: np.ndarray

    @cached_property
    def speed(self) -> np.ndarray:
        """Return the speed of every entry in m/s (NaN where unknown), computed once."""
        speed = self.vx * self.vx
        speed += self.vy * self.vy
        return np.sqrt(speed, out=speed)  # not np.hypot: several times slower


def half_window_snapshots(window_s: float, step_s: float) -> int:
    """Return how many snapshots the velocity window reaches on each side (at least 1).

    An entry's velocity depends on its object's positions this many snapshots
    before and after it, and on no others: a time chunk with this many
    snapshots more on each side gives its own entries their exact velocities.
    """
    return max(1, int(round(window_s / step_s / 2)))


def entry_motion(snaps: Snapshots, window_s: float = 1.0, workers: int = 1) -> Motion:
    """Return the velocity of every entry, by differences across a time window.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots.
    window_s : float, default 1.0
        Width of the centred differencing window in seconds; at least one step
        is used whatever the value. Wider windows smooth positional noise (at
        25 Hz, raw step-to-step differences of a 10 cm position error give
        speed noise of several m/s).
    workers : int, default 1
        Threads working on separate objects at the same time (numpy releases
        the interpreter lock); -1 means one per processor. The result does not
        depend on it.

    Returns
    -------
    Motion

    Notes
    -----
    Vectorised: entries are put in (object, snapshot) order once (a radix sort
    of object codes), stretches of consecutive presence are found from the
    breaks in that order, and each entry's window ends are clipped to its
    stretch. O(n) time for n entries with fewer than 2**15 objects (else
    O(n log n)); a dozen arrays of n numbers at most.
    """
    n = snaps.n_entries
    half = half_window_snapshots(window_s, snaps.step_s)
    workers = worker_count(workers)
    order = snaps.object_order()
    # cut the objects into about equal shares of entries, one per worker
    per_object = snaps.object_bounds()[1:]
    cuts = np.unique(np.searchsorted(per_object, np.arange(1, workers) * n / workers))
    bounds = [0, *[int(per_object[c]) for c in cuts if 0 < per_object[c] < n], n]
    vx, vy = np.empty(n), np.empty(n)
    chunks = list(zip(bounds[:-1], bounds[1:], strict=True))

    def work(chunk: tuple[int, int]) -> None:
        _velocities(snaps, order[chunk[0] : chunk[1]], half, vx, vy)

    if workers > 1 and len(chunks) > 1:
        with ThreadPoolExecutor(max_workers=len(chunks)) as pool:
            list(pool.map(work, chunks))
    else:
        for chunk in chunks:
            work(chunk)
    return Motion(vx=vx, vy=vy)


def _velocities(
    snaps: Snapshots, order: np.ndarray, half: int, vx: np.ndarray, vy: np.ndarray
) -> None:
    """Fill ``vx``, ``vy`` at the entries ``order``: whole objects, in (object, snapshot) order."""
    n = order.size
    if n == 0:
        return
    snap = snaps.snap[order]
    obj = snaps.obj[order]
    # stretches of consecutive presence of one object
    new_run = np.empty(n, dtype=bool)
    new_run[:1] = True
    np.not_equal(obj[1:], obj[:-1], out=new_run[1:])
    new_run[1:] |= (snap[1:] - snap[:-1]) != 1
    starts = np.flatnonzero(new_run)
    del new_run, obj
    lengths = np.diff(starts, append=n)
    # each window's ends, clipped to its stretch (in place: fewer large temporaries)
    lo = np.repeat(starts, lengths)
    hi = lo + np.repeat(lengths - 1, lengths)
    pos = np.arange(n)
    np.maximum(pos - half, lo, out=lo)
    pos += half
    np.minimum(pos, hi, out=hi)
    del pos
    per_second = (snap[hi] - snap[lo]).astype(np.float64)
    per_second *= snaps.step_s
    with np.errstate(divide="ignore"):
        np.divide(1.0, per_second, out=per_second)
    per_second[np.isinf(per_second)] = np.nan  # a stretch of one snapshot
    for coord, out in ((snaps.x, vx), (snaps.y, vy)):
        along = coord[order]
        diff = along[hi]
        diff -= along[lo]
        diff *= per_second
        out[order] = diff
