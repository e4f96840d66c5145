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
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import minimum_spanning_tree

CRS = "EPSG:32616"
X0, Y0 = 500_000.0, 4_600_000.0


def _terrain(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return 100.0 + 8.0 * np.sin((x - X0) / 1500.0) + 6.0 * np.cos((y - Y0) / 2100.0)


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


def make_utility(n_mains: int, seed: int = 7) -> dict:
    """GeoDataFrames of a synthetic utility with about ``n_mains`` mains."""
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
    # cul-de-sacs off random grid nodes, 60-120 m long
    n_cul = max(0, n_mains - m_grid)
    base = rng.integers(0, side * side, n_cul)
    ang = rng.uniform(0, 2 * np.pi, n_cul)
    ln = rng.uniform(60, 120, n_cul)
    cx, cy = px[base] + ln * np.cos(ang), py[base] + ln * np.sin(ang)
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
    z = _terrain(xy[:, 0], xy[:, 1])
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
    grade = float(_terrain(px, py).max()) + 38.0
    sources = gpd.GeoDataFrame({"SRC_ID": [f"S{i}" for i in range(at.size)],
                                "HGL_M": np.full(at.size, grade)},
                               geometry=gpd.points_from_xy(px[at], py[at]), crs=CRS)
    return {"mains": mains, "valves": valves, "hydrants": hydrants, "meters": meters,
            "sources": sources}


def write_utility(path: Path, n_mains: int, seed: int = 7) -> dict:
    """Write the synthetic utility's layers to a GeoPackage; returns the feature counts."""
    import pyogrio

    layers = make_utility(n_mains, seed)
    for name, gdf in layers.items():
        pyogrio.write_dataframe(gdf, path, layer=name, driver="GPKG", use_arrow=True)
    return {name: len(gdf) for name, gdf in layers.items()}


def config_text(gis: Path, *, fireflow: bool = False, report: bool = True,
                output: str = "out.gpkg") -> str:
    """A gridflow config for the synthetic utility (defaults everywhere else)."""
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
[layers.valves]
input = "gis"
layer = "valves"
id = "VALVE_ID"
fields = {{ type = "VTYPE", status = "NORM_POS" }}
codes.type = {{ GATE = "isolation" }}
codes.status = {{ NO = "open", NC = "closed" }}
[layers.hydrants]
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
