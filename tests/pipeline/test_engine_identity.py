"""Every table is the same whatever engine runs the tasks: local processes or a dask cluster.

The tasks (null replicates, sweep grid points) carry their own seeds, so the
dask engine, with its workers in other processes and tasks finishing in any
order, must give the local engine's tables exactly.
"""

from __future__ import annotations

from dataclasses import fields

import pandas as pd
import pytest
from dask_cluster import command_cluster, local_cluster
from scenes import one_record, run_scenario

from comove.cli import main
from comove.io.scenarios import mine_options
from comove.pipeline.core import mine
from comove.pipeline.focal import focal
from comove.pipeline.sweep import sweep

SCENE = "small_sided_game"


@pytest.fixture(scope="module")
def cluster():
    with local_cluster(2) as address:
        yield address


def assert_same_tables(a, b) -> int:
    """Assert that two results hold the same frames, exactly; return how many were compared."""
    compared = 0
    for f in fields(a):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, pd.DataFrame) or isinstance(y, pd.DataFrame):
            pd.testing.assert_frame_equal(x, y, check_exact=True, obj=f.name)
            compared += 1
    return compared


def as_flags(options: dict) -> list[str]:
    return [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]


def test_mine_command_writes_the_same_files_with_the_dask_engine(tmp_path, capsys):
    source, options = mine_options(SCENE)
    base = ["mine", source, *as_flags(options), "--replicates", "19", "--seed", "5",
            "--jobs", "2", "--quiet"]  # fmt: skip
    assert main([*base, "--out", str(tmp_path / "local")]) == 0
    # no --scheduler: the engine starts a local cluster of --jobs worker processes
    assert main([*base, "--engine", "dask", "--out", str(tmp_path / "dask")]) == 0
    assert capsys.readouterr().err == ""
    local, dask = tmp_path / "local", tmp_path / "dask"
    tables = sorted(p.name for p in local.iterdir() if p.suffix in (".csv", ".parquet"))
    assert "significance.csv" in tables and len(tables) >= 4
    for name in tables:
        assert (local / name).read_bytes() == (dask / name).read_bytes(), name
    settings = one_record(dask / "run.json")["settings"]
    assert {k: settings[k] for k in ("jobs", "seed", "engine")} == {
        "jobs": 2, "seed": 5, "engine": "dask"}  # fmt: skip
    assert "scheduler" not in settings  # not named: a cluster on this machine


def test_groups_tables_are_the_same_on_a_dask_cluster(cluster):
    run = {"replicates": 19, "seed": 5, "jobs": 2}
    _, local = run_scenario(SCENE, **run)
    _, dask = run_scenario(SCENE, **run, engine="dask", scheduler=cluster)
    assert assert_same_tables(local, dask) >= 3


def test_sweep_table_is_the_same_on_a_dask_cluster(cluster):
    source, options = mine_options(SCENE)
    base = {k: v for k, v in options.items() if k not in ("radius", "min_participation")}
    grid = {"radius": "1.5,3,5", "min_participation": "0.3,0.5"}
    local = sweep(source, **grid, **base, jobs=2)
    dask = sweep(source, **grid, **base, engine="dask", scheduler=cluster)
    assert len(local.table) > 0
    pd.testing.assert_frame_equal(local.table, dask.table, check_exact=True)


@pytest.mark.slow
def test_a_cluster_started_with_the_dask_commands_gives_the_same_tables():
    source, options = mine_options(SCENE)
    run = {"replicates": 19, "seed": 8, "k_radii": "2,4"}
    with command_cluster(workers=2) as address:
        on_cluster = mine(source, **options, **run, engine="dask", scheduler=address)
        _, groups_on_cluster = run_scenario(SCENE, replicates=19, seed=8, engine="dask",
                                            scheduler=address)  # fmt: skip
    assert on_cluster.cross_k is not None and on_cluster.tests is not None
    assert assert_same_tables(mine(source, **options, **run, jobs=2), on_cluster) >= 5
    _, groups_here = run_scenario(SCENE, replicates=19, seed=8, jobs=1)
    assert assert_same_tables(groups_here, groups_on_cluster) >= 3


def test_windows_run_on_a_dask_cluster_give_the_local_tables(cluster):
    # the windows are the engine's tasks: cleaning, and both passes of groups
    run = {"replicates": 0, "seed": 5, "chunk": "30min"}
    _, local = run_scenario("fleet", **run, jobs=1)
    _, dask = run_scenario("fleet", **run, engine="dask", scheduler=cluster)
    assert dask.run["windows"] is not None and len(local.episodes) > 0
    assert assert_same_tables(local, dask) >= 3
    source, options = mine_options("fleet")
    mined = [mine(source, chunk="2h", replicates=0, **options, **engine)
             for engine in ({"jobs": 1}, {"engine": "dask", "scheduler": cluster})]  # fmt: skip
    assert len(mined[0].patterns) > 0
    assert assert_same_tables(*mined) >= 3


def test_focal_tables_are_the_same_on_a_dask_cluster(cluster):
    # the null replicates, and the windows of a run cut in time, as the cluster's tasks
    source, options = mine_options("fleet")
    kept = {k: v for k, v in options.items() if k not in ("min_participation", "max_size")}
    for run in ({"replicates": 19, "seed": 5}, {"replicates": 0, "chunk": "30min"}):
        local = focal(source, focal_role="hauler", **kept, **run, jobs=2)
        dask = focal(source, focal_role="hauler", **kept, **run, engine="dask", scheduler=cluster)
        assert len(local.sets) > 0
        assert assert_same_tables(local, dask) >= 3


def test_periods_over_windows_are_the_same_on_a_dask_cluster(cluster):
    # each zone's windows are the cluster's tasks, the zone travelling with them
    source, options = mine_options("herd")
    run = {"replicates": 0, "chunk": "5 days", "periods": "day-night"}
    local = mine(source, **options, **run, jobs=2)
    dask = mine(source, **options, **run, engine="dask", scheduler=cluster)
    assert {"day", "night"} < set(local.patterns["period"])
    assert assert_same_tables(local, dask) >= 3
