"""Where the hydrant batches run: this process, local worker processes, or a Dask cluster.

The machinery is :mod:`gridflow.analysis.parallel` (shared with the flow-test runner and the
segment closures): every backend runs the same pure function (:func:`run_batch`: the problem
and a batch of hydrant rows in, small record arrays out) and ships the problem (network arrays,
base state) to each worker once. Each hydrant starts from the base solution, never from another
hydrant's, so all backends give identical numbers. Batches are at most ``fireflow.batch_size``
and shrunk so that every worker gets several (:func:`batches_for`); Dask workers get their
allocator tuned (:func:`tune_allocator`). The names below stay importable from here.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from gridflow.analysis.fireflow.problem import FireflowProblem, run_batch
from gridflow.analysis.parallel import (
    MIN_BATCH,
    TASKS_PER_WORKER,
    Backend,
    connect_scheduler,
    dask_slots,
    default_workers,
    split_rows,
    tune_allocator,
)

__all__ = ["MIN_BATCH", "TASKS_PER_WORKER", "batches_for", "connect_scheduler", "dask_batch",
           "dask_slots", "default_workers", "run_dask", "run_processes", "run_serial",
           "tune_allocator"]

Report = Callable[[dict], None]


def batches_for(n: int, batch_size: int, workers: int) -> list[np.ndarray]:
    """Row batches for ``n`` hydrants (:func:`gridflow.analysis.parallel.split_rows`)."""
    return split_rows(np.arange(n), batch_size, workers)


def dask_batch(problem: FireflowProblem, rows: np.ndarray) -> dict[str, np.ndarray]:
    """:func:`run_batch` after :func:`tune_allocator` (what a Dask worker runs)."""
    tune_allocator()
    return run_batch(problem, rows)


def _collect(backend: Backend, batches: list[np.ndarray], report: Report) -> list[dict]:
    records = []
    for _, rec in backend.run(run_batch, batches):
        report(rec)
        records.append(rec)
    return records


def run_serial(problem: FireflowProblem, batches: list[np.ndarray], report: Report
               ) -> list[dict]:
    with Backend(problem, workers=1) as backend:
        return _collect(backend, batches, report)


def run_processes(problem: FireflowProblem, batches: list[np.ndarray], workers: int,
                  report: Report) -> list[dict]:
    """Local worker processes; the problem is sent once per process (pool initializer)."""
    with Backend(problem, workers=workers) as backend:
        return _collect(backend, batches, report)


def run_dask(problem: FireflowProblem, n: int, batch_size: int, scheduler: str,
             report: Report) -> tuple[list[dict], int, int]:
    """The sweep on a Dask cluster: the problem scattered once (broadcast to every worker),
    batches sized to the cluster's worker threads. Returns (records, slots, batches)."""
    with Backend(problem, scheduler=scheduler,
                 key=f"gridflow-fireflow-{problem.token}") as backend:
        batches = backend.batches(np.arange(n), batch_size)
        return _collect(backend, batches, report), backend.slots, len(batches)
