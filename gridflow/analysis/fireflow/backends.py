"""Where the hydrant batches run: this process, local worker processes, or a Dask cluster.

Every backend runs the same pure function (:func:`run_batch`: the problem and a batch of
hydrant rows in, small record arrays out) and ships the problem (network arrays, base state)
to each worker once: local processes get it through the pool's initializer, Dask workers
through one broadcast ``scatter``. Each hydrant starts from the base solution, never from
another hydrant's, so all backends give identical numbers.

Batch size: ``fireflow.batch_size`` is the largest batch. With more than one worker, batches
are made smaller where needed so that every worker gets at least :data:`TASKS_PER_WORKER`
tasks (a few slow hydrants then cannot leave a worker idle at the end); a batch never falls
below :data:`MIN_BATCH` hydrants, so the per-task overhead (about 2-4 ms for Dask) stays
small against the hydrants' own cost.

Dask workers started by a nanny run with ``MALLOC_TRIM_THRESHOLD_=65536`` (distributed's
default, to hand memory back to the system). That also freezes glibc's mmap threshold at
128 kB, so every temporary array of a large network is mapped and unmapped again: measured on a
100k-pipe network, a hydrant then cost twice the CPU time it costs in a local process. The
first fire-flow task in such a worker process sets the two thresholds back to values that keep
arrays on the heap (:func:`tune_allocator`; glibc only, nothing else is changed).
"""

from __future__ import annotations

import ctypes
import logging
import os
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures import as_completed as futures_completed

import numpy as np

from gridflow import __version__
from gridflow.analysis.fireflow.problem import FireflowProblem, run_batch
from gridflow.errors import ConfigError

__all__ = ["MIN_BATCH", "TASKS_PER_WORKER", "batches_for", "connect_scheduler", "dask_batch",
           "default_workers", "run_dask", "run_processes", "run_serial", "tune_allocator"]

log = logging.getLogger("gridflow")

#: tasks each worker should get at least (balance at the end of a sweep)
TASKS_PER_WORKER = 4
#: smallest batch when batches are shrunk for balance
MIN_BATCH = 4

_WORKER_PROBLEM: FireflowProblem | None = None

Report = Callable[[dict], None]


def default_workers() -> int:
    """The cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def batches_for(n: int, batch_size: int, workers: int) -> list[np.ndarray]:
    """Row batches for ``n`` hydrants: at most ``batch_size`` each and, with more than one
    worker, small enough that each worker gets :data:`TASKS_PER_WORKER` tasks (never below
    :data:`MIN_BATCH`)."""
    size = max(1, int(batch_size))
    if workers > 1:
        balanced = -(-n // (workers * TASKS_PER_WORKER))
        size = max(1, min(size, max(MIN_BATCH, balanced)))
    return [np.arange(i, min(i + size, n)) for i in range(0, n, size)]


def run_serial(problem: FireflowProblem, batches: list[np.ndarray], report: Report
               ) -> list[dict]:
    records = []
    for rows in batches:
        rec = run_batch(problem, rows)
        report(rec)
        records.append(rec)
    return records


def _init_worker(problem: FireflowProblem) -> None:
    global _WORKER_PROBLEM
    _WORKER_PROBLEM = problem


def _run_in_worker(rows: np.ndarray) -> dict:
    assert _WORKER_PROBLEM is not None
    return run_batch(_WORKER_PROBLEM, rows)


def run_processes(problem: FireflowProblem, batches: list[np.ndarray], workers: int,
                  report: Report) -> list[dict]:
    """Local worker processes; the problem is sent once per process (pool initializer)."""
    records = []
    with ProcessPoolExecutor(max_workers=min(workers, len(batches)),
                             initializer=_init_worker, initargs=(problem,)) as pool:
        futs = [pool.submit(_run_in_worker, rows) for rows in batches]
        for f in futures_completed(futs):
            rec = f.result()
            report(rec)
            records.append(rec)
    return records


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


def dask_batch(problem: FireflowProblem, rows: np.ndarray) -> dict[str, np.ndarray]:
    """A Dask task: :func:`run_batch` after :func:`tune_allocator`."""
    tune_allocator()
    return run_batch(problem, rows)


def run_dask(problem: FireflowProblem, n: int, batch_size: int, scheduler: str,
             report: Report) -> tuple[list[dict], int, int]:
    """The sweep on a Dask cluster: the problem scattered once (broadcast to every worker),
    batches sized to the cluster's worker threads. Returns (records, slots, batches)."""
    from distributed import as_completed as dask_completed

    client = connect_scheduler(scheduler)
    try:
        slots = dask_slots(client)
        batches = batches_for(n, batch_size, slots)
        shared = client.scatter(problem, broadcast=True, hash=False)
        futs = [client.submit(dask_batch, shared, rows, pure=False,
                              key=f"gridflow-fireflow-{problem.token}-{i}")
                for i, rows in enumerate(batches)]
        records = []
        for f in dask_completed(futs, loop=client.loop):
            rec = f.result()
            report(rec)
            records.append(rec)
            f.release()
        return records, slots, len(batches)
    finally:
        client.close()
