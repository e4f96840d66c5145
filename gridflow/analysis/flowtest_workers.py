"""Running flow-test solves: in this process, on local processes, or on a Dask cluster.

Every test's solve is independent. A task is a batch of tests under one set of roughness
factors; :class:`TestRunner` sends the problem to the workers once (process initializer, or a
Dask scatter) and then only factors and row numbers travel.
"""

from __future__ import annotations

import logging
import os
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures import as_completed as futures_completed
from typing import Any

import numpy as np

from gridflow.analysis.flowtests import FlowTestProblem, merge, simulate

__all__ = ["TestRunner"]

log = logging.getLogger("gridflow")

_WORKER_PROBLEM: FlowTestProblem | None = None


def _init_worker(problem: FlowTestProblem) -> None:
    global _WORKER_PROBLEM
    _WORKER_PROBLEM = problem


def _task_local(k: int, rows: np.ndarray, factors, static: bool) -> tuple[int, dict]:
    assert _WORKER_PROBLEM is not None
    return k, simulate(_WORKER_PROBLEM, rows, factors, static=static)


def _task_dask(problem: FlowTestProblem, k: int, rows: np.ndarray, factors, static: bool
               ) -> tuple[int, dict]:
    return k, simulate(problem, rows, factors, static=static)


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


class TestRunner:
    """Evaluates the tests under one or more sets of roughness factors.

    Parameters
    ----------
    problem : FlowTestProblem
    workers : int, optional
        Local processes (default: the machine's cores; 1 runs here).
    scheduler : str, optional
        Address of a Dask distributed scheduler (takes precedence over ``workers``).
    batch_size : int
        Tests per task.

    Use as a context manager; the pool or client lives until it exits.
    """

    __test__ = False  # not a pytest class

    def __init__(self, problem: FlowTestProblem, *, workers: int | None = None,
                 scheduler: str | None = None, batch_size: int = 25) -> None:
        self.problem = problem
        n = len(problem.tests)
        rows = np.flatnonzero(problem.tests.usable)
        bs = max(1, int(batch_size))
        self.workers = _cores() if workers is None else max(1, int(workers))
        if not scheduler and self.workers > 1:
            bs = max(1, min(bs, -(-len(rows) // self.workers)))
        self.batches = [rows[i:i + bs] for i in range(0, len(rows), bs)]
        self.n = n
        self.scheduler = scheduler
        self.mode = "dask" if scheduler else ("processes" if self.workers > 1
                                              and len(self.batches) > 1 else "serial")
        self._pool: ProcessPoolExecutor | None = None
        self._client: Any = None
        self._shared: Any = None
        self.evaluations = 0

    def __enter__(self) -> TestRunner:
        if self.mode == "processes":
            self._pool = ProcessPoolExecutor(max_workers=min(self.workers, len(self.batches)),
                                             initializer=_init_worker,
                                             initargs=(self.problem,))
        elif self.mode == "dask":
            from gridflow.analysis.fireflow import connect_scheduler

            assert self.scheduler
            self._client = connect_scheduler(self.scheduler)
            self._shared = self._client.scatter(self.problem, broadcast=True, hash=False)
        return self

    def __exit__(self, *exc) -> None:
        if self._pool is not None:
            self._pool.shutdown()
        if self._client is not None:
            self._client.close()

    def run(self, factor_sets: list, *, static: bool = True) -> list[dict[str, np.ndarray]]:
        """One merged result (see :func:`simulate`) per entry of ``factor_sets``
        (an array of group factors, or None for the roughness as mapped)."""
        per: list[list[dict]] = [[] for _ in factor_sets]
        self.evaluations += len(factor_sets)
        jobs = [(k, rows, f) for k, f in enumerate(factor_sets) for rows in self.batches]
        if self.mode == "serial":
            for k, rows, f in jobs:
                per[k].append(simulate(self.problem, rows, f, static=static))
        elif self.mode == "processes":
            assert self._pool is not None
            futs = [self._pool.submit(_task_local, k, rows, f, static) for k, rows, f in jobs]
            for fut in futures_completed(futs):
                k, rec = fut.result()
                per[k].append(rec)
        else:
            from distributed import as_completed as dask_completed

            client = self._client
            futs = [client.submit(_task_dask, self._shared, k, rows, f, static, pure=False)
                    for k, rows, f in jobs]
            for fut in dask_completed(futs, loop=client.loop):
                k, rec = fut.result()
                per[k].append(rec)
                fut.release()
        return [merge(recs, self.n) for recs in per]
