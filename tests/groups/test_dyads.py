"""Dyads: association counts, SRI/HWI/Prox/Cs, runs, and the dyad matrix."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pandas as pd
import pytest
from scenes import grid_scene
from scipy.spatial.distance import cdist

from comove.errors import InputError
from comove.groups import dyads
from comove.groups.dyads import (
    DYAD_COLUMNS,
    DyadParams,
    _even_sample,
    _subsample_sizes,
    dyad_matrix,
    dyad_table,
)
from comove.tracks.alignment import most_frequent_roles
from comove.tracks.neighbours import NeighbourPairs, neighbour_pairs


def pair_scene(x_a, y_a, x_b, y_b, present_a, present_b):
    """Two objects (obj00 role0, obj01 role1) on a 1 s grid."""
    x = np.column_stack([x_a, x_b]).astype(float)
    y = np.column_stack([y_a, y_b]).astype(float)
    present = np.column_stack([present_a, present_b]).astype(bool)
    role = np.tile([0, 1], (x.shape[0], 1))
    return grid_scene(x, y, role, present, 2)


def random_scene(seed: int, n_obj: int = 5, n_snap: int = 60, p_present: float = 0.8):
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 1.0, (n_snap, n_obj)).cumsum(axis=0) + rng.uniform(0, 6, n_obj)
    y = rng.normal(0, 1.0, (n_snap, n_obj)).cumsum(axis=0) + rng.uniform(0, 6, n_obj)
    present = rng.random((n_snap, n_obj)) < p_present
    present[0] = True  # every object appears at least once
    role = rng.integers(0, 3, (n_snap, n_obj))
    return grid_scene(x, y, role, present, 3)


#: Every pair seen at the same time, also those never within the radius.
ALL = DyadParams(dyad_pairs="co-present")


def row_of(table: pd.DataFrame, a: str, b: str) -> pd.Series:
    hit = table[(table["object_a"] == a) & (table["object_b"] == b)]
    assert len(hit) == 1
    return hit.iloc[0]


# --- hand-computed cases from the published definitions --------------------------------


def test_hand_computed_association_indices():
    # 10 snapshots; a present at 0-7, b at 2-8, neither at 9 -> shared 2-7 (6),
    # only a 0-1 (2), only b 8 (1); together (1 m apart, radius 2) at 2, 3 and 6
    n = 10
    present_a = np.arange(n) <= 7
    present_b = (np.arange(n) >= 2) & (np.arange(n) <= 8)
    together = np.isin(np.arange(n), [2, 3, 6])
    x_b = np.where(together, 1.0, 50.0)
    snaps = pair_scene(np.zeros(n), np.zeros(n), x_b, np.zeros(n), present_a, present_b)
    table = dyad_table(snaps, neighbour_pairs(snaps, 2.0))
    assert len(table) == 1
    row = table.iloc[0]
    assert (row["object_a"], row["object_b"]) == ("obj00", "obj01")
    assert (row["role_a"], row["role_b"]) == ("role0", "role1")
    assert row["shared_snapshots"] == 6
    assert row["together_snapshots"] == 3
    assert row["only_a_snapshots"] == 2
    assert row["only_b_snapshots"] == 1
    # Cairns & Schwager 1987: SRI = x / (x + y_ab + y_a + y_b), x=3, y_ab=3, y_a=2, y_b=1
    assert row["simple_ratio_index"] == pytest.approx(3 / (3 + 3 + 2 + 1))
    # Cairns & Schwager 1987: HWI = x / (x + y_ab + (y_a + y_b) / 2)
    assert row["half_weight_index"] == pytest.approx(3 / (3 + 3 + 1.5))
    # Bertrand et al. 1996 (from memory), as reviewed by Joo et al. 2018: Prox = x / shared
    assert row["proximity_index"] == pytest.approx(3 / 6)
    assert row["together_s"] == 3.0
    assert row["longest_together_s"] == 2.0  # snapshots 2-3
    assert row["first_together"] == pd.Timestamp(2, unit="s", tz="UTC")
    assert row["last_together"] == pd.Timestamp(6, unit="s", tz="UTC")
    # Do over the 6 shared snapshots: 3 at 1 m, 3 at 50 m
    assert row["mean_distance_m"] == pytest.approx((3 * 1 + 3 * 50) / 6)


def test_hand_computed_coefficient_of_sociality():
    # a at (0,0) then (3,0); b at (0,4) then (3,4): simultaneous distances 4 and 4,
    # cross pairings 5 and 5 (3-4-5 triangles)
    snaps = pair_scene([0, 3], [0, 0], [0, 3], [4, 4], [1, 1], [1, 1])
    row = dyad_table(snaps, neighbour_pairs(snaps, 1.0), ALL).iloc[0]
    assert row["mean_distance_m"] == pytest.approx(4.0)
    assert row["expected_distance_m"] == pytest.approx((4 + 5 + 5 + 4) / 4)
    # Kenward et al. 1993: Cs = (De - Do) / (De + Do) = 0.5 / 8.5, attraction > 0
    assert row["coefficient_of_sociality"] == pytest.approx(1 / 17)

    # b's positions swapped in time: Do = 5, De unchanged -> avoidance, Cs < 0
    snaps = pair_scene([0, 3], [0, 0], [3, 0], [4, 4], [1, 1], [1, 1])
    row = dyad_table(snaps, neighbour_pairs(snaps, 1.0), ALL).iloc[0]
    assert row["mean_distance_m"] == pytest.approx(5.0)
    # Kenward et al. 1993: Cs = (4.5 - 5) / (4.5 + 5)
    assert row["coefficient_of_sociality"] == pytest.approx(-1 / 19)


def test_never_together_and_never_shared():
    # a and b overlap but are always far apart; c never overlaps with a
    n = 6
    x = np.column_stack([np.zeros(n), np.full(n, 100.0), np.zeros(n)])
    present = np.ones((n, 3), bool)
    present[:3, 2] = False
    present[3:, 0] = False
    snaps = grid_scene(x, np.zeros((n, 3)), np.zeros((n, 3), int), present, 1)
    assert len(dyad_table(snaps, neighbour_pairs(snaps, 2.0))) == 0  # by default: never together
    table = dyad_table(snaps, neighbour_pairs(snaps, 2.0), ALL)
    pairs = list(zip(table["object_a"], table["object_b"], strict=True))
    assert pairs == [("obj00", "obj01"), ("obj01", "obj02")]  # HWI tie (0): by ids
    row = row_of(table, "obj00", "obj01")
    assert row["together_snapshots"] == 0
    assert row["simple_ratio_index"] == 0.0
    assert row["longest_together_s"] == 0.0
    assert pd.isna(row["first_together"]) and pd.isna(row["last_together"])
    assert table["first_together"].dtype == "datetime64[ns, UTC]"


def test_no_overlap_gives_empty_table_with_columns():
    n = 4
    present = np.zeros((n, 2), bool)
    present[:2, 0] = True
    present[2:, 1] = True
    snaps = grid_scene(np.zeros((n, 2)), np.zeros((n, 2)), np.zeros((n, 2), int), present, 1)
    table = dyad_table(snaps, neighbour_pairs(snaps, 2.0))
    assert len(table) == 0
    assert list(table.columns) == DYAD_COLUMNS
    assert table.attrs["radius_m"] == 2.0


def test_main_role_is_the_most_frequent():
    n = 5
    role = np.zeros((n, 2), int)
    role[:3, 0] = 2  # object 0: role2 at 3 of 5 snapshots, role0 at 2
    role[:, 1] = 1
    snaps = grid_scene(np.zeros((n, 2)), np.zeros((n, 2)), role, np.ones((n, 2), bool), 3)
    row = dyad_table(snaps, neighbour_pairs(snaps, 2.0)).iloc[0]
    assert (row["role_a"], row["role_b"]) == ("role2", "role1")


# --- brute force over snapshots ---------------------------------------------------------


def brute_force(snaps, together_keys: set) -> dict:
    """Per pair of object codes: counts, runs, times and Do, by looping over snapshots."""
    by_snap: dict[int, dict[int, tuple[float, float]]] = {}
    for e in range(snaps.n_entries):
        by_snap.setdefault(int(snaps.snap[e]), {})[int(snaps.obj[e])] = (
            float(snaps.x[e]),
            float(snaps.y[e]),
        )
    objs = sorted({int(o) for o in snaps.obj})
    out = {}
    for a, b in itertools.combinations(objs, 2):
        shared = only_a = only_b = 0
        dists, together = [], []
        for s in range(snaps.n_snapshots):
            here = by_snap.get(s, {})
            if a in here and b in here:
                shared += 1
                dists.append(float(np.hypot(here[a][0] - here[b][0], here[a][1] - here[b][1])))
                if (s, a, b) in together_keys:
                    together.append(s)
            elif a in here:
                only_a += 1
            elif b in here:
                only_b += 1
        if shared == 0:
            continue
        longest = run = 0
        for k, s in enumerate(together):
            run = run + 1 if k and s == together[k - 1] + 1 else 1
            longest = max(longest, run)
        out[(a, b)] = {
            "shared": shared,
            "together": len(together),
            "only_a": only_a,
            "only_b": only_b,
            "longest": longest,
            "first": together[0] if together else None,
            "last": together[-1] if together else None,
            "do": float(np.mean(dists)),
        }
    return out


def pair_keys(snaps, pairs: NeighbourPairs) -> set:
    return {
        (int(snaps.snap[i]), *sorted((int(snaps.obj[i]), int(snaps.obj[j]))))
        for i, j in zip(pairs.i, pairs.j, strict=True)
    }


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("thin", [False, True])
@pytest.mark.parametrize("which", ["together", "co-present"])
def test_counts_match_brute_force(seed: int, thin: bool, which: str):
    snaps = random_scene(seed)
    pairs = neighbour_pairs(snaps, 3.0)
    if thin:
        # a later stage may pass a filtered set: it must be used as given
        keep = np.random.default_rng(seed).random(pairs.n_pairs) < 0.5
        pairs = NeighbourPairs(pairs.i[keep], pairs.j[keep], pairs.radius)
    expected = brute_force(snaps, pair_keys(snaps, pairs))
    if which == "together":
        expected = {k: e for k, e in expected.items() if e["together"] > 0}
    table = dyad_table(snaps, pairs, DyadParams(dyad_pairs=which))
    assert len(table) == len(expected) > 0
    codes = {str(name): k for k, name in enumerate(snaps.objects)}
    step = snaps.step_s
    for _, row in table.iterrows():
        e = expected[(codes[row["object_a"]], codes[row["object_b"]])]
        assert row["shared_snapshots"] == e["shared"]
        assert row["together_snapshots"] == e["together"]
        assert row["only_a_snapshots"] == e["only_a"]
        assert row["only_b_snapshots"] == e["only_b"]
        assert row["longest_together_s"] == e["longest"] * step
        if e["first"] is None:
            assert pd.isna(row["first_together"])
        else:
            assert row["first_together"].value == int(snaps.times(np.array([e["first"]]))[0])
            assert row["last_together"].value == int(snaps.times(np.array([e["last"]]))[0])
        assert row["mean_distance_m"] == pytest.approx(e["do"], rel=1e-12)


def test_sorted_by_half_weight_index_then_ids():
    snaps = random_scene(7, n_obj=7)
    table = dyad_table(snaps, neighbour_pairs(snaps, 3.0))
    hwi = table["half_weight_index"].to_numpy()
    assert np.all(np.diff(hwi) <= 0)
    for _, group in table.groupby("half_weight_index"):
        keys = list(zip(group["object_a"], group["object_b"], strict=True))
        assert keys == sorted(keys)


def test_rejects_pairs_across_snapshots_and_duplicates():
    snaps = random_scene(1)
    pairs = neighbour_pairs(snaps, 3.0)
    offsets = snaps.offsets()
    cross = NeighbourPairs(np.array([offsets[0]]), np.array([offsets[1]]), 3.0)
    with pytest.raises(ValueError, match="different snapshots"):
        dyad_table(snaps, cross)
    twice = NeighbourPairs(np.r_[pairs.i, pairs.i[:1]], np.r_[pairs.j, pairs.j[:1]], 3.0)
    with pytest.raises(ValueError, match="twice"):
        dyad_table(snaps, twice)


# --- coefficient of sociality against all pairwise distances ----------------------------


def exact_de(snaps, a: int, b: int) -> float:
    pa = np.column_stack([snaps.x[snaps.obj == a], snaps.y[snaps.obj == a]])
    pb = np.column_stack([snaps.x[snaps.obj == b], snaps.y[snaps.obj == b]])
    # reference: scipy.spatial.distance.cdist over all n_a x n_b pairings
    return float(cdist(pa, pb).mean())


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("blocks", [None, 7])
def test_expected_distance_exact_under_the_cap(seed: int, blocks, monkeypatch):
    if blocks:  # tiny batches of distances: the same numbers
        monkeypatch.setattr(dyads, "EXPECTED_BLOCK", blocks)
        monkeypatch.setattr(dyads, "GRID_BYTES", blocks * 1000)
    snaps = random_scene(seed)
    table = dyad_table(snaps, neighbour_pairs(snaps, 3.0))
    codes = {str(name): k for k, name in enumerate(snaps.objects)}
    for _, row in table.iterrows():
        a, b = codes[row["object_a"]], codes[row["object_b"]]
        de = exact_de(snaps, a, b)
        assert row["expected_distance_m"] == pytest.approx(de, rel=1e-12)
        do = row["mean_distance_m"]
        # Kenward et al. 1993 definition of Cs from Do and De
        assert row["coefficient_of_sociality"] == pytest.approx((de - do) / (de + do), rel=1e-9)


def test_expected_distance_subsampled_over_the_cap():
    n = 2000
    t = np.arange(n) / n
    snaps = pair_scene(
        np.cos(2 * np.pi * t) * 40,
        np.sin(2 * np.pi * t) * 40,
        np.cos(2 * np.pi * 1.5 * t) * 25 + 10,
        np.sin(2 * np.pi * 1.5 * t) * 25,
        np.ones(n),
        np.ones(n),
    )
    pairs = neighbour_pairs(snaps, 5.0)
    exact = dyad_table(snaps, pairs, DyadParams("co-present", max_expected_pairs=n * n)).iloc[0]
    thinned = dyad_table(snaps, pairs, DyadParams("co-present", max_expected_pairs=10_000)).iloc[0]
    # reference: scipy.spatial.distance.cdist over all 4 000 000 pairings
    assert exact["expected_distance_m"] == pytest.approx(exact_de(snaps, 0, 1), rel=1e-12)
    assert thinned["expected_distance_m"] == pytest.approx(exact["expected_distance_m"], rel=0.01)
    assert thinned["expected_distance_m"] != exact["expected_distance_m"]  # it did thin
    again = dyad_table(snaps, pairs, DyadParams("co-present", max_expected_pairs=10_000)).iloc[0]
    assert again["expected_distance_m"] == thinned["expected_distance_m"]  # deterministic
    # counts and Do never depend on the cap
    for c in ("shared_snapshots", "together_snapshots", "mean_distance_m"):
        assert thinned[c] == exact[c]


@pytest.mark.parametrize(
    ("n_a", "n_b", "cap"),
    [(10, 10, 100), (10, 10, 99), (135_000, 135_000, 1_000_000), (1, 10**6, 1000), (7, 3, 1)],
)
def test_subsample_sizes_respect_the_cap(n_a: int, n_b: int, cap: int):
    m_a, m_b = _subsample_sizes(n_a, n_b, cap)
    assert 1 <= m_a <= n_a and 1 <= m_b <= n_b
    assert m_a * m_b <= max(cap, 1)
    if n_a * n_b <= cap:
        assert (m_a, m_b) == (n_a, n_b)
    else:
        assert m_a * m_b > cap // 2  # uses most of the budget


def test_even_sample_is_spread_and_complete():
    assert _even_sample(5, 5).tolist() == [0, 1, 2, 3, 4]
    assert _even_sample(10, 2).tolist() == [2, 7]
    idx = _even_sample(1000, 37)
    assert np.all(np.diff(idx) > 0) and idx[0] >= 0 and idx[-1] < 1000


# --- invariances and ranges -------------------------------------------------------------


def canonical(table: pd.DataFrame) -> dict:
    """Rows keyed by the sorted id pair, with a/b columns swapped to match."""
    out = {}
    for _, row in table.iterrows():
        r = row.to_dict()
        if r["object_a"] > r["object_b"]:
            for left, right in [
                ("object_a", "object_b"),
                ("role_a", "role_b"),
                ("only_a_snapshots", "only_b_snapshots"),
            ]:
                r[left], r[right] = r[right], r[left]
        out[(r["object_a"], r["object_b"])] = r
    return out


def assert_same_rows(left: pd.DataFrame, right: pd.DataFrame) -> None:
    a, b = canonical(left), canonical(right)
    assert a.keys() == b.keys()
    for key, row in a.items():
        for col, value in row.items():
            other = b[key][col]
            if isinstance(value, float):
                assert other == pytest.approx(value, rel=1e-9, abs=1e-9, nan_ok=True), col
            else:
                assert (pd.isna(value) and pd.isna(other)) or other == value, col


@pytest.mark.parametrize("seed", range(3))
def test_relabelling_objects_gives_the_same_rows(seed: int):
    snaps = random_scene(seed, n_obj=6)
    perm = np.random.default_rng(seed + 10).permutation(len(snaps.objects))
    new_obj = perm[snaps.obj]
    order = np.lexsort((new_obj, snaps.snap))
    names = np.empty_like(snaps.objects)
    names[perm] = snaps.objects
    relabelled = dataclasses.replace(
        snaps,
        snap=snaps.snap[order],
        obj=new_obj[order].astype(np.int32),
        role=snaps.role[order],
        x=snaps.x[order],
        y=snaps.y[order],
        objects=names,
    )
    assert_same_rows(
        dyad_table(snaps, neighbour_pairs(snaps, 3.0)),
        dyad_table(relabelled, neighbour_pairs(relabelled, 3.0)),
    )


def test_translation_changes_nothing():
    snaps = random_scene(3)
    pairs = neighbour_pairs(snaps, 3.0)
    moved = dataclasses.replace(snaps, x=snaps.x + 512_345.0, y=snaps.y - 4_100_000.0)
    left, right = dyad_table(snaps, pairs), dyad_table(moved, pairs)
    assert_same_rows(left, right)
    for c in ("object_a", "object_b", "together_snapshots", "only_a_snapshots"):
        assert left[c].tolist() == right[c].tolist()


@pytest.mark.parametrize("seed", range(6))
def test_indices_stay_in_range(seed: int):
    snaps = random_scene(seed, n_obj=6, p_present=0.5 + 0.08 * seed)
    table = dyad_table(snaps, neighbour_pairs(snaps, 1.0 + seed), ALL)
    assert len(table) > 0
    for c in ("simple_ratio_index", "half_weight_index", "proximity_index"):
        assert table[c].between(0, 1).all(), c
    assert table["coefficient_of_sociality"].between(-1, 1).all()
    # HWI >= SRI always (smaller denominator), both <= Prox
    assert (table["half_weight_index"] >= table["simple_ratio_index"] - 1e-15).all()
    assert (table["proximity_index"] >= table["half_weight_index"] - 1e-15).all()


# --- dyad matrix ------------------------------------------------------------------------


def test_dyad_matrix_is_symmetric_with_nan_diagonal():
    snaps = random_scene(2, n_obj=5)
    table = dyad_table(snaps, neighbour_pairs(snaps, 3.0))
    matrix = dyad_matrix(table)
    ids = sorted(set(table["object_a"]) | set(table["object_b"]))
    assert list(matrix.index) == ids and list(matrix.columns) == ids
    values = matrix.to_numpy()
    assert np.all(np.isnan(np.diag(values)))
    np.testing.assert_array_equal(values, values.T)
    for _, row in table.iterrows():
        assert matrix.loc[row["object_a"], row["object_b"]] == row["half_weight_index"]
    sri = dyad_matrix(table, "simple_ratio_index")
    row = table.iloc[0]
    assert sri.loc[row["object_b"], row["object_a"]] == row["simple_ratio_index"]


def test_dyad_matrix_leaves_unseen_pairs_nan():
    n = 6
    present = np.ones((n, 3), bool)
    present[:3, 2] = False
    present[3:, 0] = False  # obj00 and obj02 never present together
    snaps = grid_scene(np.zeros((n, 3)), np.zeros((n, 3)), np.zeros((n, 3), int), present, 1)
    matrix = dyad_matrix(dyad_table(snaps, neighbour_pairs(snaps, 2.0)))
    assert np.isnan(matrix.loc["obj00", "obj02"]) and np.isnan(matrix.loc["obj02", "obj00"])
    # Cairns & Schwager 1987 HWI: together 3 (0-2), only obj01 at 3-5 -> 3 / (3 + 3 / 2)
    assert matrix.loc["obj00", "obj01"] == pytest.approx(2 / 3)


def test_dyad_matrix_rejects_unknown_or_text_columns():
    snaps = random_scene(0)
    table = dyad_table(snaps, neighbour_pairs(snaps, 3.0))
    with pytest.raises(InputError, match="no numeric column 'closeness'"):
        dyad_matrix(table, "closeness")
    with pytest.raises(InputError, match="role_a"):
        dyad_matrix(table, "role_a")


# --- tallies of chunks of time ------------------------------------------------------


def test_tallies_join_only_consecutive_stretches_of_one_run():
    snaps = random_scene(2)

    def tally(start: int, stop: int, **how) -> dyads.DyadTally:
        chunk = snaps.window(start, stop)
        return dyads.dyad_tally(chunk, neighbour_pairs(chunk, 3.0), **how)

    how = {"pairs": "co-present"}
    early, late = tally(0, 20, **how), tally(20, 60, **how)
    with pytest.raises(ValueError, match="consecutive"):
        early.then(tally(21, 60, **how))
    with pytest.raises(ValueError, match="consecutive"):
        late.then(early)
    with pytest.raises(ValueError, match="different runs"):
        early.then(dataclasses.replace(late, n_objects=late.n_objects + 1))
    assert early.then(tally(20, 20, **how)) is early
    # pairs chosen per chunk as "together" would miss a pair's earlier shared time
    with pytest.raises(ValueError, match="cannot be joined"):
        tally(0, 20).then(tally(20, 60))
    with pytest.raises(ValueError, match="differently chosen"):
        early.then(tally(20, 60, keys=late.key))


def test_tallies_of_the_pairs_ever_together_join_with_the_run_keys():
    # the first pass collects each chunk's together pairs; the second counts them all
    snaps = random_scene(4, n_snap=90)
    edges = [0, 25, 26, 70, 90]
    chunks = [snaps.window(a, b) for a, b in zip(edges[:-1], edges[1:], strict=True)]
    keys = np.unique(np.concatenate(
        [dyads.together_keys(c, neighbour_pairs(c, 3.0)) for c in chunks]))  # fmt: skip
    tallies = [dyads.dyad_tally(c, neighbour_pairs(c, 3.0), keys=keys) for c in chunks]
    joined = tallies[0]
    for t in tallies[1:]:
        joined = joined.then(t)
    whole = dyads.dyad_tally(snaps, neighbour_pairs(snaps, 3.0))
    for f in dataclasses.fields(whole):
        if f.name != "selection":
            np.testing.assert_array_equal(getattr(joined, f.name), getattr(whole, f.name))
    # a pair outside the keys is refused, not dropped
    with pytest.raises(ValueError, match="not among the keys"):
        dyads.dyad_tally(snaps, neighbour_pairs(snaps, 3.0), keys=keys[1:])


def test_distance_sums_are_exact_integers_of_the_fixed_point_unit():
    # each distance is rounded to the nearest 2**-37 m and summed as an integer: the
    # mean is within half a unit of the float mean, and the same for any cut
    snaps = random_scene(5, n_snap=200)
    pairs = neighbour_pairs(snaps, 3.0)
    tally = dyads.dyad_tally(snaps, pairs)
    expected = brute_force(snaps, pair_keys(snaps, pairs))
    a, b = tally.pairs()
    float_mean = np.array([expected[(int(i), int(j))]["do"] for i, j in zip(a, b, strict=True)])
    assert np.all(np.abs(tally.mean_distance() - float_mean) <= 2.0**-38 + 1e-13 * float_mean)
    assert np.all(tally.distance_low < 2**32)


def test_distance_sums_split_or_whole_give_the_same_integers(monkeypatch):
    # the two ways of summing the units (whole, or each split into 32-bit halves first)
    snaps = random_scene(6, n_snap=300)
    pairs = neighbour_pairs(snaps, 3.0)
    whole = dyads.dyad_tally(snaps, pairs)
    monkeypatch.setattr(dyads, "_DIRECT_SUM_SHARE", 0.0)
    split = dyads.dyad_tally(snaps, pairs)
    np.testing.assert_array_equal(split.distance_high, whole.distance_high)
    np.testing.assert_array_equal(split.distance_low, whole.distance_low)
    assert whole.distance_low.max() > 2**20  # the sums are not trivially small


def test_positions_beyond_any_distance_in_metres_are_refused():
    n = 3
    x = np.column_stack([np.zeros(n), np.full(n, 1e9)])
    snaps = grid_scene(x, np.zeros((n, 2)), np.zeros((n, 2), int), np.ones((n, 2), bool), 1)
    with pytest.raises(ValueError, match="not in metres"):
        dyad_table(snaps, neighbour_pairs(snaps, 2.0), ALL)


@pytest.mark.parametrize("seed", range(5))
def test_most_frequent_roles_equal_the_argmax_of_the_dense_counts(seed: int):
    # reference: numpy.argmax over each object's row of role counts (first maximum)
    rng = np.random.default_rng(seed)
    n_obj, n_roles = 30, 4
    counts = rng.integers(0, 3, (n_obj, n_roles))
    obj, role = np.nonzero(counts)
    key = obj * n_roles + role
    found = most_frequent_roles(key, counts[obj, role], n_obj, n_roles)
    np.testing.assert_array_equal(found, counts.argmax(axis=1))


def test_expected_cap_shares_a_budget_among_many_pairs():
    assert dyads.expected_cap(253, 62_500) == 62_500  # a match: the setting
    budget = dyads.EXPECTED_BUDGET
    assert dyads.expected_cap(20_000, 62_500) == budget // 20_000
    assert dyads.expected_cap(10**7, 62_500) == dyads.MIN_EXPECTED_PAIRS  # the floor
    assert dyads.expected_cap(10**7, 100) == 100  # never above the setting


def test_many_pairs_lower_each_pairs_sample_and_say_so(monkeypatch):
    snaps = random_scene(3, n_obj=6, n_snap=120)
    pairs = neighbour_pairs(snaps, 3.0)
    full = dyad_table(snaps, pairs)
    assert full.attrs["max_expected_pairs"] == 62_500
    monkeypatch.setattr(dyads, "EXPECTED_BUDGET", 100)
    monkeypatch.setattr(dyads, "MIN_EXPECTED_PAIRS", 25)
    thinned = dyad_table(snaps, pairs)
    assert thinned.attrs["max_expected_pairs"] == 25
    assert not np.array_equal(thinned["expected_distance_m"], full["expected_distance_m"])
    np.testing.assert_allclose(thinned["expected_distance_m"], full["expected_distance_m"],
                               rtol=0.25)  # fmt: skip
    pd.testing.assert_series_equal(thinned["mean_distance_m"], full["mean_distance_m"])
