"""No process of a local dask cluster outlives the run that started it."""

from __future__ import annotations

import signal
import subprocess
import sys
import textwrap
import time

import psutil
import pytest

from comove.io.scenarios import mine_options

# a library user's program: no signal handlers of its own
MAPPING = textwrap.dedent("""
    import time
    from comove.stats.dask_engine import DaskEngine

    def work(shared, task):
        time.sleep(0.2)
        return task

    if __name__ == "__main__":
        DaskEngine(jobs=2).map(work, list(range(400)))
""")


def started_workers(program: subprocess.Popen, timeout: float = 60) -> list:
    """Return the cluster's worker processes once two run and work (the program's children)."""
    proc = psutil.Process(program.pid)
    end = time.monotonic() + timeout
    while time.monotonic() < end and program.poll() is None:
        workers = [
            c for c in proc.children(recursive=True) if "spawn_main" in " ".join(c.cmdline())
        ]
        if len(workers) >= 2:
            time.sleep(1.5)  # their tasks are under way
            return proc.children(recursive=True)
        time.sleep(0.1)
    raise AssertionError("the program ended or stalled before its workers started")


def survivors(processes: list) -> list:
    """Return the processes still running a while later (and end them, so none is left)."""
    _, alive = psutil.wait_procs(processes, timeout=15)
    for p in alive:
        p.kill()
    return alive


def test_sigterm_stops_a_dask_run_in_one_line_leaving_nothing(tmp_path):
    source, options = mine_options("small_sided_game")
    flags = [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]
    out = tmp_path / "res"
    command = [sys.executable, "-m", "comove.cli", "mine", source, *flags, "--replicates",
               "2000", "--engine", "dask", "--jobs", "2", "--quiet", "--out", str(out)]  # fmt: skip
    program = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                               text=True, start_new_session=True)  # fmt: skip
    children = started_workers(program)
    program.send_signal(signal.SIGTERM)
    _, err = program.communicate(timeout=60)
    assert survivors(children) == []
    assert program.returncode == 128 + signal.SIGTERM, err
    assert err == "comove mine: stopped by SIGTERM; nothing was written\n"
    assert not out.exists() and list(tmp_path.iterdir()) == []


@pytest.mark.slow
def test_the_cluster_ends_with_a_program_killed_without_cleanup(tmp_path):
    script = tmp_path / "mapping.py"
    script.write_text(MAPPING)
    program = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL, start_new_session=True)  # fmt: skip
    children = started_workers(program)
    program.send_signal(signal.SIGKILL)
    program.wait(timeout=30)
    assert survivors(children) == []
