"""A focal role's surroundings: brute-force counts, the pair relation, chunks, bad input."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scenes import grid_scene, random_scene

from comove.errors import InputError
from comove.roles.chain import role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.focal import (
    FROM_FOCAL_SHARE,
    FocalParams,
    FocalTally,
    focal_chain,
    focal_tables,
    surrounding_sets,
)
from comove.roles.persistence import PersistenceParams


def brute_force_shares(snaps, focal: int, radius: float, max_around: int) -> dict:
    """Return {(role tuple, snapshot): (share, present)} from every pairwise distance.

    Textbook definition, one focal object at a time: its neighbourhood is the set of roles
    of the other objects within ``radius``; the share of S is the fraction of focal
    objects whose neighbourhood holds S.
    """
    out = {}
    n_roles = len(snaps.roles)
    for s in np.unique(snaps.snap):
        idx = np.flatnonzero(snaps.snap == s)
        focal_idx = [e for e in idx if snaps.role[e] == focal]
        if not focal_idx:
            continue
        hoods = []
        for e in focal_idx:
            near = {
                int(snaps.role[o])
                for o in idx
                if o != e
                and (snaps.x[o] - snaps.x[e]) ** 2 + (snaps.y[o] - snaps.y[e]) ** 2 <= radius**2
            }
            hoods.append(near)
        roles_here = {int(r) for r in snaps.role[idx]}
        for k in range(1, max_around + 1):
            for combo in itertools.combinations(range(n_roles), k):
                share = sum(set(combo) <= h for h in hoods) / len(hoods)
                others = set(combo) - {focal}
                present = others <= roles_here and len(focal_idx) >= 1 + (focal in combo)
                out[(combo, int(s))] = (share, present)
    return out


def tally_shares(levels) -> dict:
    out = {}
    for level in levels:
        for sid, snap, share in zip(level.set_id, level.snap, level.share, strict=True):
            out[(tuple(int(r) for r in level.roles[sid]), int(snap))] = share
    return out


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("which", ["commonest", "rarest"])
def test_shares_and_kept_sets_equal_a_brute_force_count(seed, which):
    x, y, role, present, n_roles = random_scene(seed, n_snap=25, n_obj=12, n_roles=4, side=10)
    snaps = grid_scene(x, y, role, present, n_roles)
    counts = np.bincount(snaps.role, minlength=n_roles)
    held = np.where(counts > 0, counts, counts.sum() + 1)  # roles some entry holds
    focal = int(counts.argmax() if which == "commonest" else held.argmin())
    # the rarest role's neighbours are searched from its entries only, the commonest's
    # among every pair (FROM_FOCAL_SHARE)
    assert (counts[focal] <= FROM_FOCAL_SHARE * counts.sum()) == (which == "rarest")
    params = FocalParams(focal_role=str(snaps.roles[focal]), radius=3.0, min_share=0.4,
                         max_around=3)  # fmt: skip
    truth = brute_force_shares(snaps, focal, 3.0, 3)
    tally = focal_chain(snaps, params)
    # every set of up to three roles, counted directly
    every = [np.array(list(itertools.combinations(range(n_roles), k))) for k in (1, 2, 3)]
    levels = surrounding_sets(tally, params, only=every)
    got = tally_shares(levels)
    for key, (share, _) in truth.items():
        assert got.get(key, 0.0) == pytest.approx(share, abs=1e-12), key
    for level in levels:
        for sid, roles in enumerate(level.roles):
            combo = tuple(int(r) for r in roles)
            snaps_of = [v for (c, _), v in truth.items() if c == combo]
            assert level.present[sid] == sum(p for _, p in snaps_of), combo
            assert level.prevalent[sid] == sum(sh >= 0.4 - 1e-9 for sh, _ in snaps_of), combo
    # the Apriori miner keeps exactly the sets the persistence thresholds keep
    persistence = PersistenceParams(min_prevalence=0.3, min_prevalent_time=3.0)
    mined = surrounding_sets(tally, params, persistence.min_prevalent_snapshots(1.0))
    kept = set(focal_tables(tally, mined, params, persistence).sets["around"])
    expected = set()
    for level in levels:
        for sid in np.flatnonzero(persistence.keeps(level.prevalent, level.present, 1.0)):
            expected.add(";".join(sorted(str(snaps.roles[r]) for r in level.roles[sid])))
    assert kept == expected


@pytest.mark.parametrize("seed", range(4))
def test_a_single_role_around_is_the_participation_ratio_of_the_focal_role(seed):
    # for S = {A}, the share equals PR(F, {F, A}) at every snapshot (module docstring);
    # checked against the co-location miner, itself checked against networkx cliques
    x, y, role, present, n_roles = random_scene(seed, n_snap=30, n_obj=14, n_roles=3, side=9)
    snaps = grid_scene(x, y, role, present, n_roles)
    mined = role_chain(snaps, ColocationParams(radius=2.5, min_participation=0.5, max_size=2))
    pair_level = mined.levels[0]
    for focal in range(n_roles):
        params = FocalParams(focal_role=str(snaps.roles[focal]), radius=2.5)
        others = np.array([[r] for r in range(n_roles) if r != focal])
        level = surrounding_sets(focal_chain(snaps, params), params, only=[others])[0]
        got = tally_shares([level])
        for sid, (a, b) in enumerate(pair_level.roles):
            if focal not in (a, b):
                continue
            other = int(b if a == focal else a)
            col = 0 if a == focal else 1
            rows = pair_level.set_id == sid
            for snap, pr in zip(pair_level.snap[rows], pair_level.pr[rows, col], strict=True):
                assert got.get(((other,), int(snap)), 0.0) == pytest.approx(pr, abs=1e-12)


@pytest.mark.parametrize("cuts", [[5], [1, 2, 3, 17], [12, 13]])
def test_chunk_tallies_join_into_the_whole_runs(cuts):
    x, y, role, present, n_roles = random_scene(3, n_snap=30, n_obj=12, n_roles=4, side=10)
    snaps = grid_scene(x, y, role, present, n_roles)
    params = FocalParams(focal_role=str(snaps.roles[1]), radius=3.0, min_share=0.3)
    whole = focal_chain(snaps, params)
    edges = [0, *cuts, snaps.n_snapshots]
    parts = [focal_chain(snaps.window(a, b), params) for a, b in itertools.pairwise(edges)]
    joined = FocalTally.joined(parts)
    for name in ("snap", "masks", "count"):
        np.testing.assert_array_equal(getattr(joined, name), getattr(whole, name), err_msg=name)
    persistence = PersistenceParams(min_prevalence=0.2)
    tables = [focal_tables(t, surrounding_sets(t, params), params, persistence)
              for t in (whole, joined)]  # fmt: skip
    pd.testing.assert_frame_equal(tables[0].sets, tables[1].sets)
    pd.testing.assert_frame_equal(tables[0].series, tables[1].series)
    with pytest.raises(ValueError, match="consecutive"):
        FocalTally.joined([parts[-1], parts[0]])


def test_exact_neighbourhoods_add_up_and_count_each_focal_object_once():
    # two calves share one mother and one yearling: overlapping neighbourhoods, each
    # calf-snapshot counted once, so the shares add up to 1
    t = np.repeat([0.0, 1.0, 2.0], 5)
    obj = np.tile(np.arange(5), 3)
    x = np.tile([0.0, 1.0, 2.0, 1.5, 80.0], 3)
    y = np.zeros(15)
    y[10:15] = [0.0, 40.0, 0.0, 0.5, 0.0]  # last snapshot: calf 1 is away from everyone
    role = np.tile([0, 0, 1, 2, 1], 3)  # calf, calf, mother, yearling, mother far away
    from scenes import make_fixes

    from comove.tracks.alignment import AlignParams, align

    snaps = align(make_fixes(obj, t, x, y, role), AlignParams(step=1.0, max_gap=0.5))
    params = FocalParams(focal_role="role0", radius=2.5, min_share=0.5)
    tally = focal_chain(snaps, params)
    assert int(tally.count.sum()) == 6  # two calves x three snapshots
    tables = focal_tables(tally, surrounding_sets(tally, params), params, PersistenceParams())
    hoods = tables.neighbourhoods.set_index("around")
    assert hoods["share"].sum() == pytest.approx(1.0)
    # calf 0: the other calf, the mother and the yearling (all three snapshots but the last,
    # where calf 1 is away); calf 1 likewise, and alone at the last snapshot
    assert hoods.loc["role0;role1;role2", "focal_snapshots"] == 4
    assert hoods.loc["role1;role2", "focal_snapshots"] == 1
    assert hoods.loc["", "focal_snapshots"] == 1
    sets = tables.sets.set_index("around")
    assert sets.loc["role1", "mean_share"] == pytest.approx((1 + 1 + 0.5) / 3)
    assert sets.loc["role1;role2", "exact_share"] == pytest.approx(1 / 6)
    # role0 around role0 needs two calves present: present at all three snapshots
    assert sets.loc["role0", "present_snapshots"] == 3
    assert sets.loc["role0", "prevalent_snapshots"] == 2  # 2/2, 2/2, 0/2


def test_more_than_64_roles_use_more_words():
    n_roles = 70
    x = np.zeros((2, n_roles))
    x[:, 1:] = np.linspace(0.1, 1.0, n_roles - 1)
    role = np.broadcast_to(np.arange(n_roles), (2, n_roles)).copy()
    snaps = grid_scene(x, np.zeros_like(x), role, np.ones_like(x, dtype=bool), n_roles)
    params = FocalParams(focal_role="role0", radius=5.0, max_around=1)
    tally = focal_chain(snaps, params)
    assert tally.masks.shape[1] == 2
    level = surrounding_sets(tally, params)[0]
    assert level.prevalent.tolist() == [0] + [2] * (n_roles - 1)
    hood = focal_tables(tally, [level], params, PersistenceParams()).neighbourhoods
    assert hood["size"].tolist() == [n_roles - 1]


def test_a_role_no_object_has_is_refused_naming_the_roles():
    x, y, role, present, n_roles = random_scene(1, n_roles=3)
    snaps = grid_scene(x, y, role, present, n_roles)
    with pytest.raises(InputError, match=r"'keeper'.*role0, role1, role2"):
        focal_chain(snaps, FocalParams(focal_role="keeper", radius=2.0))


@pytest.mark.parametrize(
    "bad", [{"radius": 0.0}, {"min_share": 0.0}, {"min_share": 1.5}, {"max_around": 0},
            {"focal_role": " "}],
)  # fmt: skip
def test_bad_settings_are_refused(bad):
    with pytest.raises(InputError):
        FocalParams(**{"focal_role": "a", "radius": 1.0, **bad})
