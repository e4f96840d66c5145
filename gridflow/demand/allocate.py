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

import numpy as np

from gridflow.demand.categories import known_categories
from gridflow.demand.meters import accumulate, allocate_meters
from gridflow.demand.records import Context, DemandAllocation, MeterResult, ZoneCategoryTotal
from gridflow.demand.zones import point_demands, spread_zones, zone_totals
from gridflow.findings import Findings
from gridflow.network.model import NODE_JUNCTION, Network
from gridflow.units import out_field

__all__ = ["DemandAllocation", "ZoneCategoryTotal", "allocate", "run_info_rows"]


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
    ctx = Context(cfg=cfg, net=net, findings=findings, length_unit=length_unit,
                  length_factor=length_factor,
                  meter_layer=cfg.layers.meters.layer if cfg.layers.meters else "meters")

    metered: dict[str, np.ndarray] = {}
    spread: dict[str, np.ndarray] = {}
    point: dict[str, np.ndarray] = {}
    categories = known_categories(cfg)
    meters = MeterResult.empty()

    if dem.method != "none":
        replaced = {p.node for p in dem.points}
        meters_gdf = getattr(clean, "meters", None)
        if meters_gdf is not None and len(meters_gdf) > 0:
            meters = allocate_meters(ctx, clean, meters_gdf, replaced)
            categories = tuple(dict.fromkeys(categories + tuple(meters.categories)))
            metered = accumulate(meters, net)
        point = point_demands(ctx, clean, meters)
        meter_weights = metered  # spread = "meters" weighs by billing under either method
        if dem.method == "zone_total":  # billing places the spread but is not added to it
            metered = {}
        spread = spread_zones(ctx, node_zone, junction, metered, point, meter_weights)

    node_cat: dict[str, np.ndarray] = {}
    for part in (metered, spread, point):
        for cat, arr in part.items():
            node_cat[cat] = node_cat.get(cat, np.zeros(n)) + arr
    totals = zone_totals(node_zone, metered, spread, point)

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
