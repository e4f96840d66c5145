"""Average-day demand per node and category: meters to mains, zone totals, point demands.

The three sources of demand, each kept apart until the end so that run_info can report them:

* **metered**: every customer meter goes to the nearest eligible main within the search
  distance (one STRtree nearest query per meter zone, not per meter), then is split between
  that main's end nodes by where along the main it lands (``split = "linear"``) or given to the
  nearer end (``split = "nearest"``);
* **spread**: where a zone's production is given, production minus metered and point use is
  spread over the zone's junctions by pipe length or by metered share, in the zone's
  non-revenue category;
* **point**: large users named in the config.

This is the one module of ``gridflow.demand`` that touches geometry (meter points against
mains); everything downstream of :class:`DemandAllocation` is arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
import shapely

from gridflow.errors import ConfigError, InputError
from gridflow.findings import Findings
from gridflow.network.model import LINK_PIPE, NODE_JUNCTION, STATUS_CLOSED, Network
from gridflow.topology.nearest import nearest_lines
from gridflow.units import FLOW, out_field, to_si

__all__ = ["DemandAllocation", "ZoneCategoryTotal", "allocate", "run_info_rows"]


class ZoneCategoryTotal(NamedTuple):
    """Average-day demand of one zone and category, by source [m3/s]."""

    zone: str
    category: str
    metered_m3s: float
    spread_m3s: float
    point_m3s: float

    @property
    def total_m3s(self) -> float:
        return self.metered_m3s + self.spread_m3s + self.point_m3s


@dataclass(frozen=True, eq=False)
class DemandAllocation:
    """Average-day demand placed on the network's nodes.

    Attributes
    ----------
    node_category_m3s : dict of str to ndarray
        Average-day demand per node [m3/s], one array (over the network's nodes) per category.
    totals : list of ZoneCategoryTotal
        Per zone and category: metered, spread and point demand [m3/s].
    node_id : ndarray of str
        The network's node ids (the arrays' order).
    categories : tuple of str
        Every category the config knows (mapped, default, non-revenue, point), whether or not
        it carries demand tonight.
    meter_id : ndarray
        The meters' ids, in the meter layer's order.
    meter_link_idx : ndarray of int64
        Position of the main each meter went to; -1 where it was not allocated.
    meter_to_share : ndarray
        Share of each meter's demand given to the main's ``to`` node (the rest goes to its
        ``from`` node); NaN where not allocated.
    meter_distance_m : ndarray
        Distance from the meter to its main [m]; for meters not allocated, to the nearest main
        of any kind (NaN where the meter has no location or there are no mains).
    meter_flow_m3s : ndarray
        Each meter's average-day consumption [m3/s]; NaN where unusable.
    meter_category : ndarray of str
        Each meter's category.
    counts : dict of str to int
        ``meters``, ``allocated``, ``unallocated``, ``bad_consumption``, ``replaced_by_point``.
    """

    node_category_m3s: dict[str, np.ndarray]
    totals: list[ZoneCategoryTotal]
    node_id: np.ndarray
    categories: tuple[str, ...] = ()
    meter_id: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    meter_link_idx: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    meter_to_share: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_distance_m: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_flow_m3s: np.ndarray = field(default_factory=lambda: np.empty(0))
    meter_category: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def node_demand_m3s(self) -> np.ndarray:
        """Average-day demand per node over all categories [m3/s]."""
        out = np.zeros(len(self.node_id))
        for arr in self.node_category_m3s.values():
            out += arr
        return out


# ---------------------------------------------------------------------------------- public


def allocate(cfg, clean, findings: Findings) -> DemandAllocation:
    """Place average-day demand on the network's nodes, per category.

    Parameters
    ----------
    cfg : gridflow.config.Config
        Uses ``cfg.demand`` (and ``cfg.run.units`` for the units in finding messages).
    clean : CleanNetwork
        ``network`` (SI), ``links`` (GeoDataFrame in the network's link order, LineStrings
        digitised from ``from`` to ``to`` node or the reverse), ``nodes`` (GeoDataFrame in the
        network's node order), ``meters`` (GeoDataFrame with ``meter_id``, ``consumption``,
        optional ``category`` and ``zone``; may be None) and ``hydrants`` (for point demands
        named by hydrant id; may be None).
    findings : Findings
        Receives one finding per meter that is not allocated or has unusable consumption, per
        unmapped category code, and per zone whose metered use exceeds its production.

    Returns
    -------
    DemandAllocation

    Raises
    ------
    ConfigError
        A category code mapped twice, a zone or point-demand node that the network lacks.
    InputError
        The meter layer lacks ``meter_id`` or ``consumption``, or its CRS is not the network's.

    Notes
    -----
    Linear split: a meter landing at normalised position ``t`` along its main (0 at the
    ``from`` node, 1 at the ``to`` node) gives ``(1 - t) q`` to the ``from`` node and ``t q``
    to the ``to`` node, so a meter at a node goes wholly to it. An end with a fixed head (tank,
    source) takes no demand: its share goes to the other end. Mains with both ends fixed are
    not eligible.

    Spread: for a zone with production ``P``, metered use ``M`` and point use ``D`` (under
    ``method = "zone_total"``, ``M = 0``), ``max(P - M - D, 0)`` goes to the zone's junctions in
    proportion to half the length of every pipe at the junction (``spread = "length"``) or to
    its metered demand (``spread = "meters"``).

    Complexity: O(m log p) for m meters and p mains (STRtree nearest queries), then O(m + n)
    array work.
    """
    net: Network = clean.network
    dem = cfg.demand
    n = net.n_nodes
    node_zone = np.asarray(net.zone).astype(str)
    junction = np.asarray(net.node_kind) == NODE_JUNCTION
    length_unit, length_factor = out_field("length", cfg.run.units)
    ctx = _Context(cfg=cfg, net=net, findings=findings, length_unit=length_unit,
                   length_factor=length_factor,
                   meter_layer=cfg.layers.meters.layer if cfg.layers.meters else "meters")

    metered: dict[str, np.ndarray] = {}
    spread: dict[str, np.ndarray] = {}
    point: dict[str, np.ndarray] = {}
    categories = _known_categories(cfg)
    meters = _MeterResult.empty()

    if dem.method != "none":
        replaced = {p.node for p in dem.points}
        meters_gdf = getattr(clean, "meters", None)
        if meters_gdf is not None and len(meters_gdf) > 0:
            meters = _allocate_meters(ctx, clean, meters_gdf, replaced)
            categories = tuple(dict.fromkeys(categories + tuple(meters.categories)))
            metered = _accumulate(meters, net)
        point = _point_demands(ctx, clean, meters)
        meter_weights = metered  # spread = "meters" weighs by billing under either method
        if dem.method == "zone_total":  # billing places the spread but is not added to it
            metered = {}
        spread = _spread_zones(ctx, node_zone, junction, metered, point, meter_weights)

    node_cat: dict[str, np.ndarray] = {}
    for part in (metered, spread, point):
        for cat, arr in part.items():
            node_cat[cat] = node_cat.get(cat, np.zeros(n)) + arr
    totals = _totals(node_zone, metered, spread, point)

    total = sum(float(a.sum()) for a in node_cat.values())
    if dem.method != "none" and total == 0.0:
        findings.add("no_demand", "warning", "demand", "",
                     "no demand was allocated: no usable meters, zone totals or point demands")
    return DemandAllocation(
        node_category_m3s=node_cat, totals=totals, node_id=np.asarray(net.node_id),
        categories=categories, meter_id=meters.meter_id, meter_link_idx=meters.link_idx,
        meter_to_share=meters.to_share, meter_distance_m=meters.distance_m,
        meter_flow_m3s=meters.flow_m3s, meter_category=meters.category_names,
        counts=meters.counts)


def run_info_rows(alloc: DemandAllocation, units: str = "SI") -> list[tuple[str, str]]:
    """``(key, value)`` rows for the ``run_info`` layer: meter counts, totals per zone and
    category.

    Flows are in the run's output unit (``units`` = "US": gpm, "SI": L/s); the unit is the
    key's suffix, e.g. ``demand.zone.North.residential.metered_gpm``. The zone '' (nodes
    without a zone) is written ``(none)``.
    """
    suffix, factor = out_field("demand", units)  # type: ignore[arg-type]
    rows: list[tuple[str, str]] = [(f"demand.meters.{k}", str(v)) for k, v in alloc.counts.items()]
    total = float(alloc.node_demand_m3s.sum())
    rows.append((f"demand.total_{suffix}", f"{total * factor:.6g}"))
    for t in alloc.totals:
        z = t.zone or "(none)"
        for part, value in (("metered", t.metered_m3s), ("spread", t.spread_m3s),
                            ("point", t.point_m3s)):
            rows.append((f"demand.zone.{z}.{t.category}.{part}_{suffix}",
                         f"{value * factor:.6g}"))
    return rows


# ---------------------------------------------------------------------------------- internals


@dataclass
class _Context:
    cfg: Any
    net: Network
    findings: Findings
    length_unit: str
    length_factor: float
    meter_layer: str

    def length(self, metres: float) -> str:
        return f"{metres * self.length_factor:.1f} {self.length_unit}"


@dataclass
class _MeterResult:
    meter_id: np.ndarray
    flow_m3s: np.ndarray          # NaN where unusable
    category_code: np.ndarray     # int index into categories
    categories: list[str]
    link_idx: np.ndarray          # -1 where not allocated
    to_share: np.ndarray          # NaN where not allocated
    distance_m: np.ndarray
    use: np.ndarray               # bool: counts as metered demand
    counts: dict[str, int]

    @classmethod
    def empty(cls) -> _MeterResult:
        return cls(np.empty(0, dtype=object), np.empty(0), np.empty(0, dtype=np.int64), [],
                   np.empty(0, dtype=np.int64), np.empty(0), np.empty(0), np.empty(0, bool),
                   {"meters": 0, "allocated": 0, "unallocated": 0, "bad_consumption": 0,
                    "replaced_by_point": 0})

    @property
    def category_names(self) -> np.ndarray:
        if not self.categories:
            return np.empty(0, dtype=object)
        return np.asarray(self.categories, dtype=object)[self.category_code]


def _known_categories(cfg) -> tuple[str, ...]:
    dem = cfg.demand
    cats = list(dem.categories) + [dem.default_category]
    cats += [z.nrw_category for z in dem.zones.values()]
    cats += [p.category for p in dem.points]
    return tuple(dict.fromkeys(cats))


def _code_table(cfg) -> dict[str, str]:
    """Utility code -> category name; a category's own name also maps to it."""
    table: dict[str, str] = {}
    for name, sec in cfg.demand.categories.items():
        for i, code in enumerate(sec.codes):
            if code in table and table[code] != name:
                raise ConfigError(f"config key demand.categories.{name}.codes[{i}]: code "
                                  f"{code!r} is already mapped to category {table[code]!r}",
                                  key=f"demand.categories.{name}.codes[{i}]")
            table[code] = name
    for name in cfg.demand.categories:
        table.setdefault(name, name)
    return table


def _as_codes(values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Factorize raw utility codes into (codes, unique text); NaN/empty -> code -1.

    Whole-number floats (a numeric field read with NaNs) are written without '.0'.
    """
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    text = []
    for u in uniques:  # one entry per distinct code, not per meter
        if isinstance(u, float) and u.is_integer():
            u = int(u)
        text.append(str(u).strip())
    text_arr = np.asarray(text, dtype=object)
    if len(text_arr):
        empty = text_arr == ""
        if empty.any():
            codes = np.where(empty[np.maximum(codes, 0)] & (codes >= 0), -1, codes)
    return np.asarray(codes), text_arr


def _meter_categories(ctx: _Context, meters, ids: np.ndarray,
                      geoms: np.ndarray) -> tuple[np.ndarray, list[str]]:
    cfg = ctx.cfg
    default = cfg.demand.default_category
    cat_names = list(dict.fromkeys(list(cfg.demand.categories) + [default]))
    default_i = cat_names.index(default)
    if "category" not in meters.columns:
        return np.full(len(meters), default_i, dtype=np.int64), cat_names
    codes, uniques = _as_codes(meters["category"])
    table = _code_table(cfg)
    if not table:  # no categories configured: everything is the default category
        return np.full(len(meters), default_i, dtype=np.int64), cat_names
    unique_cat = np.array([cat_names.index(table[u]) if u in table else -1 for u in uniques],
                          dtype=np.int64)
    if len(uniques):
        per_meter = np.where(codes >= 0, unique_cat[np.maximum(codes, 0)], default_i)
    else:
        per_meter = np.full(len(meters), default_i, dtype=np.int64)
    unmapped = (codes >= 0) & (per_meter < 0)
    if unmapped.any():
        k = np.flatnonzero(unmapped)
        field_name = _field(cfg, "category")
        ctx.findings.add_many(
            "meter_unknown_category", "warning", ctx.meter_layer, ids[k].tolist(),
            [f"meter {i}: category code {uniques[c]!r} (field {field_name}) is not in "
             f"[demand.categories]; counted as {default}" for i, c in zip(ids[k], codes[k])],
            geoms[k].tolist())
        per_meter[unmapped] = default_i
    return per_meter, cat_names


def _field(cfg, role: str) -> str:
    sec = cfg.layers.meters
    return sec.fields.get(role, role) if sec is not None else role


def _consumption(ctx: _Context, meters, ids: np.ndarray, geoms: np.ndarray) -> np.ndarray:
    """Consumption in m3/s; NaN (and a finding naming the meter) where unusable."""
    raw = meters["consumption"]
    num = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    missing = raw.isna().to_numpy()
    bad = ~np.isfinite(num) | (num < 0)
    if bad.any():
        k = np.flatnonzero(bad)
        field_name = _field(ctx.cfg, "consumption")
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


def _link_orientation(clean, net: Network, lines: np.ndarray, link_idx: np.ndarray) -> np.ndarray:
    """True where a link's geometry runs from its ``to`` node to its ``from`` node."""
    nodes = getattr(clean, "nodes", None)
    if nodes is None or len(link_idx) == 0:
        return np.zeros(len(link_idx), bool)
    pts = np.asarray(nodes.geometry.array)
    start = shapely.get_point(lines[link_idx], 0)
    d_from = shapely.distance(start, pts[net.from_idx[link_idx]])
    d_to = shapely.distance(start, pts[net.to_idx[link_idx]])
    return d_to < d_from


def _allocate_meters(ctx: _Context, clean, meters, replaced: set[str]) -> _MeterResult:
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
    flow = _consumption(ctx, meters, ids, geoms)
    cat_code, cat_names = _meter_categories(ctx, meters, ids, geoms)

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
        zcodes, zuniq = _as_codes(meters["zone"])
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
    flip = _link_orientation(clean, net, lines, li)
    t = np.where(flip, 1.0 - t, t)
    if dem.split == "nearest":
        t = (t > 0.5).astype(float)
    t = np.where(fixed_node[net.from_idx[li]], 1.0, t)
    t = np.where(fixed_node[net.to_idx[li]], 0.0, t)
    to_share = np.full(m, np.nan)
    to_share[k] = t

    lost = usable & ~done
    if lost.any():
        _report_unallocated(ctx, np.flatnonzero(lost), ids, pts, lines, pipe & has_line, eligible,
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
    return _MeterResult(ids, flow, cat_code, cat_names, link_idx, to_share, dist, use, counts)


def _report_unallocated(ctx, k, ids, pts, lines, any_main, eligible, link_zone, zcodes, zuniq,
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
            why = _why_not_eligible(ctx, int(j))
        elif zc >= 0 and link_zone[j] != zuniq[zc]:
            why = f"it is in zone {link_zone[j] or '(none)'}"
        else:
            why = "it is beyond the search distance"
        msgs.append(f"meter {i}: no eligible main{where} within {limit}; the nearest main "
                    f"{pipe_ids[j]} is {ctx.length(dj)} away and {why}; not allocated")
    ctx.findings.add_many("meter_unallocated", "warning", ctx.meter_layer, ids[k].tolist(),
                          msgs, pts[k].tolist())


def _why_not_eligible(ctx: _Context, j: int) -> str:
    net, dem = ctx.net, ctx.cfg.demand
    if net.status[j] == STATUS_CLOSED:
        return "it is closed"
    if dem.max_main_diameter > 0 and net.diameter_m[j] > dem.max_main_diameter:
        return "it is wider than demand.max_main_diameter"
    return "both its ends have a fixed head"


def _accumulate(meters: _MeterResult, net: Network) -> dict[str, np.ndarray]:
    """Metered demand per category and node: one weighted bincount for all categories."""
    k = np.flatnonzero(meters.use)
    if len(k) == 0:
        return {}
    return _split_to_nodes(net, meters.link_idx[k], meters.to_share[k], meters.flow_m3s[k],
                           meters.category_code[k], meters.categories)


def _split_to_nodes(net: Network, link_idx, to_share, flow, cat_code,
                    categories: list[str]) -> dict[str, np.ndarray]:
    n, ncat = net.n_nodes, len(categories)
    a = np.bincount(cat_code * n + net.from_idx[link_idx], weights=flow * (1.0 - to_share),
                    minlength=ncat * n)
    b = np.bincount(cat_code * n + net.to_idx[link_idx], weights=flow * to_share,
                    minlength=ncat * n)
    per = (a + b).reshape(ncat, n)
    return {c: per[i] for i, c in enumerate(categories) if per[i].any()}


def _point_demands(ctx: _Context, clean, meters: _MeterResult) -> dict[str, np.ndarray]:
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


def _sum_parts(*parts: dict[str, np.ndarray]) -> np.ndarray | None:
    total = None
    for part in parts:
        for arr in part.values():
            total = arr.copy() if total is None else total + arr
    return total


def _length_weights(net: Network, junction: np.ndarray) -> np.ndarray:
    """Half the length of every pipe at each junction; a pipe's half at a fixed-head end goes
    to its other end."""
    pipe = np.asarray(net.link_kind) == LINK_PIPE
    f, t = net.from_idx[pipe], net.to_idx[pipe]
    half = 0.5 * np.asarray(net.length_m)[pipe]
    to_f = np.where(junction[f], half, 0.0) + np.where(~junction[t], half, 0.0)
    to_t = np.where(junction[t], half, 0.0) + np.where(~junction[f], half, 0.0)
    n = net.n_nodes
    return np.bincount(f, to_f, minlength=n) + np.bincount(t, to_t, minlength=n)


def _spread_zones(ctx: _Context, node_zone: np.ndarray, junction: np.ndarray,
                  metered: dict[str, np.ndarray], point: dict[str, np.ndarray],
                  meter_weights: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Production minus metered and point use, spread over each zone with a production."""
    net, dem = ctx.net, ctx.cfg.demand
    n = net.n_nodes
    out: dict[str, np.ndarray] = {}
    known = np.unique(node_zone)
    used = _sum_parts(metered, point)
    weights_m = _sum_parts(meter_weights)
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
                length_w = _length_weights(net, junction)
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


def _totals(node_zone: np.ndarray, metered: dict, spread: dict,
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
