"""A small synthetic network (fictional town of Millbrook) for demand and scenario tests.

Coordinates in metres (UTM, EPSG:32616). Zone ``north``: source S, junctions A, B, C on a
straight east-west line; zone ``south``: junctions D, E, tank T and source R. The zones meet at
the closed boundary valve V1 (B-D); pump PU1 lifts from R to D.

::

    S ---P1--- A ---P2--- B ---P3--- C          (y = 0; P3 digitised from C to B)
                          |
                          V1 (closed)
                          |
    R ==PU1==             D ---P4--- E ---P5--- T   (y = -200)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import geopandas as gpd
import numpy as np
import shapely

from gridflow.config import parse_config
from gridflow.network.model import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    NODE_JUNCTION,
    NODE_SOURCE,
    NODE_TANK,
    STATUS_CLOSED,
    STATUS_OPEN,
    VALVE_ISOLATION,
    VALVE_NONE,
    Network,
)

CRS = "EPSG:32616"

NODES = {  # id: (x, y, kind, zone, fixed head [m])
    "S": (0.0, 0.0, NODE_SOURCE, "north", 100.0),
    "A": (100.0, 0.0, NODE_JUNCTION, "north", np.nan),
    "B": (200.0, 0.0, NODE_JUNCTION, "north", np.nan),
    "C": (300.0, 0.0, NODE_JUNCTION, "north", np.nan),
    "D": (200.0, -200.0, NODE_JUNCTION, "south", np.nan),
    "E": (300.0, -200.0, NODE_JUNCTION, "south", np.nan),
    "T": (400.0, -200.0, NODE_TANK, "south", 55.0),  # bottom 50 m + level 5 m
    "R": (0.0, -200.0, NODE_SOURCE, "south", 60.0),
}
TANK_BOTTOM = {"T": 50.0}
# id: (from, to, kind, diameter [m], status, reversed geometry)
LINKS = {
    "P1": ("S", "A", LINK_PIPE, 0.20, STATUS_OPEN, False),
    "P2": ("A", "B", LINK_PIPE, 0.15, STATUS_OPEN, False),
    "P3": ("B", "C", LINK_PIPE, 0.15, STATUS_OPEN, True),
    "V1": ("B", "D", LINK_VALVE, 0.15, STATUS_CLOSED, False),
    "P4": ("D", "E", LINK_PIPE, 0.15, STATUS_OPEN, False),
    "P5": ("E", "T", LINK_PIPE, 0.30, STATUS_OPEN, False),
    "PU1": ("R", "D", LINK_PUMP, np.nan, STATUS_OPEN, False),
}


@dataclass
class FakeClean:
    """Stands in for topology's CleanNetwork (only what the demand stage reads)."""

    network: Network
    nodes: gpd.GeoDataFrame
    links: gpd.GeoDataFrame
    meters: gpd.GeoDataFrame | None
    hydrants: gpd.GeoDataFrame | None
    crs: Any = CRS
    graph: Any = None
    tank_bottom_m: np.ndarray | None = field(default=None)


def make_clean(meters: gpd.GeoDataFrame | None = None, *, link_changes: dict | None = None,
               with_tank_bottom: bool = True, hydrants: dict | None = None) -> FakeClean:
    """The Millbrook test network; ``link_changes`` = {link id: {"diameter": .., "status": ..}}."""
    node_ids = list(NODES)
    pos = {k: i for i, k in enumerate(node_ids)}
    xy = np.array([NODES[k][:2] for k in node_ids])
    links = {k: list(v) for k, v in LINKS.items()}
    for lid, ch in (link_changes or {}).items():
        if "diameter" in ch:
            links[lid][3] = ch["diameter"]
        if "status" in ch:
            links[lid][4] = ch["status"]
    link_ids = list(links)
    f = np.array([pos[links[k][0]] for k in link_ids])
    t = np.array([pos[links[k][1]] for k in link_ids])
    kind = np.array([links[k][2] for k in link_ids])
    geoms = []
    for k, i, j in zip(link_ids, f, t):
        a, b = (xy[j], xy[i]) if links[k][5] else (xy[i], xy[j])
        geoms.append(shapely.LineString([a, b]))
    length = shapely.length(np.array(geoms))
    pump = kind == LINK_PUMP
    net = Network.from_arrays(
        node_id=node_ids, link_id=link_ids, from_idx=f, to_idx=t,
        node_kind=[NODES[k][2] for k in node_ids],
        fixed_head_m=[NODES[k][4] for k in node_ids],
        zone=[NODES[k][3] for k in node_ids],
        elevation_m=np.zeros(len(node_ids)),
        link_kind=kind, length_m=np.where(pump, 0.0, length),
        diameter_m=[links[k][3] for k in link_ids],
        roughness=np.where(kind == LINK_PIPE, 130.0, np.nan),
        status=[links[k][4] for k in link_ids],
        valve_type=np.where(kind == LINK_VALVE, VALVE_ISOLATION, VALVE_NONE),
        pump_h0=np.where(pump, 40.0, np.nan), pump_h1=np.where(pump, 0.0, np.nan),
        pump_h2=np.where(pump, -1000.0, np.nan),
    )
    nodes = gpd.GeoDataFrame(
        {"node_id": node_ids, "kind": [("junction", "source", "tank")[NODES[k][2]]
                                       for k in node_ids],
         "zone": [NODES[k][3] for k in node_ids]},
        geometry=shapely.points(xy), crs=CRS)
    links_gdf = gpd.GeoDataFrame(
        {"pipe_id": link_ids, "kind": [("pipe", "pump", "valve")[k] for k in kind],
         "material": "DI", "install_year": 1990, "pressure_rating_m": 100.0},
        geometry=geoms, crs=CRS)
    hyd = None
    if hydrants:
        hyd = gpd.GeoDataFrame(
            {"hydrant_id": list(hydrants), "node_idx": [pos[n] for n in hydrants.values()],
             "node_id": list(hydrants.values())},
            geometry=shapely.points(xy[[pos[n] for n in hydrants.values()]]), crs=CRS)
    bottom = np.full(len(node_ids), np.nan)
    for k, v in TANK_BOTTOM.items():
        bottom[pos[k]] = v
    return FakeClean(network=net, nodes=nodes, links=links_gdf, meters=meters, hydrants=hyd,
                     tank_bottom_m=bottom if with_tank_bottom else None)


def make_meters(rows: list[tuple]) -> gpd.GeoDataFrame:
    """rows: (meter_id, x, y, consumption, category[, zone])."""
    cols = {"meter_id": [r[0] for r in rows], "consumption": [r[3] for r in rows],
            "category": [r[4] for r in rows]}
    if rows and len(rows[0]) > 5:
        cols["zone"] = [r[5] for r in rows]
    return gpd.GeoDataFrame(cols, geometry=shapely.points([(r[1], r[2]) for r in rows]),
                            crs=CRS)


def make_cfg(demand: dict | None = None, scenarios: dict | None = None, units: str = "SI"):
    table: dict = {
        "run": {"units": units},
        "inputs": {"gis": "millbrook.gpkg"},
        "layers": {
            "pipes": {"input": "gis", "layer": "mains", "id": "MAIN_ID",
                      "fields": {"diameter": "DIAM"}, "units": {"diameter": "in"}},
            "meters": {"input": "gis", "layer": "billing_meters", "id": "ACCT",
                       "fields": {"consumption": "USE_GPD", "category": "CLASS"}},
        },
        "demand": demand or {},
    }
    if scenarios is not None:
        table["scenarios"] = scenarios
        if "max_day" not in scenarios:
            table["fireflow"] = {"scenario": next(iter(scenarios))}
    return parse_config(table)


def node_pos(clean: FakeClean, node_id: str) -> int:
    return int(clean.network.node_index([node_id])[0])
