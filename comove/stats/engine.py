"""One way to run many independent tasks: null replicates, sweep grid points, chunks.

Every parallel part of comove is a *map*: one function applied to a list of
tasks, with large read-only inputs (the aligned snapshots, the neighbour
pairs) shared by all of them, results wanted in task order. An engine does
exactly that and nothing else::

    results = engine.map(work, tasks, shared=inputs, label="null replicates")

``work(shared, task)`` must be a picklable top-level function (or a frozen
dataclass instance with ``__call__``); ``shared`` is sent to each worker once,
not once per task. Results never depend on the engine, its number of workers
or their scheduling: that is each caller's part (seeds are drawn per task,
never per worker), and the tests compare engines.

:class:`LocalEngine` runs tasks in this process or in worker processes on
this machine; :class:`comove.stats.dask_engine.DaskEngine` runs them on a
dask.distributed cluster, a second implementation of the same :class:`Engine`
protocol. :meth:`RunParams.make_engine` chooses between them.
"""

from __future__ import annotations

import ctypes
import multiprocessing
import os
import re
import signal
import sys
import warnings
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass, field, replace
from typing import Any, Protocol, TypeVar

import numpy as np

from comove.errors import ComoveNote, bad_setting

Task = TypeVar("Task")
Result = TypeVar("Result")

Work = Callable[[Any, Any], Any]

#: Below this much work (the caller's estimate, in entry-tasks: aligned
#: entries times tasks) an automatically sized engine stays in this process:
#: starting workers and sending them the shared inputs would cost more than
#: it saves (common practice; measured on the bundled scenarios, where
#: starting two workers costs about 0.3 s).
IN_PROCESS_WORK = 5_000_000

#: Tasks per batch sent to a worker: a few batches per worker keep pickling
#: low while the progress bar still moves.
BATCHES_PER_WORKER = 4


class Engine(Protocol):
    """What every engine offers: an ordered map with shared read-only inputs."""

    def map(
        self,
        work: Work,
        tasks: Sequence[Any],
        *,
        shared: Any = None,
        work_size: int = 0,
        progress: bool = False,
        label: str = "",
    ) -> list[Any]:
        """Return ``[work(shared, t) for t in tasks]``, in task order."""
        ...

    def started(
        self,
        work: Work,
        tasks: Sequence[Any],
        *,
        shared: Any = None,
        work_size: int = 0,
        progress: bool = False,
        label: str = "",
    ) -> AbstractContextManager[Callable[[], list[Any]]]:
        """Start ``map``'s tasks; the context gives a function that waits for their results.

        An engine may run the tasks only when the results are asked for.
        """
        ...


_SHARED: dict[str, Any] = {}

#: Linux prctl option: a signal for this process when its parent ends.
_PR_SET_PDEATHSIG = 1


def _die_with_parent(parent: int | None) -> None:
    """Have Linux kill this worker when the process that started it ends.

    A pool's workers then never outlive the main process, even when it is
    killed without a chance to stop them (SIGKILL, or SIGTERM with no
    handler). ``parent`` is the expected parent process: if it has already
    ended (before the request took effect), the worker ends at once.
    """
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    except (OSError, AttributeError):  # no C library to ask: the pool's finally still stops it
        return
    if parent is not None and os.getppid() != parent:
        os._exit(1)


#: Signals that stop a run: held while workers start, so that none arrives in a worker
#: before it has set how it answers them (a Ctrl-C at that moment broke the pool).
_STOPPING = {signal.SIGINT, signal.SIGTERM, signal.SIGHUP}


def _start_worker(shared: Any, parent: int | None) -> None:
    """Prepare a worker process (its pool initializer) and keep the shared inputs.

    The main process decides what an interruption means: a worker ignores
    SIGINT (a Ctrl-C reaches the whole process group), ends quietly on
    SIGTERM and SIGHUP (whatever handlers it inherited), and ends with its
    parent.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGHUP, signal.SIG_DFL)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, _STOPPING)  # held while it was started
    _die_with_parent(parent)
    _SHARED["value"] = shared


def _run_batch(work: Work, tasks: Sequence[Any], first: int) -> tuple[int, list[Any]]:
    """Run one batch of tasks in a worker and return where it starts and its results."""
    shared = _SHARED["value"]
    return first, [work(shared, task) for task in tasks]


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """End a pool's workers at once and wait for the pool to wind down.

    The workers are terminated first; the pool's own manager thread then fails
    the waiting tasks and cancels the rest (``cancel_futures``). Cancelling
    them from this thread instead would race with that thread, which then
    raises ``InvalidStateError`` on a cancelled task (Python 3.11).
    """
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        proc.terminate()
    pool.shutdown(wait=True, cancel_futures=True)


def available_cores() -> int:
    """Return the processors this process may run on (its affinity, else the machine's)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def resolve_jobs(jobs: int | None) -> int:
    """Return the number of workers ``jobs`` asks for: ``None`` means every core."""
    return max(1, int(jobs) if jobs is not None else available_cores())


@dataclass(frozen=True)
class LocalEngine:
    """Runs tasks on this machine: in this process, or in worker processes.

    Parameters
    ----------
    jobs : int or None, default None
        Worker processes. ``None`` uses every core, but stays in this process
        when the work is small (see :data:`IN_PROCESS_WORK`); an explicit
        number is always honoured (1 runs in this process).

    Examples
    --------
    >>> from operator import add
    >>> LocalEngine(jobs=1).map(add, [1, 2, 3], shared=10)
    [11, 12, 13]
    """

    jobs: int | None = None

    def workers_for(self, n_tasks: int, work_size: int) -> int:
        """Return how many worker processes to use for ``n_tasks`` (1: this process)."""
        if self.jobs is None and work_size < IN_PROCESS_WORK:
            return 1
        return max(1, min(resolve_jobs(self.jobs), n_tasks))

    def map(
        self,
        work: Work,
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
            ``work(shared, task)``; picklable when workers are used.
        tasks : sequence
            The tasks, each picklable when workers are used.
        shared : object, optional
            Read-only inputs of every task, sent once to each worker.
        work_size : int, default 0
            The caller's estimate of the whole work, in entry-tasks; decides
            whether an automatically sized engine starts workers.
        progress : bool, default False
            Show a progress bar (on a terminal only).
        label : str
            Progress bar text.
        """
        if self.workers_for(len(tasks), work_size) == 1:
            return _here(work, tasks, shared, progress, label)
        with self.started(work, tasks, shared=shared, work_size=work_size, progress=progress,
                          label=label) as results:  # fmt: skip
            return results()

    @contextmanager
    def started(
        self,
        work: Work,
        tasks: Sequence[Any],
        *,
        shared: Any = None,
        work_size: int = 0,
        progress: bool = False,
        label: str = "",
    ) -> Iterator[Callable[[], list[Any]]]:
        """Start :meth:`map`'s tasks; yield a function that waits for their results.

        This process can go on with other work while the workers run the
        tasks (work that needs none of their results). Leaving the block
        without the results, or by an error or a signal, stops the workers at
        once. With one worker the tasks run in this process when the results
        are asked for. The arguments are those of :meth:`map`.
        """
        n = len(tasks)
        workers = self.workers_for(n, work_size)
        if workers == 1:
            yield lambda: _here(work, tasks, shared, progress, label)
            return
        from tqdm.auto import tqdm  # imported when used: it costs start-up time

        size = max(1, n // (workers * BATCHES_PER_WORKER))
        # forked and spawned workers are children of this process; a fork server's are not
        ours = multiprocessing.get_start_method() in ("fork", "spawn")
        held = signal.pthread_sigmask(signal.SIG_BLOCK, _STOPPING)
        finished = False
        bar = None
        try:
            pool = ProcessPoolExecutor(
                max_workers=workers, initializer=_start_worker,
                initargs=(shared, os.getpid() if ours else None),
            )  # fmt: skip
        except BaseException:
            signal.pthread_sigmask(signal.SIG_SETMASK, held)
            raise
        try:
            futures = [pool.submit(_run_batch, work, tasks[i : i + size], i)
                       for i in range(0, n, size)]  # fmt: skip
            signal.pthread_sigmask(signal.SIG_SETMASK, held)  # a held signal arrives here
            bar = tqdm(total=n, desc=label, unit="task", disable=None if progress else True,
                       leave=False)  # fmt: skip

            def results() -> list[Any]:
                nonlocal finished
                out: list[Any] = [None] * n
                for done in as_completed(futures):
                    first, block = done.result()
                    out[first : first + len(block)] = block
                    bar.update(len(block))
                finished = True
                return out

            yield results
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, held)
            if bar is not None:
                bar.close()
            if finished:
                pool.shutdown(wait=True)
            else:  # an error, a signal or results not asked for: no worker may outlive this
                _stop_pool(pool)


def _here(work: Work, tasks: Sequence[Any], shared: Any, progress: bool, label: str) -> list:
    """Return ``[work(shared, t) for t in tasks]`` run in this process, with a progress bar."""
    from tqdm.auto import tqdm  # imported when used: it costs start-up time

    bar = tqdm(total=len(tasks), desc=label, unit="task", disable=None if progress else True,
               leave=False)  # fmt: skip
    try:
        out = []
        for task in tasks:
            out.append(work(shared, task))
            bar.update(1)
        return out
    finally:
        bar.close()


#: The engines a run can use (``RunParams.engine``).
ENGINES = ("local", "dask")


@dataclass(frozen=True)
class RunParams:
    """How a run is carried out: which engine, how many workers, the seed of what is random.

    Parameters
    ----------
    jobs : int or None, default None
        Worker processes for independent tasks (null replicates, sweep grid
        points) and threads for the stages that use threads (neighbour
        search, velocities); ``None`` uses every core. With the dask engine
        and no ``scheduler``, the worker processes of the local cluster.
    seed : int or None, default None
        Seed of everything random in the run (the null replicates); ``None``
        draws one, which is recorded in ``run.json`` so that the run can be
        repeated. Results never depend on ``jobs``, ``engine`` or
        ``scheduler``.
    engine : {"local", "dask"}, default "local"
        What runs the independent tasks: ``local``, this machine's processes
        (:class:`LocalEngine`); ``dask``, a dask.distributed cluster
        (:class:`comove.stats.dask_engine.DaskEngine`, needs the ``dask``
        extra).
    scheduler : str or None, default None
        Address of a running dask scheduler (``tcp://host:8786``), for
        ``engine="dask"`` only (given with the local engine it is refused, not
        ignored); ``None`` with the dask engine starts a local cluster of
        ``jobs`` worker processes.
    """

    jobs: int | None = field(
        default=None,
        metadata={"help": "worker processes (null replicates, sweep grid points, time "
                  "windows) and threads (neighbour search, velocities) (default: all cores)"},
    )  # fmt: skip
    seed: int | None = field(default=None, metadata={"help": "seed of the null replicates"})
    engine: str = field(
        default="local",
        metadata={"help": "what runs null replicates, sweep grid points and time windows: "
                  "local (this machine) or dask (a dask cluster; see docs/distributed.md)",
                  "choices": ENGINES},
    )  # fmt: skip
    scheduler: str | None = field(
        default=None,
        metadata={"help": "address of a running dask scheduler, e.g. tcp://host:8786, for "
                  "--engine dask (default: a cluster of --jobs processes on this machine)"},
    )  # fmt: skip

    def __post_init__(self) -> None:
        if self.jobs is not None and (int(self.jobs) != self.jobs or self.jobs < 1):
            raise bad_setting("jobs", "must be a whole number of at least 1")
        cores = available_cores()
        if self.jobs is not None and self.jobs > cores and self.scheduler is None:
            # processes and threads on this machine beyond its cores only compete
            warnings.warn(ComoveNote(f"--jobs {self.jobs} lowered to {cores}, the cores this "
                                     "process may use"), stacklevel=3)  # fmt: skip
            object.__setattr__(self, "jobs", cores)
        if self.seed is not None and (int(self.seed) != self.seed or self.seed < 0):
            raise bad_setting("seed", "must be a whole number, 0 or more")
        if self.engine not in ENGINES:
            raise bad_setting("engine", f"must be one of {', '.join(ENGINES)}, not {self.engine!r}")
        if self.scheduler is not None:
            self._check_scheduler()
        if self.engine == "dask":
            from comove.stats.dask_engine import require_dask

            require_dask()

    def _check_scheduler(self) -> None:
        """Refuse a scheduler address that is not one, or one given without the dask engine."""
        text = self.scheduler
        if not isinstance(text, str) or not _ADDRESS.fullmatch(text):
            raise bad_setting("scheduler", f"must be an address like tcp://host:8786, not {text!r}")
        if self.engine != "dask":
            raise bad_setting("scheduler", "is the address of a dask scheduler; add --engine dask "
                              "to use it, or leave it out to run on this machine")  # fmt: skip

    def resolved(self) -> RunParams:
        """Return these settings with a drawn seed in place of ``None``."""
        if self.seed is not None:
            return self
        return replace(self, seed=int(np.random.SeedSequence().generate_state(1)[0] >> 1))

    def make_engine(self) -> Engine:
        """Return the engine that runs this run's independent tasks."""
        if self.engine == "dask":
            from comove.stats.dask_engine import DaskEngine

            return DaskEngine(scheduler=self.scheduler, jobs=self.jobs)
        return LocalEngine(self.jobs)

    @property
    def threads(self) -> int:
        """Return the threads for threaded stages (-1: one per core)."""
        return self.jobs or -1


#: A scheduler address: protocol://host:port, or host:port (dask then assumes tcp).
_ADDRESS = re.compile(r"([a-z][a-z0-9+.-]*://)?(\[[0-9a-fA-F:.]+\]|[^\s:/\[\]]+):\d{1,5}")
