"""The package works installed like any other: a wheel, installed apart, runs the demo."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_a_built_wheel_runs_the_demo_and_groups_from_another_folder(tmp_path):
    # build the wheel from a copy of the sources (the build leaves a build/ folder
    # where it runs; pip's isolated build fetches setuptools from the registry) and
    # unpack it into a folder of its own; run it from elsewhere with that folder first
    # on the path, so that the installed files are used, not the checkout
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, source / name)
    skip = shutil.ignore_patterns("__pycache__", "*.pyc")
    for name in ("comove", "synthetic_tracks"):
        shutil.copytree(ROOT / name, source / name, ignore=skip)
    wheels = tmp_path / "wheels"
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w",
                    str(wheels), str(source)], check=True, capture_output=True)  # fmt: skip
    (wheel,) = wheels.glob("comove-*.whl")
    site = tmp_path / "site"
    install = [sys.executable, "-m", "pip", "install", "--no-deps", "--quiet", "--target"]
    subprocess.run([*install, str(site), str(wheel)], check=True, capture_output=True)
    env = {**os.environ, "PYTHONPATH": str(site)}
    work = tmp_path / "elsewhere"
    work.mkdir()

    def run(*args: str) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, *args], cwd=work, env=env, capture_output=True,
                              text=True)  # fmt: skip

    where = run("-c", "import comove, sys; print(comove.__file__)")
    assert where.stdout.strip().startswith(str(site)), where
    demo = run("-m", "comove", "demo", "--out", "demo-out")
    assert demo.returncode == 0, demo.stderr
    assert (work / "demo-out" / "patterns.csv").is_file()
    scenario = site / "comove" / "scenario_files" / "small_sided_game"
    assert (scenario / "players.csv.gz").is_file()
    found = run("-m", "comove", "groups", str(scenario / "players.csv.gz"), "--id", "player",
                "--time", "t", "--role", "role", "--preset", "team-sport", "--radius", "3",
                "--replicates", "0", "--quiet", "--out", "groups-out")  # fmt: skip
    assert found.returncode == 0, found.stderr
    assert len(pd.read_csv(work / "groups-out" / "episodes.csv")) > 0
