"""The engine interface: ordered results, shared inputs, same results in and out of process."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from comove.errors import InputError
from comove.stats.engine import IN_PROCESS_WORK, LocalEngine, RunParams, available_cores


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


def _sleeps(shared, task):
    import time

    time.sleep(shared)
    return os.getpid()


def _children() -> set[int]:
    import multiprocessing

    return {p.pid for p in multiprocessing.active_children()}


@pytest.mark.parametrize("jobs", [1, 2])
def test_started_tasks_give_the_map_results_after_work_here(jobs):
    engine, before = LocalEngine(jobs=jobs), _children()
    with engine.started(_scaled_draw, list(range(9)), shared=(3.0, 4)) as results:
        here = sum(range(1000))  # this process works while the workers run
        out = results()
    assert here == 499500
    for a, b in zip(out, engine.map(_scaled_draw, list(range(9)), shared=(3.0, 4)), strict=True):
        np.testing.assert_array_equal(a, b)
    assert not _children() - before  # processes of earlier tests may still be ending


def test_leaving_started_tasks_by_an_error_stops_the_workers():
    import time

    before, t0 = _children(), time.monotonic()
    with pytest.raises(KeyError):
        with LocalEngine(jobs=2).started(_sleeps, list(range(8)), shared=5.0):
            assert len(_children() - before) == 2  # the workers run ...
            raise KeyError("an error in this process meanwhile")
    assert not _children() - before  # ... and are stopped,
    assert time.monotonic() - t0 < 10.0  # not waited for: the tasks would sleep 20 s


def test_no_tasks_give_no_results():
    assert LocalEngine(jobs=2).map(_pid, []) == []


def test_run_settings_choose_the_engine():
    from comove.stats.dask_engine import DaskEngine

    assert RunParams().make_engine() == LocalEngine(None)
    cores = available_cores()
    assert RunParams(jobs=cores, engine="dask").make_engine() == DaskEngine(
        scheduler=None, jobs=cores
    )
    given = RunParams(engine="dask", scheduler="tcp://10.0.0.5:8786").make_engine()
    assert given == DaskEngine(scheduler="tcp://10.0.0.5:8786", jobs=None)


@pytest.mark.parametrize(
    ("settings", "flag", "words"),
    [
        ({"engine": "spark"}, "engine", "must be one of local, dask"),
        ({"scheduler": "tcp://host:8786"}, "scheduler", "add --engine dask"),
        ({"engine": "dask", "scheduler": "host"}, "scheduler", "must be an address like"),
        ({"engine": "dask", "scheduler": "tcp://a b:1"}, "scheduler", "must be an address like"),
    ],
)
def test_bad_engine_settings_are_named(settings, flag, words):
    with pytest.raises(InputError) as caught:
        RunParams(**settings)
    assert caught.value.setting == flag and words in str(caught.value)


@pytest.mark.parametrize("address", ["tcp://127.0.0.1:8786", "scheduler.lan:8786", "tls://[::1]:1"])
def test_scheduler_addresses_are_taken(address):
    assert RunParams(engine="dask", scheduler=address).scheduler == address


def test_the_dask_engine_without_dask_says_what_to_install(monkeypatch):
    import importlib.util

    real = importlib.util.find_spec

    def find_spec(name, *args):
        return None if name == "distributed" else real(name, *args)

    monkeypatch.setattr(importlib.util, "find_spec", find_spec)
    with pytest.raises(InputError, match=r'pip install "comove\[dask\]"'):
        RunParams(engine="dask")


def test_importing_the_command_line_does_not_import_dask():
    code = "import sys, comove.cli; print(sorted(m for m in sys.modules if 'dask' in m))"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"


def test_more_jobs_than_cores_are_lowered_with_a_note():
    from comove.errors import ComoveNote

    cores = available_cores()
    with pytest.warns(ComoveNote, match=f"--jobs 10000 lowered to {cores}"):
        run = RunParams(jobs=10_000)
    assert run.jobs == cores and run.make_engine() == LocalEngine(cores)
    # a cluster's workers are not this machine's: its --jobs is left alone
    far = RunParams(jobs=10_000, engine="dask", scheduler="tcp://10.0.0.5:8786")
    assert far.jobs == 10_000
