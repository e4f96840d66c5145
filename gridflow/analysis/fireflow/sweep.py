"""The fire-flow sweep: build the problem, run the batches on a backend, assemble the table."""

from __future__ import annotations

import logging
import time
from collections.abc import Callable

import pandas as pd

from gridflow.analysis.fireflow.backends import (
    batches_for,
    default_workers,
    run_dask,
    run_processes,
    run_serial,
)
from gridflow.analysis.fireflow.problem import FireflowProblem
from gridflow.analysis.fireflow.results import assemble, base_below, summarise
from gridflow.config.fireflow import FireflowSection
from gridflow.config.sections import CriteriaSection
from gridflow.hydraulics import HydraulicResult, SolveOptions
from gridflow.network.model import Network

__all__ = ["CAUTION", "sweep"]

log = logging.getLogger("gridflow")

CAUTION = ("Fire-flow results are model estimates: field flow tests, local codes and licensed "
           "engineers decide.")


def sweep(net: Network, base: HydraulicResult, hydrants: pd.DataFrame, fire: FireflowSection,
          criteria: CriteriaSection | None = None, *, options: SolveOptions,
          workers: int | None = None, scheduler: str | None = None,
          progress: Callable[[int, int], None] | None = None) -> pd.DataFrame:
    """Available fire flow at every hydrant.

    Parameters
    ----------
    net : Network
        The base scenario's network (SI), as solved into ``base``.
    base : HydraulicResult
        The converged base solution of ``net`` (e.g. maximum day).
    hydrants : pandas.DataFrame
        Columns ``hydrant_id``, ``node_idx`` (position in ``net``), ``zone``,
        ``required_fire_flow_m3s`` (NaN: use the config's defaults), ``land_use``,
        ``lateral_length_m``, ``lateral_diameter_m`` (NaN: the config's defaults); optional
        ``in_service`` (boolean; absent or empty: in service).
    fire : FireflowSection
        Residual target, system minimum, whether velocity limits the draw, defaults,
        laterals, batch size.
    criteria : CriteriaSection, optional
        ``max_velocity_fire`` (default: :class:`CriteriaSection`'s): pipes faster during the
        draw are flagged, and limit the draw where ``fire.velocity_limit``.
    options : SolveOptions
        Solver options; ``fire.pressure_driven`` switches pressure-driven demand on for the
        fire-flow solves.
    workers : int, optional
        Local worker processes (default: the machine's cores); 1 runs in this process.
    scheduler : str, optional
        Address of a Dask distributed scheduler; the sweep then runs there (the problem is
        scattered once to every worker).
    progress : callable, optional
        ``progress(done, total)`` after every batch. Progress is also logged to the
        ``gridflow`` logger every ``fire.progress_every`` batches.

    Returns
    -------
    pandas.DataFrame
        One row per hydrant, in input order, SI units; columns
        :data:`~gridflow.analysis.fireflow.RESULT_COLUMNS`. ``available_flow_m3s`` is at the
        residual target at the outlet (after the lateral and hydrant losses) and after the
        system-wide limits; ``rated_flow_20psi_m3s`` is the hydrant's own flow at 20 psi
        residual (no system-wide limit), on which ``nfpa_class`` rests (NFPA 291 rates
        hydrants so); ``meets_required`` is 1 where ``available_flow_m3s`` reaches the
        required flow; ``residual_pressure_at_required_m`` is NaN where the required flow
        cannot be drawn with 0 psi or more at the outlet (``required_achievable`` 0, the flow
        at 0 psi in ``flow_at_0psi_m3s``). ``attrs`` hold ``base_below_minimum`` (node ids
        below the system minimum before any fire draw) and ``summary`` (counts over in-service
        hydrants, timing, factorizations, the caution).

    Raises
    ------
    InputError
        For an unusable hydrant table (naming the hydrant id and field).

    Notes
    -----
    Results are model estimates: field flow tests, local codes and licensed engineers decide.
    """
    t0 = time.perf_counter()
    problem = FireflowProblem.build(net, base, hydrants, fire, criteria, options=options)
    n = len(hydrants)
    every = max(1, int(fire.progress_every))
    done = [0, 0]
    nworkers = default_workers() if workers is None else max(1, int(workers))

    def report(rec):
        done[0] += len(rec["row"])
        done[1] += 1
        if progress is not None:
            progress(done[0], n)
        if done[1] % every == 0 or done[0] == n:
            log.info("fire flow: %d of %d hydrants (%d batches done)", done[0], n, done[1])

    records: list[dict] = []
    if n == 0:
        mode, slots, nb = "none", 1, 0
    elif scheduler:
        mode = "dask"
        records, slots, nb = run_dask(problem, n, fire.batch_size, scheduler, report)
    else:
        batches = batches_for(n, fire.batch_size, nworkers)
        nb = len(batches)
        if nworkers > 1 and len(batches) > 1:
            mode, slots = "processes", min(nworkers, nb)
            records = run_processes(problem, batches, nworkers, report)
        else:
            mode, slots = "serial", 1
            records = run_serial(problem, batches, report)
    out = assemble(problem, net, hydrants, records, n)
    below = base_below(net, base, fire.system_minimum)
    out.attrs["base_below_minimum"] = below
    summary = summarise(out, records)
    summary.update({"base_below_minimum": len(below), "mode": mode, "workers": slots,
                    "batches": nb, "seconds": round(time.perf_counter() - t0, 3),
                    "caution": CAUTION})
    out.attrs["summary"] = summary
    return out
