"""Cross-K / cross-L of role pairs: CSR benchmark, brute force, clustering, envelopes."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scenes import grid_scene

from comove.errors import InputError
from comove.roles.crossk import CROSSK_COLUMNS, CrossKParams, cross_k, envelopes

WX, WY = 100.0, 60.0
WINDOW = (0.0, 0.0, WX, WY)
CSR_RADII = (2.0, 5.0, 10.0, 15.0)
N_SNAP, N_A, N_B = 300, 40, 40
N_BATCH = 10


def two_role_scene(xa, ya, xb, yb):
    """Snapshots of role0 objects (columns of xa) followed by role1 objects (xb)."""
    x = np.concatenate([xa, xb], axis=1)
    y = np.concatenate([ya, yb], axis=1)
    role = np.tile(np.r_[np.zeros(xa.shape[1], int), np.ones(xb.shape[1], int)], (len(x), 1))
    return grid_scene(x, y, role, np.ones(x.shape, bool), 2)


@pytest.fixture(scope="module")
def csr_points():
    rng = np.random.default_rng(20240611)
    xa = rng.uniform(0, WX, (N_SNAP, N_A))
    ya = rng.uniform(0, WY, (N_SNAP, N_A))
    xb = rng.uniform(0, WX, (N_SNAP, N_B))
    yb = rng.uniform(0, WY, (N_SNAP, N_B))
    return xa, ya, xb, yb


def batch_k(points, correction: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pooled K and l over all snapshots, and per-batch K over N_BATCH blocks of snapshots."""
    params = CrossKParams(k_radii=CSR_RADII, k_window=WINDOW, k_correction=correction)
    pooled = cross_k(two_role_scene(*points), params)
    size = N_SNAP // N_BATCH
    batches = np.array(
        [
            cross_k(two_role_scene(*(p[b * size : (b + 1) * size] for p in points)), params)[
                "k_m2"
            ].to_numpy()
            for b in range(N_BATCH)
        ]
    )
    return pooled["k_m2"].to_numpy(), pooled["l_m"].to_numpy(), batches


@pytest.mark.parametrize("correction", ["translation", "border"])
def test_csr_pooled_k_is_pi_r_squared(csr_points, correction):
    k, l_val, batches = batch_k(csr_points, correction)
    r = np.asarray(CSR_RADII)
    # standard error of the pooled K from the spread of 10 independent batches of 30
    # snapshots (batch means; the pooled K is their mean up to unequal border denominators)
    se = batches.std(axis=0, ddof=1) / np.sqrt(N_BATCH)
    # the test only has teeth if the sampling error is small next to the target
    assert np.all(se < 0.05 * np.pi * r**2)
    # CSR and independence: K_ab(r) = pi r^2 (Ripley 1977; Diggle 2003); 4 standard errors
    # keeps a correct estimator failing in well under 1 run in 1000 (normal tail)
    assert np.all(np.abs(k - np.pi * r**2) < 4 * se), (k, np.pi * r**2, se)
    # L(r) = r under CSR (Besag 1977); SE of L by the delta method, dL/dK = 1 / (2 pi L)
    assert np.all(np.abs(l_val - r) < 4 * se / (2 * np.pi * r))


def test_uncorrected_k_is_biased_low(csr_points):
    xa, ya, xb, yb = csr_points
    r = np.asarray(CSR_RADII)
    d2 = (xa[:, :, None] - xb[:, None, :]) ** 2 + (ya[:, :, None] - yb[:, None, :]) ** 2
    # no edge correction: w = 1, per snapshot K = |W| #pairs / (n_a n_b)
    per_snap = (d2[..., None] <= r**2).sum(axis=(1, 2)) * (WX * WY) / (N_A * N_B)
    k_naive = per_snap.mean(axis=0)
    se = per_snap.reshape(N_BATCH, -1, r.size).mean(axis=1).std(axis=0, ddof=1) / np.sqrt(N_BATCH)
    # the naive estimator's mean is the integral of the rectangle's set covariance
    # (Wx-|h1|)(Wy-|h2|) over the disc, divided by Wx Wy (derived here from the set covariance
    # of a rectangle, Baddeley, Rubak & Turner 2015, ch. 7):
    # pi r^2 - (4/3) r^3 (Wx+Wy)/(Wx Wy) + r^4 / (2 Wx Wy)
    expected = np.pi * r**2 - 4 / 3 * r**3 * (WX + WY) / (WX * WY) + r**4 / (2 * WX * WY)
    assert np.all(np.abs(k_naive - expected) < 4 * se)
    assert k_naive[-1] < np.pi * r[-1] ** 2 - 4 * se[-1]  # biased low at large r
    params = CrossKParams(k_radii=CSR_RADII, k_window=WINDOW)
    corrected = cross_k(two_role_scene(*csr_points), params)["k_m2"].to_numpy()
    assert corrected[-1] - k_naive[-1] > 0.1 * np.pi * r[-1] ** 2


def brute_force_k(x, y, role, present, window, radii, pairs, correction):
    """Direct double loop over points of each snapshot, independent of comove."""
    xmin, ymin, xmax, ymax = window
    wx, wy = xmax - xmin, ymax - ymin
    out = []
    for a, b in pairs:
        for r in radii:
            num, den, used, counted = 0.0, 0, 0, 0
            for s in range(x.shape[0]):
                pts = [
                    (x[s, o], y[s, o], role[s, o])
                    for o in range(x.shape[1])
                    if present[s, o] and xmin <= x[s, o] <= xmax and ymin <= y[s, o] <= ymax
                ]
                cen = [p for p in pts if p[2] == a]
                if correction == "border":
                    cen = [
                        p
                        for p in cen
                        if min(p[0] - xmin, xmax - p[0], p[1] - ymin, ymax - p[1]) >= r
                    ]
                oth = [p for p in pts if p[2] == b]
                den += len(cen) * len(oth)
                used += bool(cen) and bool(oth)
                for p, q in itertools.product(cen, oth):
                    dx, dy = p[0] - q[0], p[1] - q[1]
                    if dx * dx + dy * dy <= r * r:
                        counted += 1
                        if correction == "translation":
                            num += wx * wy / ((wx - abs(dx)) * (wy - abs(dy)))
                        else:
                            num += 1.0
            k = wx * wy * num / den if den else np.nan
            out.append((f"role{a}", f"role{b}", r, k, counted, used))
    return pd.DataFrame(
        out, columns=["role_a", "role_b", "radius_m", "k_m2", "pairs_counted", "snapshots_used"]
    )


@pytest.mark.parametrize("correction", ["translation", "border"])
def test_matches_brute_force(correction):
    rng = np.random.default_rng(7)
    n_snap, n_obj = 12, 14
    # integer positions make many distances equal to a radius: checks the inclusive test
    x = rng.integers(0, 13, (n_snap, n_obj)).astype(float)
    y = rng.integers(0, 11, (n_snap, n_obj)).astype(float)
    role = rng.integers(0, 3, (n_snap, n_obj))
    present = rng.random((n_snap, n_obj)) < 0.8
    present[0] = True
    window = (1.0, 1.0, 12.0, 9.0)
    radii = (1.0, 2.0, 3.0, 4.5, 5.0)
    snaps = grid_scene(x, y, role, present, 3)
    params = CrossKParams(k_radii=radii, k_window=window, k_correction=correction)
    got = cross_k(snaps, params)
    assert list(got.columns) == CROSSK_COLUMNS
    pairs = [(0, 1), (0, 2), (1, 2)]
    want = brute_force_k(x, y, role, present, window, radii, pairs, correction)
    for col in ["role_a", "role_b", "radius_m", "pairs_counted", "snapshots_used"]:
        assert got[col].tolist() == want[col].tolist(), col
    np.testing.assert_allclose(got["k_m2"], want["k_m2"], rtol=1e-12)
    np.testing.assert_allclose(got["l_m"], np.sqrt(want["k_m2"] / np.pi), rtol=1e-12)
    np.testing.assert_allclose(got["l_minus_r_m"], got["l_m"] - got["radius_m"], rtol=1e-12)
    assert got["pairs_counted"].max() > 0
    outside = present & ~((x >= 1) & (x <= 12) & (y >= 1) & (y <= 9))
    assert got.attrs["entries_outside_window"] == int(outside.sum()) > 0

    # explicit, reversed pairs: border uses the first role as centres
    rev = cross_k(snaps, params, role_pairs=[(2, 0), (1, 0)])
    want_rev = brute_force_k(x, y, role, present, window, radii, [(2, 0), (1, 0)], correction)
    np.testing.assert_allclose(rev["k_m2"], want_rev["k_m2"], rtol=1e-12)
    assert rev["role_a"].tolist()[:: len(radii)] == ["role2", "role1"]


def test_translation_symmetric_border_not():
    rng = np.random.default_rng(3)
    x = rng.uniform(0, 30, (20, 12))
    y = rng.uniform(0, 20, (20, 12))
    role = np.tile(np.r_[np.zeros(4, int), np.ones(8, int)], (20, 1))
    snaps = grid_scene(x, y, role, np.ones(x.shape, bool), 2)
    radii = (2.0, 4.0, 8.0)
    t = cross_k(snaps, CrossKParams(k_radii=radii), role_pairs=[(0, 1), (1, 0)])
    np.testing.assert_allclose(t["k_m2"][:3], t["k_m2"][3:], rtol=1e-12)
    border = CrossKParams(k_radii=radii, k_correction="border")
    b = cross_k(snaps, border, role_pairs=[(0, 1), (1, 0)])
    assert not np.allclose(b["k_m2"][:3], b["k_m2"][3:])


def clustered_points(rng, n_snap: int, n_a: int, n_b: int, spread: float | None):
    """Role a uniform; role b within ``spread`` m of a random a point (uniform if None)."""
    xa = rng.uniform(5, WX - 5, (n_snap, n_a))
    ya = rng.uniform(5, WY - 5, (n_snap, n_a))
    if spread is None:
        return xa, ya, rng.uniform(0, WX, (n_snap, n_b)), rng.uniform(0, WY, (n_snap, n_b))
    parent = rng.integers(0, n_a, (n_snap, n_b))
    rad = spread * np.sqrt(rng.random((n_snap, n_b)))
    ang = rng.uniform(0, 2 * np.pi, (n_snap, n_b))
    rows = np.arange(n_snap)[:, None]
    xb = xa[rows, parent] + rad * np.cos(ang)
    yb = ya[rows, parent] + rad * np.sin(ang)
    return xa, ya, xb, yb


def shifted_replicates(points, params, n_rep: int):
    """Null replicates: role b's snapshots circularly shifted relative to role a's."""
    xa, ya, xb, yb = points
    return [
        cross_k(two_role_scene(xa, ya, np.roll(xb, s, axis=0), np.roll(yb, s, axis=0)), params)
        for s in range(1, n_rep + 1)
    ]


ENV_RADII = (1.0, 2.0, 3.0, 5.0, 8.0, 12.0, 16.0, 20.0)


def test_clustered_scene_flags_above_envelope():
    rng = np.random.default_rng(11)
    points = clustered_points(rng, 80, 15, 15, spread=3.0)
    params = CrossKParams(k_radii=ENV_RADII, k_window=WINDOW)
    obs = cross_k(two_role_scene(*points), params)
    small = obs["radius_m"] <= 3
    assert np.all(obs.loc[small, "l_minus_r_m"] > 2.0)
    # 39 replicates: k = 1, min/max envelope at pointwise level 1 - 2/40 = 0.95
    # (Besag & Diggle 1977 rank rule)
    env = envelopes(obs, shifted_replicates(points, params, 39))
    assert env.attrs["envelope_rank"] == 1
    assert env.loc[small, "above"].all()
    assert not env["below"][small].any()
    assert np.all(env["null_low_m"] <= env["null_mean_m"])
    assert np.all(env["null_mean_m"] <= env["null_high_m"])


def test_independent_scene_stays_inside_envelope():
    rng = np.random.default_rng(12)
    points = clustered_points(rng, 80, 15, 15, spread=None)
    params = CrossKParams(k_radii=ENV_RADII, k_window=WINDOW)
    obs = cross_k(two_role_scene(*points), params)
    env = envelopes(obs, shifted_replicates(points, params, 39))
    outside = env["above"] | env["below"]
    # pointwise 95% envelopes: a few exits at single radii are expected by design
    assert outside.mean() <= 0.25
    # and the replicates themselves scatter around L = r (Ripley 1977)
    assert np.all(np.abs(env["null_mean_m"] - env["radius_m"]) < 0.1 * env["radius_m"] + 0.2)


def test_envelope_rank_rule():
    obs = pd.DataFrame(
        {"role_a": ["a", "a"], "role_b": ["b", "b"], "radius_m": [1.0, 2.0], "l_m": [0.0, 200.0]}
    )
    rng = np.random.default_rng(0)

    def reps(n):
        return [obs.assign(l_m=[v, 100 + v]) for v in rng.permutation(np.arange(1.0, n + 1))]

    # with m replicates the k-th smallest / largest bound a pointwise test of level
    # 1 - 2k/(m+1) (Besag & Diggle 1977): m = 99, level 0.95 -> k = 2
    env = envelopes(obs, reps(99), level=0.95)
    assert env["null_low_m"].tolist() == [2.0, 102.0]
    assert env["null_high_m"].tolist() == [98.0, 198.0]
    assert env["null_mean_m"].tolist() == [50.0, 150.0]
    assert env["below"].tolist() == [True, False]
    assert env["above"].tolist() == [False, True]
    env = envelopes(obs, reps(19), level=0.9)  # k = 1: min and max
    assert env["null_low_m"].tolist() == [1.0, 101.0]
    assert env["null_high_m"].tolist() == [19.0, 119.0]
    with pytest.raises(ValueError, match="replicate 0"):
        envelopes(obs, [obs.iloc[:1]])
    with pytest.raises(InputError, match="level"):
        envelopes(obs, reps(5), level=1.0)
    with pytest.raises(InputError, match="replicates"):
        envelopes(obs, [])


def random_scene(seed: int):
    rng = np.random.default_rng(seed)
    n_snap, n_obj = 15, 16
    x = rng.uniform(0, 40, (n_snap, n_obj))
    y = rng.uniform(0, 25, (n_snap, n_obj))
    role = rng.integers(0, 3, (n_snap, n_obj))
    present = rng.random((n_snap, n_obj)) < 0.85
    present[0] = True
    return x, y, role, present


@pytest.mark.parametrize("correction", ["translation", "border"])
@pytest.mark.parametrize("window", [(2.0, 1.0, 38.0, 24.0), None])
def test_invariant_to_translation_and_relabelling(correction, window):
    x, y, role, present = random_scene(5)
    radii = (1.5, 3.0, 6.0, 9.0)
    base = cross_k(
        grid_scene(x, y, role, present, 3),
        CrossKParams(k_radii=radii, k_window=window, k_correction=correction),
    )
    assert base["pairs_counted"].sum() > 0

    sx, sy = 1234.5, -987.25
    moved_window = None if window is None else (window[0] + sx, window[1] + sy,
                                                window[2] + sx, window[3] + sy)  # fmt: skip
    moved = cross_k(
        grid_scene(x + sx, y + sy, role, present, 3),
        CrossKParams(k_radii=radii, k_window=moved_window, k_correction=correction),
    )
    np.testing.assert_allclose(moved["k_m2"], base["k_m2"], rtol=1e-9)
    assert moved["pairs_counted"].tolist() == base["pairs_counted"].tolist()

    perm = np.random.default_rng(1).permutation(x.shape[1])
    relabelled = cross_k(
        grid_scene(x[:, perm], y[:, perm], role[:, perm], present[:, perm], 3),
        CrossKParams(k_radii=radii, k_window=window, k_correction=correction),
    )
    np.testing.assert_allclose(relabelled["k_m2"], base["k_m2"], rtol=1e-12)
    assert relabelled["pairs_counted"].tolist() == base["pairs_counted"].tolist()
    assert relabelled["snapshots_used"].tolist() == base["snapshots_used"].tolist()


def test_absent_role_pair_and_single_role():
    x, y, role, present = random_scene(9)
    role[:] = np.where(role == 2, 1, role)  # role2 never occurs
    snaps = grid_scene(x, y, role, present, 3)
    params = CrossKParams(k_radii=(2.0, 4.0))
    assert cross_k(snaps, params)[["role_a", "role_b"]].drop_duplicates().values.tolist() == [
        ["role0", "role1"]
    ]
    absent = cross_k(snaps, params, role_pairs=[(0, 2)])
    assert absent["k_m2"].isna().all() and (absent["snapshots_used"] == 0).all()
    one = grid_scene(x, y, np.zeros_like(role), present, 1)
    empty = cross_k(one, params)
    assert empty.empty and list(empty.columns) == CROSSK_COLUMNS
    with pytest.raises(ValueError, match="itself"):
        cross_k(snaps, params, role_pairs=[(1, 1)])
    with pytest.raises(ValueError, match="outside"):
        cross_k(snaps, params, role_pairs=[(0, 5)])


@pytest.mark.parametrize(
    "kwargs, option",
    [
        ({"k_radii": ()}, "^k_radii"),
        ({"k_radii": (2.0, 1.0)}, "^k_radii"),
        ({"k_radii": (1.0, 1.0)}, "^k_radii"),
        ({"k_radii": (-1.0,)}, "^k_radii"),
        ({"k_radii": (np.nan,)}, "^k_radii"),
        ({"k_radii": ("far",)}, "^k_radii"),
        ({"k_radii": (1.0,), "k_window": (0, 0, 1)}, "^k_window"),
        ({"k_radii": (1.0,), "k_window": (0, 0, 0, 5)}, "^k_window"),
        ({"k_radii": (1.0,), "k_window": (0, 5, 5, 1)}, "^k_window"),
        ({"k_radii": (1.0,), "k_window": (0, 0, np.inf, 5)}, "^k_window"),
        ({"k_radii": (1.0,), "k_correction": "ripley"}, "^k_correction"),
    ],
)
def test_bad_parameters(kwargs, option):
    with pytest.raises(InputError, match=option) as info:
        CrossKParams(**kwargs)
    assert "\n" not in str(info.value)


def test_radius_beyond_window_and_flat_window():
    x, y, role, present = random_scene(2)
    snaps = grid_scene(x, y, role, present, 3)
    with pytest.raises(InputError, match="^k_radii"):
        cross_k(snaps, CrossKParams(k_radii=(5.0, 30.0), k_window=(0, 0, 40, 25)))
    # border correction: no centre lies 30 m from the edge, K is undefined there
    border = cross_k(snaps, CrossKParams(k_radii=(5.0, 30.0), k_window=(0, 0, 40, 25),
                                         k_correction="border"))  # fmt: skip
    assert border.loc[border["radius_m"] == 30.0, "k_m2"].isna().all()
    flat = grid_scene(x, np.zeros_like(y), role, present, 3)
    with pytest.raises(InputError, match="^k_window"):
        cross_k(flat, CrossKParams(k_radii=(1.0,)))
