"""Running flow-test solves: in this process, on local processes, or on a Dask cluster.

Every test's solve is independent. A task is a batch of tests under one set of roughness
factors (:func:`simulate_task`); :class:`TestRunner` runs it on
:class:`gridflow.analysis.parallel.Backend`, which sends the problem to the workers once
(process initializer, or a Dask scatter); then only factors and row numbers travel.
"""

from __future__ import annotations

import logging

import numpy as np

from gridflow.analysis.flowtests import FlowTestProblem, merge, simulate
from gridflow.analysis.parallel import Backend

__all__ = ["TestRunner", "simulate_task"]

log = logging.getLogger("gridflow")


def simulate_task(problem: FlowTestProblem, rows: np.ndarray, factors, static: bool
                  ) -> dict[str, np.ndarray]:
    """The task: :func:`simulate` of a batch of tests under one set of factors."""
    return simulate(problem, rows, factors, static=static)


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
        self._backend = Backend(problem, workers=workers, scheduler=scheduler)
        self.workers = self._backend.workers
        if not scheduler and self.workers > 1:
            bs = max(1, min(bs, -(-len(rows) // self.workers)))
        self.batches = [rows[i:i + bs] for i in range(0, len(rows), bs)]
        self.n = n
        self.scheduler = scheduler
        self._backend.plan(len(self.batches))
        self.mode = self._backend.mode
        self.evaluations = 0

    def __enter__(self) -> TestRunner:
        self._backend.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self._backend.__exit__(*exc)

    def run(self, factor_sets: list, *, static: bool = True) -> list[dict[str, np.ndarray]]:
        """One merged result (see :func:`simulate`) per entry of ``factor_sets``
        (an array of group factors, or None for the roughness as mapped)."""
        per: list[list[dict]] = [[] for _ in factor_sets]
        self.evaluations += len(factor_sets)
        jobs = [(k, rows, f) for k, f in enumerate(factor_sets) for rows in self.batches]
        for j, rec in self._backend.run_jobs(simulate_task,
                                             [(rows, (f, static)) for _, rows, f in jobs]):
            per[jobs[j][0]].append(rec)
        return [merge(recs, self.n) for recs in per]
