"""Building blocks shared by the scenario generators.

Smooth random motion (correlated random walks kept inside boxes), on/off schedules with
smooth ramps, presence on the mining grid, and the planted time prevalence computed from
the noise-free planted positions. Every generator imports this module from its parent
folder, so each ``generate.py`` still runs on its own as a script.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from datetime import UTC, datetime

import numpy as np
from scipy.signal import lfilter

NS = 1_000_000_000


def ou_series(rng: np.random.Generator, n: int, dt: float, tau: float, dims: int = 2) -> np.ndarray:
    """Unit-variance stationary Ornstein-Uhlenbeck samples, shape (n, dims).

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    n : int
        Number of samples.
    dt : float
        Sampling interval in seconds.
    tau : float
        Correlation time in seconds.
    dims : int
        Number of independent components.

    Returns
    -------
    numpy.ndarray
        Array of shape (n, dims).
    """
    a = np.exp(-dt / tau)
    noise = rng.standard_normal((n, dims))
    # Scaling the first innovation starts the recursion in its stationary state, so the
    # series has no warm-up stretch with artificially small values.
    noise[0] /= np.sqrt(1.0 - a * a)
    return lfilter([np.sqrt(1.0 - a * a)], [1.0, -a], noise, axis=0)


def smooth_series(
    rng: np.random.Generator, n: int, dt: float, tau: float, dims: int = 2
) -> np.ndarray:
    """Unit-variance random series that is smooth (differentiable), shape (n, dims).

    An Ornstein-Uhlenbeck series is rough at short lags; passing it through the same
    filter once more gives one continuous derivative, so positions or speeds built from
    it change without second-by-second jerks. The warm-up lets the second pass settle.
    """
    warm = int(np.ceil(5.0 * tau / dt))
    a = np.exp(-dt / tau)
    x = ou_series(rng, n + warm, dt, tau, dims)
    y = lfilter([np.sqrt(1.0 - a * a)], [1.0, -a], x, axis=0)[warm:]
    return y * np.sqrt((1.0 - a * a) / (1.0 + a * a))


def velocity_walk(
    rng: np.random.Generator, n: int, dt: float, tau: float, sigma: float, vmax: float
) -> np.ndarray:
    """Correlated random velocities (m/s), shape (n, 2), with speed capped at ``vmax``."""
    v = sigma * ou_series(rng, n, dt, tau)
    speed = np.hypot(v[:, 0], v[:, 1])
    return v * np.minimum(1.0, vmax / np.maximum(speed, 1e-12))[:, None]


def integrate(v: np.ndarray, dt: float) -> np.ndarray:
    """Positions from velocities, starting at the origin."""
    out = np.zeros_like(v)
    out[1:] = np.cumsum(v[:-1] * dt, axis=0)
    return out


def fold(
    raw: np.ndarray, lo: Sequence[float], hi: Sequence[float], phase: np.ndarray
) -> np.ndarray:
    """Map an unbounded path into a box.

    A sine fold turns the walker back smoothly at the box edges (it slows down and turns
    rather than bouncing), and never speeds it up, so speed caps survive the fold.
    """
    lo_a, hi_a = np.asarray(lo, float), np.asarray(hi, float)
    centre, half = (lo_a + hi_a) / 2.0, (hi_a - lo_a) / 2.0
    return centre + half * np.sin(raw / half + phase)


def wander_in_box(
    rng: np.random.Generator,
    n: int,
    dt: float,
    lo: Sequence[float],
    hi: Sequence[float],
    tau: float,
    sigma: float,
    vmax: float,
) -> np.ndarray:
    """A smooth correlated random walk that never leaves the box [lo, hi]."""
    raw = integrate(velocity_walk(rng, n, dt, tau, sigma, vmax), dt)
    return fold(raw, lo, hi, rng.uniform(-np.pi / 2, np.pi / 2, size=2))


def bounded_jitter(
    rng: np.random.Generator, n: int, dt: float, tau: float, amp: float, dims: int = 2
) -> np.ndarray:
    """Slowly varying offsets whose every component stays strictly inside (-amp, amp)."""
    return amp * np.tanh(smooth_series(rng, n, dt, tau, dims))


def smoothstep(u: np.ndarray) -> np.ndarray:
    """Cubic ease from 0 to 1 on [0, 1], flat outside."""
    u = np.clip(u, 0.0, 1.0)
    return u * u * (3.0 - 2.0 * u)


def plateau_weight(
    t: np.ndarray, intervals: Sequence[tuple[float, float]], ramp: float
) -> np.ndarray:
    """Blend weight: 1 inside each interval, easing to 0 over ``ramp`` seconds outside it."""
    w = np.zeros_like(t, dtype=float)
    for a, b in intervals:
        w = np.maximum(w, smoothstep((t - (a - ramp)) / ramp) * smoothstep((b + ramp - t) / ramp))
    return w


def alternating_intervals(
    rng: np.random.Generator,
    t0: float,
    t1: float,
    on: tuple[float, float],
    off: tuple[float, float],
    ramp: float,
    start_on: bool,
) -> list[tuple[float, float]]:
    """Random plateau intervals (together phases) separated by gaps (apart phases).

    Gaps are at least two ramps long so that every apart phase really reaches weight 0.
    """
    if off[0] < 2 * ramp:
        raise ValueError("apart phases must be at least two ramps long")
    intervals: list[tuple[float, float]] = []
    # Starting before t0 lets a record open with the members already together.
    t = t0 - ramp - 1.0 if start_on else t0 + rng.uniform(*off) / 2.0 + ramp
    while t < t1:
        length = rng.uniform(*on)
        intervals.append((t, t + length))
        t += length + rng.uniform(*off)
    return intervals


def presence_on_grid(fix_ns: np.ndarray, grid_ns: np.ndarray, max_gap_ns: int) -> np.ndarray:
    """Grid snapshots an object covers: on a fix, or between two fixes at most max_gap apart."""
    fix = np.unique(fix_ns)
    j = np.searchsorted(fix, grid_ns, side="left")
    jc = np.minimum(j, len(fix) - 1)
    exact = fix[jc] == grid_ns
    inside = (j > 0) & (j < len(fix))
    gap = fix[jc] - fix[np.maximum(j - 1, 0)]
    return exact | (inside & (gap <= max_gap_ns))


def planted_prevalence(
    pos: np.ndarray,
    present: np.ndarray,
    roles: np.ndarray,
    role_set: Sequence[str],
    radius: float,
    min_participation: float,
) -> dict[str, int | float]:
    """Time prevalence of a role set from planted positions, following comove's definition.

    Parameters
    ----------
    pos : numpy.ndarray
        Planted positions in metres, shape (objects, snapshots, 2).
    present : numpy.ndarray
        Boolean presence on the grid, shape (objects, snapshots).
    roles : numpy.ndarray
        Role of each object at each snapshot, shape (objects, snapshots).
    role_set : sequence of str
        Distinct roles.
    radius, min_participation : float
        Neighbour radius (m) and participation threshold.

    Returns
    -------
    dict
        ``present`` and ``prevalent`` snapshot counts and their ratio ``value``.

    Notes
    -----
    A row instance is one present object per role, pairwise within the radius. The
    instance array is built by broadcasting pairwise adjacency over one axis per role.
    """
    k = len(role_set)
    members = [np.flatnonzero(((roles == r) & present).any(axis=1)) for r in role_set]
    holds = [(roles[m] == r) & present[m] for m, r in zip(members, role_set, strict=True)]
    n_snap = present.shape[1]
    counts = np.stack([h.sum(axis=0) for h in holds])
    all_present = (counts > 0).all(axis=0)
    if min(len(m) for m in members) == 0:
        return {"present": 0, "prevalent": 0, "value": 0.0}
    inst = np.ones([len(m) for m in members] + [n_snap], dtype=bool)
    for i, j in itertools.combinations(range(k), 2):
        d = np.linalg.norm(pos[members[i]][:, None] - pos[members[j]][None, :], axis=-1)
        near = (d <= radius) & holds[i][:, None] & holds[j][None, :]
        shape = [1] * k + [n_snap]
        shape[i], shape[j] = len(members[i]), len(members[j])
        inst &= near.reshape(shape)
    pi = np.ones(n_snap)
    for i in range(k):
        others = tuple(a for a in range(k) if a != i)
        part = inst.any(axis=others).sum(axis=0)
        pr = np.divide(part, counts[i], out=np.zeros(n_snap), where=counts[i] > 0)
        pi = np.minimum(pi, pr)
    prevalent = all_present & (pi >= min_participation)
    n_present = int(all_present.sum())
    n_prev = int(prevalent.sum())
    return {
        "present": n_present,
        "prevalent": n_prev,
        "value": n_prev / n_present if n_present else 0.0,
    }


def planted_entry(
    stats: dict[str, int | float], roles: Sequence[str], tolerance: float, how: str
) -> dict[str, object]:
    """One "planted" record of truth.json."""
    return {
        "roles": sorted(roles),
        "time_prevalence": round(float(stats["value"]), 4),
        "tolerance": tolerance,
        "present_snapshots": int(stats["present"]),
        "prevalent_snapshots": int(stats["prevalent"]),
        "how": how,
    }


def iso_utc(ns: int) -> str:
    """ISO 8601 UTC text with a Z, milliseconds only when needed."""
    sec, rem = divmod(int(ns), NS)
    text = datetime.fromtimestamp(sec, tz=UTC).strftime("%Y-%m-%dT%H:%M:%S")
    if rem:
        text += f".{rem // 1_000_000:03d}"
    return text + "Z"


def runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Inclusive index ranges of the True runs in a boolean array."""
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(padded))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def local_to_lonlat(xy: np.ndarray, lon0: float, lat0: float) -> tuple[np.ndarray, np.ndarray]:
    """East/north metres around (lon0, lat0) to WGS84 degrees (equirectangular, spherical).

    Over a few tens of kilometres the scale error of this mapping is far below the
    margins the scenarios keep around the radius.
    """
    earth = 6_371_008.8
    lat = lat0 + np.degrees(xy[..., 1] / earth)
    lon = lon0 + np.degrees(xy[..., 0] / (earth * np.cos(np.radians(lat0))))
    return lon, lat
