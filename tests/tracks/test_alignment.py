"""Alignment onto the common time grid."""

from __future__ import annotations

import warnings
from collections import Counter

import numpy as np
import pytest
from scenes import NS, grid_scene, make_fixes

from comove.errors import InputError
from comove.tracks.alignment import AlignParams, Snapshots, align, default_step


def irregular_tracks(seed: int, n_obj: int = 5):
    rng = np.random.default_rng(seed)
    obj, t, x, y, role = [], [], [], [], []
    for o in range(n_obj):
        n = int(rng.integers(5, 60))
        gaps = rng.choice([0.7, 1.3, 2.1, 9.0], size=n, p=[0.4, 0.35, 0.2, 0.05])
        times = 1_700_000_000 + rng.uniform(0, 3) + np.cumsum(gaps)
        obj += [o] * n
        t += list(times)
        x += list(np.cumsum(rng.normal(0, 1, n)))
        y += list(np.cumsum(rng.normal(0, 1, n)))
        role += list(rng.integers(0, 3, n))
    return make_fixes(obj, t, x, y, role, n_roles=3)


@pytest.mark.parametrize("seed", range(5))
def test_positions_equal_numpy_interp_and_gaps_stay_empty(seed):
    # reference: numpy.interp on each track, grid points inside over-long gaps masked out
    fixes = irregular_tracks(seed)
    step, max_gap = 0.5, 3.0
    snaps = align(fixes, AlignParams(step=step, max_gap=max_gap))
    times = snaps.times()
    for o in range(len(fixes.objects)):
        sel = fixes.obj == o
        t, x, y = fixes.time[sel], fixes.x[sel], fixes.y[sel]
        grid = times[(times >= t[0]) & (times <= t[-1])]
        k = np.searchsorted(t, grid, side="right") - 1  # last fix at or before
        k_next = np.minimum(k + 1, t.size - 1)
        on_fix = t[k] == grid
        bridged = (t[k_next] - t[k]) <= max_gap * NS
        keep = on_fix | bridged
        expect_t = grid[keep]
        got = snaps.obj == o
        np.testing.assert_array_equal(snaps.times(snaps.snap[got]), expect_t)
        np.testing.assert_allclose(snaps.x[got], np.interp(expect_t, t, x), atol=1e-9)
        np.testing.assert_allclose(snaps.y[got], np.interp(expect_t, t, y), atol=1e-9)
        # role of the latest fix at or before the snapshot
        np.testing.assert_array_equal(snaps.role[got], fixes.role[sel][k[keep]])


def test_grid_is_multiples_of_the_step_since_the_epoch():
    fixes = make_fixes(
        [0, 0, 1, 1], [10.3, 14.9, 11.0, 13.0], [0, 4.6, 0, 0], [0, 0, 0, 2], [0, 0, 1, 1]
    )
    snaps = align(fixes, AlignParams(step=1.0, max_gap=10.0))
    assert np.all(snaps.times() % NS == 0)
    t0 = snaps.times(snaps.snap[snaps.obj == 0]) / NS
    np.testing.assert_array_equal(t0, [11, 12, 13, 14])  # no extrapolation beyond 10.3..14.9
    np.testing.assert_allclose(snaps.x[snaps.obj == 0], [0.7, 1.7, 2.7, 3.7])
    t1 = snaps.times(snaps.snap[snaps.obj == 1]) / NS
    np.testing.assert_array_equal(t1, [11, 12, 13])  # fixes on the grid are kept exactly
    # entries sorted by snapshot then object
    assert np.all(np.diff(snaps.snap * 10 + snaps.obj) > 0)


def test_a_gap_longer_than_max_gap_is_not_bridged():
    fixes = make_fixes([0, 0, 0], [0, 1, 10], [0, 1, 10], [0, 0, 0], [0, 0, 0])
    snaps = align(fixes, AlignParams(step=1.0, max_gap=2.0))
    np.testing.assert_array_equal(snaps.times()[snaps.snap] / NS, [0, 1, 10])
    snaps = align(fixes, AlignParams(step=1.0, max_gap=9.0))
    assert snaps.n_entries == 11


def test_role_changes_at_the_fix_that_carries_it():
    fixes = make_fixes([0] * 4, [0, 2, 4, 6], [0] * 4, [0] * 4, [0, 0, 1, 1])
    snaps = align(fixes, AlignParams(step=1.0, max_gap=2.0))
    np.testing.assert_array_equal(snaps.role, [0, 0, 0, 0, 1, 1, 1])


@pytest.mark.parametrize(
    ("interval", "expected"), [(0.04, 0.04), (0.1, 0.1), (9.0, 10.0), (3500.0, 3600.0), (1.1, 1.0)]
)
def test_default_step_is_a_round_value_near_the_median_interval(interval, expected):
    t = np.arange(20) * interval
    fixes = make_fixes([0] * 20, t, np.zeros(20), np.zeros(20), np.zeros(20, int))
    assert default_step(fixes) == expected


def test_default_max_gap_is_three_steps():
    fixes = make_fixes([0] * 3, [0, 1, 4], [0, 1, 4], [0] * 3, [0] * 3)
    snaps = align(fixes, AlignParams(step=1.0))
    assert snaps.max_gap_ns == 3 * NS
    assert snaps.n_entries == 5  # 0, 1, 2, 3, 4 : the 3 s gap is bridged


def test_bad_step_is_an_input_error():
    with pytest.raises(InputError, match="--step"):
        AlignParams(step=-1)
    with pytest.raises(InputError, match="--max-gap"):
        AlignParams(max_gap=float("nan"))


def test_orders_are_computed_once_and_follow_new_arrays():
    snaps = align(irregular_tracks(3), AlignParams(step=0.5))
    order, offsets = snaps.object_order(), snaps.offsets()
    assert snaps.object_order() is order and snaps.offsets() is offsets
    assert not order.flags.writeable and not offsets.flags.writeable
    # the definitions: a stable sort by object; CSR bounds of each snapshot
    assert np.array_equal(order, np.lexsort((np.arange(snaps.n_entries), snaps.obj)))
    assert np.array_equal(np.diff(offsets), np.bincount(snaps.snap, minlength=snaps.n_snapshots))
    bounds = snaps.object_bounds()
    for o in range(len(snaps.objects)):  # each object's entries are one run of the order
        assert np.array_equal(order[bounds[o] : bounds[o + 1]], np.flatnonzero(snaps.obj == o))
    # an attribute given a new array is not answered from the old one
    snaps.obj = snaps.obj[::-1].copy()
    assert np.array_equal(snaps.object_order(), np.argsort(snaps.obj, kind="stable"))


def _entries(n_objects: int, n_roles: int, n_entries: int, seed: int) -> Snapshots:
    rng = np.random.default_rng(seed)
    obj = rng.integers(0, n_objects, n_entries).astype(np.int32)
    # few roles per object, so that counts tie now and then
    role = ((obj.astype(np.int64) * 7 + rng.integers(0, 3, n_entries)) % n_roles).astype(np.int32)
    return Snapshots(
        step_ns=NS,
        first_index=0,
        n_snapshots=n_entries,
        snap=np.arange(n_entries, dtype=np.int64),
        obj=obj,
        role=role,
        x=np.zeros(n_entries),
        y=np.zeros(n_entries),
        objects=np.array([f"o{i}" for i in range(n_objects)]),
        roles=np.array([f"r{i}" for i in range(n_roles)]),
        max_gap_ns=NS,
    )


def test_object_order_with_more_objects_than_16_bit_codes_hold():
    # below 2**15 objects the codes are sorted as 16-bit integers; beyond, as they are
    snaps = _entries(2**15 + 3, 2, 200_000, seed=4)
    order = snaps.object_order()
    # the definition: a stable sort by object
    assert np.array_equal(order, np.lexsort((np.arange(snaps.n_entries), snaps.obj)))


@pytest.mark.parametrize(
    ("n_objects", "n_roles"),
    # the second has more object x role cells than the 50 M of the dense count table
    [(60, 11), (10_001, 5_001)],
)
def test_main_role_is_the_most_frequent_lowest_on_ties(n_objects, n_roles):
    snaps = _entries(n_objects, n_roles, 5_000, seed=n_objects)
    counts: dict[int, Counter] = {}
    for o, r in zip(snaps.obj.tolist(), snaps.role.tolist(), strict=True):
        counts.setdefault(o, Counter())[r] += 1
    expected = np.zeros(n_objects, dtype=np.int64)  # objects without an entry: role 0
    for o, c in counts.items():
        best = max(c.values())
        expected[o] = min(r for r, k in c.items() if k == best)
    ties = sum(list(c.values()).count(max(c.values())) > 1 for c in counts.values())
    assert ties > 0  # the tie rule is exercised
    assert np.array_equal(snaps.main_roles(), expected)


def test_role_counts_dense_and_sorted_agree(monkeypatch):
    # the two ways of counting (object, role) entries: a dense bincount, or sorting codes
    from comove.tracks import alignment

    rng = np.random.default_rng(3)
    n_snap, n_obj = 30, 8
    snaps = grid_scene(rng.uniform(0, 9, (n_snap, n_obj)), rng.uniform(0, 9, (n_snap, n_obj)),
                       rng.integers(0, 4, (n_snap, n_obj)), rng.random((n_snap, n_obj)) < 0.8,
                       4)  # fmt: skip
    dense = snaps.role_counts()
    monkeypatch.setattr(alignment, "DENSE_ROLE_CELLS", 0)
    by_sorting = snaps.role_counts()
    for d, s in zip(dense, by_sorting, strict=True):
        np.testing.assert_array_equal(d, s)
    # reference: numpy.argmax of each object's role counts (first maximum)
    counts = np.zeros((n_obj, snaps.n_roles), int)
    np.add.at(counts, (snaps.obj, snaps.role), 1)
    np.testing.assert_array_equal(snaps.main_roles(), counts.argmax(axis=1))


# --------------------------------------------------------------------------- grid guards

DAY_NS = 86_400 * NS


def test_a_grid_beyond_memory_is_refused_naming_the_stray_fix():
    from comove.tracks.alignment import check_grid

    times = np.r_[0, 1_700_000_000 * NS + np.arange(100) * NS]  # one fix at the epoch
    with pytest.raises(InputError) as caught:
        check_grid(int(times.min()), int(times.max()), NS, 2, times, budget=2**30)
    message = str(caught.value)
    assert "1,700,000,100 snapshots" in message and "more than the 1 GiB" in message
    assert "1 fix at 1970-01-01T00:00:00Z lies 53.9 years before the other 100" in message
    assert "\n" not in message
    # within the budget: the snapshots are counted, nothing refused
    assert check_grid(int(times[1]), int(times[-1]), NS, 2, times[1:], budget=2**30) == 100


def test_fixes_after_the_rest_are_named_with_their_count():
    from comove.tracks.alignment import outlying_times

    times = np.r_[np.arange(50) * NS, 400 * DAY_NS + np.arange(3) * NS]
    advice = outlying_times(times)
    assert advice.startswith("3 fixes from 1971-02-05T00:00:00Z lie 400 days after the other 50")
    assert outlying_times(np.arange(50) * NS) == ""  # evenly spread: nothing to name
    # weighted: a time standing for many fixes
    assert outlying_times(np.array([0, 10 * DAY_NS]), np.array([5, 1])).startswith(
        "1 fix at 1970-01-11T00:00:00Z lies 10 days after the other 5"
    )


def test_a_nearly_empty_grid_gets_a_note():
    from comove.errors import ComoveNote
    from comove.tracks.alignment import SPARSE_GRID

    fixes = make_fixes([0, 0], [0.0, 1.0], [0.0, 1.0], [0.0, 0.0], [0, 0])
    with pytest.warns(ComoveNote, match="snapshots for 2 fixes"):
        align(fixes, AlignParams(step=1.0 / (2 * SPARSE_GRID)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", ComoveNote)
        align(fixes, AlignParams(step=0.5))  # a finer grid than the fixes, but not empty
