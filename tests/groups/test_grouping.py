"""Per-snapshot links and groups against scikit-learn, scipy and networkx."""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np
import pytest
from scenes import grid_scene
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from sklearn.cluster import DBSCAN

from comove.errors import InputError
from comove.groups.grouping import GroupParams, linked_pairs, snapshot_groups
from comove.tracks.motion import entry_motion
from comove.tracks.neighbours import neighbour_pairs


def scene(seed, n_snap=12, n_obj=14, side=14.0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, side, (n_snap, n_obj))
    y = rng.uniform(0, side, (n_snap, n_obj))
    present = rng.random((n_snap, n_obj)) < 0.9
    return grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)


def groups_by_snapshot(snaps, groups):
    out = {}
    for g in range(groups.n_groups):
        members = groups.entries[groups.offsets[g] : groups.offsets[g + 1]]
        out.setdefault(int(groups.snap[g]), set()).add(frozenset(members.tolist()))
    return out


def no_motion_params(radius, **kw):
    return GroupParams(radius=radius, max_heading=None, max_speed_ratio=None, **kw)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("min_members", [2, 3, 4])
def test_dbscan_groups_equal_scikit_learn_dbscan(seed, min_members):
    # reference: sklearn.cluster.DBSCAN(eps=radius, min_samples=min_members) per snapshot
    snaps = scene(seed)
    radius = 3.0
    params = no_motion_params(radius, mode="dbscan", min_members=min_members)
    links = neighbour_pairs(snaps, radius)
    ours = groups_by_snapshot(snaps, snapshot_groups(snaps, links, params))
    offsets = snaps.offsets()
    for s in range(snaps.n_snapshots):
        lo, hi = offsets[s], offsets[s + 1]
        pts = np.column_stack([snaps.x[lo:hi], snaps.y[lo:hi]])
        model = DBSCAN(eps=radius, min_samples=min_members).fit(pts)
        core = np.zeros(hi - lo, bool)
        core[model.core_sample_indices_] = True
        expected = {}
        for k in set(model.labels_.tolist()) - {-1}:
            expected[k] = set((np.flatnonzero(model.labels_ == k) + lo).tolist())
        got = ours.get(s, set())
        # cores partition identically; a border point may sit in any cluster it reaches,
        # so compare each cluster's cores and the set of clustered points
        exp_cores = {frozenset(m for m in v if core[m - lo]) for v in expected.values()}
        got_cores = {frozenset(m for m in g if core[m - lo]) for g in got}
        assert got_cores == {c for c in exp_cores if len(c) + 0 >= 1} or not expected
        clustered = set().union(*expected.values()) if expected else set()
        got_clustered = set().union(*got) if got else set()
        # sklearn keeps single-member clusters only when min_samples == 1; none here
        assert got_clustered == clustered


@pytest.mark.parametrize("seed", range(4))
def test_components_equal_scipy_connected_components(seed):
    # reference: scipy.sparse.csgraph.connected_components on each snapshot's distance graph
    snaps = scene(seed)
    radius = 2.5
    links = neighbour_pairs(snaps, radius)
    ours = groups_by_snapshot(snaps, snapshot_groups(snaps, links, no_motion_params(radius)))
    offsets = snaps.offsets()
    for s in range(snaps.n_snapshots):
        lo, hi = offsets[s], offsets[s + 1]
        pts = np.column_stack([snaps.x[lo:hi], snaps.y[lo:hi]])
        d = np.hypot(*(pts[:, None, :] - pts[None, :, :]).transpose(2, 0, 1))
        a, b = np.nonzero(np.triu(d <= radius, 1))
        graph = coo_matrix((np.ones(a.size), (a, b)), shape=(hi - lo, hi - lo))
        _, lab = connected_components(graph, directed=False)
        expected = {frozenset((np.flatnonzero(lab == k) + lo).tolist()) for k in set(lab)}
        expected = {g for g in expected if len(g) >= 2}
        assert ours.get(s, set()) == expected


@pytest.mark.parametrize("seed", range(4))
def test_cliques_equal_networkx_find_cliques(seed):
    # reference: networkx.find_cliques (maximal cliques) on each snapshot's distance graph
    snaps = scene(seed, side=10.0)
    radius = 3.5
    links = neighbour_pairs(snaps, radius)
    groups = snapshot_groups(snaps, links, no_motion_params(radius, mode="clique"))
    ours = groups_by_snapshot(snaps, groups)
    offsets = snaps.offsets()
    found_open = False
    for s in range(snaps.n_snapshots):
        idx = range(offsets[s], offsets[s + 1])
        g = nx.Graph()
        g.add_nodes_from(idx)
        for a, b in itertools.combinations(idx, 2):
            if np.hypot(snaps.x[a] - snaps.x[b], snaps.y[a] - snaps.y[b]) <= radius:
                g.add_edge(a, b)
        expected = {frozenset(c) for c in nx.find_cliques(g) if len(c) >= 2}
        found_open |= any(len(c) >= 2 for c in expected) and nx.number_connected_components(
            g
        ) < len(expected)
        assert ours.get(s, set()) == expected
    assert found_open  # the scenes do contain components that are not cliques


def test_motion_predicates_drop_crossing_paths():
    # two objects cross head-on at t=5; two others walk side by side
    t = np.arange(11, dtype=float)
    x = np.column_stack([t, 10 - t, t, t])
    y = np.column_stack([np.zeros(11), np.full(11, 0.5), np.full(11, 20), np.full(11, 21)])
    snaps = grid_scene(x, y, np.zeros((11, 4), int), np.ones((11, 4), bool), 1)
    pairs = neighbour_pairs(snaps, 2.0)
    motion = entry_motion(snaps, window_s=2.0)
    np.testing.assert_allclose(motion.speed, 1.0)
    linked = linked_pairs(pairs, motion, GroupParams(radius=2.0))
    objs = {(int(snaps.obj[a]), int(snaps.obj[b])) for a, b in zip(linked.i, linked.j, strict=True)}
    assert objs == {(2, 3)}
    assert {
        (int(snaps.obj[a]), int(snaps.obj[b])) for a, b in zip(pairs.i, pairs.j, strict=True)
    } >= {(0, 1)}
    # switched off, the crossing pair links again
    off = linked_pairs(pairs, motion, GroupParams(radius=2.0, max_heading=None))
    assert off.n_pairs == pairs.n_pairs


def test_speed_ratio_predicate():
    t = np.arange(11, dtype=float)
    x = np.column_stack([t, 3 * t])
    y = np.column_stack([np.zeros(11), np.full(11, 0.5)])
    snaps = grid_scene(x, y, np.zeros((11, 2), int), np.ones((11, 2), bool), 1)
    pairs = neighbour_pairs(snaps, 100.0)
    motion = entry_motion(snaps)
    assert linked_pairs(pairs, motion, GroupParams(radius=100.0)).n_pairs == 0
    assert (
        linked_pairs(pairs, motion, GroupParams(radius=100.0, max_speed_ratio=3.0)).n_pairs
        == pairs.n_pairs
    )


def test_bad_group_settings():
    with pytest.raises(InputError, match="^mode"):
        GroupParams(radius=1, mode="blob")
    with pytest.raises(InputError, match="^max_heading"):
        GroupParams(radius=1, max_heading=200)
    with pytest.raises(InputError, match="^min_members"):
        GroupParams(radius=1, min_members=1)


@pytest.mark.parametrize("workers", [1, 3])
def test_velocity_equals_windowed_differences_clipped_to_presence_runs(workers):
    # reference: a direct loop per object and snapshot over the same definition; the
    # objects shared out among threads or not
    rng = np.random.default_rng(8)
    n_snap, n_obj = 40, 4
    x = np.cumsum(rng.normal(0, 1, (n_snap, n_obj)), axis=0)
    y = np.cumsum(rng.normal(0, 1, (n_snap, n_obj)), axis=0)
    present = rng.random((n_snap, n_obj)) < 0.85
    snaps = grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)
    motion = entry_motion(snaps, window_s=4.0, workers=workers)  # half-window: 2 snapshots
    for e in range(snaps.n_entries):
        o, t = snaps.obj[e], snaps.snap[e]
        lo = t
        while lo - 1 >= max(t - 2, 0) and present[lo - 1, o]:
            lo -= 1
        hi = t
        while hi + 1 <= min(t + 2, n_snap - 1) and present[hi + 1, o]:
            hi += 1
        if hi == lo:
            assert np.isnan(motion.vx[e])
        else:
            assert motion.vx[e] == pytest.approx((x[hi, o] - x[lo, o]) / (hi - lo))
            assert motion.vy[e] == pytest.approx((y[hi, o] - y[lo, o]) / (hi - lo))


def test_every_preset_value_says_where_it_comes_from():
    from pathlib import Path

    from comove.groups.presets import PRESETS

    table = (Path(__file__).resolve().parents[2] / "docs" / "groups.md").read_text()
    header = next(line for line in table.splitlines() if line.startswith("| option |"))
    for preset in PRESETS.values():
        assert set(preset.values) <= set(preset.why), (
            preset.name,
            set(preset.values) - set(preset.why),
        )
        assert preset.subject in ("people", "vehicles", "animals"), preset.name
        GroupParams(
            **{k: v for k, v in preset.values.items() if k in GroupParams.__dataclass_fields__}
        )
        assert f"| {preset.name} |" in header, preset.name  # a column of the docs' table
