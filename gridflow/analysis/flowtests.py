"""Field hydrant flow tests checked against the model.

A flow test (NFPA 291) flows one or more hydrants and reads the static and residual pressure at
a nearby residual hydrant. Here each test becomes a typed record of arrays
(:class:`FlowTestSet`): the residual node, the draws at the flowing hydrants' nodes, the demand
level it ran at, and the field pressures. :func:`simulate` solves the tests in the model (a pure
function of arrays, so that workers can run it); :func:`compare` sets model beside field,
with both flows extrapolated to 20 psi residual by the NFPA 291 formula.

Bad or inconsistent tests are not errors: :func:`prepare` returns them as problems naming the
test, and they are left out of error statistics and calibration.

Results are model estimates: field flow tests, local codes and licensed engineers decide.
"""

from __future__ import annotations

import datetime as _dt
import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from gridflow.analysis.nfpa import GPM, extrapolate_nfpa291, nozzle_flow_gpm
from gridflow.hydraulics import HydraulicSystem, SolveOptions
from gridflow.network import Network
from gridflow.units import INCH, M_HEAD_PER_PSI

__all__ = ["FlowTestSet", "FlowTestProblem", "FlowTestSummary", "prepare", "simulate", "merge",
           "compare", "summarise", "AVERAGE_DAY"]

#: the demand level of tests that name neither scenario nor factor
AVERAGE_DAY = "average day"
#: residual pressure at which both flows are compared (NFPA 291 hydrant rating)
TARGET_20PSI_M = 20 * M_HEAD_PER_PSI
#: smallest field pressure drop extrapolated to 20 psi: NFPA 291 asks for a drop of at least
#: 10 psi for a reliable result (from memory); smaller drops give implausibly large flows
MIN_DROP_M = 10 * M_HEAD_PER_PSI


@dataclass(frozen=True)
class FlowTestSet:
    """Flow tests as arrays (SI; pressures as metres of head), one entry per test.

    ``draw_ptr`` indexes ``draw_node``/``draw_m3s`` per test (CSR): test ``i`` draws
    ``draw_m3s[draw_ptr[i]:draw_ptr[i+1]]`` at those nodes. ``level`` indexes the demand
    levels (networks) of the problem; ``factor`` multiplies that level's demand.
    """

    test_id: np.ndarray
    residual_idx: np.ndarray
    level: np.ndarray
    factor: np.ndarray
    static_m: np.ndarray
    residual_m: np.ndarray
    flow_m3s: np.ndarray
    draw_ptr: np.ndarray
    draw_node: np.ndarray
    draw_m3s: np.ndarray
    usable: np.ndarray
    problem: np.ndarray

    def __len__(self) -> int:
        return len(self.test_id)


@dataclass(frozen=True)
class FlowTestProblem:
    """What a worker needs: the networks per demand level, solver options, the tests, and the
    roughness group of every link (-1: not in any group)."""

    nets: tuple[Network, ...]
    options: SolveOptions
    tests: FlowTestSet
    group: np.ndarray
    token: str = ""


def _split_ids(text) -> list[str]:
    if text is None or (isinstance(text, float) and np.isnan(text)):
        return []
    return [t.strip() for t in re.split(r"[;,]", str(text)) if t.strip()]


def prepare(tests: pd.DataFrame, outlets: pd.DataFrame | None, hydrants: pd.DataFrame,
            levels: list[str], *, default_level: str = "", coefficient: float = 0.9,
            max_age_years: int = 10, today: _dt.date | None = None) -> FlowTestSet:
    """Flow-test rows (as read, SI) to a :class:`FlowTestSet`, problems named per test.

    Parameters
    ----------
    tests : DataFrame
        ``test_id``, ``date``, ``residual_hydrant``, ``flowing_hydrants`` (ids separated by
        ``;`` or ``,``), ``static_pressure``, ``residual_pressure`` [m], and optionally
        ``total_flow`` [m3/s], ``scenario``, ``demand_factor``.
    outlets : DataFrame or None
        ``test``, ``hydrant``, ``pitot_pressure`` [m], ``outlet_diameter`` [m], optionally
        ``coefficient``. A test's outlets give its flows (NFPA 291 outlet formula); without
        them the total flow is shared equally by its flowing hydrants.
    hydrants : DataFrame
        Attached hydrants: ``hydrant_id``, ``node_idx``.
    levels : list of str
        Demand levels known: :data:`AVERAGE_DAY` first, then scenario names.
    default_level : str
        Scenario of tests that name none ('' : average day).
    max_age_years : int
        Older tests are problems (0: no limit); ``today`` is the reference date.
    """
    n = len(tests)
    today = today or _dt.datetime.now(_dt.UTC).date()
    problem = np.full(n, "", dtype=object)

    def flag(mask, text):
        mask = np.asarray(mask, bool) & (problem == "")
        if isinstance(text, str):
            problem[mask] = text
        else:
            problem[mask] = np.asarray(text, dtype=object)[mask]

    hyd_node = pd.Series(hydrants["node_idx"].to_numpy(np.int64),
                         index=hydrants["hydrant_id"].astype(str))
    res_id = tests["residual_hydrant"].astype(object).to_numpy()
    res_idx = hyd_node.reindex(pd.Index([str(v) for v in res_id])).to_numpy()
    res_ok = np.isfinite(res_idx.astype(float))
    res_idx = np.where(res_ok, res_idx, -1).astype(np.int64)
    flag(pd.isna(res_id), "no residual hydrant given")
    flag(~res_ok, [f"residual hydrant {v} is not attached to the network" for v in res_id])
    static = tests["static_pressure"].to_numpy(float)
    resid = tests["residual_pressure"].to_numpy(float)
    flag(~(np.isfinite(static) & np.isfinite(resid)), "static or residual pressure missing")
    flag(resid >= static, [f"residual pressure {r / M_HEAD_PER_PSI:.1f} psi is not below static "
                           f"{s / M_HEAD_PER_PSI:.1f} psi" for r, s in zip(resid, static)])
    flag((resid < 0) | (static <= 0), "pressure below zero gauge")
    date = pd.to_datetime(tests["date"], errors="coerce")
    flag(date.isna().to_numpy(), "test date missing or unreadable")
    if max_age_years > 0:
        cutoff = pd.Timestamp(today) - pd.DateOffset(years=max_age_years)
        old = (date < cutoff).fillna(False).to_numpy(bool)
        flag(old, f"test older than {max_age_years} years (flow_tests.max_age_years)")

    # demand level per test: scenario name, or a factor on average day
    level = np.zeros(n, dtype=np.int64)
    factor = np.ones(n)
    scen = (tests["scenario"].astype(object).to_numpy() if "scenario" in tests
            else np.full(n, None, dtype=object))
    fac = (tests["demand_factor"].to_numpy(float) if "demand_factor" in tests
           else np.full(n, np.nan))
    sc = pd.Series(scen, dtype=object)
    scen = sc.where(~(sc.isna() | (sc == "")), default_level or None).to_numpy(dtype=object)
    lookup = {name: i for i, name in enumerate(levels)}
    for i in range(n):
        if np.isfinite(fac[i]):
            factor[i] = fac[i]
        elif scen[i] is not None:
            name = str(scen[i])
            if name not in lookup:
                flag(np.arange(n) == i, f"scenario {name!r} is not in the config")
            else:
                level[i] = lookup[name]
    flag(~np.isfinite(factor) | (factor < 0), "demand factor below zero")

    # flows per flowing hydrant
    flowing = [_split_ids(v) for v in tests["flowing_hydrants"].to_numpy(dtype=object)]
    total = tests["total_flow"].to_numpy(float) if "total_flow" in tests else np.full(n, np.nan)
    per: list[dict[str, float]] = [{} for _ in range(n)]
    if outlets is not None and len(outlets):
        c = (outlets["coefficient"].to_numpy(float) if "coefficient" in outlets
             else np.full(len(outlets), np.nan))
        c = np.where(np.isfinite(c), c, coefficient)
        q = nozzle_flow_gpm(outlets["pitot_pressure"].to_numpy(float) / M_HEAD_PER_PSI,
                            outlets["outlet_diameter"].to_numpy(float) / INCH, c) * GPM
        pos = pd.Series(np.arange(n), index=tests["test_id"].astype(str))
        at = pos.reindex(outlets["test"].astype(str)).to_numpy()
        for k, (t, h) in enumerate(zip(at, outlets["hydrant"].astype(str))):
            if np.isfinite(t):
                d = per[int(t)]
                d[h] = d.get(h, 0.0) + q[k]
    nodes: list[list[int]] = []
    flows: list[list[float]] = []
    flow_total = np.full(n, np.nan)
    for i in range(n):
        ids = flowing[i]
        if per[i]:
            extra = [h for h in per[i] if h not in ids]
            if extra:
                flag(np.arange(n) == i, f"outlet at hydrant {extra[0]} which is not listed as "
                                        "flowing")
            q = [per[i].get(h, np.nan) for h in ids]
        elif np.isfinite(total[i]) and ids:
            q = [total[i] / len(ids)] * len(ids)
        else:
            q = []
        if not ids:
            flag(np.arange(n) == i, "no flowing hydrant given")
        elif not q or not np.all(np.isfinite(q)) or sum(q) <= 0:
            flag(np.arange(n) == i, "no flow: give total_flow or pitot readings per outlet")
        missing = [h for h in ids if h not in hyd_node.index]
        if missing:
            flag(np.arange(n) == i, f"flowing hydrant {missing[0]} is not attached to the "
                                    "network")
        if problem[i] == "":
            nodes.append([int(hyd_node[h]) for h in ids])
            flows.append(list(map(float, q)))
            flow_total[i] = float(np.sum(q))
        else:
            nodes.append([])
            flows.append([])
            if q and np.all(np.isfinite(q)):
                flow_total[i] = float(np.sum(q))
    ptr = np.zeros(n + 1, dtype=np.int64)
    ptr[1:] = np.cumsum([len(v) for v in nodes])
    return FlowTestSet(
        test_id=tests["test_id"].astype(str).to_numpy(dtype=object), residual_idx=res_idx,
        level=level, factor=factor, static_m=static, residual_m=resid, flow_m3s=flow_total,
        draw_ptr=ptr, draw_node=np.array([x for v in nodes for x in v], dtype=np.int64),
        draw_m3s=np.array([x for v in flows for x in v], dtype=float),
        usable=problem == "", problem=problem)


def link_roughness(problem: FlowTestProblem, level: int, factors: np.ndarray | None
                   ) -> np.ndarray:
    """Roughness of every link of a level's network with the group factors applied."""
    rough = problem.nets[level].roughness
    if factors is None:
        return rough
    g = problem.group
    f = np.where(g >= 0, np.asarray(factors, float)[np.maximum(g, 0)], 1.0)
    return rough * f


def simulate(problem: FlowTestProblem, rows: np.ndarray, factors: np.ndarray | None = None,
             *, static: bool = True, keep: bool = False) -> dict:
    """Solve the tests ``rows``: the static state and the state with the test's draws.

    A pure function of arrays (the worker task). ``factors`` scale each roughness group's
    roughness (None: as mapped).

    Returns
    -------
    dict of ndarray
        ``row``; ``static_m`` and ``residual_m`` (model pressures at the residual hydrant
        [m of head], NaN where not solved); ``supplied`` (the residual node supplied in the
        static state); ``converged``; ``mass_residual_m3s`` and ``head_residual_m`` (the
        solver's largest residuals over both solves); ``seconds``. With ``keep``, also
        ``solves``: per row the (network, static result or None, residual result), for checks.
    """
    import time

    t = problem.tests
    rows = np.asarray(rows, dtype=np.int64)
    m = len(rows)
    out: dict[str, Any] = {
        "row": rows, "static_m": np.full(m, np.nan), "residual_m": np.full(m, np.nan),
        "supplied": np.zeros(m, bool), "converged": np.zeros(m, bool),
        "mass_residual_m3s": np.full(m, np.nan), "head_residual_m": np.full(m, np.nan),
        "seconds": np.zeros(m)}
    kept: list = []
    systems: dict[int, HydraulicSystem] = {}
    shared = None
    for k, i in enumerate(rows):
        t0 = time.perf_counter()
        if not t.usable[i]:
            kept.append(None)
            continue
        lv = int(t.level[i])
        if lv not in systems:
            net = problem.nets[lv]
            if factors is not None:
                net = net.replace(roughness=link_roughness(problem, lv, factors))
            systems[lv] = HydraulicSystem(net, problem.options, share=shared)
            shared = systems[lv]
        system = systems[lv]
        base = system.net.demand_m3s * t.factor[i]
        j = int(t.residual_idx[i])
        warm = r0 = None
        mass, head = 0.0, 0.0
        ok = True
        if static:
            r0 = system.solve(demand_m3s=base, raise_on_failure=False)
            ok = bool(r0.converged)
            out["static_m"][k] = r0.pressure_m[j] if ok else np.nan
            out["supplied"][k] = bool(r0.supplied[j])
            mass, head = r0.mass_residual_m3s, r0.head_residual_m
            warm = r0 if ok else None
        else:
            out["supplied"][k] = True
        sl = slice(t.draw_ptr[i], t.draw_ptr[i + 1])
        d = base.copy()
        np.add.at(d, t.draw_node[sl], t.draw_m3s[sl])
        r1 = system.solve(demand_m3s=d, warm=warm, raise_on_failure=False)
        ok = ok and bool(r1.converged)
        out["residual_m"][k] = r1.pressure_m[j] if r1.converged else np.nan
        out["converged"][k] = ok
        out["mass_residual_m3s"][k] = max(mass, r1.mass_residual_m3s)
        out["head_residual_m"][k] = max(head, r1.head_residual_m)
        out["seconds"][k] = time.perf_counter() - t0
        kept.append((system.net, r0, r1, d))
    if keep:
        out["solves"] = kept
    return out


def merge(records: list[dict], n: int) -> dict[str, np.ndarray]:
    """Records of :func:`simulate` (any order) into arrays over all ``n`` tests."""
    keys = ("static_m", "residual_m", "mass_residual_m3s", "head_residual_m", "seconds")
    out: dict[str, np.ndarray] = {k: np.full(n, np.nan) for k in keys}
    out["supplied"] = np.zeros(n, bool)
    out["converged"] = np.zeros(n, bool)
    for rec in records:
        r = rec["row"]
        for k in (*keys, "supplied", "converged"):
            out[k][r] = rec[k]
    return out


def compare(tests: FlowTestSet, sim: dict[str, np.ndarray], *, tolerance_m: float,
            min_drop_m: float = MIN_DROP_M) -> pd.DataFrame:
    """Field beside model, per test (SI).

    Columns: ``test_id``, ``used`` (0/1: usable, supplied and solved), ``problem``,
    ``field_static_m``, ``model_static_m``, ``static_diff_m``, ``field_residual_m``,
    ``model_residual_m``, ``residual_diff_m`` (model minus field), ``field_flow_m3s``,
    ``field_flow_20psi_m3s``, ``model_flow_20psi_m3s`` (both by the NFPA 291 extrapolation at
    the test's flow; NaN where the field drop is below ``min_drop_m``, too small to
    extrapolate from), ``flow_20psi_diff_m3s``, ``out_of_tolerance`` (0/1).
    """
    problem = tests.problem.copy()
    solved = tests.usable & sim["converged"]
    unsup = tests.usable & sim["converged"] & ~sim["supplied"]
    problem[unsup] = "the residual hydrant's main is not supplied in the model (closed off)"
    problem[tests.usable & ~sim["converged"]] = "the model did not converge for this test"
    used = solved & ~unsup
    ms = np.where(used, sim["static_m"], np.nan)
    mr = np.where(used, sim["residual_m"], np.nan)
    q = tests.flow_m3s
    with np.errstate(invalid="ignore"):
        enough = (tests.static_m - tests.residual_m) >= min_drop_m
    fq = np.where(enough, extrapolate_nfpa291(tests.static_m, tests.residual_m, q,
                                              TARGET_20PSI_M), np.nan)
    mq = np.where(used & enough, extrapolate_nfpa291(ms, mr, q, TARGET_20PSI_M), np.nan)
    diff = mr - tests.residual_m
    with np.errstate(invalid="ignore"):
        out_tol = used & (np.abs(diff) > tolerance_m)
    return pd.DataFrame({
        "test_id": tests.test_id, "used": used.astype(np.int8), "problem": problem,
        "field_static_m": tests.static_m, "model_static_m": ms,
        "static_diff_m": ms - tests.static_m,
        "field_residual_m": tests.residual_m, "model_residual_m": mr, "residual_diff_m": diff,
        "field_flow_m3s": q, "field_flow_20psi_m3s": fq, "model_flow_20psi_m3s": mq,
        "flow_20psi_diff_m3s": mq - fq, "out_of_tolerance": out_tol.astype(np.int8),
    })


@dataclass(frozen=True)
class FlowTestSummary:
    """Count of tests, how many were compared, the mean absolute and the worst residual
    pressure error [m of head] and its test, and the tests out of tolerance."""

    tests: int
    used: int
    left_out: int
    mean_abs_error_m: float
    worst_error_m: float
    worst_test: str
    out_of_tolerance: tuple[str, ...]


def summarise(table: pd.DataFrame) -> FlowTestSummary:
    """The summary of a :func:`compare` table."""
    used = table["used"].to_numpy() == 1
    err = np.abs(table["residual_diff_m"].to_numpy(float)[used])
    worst = int(np.argmax(err)) if len(err) else -1
    return FlowTestSummary(
        tests=int(len(table)), used=int(used.sum()), left_out=int((~used).sum()),
        mean_abs_error_m=float(err.mean()) if len(err) else float("nan"),
        worst_error_m=float(err[worst]) if len(err) else float("nan"),
        worst_test=str(table["test_id"].to_numpy()[used][worst]) if len(err) else "",
        out_of_tolerance=tuple(str(v) for v in
                               table.loc[table["out_of_tolerance"] == 1, "test_id"]))
