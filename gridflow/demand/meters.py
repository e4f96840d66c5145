"""Meters to mains: each customer meter to the nearest eligible main, split between its ends.

One STRtree nearest query per meter zone (not per meter), then the meter's flow is split
between the main's end nodes by where along the main it lands (``split = "linear"``) or given
to the nearer end (``split = "nearest"``). This is the one part of ``gridflow.demand`` that
touches geometry; everything after it is arrays.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely

from gridflow.demand.categories import as_codes, meter_categories, meter_field
from gridflow.demand.records import Context, MeterResult
from gridflow.errors import ConfigError, InputError
from gridflow.network.model import LINK_PIPE, NODE_JUNCTION, STATUS_CLOSED, Network
from gridflow.topology.nearest import nearest_lines
from gridflow.units import FLOW, to_si

__all__ = ["accumulate", "allocate_meters", "split_to_nodes"]


def meter_consumption(ctx: Context, meters, ids: np.ndarray, geoms: np.ndarray) -> np.ndarray:
    """Consumption in m3/s; NaN (and a finding naming the meter) where unusable."""
    raw = meters["consumption"]
    num = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    missing = raw.isna().to_numpy()
    bad = ~np.isfinite(num) | (num < 0)
    if bad.any():
        k = np.flatnonzero(bad)
        field_name = meter_field(ctx.cfg, "consumption")
        raw_values = raw.to_numpy()[k]
        msgs = [f"meter {i}: consumption (field {field_name}) is missing; not allocated" if miss
                else f"meter {i}: consumption {v!r} (field {field_name}) is not a number >= 0; "
                     "not allocated"
                for i, v, miss in zip(ids[k], raw_values, missing[k])]
        ctx.findings.add_many("meter_bad_consumption", "warning", ctx.meter_layer,
                              ids[k].tolist(), msgs, geoms[k].tolist())
    try:
        flow = to_si(num, ctx.cfg.demand.consumption_unit, FLOW, what="flow")
    except KeyError as exc:
        raise ConfigError(f"config key demand.consumption_unit: {exc.args[0]}",
                          key="demand.consumption_unit") from None
    flow[bad] = np.nan
    return flow


def link_orientation(clean, net: Network, lines: np.ndarray, link_idx: np.ndarray) -> np.ndarray:
    """True where a link's geometry runs from its ``to`` node to its ``from`` node (its first
    vertex nearer the ``to`` node's point), from coordinate arrays, once per link."""
    nodes = getattr(clean, "nodes", None)
    if nodes is None or len(link_idx) == 0:
        return np.zeros(len(link_idx), bool)
    used = np.zeros(len(lines), dtype=bool)
    used[link_idx] = True
    links = np.flatnonzero(used)
    back = (np.cumsum(used) - 1)[link_idx]
    xy, which = shapely.get_coordinates(lines[links], return_index=True)
    start = np.full((len(links), 2), np.nan)
    first = np.r_[True, which[1:] != which[:-1]] if len(which) else np.zeros(0, bool)
    start[which[first]] = xy[first]
    g = np.asarray(nodes.geometry.array)
    node_xy = np.column_stack([shapely.get_x(g), shapely.get_y(g)])  # NaN where no point
    a, b = node_xy[net.from_idx[links]], node_xy[net.to_idx[links]]
    d_from = np.hypot(start[:, 0] - a[:, 0], start[:, 1] - a[:, 1])
    d_to = np.hypot(start[:, 0] - b[:, 0], start[:, 1] - b[:, 1])
    return (d_to < d_from)[back]


def allocate_meters(ctx: Context, clean, meters, replaced: set[str]) -> MeterResult:
    net, dem = ctx.net, ctx.cfg.demand
    for col in ("meter_id", "consumption"):
        if col not in meters.columns:
            raise InputError(f"meter layer {ctx.meter_layer} has no {col} column",
                             layer=ctx.meter_layer, field=col)
    crs_net = getattr(clean, "crs", None)
    if crs_net is not None and meters.crs is not None and meters.crs != crs_net:
        raise InputError(f"meter layer {ctx.meter_layer} is in {meters.crs.to_string()}, the "
                         f"network in {crs_net}; reproject the meters to the working CRS "
                         "before allocating", layer=ctx.meter_layer)
    m = len(meters)
    ids = meters["meter_id"].to_numpy()
    geoms = np.asarray(meters.geometry.array)
    flow = meter_consumption(ctx, meters, ids, geoms)
    cat_code, cat_names = meter_categories(ctx, meters, ids, geoms)

    # points: centroids for non-point geometries; missing/empty -> no location
    no_loc = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    pts = geoms.copy()
    not_point = ~no_loc & (shapely.get_type_id(geoms) != 0)
    if not_point.any():
        pts[not_point] = shapely.centroid(geoms[not_point])
    usable = np.isfinite(flow) & ~no_loc

    # eligible mains
    lines = np.asarray(clean.links.geometry.array)
    fixed_node = np.asarray(net.node_kind) != NODE_JUNCTION
    pipe = np.asarray(net.link_kind) == LINK_PIPE
    has_line = ~(shapely.is_missing(lines) | shapely.is_empty(lines))
    eligible = (pipe & has_line & (np.asarray(net.status) != STATUS_CLOSED)
                & ~(fixed_node[net.from_idx] & fixed_node[net.to_idx]))
    if dem.max_main_diameter > 0:
        eligible &= ~(np.asarray(net.diameter_m) > dem.max_main_diameter)
    zone = np.asarray(net.zone).astype(str)
    link_zone = np.where(zone[net.from_idx] != "", zone[net.from_idx], zone[net.to_idx])

    if dem.same_zone and "zone" in meters.columns:
        zcodes, zuniq = as_codes(meters["zone"])
    else:
        zcodes, zuniq = np.full(m, -1, dtype=np.int64), np.empty(0, dtype=object)

    max_distance = dem.search_distance if dem.search_distance > 0 else None
    link_idx = np.full(m, -1, dtype=np.int64)
    dist = np.full(m, np.nan)
    # one nearest query per meter zone (a handful), never per meter
    for zc in np.unique(zcodes[usable]):
        sel = np.flatnonzero(usable & (zcodes == zc))
        cand = np.flatnonzero(eligible if zc < 0 else eligible & (link_zone == zuniq[zc]))
        if len(cand) == 0:
            continue
        tree = shapely.STRtree(lines[cand])
        q, t, d = nearest_lines(tree, lines[cand], pts[sel], max_distance)
        link_idx[sel[q]] = cand[t]
        dist[sel[q]] = d

    done = link_idx >= 0
    k = np.flatnonzero(done)
    li = link_idx[k]
    t = shapely.line_locate_point(lines[li], pts[k], normalized=True)
    t = np.clip(np.nan_to_num(t, nan=0.0), 0.0, 1.0)
    flip = link_orientation(clean, net, lines, li)
    t = np.where(flip, 1.0 - t, t)
    if dem.split == "nearest":
        t = (t > 0.5).astype(float)
    t = np.where(fixed_node[net.from_idx[li]], 1.0, t)
    t = np.where(fixed_node[net.to_idx[li]], 0.0, t)
    to_share = np.full(m, np.nan)
    to_share[k] = t

    lost = usable & ~done
    if lost.any():
        report_unallocated(ctx, np.flatnonzero(lost), ids, pts, lines, pipe & has_line, eligible,
                           link_zone, zcodes, zuniq, dist, clean)
    unplaced = no_loc & np.isfinite(flow)
    if unplaced.any():
        kk = np.flatnonzero(unplaced)
        ctx.findings.add_many("meter_unallocated", "warning", ctx.meter_layer, ids[kk].tolist(),
                              [f"meter {i} has no location; not allocated" for i in ids[kk]])

    use = done.copy()
    n_replaced = 0
    if replaced:
        rep = pd.Index(pd.Series(ids).astype(str)).isin(list(replaced))
        n_replaced = int((rep & done).sum())
        use &= ~rep
    counts = {"meters": m, "allocated": int(done.sum()),
              "unallocated": int(lost.sum() + unplaced.sum()),
              "bad_consumption": int((~np.isfinite(flow)).sum()),
              "replaced_by_point": n_replaced}
    return MeterResult(ids, flow, cat_code, cat_names, link_idx, to_share, dist, use, counts)


def report_unallocated(ctx, k, ids, pts, lines, any_main, eligible, link_zone, zcodes, zuniq,
                       dist, clean) -> None:
    """One finding per meter not allocated, with its distance to the nearest main of any kind."""
    dem = ctx.cfg.demand
    mains = np.flatnonzero(any_main)
    if len(mains) == 0:
        ctx.findings.add_many("meter_unallocated", "warning", ctx.meter_layer, ids[k].tolist(),
                              [f"meter {i}: the network has no mains; not allocated"
                               for i in ids[k]], pts[k].tolist())
        return
    tree = shapely.STRtree(lines[mains])
    q, t, d = nearest_lines(tree, lines[mains], pts[k])
    near = np.full(len(k), -1, dtype=np.int64)
    near_d = np.full(len(k), np.nan)
    near[q] = mains[t]
    near_d[q] = d
    dist[k] = near_d
    pipe_ids = (clean.links["pipe_id"].to_numpy() if "pipe_id" in clean.links.columns
                else ctx.net.link_id)
    limit = ctx.length(dem.search_distance) if dem.search_distance > 0 else "no limit"
    msgs = []
    for i, j, dj, zc in zip(ids[k], near, near_d, zcodes[k]):
        where = f" in zone {zuniq[zc]}" if zc >= 0 else ""
        if not eligible[j]:
            why = why_not_eligible(ctx, int(j))
        elif zc >= 0 and link_zone[j] != zuniq[zc]:
            why = f"it is in zone {link_zone[j] or '(none)'}"
        else:
            why = "it is beyond the search distance"
        msgs.append(f"meter {i}: no eligible main{where} within {limit}; the nearest main "
                    f"{pipe_ids[j]} is {ctx.length(dj)} away and {why}; not allocated")
    ctx.findings.add_many("meter_unallocated", "warning", ctx.meter_layer, ids[k].tolist(),
                          msgs, pts[k].tolist())


def why_not_eligible(ctx: Context, j: int) -> str:
    net, dem = ctx.net, ctx.cfg.demand
    if net.status[j] == STATUS_CLOSED:
        return "it is closed"
    if dem.max_main_diameter > 0 and net.diameter_m[j] > dem.max_main_diameter:
        return "it is wider than demand.max_main_diameter"
    return "both its ends have a fixed head"


def accumulate(meters: MeterResult, net: Network) -> dict[str, np.ndarray]:
    """Metered demand per category and node: one weighted bincount for all categories."""
    k = np.flatnonzero(meters.use)
    if len(k) == 0:
        return {}
    return split_to_nodes(net, meters.link_idx[k], meters.to_share[k], meters.flow_m3s[k],
                          meters.category_code[k], meters.categories)


def split_to_nodes(net: Network, link_idx, to_share, flow, cat_code,
                    categories: list[str]) -> dict[str, np.ndarray]:
    n, ncat = net.n_nodes, len(categories)
    a = np.bincount(cat_code * n + net.from_idx[link_idx], weights=flow * (1.0 - to_share),
                    minlength=ncat * n)
    b = np.bincount(cat_code * n + net.to_idx[link_idx], weights=flow * to_share,
                    minlength=ncat * n)
    per = (a + b).reshape(ncat, n)
    return {c: per[i] for i, c in enumerate(categories) if per[i].any()}
