"""Dask clusters for the tests: a local one of worker processes, or a real one from commands."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import psutil

from comove.stats.dask_engine import QUIET_CLUSTER

#: A worker preload that makes comove unimportable there, as on a machine without it
#: (kept as text: a module of its own would hide comove from the test run importing it).
HIDE_COMOVE = """
import sys


class _Hidden:
    def find_spec(self, name, path=None, target=None):
        if name == "comove" or name.startswith("comove."):
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None


sys.meta_path.insert(0, _Hidden())
for _name in [m for m in sys.modules if m == "comove" or m.startswith("comove.")]:
    del sys.modules[_name]
"""


def hiding_comove(folder: Path) -> str:
    """Return the path of a worker preload, written in ``folder``, that hides comove."""
    path = folder / "hide_comove.py"
    path.write_text(HIDE_COMOVE)
    return str(path)


@contextmanager
def local_cluster(workers: int = 2, **worker_options) -> Iterator[str]:
    """Yield the address of a LocalCluster of ``workers`` processes; close it afterwards."""
    from distributed import LocalCluster

    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                           host="127.0.0.1", **QUIET_CLUSTER, **worker_options)  # fmt: skip
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close(timeout=10)


def free_port() -> int:
    """Return a TCP port on the loopback interface that nothing listens on now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_for_workers(address: str, workers: int, timeout: float = 60) -> None:
    from distributed import Client

    with Client(address, timeout=timeout, set_as_default=False) as client:
        client.wait_for_workers(workers, timeout=timeout)


@contextmanager
def command_cluster(workers: int = 2) -> Iterator[str]:
    """Yield the address of a cluster started as users start one: `dask scheduler`, `dask worker`.

    Every process started is stopped afterwards, with its children.
    """
    address = f"tcp://127.0.0.1:{free_port()}"
    port = address.rsplit(":", 1)[1]
    dask = [sys.executable, "-m", "dask"]  # the `dask` command of this environment
    commands = [[*dask, "scheduler", "--host", "127.0.0.1", "--port", port, "--no-dashboard"]]
    commands += [[*dask, "worker", address, "--nthreads", "1", "--no-dashboard"]] * workers
    procs = []
    try:
        for command in commands:
            procs.append(subprocess.Popen(command, stdout=subprocess.DEVNULL,
                                          stderr=subprocess.DEVNULL))  # fmt: skip
            if len(procs) == 1:
                time.sleep(0.5)
        _wait_for_workers(address, workers)
        yield address
    finally:
        stop(procs)


def stop(procs: list[subprocess.Popen]) -> None:
    """End the processes and all their children, and wait for them."""
    every = []
    for proc in procs:
        try:
            every += [psutil.Process(proc.pid), *psutil.Process(proc.pid).children(recursive=True)]
        except psutil.NoSuchProcess:
            continue
    for p in every:
        try:
            p.terminate()
        except psutil.NoSuchProcess:
            continue
    _, alive = psutil.wait_procs(every, timeout=10)
    for p in alive:
        p.kill()
