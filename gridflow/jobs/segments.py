"""The run's segment step: find valve segments, sweep their closures, build the layer.

SI arrays in (the cleaned network, the demand allocation, a solved scenario), the
``segments`` GeoDataFrame out in the run's units, with findings for oversized segments,
segments no valve bounds, and closures that cut off more than the segment itself.
"""

from __future__ import annotations

import logging

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from gridflow.analysis.criticality import ClosureProblem, closure_sweep
from gridflow.analysis.segments import Segments, find_segments, segment_members
from gridflow.findings import Findings
from gridflow.io.deferred import DeferredLayer, RowGeometry
from gridflow.jobs.layers import field_name
from gridflow.network import LINK_PIPE, LINK_VALVE, VALVE_ISOLATION, Network
from gridflow.units import out_field

__all__ = ["segments_step", "meters_per_node", "inoperable_mask", "segment_ids"]

log = logging.getLogger("gridflow")
_MAX_LISTED = 20  # ids listed in one text field before "and N more"


def _conv(values, quantity: str, system: str) -> np.ndarray:
    return np.asarray(values, dtype=float) * out_field(quantity, system)[1]


def meters_per_node(net: Network, alloc) -> np.ndarray:
    """Allocated meters counted at the end node of their main that took most of their use."""
    link = np.asarray(getattr(alloc, "meter_link_idx", np.empty(0)), dtype=np.int64)
    share = np.asarray(getattr(alloc, "meter_to_share", np.empty(0)), dtype=float)
    ok = link >= 0
    node = np.where(share[ok] >= 0.5, net.to_idx[link[ok]], net.from_idx[link[ok]])
    return np.bincount(node, minlength=net.n_nodes).astype(float)


def inoperable_mask(net: Network, ids: list[str], findings: Findings, layer: str) -> np.ndarray:
    """Links of the listed inoperable valves; unknown ids are warning findings."""
    valve = (net.link_kind == LINK_VALVE) & (net.valve_type == VALVE_ISOLATION)
    link_id = net.link_id.astype(str)
    wanted = np.asarray([str(i) for i in ids], dtype=object)
    hit = valve & (np.isin(link_id, wanted) | np.isin(link_id, "valve:" + wanted))
    found = set(link_id[hit]) | {i[len("valve:"):] for i in link_id[hit]}
    missing = [i for i in wanted if i not in found]
    findings.add_many("inoperable_valve_unknown", "warning", layer, missing,
                      "listed in segments.inoperable_valves but not an isolation valve of the "
                      "network: ignored")
    return hit


def segment_ids(n: int) -> np.ndarray:
    """Segment ids in network order: ``SEG-00001`` ..."""
    width = max(5, len(str(n)))
    return np.asarray([f"SEG-{k + 1:0{width}d}" for k in range(n)], dtype=object)


def _joined(groups: np.ndarray, values: np.ndarray, n: int,
            most: int | None = _MAX_LISTED) -> np.ndarray:
    """Per group, the values joined by ', ' in their given order (at most ``most``, then
    'and N more'); groups without values get ''. Array work: a stable sort by group, each
    kept value prefixed by its separator, one concatenating ``reduceat``."""
    out = np.full(n, "", dtype=object)
    if len(values) == 0:
        return out
    g = np.asarray(groups, dtype=np.int64)
    order = np.argsort(g, kind="stable")
    g = g[order]
    v = np.asarray(values).astype(str).astype(object)[order]
    start = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    count = np.diff(np.append(start, len(g)))
    rank = np.arange(len(g)) - np.repeat(start, count)
    keep = rank < (len(g) if most is None else most)
    kept = np.minimum(count, len(g) if most is None else most)
    v, rank = v[keep], rank[keep]
    v[rank > 0] = ", " + v[rank > 0]
    text = np.add.reduceat(v, np.append(0, np.cumsum(kept)[:-1]))
    more = count - kept
    if (more > 0).any():
        tail = np.flatnonzero(more > 0)
        text[tail] = text[tail] + np.array([f" and {m} more" for m in more[tail]], dtype=object)
    out[g[start]] = text
    return out


def segments_step(cfg, clean, alloc, net: Network, base, opts, *, workers=None, scheduler=None,
                  findings: Findings, info: list, progress=None) -> DeferredLayer:
    """The ``segments`` layer (run's units), findings and ``run_info`` rows.

    The layer is returned deferred: its fields are held (``attributes``), its geometry (each
    segment's mains as one multi-line, a copy of every main) is made when it is written.
    """
    sec = cfg.segments
    system = cfg.run.units
    vlayer = cfg.layers.valves.layer if cfg.layers.valves is not None else "valves"
    seg = find_segments(net, inoperable=inoperable_mask(net, sec.inoperable_valves, findings,
                                                        str(vlayer)))
    n = seg.n
    sid = segment_ids(n)
    pipe = net.link_kind == LINK_PIPE
    length = segment_members(seg, np.where(pipe, net.length_m, 0.0))
    m_node = meters_per_node(net, alloc)
    h_node = np.bincount(np.asarray(clean.hydrants["node_idx"], dtype=np.int64),
                         minlength=net.n_nodes).astype(float) if len(clean.hydrants) else \
        np.zeros(net.n_nodes)
    meters = np.bincount(seg.node_segment, m_node, minlength=n)
    demand = np.bincount(seg.node_segment, net.demand_m3s, minlength=n)
    hydrants = np.bincount(seg.node_segment, h_node, minlength=n)
    n_valves = np.diff(seg.valve_ptr)
    cut_n = np.diff(seg.cut_ptr)
    cut_meters, cut_demand, cut_hyd, cut_len = (seg.subtree_sum(v) for v in
                                                (meters, demand, hydrants, length))
    valve_owner = np.repeat(np.arange(n), n_valves)
    valve_ids = _joined(valve_owner, net.link_id[seg.valve_idx].astype(str), n, most=None)
    cut_owner = np.repeat(np.arange(n), cut_n)
    cut_ids = _joined(cut_owner, sid[seg.cut_idx], n)
    hyd_ids = _joined(seg.node_segment[np.asarray(clean.hydrants["node_idx"], dtype=np.int64)],
                      clean.hydrants["hydrant_id"].astype(str).to_numpy(), n) \
        if len(clean.hydrants) else np.full(n, "", dtype=object)
    # zone: that of the segment's first node
    first_node = np.full(n, net.n_nodes, dtype=np.int64)
    np.minimum.at(first_node, seg.node_segment, np.arange(net.n_nodes))
    zone = net.zone.astype(str)[first_node]

    # geometry: the segment's mains as one multi-line (made for the findings' few segments
    # now, a batch of segments at a time when the layer is written)
    geometry = _segment_geometry(clean.links.geometry.values, pipe & (net.length_m > 0),
                                 seg.link_segment, n)
    multi_of = geometry.masked

    max_len = sec.max_length if sec.max_length > 0 else np.inf
    max_met = sec.max_meters if sec.max_meters > 0 else np.inf
    oversized = seg.supplied & ((length > max_len) | (meters > max_met))
    lonely = seg.supplied & (n_valves == 0) & (length > 0)
    cuts = seg.supplied & (cut_meters + cut_hyd > 0)

    cols: dict[str, object] = {
        "segment_id": sid, "zone": zone, "valve_ids": valve_ids,
        "valves": n_valves.astype(np.int32),
        field_name("length", system): _conv(length, "length", system),
        "meters": meters.astype(np.int64),
        field_name("demand", system): _conv(demand, "demand", system),
        "hydrants": hydrants.astype(np.int64), "hydrant_ids": hyd_ids,
        "supplied": seg.supplied.astype(np.int32),
        "cut_off_segments": cut_n.astype(np.int64), "cut_off_segment_ids": cut_ids,
        field_name("length", system, "cut_off_length"): _conv(cut_len, "length", system),
        "cut_off_meters": cut_meters.astype(np.int64),
        field_name("demand", system, "cut_off_demand"): _conv(cut_demand, "demand", system),
        "cut_off_hydrants": cut_hyd.astype(np.int64),
        "oversized": oversized.astype(np.int32), "cannot_isolate": lonely.astype(np.int32),
    }
    crit_rows = _criticality(cfg, clean, net, base, opts, seg, m_node, h_node, workers,
                             scheduler, info, progress) if sec.criticality else None
    if crit_rows is not None:
        cols.update(crit_rows)
    attrs = pd.DataFrame(cols)
    del cols
    crs = clean.crs

    def build() -> gpd.GeoDataFrame:
        return gpd.GeoDataFrame(attrs.copy(deep=False), geometry=gpd.GeoSeries(
            geometry[0:n], crs=crs), crs=crs)

    multi = multi_of(oversized | lonely | cuts)  # the findings' segments only

    unit_len = "ft" if system == "US" else "m"
    glen = field_name("length", system)
    lname = "segments"
    findings.add_many(
        "segment_oversized", "warning", lname, list(sid[oversized]),
        [f"{length_out:,.0f} {unit_len} of main and {int(m)} meter(s) between its valves "
         f"({', '.join(map(str, vids.split(', ')[:6]))}): above the bounds "
         f"(segments.max_length, segments.max_meters); a valve may be missing or unmapped"
         for length_out, m, vids in zip(attrs[glen][oversized], meters[oversized],
                                        valve_ids[oversized])],
        list(multi[oversized]))
    findings.add_many(
        "segment_cannot_isolate", "warning", lname, list(sid[lonely]),
        "no isolation valve bounds this part of the network: a break here cannot be isolated "
        "from its supply", list(multi[lonely]))
    findings.add_many(
        "segment_closure_cuts_off", "warning", lname, list(sid[cuts]),
        [f"closing its valves ({v}) also cuts off {int(c)} other segment(s) with {int(m)} "
         f"meter(s) and {int(h)} hydrant(s): {ids}"
         for v, c, m, h, ids in zip(valve_ids[cuts], cut_n[cuts], cut_meters[cuts],
                                    cut_hyd[cuts], cut_ids[cuts])],
        list(multi[cuts]))
    info += [("segments:count", str(n)), ("segments:oversized", str(int(oversized.sum()))),
             ("segments:cannot_isolate", str(int(lonely.sum()))),
             ("segments:closure_cuts_off", str(int(cuts.sum()))),
             ("segments:not_supplied", str(int((~seg.supplied).sum())))]
    # as pyogrio names it for the layer: Z when any main has Z; no segment with mains: Unknown
    gtype = ("MultiLineString Z" if geometry.has_z() else "MultiLineString") \
        if geometry.present.any() else "Unknown"
    return DeferredLayer(build, n, attributes=attrs, geometry=geometry, crs=crs,
                         geometry_type=gtype)


class _SegmentGeometry(RowGeometry):
    """Per segment, its mains as one multi-line (None: no main), made for the rows asked."""

    __slots__ = ("_geoms", "_order", "_owner", "n")

    def __init__(self, link_geoms, order: np.ndarray, owner: np.ndarray, n: int) -> None:
        self._geoms, self._order, self._owner, self.n = link_geoms, order, owner, n
        super().__init__(self._rows, np.bincount(owner, minlength=n) > 0)

    def _multi(self, take: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Segments owning the mains ``order[take]`` and their multi-lines."""
        o = self._order[take]
        if not o.size:
            return np.empty(0, np.int64), np.empty(0, object)
        owners, compact = np.unique(self._owner[take], return_inverse=True)
        return owners, shapely.multilinestrings(np.asarray(self._geoms[o], dtype=object),
                                                indices=compact)

    def _rows(self, rows) -> np.ndarray:
        if isinstance(rows, slice):
            a, b, step = rows.indices(self.n)
            if step == 1:
                lo, hi = np.searchsorted(self._owner, [a, max(a, b)])
                out = np.full(max(b - a, 0), None, dtype=object)
                owners, multi = self._multi(np.arange(lo, hi))
                out[owners - a] = multi
                return out
            rows = np.arange(a, b, step)
        rows = np.asarray(rows, dtype=np.int64)
        wanted = np.zeros(self.n, dtype=bool)
        wanted[rows] = True
        return self.masked(wanted)[rows]

    def has_z(self) -> bool:
        """Whether any segment's geometry has Z (any of its mains)."""
        return bool(shapely.has_z(np.asarray(self._geoms[self._order], dtype=object)).any())

    def masked(self, wanted: np.ndarray | None = None) -> np.ndarray:
        """All segments (None where not ``wanted``)."""
        out = np.full(self.n, None, dtype=object)
        take = np.arange(len(self._order)) if wanted is None else \
            np.flatnonzero(wanted[self._owner])
        owners, multi = self._multi(take)
        out[owners] = multi
        return out


def _segment_geometry(link_geoms, mains: np.ndarray, link_segment: np.ndarray,
                      n: int) -> _SegmentGeometry:
    """The segments' geometry from their mains (``mains``: links drawn), ordered by segment
    and, within one, by link position."""
    inside = np.flatnonzero(mains & (link_segment >= 0))
    order = inside[np.argsort(link_segment[inside], kind="stable")]
    return _SegmentGeometry(link_geoms, order, link_segment[order], n)


def _criticality(cfg, clean, net, base, opts, seg: Segments, m_node, h_node, workers,
                 scheduler, info, progress) -> dict[str, object]:
    sec = cfg.segments
    system = cfg.run.units
    problem = ClosureProblem(net=net, base=base, options=opts,
                             min_pressure_m=cfg.criteria.min_pressure_any,
                             meters_per_node=m_node, hydrants_per_node=h_node, segments=seg)
    rec, summary = closure_sweep(problem, batch_size=sec.batch_size, workers=workers,
                                 scheduler=scheduler, progress=progress)
    n = seg.n
    ok = rec["converged"]
    affected = np.where(ok, rec["meters_out"] + rec["meters_low"], np.nan)
    lost = np.where(ok, rec["demand_out_m3s"] + rec["demand_low_m3s"], np.nan)
    rank = np.full(n, -1, dtype=np.int64)
    ranked = np.flatnonzero(ok)
    order = ranked[np.lexsort((ranked, -lost[ranked], -affected[ranked]))]
    rank[order] = np.arange(1, order.size + 1)
    worst_node = np.where(rec["worst_drop_node_idx"] >= 0,
                          net.node_id.astype(str)[np.maximum(rec["worst_drop_node_idx"], 0)], "")
    has_valves = np.diff(seg.valve_ptr) > 0
    failed = has_valves & ~ok
    info += [("segments:criticality_scenario", sec.scenario),
             ("segments:closures", str(int(has_valves.sum()))),
             ("segments:closures_not_converged", str(int(failed.sum()))),
             ("segments:seconds", f"{summary['seconds']:.2f}"),
             ("segments:mode", summary["mode"])]
    return {
        "closure_solved": ok.astype(np.int32),
        "meters_out_of_water": np.where(ok, rec["meters_out"], np.nan),
        field_name("demand", system, "demand_out_of_water"):
            _conv(np.where(ok, rec["demand_out_m3s"], np.nan), "demand", system),
        "hydrants_out_of_service": np.where(ok, rec["hydrants_out"], np.nan),
        "meters_low_pressure": np.where(ok, rec["meters_low"], np.nan),
        field_name("demand", system, "demand_low_pressure"):
            _conv(np.where(ok, rec["demand_low_m3s"], np.nan), "demand", system),
        field_name("pressure", system, "worst_pressure_drop"):
            _conv(np.where(ok, rec["worst_drop_m"], np.nan), "pressure", system),
        "worst_drop_node_id": np.where(ok, worst_node, ""),
        "customers_affected": affected,
        "criticality_rank": np.where(rank > 0, rank, np.nan),
    }
