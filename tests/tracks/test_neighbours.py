"""Neighbour pairs per snapshot against scikit-learn's radius_neighbors_graph."""

from __future__ import annotations

import numpy as np
import pytest
from scenes import grid_scene
from sklearn.neighbors import radius_neighbors_graph

from comove.tracks.neighbours import neighbour_pairs, neighbours_of


def random_snapshots(rng: np.random.Generator, n_snap: int = 25, n_obj: int = 12):
    x = rng.uniform(-20, 20, (n_snap, n_obj))
    y = rng.uniform(-20, 20, (n_snap, n_obj))
    present = rng.random((n_snap, n_obj)) < 0.85
    return grid_scene(x, y, np.zeros_like(present, dtype=int), present, 1)


def reference_pairs(snaps, radius: float) -> set[tuple[int, int]]:
    """Directed entry pairs (a, b), a != b, from sklearn's radius_neighbors_graph per snapshot."""
    expected = set()
    offsets = snaps.offsets()
    for s in range(snaps.n_snapshots):
        lo, hi = offsets[s], offsets[s + 1]
        if hi - lo < 2:
            continue
        pts = np.column_stack([snaps.x[lo:hi], snaps.y[lo:hi]])
        g = radius_neighbors_graph(pts, radius, mode="connectivity").tocoo()
        expected |= {(lo + a, lo + b) for a, b in zip(g.row, g.col, strict=True) if a != b}
    return expected


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize(("chunk", "workers"), [(7, 1), (7, 3), (4_000_000, 1), (50, -1)])
def test_pairs_equal_scikit_learn_radius_neighbors_graph(seed, chunk, workers):
    # reference: sklearn.neighbors.radius_neighbors_graph per snapshot (distances <= radius)
    radius = 3.0
    snaps = random_snapshots(np.random.default_rng(seed))
    pairs = neighbour_pairs(snaps, radius, chunk_entries=chunk, workers=workers)
    expected = {(a, b) for a, b in reference_pairs(snaps, radius) if a < b}
    assert set(zip(pairs.i.tolist(), pairs.j.tolist(), strict=True)) == expected
    assert len(expected) > 0
    assert np.all(snaps.snap[pairs.i] == snaps.snap[pairs.j])
    # sorted by i, then j, however the entries were cut and searched
    assert np.all(np.diff(pairs.i * snaps.n_entries + pairs.j) > 0)


def test_radius_is_inclusive_even_far_from_the_origin():
    # a 3-4-5 triangle, placed where coordinates are large
    x = np.array([[1e6, 1e6 + 3.0, 1e6 + 10.0]])
    y = np.array([[5e6, 5e6 + 4.0, 5e6]])
    snaps = grid_scene(x, y, np.zeros((1, 3), int), np.ones((1, 3), bool), 1)
    pairs = neighbour_pairs(snaps, 5.0)
    assert list(zip(pairs.i, pairs.j, strict=True)) == [(0, 1)]
    assert neighbour_pairs(snaps, 4.999999).n_pairs == 0


def test_no_pair_crosses_snapshots():
    x = np.zeros((50, 2))
    y = np.zeros((50, 2))
    present = np.zeros((50, 2), bool)
    present[np.arange(50), np.arange(50) % 2] = True  # one object per snapshot
    snaps = grid_scene(x, y, np.zeros((50, 2), int), present, 1)
    assert neighbour_pairs(snaps, 100.0).n_pairs == 0


def test_a_crowd_whose_pairs_cannot_be_held_is_refused_before_the_search(monkeypatch):
    # 300 objects within a metre of one another: about 45 000 pairs a snapshot, counted
    # from a sample of entries before the k-d tree lists them
    import comove.tracks.neighbours as neighbours
    from comove.errors import InputError

    rng = np.random.default_rng(3)
    n, t = 300, 4
    x, y = rng.uniform(0, 1, (t, n)), rng.uniform(0, 1, (t, n))
    snaps = grid_scene(x, y, np.zeros((t, n), int), np.ones((t, n), bool), 1)
    monkeypatch.setattr(neighbours, "available_memory", lambda: 2**20)  # 1 MiB
    with pytest.raises(InputError, match="one object has 299 neighbours; give a smaller"):
        neighbours.neighbour_pairs(snaps, 2.0)
    monkeypatch.undo()  # with the machine's memory: every pair, 4 x C(300, 2)
    assert neighbours.neighbour_pairs(snaps, 2.0).i.size == t * n * (n - 1) // 2


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize(("chunk", "workers"), [(7, 1), (7, 3), (4_000_000, 1), (50, -1)])
def test_neighbours_of_centres_equal_scikit_learn_radius_neighbors_graph(seed, chunk, workers):
    # reference: sklearn.neighbors.radius_neighbors_graph per snapshot, rows of the centres
    rng = np.random.default_rng(seed)
    radius = 3.0
    snaps = random_snapshots(rng)
    centres = np.isin(snaps.obj, rng.choice(12, 4, replace=False))
    centre, other = neighbours_of(snaps, radius, centres, chunk_entries=chunk, workers=workers)
    expected = {(a, b) for a, b in reference_pairs(snaps, radius) if centres[a]}
    assert set(zip(centre.tolist(), other.tolist(), strict=True)) == expected
    assert len(expected) > 0 and centre.size == len(expected)
    assert np.all(np.diff(centre * snaps.n_entries + other) > 0)  # sorted, no repeats
    none = neighbours_of(snaps, radius, np.zeros(snaps.n_entries, bool))
    assert none[0].size == 0 and none[1].size == 0


def test_a_crowd_around_the_centres_that_cannot_be_held_is_refused(monkeypatch):
    import comove.tracks.neighbours as neighbours
    from comove.errors import InputError

    rng = np.random.default_rng(3)
    n, t = 300, 4
    x, y = rng.uniform(0, 1, (t, n)), rng.uniform(0, 1, (t, n))
    snaps = grid_scene(x, y, np.zeros((t, n), int), np.ones((t, n), bool), 1)
    centres = snaps.obj < 100
    monkeypatch.setattr(neighbours, "available_memory", lambda: 2**18)  # 256 KiB
    with pytest.raises(InputError, match="one object has 299 neighbours"):
        neighbours.neighbours_of(snaps, 2.0, centres)
    monkeypatch.undo()
    assert neighbours.neighbours_of(snaps, 2.0, centres)[0].size == t * 100 * (n - 1)
