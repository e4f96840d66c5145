"""Worker records to the result table, its summary and the limiting-node table."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.analysis.fireflow.problem import FireflowProblem, hydrant_zone
from gridflow.analysis.fireflow.search import (
    LIM_FAILED,
    LIM_FIXED,
    LIM_NODE,
    LIM_OUT,
    LIM_RESIDUAL,
    LIM_STATIC,
    LIM_UNSUPPLIED,
    LIM_VELOCITY,
    LIMIT_CODES,
)
from gridflow.analysis.nfpa import GPM, nfpa_class
from gridflow.hydraulics import HydraulicResult
from gridflow.network.model import NODE_JUNCTION, Network

__all__ = ["RESULT_COLUMNS", "assemble", "base_below", "limiting_nodes", "summarise"]

RESULT_COLUMNS = [
    "hydrant_id", "node_id", "zone", "in_service", "static_pressure_m", "required_flow_m3s",
    "available_flow_m3s", "rated_flow_20psi_m3s", "residual_pressure_at_required_m",
    "required_achievable", "flow_at_0psi_m3s", "meets_required", "limited_by",
    "limiting_node_id", "limiting_pipe_id", "max_velocity_ms", "max_velocity_pipe_id",
    "high_velocity", "nfpa_class", "iterations",
]

_NUMERIC = {"available": np.nan, "q20": np.nan, "residual_at_required": np.nan, "q0": np.nan,
            "vmax": np.nan}
_INTEGER = {"achievable": -1, "limit": LIM_OUT, "limit_idx": -1, "vmax_idx": -1,
            "iterations": 0}


def _nullable(values: np.ndarray, valid: np.ndarray) -> pd.Series:
    """0/1 integers, null where ``valid`` is false (pandas' nullable Int8)."""
    return pd.Series(np.where(valid, values, 0), dtype="Int8").mask(~valid)


def assemble(problem: FireflowProblem, net: Network, hydrants: pd.DataFrame,
             records: list[dict], n: int) -> pd.DataFrame:
    """One row per hydrant, in input order (SI; columns :data:`RESULT_COLUMNS`)."""
    cols: dict[str, np.ndarray] = {k: np.full(n, v) for k, v in _NUMERIC.items()}
    cols.update({k: np.full(n, v, dtype=np.int64) for k, v in _INTEGER.items()})
    for rec in records:
        r = rec["row"]
        for k in cols:
            cols[k][r] = rec[k]
    limit, lidx = cols["limit"], cols["limit_idx"]
    main = problem.main_idx
    aug = problem.net
    figures = ~np.isin(limit, [LIM_OUT, LIM_FAILED, LIM_FIXED])
    code = np.array([LIMIT_CODES[int(c)] for c in range(len(LIMIT_CODES))], dtype=object)
    lim_node = np.full(n, "", dtype=object)
    own = np.isin(limit, [LIM_RESIDUAL, LIM_STATIC, LIM_UNSUPPLIED])
    lim_node[own] = aug.node_id[main[own]]
    hit = limit == LIM_NODE
    lim_node[hit] = aug.node_id[lidx[hit]]
    lim_pipe = np.full(n, "", dtype=object)
    hit = limit == LIM_VELOCITY
    lim_pipe[hit] = aug.link_id[lidx[hit]]
    vpipe = np.full(n, "", dtype=object)
    has_v = cols["vmax_idx"] >= 0
    vpipe[has_v] = aug.link_id[cols["vmax_idx"][has_v]]
    q20, avail = cols["q20"], cols["available"]
    # the class follows the written rated flow wherever there is one (none where unsupplied)
    cls = np.where(figures, nfpa_class(np.where(figures, q20, np.nan) / GPM), "")
    required = problem.required_m3s
    with np.errstate(invalid="ignore"):
        meets = (avail >= required * (1 - 1e-9)) & np.isfinite(avail)
        fast = cols["vmax"] > problem.max_velocity_ms
    achievable = cols["achievable"]
    return pd.DataFrame({
        "hydrant_id": hydrants["hydrant_id"].astype(str).to_numpy(dtype=object),
        "node_id": net.node_id[main],
        "zone": hydrant_zone(net, hydrants),
        "in_service": problem.in_service.astype(np.int8),
        "static_pressure_m": problem.warm.pressure_m[main],
        "required_flow_m3s": required,
        "available_flow_m3s": avail,
        "rated_flow_20psi_m3s": q20,
        "residual_pressure_at_required_m": cols["residual_at_required"],
        "required_achievable": _nullable(achievable, achievable >= 0).array,
        "flow_at_0psi_m3s": cols["q0"],
        "meets_required": _nullable(meets.astype(np.int8), figures).array,
        "limited_by": code[limit],
        "limiting_node_id": lim_node,
        "limiting_pipe_id": lim_pipe,
        "max_velocity_ms": cols["vmax"],
        "max_velocity_pipe_id": vpipe,
        "high_velocity": _nullable(fast.astype(np.int8), has_v & figures).array,
        "nfpa_class": cls,
        "iterations": cols["iterations"],
    }, index=hydrants.index)


def base_below(net: Network, base: HydraulicResult, minimum_m: float) -> list[str]:
    """Junctions already below the system minimum before any fire draw."""
    with np.errstate(invalid="ignore"):
        below = ((net.node_kind == NODE_JUNCTION) & base.supplied
                 & (base.pressure_m < minimum_m))
    return [str(v) for v in net.node_id[below]]


def limiting_nodes(out: pd.DataFrame) -> pd.DataFrame:
    """Per zone, the nodes that limit in-service hydrants at the system minimum, with how many
    hydrants each limits (most first): the bottlenecks to map."""
    h = out[(out["in_service"] == 1) & (out["limited_by"] == LIMIT_CODES[LIM_NODE])]
    if h.empty:
        return pd.DataFrame({"zone": [], "limiting_node_id": [], "hydrants": [],
                             "hydrant_ids": []})
    g = (h.groupby(["zone", "limiting_node_id"], sort=False)["hydrant_id"]
         .agg(hydrants="size", hydrant_ids=lambda s: ", ".join(sorted(map(str, s))))
         .reset_index())
    return g.sort_values(["hydrants", "zone", "limiting_node_id"],
                         ascending=[False, True, True], kind="stable").reset_index(drop=True)


def summarise(out: pd.DataFrame, records: list[dict]) -> dict:
    """Counts over in-service hydrants, and the work done."""
    ins = out[out["in_service"] == 1]
    by_code = ins["limited_by"].value_counts()
    summary = {
        "hydrants": int(len(ins)),
        "out_of_service": int(len(out) - len(ins)),
        "meets_required": int(ins["meets_required"].fillna(0).sum()),
        "required_not_achievable": int((ins["required_achievable"] == 0).sum()),
        "high_velocity": int(ins["high_velocity"].fillna(0).sum()),
    }
    for c in LIMIT_CODES.values():
        if c != LIMIT_CODES[LIM_OUT]:
            summary[f"limited_by_{c}"] = int(by_code.get(c, 0))
    summary.update({
        "iterations": int(out["iterations"].sum()),
        "factorizations": int(sum(int(r["factorizations"].sum()) for r in records)),
        "core_factorizations": int(sum(int(r["core_factorizations"].sum()) for r in records)),
        "fallback": int(sum(int(r["fallback"].sum()) for r in records)),
        "status_variant": int(sum(int(r["status_variant"].sum()) for r in records)),
    })
    return summary
