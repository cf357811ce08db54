"""Persistence: time prevalence, prevalent time and longest runs."""

from __future__ import annotations

import numpy as np
import pytest
from scenes import grid_scene

from comove.errors import InputError
from comove.roles.chain import role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.persistence import PersistenceParams, durable_patterns
from comove.tracks.alignment import longest_runs


def two_role_scene(together: np.ndarray, present_b: np.ndarray | None = None):
    """One object of role 0 and one of role 1, 1 m apart when together, else 50 m."""
    n = together.size
    x = np.column_stack([np.zeros(n), np.where(together, 1.0, 50.0)])
    y = np.zeros((n, 2))
    present = np.ones((n, 2), bool)
    if present_b is not None:
        present[:, 1] = present_b
    return grid_scene(x, y, np.tile([0, 1], (n, 1)), present, 2)


def patterns_of(snaps, persistence):
    params = ColocationParams(radius=2.0)
    return durable_patterns(role_chain(snaps, params), persistence, params.min_participation)


def test_hand_computed_prevalence_and_runs():
    together = np.array([1, 1, 1, 0, 0, 1, 1, 1, 1, 0, 0, 0], bool)
    present_b = np.ones(12, bool)
    present_b[-2:] = False  # absent snapshots leave present(C), not prevalent(C)
    tables = patterns_of(two_role_scene(together, present_b), PersistenceParams(0.5))
    row = tables.patterns.iloc[0]
    assert row["roles"] == "role0;role1"
    assert row["present_snapshots"] == 10
    assert row["prevalent_snapshots"] == 7
    assert row["time_prevalence"] == pytest.approx(0.7)
    assert row["prevalent_s"] == 7.0
    assert row["longest_run_s"] == 4.0
    assert row["longest_run_start"].timestamp() == 5.0
    assert row["mean_participation_index"] == pytest.approx(0.7)
    series = tables.series
    assert len(series) == 10
    assert series["prevalent"].sum() == 7
    assert set(tables.participation["role"]) == {"role0", "role1"}


def test_thresholds_keep_and_drop():
    together = np.array([1, 1, 1, 0, 0, 1, 1, 1, 1, 0], bool)  # 7 of 10
    snaps = two_role_scene(together)
    assert len(patterns_of(snaps, PersistenceParams(0.7)).patterns) == 1
    assert len(patterns_of(snaps, PersistenceParams(0.71)).patterns) == 0
    assert len(patterns_of(snaps, PersistenceParams(0.5, min_prevalent_time=7.0)).patterns) == 1
    assert len(patterns_of(snaps, PersistenceParams(0.5, min_prevalent_time=7.5)).patterns) == 0


def test_runs_pick_the_longest_and_earliest():
    set_id = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1])
    snap = np.array([1, 2, 5, 6, 9, 0, 2, 3, 4])
    longest, start = longest_runs(set_id, snap, 3)
    assert longest.tolist() == [2, 3, 0]
    assert start.tolist() == [1, 2, -1]


def test_bad_thresholds_are_input_errors():
    with pytest.raises(InputError, match="^min_prevalence"):
        PersistenceParams(min_prevalence=0)
    with pytest.raises(InputError, match="^min_prevalent_time"):
        PersistenceParams(min_prevalent_time=-1)
    with pytest.raises(InputError, match="^min_participation"):
        ColocationParams(radius=1.0, min_participation=1.5)
    with pytest.raises(InputError, match="^radius"):
        ColocationParams(radius=0.0)
