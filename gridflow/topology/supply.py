"""Supply checks on the assembled network: closed valves that cut customers off from every
source, and pumps that push from a zone's higher grade to a lower one."""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely

from gridflow.network import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    NODE_JUNCTION,
    STATUS_CLOSED,
    VALVE_PRESSURE_REDUCING,
)
from gridflow.topology.clean import CleanNetwork
from gridflow.topology.nearest import nearest_lines
from gridflow.topology.records import Context
from gridflow.topology.zones import NetworkParts, components, network_parts

__all__ = ["isolation_findings", "pump_grade_findings"]


def isolation_findings(ctx: Context, clean: CleanNetwork,
                       parts: NetworkParts | None = None) -> dict[str, dict]:
    """A warning per area that closed valves (or closed mains, or pumps that are off) cut off
    from every source and tank while meters or hydrants sit in it.

    Returns {first valve id: {"valves", "nodes", "meters", "hydrants", "demand_m3s"}} for the
    areas reported (tests and the run record read it).
    """
    net = clean.network
    n = net.n_nodes
    if n == 0 or not net.is_fixed.any():
        return {}
    off = (net.status == STATUS_CLOSED) | ((net.link_kind == LINK_PUMP) & (net.pump_speed <= 0))
    if parts is None:
        parts = network_parts(net)
    comp = parts.open  # through the links not ``off``
    fed_c = np.zeros(int(comp.max()) + 1, bool)
    fed_c[comp[net.is_fixed]] = True
    fed = fed_c[comp]
    whole = parts.whole
    reach = np.zeros(int(whole.max()) + 1, bool)
    reach[whole[net.is_fixed]] = True
    cut = ~fed & reach[whole]
    if not cut.any():
        return {}
    # areas: cut nodes joined through open links and through closed links between cut nodes
    inner = ~off | (cut[net.from_idx] & cut[net.to_idx])
    area = components(n, net.from_idx[inner], net.to_idx[inner])
    area = np.where(cut, area, -1)
    boundary = off & (cut[net.from_idx] != cut[net.to_idx])
    b_area = np.where(cut[net.from_idx], area[net.from_idx], area[net.to_idx])
    hyd_area = area[clean.hydrants["node_idx"].to_numpy(dtype=np.int64)] if len(
        clean.hydrants) else np.zeros(0, np.int64)
    m_node, m_flow = _meter_nodes(ctx, clean)
    m_area = area[m_node[m_node >= 0]]
    m_flow = m_flow[m_node >= 0]
    junction = net.node_kind == NODE_JUNCTION
    dem_unit, dem_fac = _demand_unit(ctx)
    out: dict[str, dict] = {}
    valve_pts = np.asarray(clean.nodes.geometry.values, dtype=object)[net.from_idx]
    for a in np.unique(area[cut]):  # a few areas: not a hot path
        nodes = int((junction & (area == a)).sum())
        meters = int((m_area == a).sum())
        hydrants = int((hyd_area == a).sum())
        if meters == 0 and hydrants == 0:
            continue
        links = np.flatnonzero(boundary & (b_area == a))
        valves = net.link_id[links].tolist()
        demand = float(np.nansum(m_flow[m_area == a]))
        what = "closed valve" if (net.link_kind[links] == LINK_VALVE).all() else "closed link"
        plural = "s" if len(valves) > 1 else ""
        ctx.findings.add(
            "valve_isolates_customers", "warning", ctx.layer_name("valves"), valves[0],
            f"{what}{plural} {', '.join(valves)} cut off {nodes} nodes, {meters} meters, "
            f"{hydrants} hydrants and {demand * dem_fac:.4g} {dem_unit} of metered "
            "average-day demand from every source and tank",
            valve_pts[links[0]])
        out[valves[0]] = {"valves": valves, "nodes": nodes, "meters": meters,
                          "hydrants": hydrants, "demand_m3s": demand}
    return out


def _meter_nodes(ctx: Context, clean: CleanNetwork) -> tuple[np.ndarray, np.ndarray]:
    """Node (the nearer end of the nearest pipe) and average-day flow [m3/s] per meter."""
    meters = clean.meters
    net = clean.network
    if len(meters) == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    pipes = np.flatnonzero(net.link_kind == LINK_PIPE)
    geoms = np.asarray(clean.links.geometry.values, dtype=object)[pipes]
    pts = np.asarray(meters.geometry.values, dtype=object)
    ok = ~(shapely.is_missing(pts) | shapely.is_empty(pts))
    node = np.full(len(pts), -1, dtype=np.int64)
    if len(pipes) and ok.any():
        pi, li, _ = nearest_lines(shapely.STRtree(geoms), geoms, pts[ok])
        link = pipes[li]
        s = shapely.line_locate_point(geoms[li], pts[ok][pi])
        near_from = s <= shapely.length(geoms[li]) / 2
        node[np.flatnonzero(ok)[pi]] = np.where(near_from, net.from_idx[link], net.to_idx[link])
    flow = np.full(len(pts), np.nan)
    if "consumption" in meters:
        from gridflow.units import FLOW, to_si

        try:
            flow = np.asarray(to_si(meters["consumption"].to_numpy(dtype=float),
                                    ctx.cfg.demand.consumption_unit, FLOW, what="flow"))
        except Exception:  # the demand stage reports an unusable unit
            pass
    return node, flow


def _demand_unit(ctx: Context) -> tuple[str, float]:
    from gridflow.units import out_field

    return out_field("demand", ctx.cfg.run.units)


def pump_grade_findings(ctx: Context, net) -> None:
    """A warning per pump that, as its direction is mapped, pushes from its zone's higher grade
    to a lower one. A zone's grade is its highest source or tank head; where it has none, the
    grade a PRV into it holds (its downstream elevation plus its setting)."""
    pump = np.flatnonzero(net.link_kind == LINK_PUMP)
    if len(pump) == 0:
        return
    zone = pd.Series(net.zone.astype(str))
    grade = pd.Series(net.fixed_head_m).where(net.is_fixed).groupby(zone).max()
    prv = (net.link_kind == LINK_VALVE) & (net.valve_type == VALVE_PRESSURE_REDUCING)
    if prv.any():
        held = pd.Series(net.elevation_m[net.to_idx[prv]] + net.valve_setting[prv]).groupby(
            zone.to_numpy()[net.to_idx[prv]]).max()
        grade = grade.combine(held, lambda a, b: a if np.isfinite(a) else b)
    zs = zone.to_numpy()[net.from_idx[pump]]
    zd = zone.to_numpy()[net.to_idx[pump]]
    gs = grade.reindex(zs).to_numpy(dtype=float)
    gd = grade.reindex(zd).to_numpy(dtype=float)
    bad = (zs != zd) & np.isfinite(gs) & np.isfinite(gd) & (gs > gd)
    ctx.findings.add_many(
        "pump_against_grade", "warning", ctx.layer_name("pumps"), net.link_id[pump[bad]],
        [f"as mapped, the pump pushes from zone {a} (grade {x:.1f} m) into zone {b} (grade "
         f"{y:.1f} m), from the higher grade to the lower: check its direction "
         "(layers.pumps.fields.direction) or the digitised direction of its main"
         for a, b, x, y in zip(zs[bad], zd[bad], gs[bad], gd[bad])])
