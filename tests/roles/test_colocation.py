"""Role co-location per snapshot: exactness against clique enumeration, and properties."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import brute_force_pi, grid_scene, random_scene

from comove.roles.chain import role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.persistence import PersistenceParams, durable_patterns
from comove.tracks.neighbours import neighbour_pairs


def mined(snaps, radius, min_participation, max_size, min_prevalent=1):
    params = ColocationParams(radius=radius, min_participation=min_participation, max_size=max_size)
    tally = role_chain(snaps, params, min_prevalent_snapshots=min_prevalent)
    out = {}
    for level in tally.levels:
        for row in range(level.set_id.size):
            roles = tuple(int(r) for r in level.roles[level.set_id[row]])
            out[(roles, int(level.snap[row]))] = (level.pi[row], level.pr[row])
    return tally, out


@pytest.mark.parametrize("seed", range(6))
def test_every_instance_count_matches_networkx_cliques(seed):
    # reference: networkx.enumerate_all_cliques (see scenes.brute_force_pi); with a tiny
    # participation threshold nothing is pruned, so every (set, snapshot) must match
    x, y, role, present, n_roles = random_scene(seed)
    snaps = grid_scene(x, y, role, present, n_roles)
    radius = 4.0
    reference = brute_force_pi(snaps, radius, max_size=4)
    _, ours = mined(snaps, radius, min_participation=1e-9, max_size=4)
    assert set(ours) == set(reference)
    for key, (pi, pr_by_role) in reference.items():
        got_pi, got_pr = ours[key]
        assert got_pi == pytest.approx(pi, abs=1e-12)
        assert got_pr == pytest.approx([pr_by_role[r] for r in key[0]], abs=1e-12)
    assert any(len(k[0]) == 4 for k in reference)  # the scene does reach size 4


@pytest.mark.parametrize("seed", range(3))
def test_many_roles_few_entries_match_networkx_cliques(seed):
    # more (snapshot, role) cells than entries and more role pairs than pair instances:
    # the miner's sparse counts rather than its dense tables (reference: networkx, as above)
    x, y, role, present, n_roles = random_scene(
        seed + 50, n_snap=12, n_obj=14, n_roles=13, side=20.0
    )
    snaps = grid_scene(x, y, role, present, n_roles)
    assert snaps.n_snapshots * n_roles > snaps.n_entries
    assert n_roles * n_roles > neighbour_pairs(snaps, 4.0).i.size > 0
    reference = brute_force_pi(snaps, 4.0, max_size=3)
    _, ours = mined(snaps, 4.0, min_participation=1e-9, max_size=3)
    assert set(ours) == set(reference)
    for key, (pi, pr_by_role) in reference.items():
        got_pi, got_pr = ours[key]
        assert got_pi == pytest.approx(pi, abs=1e-12)
        assert got_pr == pytest.approx([pr_by_role[r] for r in key[0]], abs=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_pruning_loses_no_prevalent_snapshot(seed):
    # a set the miner does not list at a level must never be prevalent (reference: networkx)
    x, y, role, present, n_roles = random_scene(seed + 100, n_roles=5)
    snaps = grid_scene(x, y, role, present, n_roles)
    threshold = 0.5
    reference = brute_force_pi(snaps, 4.0, max_size=4)
    tally, ours = mined(snaps, 4.0, threshold, max_size=4)
    listed = {tuple(int(r) for r in row) for lv in tally.levels for row in lv.roles}
    for (roles, _snap), (pi, _) in reference.items():
        if roles not in listed:
            assert pi < threshold
        else:
            assert ours[(roles, _snap)][0] == pytest.approx(pi, abs=1e-12)


@pytest.mark.parametrize("min_prevalent_time", [0.0, 3.0, 7.0])
def test_duration_pruning_gives_the_same_patterns_as_filtering_afterwards(min_prevalent_time):
    x, y, role, present, n_roles = random_scene(7, n_snap=60, n_roles=4, side=9.0)
    snaps = grid_scene(x, y, role, present, n_roles)
    persistence = PersistenceParams(min_prevalence=0.1, min_prevalent_time=min_prevalent_time)
    bound = persistence.min_prevalent_snapshots(snaps.step_s)
    pruned, _ = mined(snaps, 4.0, 0.4, 4, min_prevalent=bound)
    unpruned, _ = mined(snaps, 4.0, 0.4, 4, min_prevalent=1)
    a = durable_patterns(pruned, persistence, 0.4).patterns
    b = durable_patterns(unpruned, persistence, 0.4).patterns
    assert len(a) > 0
    assert a.equals(b)


scenes = st.builds(
    random_scene,
    seed=st.integers(0, 10_000),
    n_snap=st.integers(1, 6),
    n_obj=st.integers(2, 9),
    n_roles=st.integers(2, 4),
    side=st.floats(4.0, 15.0),
    p_present=st.floats(0.5, 1.0),
    integer=st.just(True),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scene=scenes)
def test_pi_is_anti_monotone_and_pr_in_unit_interval(scene):
    snaps = grid_scene(*scene)
    _, ours = mined(snaps, 3.0, 1e-9, max_size=4)
    for (roles, snap), (pi, pr) in ours.items():
        assert np.all((pr > 0) & (pr <= 1))
        assert pi == pytest.approx(pr.min())
        if len(roles) > 2:
            for drop in range(len(roles)):
                sub = roles[:drop] + roles[drop + 1 :]
                assert ours[(sub, snap)][0] >= pi - 1e-12


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    scene=scenes,
    shift=st.tuples(st.integers(-500, 500), st.integers(-500, 500)),
    quarter_turns=st.integers(0, 3),
    mirror=st.booleans(),
    seed=st.integers(0, 99),
)
def test_invariant_to_translation_rotation_and_relabelling(
    scene, shift, quarter_turns, mirror, seed
):
    x, y, role, present, n_roles = scene
    base = durable_patterns(
        mined(grid_scene(x, y, role, present, n_roles), 3.0, 0.5, 3)[0],
        PersistenceParams(0.1),
        0.5,
    ).patterns
    # integer coordinates and quarter turns keep every distance exact
    x2, y2 = x.copy(), y.copy()
    for _ in range(quarter_turns):
        x2, y2 = -y2, x2
    if mirror:
        x2 = -x2
    x2, y2 = x2 + shift[0], y2 + shift[1]
    perm = np.random.default_rng(seed).permutation(x.shape[1])  # relabel the objects
    snaps2 = grid_scene(x2[:, perm], y2[:, perm], role[:, perm], present[:, perm], n_roles)
    moved = durable_patterns(mined(snaps2, 3.0, 0.5, 3)[0], PersistenceParams(0.1), 0.5).patterns
    assert base.drop(columns="longest_run_start").equals(moved.drop(columns="longest_run_start"))


def test_general_rotation_away_from_the_radius_boundary():
    x, y, role, present, n_roles = random_scene(3, n_snap=20, n_obj=9)
    snaps = grid_scene(x, y, role, present, n_roles)
    d = np.hypot(x[:, :, None] - x[:, None, :], y[:, :, None] - y[:, None, :])
    assert np.abs(d - 4.0).min() > 1e-6  # no distance sits on the boundary
    angle = 0.7
    c, s = np.cos(angle), np.sin(angle)
    snaps2 = grid_scene(c * x - s * y + 1e4, s * x + c * y - 3e3, role, present, n_roles)
    a = durable_patterns(mined(snaps, 4.0, 0.5, 3)[0], PersistenceParams(0.1), 0.5)
    b = durable_patterns(mined(snaps2, 4.0, 0.5, 3)[0], PersistenceParams(0.1), 0.5)
    assert len(a.patterns) > 0
    assert a.patterns.equals(b.patterns)


def test_hand_computed_scene():
    # two snapshots; roles A(0), B(1), C(2); radius 1
    # t0: a1(0,0) a2(10,0) b1(0.5,0) c1(0.5,0.5)  -> {A,B}: PR_A=1/2 PR_B=1 -> PI 0.5
    #                                               {A,B,C}: triangle a1-b1-c1 -> PI 0.5
    # t1: a1(0,0) a2(10,0) b1(5,0)   c1(0.5,0.5)  -> {A,B}: none; {A,C}: PI 0.5
    x = np.array([[0, 10, 0.5, 0.5], [0, 10, 5, 0.5]], dtype=float)
    y = np.array([[0, 0, 0, 0.5], [0, 0, 0, 0.5]], dtype=float)
    role = np.array([[0, 0, 1, 2], [0, 0, 1, 2]])
    snaps = grid_scene(x, y, role, np.ones_like(x, dtype=bool), 3)
    _, ours = mined(snaps, 1.0, 0.5, 3)
    assert ours[((0, 1), 0)][0] == 0.5
    assert list(ours[((0, 1), 0)][1]) == [0.5, 1.0]
    assert ours[((0, 1, 2), 0)][0] == 0.5
    assert ((0, 1), 1) not in ours
    assert ours[((0, 2), 1)][0] == 0.5
    patterns = durable_patterns(
        mined(snaps, 1.0, 0.5, 3)[0], PersistenceParams(0.5), 0.5
    ).patterns.set_index("roles")
    assert patterns.loc["role0;role2", "time_prevalence"] == 1.0
    assert patterns.loc["role0;role1", "time_prevalence"] == 0.5
    assert patterns.loc["role0;role1;role2", "prevalent_snapshots"] == 1


def _crowd(n_obj: int, n_roles: int, n_snap: int = 2):
    """Every object within a metre of every other, roles dealt in turn."""
    rng = np.random.default_rng(7)
    x = rng.uniform(0, 0.5, (n_snap, n_obj))
    y = rng.uniform(0, 0.5, (n_snap, n_obj))
    role = np.broadcast_to(np.arange(n_obj) % n_roles, (n_snap, n_obj)).copy()
    return grid_scene(x, y, role, np.ones((n_snap, n_obj), bool), n_roles)


def test_a_join_beyond_memory_is_refused_before_it_is_made(monkeypatch):
    import comove.roles.colocation as colocation
    from comove.errors import InputError

    snaps = _crowd(40, 3)
    params = ColocationParams(radius=2.0, max_size=3)
    monkeypatch.setattr(colocation, "available_memory", lambda: 1000)
    with pytest.raises(InputError, match="neighbours of other roles to join pairwise") as caught:
        colocation.mine_levels(snaps, neighbour_pairs(snaps, 2.0), params)
    assert "--max-size 2" in str(caught.value) and "\n" not in str(caught.value)
    monkeypatch.undo()  # with the machine's memory the same crowd is mined
    assert len(colocation.mine_levels(snaps, neighbour_pairs(snaps, 2.0), params)) == 2


def test_too_many_candidate_sets_are_refused_before_they_are_made(monkeypatch, tmp_path, capsys):
    import pandas as pd

    import comove.roles.colocation as colocation
    from comove.cli import main

    # 12 roles all together: C(12, 3) = 220 sets of size 3 make 495 candidates of size 4
    monkeypatch.setattr(colocation, "MAX_CANDIDATES", 300)
    n, t = 12, 3
    frame = pd.DataFrame({
        "id": np.repeat([f"o{i}" for i in range(n)], t),
        "role": np.repeat([f"r{i}" for i in range(n)], t),
        "time": np.tile(np.arange(t), n), "x": np.repeat(np.arange(n) * 0.01, t), "y": 0.0,
    })  # fmt: skip
    frame.to_csv(tmp_path / "all.csv", index=False)
    code = main(["mine", str(tmp_path / "all.csv"), "--radius", "2", "--max-size", "6",
                 "--replicates", "0", "--quiet", "--out", str(tmp_path / "out")])  # fmt: skip
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "220 role sets of size 3 among 12 roles" in err and "495 candidate sets" in err
    assert "--max-size 3" in err and not (tmp_path / "out").exists()
