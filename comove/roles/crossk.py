"""Cross-K and cross-L functions of pairs of roles, pooled over snapshots.

For two roles a and b, K_ab(r) is the expected number of role-b objects within
distance r of a typical role-a object, divided by the density of role b. Under
independence of the two roles and complete spatial randomness K_ab(r) = pi r^2,
so the variance-stabilised L_ab(r) = sqrt(K_ab(r) / pi) equals r; L_ab(r) - r
above 0 means b lies closer to a than chance would place it, below 0 further
away. Every snapshot is one realisation of the pattern; counts are pooled over
all snapshots in which both roles are present. Pointwise envelopes from null
replicates (for example tracks shifted in time) put a curve into perspective.
See ``docs/crossk.md``.

For roles a, b and snapshots t, with n_a(t), n_b(t) the numbers of entries
of each role inside the window W of area |W|, :func:`cross_k` estimates

    K_ab(r) = |W| * sum_t sum_{i in a_t} sum_{j in b_t} w_ij 1(d_ij <= r)
              / sum_t n_a(t) n_b(t).

Snapshots at which either role is absent add nothing to either sum.

*Translation correction* (Ohser and Stoyan, 1981): w_ij = |W| / |W ∩ (W + x_i - x_j)|,
which for a rectangle of sides Wx, Wy is Wx Wy / ((Wx - |dx|)(Wy - |dy|)). It is
symmetric in i and j, so K_ab = K_ba.

*Border correction* (reduced sample; Ripley, 1977): only entries i of role a
whose distance to the edge of W is at least r count as centres, w_ij = 1, and
n_a(t) in the denominator is the number of those centres, so the denominator
depends on r. Role a is the centre role; K_ab and K_ba differ.

Given the numbers of points, each per-snapshot ratio is unbiased for pi r^2
when the two roles are independent and uniformly scattered (complete spatial
randomness); pooling weights the snapshots by n_a(t) n_b(t). The references
are listed under :func:`cross_k`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from comove.errors import InputError, bad_setting
from comove.io.runfile import as_grid
from comove.tracks.alignment import Snapshots
from comove.tracks.neighbours import neighbour_pairs

CORRECTIONS = ("translation", "border")

CROSSK_COLUMNS = [
    "role_a", "role_b", "radius_m", "k_m2", "l_m", "l_minus_r_m", "pairs_counted", "snapshots_used",
]  # fmt: skip

ENVELOPE_COLUMNS = ["null_low_m", "null_high_m", "null_mean_m", "above", "below"]

#: Columns that must agree row by row between an observed curve and its replicates.
_KEY_COLUMNS = ["role_a", "role_b", "radius_m"]


@dataclass(frozen=True)
class CrossKParams:
    """Settings of the cross-K functions (``mine`` computes them when --k-radii is given).

    Parameters
    ----------
    k_radii : tuple of float or None, default None
        Distances r in metres at which K is evaluated; strictly ascending, > 0.
        Text is read as ``start:stop:step`` (stop included) or ``r1,r2,...``.
        ``None``: no cross-K.
    k_window : tuple of 4 floats or None, default None
        Observation window ``(xmin, ymin, xmax, ymax)`` in the working plane,
        metres (text: ``xmin,ymin,xmax,ymax``). ``None`` uses the bounding box
        of all positions. Entries outside the window are dropped.
    k_correction : {"translation", "border"}, default "translation"
        Edge correction, see :func:`cross_k`.
    """

    k_radii: tuple[float, ...] | None = field(
        default=None,
        metadata={"help": "cross-K/L per role pair at these radii (m): start:stop:step (stop "
                  "included) or r1,r2,...; envelopes from time-shift replicates"},
    )  # fmt: skip
    k_window: tuple[float, ...] | None = field(
        default=None,
        metadata={"help": "cross-K window xmin,ymin,xmax,ymax in working-plane metres "
                  "(default: bounding box of all positions)"},
    )  # fmt: skip
    k_correction: str = field(
        default="translation",
        metadata={"help": "cross-K edge correction", "choices": CORRECTIONS},
    )

    def __post_init__(self) -> None:
        if self.k_radii is not None:
            object.__setattr__(self, "k_radii", _checked_radii(self.k_radii))
        if self.k_window is not None:
            object.__setattr__(self, "k_window", _checked_window(self.k_window))
        if self.k_correction not in CORRECTIONS:
            raise bad_setting(
                "k_correction", f"{self.k_correction!r} is unknown; use one of "
                f"{', '.join(CORRECTIONS)}",
            )  # fmt: skip


def _checked_radii(value: object) -> tuple[float, ...]:
    """Return cross-K radii given as grid text, one number or numbers, checked."""
    radii = as_grid(value, "k_radii")
    r = np.asarray(radii)
    if r.size == 0:
        raise bad_setting("k_radii", "is empty; give one or more distances in metres")
    if not (np.all(np.isfinite(r)) and np.all(r > 0)):
        raise bad_setting("k_radii", "must all be positive distances in metres")
    if np.any(np.diff(r) <= 0):
        raise bad_setting("k_radii", "must be strictly ascending, without repeats")
    return radii


def _checked_window(value: object) -> tuple[float, ...]:
    """Return a cross-K window given as text or four numbers, checked."""
    try:
        window = as_grid(value, "k_window")
    except InputError:
        window = ()
    if len(window) != 4 or not np.all(np.isfinite(window)):
        raise bad_setting("k_window", "must be four finite numbers xmin,ymin,xmax,ymax")
    xmin, ymin, xmax, ymax = window
    if not (xmin < xmax and ymin < ymax):
        raise bad_setting("k_window", "needs xmin < xmax and ymin < ymax")
    return window


def _empty_table() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "role_a": pd.Series([], dtype=str),
            "role_b": pd.Series([], dtype=str),
            "radius_m": pd.Series([], dtype=np.float64),
            "k_m2": pd.Series([], dtype=np.float64),
            "l_m": pd.Series([], dtype=np.float64),
            "l_minus_r_m": pd.Series([], dtype=np.float64),
            "pairs_counted": pd.Series([], dtype=np.int64),
            "snapshots_used": pd.Series([], dtype=np.int64),
        }
    )


def _resolve_window(
    snaps: Snapshots, window: tuple[float, float, float, float] | None
) -> tuple[float, float, float, float]:
    if window is not None:
        return window
    if snaps.n_entries == 0:
        raise bad_setting("k_window", "is needed: there are no positions to build one from")
    box = (float(snaps.x.min()), float(snaps.y.min()), float(snaps.x.max()), float(snaps.y.max()))
    if not (box[0] < box[2] and box[1] < box[3]):
        raise bad_setting(
            "k_window", "is needed: the bounding box of all positions has zero area (all on one "
            "line)",
        )  # fmt: skip
    return box


def _role_pairs(
    roles: np.ndarray, names: np.ndarray, role_pairs: list[tuple[int, int]] | None
) -> list[tuple[int, int]]:
    """Return the ordered (centre role, other role) code pairs to evaluate."""
    if role_pairs is None:
        present = sorted(np.unique(roles).tolist(), key=lambda c: str(names[c]))
        return [(a, b) for n, a in enumerate(present) for b in present[n + 1 :]]
    out = []
    for pair in role_pairs:
        a, b = (int(v) for v in pair)
        if not (0 <= a < len(names) and 0 <= b < len(names)):
            raise ValueError(f"role pair {pair} holds a code outside 0..{len(names) - 1}")
        if a == b:
            raise ValueError(f"role pair {pair} joins a role with itself; cross-K needs two roles")
        out.append((a, b))
    return list(dict.fromkeys(out))


def cross_k(
    snaps: Snapshots, params: CrossKParams, role_pairs: list[tuple[int, int]] | None = None
) -> pd.DataFrame:
    """Return the pooled cross-K and cross-L functions of pairs of roles.

    Parameters
    ----------
    snaps : Snapshots
        Aligned snapshots; positions in metres.
    params : CrossKParams
        Radii (required here), window and edge correction.
    role_pairs : list of (int, int), optional
        Role codes ``(a, b)`` to evaluate, in this order (``a`` is the centre
        role of the border correction). Default: every pair of distinct roles
        inside the window, ``role_a`` before ``role_b`` by name.

    Returns
    -------
    pandas.DataFrame
        One row per (role pair, radius), pairs in the order above and radii
        ascending: ``role_a``, ``role_b`` (names), ``radius_m``, ``k_m2`` (NaN
        when no snapshot is used), ``l_m`` = sqrt(k_m2 / pi), ``l_minus_r_m``,
        ``pairs_counted`` (a-b pairs within the radius that entered the sum,
        unweighted), ``snapshots_used`` (snapshots with a counted centre of a
        and an object of b). ``attrs``: ``window`` (xmin, ymin, xmax, ymax),
        ``window_area_m2``, ``correction``, ``entries_outside_window``.

    Raises
    ------
    InputError
        Translation correction with a radius not below the window's shorter side.

    Notes
    -----
    The module docstring gives the pooled estimator with its translation
    [2]_ [3]_ and border [1]_ corrections, unbiased under independence and
    complete spatial randomness [1]_ [4]_. One neighbour search at the largest
    radius finds every pair: O(E log E + P) time, E entries, P pairs.

    References
    ----------
    .. [1] B. D. Ripley, "Modelling spatial patterns", Journal of the Royal
       Statistical Society B 39(2), 172-192, 1977.
       doi:10.1111/j.2517-6161.1977.tb01615.x
    .. [2] J. Ohser and D. Stoyan, "On the second-order and orientation
       analysis of planar stationary point processes", Biometrical Journal
       23(6), 523-533, 1981. doi:10.1002/bimj.4710230602
    .. [3] A. Baddeley, E. Rubak and R. Turner, "Spatial Point Patterns:
       Methodology and Applications with R", CRC Press, 2015. doi:10.1201/b19708
    .. [4] P. J. Diggle, "Statistical Analysis of Spatial Point Patterns",
       2nd ed., Arnold, 2003. (from memory, not checked)

    Examples
    --------
    One snapshot, role a at (5, 5) and role b at (6, 5) in a 10 m square:
    K(r) = |W| (pairs within r) / (n_a n_b) = 100 m² x pairs within r.

    >>> import numpy as np
    >>> snaps = Snapshots(step_ns=1, first_index=0, n_snapshots=1, snap=np.zeros(2, int),
    ...                   obj=np.arange(2), role=np.arange(2), x=np.array([5.0, 6.0]),
    ...                   y=np.full(2, 5.0), objects=np.array(["p", "q"]),
    ...                   roles=np.array(["a", "b"]), max_gap_ns=0)
    >>> params = CrossKParams(k_radii=(0.5, 2.0), k_window=(0, 0, 10, 10), k_correction="border")
    >>> cross_k(snaps, params)[["radius_m", "k_m2", "pairs_counted"]].to_dict("list")
    {'radius_m': [0.5, 2.0], 'k_m2': [0.0, 100.0], 'pairs_counted': [0, 1]}
    """
    if params.k_radii is None:
        raise ValueError("no cross-K radii: give CrossKParams(k_radii=...)")
    window = _resolve_window(snaps, params.k_window)
    radii = np.asarray(params.k_radii, dtype=np.float64)
    _check_radii(window, radii, params.k_correction)
    sub, n_outside = _inside_window(snaps, window)
    names = np.asarray(snaps.roles)
    pairs = _role_pairs(sub.role, names, role_pairs)
    out = _pooled_k(sub, pairs, names, window, radii, params.k_correction)
    xmin, ymin, xmax, ymax = window
    area = (xmax - xmin) * (ymax - ymin)
    out.attrs.update(window=window, window_area_m2=area, correction=params.k_correction)
    out.attrs["entries_outside_window"] = n_outside
    return out


def _check_radii(
    window: tuple[float, float, float, float], radii: np.ndarray, correction: str
) -> None:
    """Refuse radii the translation correction cannot weight: not below the window's sides."""
    xmin, ymin, xmax, ymax = window
    wx, wy = xmax - xmin, ymax - ymin
    if correction == "translation" and radii[-1] >= min(wx, wy):
        raise bad_setting(
            "k_radii",
            f"reach too far: the largest radius {radii[-1]:g} m is not below the shorter window "
            f"side {min(wx, wy):g} m; give smaller radii or a larger window",
        )


def _inside_window(
    snaps: Snapshots, window: tuple[float, float, float, float]
) -> tuple[Snapshots, int]:
    """Return the snapshots' entries inside the window, and how many lie outside."""
    xmin, ymin, xmax, ymax = window
    inside = (snaps.x >= xmin) & (snaps.x <= xmax) & (snaps.y >= ymin) & (snaps.y <= ymax)
    n_outside = int(inside.size - np.count_nonzero(inside))
    sub = dataclasses.replace(
        snaps,
        snap=snaps.snap[inside],
        obj=snaps.obj[inside],
        role=snaps.role[inside],
        x=snaps.x[inside],
        y=snaps.y[inside],
    )
    return sub, n_outside


@dataclass
class _PairsByRadius:
    """Entry pairs within the largest radius, once per requested orientation they match."""

    centre: np.ndarray  # entry of the centre role
    pair: np.ndarray  # index of the requested role pair
    dx: np.ndarray  # centre minus other
    dy: np.ndarray
    first: np.ndarray  # index of the first radius not below the pair's distance


def _pairs_by_radius(
    sub: Snapshots, pairs: list[tuple[int, int]], n_roles: int, radii: np.ndarray
) -> _PairsByRadius:
    """Find every pair within the largest radius and the first radius each counts at.

    The radius index comes from ``numpy.searchsorted`` on squared distances, so the
    inclusive test matches :func:`comove.tracks.neighbours.neighbour_pairs`.
    """
    # ordered (centre role, other role) -> requested pair index, -1 if not requested
    lookup = np.full((n_roles, n_roles), -1, dtype=np.int64)
    for p, (a, b) in enumerate(pairs):
        lookup[a, b] = p

    nb = neighbour_pairs(sub, float(radii[-1]))
    i, j = nb.i, nb.j
    # a pair of entries counts once per requested orientation it matches
    fwd = lookup[sub.role[i], sub.role[j]]
    bwd = lookup[sub.role[j], sub.role[i]]
    centre = np.concatenate([i[fwd >= 0], j[bwd >= 0]])
    other = np.concatenate([j[fwd >= 0], i[bwd >= 0]])
    pair_idx = np.concatenate([fwd[fwd >= 0], bwd[bwd >= 0]])
    dx = sub.x[centre] - sub.x[other]
    dy = sub.y[centre] - sub.y[other]
    first = np.minimum(
        np.searchsorted(radii * radii, dx * dx + dy * dy, side="left"), radii.size - 1
    )
    return _PairsByRadius(centre, pair_idx, dx, dy, first)


def _pooled_k(
    sub: Snapshots,
    pairs: list[tuple[int, int]],
    names: np.ndarray,
    window: tuple[float, float, float, float],
    radii: np.ndarray,
    correction: str,
) -> pd.DataFrame:
    """Return the cross-K table of the requested role pairs (see :func:`cross_k`)."""
    if not pairs:
        return _empty_table()
    n_roles = max(len(names), int(sub.role.max()) + 1 if sub.n_entries else 0)
    found = _pairs_by_radius(sub, pairs, n_roles, radii)
    snap_role = np.bincount(
        sub.snap * n_roles + sub.role, minlength=sub.n_snapshots * n_roles
    ).reshape(sub.n_snapshots, n_roles)
    a_codes = np.array([a for a, _ in pairs])
    b_codes = np.array([b for _, b in pairs])
    n_b = snap_role[:, b_codes].astype(np.float64)  # (n_snap, n_pair)
    if correction == "translation":
        n_a = snap_role[:, a_codes].astype(np.float64)
        sums = _translation_sums(found, len(pairs), radii, window, n_a, n_b)
    else:
        sums = _border_sums(found, sub, len(pairs), radii, window, n_roles, a_codes, n_b)
    numer, counted, denom, used = sums
    xmin, ymin, xmax, ymax = window
    area = (xmax - xmin) * (ymax - ymin)
    with np.errstate(invalid="ignore", divide="ignore"):
        k = np.where(denom > 0, area * numer / np.where(denom > 0, denom, 1.0), np.nan)
    l_val = np.sqrt(k / np.pi)
    n_rad = radii.size
    return pd.DataFrame(
        {
            "role_a": np.repeat([str(names[a]) for a in a_codes], n_rad),
            "role_b": np.repeat([str(names[b]) for b in b_codes], n_rad),
            "radius_m": np.tile(radii, len(pairs)),
            "k_m2": k.ravel(),
            "l_m": l_val.ravel(),
            "l_minus_r_m": (l_val - radii[None, :]).ravel(),
            "pairs_counted": counted.ravel().astype(np.int64),
            "snapshots_used": used.ravel().astype(np.int64),
        }
    )


def _translation_sums(
    found: _PairsByRadius,
    n_pair: int,
    radii: np.ndarray,
    window: tuple[float, float, float, float],
    n_a: np.ndarray,
    n_b: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return numerators, pairs counted, denominators and snapshots used, (pair, radius) each.

    Each pair is weighted by the translation correction and added at its first radius; one
    weighted ``bincount`` and a cumulative sum over radii give every numerator at once.
    """
    xmin, ymin, xmax, ymax = window
    wx, wy = xmax - xmin, ymax - ymin
    n_rad = radii.size
    weight = (wx * wy) / ((wx - np.abs(found.dx)) * (wy - np.abs(found.dy)))
    flat = found.pair * n_rad + found.first
    numer = np.bincount(flat, weights=weight, minlength=n_pair * n_rad)
    counted = np.bincount(flat, minlength=n_pair * n_rad)
    numer = numer.reshape(n_pair, n_rad).cumsum(axis=1)
    counted = counted.reshape(n_pair, n_rad).cumsum(axis=1)
    denom = np.repeat((n_a * n_b).sum(axis=0)[:, None], n_rad, axis=1)
    used = np.repeat(((n_a > 0) & (n_b > 0)).sum(axis=0)[:, None], n_rad, axis=1)
    return numer, counted, denom, used


def _border_sums(
    found: _PairsByRadius,
    sub: Snapshots,
    n_pair: int,
    radii: np.ndarray,
    window: tuple[float, float, float, float],
    n_roles: int,
    a_codes: np.ndarray,
    n_b: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return numerators, pairs counted, denominators and snapshots used, (pair, radius) each.

    A pair counts from its first radius until the first radius beyond its centre's
    distance to the window's edge: a positive count at the one and a negative count at
    the other, then a cumulative sum over radii.
    """
    xmin, ymin, xmax, ymax = window
    n_rad = radii.size
    edge = np.minimum.reduce([sub.x - xmin, xmax - sub.x, sub.y - ymin, ymax - sub.y])
    # a centre counts at radius index m when radii[m] <= its edge distance
    last = np.searchsorted(radii, edge[found.centre], side="right")
    live = last > found.first
    width = n_rad + 1
    pair = found.pair[live]
    flat = np.concatenate([pair * width + found.first[live], pair * width + last[live]])
    step = np.concatenate([np.ones(live.sum()), -np.ones(live.sum())])
    counted = np.bincount(flat, weights=step, minlength=n_pair * width)
    counted = np.rint(counted.reshape(n_pair, width).cumsum(axis=1)[:, :n_rad])
    counted = counted.astype(np.int64)
    numer = counted.astype(np.float64)
    denom = np.empty((n_pair, n_rad))
    used = np.empty((n_pair, n_rad), dtype=np.int64)
    for m, r in enumerate(radii):
        ok = edge >= r
        centres = np.bincount(
            sub.snap[ok] * n_roles + sub.role[ok], minlength=sub.n_snapshots * n_roles
        ).reshape(sub.n_snapshots, n_roles)[:, a_codes]
        denom[:, m] = (centres * n_b).sum(axis=0)
        used[:, m] = ((centres > 0) & (n_b > 0)).sum(axis=0)
    return numer, counted, denom, used


def envelopes(
    observed: pd.DataFrame, replicates: list[pd.DataFrame], level: float = 0.95
) -> pd.DataFrame:
    """Return the observed curves with pointwise envelopes of L from null replicates.

    Parameters
    ----------
    observed : pandas.DataFrame
        Output of :func:`cross_k`.
    replicates : list of pandas.DataFrame
        :func:`cross_k` outputs of null versions of the data (for example with
        one role's tracks shifted in time, or simulated independent patterns),
        with the same ``role_a``, ``role_b``, ``radius_m`` rows in the same
        order.
    level : float, default 0.95
        Nominal pointwise coverage of the envelope, in (0, 1).

    Returns
    -------
    pandas.DataFrame
        A copy of ``observed`` with columns ``null_low_m``, ``null_high_m`` (the
        envelope of ``l_m``), ``null_mean_m`` (mean ``l_m`` over replicates) and
        ``above`` / ``below`` (observed ``l_m`` strictly above ``null_high_m`` /
        below ``null_low_m``). ``attrs`` gains ``envelope_replicates``,
        ``envelope_level`` (as asked) and ``envelope_rank`` (the largest k below over the rows).

    Raises
    ------
    InputError
        When no replicate is given or ``level`` is not in (0, 1).
    ValueError
        When a replicate's rows do not match ``observed``.

    Notes
    -----
    The envelopes are **pointwise**: at each radius separately, with m
    finite replicate values sorted, ``null_low_m`` is the k-th smallest and
    ``null_high_m`` the k-th largest, k = max(1, floor((m + 1)(1 - level) / 2)).
    These rank-based limits are the empirical (1 - level)/2 and
    1 - (1 - level)/2 quantiles: when the observed data are exchangeable with
    the replicates, the observed value falls above ``null_high_m`` with
    probability at most k / (m + 1) at *that* radius [1]_ [2]_. Hence 39
    replicates give k = 1 (minimum and maximum) at level 0.95; with fewer, k is
    still 1 and the coverage is lower than asked. Checking many radii at once
    is *not* a test at a fixed alpha: the chance that the observed curve
    leaves the envelope somewhere is much larger than 1 - level. A global test
    needs a global envelope or a deviation test over all r [2]_.

    References
    ----------
    .. [1] J. Besag and P. J. Diggle, "Simple Monte Carlo tests for spatial
       pattern", Journal of the Royal Statistical Society C (Applied
       Statistics) 26(3), 327-333, 1977. doi:10.2307/2346974
    .. [2] A. Baddeley, E. Rubak and R. Turner, "Spatial Point Patterns:
       Methodology and Applications with R", CRC Press, 2015, chapter 10.
       doi:10.1201/b19708
    """
    _check_replicates(observed, replicates, level)
    values = np.column_stack([rep["l_m"].to_numpy(dtype=np.float64) for rep in replicates])
    low, high, mean, rank = _pointwise_limits(values, level)

    out = observed.copy()
    obs = out["l_m"].to_numpy(dtype=np.float64)
    out["null_low_m"] = low
    out["null_high_m"] = high
    out["null_mean_m"] = mean
    out["above"] = obs > high
    out["below"] = obs < low
    out.attrs.update(
        {
            "envelope_replicates": len(replicates),
            "envelope_level": float(level),
            "envelope_rank": int(rank.max()) if rank.size else 1,
        }
    )
    return out


def _check_replicates(observed: pd.DataFrame, replicates: list[pd.DataFrame], level: float) -> None:
    """Refuse an empty list of replicates, a level outside (0, 1) and mismatched rows."""
    if not replicates:
        raise InputError("no null replicates given; envelopes need at least one (39 for 95%)")
    if not (np.isfinite(level) and 0 < level < 1):
        raise InputError(f"envelope level {level!r} must be strictly between 0 and 1, e.g. 0.95")
    keys = observed[_KEY_COLUMNS].reset_index(drop=True)
    for n, rep in enumerate(replicates):
        if len(rep) != len(observed) or not rep[_KEY_COLUMNS].reset_index(drop=True).equals(keys):
            raise ValueError(f"replicate {n} does not have the observed role pairs and radii")


def _pointwise_limits(
    values: np.ndarray, level: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return each row's k-th smallest and k-th largest finite value, mean and k.

    ``values`` holds one row per curve point and one column per replicate; rows without
    a finite value get NaN limits.
    """
    finite = np.isfinite(values)
    m = finite.sum(axis=1)
    ordered = np.sort(np.where(finite, values, np.inf), axis=1)
    rank = np.maximum(1, np.floor((m + 1) * (1 - level) / 2).astype(np.int64))
    rows = np.arange(values.shape[0])
    has = m > 0
    low = np.full(values.shape[0], np.nan)
    high = np.full(values.shape[0], np.nan)
    low[has] = ordered[rows[has], rank[has] - 1]
    high[has] = ordered[rows[has], m[has] - rank[has]]
    with np.errstate(invalid="ignore"):
        mean = np.where(has, np.where(finite, values, 0.0).sum(axis=1) / np.maximum(m, 1), np.nan)
    return low, high, mean, rank
