#!/usr/bin/env python
"""Generate the Millbrook sample GIS: an invented town's water system as a GeoPackage.

Millbrook is fictional (no real place, utility or data); the coordinates use a real projected
CRS (EPSG:26916, metres) so that every tool can draw them. The town has three pressure zones:

* CENTRAL   - fed by the treatment plant (fixed grade) and floated by an elevated tank;
* EAST_HILL - a closed zone on the east hill, lifted by the East Hill booster station;
* RIVERSIDE - the river valley, fed from CENTRAL through two pressure-reducing valves.

Closed valves separate the zones on every other street that crosses a boundary. Field names
are those a utility's GIS export might use (MAIN_ID, DIAM_IN, MATL, YR_INST, LIFECYCLE,
PRESS_ZONE ...), in US units: diameters in inches, elevations and levels in feet, customer
consumption in gallons per day, PRV settings in psi, pump curves in gpm and ft. Every main is a
LineString Z with ground elevation [ft] at each vertex.

Realistic GIS defects and hydraulic weak spots are planted on purpose; their ids come from
:func:`planted` and are written beside the GeoPackage as ``manifest.json`` (what the tests and
``sample_gis/README.md`` read; ``tests/sample/test_sample_gis.py`` checks that the README
names them).

Usage::

    python scripts/make_sample_gis.py            # writes sample_gis/millbrook.gpkg
    python scripts/make_sample_gis.py --out x.gpkg

The output is reproducible: one seeded ``numpy.random.Generator`` drives every random choice,
so two runs write identical attributes and geometries.
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import shapely

SEED = 20_240_507
CRS = "EPSG:26916"
X0, Y0 = 612_000.0, 4_590_000.0  # local origin of the invented town [m]
S = 80.0  # street grid spacing [m]
FT = 0.3048

LAYERS = ("WaterMains", "Hydrants", "SystemValves", "PRVStations", "Tanks", "PumpStations",
          "SupplySources", "CustomerMeters")
#: made by solving the sample's own model (scripts/sample_flow_tests.py)
FLOW_TEST_LAYERS = ("HydrantFlowTests", "FlowTestOutlets")

# --------------------------------------------------------------------------------------------
# Terrain: ground elevation [ft] as a smooth function of local coordinates [m]
# --------------------------------------------------------------------------------------------


def river_y(x):
    """The Mill River's centre line (local y [m] at local x [m]), south of the valley streets."""
    return -120.0 + 40.0 * np.sin(2.0 * np.pi * np.asarray(x, float) / 2500.0)


def _smoothstep(t):
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def ground_ft(x, y):
    """Ground elevation [ft] at local coordinates [m].

    A river valley at about 690 ft rising to a plateau at 830-860 ft, an east hill to about
    965 ft, the tank's hill (about 885 ft) and the Crestview knoll (about 930 ft), plus gentle
    undulation.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    g = 688.0 + 140.0 * _smoothstep((y - river_y(x)) / 1100.0) + 28.0 * y / 3000.0
    g = g + 110.0 * _smoothstep((x - 2300.0) / 1500.0)  # east hill
    g = g + 35.0 * np.exp(-((x - 640.0) ** 2 + (y - 2400.0) ** 2) / (2 * 200.0**2))  # tank hill
    g = g + 76.0 * np.exp(-((x - 1760.0) ** 2 + (y - 2560.0) ** 2) / (2 * 220.0**2))  # knoll
    g = g + 3.0 * np.sin(x / 170.0 + 0.7) * np.cos(y / 230.0 - 0.4)
    g = g + 2.0 * np.sin((x + y) / 310.0 + 1.9)
    return g


# --------------------------------------------------------------------------------------------
# Layout in grid coordinates (column i, row j): x = i*S, y = j*S
# --------------------------------------------------------------------------------------------

CENTRAL, EAST_HILL, RIVERSIDE = "CENTRAL", "EAST_HILL", "RIVERSIDE"

CENTRAL_COLS, CENTRAL_ROWS = range(0, 35), range(7, 38)
EAST_COLS, EAST_ROWS = range(36, 48), range(13, 34)
RIVER_COLS, RIVER_ROWS = range(10, 38), range(0, 6)
HOLES = [  # (i0, i1, j0, j1) inclusive: no streets inside (park, cemetery, golf course)
    (26, 29, 12, 15),  # Millpond Park
    (3, 5, 33, 35),  # Old Millbrook Cemetery
    (28, 33, 31, 36),  # Millbrook Golf Club
]
TRANS_ROW, TRANS_COL_END = 7, 22  # 20/16 in backbone along row 7
TANK_COL, TANK_ROW = 8, 30  # 16 in main up column 8 to the tank
ARTERIAL_ROWS_12 = {22}  # 12 in across town to the booster station
ARTERIAL_COLS_12 = {22}
PUMP_ROW = 22
EAST_BOUNDARY_ROWS = (15, 19, 26, 30)  # closed valves between CENTRAL and EAST_HILL
PRV_COLS = {14: 882.0, 28: 874.0}  # PRV column: target downstream grade [ft] (lead, lag)
RIVER_BOUNDARY_COLS = (11, 18, 22, 25, 33)  # closed valves between CENTRAL and RIVERSIDE
OLD_TOWN = (12, 26, 8, 16)  # i0, i1, j0, j1
DOWNTOWN = (15, 23, 8, 13)
KNOLL = (22, 32)  # Crestview knoll centre (grid)

SOURCE_HGL_FT = 990.0
TANK_BASE_FT, TANK_LEVEL_FT, TANK_MAX_FT = 950.0, 33.0, 40.0
PUMP_CURVE = ((0.0, 92.0), (600.0, 84.0), (1400.0, 55.0))  # gpm, ft

STREETS_NS = ["Alder", "Birch", "Cedar", "Dogwood", "Elm", "Fir", "Ginkgo", "Hawthorn", "Ivy",
              "Juniper", "Kingsley", "Linden", "Maple", "Nutmeg", "Oak", "Poplar", "Quince",
              "Redbud", "Spruce", "Tamarack", "Umber", "Vine", "Walnut", "Yew"]
STREETS_EW = ["Front", "Water", "Mill", "Church", "School", "Market", "Union", "Grove",
              "Prospect", "Summit", "Ridge", "Orchard", "Meadow", "Harvest", "Granary",
              "Brook", "Spring", "Valley", "Highland", "Crest", "Lookout", "Sunset", "Hillview",
              "Larkspur", "Foxglove", "Heather", "Clover", "Thistle", "Yarrow", "Sorrel",
              "Fennel", "Basil", "Sage", "Tansy", "Rue", "Chicory", "Mallow", "Nettle", "Aster"]

ROUGH_CLASS_PSI = {"CI": 150, "DI": 350, "AC": 150, "PVC": 150, "STL": 250, "HDPE": 200,
                   "UNK": None}


def _street(i=None, j=None, suffix=None):
    if i is not None:
        name = STREETS_NS[i % len(STREETS_NS)]
        pre = "E " if i >= len(STREETS_NS) else ""
        return f"{pre}{name} {suffix or 'Ave'}"
    return f"{STREETS_EW[j % len(STREETS_EW)]} {suffix or 'St'}"


def _in_box(i, j, box):
    i0, i1, j0, j1 = box
    return i0 <= i <= i1 and j0 <= j <= j1


def _is_grid(key):
    return isinstance(key, tuple) and len(key) == 2 and isinstance(key[0], int)


def _in_hole(i, j):
    return any(i0 < i < i1 and j0 < j < j1 for i0, i1, j0, j1 in HOLES)


# --------------------------------------------------------------------------------------------
# The builder
# --------------------------------------------------------------------------------------------


@dataclass
class Main:
    a: object  # node key
    b: object
    diam: float | None
    matl: str
    year: int | None
    zone: str
    street: str
    cls: str = "DIST"  # DIST / TRANS
    lifecycle: str = "ACT"
    verts: list | None = None  # full vertex list [(x, y)], filled by Town.finish
    mid_vertex: bool = False  # put a vertex exactly at the midpoint (valve or pump there)
    id: str = ""


@dataclass
class Town:
    rng: np.random.Generator
    nodes: dict = field(default_factory=dict)  # key -> (x, y)
    zone_of: dict = field(default_factory=dict)  # key -> zone
    mains: list = field(default_factory=list)
    hydrants: list = field(default_factory=list)
    valves: list = field(default_factory=list)
    meters: list = field(default_factory=list)
    tanks: list = field(default_factory=list)
    pumps: list = field(default_factory=list)
    sources: list = field(default_factory=list)
    planted: dict = field(default_factory=dict)

    # nodes and mains ---------------------------------------------------------------------
    def node(self, key, x, y, zone):
        self.nodes[key] = (float(x), float(y))
        self.zone_of[key] = zone
        return key

    def main(self, a, b, **kw) -> Main:
        m = Main(a=a, b=b, **kw)
        self.mains.append(m)
        return m

    def xy(self, key):
        return self.nodes[key]


def _year_material(rng, d_grid, diam, zone, old):
    """Installation year and material from distance to the old town and the diameter."""
    if zone == EAST_HILL:
        year = int(rng.integers(1976, 2016))
    elif zone == RIVERSIDE:
        year = int(np.clip(1922 + 2.2 * d_grid + rng.normal(0, 7), 1920, 2019))
    else:
        year = int(np.clip(1905 + 3.0 * d_grid + rng.normal(0, 6), 1905, 2022))
    if old:
        year = min(year, int(rng.integers(1905, 1931)))
    u = rng.random()
    if year < 1955:
        matl = "CI"
    elif year < 1975:
        matl = "AC" if u < 0.6 else "CI"
    elif year < 1990:
        matl = "DI" if u < 0.5 else ("AC" if u < 0.7 else "PVC")
    else:
        matl = "PVC" if u < 0.72 else ("DI" if u < 0.95 else "HDPE")
    if diam is not None and diam >= 12 and matl in ("PVC", "AC", "HDPE"):
        matl = "DI"
    return year, matl


def build(seed: int = SEED) -> Town:
    """Build the town in memory (no files). Deterministic for a given seed."""
    rng = np.random.default_rng(seed)
    t = Town(rng=rng)

    # ---- grid nodes ------------------------------------------------------------------------
    def grid(cols, rows, zone):
        for j in rows:
            for i in cols:
                if _in_hole(i, j):
                    continue
                jx, jy = rng.uniform(-7.0, 7.0, 2)
                t.node((i, j), i * S + jx, j * S + jy, zone)

    grid(CENTRAL_COLS, CENTRAL_ROWS, CENTRAL)
    grid(EAST_COLS, EAST_ROWS, EAST_HILL)
    grid(RIVER_COLS, RIVER_ROWS, RIVERSIDE)

    old_c = np.array([19.0, 11.0])

    def dgrid(i, j):
        return float(np.hypot(i - old_c[0], j - old_c[1]))

    # ---- grid mains -------------------------------------------------------------------------
    def size(i, j, horizontal, zone):
        """Nominal diameter [in] and class of the grid main leaving (i, j)."""
        if zone == CENTRAL:
            if horizontal and j == TRANS_ROW and 1 <= i < TRANS_COL_END:
                return (20 if i < 10 else 16), "TRANS"
            if not horizontal and i == TANK_COL and TRANS_ROW <= j < TANK_ROW:
                return 16, "TRANS"
            if horizontal and j in ARTERIAL_ROWS_12:
                return 12, "DIST"
            if not horizontal and i in ARTERIAL_COLS_12:
                return 12, "DIST"
            if horizontal and j == TANK_ROW and TANK_COL <= i < 22:
                return 12, "DIST"
            if _in_box(i, j, OLD_TOWN):
                if (horizontal and j == 11) or (not horizontal and i == 19):
                    return 10, "DIST"  # Market St / Oak Ave, the old town's spine
                return (4 if rng.random() < 0.22 else 6), "DIST"
            if (horizontal and j % 4 == 3) or (not horizontal and i % 4 == 2):
                return 8, "DIST"
            return 6, "DIST"
        if zone == EAST_HILL:
            if horizontal and j == PUMP_ROW and i < 44:
                return 12, "DIST"
            if (not horizontal and i == 41) or (horizontal and j % 4 == 2):
                return 8, "DIST"
            return 6, "DIST"
        # RIVERSIDE
        if horizontal and j == 3 and 14 <= i < 28:
            return 12, "DIST"
        if not horizontal and i in PRV_COLS:
            return 12, "DIST"
        if horizontal and j == 1:
            return 8, "DIST"
        return 6, "DIST"

    edges = []
    for (i, j) in list(t.nodes):
        zone = t.zone_of[(i, j)]
        for di, dj, horiz in ((1, 0, True), (0, 1, False)):
            k = (i + di, j + dj)
            if k in t.nodes and t.zone_of[k] == zone:
                edges.append(((i, j), k, horiz, zone))

    # drop some streets (irregular blocks), never disconnecting a zone, never a backbone main
    g = nx.Graph()
    g.add_edges_from((a, b) for a, b, _, _ in edges)
    order = rng.permutation(len(edges))
    sized = {}
    for n in range(len(edges)):
        a, b, horiz, zone = edges[n]
        sized[n] = size(a[0], a[1], horiz, zone)
    dropped = set()
    for n in order:
        a, b, horiz, zone = edges[n]
        if sized[n][0] >= 8 or rng.random() > 0.11:
            continue
        g.remove_edge(a, b)
        if nx.has_path(g, a, b):
            dropped.add(n)
        else:
            g.add_edge(a, b)

    for n, (a, b, horiz, zone) in enumerate(edges):
        if n in dropped:
            continue
        diam, cls = sized[n]
        i, j = a
        old = zone == CENTRAL and _in_box(i, j, OLD_TOWN) and diam <= 6
        year, matl = _year_material(rng, dgrid(i, j), diam, zone, old)
        if cls == "TRANS":
            year, matl = (1962, "STL") if diam >= 20 else (1988, "DI")
        if zone == CENTRAL and np.hypot(i - KNOLL[0], j - KNOLL[1]) <= 4.0 and diam <= 8:
            year, matl = int(rng.integers(1993, 2000)), "PVC"  # Crestview subdivision
        street = _street(j=j) if horiz else _street(i=i)
        t.main(a, b, diam=float(diam), matl=matl, year=year, zone=zone, street=street, cls=cls)

    # ---- a diagonal main crossing a grid main without a junction ------------------------------
    have = {frozenset((m.a, m.b)) for m in t.mains}
    busy_blocks: set = set()
    for i, j in ((6, 18), (7, 18), (5, 17), (9, 19), (10, 20), (4, 24)):
        if (frozenset(((i, j + 1), (i + 1, j + 1))) in have
                and (i, j) in t.nodes and (i + 1, j + 2) in t.nodes):
            t._crossing = t.main((i, j), (i + 1, j + 2), diam=8.0, matl="DI", year=2004,
                                 zone=CENTRAL, street="Railroad Cutoff")
            t._crossed = ((i, j + 1), (i + 1, j + 1))
            busy_blocks = {(i, j), (i, j + 1)}
            break

    # ---- transmission from the plant, the tank spur -----------------------------------------
    px, py = 100.0, -60.0
    t.node("WTP", px, py, CENTRAL)
    t.node("TM1", 92.0, 150.0, CENTRAL)
    t.node("TM2", 86.0, 360.0, CENTRAL)
    for a, b in (("WTP", "TM1"), ("TM1", "TM2"), ("TM2", (1, TRANS_ROW))):
        t.main(a, b, diam=24.0, matl="STL", year=1962, zone=CENTRAL, street="Plant Rd",
               cls="TRANS")
    t.sources.append(dict(SRC_ID="WTP-1", NAME="Millbrook Water Treatment Plant",
                          HGL_FT=SOURCE_HGL_FT, ELEV_FT=None, key="WTP"))
    tx, ty = t.xy((TANK_COL, TANK_ROW))
    t.node("TANK", tx - 35.0, ty + 42.0, CENTRAL)
    t.main((TANK_COL, TANK_ROW), "TANK", diam=16.0, matl="DI", year=1988, zone=CENTRAL,
           street="Tank Hill Rd", cls="TRANS")
    t.tanks.append(dict(TANK_ID="T-1", NAME="Tank Hill Elevated Tank", BASE_ELEV_FT=TANK_BASE_FT,
                        LEVEL_FT=TANK_LEVEL_FT, MAX_LVL_FT=TANK_MAX_FT, DIAM_FT=52.0,
                        CAP_GAL=630_000, key="TANK"))

    # ---- zone boundary mains: closed valves, the booster pump, the PRVs ---------------------
    for j in EAST_BOUNDARY_ROWS + (PUMP_ROW,):
        pump = j == PUMP_ROW
        m = t.main((34, j), (36, j), diam=12.0 if pump else 8.0, matl="DI",
                   year=1996 if pump else int(rng.integers(1978, 2005)), zone=CENTRAL,
                   street=_street(j=j), mid_vertex=True)  # digitised west -> east (uphill)
        if pump:
            t.pumps.append(dict(PUMP_ID="BPS-1", NAME="East Hill Booster Station", main=m,
                                STATUS="AUTO"))
        else:
            t.valves.append(dict(main=m, where=0.5, VALVE_TYPE="GATE", NORM_POS="NC",
                                 boundary=True))
    for i in RIVER_BOUNDARY_COLS + tuple(PRV_COLS):
        prv = i in PRV_COLS
        m = t.main((i, 7), (i, 5), diam=8.0, matl="DI", year=int(rng.integers(1970, 2000)),
                   zone=CENTRAL, street=_street(i=i, suffix="Hill Rd"),
                   mid_vertex=True)  # digitised north -> south (downhill, high -> low pressure)
        if prv:
            t.valves.append(dict(main=m, where=0.5, VALVE_TYPE="PRV", NORM_POS="NO",
                                 target_hgl=PRV_COLS[i], boundary=True))
        else:
            t.valves.append(dict(main=m, where=0.5, VALVE_TYPE="GATE", NORM_POS="NC",
                                 boundary=True))

    # ---- cul-de-sacs ------------------------------------------------------------------------
    blocks = [(i, j) for (i, j) in filter(_is_grid, t.nodes)
              if all((i + a, j + b) in t.nodes for a in (0, 1) for b in (0, 1))
              and len({t.zone_of[(i + a, j + b)] for a in (0, 1) for b in (0, 1)}) == 1
              and (i, j) not in busy_blocks]
    blocks.sort()
    pick = rng.choice(len(blocks), size=150, replace=False)
    culs = []
    for n, bi in enumerate(sorted(pick)):
        i, j = blocks[bi]
        ci, cj = [(0, 0), (1, 0), (0, 1), (1, 1)][rng.integers(4)]
        corner = (i + ci, j + cj)
        cx, cy = t.xy(corner)
        dx, dy = (0.5 - ci) * S, (0.5 - cj) * S
        f = rng.uniform(0.55, 0.75)
        zone = t.zone_of[corner]
        key = ("cul", n)
        t.node(key, cx + dx * f, cy + dy * f, zone)
        year, matl = _year_material(rng, dgrid(*corner), 6.0, zone, False)
        if zone == CENTRAL and np.hypot(corner[0] - KNOLL[0], corner[1] - KNOLL[1]) <= 4.0:
            year, matl = int(rng.integers(1993, 2000)), "PVC"
        m = t.main(corner, key, diam=6.0, matl=matl, year=max(year, 1950), zone=zone,
                   street=f"{STREETS_NS[(i * 7 + j) % len(STREETS_NS)]} Ct")
        culs.append(m)

    # ---- special places ---------------------------------------------------------------------
    # Creamery Lane: an old 4 in cast-iron main is the only feed to the creamery (runs fast)
    x0, y0 = t.xy((0, 15))
    t.node("CRM1", x0 - 110.0, y0 + 4.0, CENTRAL)
    t.node("CRM2", x0 - 200.0, y0 + 12.0, CENTRAL)
    cream_4in = t.main((0, 15), "CRM1", diam=4.0, matl="CI", year=1921, zone=CENTRAL,
                       street="Creamery Ln")
    cream_6in = t.main("CRM1", "CRM2", diam=6.0, matl="CI", year=1948, zone=CENTRAL,
                       street="Creamery Ln")
    # Quarry Road: a long 6 in dead end to the quarry, 1.4 km
    qx, qy = t.xy((0, 37))
    q_nodes = [(0, 37)]
    pts = [(qx - 40.0 * k - 6.0 * np.sin(k), qy + 175.0 * k) for k in range(1, 9)]
    for k, (x, y) in enumerate(pts):
        q_nodes.append(t.node(("QRY", k), x, y, CENTRAL))
    quarry = [t.main(a, b, diam=6.0, matl="CI", year=1958, zone=CENTRAL, street="Quarry Rd")
              for a, b in zip(q_nodes[:-1], q_nodes[1:])]
    # Willow Ridge: a subdivision whose connector was never joined to the grid (6 m gap)
    wr = {}
    for j in (39, 40, 41):
        for i in (12, 13, 14, 15):
            wr[(i, j)] = t.node(("WR", i, j), i * S + rng.uniform(-4, 4), j * S + 10.0, CENTRAL)
    willow = []
    for (i, j), key in wr.items():
        for di, dj in ((1, 0), (0, 1)):
            k2 = (i + di, j + dj)
            if k2 in wr:
                willow.append(t.main(key, wr[k2], diam=8.0 if dj == 0 and j == 40 else 6.0,
                                     matl="PVC", year=2019, zone=CENTRAL,
                                     street="Willow Ridge Dr" if dj == 0 else "Willow Ridge Ct"))
    gx, gy = t.xy((13, 37))
    t.node("WR_GAP", gx, gy + 6.0, CENTRAL)
    willow.append(t.main(wr[(13, 39)], "WR_GAP", diam=8.0, matl="PVC", year=2019, zone=CENTRAL,
                         street="Willow Ridge Dr"))
    # proposed mains north of Willow Ridge (not yet built)
    proposed = []
    for i in (12, 13, 14):
        a = t.node(("PRO", i), i * S, 42 * S + 10.0, CENTRAL)
        proposed.append(t.main(wr[(i, 41)], a, diam=8.0, matl="PVC", year=None, zone=CENTRAL,
                               street="Willow Ridge Dr", lifecycle="PRO"))

    t._special = dict(cream_4in=cream_4in, cream_6in=cream_6in, quarry=quarry, willow=willow,
                      proposed=proposed, culs=culs)
    _plant_main_defects(t)
    _finish_geometry(t)
    _place_valves(t)
    _place_hydrants(t)
    _place_meters(t)
    _assign_ids(t)
    return t


def _plant_main_defects(t: Town) -> None:
    """Duplicates, a main without diameter, a zero-length stub, abandoned mains, a crossing."""
    rng = t.rng
    # planted defects go on looped mains only (never a bridge), so that each one shows as
    # itself and does not cut off a part of the grid by accident
    g = nx.Graph()
    g.add_edges_from((m.a, m.b) for m in t.mains if m.lifecycle == "ACT")
    bridges = {frozenset(e) for e in nx.bridges(g)}
    grid_mains = [m for m in t.mains if _is_grid(m.a) and _is_grid(m.b) and not m.mid_vertex
                  and frozenset((m.a, m.b)) not in bridges and m is not t._crossing
                  and frozenset((m.a, m.b)) != frozenset(t._crossed)]
    central6 = [m for m in grid_mains if m.zone == CENTRAL and m.diam == 6.0
                and not _in_box(*m.a, OLD_TOWN)]
    east6 = [m for m in grid_mains if m.zone == EAST_HILL and m.diam == 6.0]
    central8 = [m for m in grid_mains if m.zone == CENTRAL and m.diam == 8.0]
    chosen = rng.choice(len(central6), size=12, replace=False)
    c6 = [central6[k] for k in chosen]
    t._defect = {
        "snapped": c6[0:6],  # end moved 0.10-0.45 m: within the 0.5 m snap tolerance
        "unsnapped": c6[6:8],  # end moved 1.5-2.5 m: beyond tolerance, stays unconnected
        "dup_other_id": c6[8],  # digitised twice, second copy under a new id
        "tee_mid": c6[9:12],  # cul-de-sacs teed into the middle of these mains
    }
    t._defect["dup_same_id"] = central8[int(rng.integers(len(central8)))]
    t._defect["no_diameter"] = east6[int(rng.integers(len(east6)))]
    t._defect["no_diameter"].diam = None
    # abandoned 4 in cast iron left in the ground beside old-town mains (offset 4 m)
    old = [m for m in grid_mains if m.zone == CENTRAL and _in_box(*m.a, OLD_TOWN)]
    t._abandoned = [old[k] for k in rng.choice(len(old), size=10, replace=False)]
    t._defect["crossing"] = t._crossing


def _finish_geometry(t: Town) -> None:
    """Vertex lists for every main: gentle bends, midpoint vertices for valves and pumps."""
    rng = t.rng
    for m in t.mains:
        ax, ay = t.xy(m.a)
        bx, by = t.xy(m.b)
        verts = [(ax, ay)]
        if m.mid_vertex:
            verts.append(((ax + bx) / 2.0, (ay + by) / 2.0))
        elif rng.random() < 0.25 and m not in t._defect["tee_mid"] and m is not t._defect.get(
                "crossing"):
            L = np.hypot(bx - ax, by - ay)
            f = rng.uniform(0.35, 0.65)
            off = rng.uniform(-3.0, 3.0)
            nx_, ny_ = -(by - ay) / L, (bx - ax) / L
            verts.append((ax + f * (bx - ax) + off * nx_, ay + f * (by - ay) + off * ny_))
        verts.append((bx, by))
        m.verts = verts
    # the crossed grid main must be straight so the crossing falls in its middle
    if "crossing" in t._defect:
        a, b = t._crossed
        for m in t.mains:
            if {m.a, m.b} == {a, b}:
                m.verts = [m.verts[0], m.verts[-1]]
                t._defect["crossed"] = m
    # the tee'd mains: a cul-de-sac starts at the exact midpoint of each
    for n, m in enumerate(t._defect["tee_mid"]):
        (ax, ay), (bx, by) = m.verts[0], m.verts[-1]
        mx, my = (ax + bx) / 2.0, (ay + by) / 2.0
        L = np.hypot(bx - ax, by - ay)
        nx_, ny_ = -(by - ay) / L, (bx - ax) / L
        key = ("tee", n)
        t.node(key, mx + 25.0 * nx_, my + 25.0 * ny_, m.zone)
        c = t.main(("teept", n), key, diam=6.0, matl="PVC", year=2007, zone=m.zone,
                   street=f"{STREETS_EW[n]} Ct")
        t.nodes[("teept", n)] = (mx, my)
        c.verts = [(mx, my), t.xy(key)]
        t._defect.setdefault("tee_spurs", []).append(c)
    # unsnapped ends: move the end vertex off the shared node
    for n, m in enumerate(t._defect["snapped"] + t._defect["unsnapped"]):
        d = rng.uniform(0.10, 0.45) if n < 6 else rng.uniform(1.5, 2.5)
        ang = rng.uniform(0, 2 * np.pi)
        x, y = m.verts[-1]
        m.verts[-1] = (x + d * np.cos(ang), y + d * np.sin(ang))
        m.gap_m = d
    # abandoned mains beside old-town mains
    for m in t._abandoned:
        (ax, ay), (bx, by) = m.verts[0], m.verts[-1]
        L = np.hypot(bx - ax, by - ay)
        nx_, ny_ = -(by - ay) / L, (bx - ax) / L
        ab = Main(a=None, b=None, diam=4.0, matl="CI", year=int(rng.integers(1895, 1912)),
                  zone=CENTRAL, street=m.street, lifecycle="ABD")
        ab.verts = [(ax + 4 * nx_, ay + 4 * ny_), (bx + 4 * nx_, by + 4 * ny_)]
        t.mains.append(ab)
        t._defect.setdefault("abandoned", []).append(ab)
    # a zero-length stub at a grid node (two identical vertices)
    x, y = t.xy((30, 20))
    stub = Main(a=None, b=None, diam=6.0, matl="DI", year=2011, zone=CENTRAL,
                street=_street(j=20))
    stub.verts = [(x, y), (x, y)]
    t.mains.append(stub)
    t._defect["zero_length"] = stub
    # duplicates
    m = t._defect["dup_other_id"]
    dup = Main(a=m.a, b=m.b, diam=m.diam, matl=m.matl, year=m.year, zone=m.zone, street=m.street)
    dup.verts = list(m.verts)
    t.mains.append(dup)
    t._defect["dup_other_id_copy"] = dup


def _place_valves(t: Town) -> None:
    """Isolation valves near intersections (on a vertex inserted into the main)."""
    rng = t.rng
    cands = [m for m in t.mains if m.lifecycle == "ACT" and not m.mid_vertex and m.a is not None
             and m.diam is not None and len(m.verts) >= 2 and m not in t._defect["tee_mid"]
             and m is not t._defect.get("crossed") and m not in t._defect["snapped"]
             and m not in t._defect["unsnapped"] and m is not t._crossing
             and m is not t._defect["dup_other_id"] and m is not t._defect["dup_same_id"]]
    for m in cands:
        if rng.random() >= 0.13:
            continue
        (ax, ay), (bx, by) = m.verts[0], m.verts[1]
        f = 0.12 if rng.random() < 0.5 else 0.88
        if len(m.verts) > 2:
            f = 0.2
        p = (ax + f * (bx - ax), ay + f * (by - ay))
        m.verts.insert(1, p)
        t.valves.append(dict(main=m, vertex=1, VALVE_TYPE="BFV" if m.diam >= 16 else "GATE",
                             NORM_POS="NO"))
    # a closed valve left shut after a repair: it cuts off a cul-de-sac with customers
    cul = [m for m in t._special["culs"] if m.zone == CENTRAL and m.diam == 6.0
           and len(m.verts) == 2]
    m = cul[7]
    (ax, ay), (bx, by) = m.verts
    m.verts.insert(1, (ax + 0.15 * (bx - ax), ay + 0.15 * (by - ay)))
    v = dict(main=m, vertex=1, VALVE_TYPE="GATE", NORM_POS="NC")
    t.valves.append(v)
    t._defect["closed_cutoff"] = v
    t._defect["closed_cutoff_main"] = m
    # boundary valves, PRVs and the pump sit at the midpoint vertex of their main
    for v in t.valves:
        if "where" in v:
            v["vertex"] = 1


def _hydrant_at(t, m, f, off, **attrs):
    x, y = _offset_point(np.asarray(m.verts), f, off)
    h = dict(x=x, y=y, main=m, **attrs)
    t.hydrants.append(h)
    return h


def land_use(t: Town, x, y, zone):
    """Land-use code at a point (local metres)."""
    rng = t.rng
    gi, gj = x / S, y / S
    if zone == RIVERSIDE and gi >= 30:
        return "IND"
    if gi < 2.5 and 13 <= gj <= 17:
        return "IND"
    if _in_box(gi, gj, DOWNTOWN):
        return "COM"
    if zone == CENTRAL and abs(gj - 22) < 0.6 and 4 <= gi <= 31:
        return "COM"
    for sx, sy in ((9.5, 18.5), (24.5, 25.5), (42.5, 24.5), (30.5, 9.5)):
        if np.hypot(gi - sx, gj - sy) < 1.6:
            return "INS"
    if zone == CENTRAL and np.hypot(gi - 19, gj - 11) < 9:
        u = rng.random()
        return "RM" if u < 0.3 else ("R2" if u < 0.6 else "R1")
    return "R2" if rng.random() < 0.08 else "R1"


def _place_hydrants(t: Town) -> None:
    rng = t.rng
    dist = [m for m in t.mains if m.lifecycle == "ACT" and m.cls == "DIST" and m.a is not None
            and not m.mid_vertex and m not in t._special["quarry"]
            and m not in t._special["willow"] and m is not t._defect["dup_other_id_copy"]
            and m is not t._defect["zero_length"] and m is not t._special["cream_4in"]
            and m is not t._special["cream_6in"]]
    for m in dist:
        if m in t._special["culs"]:
            if rng.random() < 0.35:
                _hydrant_at(t, m, 0.93, rng.choice([-1, 1]) * rng.uniform(2.0, 4.0))
            continue
        if rng.random() < 0.15:
            _hydrant_at(t, m, rng.uniform(0.3, 0.7), rng.choice([-1, 1]) * rng.uniform(2, 5))
    for k, m in enumerate(t._special["quarry"]):
        if k % 2 == 1 or k == len(t._special["quarry"]) - 1:
            h = _hydrant_at(t, m, 0.97, 3.0)
            h["quarry"] = True
    t._special["quarry_hydrants"] = [h for h in t.hydrants if h.get("quarry")]
    t._special["creamery_hydrant"] = _hydrant_at(t, t._special["cream_6in"], 0.95, -3.0,
                                                 LAND_USE="IND", REQ_FF_GPM=2500.0)
    for m in t._special["willow"][:12:4]:
        _hydrant_at(t, m, 0.5, 3.0, willow=True)
    # a hydrant mapped in the middle of the golf course, far from every main
    t._defect["far_hydrant"] = dict(x=30.5 * S + 11.0, y=33.5 * S - 7.0, main=None,
                                    LAND_USE="R1")
    t.hydrants.append(t._defect["far_hydrant"])

    for h in t.hydrants:
        zone = h["main"].zone if h["main"] is not None else CENTRAL
        h["zone"] = zone
        if "LAND_USE" not in h:
            if h.get("quarry"):
                h["LAND_USE"] = "COM" if h["y"] > 37 * S + 700 else "R1"
            else:
                h["LAND_USE"] = land_use(t, h["x"], h["y"], zone)
        if "REQ_FF_GPM" not in h:  # a building-specific flow for some non-residential sites
            u = rng.random()
            big = h["LAND_USE"] not in ("R1", "R2")
            h["REQ_FF_GPM"] = (2000.0 if u < 0.15 else 3500.0 if u < 0.22 else None) if big \
                else None
        h["STATUS"] = "OOS" if rng.random() < 0.015 else "IS"
        h["LAT_LEN_FT"] = round(float(rng.uniform(8.0, 25.0)), 1)
    # the quarry's scale house: required flow from the attribute
    t._special["quarry_hydrants"][-1]["REQ_FF_GPM"] = 1500.0
    t._special["quarry_hydrants"][-1]["STATUS"] = "IS"
    t._defect["far_hydrant"]["REQ_FF_GPM"] = None


CLASS_BY_LU = {"R1": "SFR", "R2": "SFR", "RM": "MFR", "COM": "COM", "IND": "IND", "INS": "INST"}
GPD_MEAN = {"R1": 190.0, "R2": 320.0, "RM": 2100.0, "COM": 800.0, "IND": 6200.0, "INS": 3500.0}
PER_MAIN = {"R1": 2.3, "R2": 2.6, "RM": 1.0, "COM": 1.6, "IND": 0.45, "INS": 0.2}
SVC_IN = {"SFR": 0.625, "MFR": 2.0, "COM": 1.0, "IND": 2.0, "INST": 2.0, "IRR": 1.5}


def _place_meters(t: Town) -> None:
    rng = t.rng
    dist = [m for m in t.mains if m.lifecycle == "ACT" and m.cls == "DIST" and m.a is not None
            and not m.mid_vertex and m is not t._defect["dup_other_id_copy"]
            and m is not t._defect["zero_length"] and m is not t._special["cream_4in"]]
    for m in dist:
        line = np.asarray(m.verts)
        mx, my = line.mean(axis=0)
        lu = land_use(t, mx, my, m.zone)
        if m is t._special["cream_6in"]:
            lu = "R1"
        lam = PER_MAIN[lu] * (np.hypot(*np.diff(line, axis=0).T).sum() / S)
        n = int(rng.poisson(lam))
        for _ in range(n):
            f = rng.uniform(0.08, 0.92)
            off = rng.choice([-1, 1]) * rng.uniform(9.0, 16.0)
            h = _offset_point(line, f, off)
            cls = CLASS_BY_LU[lu]
            gpd_ = GPD_MEAN[lu] * rng.lognormal(-0.18, 0.6)
            t.meters.append(dict(x=h[0], y=h[1], ACCT_CLASS=cls, AVG_GPD=round(gpd_, 1),
                                 zone=m.zone))
    # irrigation meters at the park, the cemetery and the schools
    grid_keys = sorted(filter(_is_grid, t.nodes))
    gxy = np.array([t.nodes[k] for k in grid_keys])
    for gi, gj, n in ((27.5, 13.5, 3), (4.0, 34.0, 2), (9.5, 18.5, 2), (24.5, 25.5, 2),
                      (42.5, 24.5, 2), (30.5, 9.5, 2)):
        # at the street corner nearest the site, set back from the mains
        k0 = grid_keys[int(np.argmin(np.hypot(gxy[:, 0] - gi * S, gxy[:, 1] - gj * S)))]
        x0, y0 = t.nodes[k0]
        sx, sy = np.sign(gi * S - x0) or 1.0, np.sign(gj * S - y0) or 1.0
        for k in range(n):
            t.meters.append(dict(x=x0 + sx * (12.0 + 9.0 * k), y=y0 + sy * 12.0,
                                 ACCT_CLASS="IRR", AVG_GPD=round(1400.0 * rng.lognormal(0, .4), 1),
                                 zone=t.zone_of[k0]))
    # the creamery at the end of Creamery Ln
    x, y = t.xy("CRM2")
    t._special["creamery_meter"] = dict(x=x + 6.0, y=y - 12.0, ACCT_CLASS="IND",
                                        AVG_GPD=110_000.0, zone=CENTRAL)
    t.meters.append(t._special["creamery_meter"])
    # a meter with a mistyped location, far from every main
    t._defect["far_meter"] = dict(x=3300.0, y=-520.0, ACCT_CLASS="SFR", AVG_GPD=210.0,
                                  zone=RIVERSIDE)
    t.meters.append(t._defect["far_meter"])
    # homes on the cul-de-sac behind the valve left closed
    line = np.asarray(t._defect["closed_cutoff_main"].verts)
    for f, off, gpd_ in ((0.55, 10.0, 245.0), (0.7, -11.0, 180.0), (0.9, 12.0, 310.0),
                         (0.95, -10.0, 205.0)):
        x, y = _offset_point(line, f, off)
        t.meters.append(dict(x=x, y=y, ACCT_CLASS="SFR", AVG_GPD=gpd_, zone=CENTRAL))


def _offset_point(line, f, off):
    """The point at fraction f along a polyline, moved off [m] to its left."""
    seg = np.hypot(*np.diff(line, axis=0).T)
    cum = np.concatenate([[0.0], np.cumsum(seg)])
    s = f * cum[-1]
    k = int(np.clip(np.searchsorted(cum, s) - 1, 0, len(seg) - 1))
    u = (s - cum[k]) / seg[k] if seg[k] > 0 else 0.0
    (ax, ay), (bx, by) = line[k], line[k + 1]
    nx_, ny_ = -(by - ay) / seg[k], (bx - ax) / seg[k]
    return ax + u * (bx - ax) + off * nx_, ay + u * (by - ay) + off * ny_


def _assign_ids(t: Town) -> None:
    """Sequential ids in a stable order (by location), as an export from a GIS would have."""
    order = sorted(range(len(t.mains)),
                   key=lambda k: (round(t.mains[k].verts[0][1] // 400), t.mains[k].verts[0][0],
                                  t.mains[k].verts[0][1], k))
    for n, k in enumerate(order):
        t.mains[k].id = f"WM-{10001 + n}"
    # the exact duplicate: same row twice (added at write time); the other copy gets a new id
    for n, h in enumerate(sorted(t.hydrants, key=lambda h: (h["y"] // 400, h["x"]))):
        h["id"] = f"HYD-{1001 + n}"
    for n, v in enumerate(sorted(t.valves, key=lambda v: (v["main"].verts[v["vertex"]][1] // 400,
                                                           v["main"].verts[v["vertex"]][0]))):
        if v["VALVE_TYPE"] == "PRV":
            continue
        v["id"] = f"V-{20001 + n}"
    prvs = sorted((v for v in t.valves if v["VALVE_TYPE"] == "PRV"),
                  key=lambda v: v["main"].verts[1][0])
    for n, v in enumerate(prvs):
        v["id"] = f"PRV-{n + 1}"
    for n, mt in enumerate(sorted(t.meters, key=lambda m: (m["y"] // 400, m["x"]))):
        mt["id"] = f"{300001 + n}"


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


def _pt(x, y):
    return shapely.points(np.asarray(x) + X0, np.asarray(y) + Y0)


def frames(t: Town) -> dict[str, gpd.GeoDataFrame]:
    """The layers as GeoDataFrames, in the utility's field names and units."""
    rows, geoms = [], []
    for m in sorted(t.mains, key=lambda m: m.id):
        v = np.asarray(m.verts)
        z = np.round(ground_ft(v[:, 0], v[:, 1]), 1)
        geoms.append(shapely.linestrings(v[:, 0] + X0, v[:, 1] + Y0, z))
        rating = ROUGH_CLASS_PSI.get(m.matl)
        if m.matl == "PVC" and m.year is not None and m.year >= 2000:
            rating = 235
        rows.append(dict(MAIN_ID=m.id, DIAM_IN=m.diam, MATL=m.matl, YR_INST=m.year,
                         LIFECYCLE=m.lifecycle, PRESS_ZONE=m.zone, MAIN_CLASS=m.cls,
                         CLASS_PSI=rating, STREET=m.street,
                         LENGTH_FT=round(float(shapely.length(geoms[-1])) / FT, 1)))
    dup = t._defect["dup_same_id"]
    k = next(n for n, r in enumerate(rows) if r["MAIN_ID"] == dup.id)
    rows.insert(k + 1, dict(rows[k]))
    geoms.insert(k + 1, geoms[k])
    mains = gpd.GeoDataFrame(pd.DataFrame(rows), geometry=geoms, crs=CRS)
    mains["YR_INST"] = mains["YR_INST"].astype("Int32")
    mains["CLASS_PSI"] = mains["CLASS_PSI"].astype("Int32")

    hyd = sorted(t.hydrants, key=lambda h: h["id"])
    hx = np.array([h["x"] for h in hyd])
    hy = np.array([h["y"] for h in hyd])
    hydrants = gpd.GeoDataFrame(dict(
        HYD_ID=[h["id"] for h in hyd],
        LAND_USE=[h["LAND_USE"] for h in hyd],
        REQ_FF_GPM=pd.array([h["REQ_FF_GPM"] for h in hyd], dtype="Float64"),
        STATUS=[h["STATUS"] for h in hyd],
        PRESS_ZONE=[h["zone"] for h in hyd],
        LAT_LEN_FT=[h["LAT_LEN_FT"] for h in hyd],
        LAT_DIAM_IN=[6.0] * len(hyd),
        ELEV_FT=np.round(ground_ft(hx, hy), 1),
    ), geometry=_pt(hx, hy), crs=CRS)

    vrows, vx, vy = [], [], []
    for v in sorted(t.valves, key=lambda v: v["id"]):
        m = v["main"]
        x, y = m.verts[v["vertex"]]
        vx.append(x)
        vy.append(y)
        g = float(np.round(ground_ft(x, y), 1))
        setting = None
        if v["VALVE_TYPE"] == "PRV":
            setting = float(round((v["target_hgl"] - g) / 2.3067))
        vrows.append(dict(VALVE_ID=v["id"], VALVE_TYPE=v["VALVE_TYPE"], NORM_POS=v["NORM_POS"],
                          SETTING_PSI=setting, DIAM_IN=m.diam, ELEV_FT=g, MAIN_ID=m.id,
                          BOUNDARY=1 if v.get("boundary") else 0))
    valves = gpd.GeoDataFrame(pd.DataFrame(vrows), geometry=_pt(vx, vy), crs=CRS)
    valves["SETTING_PSI"] = valves["SETTING_PSI"].astype("Float64")
    # the PRV stations live in a layer of their own, with the direction they let water down
    # (W: with the digitised direction of their main)
    is_prv = (valves["VALVE_TYPE"] == "PRV").to_numpy()
    prvs = valves[is_prv].reset_index(drop=True).assign(FLOW_DIR="W")
    valves = valves[~is_prv].reset_index(drop=True).drop(columns=["SETTING_PSI"])

    tx, ty = zip(*(t.xy(r["key"]) for r in t.tanks))
    tanks = gpd.GeoDataFrame(
        pd.DataFrame([{k: v for k, v in r.items() if k != "key"} for r in t.tanks])
        .assign(GRND_ELEV_FT=np.round(ground_ft(tx, ty), 1)), geometry=_pt(tx, ty), crs=CRS)

    sx, sy = zip(*(t.xy(r["key"]) for r in t.sources))
    sources = gpd.GeoDataFrame(
        pd.DataFrame([{k: v for k, v in r.items() if k not in ("key", "ELEV_FT")}
                      for r in t.sources]).assign(ELEV_FT=np.round(ground_ft(sx, sy), 1)),
        geometry=_pt(sx, sy), crs=CRS)

    prow, px, py = [], [], []
    for p in t.pumps:
        x, y = p["main"].verts[1]
        px.append(x)
        py.append(y)
        (q1, h1), (q2, h2), (q3, h3) = PUMP_CURVE
        prow.append(dict(PUMP_ID=p["PUMP_ID"], NAME=p["NAME"], STATUS=p["STATUS"],
                         Q1_GPM=q1, H1_FT=h1, Q2_GPM=q2, H2_FT=h2, Q3_GPM=q3, H3_FT=h3,
                         DSGN_GPM=q2, DSGN_HD_FT=h2, MAIN_ID=p["main"].id, FLOW_DIR="W",
                         ELEV_FT=float(np.round(ground_ft(x, y), 1))))
    pumps = gpd.GeoDataFrame(pd.DataFrame(prow), geometry=_pt(px, py), crs=CRS)

    mt = sorted(t.meters, key=lambda m: m["id"])
    mx = np.array([m["x"] for m in mt])
    my = np.array([m["y"] for m in mt])
    meters = gpd.GeoDataFrame(dict(
        METER_NO=[m["id"] for m in mt],
        ACCT_CLASS=[m["ACCT_CLASS"] for m in mt],
        AVG_GPD=[m["AVG_GPD"] for m in mt],
        SVC_SIZE_IN=[SVC_IN[m["ACCT_CLASS"]] for m in mt],
        PRESS_ZONE=[m["zone"] for m in mt],
    ), geometry=_pt(mx, my), crs=CRS)
    return dict(WaterMains=mains, Hydrants=hydrants, SystemValves=valves, PRVStations=prvs,
                Tanks=tanks, PumpStations=pumps, SupplySources=sources, CustomerMeters=meters)


def planted(t: Town) -> dict[str, object]:
    """Ids of the planted defects and weak spots (documented in sample_gis/README.md)."""
    d, s = t._defect, t._special
    return {
        "duplicate_same_id": d["dup_same_id"].id,
        "duplicate_other_id": [d["dup_other_id"].id, d["dup_other_id_copy"].id],
        "no_diameter": d["no_diameter"].id,
        "zero_length": d["zero_length"].id,
        "snapped_within_tolerance": [m.id for m in d["snapped"]],
        "unsnapped_beyond_tolerance": [m.id for m in d["unsnapped"]],
        "tee_into_mid_span": [m.id for m in d["tee_mid"]],
        "tee_spurs": [m.id for m in d["tee_spurs"]],
        "crossing_without_junction": [d["crossing"].id, d["crossed"].id],
        "abandoned": [m.id for m in d["abandoned"]],
        "proposed": [m.id for m in s["proposed"]],
        "disconnected_subdivision": [m.id for m in s["willow"]],
        "willow_hydrants": [h["id"] for h in t.hydrants if h.get("willow")],
        "closed_valve_cutoff": d["closed_cutoff"]["id"],
        "closed_valve_cutoff_main": d["closed_cutoff_main"].id,
        "far_hydrant": d["far_hydrant"]["id"],
        "far_meter": d["far_meter"]["id"],
        "creamery_4in_main": s["cream_4in"].id,
        "creamery_meter": s["creamery_meter"]["id"],
        "creamery_hydrant": s["creamery_hydrant"]["id"],
        "quarry_mains": [m.id for m in s["quarry"]],
        "quarry_hydrants": [h["id"] for h in s["quarry_hydrants"]],
        "boundary_valves": sorted(v["id"] for v in t.valves if v.get("boundary")
                                  and v["VALVE_TYPE"] != "PRV"),
        "prvs": sorted(v["id"] for v in t.valves if v["VALVE_TYPE"] == "PRV"),
        "pump_main": t.pumps[0]["main"].id,
        **getattr(t, "_flow_tests", {}),
    }


#: the manifest's name, beside the GeoPackage
MANIFEST = "manifest.json"


def manifest_text(t: Town) -> str:
    """The manifest: the ids of :func:`planted`, as JSON (sorted keys, one value a line)."""
    doc = {"about": "Planted GIS defects, weak spots and notable ids of the Millbrook sample; "
                    "written by scripts/make_sample_gis.py (do not edit).",
           **planted(t)}
    return json.dumps(doc, indent=1, sort_keys=True) + "\n"


def write(path: str | Path, seed: int = SEED) -> Town:
    """Build the town and write every layer to ``path`` (replaced if it exists) and the
    manifest of planted ids beside it (:data:`MANIFEST`)."""
    path = Path(path)
    t = build(seed)
    layers = frames(t)
    tmp = path.with_name(path.stem + ".tmp.gpkg")
    if tmp.exists():
        tmp.unlink()
    for name in LAYERS:
        layers[name].to_file(tmp, layer=name, driver="GPKG", engine="pyogrio")
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from sample_flow_tests import add_flow_tests

    t._flow_tests = add_flow_tests(tmp, Path(__file__).resolve().parents[1] / "sample_gis"
                                   / "millbrook.toml", seed)
    tmp.replace(path)
    target = path.with_name(MANIFEST)
    mtmp = target.with_name(f".{MANIFEST}.tmp")
    mtmp.write_text(manifest_text(t), encoding="utf-8")
    mtmp.replace(target)
    return t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", default=str(Path(__file__).resolve().parents[1] / "sample_gis"
                                         / "millbrook.gpkg"))
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--quiet", action="store_true")
    args = ap.parse_args(argv)
    t = write(args.out, args.seed)
    if not args.quiet:
        lay = frames(t)
        for name in LAYERS:
            print(f"{name:15s} {len(lay[name]):6d} features")
        import pyogrio

        for name in FLOW_TEST_LAYERS:
            print(f"{name:15s} {len(pyogrio.read_dataframe(args.out, layer=name)):6d} features")
        gpd_ = lay["CustomerMeters"].groupby("PRESS_ZONE")["AVG_GPD"].sum()
        for z, v in gpd_.items():
            print(f"metered {z:10s} {v / 1e6:.3f} MGD")
        print(f"metered total      {gpd_.sum() / 1e6:.3f} MGD")
        for k, v in planted(t).items():
            print(f"{k}: {v}")
        print(f"wrote {args.out} ({Path(args.out).stat().st_size / 1e6:.2f} MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
