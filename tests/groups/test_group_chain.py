"""The group chain wired once: its pair counts, and one role-set definition for tests and table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import SCENARIO_RUNS, gap_midpoints, grid_scene, random_walkers, run_scenario
from scipy.spatial.distance import cdist

from comove.groups import summary
from comove.groups.chain import (
    chunk_dyads,
    chunk_episode_rows,
    chunk_timeline,
    chunk_timeline_and_keys,
    chunk_together_keys,
    group_chain,
)
from comove.groups.dyads import dyad_rows, dyad_table, expected_distances
from comove.groups.episodes import EpisodeParams, find_episodes
from comove.groups.grouping import GroupParams, GroupTimeline
from comove.groups.presets import preset_values
from comove.groups.summary import episode_role_sets, episode_table
from comove.pipeline.core import GROUP_STAGES, split_options
from comove.tracks.neighbours import neighbour_pairs


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
    _, result = run_scenario("small_sided_game", replicates=19, seed=3, jobs=1)
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


def episodes_as_tuples(found):
    return [
        (tuple(m.tolist()), int(s), int(e), int(t), tuple(c), tuple(w))
        for m, s, e, t, c, w in zip(found.members, found.start, found.end, found.together,
                                    found.came_from, found.went_into, strict=True)
    ]  # fmt: skip


def chunked_episodes(snaps, grouping, episode_params, cuts):
    edges = [0, *cuts, snaps.n_snapshots]
    parts = [chunk_timeline(snaps, a, b, grouping) for a, b in zip(edges[:-1], edges[1:],
                                                                    strict=True)]  # fmt: skip
    return find_episodes(GroupTimeline.joined(parts), episode_params)


def chunked_dyads(snaps, radius, cuts, order="left"):
    """The dyad table from the tallies of the chunks between ``cuts``, joined in ``order``.

    Two passes, as a streaming run makes them: the pairs ever together, then their counts.
    """
    edges = list(zip([0, *cuts], [*cuts, snaps.n_snapshots], strict=True))
    keys = np.unique(np.concatenate([chunk_together_keys(snaps, a, b, radius) for a, b in edges]))
    parts = [chunk_dyads(snaps, a, b, radius, keys) for a, b in edges]
    while len(parts) > 1:  # "left": a running total; "tree": neighbours pairwise, as a reduction
        if order == "left":
            parts = [parts[0].then(parts[1]), *parts[2:]]
        else:
            joined = [p.then(q) for p, q in zip(parts[::2], parts[1::2], strict=False)]
            parts = joined + ([parts[-1]] if len(parts) % 2 else [])
    tally = parts[0]
    return dyad_rows(tally, snaps, expected_distances(snaps, tally, 62_500), 62_500)


def chunked_table(snaps, grouping, tally, cuts):
    """The episode table and paths from the rows of the chunks between ``cuts``."""
    edges = [0, *cuts, snaps.n_snapshots]
    parts = [chunk_episode_rows(snaps, a, b, tally.episodes, grouping)
             for a, b in zip(edges[:-1], edges[1:], strict=True)]  # fmt: skip
    rows = parts[0]
    for part in parts[1:]:
        rows = rows.then(part)
    return episode_table(snaps, tally.episodes, tally.motion, grouping.min_speed, rows=rows)


def assert_same_table(found, whole):
    pd.testing.assert_frame_equal(found[0], whole[0], check_exact=True)
    assert len(found[1]) == len(whole[1])
    for path, expected in zip(found[1], whole[1], strict=True):
        np.testing.assert_array_equal(path, expected)


def assert_same_dyads(found, whole):
    whole = whole.copy()
    whole.attrs.pop("radius_m")
    pd.testing.assert_frame_equal(found, whole, check_exact=True)
    assert found.attrs == whole.attrs


@pytest.fixture(scope="module", params=["small_sided_game", "fleet", "herd"])
def scenario_groups(request):
    truth, result = run_scenario(request.param, replicates=0)
    options = dict(preset_values(SCENARIO_RUNS[request.param][0]),
                   radius=truth["parameters"]["radius"])  # fmt: skip
    grouping, episode_params = split_options(GROUP_STAGES, options)[3:5]
    return result.snapshots, grouping, episode_params


def test_chunked_episodes_equal_the_whole_on_every_scenario(scenario_groups):
    # chunk edges at several sizes, in the middle of every episode, and in the middle
    # of gaps in objects' data
    snaps, grouping, episode_params = scenario_groups
    whole = group_chain(snaps, grouping, episode_params).episodes
    assert whole.n_episodes > 0
    expected = episodes_as_tuples(whole)
    n = snaps.n_snapshots
    inside = [(int(s) + int(e)) // 2 for s, e in zip(whole.start, whole.end, strict=True)]
    gaps = gap_midpoints(snaps)  # the fleet's dropouts and the herd's missed fixes
    for cuts in (list(range(n // 7, n, n // 7)), [n // 2], sorted(set(inside))[:40], gaps):
        found = chunked_episodes(snaps, grouping, episode_params, cuts)
        assert episodes_as_tuples(found) == expected


def test_chunked_dyads_equal_the_whole_on_every_scenario(scenario_groups):
    # counts, distance sums and runs together, bit for bit, whatever the cuts and
    # whichever way the chunks' tallies are joined
    snaps, grouping, episode_params = scenario_groups
    whole = dyad_table(snaps, neighbour_pairs(snaps, grouping.radius))
    assert (whole["together_snapshots"] > 0).any()
    runs = group_chain(snaps, grouping, episode_params).episodes
    n = snaps.n_snapshots
    inside = [(int(s) + int(e)) // 2 for s, e in zip(runs.start, runs.end, strict=True)]
    for cuts, order in (
        (list(range(n // 7, n, n // 7)), "left"),
        ([n // 2], "left"),
        (sorted(set(inside))[:40], "tree"),
        (gap_midpoints(snaps), "tree"),
    ):
        assert_same_dyads(chunked_dyads(snaps, grouping.radius, cuts, order), whole)


def test_chunked_episode_table_equals_the_whole_on_every_scenario(scenario_groups):
    # the second pass: the rows of the whole run's episodes read chunk by chunk
    snaps, grouping, episode_params = scenario_groups
    tally = group_chain(snaps, grouping, episode_params)
    whole = episode_table(snaps, tally.episodes, tally.motion, grouping.min_speed)
    n = snaps.n_snapshots
    runs = tally.episodes
    inside = [(int(s) + int(e)) // 2 for s, e in zip(runs.start, runs.end, strict=True)]
    for cuts in (list(range(n // 7, n, n // 7)), sorted(set(inside))[:40], gap_midpoints(snaps)):
        assert_same_table(chunked_table(snaps, grouping, tally, cuts), whole)


@pytest.mark.parametrize(("block", "workers"), [(1, 3), (7, 3), (1_000_000, 3), (1_000_000, -1)])
def test_episode_table_filled_in_threads_equals_one_thread(
    scenario_groups, monkeypatch, block, workers
):
    # blocks of one row, of a few rows and of whole sizes, filled by three threads or
    # one per core
    snaps, grouping, episode_params = scenario_groups
    tally = group_chain(snaps, grouping, episode_params)
    whole = episode_table(snaps, tally.episodes, tally.motion, grouping.min_speed)
    monkeypatch.setattr(summary, "TABLE_BLOCK", block)
    found = episode_table(snaps, tally.episodes, tally.motion, grouping.min_speed, workers=workers)
    assert_same_table(found, whole)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), tol=st.integers(0, 3), data=st.data())
def test_any_cut_of_a_random_scene_gives_the_same_episodes(seed, tol, data):
    rng = np.random.default_rng(seed)
    n_snap, n_obj = 40, 6
    x, y, _ = random_walkers(rng, n_obj, n_snap)
    present = rng.random((n_snap, n_obj)) < 0.85
    present[0] = True
    snaps = grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)
    # heading and speed predicates make the links depend on velocities, which reach
    # over chunk edges
    # evidence links also weigh the snapshots around each one, across chunk edges too
    links = data.draw(st.sampled_from(["evidence", "snapshot"]))
    window = data.draw(st.sampled_from([0.0, 3.0, 8.0]))
    gp = GroupParams(radius=1.5, min_speed=0.1, max_heading=60.0, max_speed_ratio=2.0,
                     velocity_window=4.0, links=links, evidence_window=window)  # fmt: skip
    params = EpisodeParams(tolerance=float(tol), min_together_time=2.0)
    cuts = sorted(set(data.draw(st.lists(st.integers(1, snaps.n_snapshots - 1), max_size=8))))
    whole = group_chain(snaps, gp, params).episodes
    assert episodes_as_tuples(chunked_episodes(snaps, gp, params, cuts)) == episodes_as_tuples(
        whole
    )
    tally = group_chain(snaps, gp, params)
    assert_same_table(chunked_table(snaps, gp, tally, cuts),
                      episode_table(snaps, tally.episodes, tally.motion, gp.min_speed))  # fmt: skip
    order = data.draw(st.sampled_from(["left", "tree"]))
    assert_same_dyads(chunked_dyads(snaps, gp.radius, cuts, order),
                      dyad_table(snaps, neighbour_pairs(snaps, gp.radius)))  # fmt: skip


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), data=st.data())
def test_episode_role_sets_equal_a_loop_over_members_fixes(seed, data):
    # objects change roles at random snapshots; reference: every fix of every member
    # within each episode's span, looked up one by one
    rng = np.random.default_rng(seed)
    n_snap, n_obj = 40, 6
    x, y, _ = random_walkers(rng, n_obj, n_snap)
    present = rng.random((n_snap, n_obj)) < 0.85
    present[0] = True
    role = np.repeat(rng.integers(0, 3, (1, n_obj)), n_snap, axis=0)
    switch = rng.random((n_snap, n_obj)) < 0.05
    role = np.where(np.cumsum(switch, axis=0) % 2 == 1, (role + 1) % 3, role)
    snaps = grid_scene(x, y, role, present, 3)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    tally = group_chain(snaps, gp, EpisodeParams(tolerance=1.0, min_together_time=2.0))
    expected = []
    for members, start, end in zip(tally.episodes.members, tally.episodes.start,
                                   tally.episodes.end, strict=True):  # fmt: skip
        held = {str(snaps.roles[snaps.role[e]]) for e in range(snaps.n_entries)
                if snaps.obj[e] in members and start <= snaps.snap[e] <= end}  # fmt: skip
        expected.append(";".join(sorted(held)))
    assert episode_role_sets(snaps, tally.episodes) == expected
    cuts = sorted(set(data.draw(st.lists(st.integers(1, n_snap - 1), max_size=6))))
    table, _ = chunked_table(snaps, gp, tally, cuts)
    assert table["roles"].tolist() == expected


def test_chunks_of_one_snapshot_each_give_the_whole_dyads_and_table():
    rng = np.random.default_rng(11)
    n_snap, n_obj = 30, 14
    x, y, _ = random_walkers(rng, n_obj, n_snap)
    present = rng.random((n_snap, n_obj)) < 0.8
    present[0] = True
    snaps = grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    cuts = list(range(1, n_snap))
    whole = dyad_table(snaps, neighbour_pairs(snaps, gp.radius))
    assert len(whole) > 20
    assert_same_dyads(chunked_dyads(snaps, gp.radius, cuts, "tree"), whole)
    tally = group_chain(snaps, gp, EpisodeParams(min_together_time=2.0))
    assert tally.episodes.n_episodes > 0
    assert_same_table(chunked_table(snaps, gp, tally, cuts),
                      episode_table(snaps, tally.episodes, tally.motion, gp.min_speed))  # fmt: skip


def test_dyads_from_the_first_pass_pairs_equal_dyads_searching_again(scenario_groups):
    # a run over windows keeps each window's neighbour pairs from the first pass
    snaps, grouping, _ = scenario_groups
    n = snaps.n_snapshots
    edges = [(0, n // 3), (n // 3, n)]
    found = [chunk_timeline_and_keys(snaps, a, b, grouping) for a, b in edges]
    keys = np.unique(np.concatenate([k for _, k, _ in found]))
    for (a, b), (_, _, pairs) in zip(edges, found, strict=True):
        assert pairs.n_pairs > 0
        reused = chunk_dyads(snaps, a, b, grouping.radius, keys, pairs=pairs)
        searched = chunk_dyads(snaps, a, b, grouping.radius, keys)
        for name, value in vars(searched).items():
            np.testing.assert_array_equal(getattr(reused, name), value, err_msg=name)
