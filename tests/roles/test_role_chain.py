"""The role chain over time chunks: chunk tallies combine into exactly the whole run's."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import gap_midpoints, grid_scene, random_scene

from comove.io.scenarios import mine_options, scenario_names
from comove.pipeline.core import mine
from comove.roles.chain import combine_role_tallies, prune_levels, role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.persistence import PersistenceParams, durable_patterns


def chunked(snaps, colocation, size=None, cuts=None):
    """Return the combined tally of ``snaps`` mined chunk by chunk."""
    if cuts is None:
        cuts = list(range(size, snaps.n_snapshots, size))
    edges = [0, *cuts, snaps.n_snapshots]
    spans = zip(edges[:-1], edges[1:], strict=True)
    parts = [role_chain(snaps.window(a, b), colocation) for a, b in spans]
    return combine_role_tallies(parts)


def assert_same_levels(a, b):
    sizes_a = [lv for lv in a.levels if lv.roles.shape[0]]
    sizes_b = [lv for lv in b.levels if lv.roles.shape[0]]
    assert len(sizes_a) == len(sizes_b)
    for la, lb in zip(sizes_a, sizes_b, strict=True):
        for name in ("roles", "present", "prevalent", "set_id", "snap", "pi", "pr"):
            np.testing.assert_array_equal(getattr(la, name), getattr(lb, name), err_msg=name)


@pytest.fixture(scope="module", params=scenario_names())
def scenario(request):
    source, options = mine_options(request.param)
    names = ("radius", "min_participation", "max_size")
    colocation = ColocationParams(**{k: options[k] for k in names if k in options})
    persistence = PersistenceParams(
        **{k: options[k] for k in ("min_prevalence", "min_prevalent_time") if k in options}
    )
    snaps = mine(source, replicates=0, **options).snapshots
    return snaps, colocation, persistence


@pytest.mark.parametrize("fraction", [0.02, 0.3, 0.5])
def test_chunked_tally_equals_the_whole_on_every_scenario(scenario, fraction):
    snaps, colocation, persistence = scenario
    size = max(1, int(snaps.n_snapshots * fraction))
    whole = role_chain(snaps, colocation)
    combined = chunked(snaps, colocation, size=size)
    assert combined.n_snapshots == whole.n_snapshots
    assert_same_levels(combined, whole)
    assert_same_levels(chunked(snaps, colocation, cuts=gap_midpoints(snaps, most=20)), whole)
    # and after the whole run's pruning bound, the tables a user sees are the same
    bound = persistence.min_prevalent_snapshots(snaps.step_s)
    fast = role_chain(snaps, colocation, min_prevalent_snapshots=bound)
    assert_same_levels(prune_levels(combined, bound), fast)
    mined = durable_patterns(fast, persistence, colocation.min_participation)
    again = durable_patterns(prune_levels(combined, bound), persistence,
                             colocation.min_participation)  # fmt: skip
    assert len(mined.patterns) > 0
    pd.testing.assert_frame_equal(mined.patterns, again.patterns)
    pd.testing.assert_frame_equal(mined.participation, again.participation)
    pd.testing.assert_frame_equal(mined.series, again.series)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), data=st.data())
def test_any_cut_of_a_random_scene_combines_exactly(seed, data):
    x, y, role, present, n_roles = random_scene(seed, n_snap=30, n_roles=4, side=8.0)
    snaps = grid_scene(x, y, role, present, n_roles)
    cuts = sorted(set(data.draw(st.lists(st.integers(1, snaps.n_snapshots - 1), max_size=6))))
    colocation = ColocationParams(radius=3.0, min_participation=0.4, max_size=4)
    whole = role_chain(snaps, colocation)
    combined = chunked(snaps, colocation, cuts=cuts)
    assert_same_levels(combined, whole)
    bound = data.draw(st.integers(1, 8))
    pruned = role_chain(snaps, colocation, min_prevalent_snapshots=bound)
    assert_same_levels(prune_levels(combined, bound), pruned)


def test_a_chunk_keeps_its_place_in_time():
    x, y, role, present, n_roles = random_scene(5, n_snap=20, n_roles=3)
    snaps = grid_scene(x, y, role, present, n_roles)
    chunk = snaps.window(7, 12)
    assert chunk.n_snapshots == 5
    np.testing.assert_array_equal(chunk.times(), snaps.times()[7:12])
    inside = (snaps.snap >= 7) & (snaps.snap < 12)
    np.testing.assert_array_equal(chunk.obj, snaps.obj[inside])
    np.testing.assert_array_equal(chunk.snap + 7, snaps.snap[inside])


def test_only_consecutive_unpruned_tallies_combine():
    x, y, role, present, n_roles = random_scene(6, n_snap=20, n_roles=3)
    snaps = grid_scene(x, y, role, present, n_roles)
    colocation = ColocationParams(radius=3.0)
    a, b = role_chain(snaps.window(0, 10), colocation), role_chain(snaps.window(11, 20), colocation)
    with pytest.raises(ValueError, match="consecutive"):
        combine_role_tallies([a, b])
    pruned = role_chain(snaps.window(10, 20), colocation, min_prevalent_snapshots=2)
    with pytest.raises(ValueError, match="unpruned"):
        combine_role_tallies([a, pruned])
