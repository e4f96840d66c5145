"""Flow tests inside a job: build the problem from the config, solve, and make the
``flow_tests`` layer, its findings and its ``run_info`` rows.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from gridflow.analysis.flowtests import (
    AVERAGE_DAY,
    FlowTestProblem,
    FlowTestSet,
    compare,
    prepare,
    summarise,
)
from gridflow.findings import Findings
from gridflow.hydraulics import SolveOptions
from gridflow.units import out_field

__all__ = ["build_problem", "flow_tests_step", "flow_tests_layer", "previous_errors"]

log = logging.getLogger("gridflow")


def level_networks(cfg, clean, alloc) -> tuple[list[str], list]:
    """Demand levels: average day (the first scenario's network at average-day demand),
    then every scenario by name."""
    from gridflow.demand import scenario_network

    names = list(cfg.scenarios)
    nets = [scenario_network(cfg, clean, alloc, n) for n in names]
    avg = nets[0].replace(demand_m3s=np.asarray(alloc.node_demand_m3s, float))
    return [AVERAGE_DAY, *names], [avg, *nets]


def build_problem(cfg, clean, alloc, findings: Findings, options: SolveOptions,
                  group: np.ndarray | None = None):
    """The flow tests of the config as a :class:`FlowTestProblem` (None: none mapped), the
    tables as read, and the test geometries."""
    from gridflow.io.flowtests import read_flow_tests

    tables = read_flow_tests(cfg, clean.crs, findings)
    if tables is None:
        return None, None, None
    levels, nets = level_networks(cfg, clean, alloc)
    hyd = pd.DataFrame(clean.hydrants.drop(columns="geometry"))
    sec = cfg.flow_tests
    tests = prepare(tables.tests, tables.outlets, hyd, levels, default_level=sec.scenario,
                    coefficient=sec.coefficient, max_age_years=sec.max_age_years)
    g = np.full(nets[0].n_links, -1, np.int64) if group is None else group
    problem = FlowTestProblem(tuple(nets), options, tests, g, token=cfg.sha256[:12])
    geom = _geometry(tables, clean, tests)
    return problem, tables, geom


def _geometry(tables, clean, tests: FlowTestSet) -> np.ndarray:
    """The test layer's own points, else the residual hydrant's point."""
    n = len(tests)
    geom = np.full(n, None, dtype=object)
    if tables.geometry is not None:
        geom[:] = tables.geometry
    hyd = clean.hydrants
    at = pd.Series(np.arange(len(hyd)), index=hyd["hydrant_id"].astype(str))
    res = tables.tests["residual_hydrant"].astype(str).to_numpy()
    pos = at.reindex(res).to_numpy()
    fill = np.array([g is None for g in geom]) & np.isfinite(pos.astype(float))
    geom[fill] = hyd.geometry.values[pos[fill].astype(np.int64)]
    return geom


def flow_tests_layer(table: pd.DataFrame, tables, geom, crs, system: str,
                     previous: pd.DataFrame | None = None) -> gpd.GeoDataFrame:
    """The ``flow_tests`` layer in the run's units (fields named with their unit)."""
    p_suf, p_f = out_field("pressure", system)
    q_suf, q_f = out_field("flow", system)
    t = tables.tests
    date = pd.to_datetime(t["date"], errors="coerce").dt.strftime("%Y-%m-%d")
    cols: dict[str, object] = {
        "test_id": table["test_id"].astype(str),
        "test_date": date.fillna("").to_numpy(dtype=object),
        "residual_hydrant_id": t["residual_hydrant"].astype(object).fillna("").astype(str),
        "flowing_hydrant_ids": t["flowing_hydrants"].astype(object).fillna("").astype(str),
        "used": table["used"].astype(np.int32),
        "problem": table["problem"].astype(str),
    }
    for stem in ("field_static", "model_static", "static_diff", "field_residual",
                 "model_residual", "residual_diff"):
        cols[f"{stem}_pressure_{p_suf}" if "diff" not in stem else f"{stem}_{p_suf}"] = \
            table[f"{stem}_m"].to_numpy(float) * p_f
    for stem in ("field_flow", "field_flow_20psi", "model_flow_20psi", "flow_20psi_diff"):
        cols[f"{stem}_{q_suf}"] = table[f"{stem}_m3s"].to_numpy(float) * q_f
    cols["out_of_tolerance"] = table["out_of_tolerance"].astype(np.int32)
    if previous is not None:
        prev = previous.reindex(table["test_id"].astype(str)).to_numpy(float)
        now = np.abs(table["residual_diff_m"].to_numpy(float) * p_f)
        cols[f"previous_residual_diff_{p_suf}"] = prev
        cols[f"abs_error_change_{p_suf}"] = now - np.abs(prev)
    return gpd.GeoDataFrame(pd.DataFrame(cols).reset_index(drop=True),
                            geometry=gpd.GeoSeries(list(geom), crs=crs), crs=crs)


def previous_errors(path: str | Path, system: str) -> pd.Series | None:
    """Last run's residual-pressure error per test, or None (no such layer)."""
    import pyogrio

    p_suf, _ = out_field("pressure", system)
    try:
        names = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
        if "flow_tests" not in names:
            return None
        df = pyogrio.read_dataframe(path, layer="flow_tests", read_geometry=False,
                                    columns=["test_id", f"residual_diff_{p_suf}"])
    except Exception:
        return None
    return pd.Series(df[f"residual_diff_{p_suf}"].to_numpy(float),
                     index=df["test_id"].astype(str))


def flow_tests_step(cfg, clean, alloc, options: SolveOptions, findings: Findings,
                    info: list, *, previous: str | Path | None = None,
                    workers: int | None = None, scheduler: str | None = None):
    """Simulate every mapped flow test; returns the ``flow_tests`` layer (or None) and the
    summary (SI). Adds findings for bad tests and ``flow_tests:*`` rows to ``info``."""
    from gridflow.analysis.flowtest_workers import TestRunner

    if cfg.layers.flow_tests is None or not cfg.flow_tests.enabled:
        return None, None
    t0 = time.perf_counter()
    problem, tables, geom = build_problem(cfg, clean, alloc, findings, options)
    with TestRunner(problem, workers=workers, scheduler=scheduler,
                    batch_size=cfg.flow_tests.batch_size) as runner:
        sim = runner.run([None])[0]
        mode = runner.mode
    table = compare(problem.tests, sim, tolerance_m=cfg.flow_tests.tolerance)
    bad = table["problem"].to_numpy(dtype=object) != ""
    if bad.any():
        findings.add_many("flow_test_left_out", "warning", tables.layer,
                          list(table["test_id"].to_numpy()[bad]),
                          [f"flow test left out: {m}" for m in table["problem"].to_numpy()[bad]],
                          list(geom[bad]))
    prev = previous_errors(previous, cfg.run.units) if previous else None
    layer = flow_tests_layer(table, tables, geom, clean.crs, cfg.run.units, prev)
    s = summarise(table)
    p_suf, p_f = out_field("pressure", cfg.run.units)
    used = table["used"].to_numpy() == 1
    info += [("flow_tests:count", str(s.tests)), ("flow_tests:used", str(s.used)),
             ("flow_tests:left_out", str(s.left_out)),
             (f"flow_tests:mean_abs_error_{p_suf}", f"{s.mean_abs_error_m * p_f:.2f}"),
             (f"flow_tests:worst_error_{p_suf}", f"{s.worst_error_m * p_f:.2f}"),
             ("flow_tests:worst_test", s.worst_test),
             ("flow_tests:out_of_tolerance", str(len(s.out_of_tolerance))),
             (f"flow_tests:tolerance_{p_suf}", f"{cfg.flow_tests.tolerance * p_f:.2f}"),
             ("flow_tests:mass_residual_m3s",
              f"{np.nanmax(sim['mass_residual_m3s'][used], initial=0.0):.3e}"),
             ("flow_tests:head_residual_m",
              f"{np.nanmax(sim['head_residual_m'][used], initial=0.0):.3e}"),
             ("flow_tests:mode", mode),
             ("flow_tests:seconds", f"{time.perf_counter() - t0:.2f}")]
    log.info("flow tests: %d used of %d, mean error %.2f %s, %d out of tolerance", s.used,
             s.tests, s.mean_abs_error_m * p_f, p_suf, len(s.out_of_tolerance))
    return layer, s
