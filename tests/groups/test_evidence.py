"""Pair-evidence links: a loop over pairs and windows, neighbour ranks, and symmetries."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scenes import grid_scene, random_walkers
from scipy.spatial.distance import cdist

from comove.groups.evidence import evidence_links, evidence_reach, together_snapshots
from comove.groups.grouping import GroupParams
from comove.io.scenarios import SCENARIOS_DIR
from comove.pipeline.core import groups
from comove.tracks.motion import entry_motion
from comove.tracks.neighbours import neighbour_pairs


def loop_links(x, y, present, vx, vy, gp: GroupParams) -> set[tuple[int, int, int]]:
    """Return {(a, b, snapshot)} of linked pairs, by direct loops over the definition.

    Reference for the ranks: scipy.spatial.distance.cdist of each snapshot's objects.
    ``vx``/``vy`` are (n_snap, n_obj) velocities (NaN where unknown).
    """
    n_snap, n_obj = x.shape
    h = evidence_reach(gp.evidence_window, 1.0)
    together = np.zeros((n_snap, n_obj, n_obj), dtype=bool)
    ignored = np.zeros((n_snap, n_obj, n_obj), dtype=bool)
    near_any = np.zeros((n_snap, n_obj, n_obj), dtype=bool)
    for s in range(n_snap):
        here = np.flatnonzero(present[s])
        pts = np.column_stack([x[s, here], y[s, here]])
        d = cdist(pts, pts)
        for u, a in enumerate(here):
            for w, b in enumerate(here):
                if a >= b or d[u, w] > gp.radius:
                    continue
                near_any[s, a, b] = True
                # neighbours within the radius strictly closer than the partner
                rank_a = sum(1 for k in range(len(here)) if k not in (u, w) and d[u, k] < d[u, w])
                rank_b = sum(1 for k in range(len(here)) if k not in (u, w) and d[w, k] < d[u, w])
                near = not gp.nearest or (rank_a < gp.nearest and rank_b < gp.nearest)
                sa, sb = np.hypot(vx[s, a], vy[s, a]), np.hypot(vx[s, b], vy[s, b])
                moving = sa > gp.min_speed and sb > gp.min_speed
                alike = moving
                if moving and gp.max_heading is not None:
                    cos = (vx[s, a] * vx[s, b] + vy[s, a] * vy[s, b]) / (sa * sb)
                    alike &= np.degrees(np.arccos(np.clip(cos, -1, 1))) <= gp.max_heading + 1e-6
                if moving and gp.max_speed_ratio is not None:
                    alike &= max(sa, sb) / min(sa, sb) <= gp.max_speed_ratio * (1 + 1e-12)
                slow = not moving  # one of them (or both) slow; NaN is slow
                together[s, a, b] = near and (alike or (gp.standing == "together" and slow))
                ignored[s, a, b] = near and slow and gp.standing == "ignored"
    links = set()
    for s, a, b in zip(*np.nonzero(near_any), strict=True):
        window = []
        for step in (-1, 1):  # walk out from s while both stay present, up to h snapshots
            k = s + step
            while 0 <= k < n_snap and abs(k - s) <= h and present[k, a] and present[k, b]:
                window.append(k)
                k += step
        window.append(s)
        weighed = [k for k in window if not ignored[k, a, b]]
        if (
            weighed
            and sum(together[k, a, b] for k in weighed) >= gp.evidence_share * len(weighed) - 1e-9
        ):
            links.add((int(a), int(b), int(s)))
    return links


def linked_set(snaps, links) -> set[tuple[int, int, int]]:
    a, b = snaps.obj[links.i], snaps.obj[links.j]
    return set(zip(np.minimum(a, b).tolist(), np.maximum(a, b).tolist(),
                   snaps.snap[links.i].tolist(), strict=True))  # fmt: skip


def velocity_grid(snaps, motion, shape):
    vx, vy = np.full(shape, np.nan), np.full(shape, np.nan)
    vx[snaps.snap, snaps.obj] = motion.vx
    vy[snaps.snap, snaps.obj] = motion.vy
    return vx, vy


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), nearest=st.integers(0, 3),
       window=st.sampled_from([0.0, 2.0, 5.0, 9.0]), share=st.sampled_from([0.3, 0.5, 0.8, 1.0]),
       standing=st.sampled_from(["together", "ignored", "apart"]))  # fmt: skip
def test_links_equal_a_loop_over_pairs_and_windows(seed, nearest, window, share, standing):
    rng = np.random.default_rng(seed)
    n_snap, n_obj = 30, 6
    x, y, present = random_walkers(rng, n_obj, n_snap)
    x, y = x * 0.7, y * 0.7  # integer lattice scaled: ties of distance are common
    present[0] = True
    snaps = grid_scene(x, y, np.zeros((n_snap, n_obj), int), present, 1)
    gp = GroupParams(radius=2.0, min_speed=0.3, max_heading=60.0, max_speed_ratio=2.0,
                     velocity_window=3.0, evidence_window=window, evidence_share=share,
                     nearest=nearest, standing=standing)  # fmt: skip
    motion = entry_motion(snaps, gp.velocity_window)
    links = evidence_links(snaps, neighbour_pairs(snaps, gp.radius), motion, gp)
    vx, vy = velocity_grid(snaps, motion, x.shape)
    assert linked_set(snaps, links) == loop_links(x, y, present, vx, vy, gp)


def test_ranks_count_ties_alike_whatever_the_numbering():
    # four objects at the corners of a square, one pair closer: each of a tie is ranked 0
    x = np.array([[0.0, 1.0, 0.0, 1.0]])
    y = np.array([[0.0, 0.0, 1.0, 1.0]])
    snaps = grid_scene(x, y, np.zeros((1, 4), int), np.ones((1, 4), bool), 1)
    motion = entry_motion(snaps, 1.0)
    gp = GroupParams(radius=1.2, nearest=1, min_speed=0.0, evidence_window=0.0)
    together, _ = together_snapshots(snaps, neighbour_pairs(snaps, 1.2), motion, gp)
    # the sides (length 1) tie as each corner's nearest: all four are near; no diagonal pair
    assert together.sum() == 4


def crowd_frame(seconds: float = 120.0) -> pd.DataFrame:
    """Return the first ``seconds`` of the bundled dense-crowd scene."""
    frame = pd.read_csv(SCENARIOS_DIR / "dense_crowd" / "people.csv.gz")
    return frame[frame["t"] < frame["t"].min() + seconds]


def episode_set(result, rename=None) -> set[tuple[frozenset, str, str]]:
    rename = rename or {}
    return {(frozenset(rename.get(m, m) for m in ms.split(";")), str(s), str(e)) for ms, s, e
            in zip(result.episodes["members"], result.episodes["start"], result.episodes["end"],
                   strict=True)}  # fmt: skip


def test_relabelling_objects_changes_nothing():
    frame = crowd_frame()
    options = dict(preset="pedestrians", step=0.4, id="person", time="t", replicates=0)
    before = groups(frame, **options)
    people = sorted(frame["person"].unique())
    shuffled = np.random.default_rng(7).permutation(len(people))
    names = {p: f"q{k:04d}" for p, k in zip(people, shuffled, strict=True)}  # another order
    relabelled = frame.assign(person=frame["person"].map(names)).sample(frac=1.0, random_state=3)
    after = groups(relabelled, **options)
    back = {v: k for k, v in names.items()}
    assert episode_set(after, back) == episode_set(before)
    assert len(before.episodes) >= 5


@pytest.mark.parametrize("seed", [4, 5])
def test_time_reversal_mirrors_the_links(seed):
    # the evidence window and the velocity window are centred: reversing time mirrors
    # every link (velocities change sign; headings, speeds and sides stay alike)
    rng = np.random.default_rng(seed)
    n_snap, n_obj = 50, 8
    # four walkers each with a companion part of the time, on smooth random headings
    heading = np.cumsum(rng.normal(0, 0.15, (n_snap, 4)), axis=0) + rng.uniform(0, 6.3, 4)
    lead_x = np.cumsum(1.1 * np.cos(heading), axis=0) + rng.uniform(0, 6, 4)
    lead_y = np.cumsum(1.1 * np.sin(heading), axis=0) + rng.uniform(0, 6, 4)
    apart = np.clip(np.sin(np.arange(n_snap)[:, None] / 6 + rng.uniform(0, 6, 4)), 0, None) * 4
    side = 0.8 + apart  # beside the lead, drifting off and back
    x = np.column_stack([lead_x, lead_x - side * np.sin(heading)])
    y = np.column_stack([lead_y, lead_y + side * np.cos(heading)])
    x, y = x + rng.normal(0, 0.05, x.shape), y + rng.normal(0, 0.05, y.shape)
    present = np.ones((n_snap, n_obj), dtype=bool)
    gp = GroupParams(radius=2.0, min_speed=0.3, max_heading=45.0, max_speed_ratio=1.5,
                     velocity_window=3.0, evidence_window=6.0, min_abreast=15.0,
                     standing="ignored")  # fmt: skip
    found = []
    for xs, ys in ((x, y), (x[::-1], y[::-1])):
        snaps = grid_scene(xs, ys, np.zeros((n_snap, n_obj), int), present, 1)
        links = evidence_links(snaps, neighbour_pairs(snaps, gp.radius),
                               entry_motion(snaps, gp.velocity_window), gp)  # fmt: skip
        found.append(linked_set(snaps, links))
    forward, backward = found
    assert {(a, b, n_snap - 1 - s) for a, b, s in backward} == forward
    assert forward


def test_a_moment_together_is_not_a_link_and_a_walk_together_is():
    # two walk side by side for 40 s; a stranger crosses them head-on in the middle and
    # another walks beside them for 3 s: only the companions are linked
    t = np.arange(0.0, 40.0)
    frame = pd.concat(
        [
            pd.DataFrame({"id": "a", "time": t, "x": 1.2 * t, "y": 0.0}),
            pd.DataFrame({"id": "b", "time": t, "x": 1.2 * t, "y": 0.8}),
            pd.DataFrame({"id": "c", "time": t, "x": 48 - 1.2 * t, "y": 1.6}),  # head-on
            # falls in beside them for about 3 s, then walks on faster
            pd.DataFrame({"id": "d", "time": t, "x": 2.4 * t - 24.0, "y": -0.8}),
        ]
    )
    result = groups(frame, preset="pedestrians", step=1.0)
    assert set(result.episodes["members"]) == {"a;b"}
    moment = groups(frame, preset="pedestrians", step=1.0, links="snapshot", min_together_time=0.0,
                    tolerance=0.0, max_speed_ratio=None)  # fmt: skip
    assert any("d" in m for m in moment.episodes["members"])  # the moment alone links d


def test_standing_near_is_evidence_only_when_it_counts_as_together():
    # three stand 0.7 m apart for a minute; a and b walked in together, c walked in alone
    t = np.arange(0.0, 80.0)
    walk = np.minimum(t, 20.0) * 1.2 - 24.0  # walk 20 s, then stand
    frame = pd.concat([
        pd.DataFrame({"id": "a", "time": t, "x": walk, "y": 0.0}),
        pd.DataFrame({"id": "b", "time": t, "x": walk, "y": 0.7}),
        pd.DataFrame({"id": "c", "time": t, "x": 0.0, "y": np.minimum(t, 20.0) * 1.2 - 22.6}),
    ])  # fmt: skip
    ignored = groups(frame, preset="pedestrians", step=1.0, replicates=0)
    assert set(ignored.episodes["members"]) == {"a;b"}  # c gains nothing by standing there
    apart = groups(frame, preset="pedestrians", step=1.0, standing="apart", replicates=0)
    ends = apart.episodes.set_index("members")["end"]
    assert ends["a;b"] < ignored.episodes.set_index("members")["end"]["a;b"]
    together = groups(frame, preset="pedestrians", step=1.0, standing="together",
                      replicates=0)  # fmt: skip
    assert "a;b;c" in set(together.episodes["members"])


def test_bad_evidence_settings():
    from comove.errors import InputError

    for bad in (dict(links="hunch"), dict(evidence_share=0.0), dict(evidence_share=1.5),
                dict(nearest=-1), dict(nearest=1.5), dict(min_abreast=120.0),
                dict(standing="sometimes"),
                dict(evidence_window=float("nan"))):  # fmt: skip
        with pytest.raises(InputError):
            GroupParams(radius=1.0, **bad)
    assert GroupParams(radius=1.0, min_abreast=-1).min_abreast is None


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_without_history_the_evidence_rule_is_the_snapshot_rule(seed):
    # a window of one snapshot, nearest off and standing counted as together: the
    # links judged on the moment alone (grouping.linked_pairs), pair for pair
    from comove.groups.grouping import linked_pairs

    rng = np.random.default_rng(seed)
    x, y, present = random_walkers(rng, 8, 40)
    snaps = grid_scene(x * 0.7, y * 0.7, np.zeros((40, 8), int), present, 1)
    gp = GroupParams(radius=2.0, min_speed=0.4, max_heading=50.0, max_speed_ratio=1.8,
                     velocity_window=3.0, evidence_window=0.0, nearest=0,
                     standing="together")  # fmt: skip
    pairs = neighbour_pairs(snaps, gp.radius)
    motion = entry_motion(snaps, gp.velocity_window)
    evidence = evidence_links(snaps, pairs, motion, gp)
    moment = linked_pairs(pairs, motion, gp)
    np.testing.assert_array_equal(evidence.i, moment.i)
    np.testing.assert_array_equal(evidence.j, moment.j)
    assert 0 < moment.i.size < pairs.i.size
