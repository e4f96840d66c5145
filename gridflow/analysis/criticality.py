"""Shutdown criticality: close each segment's valves, solve, count what is lost.

For every valve segment (:mod:`gridflow.analysis.segments`) the segment's isolating valves are
closed in a chosen scenario's network and the network is solved again, warm-started from the
scenario's solution and sharing its ordering and symbolic factorization (same pattern, only
statuses change). Compared with the scenario, a closure can leave nodes without supply (the
segment itself and whatever only it fed) and leave others supplied but below the minimum
pressure. The counts per segment rank the segments by the customers a break there affects.

The work is a pure function of arrays in and small records out (:class:`ClosureProblem`), so it
runs the same in this process, on local processes, or on a Dask cluster (see
:func:`closure_sweep`), and a single "what if these valves close" question uses the same code
(:meth:`ClosureProblem.close`).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from gridflow.analysis.parallel import Backend
from gridflow.analysis.segments import Segments
from gridflow.errors import ConvergenceError
from gridflow.hydraulics import HydraulicResult, HydraulicSystem, SolveOptions
from gridflow.network import STATUS_CLOSED, Network

__all__ = ["ClosureProblem", "ClosureOutcome", "closure_sweep", "RECORD_FIELDS"]

log = logging.getLogger("gridflow")

#: per-segment figures returned by a sweep (arrays over segments)
RECORD_FIELDS = ("converged", "iterations", "nodes_out", "meters_out", "demand_out_m3s",
                 "hydrants_out", "nodes_low", "meters_low", "demand_low_m3s",
                 "worst_drop_m", "worst_drop_node_idx")


@dataclass(frozen=True)
class ClosureOutcome:
    """What closing a set of links does to a solved scenario (SI).

    ``out`` marks nodes supplied before and not after; ``low`` nodes supplied after but newly
    below the minimum pressure; ``worst_drop_m`` is the largest pressure drop at a node
    supplied before and after (``worst_drop_node_idx`` where, -1 if none).
    """

    result: HydraulicResult
    out: np.ndarray
    low: np.ndarray
    worst_drop_m: float
    worst_drop_node_idx: int


@dataclass
class ClosureProblem:
    """A scenario's solved state and the per-node counts that closures are measured in.

    Parameters
    ----------
    net : Network
        The scenario's network (SI).
    base : HydraulicResult
        Its converged solution.
    options : SolveOptions
    min_pressure_m : float
        Pressure [m of head] below which a supplied node counts as affected.
    meters_per_node, hydrants_per_node : ndarray
        Counts per node (meters by the node their demand mostly went to).
    segments : Segments, optional
        For :meth:`run` (segment rows); not needed for :meth:`close`.
    """

    net: Network
    base: HydraulicResult
    options: SolveOptions
    min_pressure_m: float
    meters_per_node: np.ndarray
    hydrants_per_node: np.ndarray
    segments: Segments | None = None
    _system: HydraulicSystem | None = field(default=None, repr=False, compare=False)

    def __getstate__(self):  # the kept factorization stays where it was made
        state = dict(self.__dict__)
        state["_system"] = None
        return state

    @property
    def system(self) -> HydraulicSystem:
        if self._system is None:
            self._system = HydraulicSystem(self.net, self.options)
        return self._system

    def close(self, links: np.ndarray, drained: np.ndarray | None = None) -> ClosureOutcome:
        """Close the given links (positions) and solve; compare with the base solution.

        ``drained`` (bool per node) marks nodes out of water whatever the solve says: the
        broken segment itself, even where it holds a source or tank.

        Raises
        ------
        ConvergenceError
            If the closed network does not converge.
        """
        status = self.net.status.copy()
        status[np.asarray(links, dtype=np.int64)] = STATUS_CLOSED
        net = self.net.replace(status=status)
        system = HydraulicSystem(net, self.options, share=self.system)
        r = system.solve(warm=self.base)
        before = self.base.supplied
        out = before & ~r.supplied
        if drained is not None:
            out |= before & drained
        both = before & r.supplied & ~out
        p0, p1 = self.base.pressure_m, r.pressure_m
        low = both & (p1 < self.min_pressure_m) & ~(p0 < self.min_pressure_m)
        drop = np.where(both, p0 - p1, -np.inf)
        k = int(np.argmax(drop)) if drop.size else -1
        worst = float(drop[k]) if k >= 0 and np.isfinite(drop[k]) else 0.0
        return ClosureOutcome(result=r, out=out, low=low, worst_drop_m=max(worst, 0.0),
                              worst_drop_node_idx=k if worst > 0 else -1)

    def run(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """Close each segment in ``rows`` in turn: one record array per field."""
        assert self.segments is not None
        n = len(rows)
        rec: dict[str, np.ndarray] = {
            "row": np.asarray(rows, dtype=np.int64),
            "converged": np.zeros(n, dtype=bool), "iterations": np.zeros(n, dtype=np.int64),
            "worst_drop_node_idx": np.full(n, -1, dtype=np.int64)}
        for name in ("nodes_out", "meters_out", "demand_out_m3s", "hydrants_out", "nodes_low",
                     "meters_low", "demand_low_m3s", "worst_drop_m"):
            rec[name] = np.full(n, np.nan)
        demand = self.base.demand_m3s
        for k, s in enumerate(rows):
            valves = self.segments.valves_of(int(s))
            if valves.size == 0:  # nothing to close: the segment cannot be isolated
                continue
            try:
                o = self.close(valves, self.segments.node_segment == s)
            except ConvergenceError:
                continue
            rec["converged"][k] = True
            rec["iterations"][k] = o.result.iterations
            rec["nodes_out"][k] = o.out.sum()
            rec["meters_out"][k] = self.meters_per_node[o.out].sum()
            rec["demand_out_m3s"][k] = demand[o.out].sum()
            rec["hydrants_out"][k] = self.hydrants_per_node[o.out].sum()
            rec["nodes_low"][k] = o.low.sum()
            rec["meters_low"][k] = self.meters_per_node[o.low].sum()
            rec["demand_low_m3s"][k] = o.result.required_demand_m3s[o.low].sum()
            rec["worst_drop_m"][k] = o.worst_drop_m
            rec["worst_drop_node_idx"][k] = o.worst_drop_node_idx
        return rec


# ---------------------------------------------------------------------- execution


def close_segments(problem: ClosureProblem, rows: np.ndarray) -> dict[str, np.ndarray]:
    """The task :func:`closure_sweep` runs: a pure function of the problem and segment rows."""
    return problem.run(rows)


def closure_sweep(problem: ClosureProblem, *, batch_size: int = 50,
                  workers: int | None = None, scheduler: str | None = None,
                  progress: Callable[[int, int], None] | None = None
                  ) -> tuple[dict[str, np.ndarray], dict]:
    """Close every segment of ``problem.segments`` in turn; figures per segment, in order.

    Runs on :class:`gridflow.analysis.parallel.Backend`: batches of at most ``batch_size``
    segments, sized so each worker gets several; the problem is shipped to each worker once.
    Results do not depend on how the work is split.

    Returns
    -------
    records : dict of str to ndarray
        :data:`RECORD_FIELDS`, one value per segment (NaN / not converged for segments
        without isolating valves).
    summary : dict
        ``mode``, ``workers``, ``batches``, ``seconds``.
    """
    assert problem.segments is not None
    t0 = time.perf_counter()
    n = problem.segments.n
    done = [0]
    parts: list[dict] = []
    with Backend(problem, workers=workers, scheduler=scheduler) as backend:
        batches = backend.batches(np.arange(n, dtype=np.int64), batch_size)
        for _, rec in backend.run(close_segments, batches):
            parts.append(rec)
            done[0] += len(rec["row"])
            if progress is not None:
                progress(done[0], n)
        mode, slots = backend.mode, backend.slots
    records: dict[str, np.ndarray] = {}
    if parts:
        order = np.argsort(np.concatenate([p["row"] for p in parts]), kind="stable")
        for name in RECORD_FIELDS:
            records[name] = np.concatenate([p[name] for p in parts])[order]
    summary = {"mode": mode, "workers": slots,
               "batches": len(batches), "seconds": round(time.perf_counter() - t0, 3)}
    log.info("segment closures: %d segments in %.1f s (%s)", n, summary["seconds"], mode)
    return records, summary
