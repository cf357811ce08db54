"""The engine on a dask.distributed cluster: a running scheduler, or a local cluster it starts.

:class:`DaskEngine` is the second implementation of
:class:`comove.stats.engine.Engine`. The process that calls :meth:`DaskEngine.map`
(the *client*) keeps reading, aligning and writing; only the shared inputs
and the tasks travel to the workers:

- ``shared`` is scattered once to every worker (``broadcast=True``), not sent
  with each task;
- the tasks go in batches (a few per worker thread), each batch one dask task
  running ``work(shared, task)`` for its tasks in order;
- results come back in task order, whatever worker ran which batch and when.

Results never depend on the engine: every task carries what it draws from
(its own seed), so the same tasks give the same results on one process, on
local worker processes or on a cluster of machines; the tests compare them
table by table.

dask is imported only when a map runs, so that ``import comove`` stays quick
and dask stays an optional extra (``pip install "comove[dask]"``).

References
----------
.. [1] Dask Development Team, "Dask: Library for dynamic task scheduling",
   2016, https://dask.org (dask.distributed: ``Client``, ``LocalCluster``,
   ``Client.scatter``, ``as_completed``).
"""

from __future__ import annotations

import importlib.util
import logging
import pkgutil
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

from comove.errors import EngineError, bad_setting

#: Seconds to wait for a scheduler to answer before saying it cannot be reached.
CONNECT_TIMEOUT = 5.0

#: Seconds to wait for a started local cluster to stop.
CLOSE_TIMEOUT = 10.0

#: Batches per worker thread: enough for an even spread and a moving progress
#: bar, few enough that sending and scheduling batches costs little.
BATCHES_PER_THREAD = 4

#: A local cluster that prints nothing and takes no fixed port: no dashboard, and the
#: scheduler's small HTTP server on a free port (on the usual 8787 it warns when a
#: dashboard already runs there). Its logs are silenced up to errors too: what goes
#: wrong reaches the user as one line from this engine (a stopped run otherwise adds
#: the scheduler's own report of the workers it lost).
QUIET_CLUSTER: dict[str, Any] = {
    "dashboard_address": None,
    "scheduler_kwargs": {"dashboard_address": "127.0.0.1:0"},
    "silence_logs": logging.CRITICAL,
}


def _quiet_console_logs() -> None:
    """Keep dask.distributed's console logs in this process to critical ones, for good.

    A local cluster silences them while it runs and puts them back as it closes;
    a connection its loop closes a moment later (after a stopped run, say) then
    printed an informational traceback below the run's one line. The cluster
    runs in this process, so its logs stay quiet for the rest of it.
    """
    for handler in logging.getLogger("distributed").handlers:
        if isinstance(handler, logging.StreamHandler):
            handler.setLevel(logging.CRITICAL)


#: What to install where, said by every message about a cluster's environment.
_INSTALL = (
    'install the same comove (and the dask extra: pip install "comove[dask]") on the '
    "scheduler's machine and on every worker's"
)


def require_dask() -> None:
    """Refuse the dask engine where dask.distributed is not installed (without importing it)."""
    if importlib.util.find_spec("distributed") is None:
        raise bad_setting("engine", 'dask needs dask.distributed: pip install "comove[dask]"')


def _run_batch(work: Any, shared: Any, tasks: Sequence[Any]) -> list[Any]:
    """Return ``[work(shared, t) for t in tasks]``: one batch, run on a worker."""
    return [work(shared, task) for task in tasks]


@dataclass(frozen=True)
class DaskEngine:
    """Runs tasks on a dask.distributed cluster.

    Parameters
    ----------
    scheduler : str or None, default None
        Address of a running scheduler (``tcp://host:8786``), started with
        ``dask scheduler`` and joined by workers started with
        ``dask worker ADDRESS``. ``None`` starts a local cluster of ``jobs``
        worker processes for each map, and closes it when the map ends (by
        its end, an error or a signal).
    jobs : int or None, default None
        Worker processes of a started local cluster (one thread each);
        ``None`` starts one per core. Not used with ``scheduler``: a running
        cluster has the workers it has.
    worker_deaths : int, default 2
        How many times a task is run again on another worker after the worker
        running it died (dask's ``distributed.scheduler.allowed-failures``,
        set on a started local cluster; a running scheduler keeps its own
        setting, 3 unless configured). After that the map fails with one line.

    Notes
    -----
    A task that raises an error is not run again: comove's tasks are
    deterministic, so the error would repeat; it is raised here as it was
    raised on the worker.

    Examples
    --------
    >>> from operator import add
    >>> DaskEngine(jobs=2).map(add, [1, 2, 3], shared=10)  # doctest: +SKIP
    [11, 12, 13]
    """

    scheduler: str | None = None
    jobs: int | None = None
    worker_deaths: int = 2
    _held: list = field(default_factory=list, init=False, compare=False, repr=False)

    @contextmanager
    def session(self) -> Iterator[DaskEngine]:
        """Keep one client (and a started local cluster) for every map run inside.

        A run that makes several maps (cleaning, then each pass over its time
        windows) then starts its local cluster, and checks the cluster's
        comove, once. The cluster closes when the block ends, however it ends.
        """
        if self._held:  # already inside a session: the outer one holds the client
            yield self
            return
        with self._client(checked=False) as client:
            self._check_cluster(client)
            self._held.append(client)
            try:
                yield self
            finally:
                self._held.clear()

    def map(
        self,
        work: Any,
        tasks: Sequence[Any],
        *,
        shared: Any = None,
        work_size: int = 0,
        progress: bool = False,
        label: str = "",
    ) -> list[Any]:
        """Return ``[work(shared, t) for t in tasks]``, in task order.

        Parameters
        ----------
        work : callable
            ``work(shared, task)``, a picklable top-level function, importable
            on the workers (comove's own functions are, where comove is
            installed).
        tasks : sequence
            The tasks, each picklable.
        shared : object, optional
            Read-only inputs of every task, scattered once to every worker.
        work_size : int, default 0
            Not used: asked for a cluster, the engine always uses it.
        progress : bool, default False
            Show a progress bar over finished tasks (on a terminal only).
        label : str
            Progress bar text.

        Raises
        ------
        InputError
            The scheduler cannot be reached, or dask is not installed here.
        EngineError
            The scheduler or workers lack comove (or run another version), or
            a task's workers kept dying.
        """
        if len(tasks) == 0:
            return []
        with self._client() as client:
            return self._run(client, work, tasks, shared, progress, label)

    @contextmanager
    def started(
        self, work: Any, tasks: Sequence[Any], **options: Any
    ) -> Iterator[Callable[[], list[Any]]]:
        """Yield a function that runs :meth:`map` when its results are asked for.

        ``options`` are those of :meth:`map`. The tasks run only then, on the
        cluster: this process waits for them rather than working beside them.
        """
        yield lambda: self.map(work, tasks, **options)

    @contextmanager
    def _client(self, checked: bool = True) -> Iterator[Any]:
        """Yield a client of the scheduler, or of a local cluster started (and closed) here.

        Inside a :meth:`session`, its client. A new client's cluster is checked
        (:meth:`_check_cluster`) unless ``checked`` is false.
        """
        if self._held:
            yield self._held[0]
            return
        with self._new_client() as client:
            if checked:
                self._check_cluster(client)
            yield client

    @contextmanager
    def _new_client(self) -> Iterator[Any]:
        """Yield a client of the scheduler, or of a local cluster started (and closed) here."""
        require_dask()
        import dask
        from distributed import Client, LocalCluster

        if self.scheduler is not None:
            try:
                client = Client(self.scheduler, timeout=CONNECT_TIMEOUT, set_as_default=False)
            except (OSError, TimeoutError):
                raise bad_setting("scheduler", self._unreachable()) from None
            try:
                yield client
            finally:
                client.close()
            return
        from comove.stats.engine import resolve_jobs

        _quiet_console_logs()
        with dask.config.set({"distributed.scheduler.allowed-failures": self.worker_deaths}):
            cluster = LocalCluster(
                n_workers=resolve_jobs(self.jobs), threads_per_worker=1, processes=True,
                host="127.0.0.1", **QUIET_CLUSTER,
            )  # fmt: skip
        try:
            with Client(cluster, set_as_default=False) as client:
                yield client
        finally:
            cluster.close(timeout=CLOSE_TIMEOUT)

    def _unreachable(self) -> str:
        """Return the words for a scheduler that did not answer."""
        return (
            f"{self.scheduler} did not answer within {CONNECT_TIMEOUT:g} s; start one with "
            "`dask scheduler` and give the address it prints, or leave out --scheduler to "
            "start a cluster on this machine"
        )

    @staticmethod
    def _check_cluster(client: Any) -> None:
        """Refuse a cluster whose scheduler or workers cannot import this comove."""
        here = pkgutil.resolve_name("comove:__version__")
        where = {"the scheduler": _comove_version(client.run_on_scheduler)}
        found = client.run(pkgutil.resolve_name, "comove:__version__", on_error="return")
        if not found:
            raise EngineError(f"the dask scheduler {client.scheduler.address} has no workers; "
                              "start some with `dask worker ADDRESS`")  # fmt: skip
        where |= {f"worker {addr}": v for addr, v in found.items()}
        for name, version in where.items():
            if isinstance(version, BaseException):
                raise EngineError(f"{name} of the dask cluster cannot import comove ({version}); "
                                  f"{_INSTALL}")  # fmt: skip
            if version != here:
                raise EngineError(f"{name} of the dask cluster runs comove {version}, this "
                                  f"process {here}; {_INSTALL}")  # fmt: skip

    def _run(self, client: Any, work: Any, tasks: Sequence[Any], shared: Any, progress: bool,
             label: str) -> list[Any]:  # fmt: skip
        """Return the results of ``tasks`` run in batches on the client's cluster."""
        from distributed import KilledWorker, as_completed
        from tqdm.auto import tqdm

        threads = sum(client.nthreads().values())
        n = len(tasks)
        size = max(1, n // (threads * BATCHES_PER_THREAD))
        starts = range(0, n, size)
        # a list of one, so that the inputs travel as one object, not one per item
        [inputs] = client.scatter([shared], broadcast=True, hash=False)
        futures = {
            client.submit(_run_batch, work, inputs, tasks[i : i + size], pure=False): i
            for i in starts
        }
        results: list[Any] = [None] * n
        bar = tqdm(total=n, desc=label, unit="task", disable=None if progress else True,
                   leave=False)  # fmt: skip
        try:
            for done in as_completed(futures, loop=client.loop):
                block = done.result()
                first = futures[done]
                results[first : first + len(block)] = block
                bar.update(len(block))
        except KilledWorker as err:
            raise EngineError(
                f"dask workers kept dying while running {label or 'the tasks'} "
                f"({str(err).splitlines()[0]}); nothing was written: check the workers' "
                "memory and logs, then run again"
            ) from None
        except CancelledError:  # what a task needs was lost: scattered inputs have no copy left
            raise EngineError(
                f"the dask cluster lost {label or 'the tasks'}: every worker holding the run's "
                "inputs died, or the scheduler went away; nothing was written: check the "
                "workers' memory and logs, then run again"
            ) from None
        finally:
            bar.close()
            client.cancel(list(futures))
        return results


def _comove_version(run_on_scheduler: Any) -> Any:
    """Return comove's version on the scheduler, or the error importing it there."""
    try:
        return run_on_scheduler(pkgutil.resolve_name, "comove:__version__")
    except ImportError as err:
        return err
