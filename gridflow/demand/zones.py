"""Point demands, zone production spread as non-revenue water, and totals per zone."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.demand.records import Context, MeterResult, ZoneCategoryTotal
from gridflow.errors import ConfigError
from gridflow.network.model import LINK_PIPE, NODE_JUNCTION, Network

__all__ = ["point_demands", "spread_zones", "zone_totals"]


def point_demands(ctx: Context, clean, meters: MeterResult) -> dict[str, np.ndarray]:
    """Point demands from the config, at a node, a hydrant's node or where a meter went."""
    net = ctx.net
    out: dict[str, np.ndarray] = {}
    points = ctx.cfg.demand.points
    if not points:
        return out
    node_pos = pd.Index(np.asarray(net.node_id).astype(str))
    hyd = getattr(clean, "hydrants", None)
    hyd_ids = (pd.Index(hyd["hydrant_id"].astype(str)) if hyd is not None and len(hyd)
               and "hydrant_id" in hyd.columns else pd.Index([], dtype=object))
    meter_pos = pd.Index(pd.Series(meters.meter_id).astype(str))
    fixed = np.asarray(net.node_kind) != NODE_JUNCTION
    for i, p in enumerate(points):  # a few configured users
        key = f"demand.points[{i}].node"
        arr = out.setdefault(p.category, np.zeros(net.n_nodes))
        j = node_pos.get_indexer([p.node])[0]
        if j < 0 and hyd is not None and p.node in hyd_ids:
            j = int(np.asarray(hyd["node_idx"])[hyd_ids.get_indexer([p.node])[0]])
        if j >= 0:
            if fixed[j]:
                raise ConfigError(f"config key {key} names {p.node!r}, a tank or source; a "
                                  "point demand must be at a junction", key=key)
            arr[j] += p.flow
            continue
        mk = meter_pos.get_indexer([p.node])[0] if meter_pos.is_unique else (
            int(np.flatnonzero(meter_pos == p.node)[0]) if p.node in meter_pos else -1)
        if mk < 0:
            raise ConfigError(f"config key {key} names {p.node!r}, which is not a node, hydrant "
                              "or meter id", key=key)
        li = meters.link_idx[mk]
        if li < 0:
            ctx.findings.add("point_demand_unallocated", "warning", ctx.meter_layer, p.node,
                             f"point demand at meter {p.node} ({key}) is not placed: the meter "
                             "could not be allocated to a main")
            continue
        s = meters.to_share[mk]
        arr[net.from_idx[li]] += p.flow * (1.0 - s)
        arr[net.to_idx[li]] += p.flow * s
    return {c: a for c, a in out.items() if a.any()}


def sum_parts(*parts: dict[str, np.ndarray]) -> np.ndarray | None:
    total = None
    for part in parts:
        for arr in part.values():
            total = arr.copy() if total is None else total + arr
    return total


def length_weights(net: Network, junction: np.ndarray) -> np.ndarray:
    """Half the length of every pipe at each junction; a pipe's half at a fixed-head end goes
    to its other end."""
    pipe = np.asarray(net.link_kind) == LINK_PIPE
    f, t = net.from_idx[pipe], net.to_idx[pipe]
    half = 0.5 * np.asarray(net.length_m)[pipe]
    to_f = np.where(junction[f], half, 0.0) + np.where(~junction[t], half, 0.0)
    to_t = np.where(junction[t], half, 0.0) + np.where(~junction[f], half, 0.0)
    n = net.n_nodes
    return np.bincount(f, to_f, minlength=n) + np.bincount(t, to_t, minlength=n)


def spread_zones(ctx: Context, node_zone: np.ndarray, junction: np.ndarray,
                  metered: dict[str, np.ndarray], point: dict[str, np.ndarray],
                  meter_weights: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Production minus metered and point use, spread over each zone with a production."""
    net, dem = ctx.net, ctx.cfg.demand
    n = net.n_nodes
    out: dict[str, np.ndarray] = {}
    known = np.unique(node_zone)
    used = sum_parts(metered, point)
    weights_m = sum_parts(meter_weights)
    length_w = None
    for name, zsec in dem.zones.items():  # a handful of zones
        key = f"demand.zones.{name}"
        in_zone = (node_zone == name) & junction
        if not in_zone.any():
            listed = ", ".join(repr(str(z)) for z in known if z) or "none"
            raise ConfigError(f"config key {key} names zone {name!r}, which has no junctions in "
                              f"the network (zones: {listed})", key=key)
        use_z = float(used[in_zone].sum()) if used is not None else 0.0
        rest = zsec.production - use_z
        if rest < 0:
            ctx.findings.add("zone_overmetered", "warning", "zones", name,
                             f"zone {name}: metered and point use {use_z:.6g} m3/s exceeds the "
                             f"production {zsec.production:.6g} m3/s ({key}.production); "
                             "nothing spread")
            continue
        w = None
        if dem.spread == "meters":
            if weights_m is not None and weights_m[in_zone].sum() > 0:
                w = np.where(in_zone, weights_m, 0.0)
            else:
                ctx.findings.add("zone_spread_fallback", "info", "zones", name,
                                 f"zone {name}: no metered demand to spread by; spread by pipe "
                                 "length instead")
        if w is None:
            if length_w is None:
                length_w = length_weights(net, junction)
            w = np.where(in_zone, length_w, 0.0)
            if w.sum() <= 0:
                w = in_zone.astype(float)
        arr = out.setdefault(zsec.nrw_category, np.zeros(n))
        arr += rest * (w / w.sum())
    if dem.method == "zone_total":
        missing = [z for z in known if z not in dem.zones and (node_zone[junction] == z).any()]
        for z in missing:
            ctx.findings.add("zone_without_production", "warning", "zones", z,
                             f"zone {z or '(none)'} has no production in [demand.zones]; its "
                             "nodes get no demand")
    return {c: a for c, a in out.items() if a.any()}


def zone_totals(node_zone: np.ndarray, metered: dict, spread: dict,
                point: dict) -> list[ZoneCategoryTotal]:
    zones, zcode = np.unique(node_zone, return_inverse=True)
    nz = len(zones)
    cats = list(dict.fromkeys(list(metered) + list(spread) + list(point)))
    rows = []
    per = {}
    for name, part in (("metered", metered), ("spread", spread), ("point", point)):
        per[name] = {c: np.bincount(zcode, weights=a, minlength=nz) for c, a in part.items()}
    zero = np.zeros(nz)
    for zi, z in enumerate(zones):
        for c in cats:
            vals = [float(per[p].get(c, zero)[zi]) for p in ("metered", "spread", "point")]
            if any(vals):
                rows.append(ZoneCategoryTotal(str(z), c, *vals))
    return rows
