"""Shared test configuration: slow tests run in CI (CI=true) or with --run-slow."""

from __future__ import annotations

import os
from pathlib import Path

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
