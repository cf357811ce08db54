"""Episodes: planted groups recovered, decoys rejected, maximality and invariance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import (
    SCENARIO_RUNS,
    brute_force_episodes,
    grid_scene,
    random_walkers,
    run_scenario,
)

from comove.errors import InputError
from comove.groups.dyads import dyad_table
from comove.groups.episodes import EpisodeParams, find_episodes
from comove.groups.evidence import evidence_links
from comove.groups.grouping import GroupParams, GroupTimeline, linked_pairs, snapshot_groups
from comove.groups.presets import preset_values
from comove.groups.summary import episode_table, role_rollup
from comove.pipeline.core import GROUP_STAGES, split_options
from comove.tracks.motion import entry_motion
from comove.tracks.neighbours import neighbour_pairs


@pytest.fixture(scope="module", params=sorted(SCENARIO_RUNS))
def scenario(request):
    return request.param, *run_scenario(request.param)


def test_planted_episodes_are_recovered_with_members_and_times(scenario):
    name, truth, result = scenario
    slack = pd.Timedelta(seconds=SCENARIO_RUNS[name][1])
    found = result.episodes
    assert truth["episodes"]
    for planted in truth["episodes"]:
        members = ";".join(sorted(planted["members"]))
        start, end = pd.Timestamp(planted["start"]), pd.Timestamp(planted["end"])
        same = found[found["members"] == members]
        # A maximal episode covers the planted stage; it may run on past the stage when the
        # same members stay grouped inside a larger group (the herd's core while the
        # yearlings rejoin). That the planted splits happen is checked below.
        covers = (same["start"] <= start + slack) & (same["end"] >= end - slack)
        assert covers.any(), f"{name}: planted {members} {start}..{end} not found"


def test_planted_separations_are_respected(scenario):
    # two planted episodes at the same time with no member in common: no episode found
    # then may hold members of both
    name, truth, result = scenario
    found = result.episodes
    planted = [
        (set(p["members"]), pd.Timestamp(p["start"]), pd.Timestamp(p["end"]))
        for p in truth["episodes"]
    ]
    checked = 0
    for i, (m1, s1, e1) in enumerate(planted):
        for m2, s2, e2 in planted[i + 1 :]:
            lo, hi = max(s1, s2), min(e1, e2)
            if m1 & m2 or lo >= hi:
                continue
            mid = lo + (hi - lo) / 2
            active = found[(found["start"] <= mid) & (found["end"] >= mid)]
            for members in active["members"].map(lambda m: set(m.split(";"))):
                assert not (members & m1 and members & m2), (name, sorted(members), mid)
            checked += 1
    assert checked > 0


def test_crossing_decoys_are_not_reported(scenario):
    name, truth, _ = scenario
    if not truth["decoys"]:
        pytest.skip("no decoys planted in this scenario")
    # no minimum duration, so a moment of closeness would count if it were linked
    _, strict = run_scenario(name, min_together_time=0.0, tolerance=0.0)
    _, strict_moment = run_scenario(name, min_together_time=0.0, tolerance=0.0, links="snapshot")
    _, loose = run_scenario(
        name, min_together_time=0.0, tolerance=0.0, max_heading=None, max_speed_ratio=None,
        links="snapshot",
    )  # fmt: skip
    for decoy in truth["decoys"]:
        pair = set(decoy["members"])
        t = pd.Timestamp(decoy["time"])

        def covering(table, pair=pair, t=t):
            return table[
                table["members"].map(lambda m: pair <= set(m.split(";")))
                & (table["start"] <= t)
                & (table["end"] >= t)
            ]

        assert covering(strict.episodes).empty, decoy  # pair evidence: a moment is not enough
        assert covering(strict_moment.episodes).empty, decoy
        # judged on the moment alone, the heading predicate is what keeps the decoy out
        assert not covering(loose.episodes).empty, decoy


def test_outputs_have_the_documented_columns(scenario):
    _, _, result = scenario
    assert list(result.episodes.columns[:7]) == [
        "episode",
        "start",
        "end",
        "duration_s",
        "size",
        "members",
        "roles",
    ]
    assert {"mean_spacing_m", "max_spacing_m", "moving_share"} <= set(result.episodes.columns)
    assert len(result.paths) == len(result.episodes)
    assert result.paths.geometry.geom_type.eq("LineString").all()
    assert set(result.roles.columns) >= {"roles", "episodes", "total_s", "longest_s"}


def test_groups_equals_its_stages_run_one_after_another():
    # the pipeline overlaps the dyads with the episode search in a helper thread and
    # searches neighbours in several threads: the same tables as plain sequential calls
    truth, result = run_scenario("small_sided_game", replicates=0, jobs=2)
    snaps = result.snapshots
    options = dict(preset_values("team-sport"), radius=truth["parameters"]["radius"])
    grouping, episode_params = split_options(GROUP_STAGES, options)[3:5]
    pairs = neighbour_pairs(snaps, grouping.radius)
    motion = entry_motion(snaps, grouping.velocity_window)
    assert grouping.links == "evidence"
    links = evidence_links(snaps, pairs, motion, grouping)
    found = find_episodes(GroupTimeline.of(snaps, snapshot_groups(snaps, links, grouping)),
                          episode_params)  # fmt: skip
    table, _ = episode_table(snaps, found, motion, grouping.min_speed)
    assert len(table) > 0
    pd.testing.assert_frame_equal(result.episodes, table)
    pd.testing.assert_frame_equal(result.dyads, dyad_table(snaps, pairs))


def test_lonlat_input_gives_lonlat_paths():
    _, result = run_scenario("fleet")
    assert result.paths.crs.to_epsg() == 4326
    bounds = result.paths.total_bounds
    assert -180 <= bounds[0] <= bounds[2] <= 180 and -90 <= bounds[1] <= bounds[3] <= 90
    tc = result.to_trajectories()
    assert len(tc.trajectories) == len(result.episodes)


def walk_scene(x, y, n_obj, present=None):
    n = x.shape[0]
    present = np.ones((n, n_obj), bool) if present is None else present
    return grid_scene(x, y, np.zeros((n, n_obj), int), present, 1)


def episodes_of(snaps, radius=1.5, **kw):
    gp = GroupParams(radius=radius, max_heading=None, max_speed_ratio=None)
    motion = entry_motion(snaps)
    groups_ = snapshot_groups(snaps, linked_pairs(neighbour_pairs(snaps, radius), motion, gp), gp)
    found = find_episodes(GroupTimeline.of(snaps, groups_), EpisodeParams(**kw))
    table, _ = episode_table(snaps, found, motion, gp.min_speed)
    return found, table


def test_split_and_merge_are_recorded():
    # 0,1,2 together from t=0; 2 leaves at t=10; 3 joins 0,1 at t=15; all walk along x
    t = np.arange(20.0)
    x = np.column_stack([t] * 4)
    y = np.column_stack(
        [
            np.zeros(20),
            np.full(20, 0.5),
            np.where(t < 10, 1.0, 30.0),
            np.where(t >= 15, -0.5, -40.0),
        ]
    )
    _, table = episodes_of(walk_scene(x, y, 4))
    rows = {r.members: r for r in table.itertuples()}
    assert set(rows) == {"obj00;obj01;obj02", "obj00;obj01", "obj00;obj01;obj03"}
    trio, pair, late = rows["obj00;obj01;obj02"], rows["obj00;obj01"], rows["obj00;obj01;obj03"]
    assert pair.duration_s == 20.0
    assert (trio.start.timestamp(), trio.end.timestamp()) == (0.0, 9.0)
    assert (late.start.timestamp(), late.end.timestamp()) == (15.0, 19.0)
    assert trio.went_into == pair.episode
    assert late.came_from == pair.episode
    assert trio.mean_spacing_m == pytest.approx((0.5 + 1.0 + 0.5) / 3)
    rollup = role_rollup(table)
    assert rollup["episodes"].sum() == 3


def test_tolerance_bridges_short_separations_only():
    t = np.arange(30.0)
    apart = (t >= 10) & (t < 13)  # three snapshots apart
    x = np.column_stack([t, t])
    y = np.column_stack([np.zeros(30), np.where(apart, 20.0, 0.5)])
    snaps = walk_scene(x, y, 2)
    assert len(episodes_of(snaps, tolerance=3.0)[1]) == 1
    assert len(episodes_of(snaps, tolerance=2.0)[1]) == 2
    assert len(episodes_of(snaps, tolerance=2.0, min_together_time=11.0)[1]) == 1  # 17 s kept


def test_min_size_and_min_duration():
    t = np.arange(10.0)
    x = np.column_stack([t, t, t])
    y = np.column_stack([np.zeros(10), np.full(10, 0.5), np.where(t < 4, 1.0, 50.0)])
    snaps = walk_scene(x, y, 3)
    _, table = episodes_of(snaps, min_size=3)
    assert table["members"].tolist() == ["obj00;obj01;obj02"]
    assert table["duration_s"].tolist() == [4.0]
    assert episodes_of(snaps, min_size=3, min_together_time=5.0)[1].empty


scenes = st.builds(
    lambda seed, n_obj, n_snap: (np.random.default_rng(seed), n_obj, n_snap),
    st.integers(0, 10_000),
    st.integers(2, 7),
    st.integers(2, 25),
)


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scene=scenes, tol=st.integers(0, 3), shift=st.integers(-1000, 1000))
def test_episodes_are_maximal_and_invariant(scene, tol, shift):
    rng, n_obj, n_snap = scene
    x, y, present = random_walkers(rng, n_obj, n_snap)
    snaps = walk_scene(x, y, n_obj, present)
    found, _ = episodes_of(snaps, radius=1.5, tolerance=float(tol))
    keys = [
        (frozenset(m.tolist()), int(s), int(e))
        for m, s, e in zip(found.members, found.start, found.end, strict=True)
    ]
    for a, (ma, sa, ea) in enumerate(keys):
        for b, (mb, sb, eb) in enumerate(keys):
            if a != b:
                assert not (ma <= mb and sb <= sa and ea <= eb), "an episode is contained"
    # relabel the objects and translate the scene: the same episodes, by original column
    # (an object's code is its column in the arrays given to grid_scene)
    perm = rng.permutation(n_obj)
    moved = walk_scene(x[:, perm] + shift, y[:, perm] - shift, n_obj, present[:, perm])
    found2, _ = episodes_of(moved, radius=1.5, tolerance=float(tol))
    original = {
        (frozenset(m.tolist()), int(s), int(e))
        for m, s, e in zip(found.members, found.start, found.end, strict=True)
    }
    relabelled = {
        (frozenset(perm[m].tolist()), int(s), int(e))
        for m, s, e in zip(found2.members, found2.start, found2.end, strict=True)
    }
    assert relabelled == original


def found_set(found):
    return {
        (frozenset(m.tolist()), int(s), int(e), int(c))
        for m, s, e, c in zip(found.members, found.start, found.end, found.together, strict=True)
    }


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    scene=scenes,
    tol=st.integers(0, 3),
    min_snaps=st.integers(1, 4),
    min_size=st.integers(2, 3),
    mode=st.sampled_from(["component", "clique", "dbscan"]),
    p_present=st.sampled_from([1.0, 0.8, 0.6]),
)
def test_episodes_equal_a_brute_force_search_of_the_definition(
    scene, tol, min_snaps, min_size, mode, p_present
):
    # every set of objects tried on its own, snapshot by snapshot (tests/scenes.py), with
    # missing data, in every group mode: the same episodes, spans and times together
    rng, n_obj, n_snap = scene
    x, y, present = random_walkers(rng, n_obj, n_snap)
    present = rng.random((n_snap, n_obj)) < p_present
    present[0] = True  # every object exists
    snaps = walk_scene(x, y, n_obj, present)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None, mode=mode,
                     min_members=3 if mode == "dbscan" else 2)  # fmt: skip
    groups_ = snapshot_groups(snaps, linked_pairs(neighbour_pairs(snaps, 1.5),
                                                  entry_motion(snaps), gp), gp)  # fmt: skip
    params = EpisodeParams(min_size=min_size, min_together_time=float(min_snaps),
                           tolerance=float(tol))  # fmt: skip
    found = find_episodes(GroupTimeline.of(snaps, groups_), params)
    assert found_set(found) == brute_force_episodes(snaps, groups_, min_size, min_snaps, tol)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scene=scenes, tol=st.integers(0, 3), p_present=st.sampled_from([1.0, 0.7]))
def test_memory_bounds_of_the_search_do_not_change_its_episodes(scene, tol, p_present):
    # the search drops dominated candidates when many are live, forgets old "together"
    # answers when many are kept, and looks groups up by member when a span has many:
    # with all of them always on, the episodes are the brute-force search's, as with
    # the defaults
    import comove.groups.episodes as ep

    rng, n_obj, n_snap = scene
    x, y, _ = random_walkers(rng, n_obj, n_snap)
    present = rng.random((n_snap, n_obj)) < p_present
    present[0] = True
    snaps = walk_scene(x, y, n_obj, present)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    groups_ = snapshot_groups(snaps, linked_pairs(neighbour_pairs(snaps, 1.5),
                                                  entry_motion(snaps), gp), gp)  # fmt: skip
    params = EpisodeParams(min_together_time=2.0, tolerance=float(tol))
    names = ("PRUNE_ABOVE", "PRUNE_GROWTH", "FORGET_ABOVE", "INDEX_GROUPS_ABOVE", "OWNER_SPANS")
    old = {name: getattr(ep, name) for name in names}
    # pruning at every span; also the object -> group index always on, with the fewest
    # spans kept
    for name, value in zip(names, (0, 0, 0, 0, 1), strict=True):
        setattr(ep, name, value)
    try:
        found = find_episodes(GroupTimeline.of(snaps, groups_), params)
    finally:
        for name, value in old.items():
            setattr(ep, name, value)
    assert found_set(found) == brute_force_episodes(snaps, groups_, 2, 2, tol)


def test_time_apart_does_not_count_towards_the_minimum_duration():
    # together 3 s, apart 2 s (tolerated), together 3 s: an 8 s episode, 6 s together
    t = np.arange(8.0)
    apart = (t >= 3) & (t < 5)
    x = np.column_stack([t, t])
    y = np.column_stack([np.zeros(8), np.where(apart, 20.0, 0.5)])
    snaps = walk_scene(x, y, 2)
    _, table = episodes_of(snaps, tolerance=2.0, min_together_time=6.0)
    assert table[["duration_s", "together_s"]].values.tolist() == [[8.0, 6.0]]
    assert episodes_of(snaps, tolerance=2.0, min_together_time=7.0)[1].empty  # the span is 8 s


def test_a_missing_member_is_excused_while_briefly_missing():
    # 0, 1 and 2 walk together; 2 has no data at t = 4, 5 (a missed fix), then is back
    t = np.arange(10.0)
    x = np.column_stack([t, t, t])
    y = np.column_stack([np.zeros(10), np.full(10, 0.5), np.ones(10)])
    present = np.ones((10, 3), dtype=bool)
    present[4:6, 2] = False
    snaps = walk_scene(x, y, 3, present)
    # its absence is not separation: one trio episode, all 10 s together
    assert found_set(episodes_of(snaps, tolerance=2.0)[0]) == {(frozenset({0, 1, 2}), 0, 9, 10)}
    # with no tolerance it is: two trio episodes, and the pair that walked on throughout
    assert found_set(episodes_of(snaps, tolerance=0.0)[0]) == {
        (frozenset({0, 1, 2}), 0, 3, 4),
        (frozenset({0, 1, 2}), 6, 9, 4),
        (frozenset({0, 1}), 0, 9, 10),
    }
    # 2 walks away when it is back: the trio ends at its last fix, the pair goes on
    y[6:, 2] = 40.0
    assert found_set(episodes_of(walk_scene(x, y, 3, present), tolerance=2.0)[0]) == {
        (frozenset({0, 1, 2}), 0, 3, 4),
        (frozenset({0, 1}), 0, 9, 10),
    }


def test_a_part_keeps_its_missing_members():
    # {0, 1, 3} is together at t = 0 (inside {0, 1, 2, 3}), at 1 (0 missing, excused),
    # apart at 2 (0 is with 2 instead), together at 3 (3 missing since 1, excused) and
    # at 5: one episode over 0..5 with 4 s together, though no group ever held all three
    # between 0 and 5 and the set {0, 1, 3} is never a group's intersection with another
    far = 100.0
    x = np.array([
        [0, 1, 2, 3],
        [far, 0, 2 * far, 1],
        [0, far, 1, 3 * far],
        [0, 1, 2 * far, 3 * far],
        [far, 0, 1, 2],
        [0, 1, 2 * far, 2],
    ], dtype=float)  # fmt: skip
    y = np.zeros_like(x)
    present = np.ones((6, 4), dtype=bool)
    present[1, 0] = present[2, 3] = present[3, 3] = False
    snaps = walk_scene(x, y, 4, present)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    groups_ = snapshot_groups(snaps, linked_pairs(neighbour_pairs(snaps, 1.5),
                                                  entry_motion(snaps), gp), gp)  # fmt: skip
    params = EpisodeParams(min_together_time=4.0, tolerance=2.0)
    found = found_set(find_episodes(GroupTimeline.of(snaps, groups_), params))
    assert (frozenset({0, 1, 3}), 0, 5, 4) in found
    assert found == brute_force_episodes(snaps, groups_, 2, 4, 2)


def test_many_objects_give_the_same_episodes():
    # past 63 objects member sets no longer fit one machine word: the same episodes
    # when 70 far-away bystanders are added in front of the walkers
    rng = np.random.default_rng(3)
    x, y, present = random_walkers(rng, 5, 30)
    present = rng.random((30, 5)) < 0.8
    present[0] = True
    snaps = walk_scene(x, y, 5, present)
    found, _ = episodes_of(snaps, radius=1.5, tolerance=2.0, min_together_time=2.0)
    n_far = 70
    far_x = np.tile(1000.0 * np.arange(1, n_far + 1), (30, 1))
    wide = walk_scene(np.hstack([far_x, x]), np.hstack([far_x, y]), n_far + 5,
                      np.hstack([np.ones((30, n_far), bool), present]))  # fmt: skip
    found_wide, _ = episodes_of(wide, radius=1.5, tolerance=2.0, min_together_time=2.0)
    shifted = {(frozenset(m + n_far for m in ms), s, e, c) for ms, s, e, c in found_set(found)}
    assert found.n_episodes > 0 and found_set(found_wide) == shifted


def test_bad_episode_settings():
    with pytest.raises(InputError, match="^min_size"):
        EpisodeParams(min_size=1)
    with pytest.raises(InputError, match="^tolerance"):
        EpisodeParams(tolerance=-1)


def table_one_by_one(snaps, found, motion, min_speed):
    """The episode statistics from their definitions, one episode and snapshot at a time."""
    at = {(int(s), int(o)): e for e, (s, o) in enumerate(zip(snaps.snap, snaps.obj, strict=True))}
    rows = []
    for members, start, end in zip(found.members, found.start, found.end, strict=True):
        spacings, largest, moving, observed, roles = [], np.nan, 0, 0, set()
        for s in range(int(start), int(end) + 1):
            here = [at[(s, int(m))] for m in members if (s, int(m)) in at]
            roles |= {str(snaps.roles[snaps.role[e]]) for e in here}
            if not here:
                continue
            observed += 1
            moving += 2 * sum(motion.speed[e] > min_speed for e in here) > len(here)
            d = [np.hypot(snaps.x[a] - snaps.x[b], snaps.y[a] - snaps.y[b])
                 for i, a in enumerate(here) for b in here[i + 1 :]]  # fmt: skip
            if d:
                spacings.append(np.mean(d))
                largest = max(np.nan_to_num(largest), max(d))
        rows.append((";".join(sorted(roles)), np.mean(spacings) if spacings else np.nan, largest,
                     moving / observed if observed else np.nan))  # fmt: skip
    return pd.DataFrame(rows, columns=["roles", "mean_spacing_m", "max_spacing_m", "moving_share"])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    scene=scenes, tol=st.integers(0, 3), dense=st.booleans(), block=st.sampled_from([1, 7, 10**6])
)
def test_episode_table_equals_a_per_snapshot_computation(scene, tol, dense, block):
    # whole-array over all episodes, by size and in blocks of rows, with the dense or the
    # sorted entry lookup: the same statistics as a plain loop over the definitions,
    # with missing members, roles that change, and tolerated gaps without any data
    import comove.groups.summary as ep

    rng, n_obj, n_snap = scene
    x, y, present = random_walkers(rng, n_obj, n_snap)
    present[0] = True
    role = rng.integers(0, 3, size=(n_snap, n_obj))
    snaps = grid_scene(x, y, role, present, 3)
    gp = GroupParams(radius=1.5, max_heading=None, max_speed_ratio=None)
    motion = entry_motion(snaps)
    groups_ = snapshot_groups(snaps, linked_pairs(neighbour_pairs(snaps, 1.5), motion, gp), gp)
    found = find_episodes(GroupTimeline.of(snaps, groups_), EpisodeParams(tolerance=float(tol)))
    old = (ep._EntryLookup.MAX_DENSE, ep.TABLE_BLOCK)
    ep._EntryLookup.MAX_DENSE, ep.TABLE_BLOCK = (10**9 if dense else 0), block
    try:
        table, paths = episode_table(snaps, found, motion, gp.min_speed)
    finally:
        ep._EntryLookup.MAX_DENSE, ep.TABLE_BLOCK = old
    expected = table_one_by_one(snaps, found, motion, gp.min_speed)
    pd.testing.assert_frame_equal(table[expected.columns], expected, check_dtype=False)
    assert len(paths) == len(table)
    for path, start, end in zip(paths, found.start, found.end, strict=True):
        assert np.all(np.diff(path[:, 0]) > 0)
        assert snaps.times(np.array([start]))[0] <= path[0, 0] <= path[-1, 0]
        assert path[-1, 0] <= snaps.times(np.array([end]))[0]


def test_a_scene_without_episodes_gives_an_empty_table_of_the_same_types():
    t = np.arange(6.0)
    together = walk_scene(np.column_stack([t, t]), np.column_stack([t * 0, t * 0 + 0.5]), 2)
    apart = walk_scene(np.column_stack([t, t]), np.column_stack([t * 0, t * 0 + 50.0]), 2)
    _, full = episodes_of(together)
    found, empty = episodes_of(apart)
    assert len(full) == 1 and found.n_episodes == 0 and empty.empty
    assert list(empty.columns) == list(full.columns)
    assert empty.dtypes.to_dict() == full.dtypes.to_dict()
