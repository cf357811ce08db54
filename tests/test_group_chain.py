"""The group chain wired once: its pair counts, and one role-set definition for tests and table."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scenes import grid_scene
from scipy.spatial.distance import cdist
from test_episodes import run_scenario

from comove.episodes import EpisodeParams, episode_role_sets
from comove.group_chain import group_chain
from comove.grouping import GroupParams


def test_pair_counts_equal_a_brute_force_count_of_distances():
    # reference: scipy.spatial.distance.cdist at every snapshot
    rng = np.random.default_rng(4)
    n_snap, n_obj, radius = 40, 7, 2.5
    x, y = rng.uniform(0, 8, (n_snap, n_obj)), rng.uniform(0, 8, (n_snap, n_obj))
    present = rng.random((n_snap, n_obj)) < 0.8
    snaps = grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)
    tally = group_chain(snaps, GroupParams(radius=radius), EpisodeParams())
    expected = np.zeros((n_obj, n_obj))
    for s in range(n_snap):
        here = np.flatnonzero(present[s])
        d = cdist(
            np.column_stack([x[s, here], y[s, here]]), np.column_stack([x[s, here], y[s, here]])
        )
        a, b = np.nonzero(np.triu(d <= radius, 1))
        np.add.at(expected, (here[a], here[b]), 1)
    a, b = np.triu_indices(n_obj, 1)
    counts = tally.together(snaps, a * n_obj + b)
    np.testing.assert_array_equal(counts, expected[a, b])
    assert counts.sum() > 0


def test_every_role_set_of_the_table_is_tested_when_a_role_changes():
    # in the game, player A06 changes role at 4:00: the table and the tests of episode
    # counts must name the episodes' role sets alike, so that every one gets a p-value
    _, result = run_scenario("small_sided_game", permutations=19, seed=3, jobs=1)
    snaps = result.snapshots
    assert (snaps.main_roles()[snaps.obj] != snaps.role).any()
    roles = result.roles
    assert len(roles) > 0
    assert roles["p_value"].notna().all()
    assert set(roles["roles"]) == set(result.episodes["roles"])
    counted = result.episodes["roles"].value_counts()
    assert (roles.set_index("roles")["episodes"] == counted.reindex(roles["roles"])).all()


def test_episode_role_sets_name_the_roles_held_inside_each_episode():
    # two walkers side by side; walker 1 is role0 for the first half, role1 after
    n = 20
    t = np.arange(n, dtype=float)
    x = np.column_stack([t, t])
    y = np.column_stack([np.zeros(n), np.ones(n)])
    role = np.zeros((n, 2), int)
    role[n // 2 :, 1] = 1
    snaps = grid_scene(x, y, role, np.ones((n, 2), bool), 2)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    found = group_chain(snaps, gp, EpisodeParams()).episodes
    assert episode_role_sets(snaps, found) == ["role0;role1"]
    early = group_chain(snaps.window(0, n // 2), gp, EpisodeParams())
    assert episode_role_sets(snaps.window(0, n // 2), early.episodes) == ["role0"]
    pd.testing.assert_series_equal(pd.Series(found.start), pd.Series([0]))
