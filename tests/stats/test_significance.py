"""Monte Carlo tests: p and q values, null models, calibration and the crowding trap."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scenes import grid_scene

from comove.errors import InputError
from comove.pipeline.core import groups, mine
from comove.stats.engine import RunParams
from comove.stats.significance import (
    NullModel,
    SignificanceParams,
    monte_carlo_p,
    summary_table,
)


def test_q_values_reject_as_in_the_published_worked_example():
    # Benjamini & Hochberg (1995), section 4: fifteen p-values of which the step-up
    # procedure at FDR 0.05 rejects the four smallest (values written from memory of
    # the paper's example, not checked against it here)
    p = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
                  0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000])  # fmt: skip
    n = 9999  # replicates so that (1 + exceed) / (1 + n) hits each p exactly; observed 1
    exceed = np.round(p * (n + 1) - 1).astype(int)
    null = (np.arange(n)[:, None] < exceed[None, :]).astype(float)
    table = summary_table(np.ones(p.size), null, alpha=0.05, statistic="x")
    np.testing.assert_allclose(table["p_value"], (1 + exceed) / (n + 1))
    assert table["significant"].tolist() == [True] * 4 + [False] * 11
    # BH q-values by their definition: q_(i) = min_{j >= i} m p_(j) / j
    m = p.size
    q = np.minimum.accumulate((table["p_value"].to_numpy() * m / np.arange(1, m + 1))[::-1])[::-1]
    np.testing.assert_allclose(table["q_value"], np.minimum(q, 1))


def test_monte_carlo_p_follows_its_definition():
    # (1 + #{null >= observed}) / (1 + N)  (Davison & Hinkley 1997, eq. 4.11)
    null = np.array([[0.1, 0.5], [0.3, 0.5], [0.2, 0.9], [0.4, 0.1]])
    p = monte_carlo_p(np.array([0.3, 0.95]), null)
    np.testing.assert_allclose(p, [(1 + 2) / 5, 1 / 5])


def walkers(seed, n_obj=12, n_snap=400, side=30.0, n_roles=4):
    """Independent reflecting random walks, uniform start: a stationary, independent scene."""
    rng = np.random.default_rng(seed)
    pos = rng.uniform(0, side, (n_obj, 2))
    xs, ys = np.empty((n_snap, n_obj)), np.empty((n_snap, n_obj))
    for t in range(n_snap):  # a test scene generator, not library code
        pos = np.abs(pos + rng.normal(0, 0.8, pos.shape))
        pos = side - np.abs(side - pos)
        xs[t], ys[t] = pos[:, 0], pos[:, 1]
    roles = np.tile(np.arange(n_obj) % n_roles, (n_snap, 1))
    return xs, ys, roles


def frame_of(xs, ys, roles, names=None):
    n_snap, n_obj = xs.shape
    names = names or [f"r{k}" for k in range(roles.max() + 1)]
    return pd.DataFrame({
        "id": np.tile([f"o{k}" for k in range(n_obj)], n_snap),
        "time": np.repeat(np.arange(n_snap, dtype=float), n_obj),
        "x": xs.ravel(), "y": ys.ravel(),
        "role": np.asarray(names)[roles.ravel()],
    })  # fmt: skip


MINE = dict(radius=3.0, step=1.0, min_prevalence=0.01, min_participation=0.25)


@pytest.mark.slow
@pytest.mark.parametrize("null", ["time-shift", "role-shuffle"])
def test_p_values_are_calibrated_when_roles_move_independently(null):
    # 24 independent scenes x 6 role pairs; under the null P(p <= 0.05) <= 0.05 (exactly
    # 0.05 for continuous statistics). With 144 p-values, correlated within a scene, a
    # binomial(144, 0.05) 99.9 % interval is [1, 17]; we allow 0..17 and also check that
    # the p-values are not piled up at 1 (which would hide a broken null).
    ps = []
    for seed in range(24):
        result = mine(frame_of(*walkers(seed)), **MINE, replicates=99, seed=seed, jobs=1,
                      null=null)  # fmt: skip
        ps.extend(result.tests.loc[result.tests["size"] == 2, "p_value"].tolist())
    ps = np.asarray(ps)
    assert ps.size >= 100
    assert (ps <= 0.05).sum() <= 17
    assert 0.3 < np.median(ps) < 0.7


def crowd_scene(seed=11, n_obj=16, n_snap=500):
    """Every object orbits one wandering attractor (a ball); roles are given at random."""
    rng = np.random.default_rng(seed)
    ball = np.cumsum(rng.normal(0, 1.5, (n_snap, 2)), axis=0)
    offsets = np.zeros((n_obj, 2))
    xs, ys = np.empty((n_snap, n_obj)), np.empty((n_snap, n_obj))
    for t in range(n_snap):  # a test scene generator, not library code
        offsets = 0.8 * offsets + rng.normal(0, 1.2, offsets.shape)
        xs[t], ys[t] = ball[t, 0] + offsets[:, 0], ball[t, 1] + offsets[:, 1]
    roles = np.tile(rng.permutation(np.arange(n_obj) % 4), (n_snap, 1))
    return xs, ys, roles


@pytest.mark.parametrize("statistic", ["continuous", "count"])
def test_crowding_trap_role_shuffle_versus_time_shift(statistic):
    frame = frame_of(*crowd_scene())
    options = dict(radius=3.0, step=1.0, min_prevalence=0.5, replicates=199, seed=5,
                   statistic=statistic)  # fmt: skip
    by_roles = mine(frame, null="role-shuffle", **options)
    by_time = mine(frame, null="time-shift", **options)
    # the crowd makes every role pair look durable...
    assert len(by_roles.patterns) >= 6
    assert by_roles.patterns["time_prevalence"].min() > 0.5
    # ...but no role prefers another: nothing survives the false discovery rate
    assert not by_roles.tests["significant"].any()
    # while the objects are together far more than their separate movements imply
    pairs = by_time.tests[by_time.tests["size"] == 2]
    assert pairs["significant"].all()
    assert (pairs["ratio"] > 2).all() and (pairs["standardised_effect"] > 3).all()
    tested = {"continuous": "mean_participation_index", "count": "time_prevalence"}[statistic]
    assert (by_time.tests["statistic"] == tested).all()


def test_same_seed_same_results_and_jobs_do_not_matter():
    frame = frame_of(*walkers(1, n_snap=150))
    a = mine(frame, **MINE, replicates=40, seed=9, jobs=1)
    b = mine(frame, **MINE, replicates=40, seed=9, jobs=2)
    c = mine(frame, **MINE, replicates=40, seed=10, jobs=1)
    pd.testing.assert_frame_equal(a.tests, b.tests)
    assert not a.tests["null_mean"].equals(c.tests["null_mean"])
    assert a.run["settings"]["seed"] == 9


def test_a_drawn_seed_is_recorded_and_repeats_the_run():
    frame = frame_of(*walkers(2, n_snap=120))
    first = mine(frame, **MINE, replicates=20)
    seed = first.run["settings"]["seed"]
    again = mine(frame, **MINE, replicates=20, seed=seed)
    pd.testing.assert_frame_equal(first.tests, again.tests)


def small_snaps(n_snap=50, n_obj=6, gaps=True):
    rng = np.random.default_rng(4)
    x = rng.uniform(0, 10, (n_snap, n_obj))
    y = rng.uniform(0, 10, (n_snap, n_obj))
    present = np.ones((n_snap, n_obj), bool)
    if gaps:
        present[10:15, 0] = False
        present[:20, 1] = False
    roles = np.tile([0, 0, 1, 1, 2, 3], (n_snap, 1))
    return grid_scene(x, y, roles, present, 4)


@pytest.mark.parametrize("within", ["period", "object"])
def test_time_shift_keeps_each_track_and_its_gaps(within):
    snaps = small_snaps()
    model = NullModel(snaps, SignificanceParams(shift_within=within))
    shifted, order = model.draw(np.random.default_rng(0))
    assert np.all(np.diff(shifted.snap * 10 + shifted.obj) > 0)  # (snapshot, object) order
    for o in range(len(snaps.objects)):
        before = snaps.snap[snaps.obj == o]
        after = shifted.snap[shifted.obj == o]
        assert after.size == before.size
        # the same positions, in the same circular order: a rotation of the track
        xb = snaps.x[snaps.obj == o]
        xa = shifted.x[shifted.obj == o]
        assert sorted(xa) == sorted(xb)
        # gaps are kept: the circular spacings of presence are the same multiset
        if within == "object":
            assert (after.min(), after.max()) == (before.min(), before.max())
            base, span = before.min(), before.max() - before.min() + 1
        else:
            base, span = 0, snaps.n_snapshots

        def circular_gaps(s, base=base, span=span):
            s = np.sort(s - base)
            return np.sort(np.diff(np.r_[s, s[0] + span]))

        np.testing.assert_array_equal(circular_gaps(after), circular_gaps(before))
    np.testing.assert_array_equal(shifted.x, snaps.x[order])


def test_role_shuffle_keeps_tracks_and_respects_strata():
    snaps = small_snaps(gaps=False)
    snaps.roles = np.array(["home_back", "home_wing", "away_back", "away_wing"])
    model = NullModel(snaps, SignificanceParams(null="role-shuffle", shuffle_strata="_"))
    seen = set()
    for k in range(20):
        shuffled, order = model.draw(np.random.default_rng(k))
        assert order is None
        np.testing.assert_array_equal(shuffled.x, snaps.x)
        before = dict(zip(snaps.obj.tolist(), snaps.roles[snaps.role].tolist(), strict=False))
        after = dict(
            zip(shuffled.obj.tolist(), shuffled.roles[shuffled.role].tolist(), strict=False)
        )
        for o in before:
            assert before[o].split("_")[0] == after[o].split("_")[0]
        seen.add(tuple(after[o] for o in sorted(after)))
    assert len(seen) > 1  # it does permute


def test_bad_significance_settings():
    with pytest.raises(InputError, match="^null"):
        SignificanceParams(null="bootstrap")
    with pytest.raises(InputError, match="^replicates"):
        SignificanceParams(replicates=-1)
    with pytest.raises(InputError, match="^alpha"):
        SignificanceParams(alpha=1.5)
    with pytest.raises(InputError, match="^jobs"):
        RunParams(jobs=0)


def test_nothing_to_test_gives_empty_tables_not_errors(tmp_path):
    # three objects that never meet: no role set, no episode, dyads never together
    n = 50
    frame = pd.DataFrame({
        "id": np.repeat(["a", "b", "c"], n), "time": np.tile(np.arange(n), 3).astype(float),
        "x": np.r_[np.zeros(n), np.full(n, 100.0), np.full(n, 200.0)], "y": 0.0,
        "role": np.repeat(["r", "s", "t"], n),
    })  # fmt: skip
    mined = mine(frame, radius=2.0, replicates=9, seed=1)
    assert mined.patterns.empty and mined.tests.empty
    found = groups(frame, radius=2.0, replicates=9, seed=1)
    assert found.episodes.empty and found.dyads.empty  # no pair ever together
    assert "p_value" in found.dyads.columns
    listed = groups(frame, radius=2.0, replicates=9, seed=1, dyad_pairs="co-present")
    assert len(listed.dyads) == 3
    assert (listed.dyads["p_value"] == 1.0).all()  # never together, nor in any replicate
    mined.write(tmp_path / "r")
    found.write(tmp_path / "r", merge=True)


def test_a_q_value_equal_to_alpha_is_significant():
    # two items with p = 1/40 and 2/40 out of 39 replicates: BH q = 0.05 for both
    null = np.zeros((39, 2))
    null[:1, 1] = 1.0
    table = summary_table(np.array([1.0, 1.0]), null, alpha=0.05, statistic="x")
    np.testing.assert_allclose(table["q_value"], [0.05, 0.05])
    assert table["significant"].all()


def waterhole_herd(seed=3, days=30, miss=0.10):
    """An invented herd drawn to one drifting waterhole; each calf keeps to its mother.

    8 cows, 6 calves (the first six cows are mothers), 5 bulls and 6 yearlings, hourly
    fixes in metres for ``days`` days, ``miss`` of them missed at random. Every animal
    wanders around the waterhole (Ornstein-Uhlenbeck, 500 m spread, 6 h memory); a calf
    stays within about 60 m of its mother. Returns a DataFrame of id, time, x, y, role.
    """
    rng = np.random.default_rng(seed)
    n_t = days * 24
    hole = np.cumsum(rng.normal(0, 60.0, (n_t, 2)), axis=0)  # drifts about 300 m a day
    roles = ["cow"] * 8 + ["calf"] * 6 + ["bull"] * 5 + ["yearling"] * 6
    a = np.exp(-1 / 6.0)

    def ou(spread):
        out = np.empty((n_t, 2))
        out[0] = rng.normal(0, spread, 2)
        for t in range(1, n_t):  # a test scene generator, not library code
            out[t] = a * out[t - 1] + rng.normal(0, spread * np.sqrt(1 - a * a), 2)
        return out

    own = [hole + ou(500.0) for _ in roles]
    for calf in range(6):
        own[8 + calf] = own[calf] + ou(40.0)
    frames = []
    for k, (role, pos) in enumerate(zip(roles, own, strict=True)):
        kept = rng.random(n_t) >= miss
        times = np.arange(n_t)[kept] * 3600.0
        frames.append(pd.DataFrame({"id": f"a{k:02d}", "time": times, "x": pos[kept, 0],
                                    "y": pos[kept, 1], "role": role}))  # fmt: skip
    return pd.concat(frames, ignore_index=True)


@pytest.mark.parametrize("null", ["role-shuffle", "time-shift"])
def test_a_strong_pattern_in_a_crowd_at_one_waterhole_is_found(null):
    # every animal is near every other often (shared waterhole), but calves keep to
    # their mothers: the mean participation index tells calf;cow apart under both nulls,
    # while the time prevalence at a low threshold saturates near 1 for it and the rest
    herd = waterhole_herd()
    options = dict(radius=300.0, step=3600.0, max_gap=3 * 3600.0, min_participation=0.2,
                   min_prevalence=0.01, replicates=199, seed=4, null=null)  # fmt: skip
    found = mine(herd, **options).tests.set_index("roles")
    assert found.loc["calf;cow", "mean_participation_index"] > 0.7
    others = found.drop(index="calf;cow")
    assert found.loc["calf;cow", "mean_participation_index"] > others.loc[
        others["size"] == 2, "mean_participation_index"].max() + 0.2  # fmt: skip
    assert found.loc["calf;cow", "q_value"] < 0.05 and found.loc["calf;cow", "significant"]
    assert found.loc["calf;cow", "standardised_effect"] > 3
    if null == "role-shuffle":
        # no role prefers another but for calves and cows: only sets holding both pass
        kept = found.index[found["significant"]]
        assert all({"calf", "cow"} <= set(roles.split(";")) for roles in kept)
        prevalence = mine(herd, statistic="count", **options).tests.set_index("roles")
        assert prevalence.loc["calf;cow", "time_prevalence"] > 0.95
        assert not prevalence.loc["calf;cow", "significant"]  # the saturated share: no power
    else:  # the shift breaks the shared waterhole too: every pair passes (crowding)
        assert found.loc[found["size"] == 2, "significant"].all()


@pytest.mark.parametrize("statistic", ["continuous", "count"])
@pytest.mark.parametrize("seed", [1, 2])
def test_a_replicate_mines_only_the_tested_sets_and_loses_nothing(statistic, seed):
    # the replicate extends only the tested sets (and, for the mean, every set with a
    # row instance): the values equal those of mining every set of the replicate
    from comove.roles.chain import role_chain
    from comove.roles.colocation import ColocationParams
    from comove.stats.significance import RoleSetStatistic, role_set_values

    xs, ys, roles = walkers(seed, n_obj=12, n_snap=150, side=14.0)
    snaps = grid_scene(xs, ys, roles, np.ones(xs.shape, bool), 4)
    colocation = ColocationParams(radius=3.0, min_participation=0.3, max_size=4)
    observed = role_chain(snaps, colocation, min_prevalent_snapshots=1)
    tested = tuple(lv.roles[lv.prevalent >= 1] for lv in observed.levels)
    assert any(sets.shape[1] == 3 and sets.shape[0] for sets in tested)
    model = NullModel(snaps, SignificanceParams(null="time-shift"))
    got = RoleSetStatistic(colocation, tested, statistic)(model, np.random.default_rng(seed))
    replicate, _ = model.draw(np.random.default_rng(seed))
    every = role_chain(replicate, colocation, min_prevalent_snapshots=0)
    want = role_set_values(every.levels, tested, 4, statistic)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    assert (want > 0).any()


def test_the_tested_mean_is_the_patterns_mean_participation_index():
    result = mine(frame_of(*walkers(5, n_snap=200)), **MINE, replicates=19, seed=2)
    both = result.patterns.merge(result.tests, on="roles", suffixes=("", "_tested"))
    assert len(both) == len(result.patterns) > 0
    np.testing.assert_allclose(both["mean_participation_index"],
                               both["mean_participation_index_tested"], rtol=1e-12)  # fmt: skip
    assert (result.tests["statistic"] == "mean_participation_index").all()
    tests = result.tests
    np.testing.assert_allclose(tests["difference"],
                               tests["mean_participation_index"] - tests["null_mean"])  # fmt: skip


def test_tests_compare_every_kth_snapshot_of_a_fine_grid():
    # 4 snapshots a second, compared every second: the observed statistic is that of
    # every 4th snapshot, and so is every replicate's
    frame = frame_of(*walkers(6, n_snap=400))
    frame["time"] = frame["time"] / 4.0
    options = dict(MINE, step=0.25, replicates=19, seed=3)
    thinned = mine(frame, **options)
    assert (thinned.tests["compared_step_s"] == 1.0).all()
    every = mine(frame, null_step=0.0, **options)
    assert (every.tests["compared_step_s"] == 0.25).all()
    # the thinned observed value is that of the snapshots at whole seconds alone
    whole = mine(frame[frame["time"] % 1.0 == 0], **dict(options, step=1.0, null_step=0.0))
    both = thinned.tests.merge(whole.tests, on="roles", suffixes=("", "_whole"))
    assert len(both) > 0
    np.testing.assert_allclose(both["difference"] + both["null_mean"],
                               both["difference_whole"] + both["null_mean_whole"])  # fmt: skip


def test_thinned_snapshots_are_every_kth():
    xs, ys, roles = walkers(8, n_obj=5, n_snap=23)
    present = np.random.default_rng(1).random(xs.shape) < 0.8
    snaps = grid_scene(xs, ys, roles, present, 4)
    thin = snaps.thinned(4)
    assert thin.n_snapshots == 6 and thin.step_ns == 4 * snaps.step_ns
    keep = snaps.snap % 4 == 0
    np.testing.assert_array_equal(thin.snap, snaps.snap[keep] // 4)
    np.testing.assert_array_equal(thin.x, snaps.x[keep])
    np.testing.assert_array_equal(thin.obj, snaps.obj[keep])
    assert snaps.thinned(1) is snaps
