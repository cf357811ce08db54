"""The engine interface: ordered results, shared inputs, same results in and out of process."""

from __future__ import annotations

import os

import numpy as np
import pytest

from comove.stats.engine import IN_PROCESS_WORK, LocalEngine


def _scaled_draw(shared, seed):
    scale, size = shared
    return scale * np.random.default_rng(seed).random(size)


def _pid(shared, task):
    return os.getpid()


def _fails_on_three(shared, task):
    if task == 3:
        raise ValueError("task 3 failed")
    return task


def test_results_are_in_task_order_and_equal_in_and_out_of_process():
    tasks = list(range(23))
    here = LocalEngine(jobs=1).map(_scaled_draw, tasks, shared=(2.0, 5))
    there = LocalEngine(jobs=2).map(_scaled_draw, tasks, shared=(2.0, 5))
    assert len(here) == len(there) == 23
    for a, b, seed in zip(here, there, tasks, strict=True):
        np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(a, 2.0 * np.random.default_rng(seed).random(5))


def test_explicit_jobs_use_worker_processes_and_automatic_small_work_stays_here():
    assert set(LocalEngine(jobs=1).map(_pid, [0, 1, 2])) == {os.getpid()}
    assert os.getpid() not in LocalEngine(jobs=2).map(_pid, [0, 1, 2, 3])
    auto = LocalEngine(jobs=None)
    assert auto.workers_for(100, work_size=IN_PROCESS_WORK - 1) == 1
    assert auto.workers_for(1, work_size=IN_PROCESS_WORK) == 1  # never more than the tasks
    assert LocalEngine(jobs=8).workers_for(3, work_size=0) == 3


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_failing_task_raises_its_error(jobs):
    with pytest.raises(ValueError, match="task 3 failed"):
        LocalEngine(jobs=jobs).map(_fails_on_three, list(range(6)))


def test_no_tasks_give_no_results():
    assert LocalEngine(jobs=2).map(_pid, []) == []
