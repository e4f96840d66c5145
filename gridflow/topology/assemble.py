"""Stage 8 of the topology: the network arrays, zones and the GIS frames of the result."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import shapely

from gridflow.network import (
    LINK_KINDS,
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    NODE_KINDS,
    VALVE_PRESSURE_REDUCING,
    Network,
)
from gridflow.topology.clean import CleanNetwork
from gridflow.topology.links import CLOSED_WORDS
from gridflow.topology.points import arrow_text, column, text_in
from gridflow.topology.records import Attached, Context, LinkTable, NodeTable
from gridflow.topology.zones import zone_names

__all__ = ["assemble"]


def assemble(ctx: Context, at: Attached, nt: NodeTable, lt: LinkTable, elev: np.ndarray,
             guessed: np.ndarray) -> tuple[CleanNetwork, np.ndarray]:
    """Stage 8: zones named, the frozen :class:`Network` built, nodes/links/hydrants frames;
    and each node's zone part (:func:`~gridflow.topology.zones.zone_names`), from which the
    checks find the network's parts."""
    import geopandas as gpd

    cfg, c = ctx.cfg, lt.cols
    nn = len(nt.keys)
    zone_mapped = "zone" in cfg.layers.pipes.fields or (
        cfg.layers.nodes is not None and "zone" in cfg.layers.nodes.fields)
    zone_name, zone_of = zone_names(nn, c["from"], c["to"], c["kind"], c["status"], c["vt"],
                                    c["speed"], c["zone"], nt.zone, zone_mapped)
    zone = zone_name[zone_of] if nn else np.zeros(0, dtype=object)
    net = Network.from_arrays(
        node_id=nt.node_id, link_id=c["link_id"], from_idx=c["from"], to_idx=c["to"],
        elevation_m=elev, fixed_head_m=nt.fixed_head_m, node_kind=nt.kind, zone=zone,
        link_kind=c["kind"], length_m=np.where(c["kind"] == LINK_PIPE, c["length"], 0.0),
        diameter_m=c["diameter"], roughness=c["rough"], minor_k=c["mk"],
        status=c["status"], valve_type=c["vt"], valve_setting=c["vs"], pump_h0=c["pa"],
        pump_h1=c["pb"], pump_h2=c["pc"], pump_speed=c["speed"],
        headloss_model=cfg.run.headloss_model,
        ids_unique=nt.ids_distinct and lt.ids_distinct)  # shown by one pass each already
    crs = ctx.crs
    node_pts = _node_points(at, nt)
    nodes_gdf = gpd.GeoDataFrame(
        {"node_id": _text_column(nt.id_text, net.node_id),
         "kind": _text_of_codes(NODE_KINDS, net.node_kind),
         "zone": _text_of_codes(zone_name, zone_of)},
        geometry=node_pts, crs=crs)
    year = c["year"]
    links_gdf = gpd.GeoDataFrame(
        {"pipe_id": _text_column(lt.id_text, net.link_id),
         "kind": _text_of_codes(LINK_KINDS, net.link_kind),
         "material": pd.array(c["material"], dtype="string"),
         "install_year": pd.array(np.where(np.isfinite(year), np.round(year), np.nan),
                                  dtype="Int64"),
         "pressure_rating_m": c["rating"]}, geometry=c["geom"], crs=crs)
    meters = ctx.read.layers.get("meters")
    if meters is None:
        meters = gpd.GeoDataFrame({"meter_id": pd.Series([], dtype=object)},
                                  geometry=gpd.GeoSeries([], crs=crs), crs=crs)
    _prv_reach(ctx, net, c["geom"])
    return CleanNetwork(network=net, nodes=nodes_gdf, links=links_gdf,
                        hydrants=_hydrants_frame(at, nt, net, crs), meters=meters, crs=crs,
                        inputs=list(ctx.read.files), elevation_guessed=guessed), zone_of


def _text_column(text, ids: np.ndarray):
    """The frame column pandas makes of ``ids`` (Python strings), from the same strings held
    as Arrow text when there are (no conversion of each str)."""
    if text is None or len(ids) == 0:
        return ids
    return pd.array(text, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def _hydrant_ids(ids, ok: np.ndarray):
    """The attached hydrants' ids as the frame column pandas makes of their strings."""
    text = arrow_text(ids)
    if text is None or not ok.any():
        return ids.to_numpy(dtype=object)[ok]
    return pd.array(text.filter(pa.array(ok)), dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def _text_of_codes(names, codes: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """``names[codes]`` as pandas' text type (what a column of Python strings becomes),
    made by Arrow's take: a few names spread over a million rows without a str per row.
    No rows: an object array, as pandas makes of an empty column."""
    import pyarrow as pa

    if len(codes) == 0:
        return np.zeros(0, dtype=object)
    arr = pa.array([str(x) for x in names], type=pa.large_string()).take(
        pa.array(np.asarray(codes, dtype=np.int64)))
    return pd.array(arr, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def _node_points(at: Attached, nt: NodeTable) -> np.ndarray:
    """Points at the nodes: the points made where their keys were (the snapping stage's
    cluster points, the attachment's points on the mains); new points for any other."""
    out = at.key_pts[nt.keys]
    new = np.flatnonzero(shapely.is_missing(out))
    if len(new):
        # nodes in one place (a valve's two sides) sit next to each other in node order:
        # one point serves the run
        xy = nt.xy[new]
        lead = np.r_[True, (new[1:] != new[:-1] + 1) | np.any(xy[1:] != xy[:-1], axis=1)]
        run = np.cumsum(lead) - 1
        out[new] = shapely.points(xy[lead])[run]
    return out


def _prv_reach(ctx: Context, net: Network, geoms) -> None:
    """A PRV whose setting puts its downstream grade above every grade the network can
    give (the highest source or tank plus every pump's shut-off head) never regulates."""
    prv = (net.link_kind == LINK_VALVE) & (net.valve_type == VALVE_PRESSURE_REDUCING)
    if not prv.any() or not net.is_fixed.any():
        return
    pump = (net.link_kind == LINK_PUMP) & np.isfinite(net.pump_h0)
    ceiling = float(np.max(net.fixed_head_m[net.is_fixed])) + float(
        np.sum(net.pump_h0[pump] * net.pump_speed[pump] ** 2))
    grade = net.elevation_m[net.to_idx] + net.valve_setting
    hi = prv & (grade > ceiling)
    ctx.findings.add_many(
        "prv_setting_unreachable", "warning", ctx.layer_name("valves"), net.link_id[hi],
        [f"setting {x:.1f} m of head puts the downstream grade at {g:.1f} m, above the highest "
         f"grade the sources, tanks and pumps give ({ceiling:.1f} m): the valve stands open "
         "and regulates nothing" for x, g in zip(net.valve_setting[hi], grade[hi])],
        np.asarray(geoms, dtype=object)[hi])


def _hydrants_frame(at: Attached, nt: NodeTable, net: Network, crs):
    import geopandas as gpd

    if at.hydrants is None or len(at.hydrants.frame) == 0:
        return gpd.GeoDataFrame(
            {"hydrant_id": pd.Series([], dtype=object),
             "node_idx": pd.Series([], dtype="int64"),
             "node_id": pd.Series([], dtype=object), "zone": pd.Series([], dtype=object),
             "required_fire_flow_m3s": pd.Series([], dtype=float),
             "land_use": pd.Series([], dtype=object),
             "lateral_length_m": pd.Series([], dtype=float),
             "lateral_diameter_m": pd.Series([], dtype=float),
             "in_service": pd.Series([], dtype=bool)},
            geometry=gpd.GeoSeries([], crs=crs), crs=crs)
    fr = at.hydrants.frame
    ok = at.hyd_key >= 0
    ni = nt.idx_of_key[at.hyd_key[ok]]
    return gpd.GeoDataFrame(
        {"hydrant_id": _hydrant_ids(fr["hydrant_id"], ok), "node_idx": ni,
         "node_id": _text_column(None if nt.id_text is None
                                 else nt.id_text.take(pa.array(ni, type=pa.int64())),
                                 net.node_id[ni]),
         "zone": net.zone[ni],
         "required_fire_flow_m3s": column(fr, "required_fire_flow")[ok],
         "land_use": column(fr, "land_use", object)[ok],
         "lateral_length_m": column(fr, "lateral_length")[ok],
         "lateral_diameter_m": column(fr, "lateral_diameter")[ok],
         "in_service": ~text_in(fr, "status", CLOSED_WORDS)[ok]},
        geometry=at.hydrants.pts[ok], crs=crs)
