"""One way to run a pure function over batches of rows: here, on local processes, or on Dask.

A **task** is a module-level function ``task(problem, rows, *args) -> dict of arrays``: the
problem (network arrays, a base state, ...) and a batch of row numbers in, small record arrays
out. :class:`Backend` ships the problem to each worker **once** (local processes through the
pool's initializer, Dask workers through one broadcast ``scatter``); afterwards only the rows
and the task's small arguments travel. A task never depends on which worker ran it or on
another batch, so every backend gives identical numbers.

Batch size (:func:`split_rows`): ``batch_size`` is the largest batch. With more than one
worker, batches are made smaller where needed so that every worker gets at least
:data:`TASKS_PER_WORKER` tasks (a few slow rows then cannot leave a worker idle at the end); a
batch never falls below :data:`MIN_BATCH` rows, so the per-task overhead (about 2-4 ms for
Dask) stays small against the rows' own cost.

Dask workers started by a nanny run with ``MALLOC_TRIM_THRESHOLD_=65536`` (distributed's
default, to hand memory back to the system). That also freezes glibc's mmap threshold at
128 kB, so every temporary array of a large network is mapped and unmapped again: measured on a
100k-pipe network, a fire-flow hydrant then cost twice the CPU time it costs in a local
process. The first task in such a worker process sets the two thresholds back to values that
keep arrays on the heap (:func:`tune_allocator`; glibc only, nothing else is changed).

The scheduler check (:func:`connect_scheduler`): the client is refused, with a config error
naming ``--scheduler``, when the scheduler cannot be reached, has no workers, or a worker
cannot import gridflow or runs another version.
"""

from __future__ import annotations

import ctypes
import logging
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures import as_completed as futures_completed
from typing import Any

import numpy as np

from gridflow import __version__
from gridflow.errors import ConfigError

__all__ = ["MIN_BATCH", "TASKS_PER_WORKER", "Backend", "Task", "connect_scheduler",
           "dask_slots", "default_workers", "split_rows", "tune_allocator"]

log = logging.getLogger("gridflow")

#: tasks each worker should get at least (balance at the end of a sweep)
TASKS_PER_WORKER = 4
#: smallest batch when batches are shrunk for balance
MIN_BATCH = 4

#: ``task(problem, rows, *args) -> dict of arrays``, defined at module level (sent by name)
Task = Callable[..., Any]

_WORKER_PROBLEM: Any = None


def default_workers() -> int:
    """The cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def split_rows(rows: np.ndarray, batch_size: int, workers: int) -> list[np.ndarray]:
    """``rows`` in batches of at most ``batch_size`` and, with more than one worker, small
    enough that each worker gets :data:`TASKS_PER_WORKER` tasks (never below
    :data:`MIN_BATCH`)."""
    rows = np.asarray(rows, dtype=np.int64)
    n = len(rows)
    size = max(1, int(batch_size))
    if workers > 1:
        balanced = -(-n // (workers * TASKS_PER_WORKER))
        size = max(1, min(size, max(MIN_BATCH, balanced)))
    return [rows[i:i + size] for i in range(0, n, size)]


# ------------------------------------------------------------------------------ worker side


def _install(problem: Any) -> None:
    """Local worker initializer: keep the problem for every later task of this process."""
    global _WORKER_PROBLEM
    _WORKER_PROBLEM = problem


def _call_installed(task: Task, rows: np.ndarray, args: tuple) -> Any:
    assert _WORKER_PROBLEM is not None
    return task(_WORKER_PROBLEM, rows, *args)


def _call_dask(task: Task, problem: Any, rows: np.ndarray, *args: Any) -> Any:
    tune_allocator()
    return task(problem, rows, *args)


_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc mallopt parameters
_ALLOCATOR_TUNED = False


def tune_allocator() -> bool:
    """In a process whose environment sets ``MALLOC_TRIM_THRESHOLD_`` (a Dask nanny's
    worker), keep arrays up to 32 MiB on the heap and trim above 128 MiB (glibc ``mallopt``).
    Once per process; returns whether the thresholds were set."""
    global _ALLOCATOR_TUNED
    if _ALLOCATOR_TUNED or not os.environ.get("MALLOC_TRIM_THRESHOLD_"):
        return False
    _ALLOCATOR_TUNED = True
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:  # pragma: no cover - not glibc
        return False
    ok = libc.mallopt(_M_MMAP_THRESHOLD, 32 * 2**20) == 1
    return bool(libc.mallopt(_M_TRIM_THRESHOLD, 128 * 2**20) == 1 and ok)


# ------------------------------------------------------------------------------ Dask


def connect_scheduler(scheduler: str, *, timeout: str = "20s"):
    """A Dask client for ``scheduler`` whose workers run this gridflow version.

    Raises
    ------
    ConfigError
        If the scheduler cannot be reached, or a worker cannot import gridflow or runs
        another version (``--scheduler``; exit code 2).
    """
    from distributed import Client

    try:
        client = Client(scheduler, set_as_default=False, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {scheduler}: {exc}",
                          key="--scheduler") from None

    def probe() -> str:  # nested, so it travels by value: workers need no gridflow for it
        try:
            import gridflow
        except ImportError:
            return "missing"
        return gridflow.__version__

    try:
        versions = client.run(probe)
    except Exception as exc:
        client.close()
        raise ConfigError(f"the Dask workers at {scheduler} did not answer: {exc}",
                          key="--scheduler") from None
    bad = {w: v for w, v in versions.items() if v != __version__}
    if bad or not versions:
        client.close()
        if not versions:
            raise ConfigError(f"the Dask scheduler at {scheduler} has no workers",
                              key="--scheduler")
        w, v = next(iter(bad.items()))
        have = "cannot import gridflow" if v == "missing" else f"runs gridflow {v}"
        raise ConfigError(f"Dask worker {w} at {scheduler} {have}; this run is gridflow "
                          f"{__version__}: install the same gridflow on every worker",
                          key="--scheduler")
    return client


def dask_slots(client) -> int:
    """Worker threads of the cluster (the parallel slots batches are sized for)."""
    info = client.scheduler_info()
    return max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))


# ------------------------------------------------------------------------------ the backend


class Backend:
    """Runs tasks over row batches of one problem: serial, local processes or Dask.

    Parameters
    ----------
    problem : object
        Picklable; sent to each worker once.
    workers : int, optional
        Local processes (default: the cores this process may use); 1 runs here.
    scheduler : str, optional
        Address of a Dask distributed scheduler (takes precedence over ``workers``).
    key : str, optional
        Prefix of the Dask task keys (``{key}-{i}``; a problem's token keeps them unique).

    Use as a context manager: the pool or the client lives until it exits. ``mode`` is
    ``"dask"``, ``"processes"`` or ``"serial"`` (a single batch runs here: ``mode`` then says
    ``"serial"``); ``slots`` the parallel slots batches are sized for.
    """

    def __init__(self, problem: Any, *, workers: int | None = None,
                 scheduler: str | None = None, key: str | None = None) -> None:
        self.problem = problem
        self.workers = default_workers() if workers is None else max(1, int(workers))
        self.scheduler = scheduler
        self.key = key
        self.mode = "dask" if scheduler else ("processes" if self.workers > 1 else "serial")
        self.slots = self.workers if self.mode == "processes" else 1
        self._pool: ProcessPoolExecutor | None = None
        self._client: Any = None
        self._shared: Any = None

    def __enter__(self) -> Backend:
        if self.mode == "dask":
            assert self.scheduler
            self._client = connect_scheduler(self.scheduler)
            try:
                self.slots = dask_slots(self._client)
                self._shared = self._client.scatter(self.problem, broadcast=True, hash=False)
            except BaseException:
                self._client.close()
                raise
        return self

    def __exit__(self, *exc: Any) -> None:
        if self._pool is not None:
            self._pool.shutdown()
            self._pool = None
        if self._client is not None:
            self._client.close()
            self._client = None

    def batches(self, rows: np.ndarray, batch_size: int) -> list[np.ndarray]:
        """``rows`` split for this backend's slots (:func:`split_rows`)."""
        return split_rows(rows, batch_size, self.slots)

    def plan(self, n_batches: int) -> None:
        """Settle the mode for runs of ``n_batches``: local processes only where there is more
        than one batch (the pool, started on the first run, keeps ``min(workers,
        n_batches)`` processes)."""
        if self.mode == "processes" and self._pool is None:
            if n_batches <= 1:
                self.mode, self.slots = "serial", 1
            else:
                self.slots = min(self.workers, n_batches)

    def run(self, task: Task, batches: Sequence[np.ndarray], *args: Any
            ) -> Iterator[tuple[int, Any]]:
        """``(batch position, task(problem, rows, *args))`` as the batches finish."""
        return self.run_jobs(task, [(rows, args) for rows in batches])

    def run_jobs(self, task: Task, jobs: Sequence[tuple[np.ndarray, tuple]]
                 ) -> Iterator[tuple[int, Any]]:
        """``(job position, task(problem, rows, *args))`` for jobs ``(rows, args)``, as they
        finish (all jobs are submitted at once)."""
        self.plan(len(jobs))
        if self.mode == "serial":
            for i, (rows, args) in enumerate(jobs):
                yield i, task(self.problem, rows, *args)
        elif self.mode == "processes":
            if self._pool is None:
                self._pool = ProcessPoolExecutor(max_workers=self.slots, initializer=_install,
                                                 initargs=(self.problem,))
            futs = {self._pool.submit(_call_installed, task, rows, args): i
                    for i, (rows, args) in enumerate(jobs)}
            for f in futures_completed(futs):
                yield futs[f], f.result()
        else:
            from distributed import as_completed as dask_completed

            client = self._client
            dfuts = []
            for i, (rows, args) in enumerate(jobs):
                kw = {"key": f"{self.key}-{i}"} if self.key else {}
                dfuts.append(client.submit(_call_dask, task, self._shared, rows, *args,
                                           pure=False, **kw))
            position = {f.key: i for i, f in enumerate(dfuts)}
            for f in dask_completed(dfuts, loop=client.loop):
                rec = f.result()
                i = position[f.key]
                f.release()
                yield i, rec
