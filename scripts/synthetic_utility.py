"""One synthetic utility for every benchmark: a GIS export shaped like a real town's.

Street-grid mains with loops (a jittered 100 m grid with about a quarter of its streets
missing, arterials every 8th street, transmission mains every 24th), cul-de-sacs (about 15 % of
the mains), ground elevation as the lines' Z on a rolling terrain, ends jittered 2 cm as exports
carry them; isolation valves on every leg of an intersection but one, about 6 m from it
(common practice: "n - 1 valves per intersection"); hydrants about every 150 m of main, 8 m
off it (common practice: 300-500 ft spacing); customer meters, two per main, 15 m off it, with
consumption drawn from a gamma distribution (mean about 180 gal/day, a single-family home:
common practice); one source per 2,500 mains at arterial crossings, grade about 54 psi above
the highest ground. Everything is seeded and invented (the fictional town of Millbrook,
scaled up).

    from synthetic_utility import write_utility, config_text
    counts = write_utility(path, 100_000)

Layers: ``mains``, ``valves``, ``hydrants``, ``meters``, ``sources`` (EPSG:32616, metres).

``zones=True`` adds pressure zones, as towns on rolling ground have them: the grid is cut into
districts of 24 x 24 blocks by the transmission mains, and about one district in four (seeded,
none holding a source) lies in a hollow up to ``ZONE_DEPTH_M`` deep. Each such district is a
zone of its own: every main crossing its edge gets a normally closed valve except two on
arterials, which get pressure-reducing valves (layer ``prv_stations``, set to
``ZONE_SETTING_PSI``; their bearing is the flow's, from the edge into the zone). Without the
valves the hollow's lowest ground would see about 100 psi; below them 40-80 psi (common
practice: pressure zones keep service pressure within about 40-80 psi).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import minimum_spanning_tree

CRS = "EPSG:32616"
X0, Y0 = 500_000.0, 4_600_000.0


#: blocks per district side (districts are bounded by the transmission mains, every 24th
#: street), the depth of a low district's hollow, and its reducing valves' setting
DISTRICT = 24
ZONE_DEPTH_M = 30.0
ZONE_SETTING_PSI = 40.0


def _terrain(x: np.ndarray, y: np.ndarray, low: np.ndarray | None = None) -> np.ndarray:
    """Ground [m]; with ``low`` (a boolean table of districts), hollows in those districts:
    full depth four blocks in from their edges, rising smoothly to nothing at the edges."""
    z = 100.0 + 8.0 * np.sin((x - X0) / 1500.0) + 6.0 * np.cos((y - Y0) / 2100.0)
    if low is None:
        return z
    u = (np.asarray(x) - X0) / (100.0 * DISTRICT)
    v = (np.asarray(y) - Y0) / (100.0 * DISTRICT)
    a = np.clip(np.floor(u).astype(np.int64), 0, low.shape[0] - 1)
    b = np.clip(np.floor(v).astype(np.int64), 0, low.shape[1] - 1)
    inside = (u >= 0) & (v >= 0) & (u < low.shape[0]) & (v < low.shape[1])
    edge = np.minimum(np.minimum(u - a, a + 1 - u), np.minimum(v - b, b + 1 - v)) * DISTRICT
    t = np.clip(edge / 4.0, 0.0, 1.0)
    depth = ZONE_DEPTH_M * t * t * (3.0 - 2.0 * t)
    return z - np.where(inside & low[a, b], depth, 0.0)


def street_grid(side: int, n_grid: int, rng: np.random.Generator):
    """The street grid's mains as node pairs on a ``side`` x ``side`` lattice (node
    ``i * side + j``), about ``n_grid`` of them, and the street each runs along.

    A quarter of the streets are missing, but never an arterial (every 8th street), and the
    grid stays connected: a random spanning tree is always kept.
    """
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    h, v = ii < side - 1, jj < side - 1
    a = np.r_[ii[h] * side + jj[h], ii[v] * side + jj[v]]
    b = np.r_[(ii[h] + 1) * side + jj[h], ii[v] * side + jj[v] + 1]
    # the street each main runs along: rows for east-west mains, columns for north-south
    street = np.r_[jj[h], ii[v]]
    w = rng.random(a.size) + 1.0
    tree = minimum_spanning_tree(coo_matrix((w, (a, b)), shape=(side * side,) * 2)).tocoo()
    n = np.int64(side) * side
    # an edge's code in 64 bits: the tree's indices are 32-bit, and min * n overflows 32 bits
    # from about 215 x 215 nodes on (a 1M-main utility has 754 x 754)
    code = np.minimum(a, b).astype(np.int64) * n + np.maximum(a, b)
    t_row, t_col = tree.row.astype(np.int64), tree.col.astype(np.int64)
    t_code = np.minimum(t_row, t_col) * n + np.maximum(t_row, t_col)
    in_tree = np.isin(code, t_code)
    spare = np.flatnonzero(~in_tree & (street % 8 != 0))
    drop = rng.choice(spare, min(spare.size, max(0, a.size - n_grid)), replace=False)
    keep = np.ones(a.size, bool)
    keep[drop] = False
    return a[keep], b[keep], street[keep]


def make_utility(n_mains: int, seed: int = 7, zones: bool = False) -> dict:
    """GeoDataFrames of a synthetic utility with about ``n_mains`` mains (with pressure
    zones in low districts: ``zones``, see the module notes)."""
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(seed)
    n_grid = int(round(n_mains * 0.85))
    side = int(np.ceil(np.sqrt(n_grid / 1.5))) + 1  # 2 side^2 streets, 3/4 kept
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    px = X0 + ii * 100.0 + rng.normal(0, 5, ii.size)
    py = Y0 + jj * 100.0 + rng.normal(0, 5, jj.size)
    a, b, street = street_grid(side, n_grid, rng)
    m_grid = a.size
    # districts in hollows (zones): whole districts only, drawn from their own generator so
    # that the town without zones stays what it was
    nd = (side - 1) // DISTRICT
    low = None
    if zones and nd > 0:
        zr = np.random.default_rng(seed + 1)
        low = np.zeros((nd + 1, nd + 1), dtype=bool)
        low[:nd, :nd] = zr.random((nd, nd)) < 0.25
    # cul-de-sacs off random grid nodes, 60-120 m long
    n_cul = max(0, n_mains - m_grid)
    base = rng.integers(0, side * side, n_cul)
    ang = rng.uniform(0, 2 * np.pi, n_cul)
    ln = rng.uniform(60, 120, n_cul)
    cx, cy = px[base] + ln * np.cos(ang), py[base] + ln * np.sin(ang)
    if low is not None:
        # a cul-de-sac passing over or ending on another street would join them (and a
        # hollow to the zone above it): the zoned town leaves those out
        import shapely

        grid = shapely.linestrings(np.stack([np.column_stack([px[a], py[a]]),
                                             np.column_stack([px[b], py[b]])], axis=1))
        # from 10 m out: a cul-de-sac along one of its own node's streets counts too
        c0 = np.column_stack([px[base] + 10.0 * np.cos(ang), py[base] + 10.0 * np.sin(ang)])
        cul = shapely.linestrings(np.stack([c0, np.column_stack([cx, cy])], axis=1))
        ci, _ = shapely.STRtree(grid).query(cul, predicate="dwithin", distance=3.0)
        ok = np.ones(n_cul, dtype=bool)
        ok[ci] = False
        base, cx, cy = base[ok], cx[ok], cy[ok]
        n_cul = int(ok.sum())
    sx = np.r_[px[a], px[base]]
    sy = np.r_[py[a], py[base]]
    ex = np.r_[px[b], cx]
    ey = np.r_[py[b], cy]
    m = sx.size
    jit = rng.uniform(-0.02, 0.02, (m, 4))
    start = np.column_stack([sx + jit[:, 0], sy + jit[:, 1]])
    end = np.column_stack([ex + jit[:, 2], ey + jit[:, 3]])
    mid = (start + end) / 2 + rng.normal(0, 1, (m, 2))
    xy = np.stack([start, mid, end], axis=1).reshape(-1, 2)
    z = _terrain(xy[:, 0], xy[:, 1], low)
    lines = shapely.linestrings(np.column_stack([xy, z]), indices=np.repeat(np.arange(m), 3))
    lines2d = shapely.force_2d(lines)
    street = np.r_[street, np.full(n_cul, -1)]
    diam = rng.choice([6.0, 8.0], m, p=[0.6, 0.4])
    diam[street % 8 == 0] = 12.0
    diam[street % 24 == 0] = 16.0
    diam[street < 0] = 6.0
    year = rng.integers(1920, 2024, m)
    matl = np.where(year < 1960, "CI", np.where(year < 1985, "AC", "DI"))
    main_id = np.char.add("M", np.arange(m).astype(str))
    mains = gpd.GeoDataFrame({"MAIN_ID": main_id, "DIAM_IN": diam, "MATL": matl,
                              "YEAR": year, "STATUS": "ACT"}, geometry=lines, crs=CRS)

    # valves: at each grid node, on every incident main but one, 6 m from the node
    ends_node = np.r_[a, b, base]
    ends_main = np.r_[np.arange(m_grid), np.arange(m_grid), m_grid + np.arange(n_cul)]
    ends_at_start = np.r_[np.ones(m_grid, bool), np.zeros(m_grid, bool), np.ones(n_cul, bool)]
    order = np.lexsort((rng.random(ends_node.size), ends_node))
    first = np.r_[True, ends_node[order][1:] != ends_node[order][:-1]]
    pick = order[~first]  # one leg per node goes without a valve
    length = shapely.length(lines2d)
    dist = np.where(ends_at_start[pick], 6.0, length[ends_main[pick]] - 6.0)
    vpts = shapely.line_interpolate_point(lines2d[ends_main[pick]], dist)
    nv = vpts.size
    valves = gpd.GeoDataFrame({"VALVE_ID": np.char.add("V", np.arange(nv).astype(str)),
                               "VTYPE": "GATE", "NORM_POS": "NO"}, geometry=vpts, crs=CRS)

    def along(count: int, offset: float):
        host = rng.choice(m, count, p=length / length.sum())
        pos = rng.uniform(0.15, 0.85, count)
        p = shapely.get_coordinates(shapely.line_interpolate_point(lines2d[host], pos,
                                                                  normalized=True))
        d = end[host] - start[host]
        nrm = np.column_stack([-d[:, 1], d[:, 0]]) / np.hypot(d[:, 0], d[:, 1])[:, None]
        side_ = np.where(rng.random(count) < 0.5, -1.0, 1.0)[:, None]
        return shapely.points(p + nrm * offset * side_)

    nh = max(1, int(length.sum() / 150.0))
    hydrants = gpd.GeoDataFrame({"HYD_ID": np.char.add("H", np.arange(nh).astype(str))},
                                geometry=along(nh, 8.0), crs=CRS)
    nm = 2 * m
    meters = gpd.GeoDataFrame({"METER": np.char.add("C", np.arange(nm).astype(str)),
                               "GPD": rng.gamma(2.0, 90.0, nm), "CLS": "SFR"},
                              geometry=along(nm, 15.0), crs=CRS)
    # sources at arterial crossings, one per 2,500 mains, grade 38 m (54 psi) above the highest
    # ground: about 55-95 psi across the town (common practice: 40-80 psi in service)
    art = np.flatnonzero((ii % 8 == 0) & (jj % 8 == 0))
    k = max(1, m // 2500)
    at = rng.choice(art, min(k, art.size), replace=False)
    if low is not None:
        # no source inside a zone: move those to the nearest district corner
        di, dj = ii[at] // DISTRICT, jj[at] // DISTRICT
        edge = (ii[at] % DISTRICT == 0) | (jj[at] % DISTRICT == 0)
        bad = low[np.minimum(di, nd), np.minimum(dj, nd)] & ~edge
        at = np.where(bad, di * DISTRICT * side + dj * DISTRICT, at)
        at = np.unique(at)
    grade = float(_terrain(px, py).max()) + 38.0
    sources = gpd.GeoDataFrame({"SRC_ID": [f"S{i}" for i in range(at.size)],
                                "HGL_M": np.full(at.size, grade)},
                               geometry=gpd.points_from_xy(px[at], py[at]), crs=CRS)
    out = {"mains": mains, "valves": valves, "hydrants": hydrants, "meters": meters,
           "sources": sources}
    if low is not None:
        out.update(_zone_devices(ii, jj, a, b, street, lines2d, length, low, rng))
        out["valves"] = gpd.GeoDataFrame(
            pd.concat([valves, out.pop("closed")], ignore_index=True), crs=CRS)
    return out


def _zone_devices(ii, jj, a, b, street, lines2d, length, low, rng) -> dict:
    """Closed valves and reducing valves on the mains crossing into the low districts."""
    import geopandas as gpd
    import shapely

    def district(node):
        return ii[node] // DISTRICT, jj[node] // DISTRICT

    def interior(node):
        di, dj = district(node)
        on_edge = (ii[node] % DISTRICT == 0) | (jj[node] % DISTRICT == 0)
        di = np.minimum(di, low.shape[0] - 1)
        dj = np.minimum(dj, low.shape[1] - 1)
        return ~on_edge & low[di, dj]

    ina, inb = interior(a), interior(b)
    cross = np.flatnonzero(ina != inb)  # grid mains from a district's edge into its hollow
    outer = np.where(ina[cross], b[cross], a[cross])
    inner = np.where(ina[cross], a[cross], b[cross])
    di, dj = district(inner)
    key = di * 10_000 + dj
    # two reducing valves a zone, on arterials (never dropped) on opposite sides
    side_of = np.where(ii[outer] % DISTRICT == 0, 0, 1) * 2 + np.where(
        (ii[outer] % DISTRICT == 0) & (ii[outer] > ii[inner])
        | (jj[outer] % DISTRICT == 0) & (jj[outer] > jj[inner]), 1, 0)
    arterial = street[cross] % 8 == 0
    prv = np.zeros(cross.size, dtype=bool)
    for kd in np.unique(key):
        for sd in (0, 1):
            c = np.flatnonzero((key == kd) & arterial & (side_of == sd))
            if c.size:
                prv[c[rng.integers(c.size)]] = True
    mid = shapely.line_interpolate_point(lines2d[cross], 0.5, normalized=True)
    xy = shapely.get_coordinates(mid)
    zc = _terrain(xy[:, 0], xy[:, 1], low)
    pts = shapely.points(xy[:, 0], xy[:, 1], zc)
    # the flow's bearing: from the edge end into the hollow, along the main
    s_xy = shapely.get_coordinates(shapely.get_point(lines2d[cross], 0))
    e_xy = shapely.get_coordinates(shapely.get_point(lines2d[cross], -1))
    fwd = ~ina[cross]  # the main starts on the edge
    d = np.where(fwd[:, None], e_xy - s_xy, s_xy - e_xy)
    brg = np.degrees(np.arctan2(d[:, 0], d[:, 1])) % 360.0
    n_p = int(prv.sum())
    prvs = gpd.GeoDataFrame({"STATION": np.char.add("R", np.arange(n_p).astype(str)),
                             "KIND": "PRV", "SET_PSI": ZONE_SETTING_PSI,
                             "FLOW_BRG": brg[prv]}, geometry=pts[prv], crs=CRS)
    shut = ~prv
    closed = gpd.GeoDataFrame({"VALVE_ID": np.char.add("BV", np.arange(int(shut.sum()))
                                                       .astype(str)),
                               "VTYPE": "GATE", "NORM_POS": "NC"},
                              geometry=shapely.force_2d(pts[shut]), crs=CRS)
    return {"prv_stations": prvs, "closed": closed}


def write_utility(path: Path, n_mains: int, seed: int = 7, zones: bool = False) -> dict:
    """Write the synthetic utility's layers to a GeoPackage; returns the feature counts."""
    import pyogrio

    layers = make_utility(n_mains, seed, zones)
    for name, gdf in layers.items():
        pyogrio.write_dataframe(gdf, path, layer=name, driver="GPKG", use_arrow=True)
    return {name: len(gdf) for name, gdf in layers.items()}


def config_text(gis: Path, *, fireflow: bool = False, report: bool = True,
                output: str = "out.gpkg", zones: bool = False) -> str:
    """A gridflow config for the synthetic utility (defaults everywhere else; ``zones``: the
    reducing valves' layer mapped too)."""
    prv = '''
[[layers.valves]]
input = "gis"
layer = "prv_stations"
id = "STATION"
fields = { type = "KIND", setting = "SET_PSI", direction = "FLOW_BRG" }
units = { setting = "psi", direction = "deg" }
codes.type = { PRV = "prv" }
''' if zones else ""
    valves = "[[layers.valves]]" if zones else "[layers.valves]"
    return f'''
[run]
units = "US"
output = "{output}"
[inputs]
gis = "{Path(gis).as_posix()}"
[layers.pipes]
input = "gis"
layer = "mains"
id = "MAIN_ID"
fields = {{ diameter = "DIAM_IN", material = "MATL", status = "STATUS", install_year = "YEAR" }}
units = {{ diameter = "in" }}
codes.status = {{ ACT = "open" }}
{valves}
input = "gis"
layer = "valves"
id = "VALVE_ID"
fields = {{ type = "VTYPE", status = "NORM_POS" }}
codes.type = {{ GATE = "isolation" }}
codes.status = {{ NO = "open", NC = "closed" }}
{prv}[layers.hydrants]
input = "gis"
layer = "hydrants"
id = "HYD_ID"
[layers.sources]
input = "gis"
layer = "sources"
id = "SRC_ID"
fields = {{ head = "HGL_M" }}
units = {{ head = "m" }}
[layers.meters]
input = "gis"
layer = "meters"
id = "METER"
fields = {{ consumption = "GPD", category = "CLS" }}
[elevation]
source = "z"
unit = "m"
[roughness]
source = "table"
default = 120.0
[demand]
consumption_unit = "gal/day"
[demand.categories.residential]
codes = ["SFR"]
[fireflow]
enabled = {str(fireflow).lower()}
[report]
enabled = {str(report).lower()}
'''
