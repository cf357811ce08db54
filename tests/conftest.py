"""Shared test configuration: slow tests run in CI (CI=true) or with --run-slow."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

REPO = Path(__file__).resolve().parents[1]
SHARED_DATASETS = REPO.parent / "shared" / "datasets"


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--run-slow", action="store_true", help="also run tests marked slow")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--run-slow") or os.environ.get("CI", "").lower() == "true":
        return
    skip = pytest.mark.skip(reason="slow: runs in CI (CI=true) or with --run-slow")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)


@pytest.fixture
def tracks_csv(tmp_path: Path) -> Path:
    """A minute of five walkers: each dog beside one owner, the cat alone."""
    rng = np.random.default_rng(0)
    rows = []
    for k, role in enumerate(["dog", "dog", "owner", "owner", "cat"]):
        base = rng.uniform(0, 50, 2)
        for t in range(60):
            # each dog walks beside one owner; the cat wanders alone
            anchor = np.array([t * 1.5, 10.0 * (k % 2)]) if role != "cat" else base
            pos = anchor + rng.normal(0, 0.1, 2) + (0.8 if role == "owner" else 0.0)
            rows.append((f"a{k}", 1_790_000_000 + t, pos[0], pos[1], role))
    path = tmp_path / "walks.csv"
    pd.DataFrame(rows, columns=["id", "time", "x", "y", "role"]).to_csv(path, index=False)
    return path
