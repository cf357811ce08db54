"""Who leads whom: planted delays recovered, a loop over pairs and delays, chunks joined."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import planted_leads as planted_scene
from scenes import random_walkers, shared_course_pairs

from comove.errors import ComoveNote
from comove.groups.chain import chunk_lead_tally
from comove.groups.grouping import GroupParams
from comove.groups.leadership import (
    FIXED_BITS,
    MAX_LAGS,
    LeadershipParams,
    lead_asymmetry,
    lead_blocks,
    lead_tally,
    leadership,
    peak_delays,
)
from comove.io.reading import read_tracks
from comove.pipeline.core import groups
from comove.tracks.alignment import AlignParams, align
from comove.tracks.cleaning import clean_fixes
from comove.tracks.motion import entry_motion
from comove.tracks.neighbours import neighbour_pairs

STEP = 0.1  # the planted scene's step


def test_planted_delays_are_recovered_within_one_snapshot_and_the_leader_named():
    result = groups(planted_scene(), radius=3.0, step=STEP, links="snapshot", replicates=0,
                    max_delay=2.0)  # fmt: skip
    table = result.leaders.set_index(["leader", "follower"])
    for follower, delay in (("late7", 0.7), ("late12", 1.2)):
        row = table.loc[("guide", follower)]
        assert bool(row["clear_leader"])
        assert abs(row["delay_s"] - delay) <= STEP
        assert row["correlation"] > 0.95
    # the two followers: the one 0.7 s behind leads the one 1.2 s behind by 0.5 s
    assert abs(table.loc[("late7", "late12"), "delay_s"] - 0.5) <= STEP
    # side by side: no clear leader
    rows = result.leaders
    ends = rows["leader"] + "," + rows["follower"]
    guide_twin = rows[ends.isin(["guide,twin", "twin,guide"])].iloc[0]
    assert not guide_twin["clear_leader"] and guide_twin["delay_s"] < 0.5 * STEP
    roles = result.leader_roles.set_index(["leader_role", "follower_role"])
    assert roles.loc[("leader", "follower"), "pairs"] == 2
    assert "significant_pairs" not in roles.columns  # no tests, no count of significant leads


def loop_correlations(snaps, motion, pairs, min_speed, lags, reverse=False):
    """C_ab(τ) by a plain loop over pairs, snapshots and delays (Nagy et al. 2010).

    With ``reverse``, the products u_b(t) · u_a(t + τ) of the same rows (a and
    b swapped), keyed by the row's block of 2 lags + 1 snapshots too.
    """
    where = {
        (int(o), int(s)): e for e, (o, s) in enumerate(zip(snaps.obj, snaps.snap, strict=True))
    }
    speed = np.hypot(motion.vx, motion.vy)
    out: dict[tuple[int, int], dict[int, list[float]]] = {}
    for i, j in zip(pairs.i, pairs.j, strict=True):
        if not (speed[i] > min_speed and speed[j] > min_speed):
            continue
        ea, eb = (i, j) if snaps.obj[i] < snaps.obj[j] else (j, i)
        a, b, t = int(snaps.obj[ea]), int(snaps.obj[eb]), int(snaps.snap[ea])
        first, other = (eb, a) if reverse else (ea, b)
        for tau in range(-lags, lags + 1):
            e = where.get((other, t + tau))
            if e is None or not speed[e] > min_speed:
                continue
            dot = (motion.vx[first] * motion.vx[e] + motion.vy[first] * motion.vy[e]) / (
                speed[first] * speed[e]
            )
            key = (a, b, t // (2 * lags + 1)) if reverse else (a, b)
            out.setdefault(key, {}).setdefault(tau, []).append(dot)
    return out


def random_scene(seed: int, n_obj: int = 6, n_snap: int = 50):
    rng = np.random.default_rng(seed)
    x, y, present = random_walkers(rng, n_obj, n_snap)
    frame = pd.DataFrame({
        "id": np.tile(np.arange(n_obj), n_snap).astype(str),
        "time": np.repeat(np.arange(n_snap), n_obj),
        "x": x.ravel(), "y": y.ravel(), "role": np.tile(np.arange(n_obj) % 2, n_snap).astype(str),
    })[present.ravel()]  # fmt: skip
    return align(clean_fixes(read_tracks(frame))[0], AlignParams(step=1.0, max_gap=2.0))


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), lags=st.integers(0, 4))
def test_correlations_equal_a_loop_over_pairs_and_delays(seed, lags):
    snaps = random_scene(seed)
    motion = entry_motion(snaps, 2.0)
    pairs = neighbour_pairs(snaps, 4.0)
    tally = lead_tally(snaps, motion, pairs, 0.1, lags)
    expected = loop_correlations(snaps, motion, pairs, 0.1, lags)
    keys = [(int(k) // len(snaps.objects), int(k) % len(snaps.objects)) for k in tally.key]
    assert sorted(keys) == sorted(expected)
    for row, pair in enumerate(keys):
        for k, tau in enumerate(range(-lags, lags + 1)):
            values = expected[pair].get(tau, [])
            assert tally.counts[row, k] == len(values)
            if values:  # summed as integers of 2**-32: within half a unit per term
                assert (
                    abs(tally.sums[row, k] / 2.0**FIXED_BITS - sum(values))
                    <= len(values) * 2.0**-32
                )


def test_peak_delay_prefers_zero_on_ties_and_refines_between_snapshots():
    sums = np.array([[1.0, 2.0, 2.0, 2.0, 1.0], [0.0, 0.5, 0.8, 1.0, 0.9]]) * 2.0**FIXED_BITS
    counts = np.ones_like(sums)
    delay, peak = peak_delays(sums, counts, 2)
    assert delay[0] == 0.0 and peak[0] == 2.0
    # parabola through (0, 0.8), (1, 1.0), (2, 0.9): vertex at 1 + 0.5 * (0.8 - 0.9) / -0.3
    assert delay[1] == pytest.approx(1 + 1 / 6)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), lags=st.integers(1, 3), data=st.data())
def test_tallies_of_chunks_joined_equal_the_whole_run(seed, lags, data):
    snaps = random_scene(seed, n_snap=40)
    grouping = GroupParams(radius=4.0, velocity_window=2.0, min_speed=0.1)
    whole = lead_tally(snaps, entry_motion(snaps, 2.0), neighbour_pairs(snaps, 4.0), 0.1, lags)
    cuts = sorted(data.draw(st.sets(st.integers(1, snaps.n_snapshots - 1), max_size=4)))
    edges = [0, *cuts, snaps.n_snapshots]
    spans = zip(edges[:-1], edges[1:], strict=True)
    parts = [chunk_lead_tally(snaps, a, b, grouping, lags) for a, b in spans]
    joined = parts[0]
    for part in parts[1:]:
        joined = joined.then(part)
    np.testing.assert_array_equal(joined.key, whole.key)
    for name in ("sums", "counts", "moving", "role_key", "role_count"):
        np.testing.assert_array_equal(getattr(joined, name), getattr(whole, name), err_msg=name)


def test_pairs_moving_together_too_briefly_are_not_judged():
    frame = planted_scene(n=300)  # 30 s together
    snaps = align(clean_fixes(read_tracks(frame))[0], AlignParams(step=STEP, max_gap=0.2))
    motion, pairs = entry_motion(snaps, 1.0), neighbour_pairs(snaps, 3.0)
    kept, _ = leadership(snaps, motion, pairs, 0.3, LeadershipParams(max_delay=1.0))
    assert len(kept) == 6  # every pair of the four, 30 s against the 10 s least time
    none, roles = leadership(snaps, motion, pairs, 0.3,
                             LeadershipParams(max_delay=1.0, min_moving_together=60.0))  # fmt: skip
    assert none.empty and roles.empty and list(none.columns) == list(kept.columns)


def test_a_delay_beyond_the_limit_is_looked_at_up_to_it_with_a_note():
    with pytest.warns(ComoveNote, match="--max-delay is 2,000 snapshots; delays up to 1,000"):
        assert LeadershipParams(max_delay=200.0).lags(0.1) == MAX_LAGS


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), lags=st.integers(0, 3))
def test_block_sums_both_ways_round_equal_a_loop_over_rows_and_delays(seed, lags):
    snaps = random_scene(seed)
    motion, pairs = entry_motion(snaps, 2.0), neighbour_pairs(snaps, 4.0)
    tally = lead_tally(snaps, motion, pairs, 0.1, lags)
    wanted = tally.key[::2]  # every other pair
    blocks = lead_blocks(snaps, motion, pairs, 0.1, lags, wanted)
    np.testing.assert_array_equal(blocks.key, wanted)
    # not swapped: the table's sums, pair for pair
    sums, counts = blocks.swapped(np.zeros(blocks.forward.shape[0], dtype=bool))
    np.testing.assert_array_equal(counts, tally.counts[::2])
    np.testing.assert_allclose(sums, tally.sums[::2] / 2.0**FIXED_BITS, atol=1e-6)
    # swapped: u_b(t) · u_a(t + τ) per block of 2 lags + 1 snapshots, from the definition
    expected = loop_correlations(snaps, motion, pairs, 0.1, lags, reverse=True)
    n_obj = len(snaps.objects)
    cells = sorted((a, b, k) for a, b, k in expected if a * n_obj + b in set(wanted.tolist()))
    assert blocks.forward.shape[0] == len(cells)
    assert list(blocks.starts) == [
        i for i, c in enumerate(cells) if i == 0 or c[:2] != cells[i - 1][:2]
    ]
    for row, cell in enumerate(cells):
        for k, tau in enumerate(range(-lags, lags + 1)):
            values = expected[cell].get(tau, [])
            assert blocks.reverse_n[row, k] == len(values)
            assert blocks.reverse[row, k] == pytest.approx(sum(values), abs=1e-9)


def test_lead_asymmetry_is_the_peak_less_its_mirror_and_zero_at_a_zero_delay():
    sums = np.array([
        [0.2, 0.5, 0.9, 0.5, 0.2],  # symmetric, peak at 0
        [0.1, 0.3, 0.6, 0.8, 0.7],  # peak at +1: 0.8 - 0.3
        [0.9, 0.2, 0.1, 0.0, 0.0],  # peak at -2: 0.9 - 0.0
    ])  # fmt: skip
    counts = np.ones_like(sums)
    counts[2, 4] = 0  # C(+2) undefined: counts as -1 beside the peak at -2
    np.testing.assert_allclose(lead_asymmetry(sums, counts, 2), [0.0, 0.5, 1.9])


def test_planted_leads_are_significant_under_the_swap_and_the_twin_is_not():
    result = groups(planted_scene(), radius=3.0, step=STEP, links="snapshot", replicates=99,
                    max_delay=2.0, seed=3)  # fmt: skip
    table = result.leaders.set_index(["leader", "follower"])
    for pair in (("guide", "late7"), ("guide", "late12"), ("late7", "late12")):
        row = table.loc[pair]
        assert row["statistic"] == "lead_asymmetry" and row["p_value"] == pytest.approx(0.01)
        assert row["lead_asymmetry"] > 0.01 and row["significant"]
    # the roll-up counts the significant leads among the clear ones, per role pair
    roles = result.leader_roles.set_index(["leader_role", "follower_role"])
    assert roles.loc[("leader", "follower"), "pairs"] == 2
    assert roles.loc[("leader", "follower"), "significant_pairs"] == 2
    assert roles["significant_pairs"].sum() == result.leaders["significant"].sum()
    twin = result.leaders[result.leaders["leader"].isin(["guide", "twin"])
                          & result.leaders["follower"].isin(["guide", "twin"])].iloc[0]  # fmt: skip
    assert twin["lead_asymmetry"] == 0.0 and twin["p_value"] == 1.0 and not twin["significant"]


def test_the_swap_test_holds_its_level_on_pairs_that_share_a_course():
    # 60 pairs with no lead either way: p-values of a valid test are at most as small as
    # uniform ones, so about 3 of 60 fall below 0.05; 8 or more has chance 0.01
    # (scipy.stats.binom.sf(7, 60, 0.05))
    result = groups(shared_course_pairs(seed=1), radius=3.0, step=STEP, links="snapshot",
                    replicates=99, max_delay=2.0, seed=2)  # fmt: skip
    table = result.leaders
    assert len(table) == 60
    assert (table["p_value"] < 0.05).sum() <= 7
    assert (table["p_value"] < 0.5).mean() <= 0.65


def test_with_tests_on_and_no_pair_judged_the_table_keeps_every_column():
    from comove.stats.significance import TEST_COLUMNS

    frame = planted_scene(n=300)  # 30 s together, against 60 s asked for
    result = groups(frame, radius=3.0, step=STEP, links="snapshot", replicates=9, max_delay=1.0,
                    min_moving_together=60.0, seed=1)  # fmt: skip
    assert result.leaders.empty
    assert list(result.leaders.columns)[-len(TEST_COLUMNS) :] == TEST_COLUMNS


def test_with_no_delay_looked_for_no_pair_has_a_lead_to_test():
    result = groups(planted_scene(n=600), radius=3.0, step=STEP, links="snapshot", replicates=9,
                    max_delay=0.0, min_moving_together=5.0, seed=1)  # fmt: skip
    table = result.leaders
    assert len(table) == 6 and not table["clear_leader"].any()
    assert (table["lead_asymmetry"] == 0).all() and (table["p_value"] == 1).all()


def test_sums_of_a_pair_always_together_equal_scipy_cross_correlation():
    # reference: scipy.signal.correlate of the unit heading components. For a pair together
    # and moving at every snapshot, sum_t u_a(t) . u_b(t + tau) is the full cross-correlation
    # of b's components with a's at lag tau, over the n - |tau| overlapping snapshots
    from scipy.signal import correlate

    frame = planted_scene(n=400)
    frame = frame[frame["id"].isin(["guide", "late7"])]
    snaps = align(clean_fixes(read_tracks(frame))[0], AlignParams(step=STEP, max_gap=0.2))
    motion, pairs = entry_motion(snaps, 1.0), neighbour_pairs(snaps, 3.0)
    lags = 12
    tally = lead_tally(snaps, motion, pairs, 0.3, lags)
    assert tally.key.size == 1 and tally.moving[0] == snaps.n_snapshots  # always together
    a, b = (snaps.obj == k for k in range(2))  # one entry per snapshot each, in time order
    ux, uy = motion.vx / motion.speed, motion.vy / motion.speed
    full = correlate(ux[b], ux[a], mode="full") + correlate(uy[b], uy[a], mode="full")
    middle = snaps.n_snapshots - 1  # lag 0 of the "full" output
    expected = full[middle - lags : middle + lags + 1]
    np.testing.assert_allclose(tally.sums[0] / 2.0**FIXED_BITS, expected, atol=1e-6)
    np.testing.assert_array_equal(
        tally.counts[0], snaps.n_snapshots - np.abs(np.arange(-lags, lags + 1))
    )
