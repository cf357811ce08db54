"""The dask engine: ordered results equal to the local engine's, and one line for each failure."""

from __future__ import annotations

import multiprocessing
import os
from pathlib import Path

import numpy as np
import pytest
from dask_cluster import free_port, hiding_comove, local_cluster

from comove.errors import EngineError, InputError
from comove.stats import dask_engine
from comove.stats.dask_engine import DaskEngine
from comove.stats.engine import LocalEngine


@pytest.fixture(scope="module")
def cluster():
    with local_cluster(2) as address:
        yield address


def _scaled_draw(shared, seed):
    scale, size = shared
    return scale * np.random.default_rng(seed).random(size)


def _fails_on_three(shared, task):
    if task == 3:
        raise ValueError("task 3 failed")
    return task


def _pid(shared, task):
    return os.getpid()


def test_results_are_in_task_order_and_equal_to_the_local_engine(cluster):
    tasks = list(range(37))
    here = LocalEngine(jobs=1).map(_scaled_draw, tasks, shared=(2.0, 5))
    there = DaskEngine(scheduler=cluster).map(_scaled_draw, tasks, shared=(2.0, 5))
    assert len(there) == 37
    for a, b in zip(here, there, strict=True):
        np.testing.assert_array_equal(a, b)


def test_tasks_run_in_both_worker_processes(cluster):
    pids = set(DaskEngine(scheduler=cluster).map(_pid, list(range(40))))
    assert len(pids) == 2 and os.getpid() not in pids


def test_a_failing_task_raises_its_own_error(cluster):
    with pytest.raises(ValueError, match="task 3 failed"):
        DaskEngine(scheduler=cluster).map(_fails_on_three, list(range(8)))


def ours() -> set:
    """Return this process's worker processes now."""
    return set(multiprocessing.active_children())


def test_no_tasks_give_no_results_and_start_no_cluster():
    before = ours()
    assert DaskEngine(jobs=2).map(_pid, []) == []
    assert ours() == before


def test_maps_in_a_session_share_one_local_cluster_and_close_it():
    before = ours()
    engine = DaskEngine(jobs=2)
    with engine.session():
        first = set(engine.map(_pid, list(range(8))))
        with engine.started(_pid, list(range(8))) as results:
            second = set(results())
        assert first == second and len(first) == 2  # the same two workers both times
    assert ours() == before  # the cluster is closed with the session
    assert set(engine.map(_pid, list(range(8)))).isdisjoint(first)  # a map of its own


class _Bar:
    """Stands in for tqdm: records what the bar was told."""

    made: list[_Bar] = []

    def __init__(self, total, desc, unit, disable, leave):
        self.total, self.desc, self.disable, self.done = total, desc, disable, 0
        _Bar.made.append(self)

    def update(self, n):
        self.done += n

    def close(self):
        pass


def test_the_progress_bar_follows_finished_tasks(cluster, monkeypatch):
    import tqdm.auto

    monkeypatch.setattr(tqdm.auto, "tqdm", _Bar)
    DaskEngine(scheduler=cluster).map(_pid, list(range(25)), progress=True, label="replicates")
    [bar] = _Bar.made
    assert (bar.total, bar.done, bar.desc, bar.disable) == (25, 25, "replicates", None)


def test_an_unreachable_scheduler_is_one_line_naming_it(monkeypatch):
    monkeypatch.setattr(dask_engine, "CONNECT_TIMEOUT", 1.0)
    address = f"tcp://127.0.0.1:{free_port()}"  # nothing listens there
    with pytest.raises(InputError) as caught:
        DaskEngine(scheduler=address).map(_pid, [1, 2])
    message = caught.value.worded_for("--")
    assert message.startswith(f"--scheduler {address} did not answer within 1 s")
    assert "dask scheduler" in message and "\n" not in message


def test_workers_without_comove_are_named(tmp_path):
    with local_cluster(1, preload=[hiding_comove(tmp_path)]) as address:
        with pytest.raises(EngineError, match="cannot import comove") as caught:
            DaskEngine(scheduler=address).map(_pid, [1, 2])
    assert "worker tcp://" in str(caught.value) and "\n" not in str(caught.value)


def test_a_cluster_without_workers_is_named():
    with local_cluster(0) as address:
        with pytest.raises(EngineError, match="has no workers"):
            DaskEngine(scheduler=address).map(_pid, [1, 2])


def _dies_once(marks: Path, task: int) -> int:
    """Return the task; the first run of task 1 ends its worker process instead."""
    mark = marks / f"{task}.ran"
    if task == 1 and not mark.exists():
        mark.touch()
        os._exit(1)
    return task


def _dies_always(shared, task):
    if task == 0:
        os._exit(1)
    return task


def test_a_task_whose_worker_died_runs_again_elsewhere(tmp_path):
    before = ours()
    assert DaskEngine(jobs=2).map(_dies_once, list(range(6)), shared=tmp_path) == list(range(6))
    assert (tmp_path / "1.ran").exists()  # it did die once
    assert ours() == before  # the cluster it started is closed


# With two workers, which failure dask reports first depends on timing: the task's
# retries running out, or the last worker holding the scattered inputs dying; both
# are the engine's one line. With one worker the inputs always go with it.
KEPT_DYING = "dask workers kept dying|every worker holding the run's inputs died"


@pytest.mark.parametrize(
    ("jobs", "why"),
    [(2, KEPT_DYING), (1, "every worker holding the run's inputs died")],
)
def test_workers_that_keep_dying_fail_in_one_line_and_leave_no_process(jobs, why):
    before = ours()
    with pytest.raises(EngineError, match=why) as caught:
        DaskEngine(jobs=jobs, worker_deaths=1).map(_dies_always, [0, 1], label="null replicates")
    assert "null replicates" in str(caught.value) and "\n" not in str(caught.value)
    assert ours() == before
