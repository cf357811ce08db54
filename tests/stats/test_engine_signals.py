"""No worker process of the local engine outlives the process that started it."""

from __future__ import annotations

import multiprocessing
import os
import signal
import subprocess
import sys
import textwrap
import time

import psutil
import pytest

from comove.stats.engine import LocalEngine

# a library user's program: no signal handlers of its own
MAPPING = textwrap.dedent("""
    import time
    from comove.stats.engine import LocalEngine

    def work(shared, task):
        time.sleep(0.2)
        return task

    LocalEngine(jobs=2).map(work, list(range(400)))
""")


def start_and_signal(signum: int, group: bool, log) -> tuple[subprocess.Popen, list]:
    """Start the program, signal it once its workers run; return it (ended) and its workers."""
    with open(log, "w") as err:
        program = subprocess.Popen([sys.executable, "-c", MAPPING], stdout=subprocess.DEVNULL,
                                   stderr=err, start_new_session=True)  # fmt: skip
    proc = psutil.Process(program.pid)
    while len(proc.children()) < 2 and program.poll() is None:
        time.sleep(0.05)
    workers = proc.children(recursive=True)
    assert len(workers) == 2, "the program ended before its workers started"
    if group:  # as a terminal's Ctrl-C or a supervisor stopping the whole group
        os.killpg(program.pid, signum)
    else:
        program.send_signal(signum)
    program.wait(timeout=60)
    return program, workers


def survivors(workers: list) -> list:
    """Return the workers still running a while later (and end them, so none is left)."""
    _, alive = psutil.wait_procs(workers, timeout=10)
    for worker in alive:
        worker.kill()
    return alive


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP, signal.SIGKILL])
def test_workers_end_with_a_main_process_killed_without_cleanup(signum, tmp_path):
    # the main process dies at once (no handler): Linux ends its workers with it
    program, workers = start_and_signal(signum, False, tmp_path / "err")
    assert program.returncode == -signum
    assert survivors(workers) == []


@pytest.mark.parametrize("group", [False, True])
def test_ctrl_c_stops_the_map_and_its_workers_quietly(group, tmp_path):
    program, workers = start_and_signal(signal.SIGINT, group, tmp_path / "err")
    assert survivors(workers) == []
    assert program.returncode == -signal.SIGINT  # the program's own KeyboardInterrupt
    err = (tmp_path / "err").read_text()
    assert err.count("Traceback") == 1 and err.rstrip().endswith("KeyboardInterrupt")


def _fails_on_three(shared, task):
    if task == 3:
        raise ValueError("task 3 failed")
    time.sleep(0.05)
    return task


def test_a_failing_task_leaves_no_worker(capfd):
    with pytest.raises(ValueError, match="task 3 failed"):
        LocalEngine(jobs=2).map(_fails_on_three, list(range(40)))
    assert multiprocessing.active_children() == []
    assert "Traceback" not in capfd.readouterr().err  # nothing from the pool's own threads
