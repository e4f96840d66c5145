"""From the mapped layers to a hydraulically connected network: :func:`build_network`.

The steps, each reporting its repairs and problems as findings:

1. pipes: leave out abandoned ones, explode multi-part lines, check diameter and roughness;
2. snap pipe ends to each other and to junction points within ``[run] snap_tolerance``;
3. drop zero-length and duplicate pipes;
4. split mains where another main's end lands on their interior, where a hydrant attaches,
   and where a valve or pump sits (a valve or pump becomes a zero-length link between two
   coincident nodes, acting from the main's first vertex towards its last);
5. tanks and sources become fixed-head nodes at the nearest pipe end;
6. node ids, elevations, zones, connectivity and supply.

Decisions (what a utility engineer expects; documented in the README config reference):

- A pipe whose diameter is missing, zero or above 120 in is left out with an error finding,
  unless ``layers.pipes.default_diameter`` is set (then the default with a warning). A guessed
  diameter would give plausible-looking but unfounded pressures and fire flows; leaving the
  pipe out never overstates capacity, and the resulting disconnection is itself reported.
- A diameter below 2 in is kept with a warning; when the layer's median diameter lies outside
  2-120 in, the diameter unit is wrong (inches read as millimetres ...): InputError.
- No usable pipe left at all: TopologyError.
- Hazen-Williams C outside 40-160 is kept, with a warning.
- A missing node elevation is interpolated from neighbouring nodes (warning); where no
  neighbour has one, 0 m (error).
- Crossing mains without a shared vertex stay unconnected (common practice).
- A missing layer or field, a layer without CRS, text where a number belongs: InputError.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import shapely

from gridflow.config.layers import SEARCH_DISTANCE_DEFAULT, unit_factor
from gridflow.findings import Findings
from gridflow.network import Network
from gridflow.topology.lines import end_points, set_end_points, snap_labels
from gridflow.units import INCH

if TYPE_CHECKING:
    import geopandas as gpd

__all__ = ["CleanNetwork", "build_network", "MAX_DIAMETER_M", "MIN_DIAMETER_M", "C_RANGE"]

MAX_DIAMETER_M = 120 * INCH  # above this a diameter is taken as a unit error
MIN_DIAMETER_M = 2 * INCH  # below this a main's diameter is implausible (common practice)
C_RANGE = (40.0, 160.0)  # plausible Hazen-Williams C (common practice)
_EPS = 1e-3  # [m] positions closer than this along a line are the same place


@dataclass(eq=False)
class CleanNetwork:
    """The cleaned network and its GIS layers, in the same order as the network's arrays.

    Attributes
    ----------
    network : Network
        SI, zero demand, zones filled.
    nodes : GeoDataFrame
        ``node_id``, ``kind`` (junction / source / tank), ``zone``, geometry (Point).
    links : GeoDataFrame
        ``pipe_id``, ``kind`` (pipe / pump / valve), geometry (LineString; valves and pumps
        zero-length at their point), ``material``, ``install_year``, ``pressure_rating_m``.
    hydrants : GeoDataFrame
        Attached hydrants: ``hydrant_id``, ``node_idx``, ``node_id``, ``zone``,
        ``required_fire_flow_m3s`` (NaN where none), ``land_use``, ``lateral_length_m``,
        ``lateral_diameter_m`` (NaN where not mapped), geometry (the hydrant's point).
    meters : GeoDataFrame
        The meters layer in the working CRS, ``meter_id`` and mapped fields under their role
        names, units converted except ``consumption`` (raw; the demand stage converts it).
        Empty when no meters layer is mapped.
    crs : pyproj.CRS
        The working CRS (projected).
    elevation_guessed : ndarray of bool
        True at nodes whose elevation was interpolated from neighbours or set to 0 m.
    graph : networkx.MultiGraph
        Built on first use: nodes are node positions, edge keys link positions.
    """

    network: Network
    nodes: gpd.GeoDataFrame
    links: gpd.GeoDataFrame
    hydrants: gpd.GeoDataFrame
    meters: gpd.GeoDataFrame
    crs: Any
    inputs: list = field(default_factory=list)
    elevation_guessed: Any = None  # bool per node: elevation interpolated or 0 m used

    @property
    def tank_bottom_m(self):
        """Bottom elevation per node [m] (a tank node's elevation), NaN where not a tank."""
        import numpy as np

        from gridflow.network import NODE_TANK

        net = self.network
        return np.where(net.node_kind == NODE_TANK, net.elevation_m, np.nan)

    @functools.cached_property
    def graph(self):
        import networkx as nx

        g = nx.MultiGraph()
        g.add_nodes_from(range(self.network.n_nodes))
        g.add_edges_from(zip(self.network.from_idx.tolist(), self.network.to_idx.tolist(),
                             range(self.network.n_links)))
        return g


def build_network(cfg, findings: Findings, *, read=None) -> CleanNetwork:
    """Read the mapped GIS and clean it into a network.

    Parameters
    ----------
    cfg : Config
    findings : Findings
        Every repair and problem is appended here.
    read : ReadResult, optional
        Already-read layers (default: :func:`gridflow.io.read.read_inputs`).

    Returns
    -------
    CleanNetwork

    Raises
    ------
    InputError
        Unusable input (missing layer or field, no CRS, text where a number belongs).
    """
    from gridflow.io.read import read_inputs

    rr = read if read is not None else read_inputs(cfg, findings)
    return _Builder(cfg, rr, findings).run()


class _Builder:
    def __init__(self, cfg, rr, findings: Findings):
        self.cfg, self.rr, self.f = cfg, rr, findings
        self.tol = float(cfg.run.snap_tolerance)
        self.crs = rr.crs

    def lname(self, role: str) -> str:
        info = self.rr.infos.get(role)
        return info.layer if info is not None else role

    def sd(self, role: str) -> float:
        sec = getattr(self.cfg.layers, role)
        return SEARCH_DISTANCE_DEFAULT[role] if sec.search_distance is None else sec.search_distance

    # ------------------------------------------------------------------ pipes
    def prepare_pipes(self) -> pd.DataFrame:
        cfg, f = self.cfg, self.f
        gdf = self.rr.layers["pipes"]
        layer = self.lname("pipes")
        ids = gdf["pipe_id"].to_numpy(dtype=object)
        geoms = gdf.geometry.values._data if hasattr(gdf.geometry.values, "_data") else \
            np.asarray(gdf.geometry.values)
        keep = np.ones(len(gdf), bool)
        if "status" in gdf:
            ab = (gdf["status"] == "abandoned").to_numpy()
            f.add_many("abandoned_left_out", "info", layer, ids[ab],
                       "abandoned main left out of the network", geoms[ab])
            keep &= ~ab
        empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
        tid = shapely.get_type_id(geoms)
        notline = ~empty & ~np.isin(tid, [1, 5])
        f.add_many("no_geometry", "error", layer, ids[keep & empty],
                   "main without geometry left out")
        f.add_many("not_a_line", "error", layer, ids[keep & notline],
                   "main whose geometry is not a line left out", geoms[keep & notline])
        keep &= ~empty & ~notline
        rows = np.flatnonzero(keep)
        parts, pidx = shapely.get_parts(geoms[rows], return_index=True)
        src = rows[pidx]
        nparts = np.bincount(pidx, minlength=len(rows))
        multi = nparts > 1
        pid = ids[src].astype(object)
        if multi.any():
            k = np.arange(len(src)) - np.concatenate([[0], np.cumsum(nparts)[:-1]])[pidx]
            m = multi[pidx]
            pid[m] = [f"{a}.{b + 1}" for a, b in zip(pid[m], k[m])]
            f.add_many("multipart_exploded", "info", layer, ids[rows[multi]],
                       [f"multi-part main split into {n} pipes" for n in nparts[multi]],
                       geoms[rows[multi]])
        df = pd.DataFrame({"pipe_id": pid, "src": src})
        if cfg.elevation.source == "z" and shapely.has_z(parts).any():
            c3 = shapely.get_coordinates(parts, include_z=True)
            cnt = shapely.get_num_coordinates(parts)
            last = np.cumsum(cnt) - 1
            df["z0"] = c3[last - cnt + 1, 2] * _z_factor(cfg)
            df["z1"] = c3[last, 2] * _z_factor(cfg)
        parts = shapely.force_2d(parts)
        df["geom"] = parts
        for col in ("diameter", "roughness", "length", "pressure_rating", "minor_loss_k",
                    "install_year"):
            df[col] = gdf[col].to_numpy(dtype=float)[src] if col in gdf else np.nan
        for col in ("material", "status", "zone"):
            df[col] = gdf[col].to_numpy(dtype=object)[src] if col in gdf else None
        self.pipe_layer = layer
        df = self._check_diameter(df)
        df = self._roughness(df)
        glen = shapely.length(df["geom"].to_numpy())
        zero = glen <= 0
        f.add_many("zero_length_dropped", "warning", layer, df["pipe_id"].to_numpy()[zero],
                   "pipe of zero length dropped", df["geom"].to_numpy()[zero])
        df = df[~zero].reset_index(drop=True)
        if len(df) == 0:
            ab = (gdf["status"] == "abandoned").to_numpy() if "status" in gdf else empty & False
            self._no_pipes_left(ids, {"abandoned": ab, "without geometry": empty & ~ab,
                                      "not lines": notline & ~ab})
        return df

    def _no_pipes_left(self, ids: np.ndarray, masks: dict) -> None:
        """Stop: every main was left out; say why, by reason, with an example id each."""
        from gridflow.errors import TopologyError

        info = self.rr.infos["pipes"]
        reasons = [f"{int(m.sum())} {what} (e.g. {ids[m][0]})" for what, m in masks.items()
                   if m.any()]
        rest = len(ids) - int(np.logical_or.reduce(list(masks.values())).sum())
        if rest:
            reasons.append(f"{rest} with an unusable diameter or of zero length")
        raise TopologyError(
            f"{info.file}: layer {info.layer!r}: no pipes left to build a network from; of "
            f"{len(ids)} features: {'; '.join(reasons)} (gridflow check lists each one)",
            file=str(info.file), layer=info.layer)

    def _check_diameter(self, df: pd.DataFrame) -> pd.DataFrame:
        f, layer = self.f, self.pipe_layer
        d = df["diameter"].to_numpy(dtype=float)
        self._check_diameter_unit(d)
        small = np.isfinite(d) & (d > 0) & (d < MIN_DIAMETER_M)
        f.add_many("diameter_implausible", "warning", layer, df["pipe_id"].to_numpy()[small],
                   [f"diameter {x / INCH:.3g} in is below {MIN_DIAMETER_M / INCH:g} in, "
                    "implausible for a main; kept (check the value and "
                    "layers.pipes.units.diameter)" for x in d[small]],
                   df["geom"].to_numpy()[small])
        missing = ~np.isfinite(d) | (d <= 0)
        big = np.isfinite(d) & (d > MAX_DIAMETER_M)
        bad = missing | big
        if not bad.any():
            return df
        default = self.cfg.layers.pipes.default_diameter
        ids = df["pipe_id"].to_numpy()
        geoms = df["geom"].to_numpy()
        what = np.where(big, [f"diameter {x / INCH:.6g} in is above 120 in" for x in
                              np.where(big, d, 0)], np.where(np.isfinite(d), "diameter is zero",
                                                             "diameter is missing"))
        if default is None:
            f.add_many("diameter_missing", "error", layer, ids[bad],
                       [f"{w}: pipe left out (set layers.pipes.default_diameter to use a "
                        "default instead)" for w in what[bad]], geoms[bad])
            return df[~bad].reset_index(drop=True)
        f.add_many("diameter_missing", "warning", layer, ids[bad],
                   [f"{w}: default {default / INCH:.4g} in used" for w in what[bad]],
                   geoms[bad])
        df = df.copy()
        df.loc[bad, "diameter"] = default
        return df

    def _check_diameter_unit(self, d: np.ndarray) -> None:
        """Stop when the layer's typical diameter shows a unit mistake (inches read as mm...).

        One implausible value is a finding; a median outside the range of water mains means
        every diameter is off by the same factor, and every result with it.
        """
        from gridflow.errors import InputError

        ok = d[np.isfinite(d) & (d > 0)]
        if len(ok) == 0:
            return
        med = float(np.median(ok))
        if MIN_DIAMETER_M <= med <= MAX_DIAMETER_M:
            return
        sec = self.cfg.layers.pipes
        info = self.rr.infos["pipes"]
        fname = sec.fields.get("diameter")
        unit = sec.units.get("diameter")
        raise InputError(
            f"{info.file}: layer {info.layer!r}, field {fname!r}: the median diameter is "
            f"{med * 1000:.4g} mm ({med / INCH:.4g} in), outside the {MIN_DIAMETER_M / INCH:g}"
            f"-{MAX_DIAMETER_M / INCH:g} in of water mains; check "
            f"layers.pipes.units.diameter (now {unit!r})", file=str(info.file),
            layer=info.layer, field=fname, key="layers.pipes.units.diameter")

    def _roughness(self, df: pd.DataFrame) -> pd.DataFrame:
        cfg, f, layer = self.cfg, self.f, self.pipe_layer
        rs = cfg.roughness
        dw = cfg.run.headloss_model == "darcy-weisbach"
        table_scale = 1e-3 if dw else 1.0  # table values: C, or roughness in mm
        n = len(df)
        r = np.full(n, np.nan)
        if rs.source == "attribute":
            r = df["roughness"].to_numpy(dtype=float).copy()
            if dw and "roughness" not in cfg.layers.pipes.units:
                r = r * 1e-3  # Darcy-Weisbach roughness attribute in mm by default
            miss = ~np.isfinite(r)
            if miss.any():
                f.add_many("roughness_missing", "warning", layer, df["pipe_id"].to_numpy()[miss],
                           f"roughness missing: default {rs.default:g} used",
                           df["geom"].to_numpy()[miss])
        if rs.source == "table" or (~np.isfinite(r)).any():
            mat = df["material"].to_numpy(dtype=object)
            year = df["install_year"].to_numpy(dtype=float)
            todo = ~np.isfinite(r)
            for rule in rs.table:
                hit = todo & (mat == rule.material) & (np.nan_to_num(year, nan=-1e9)
                                                       < rule.installed_before)
                r[hit] = rule.value * table_scale
                todo &= ~hit
            r[todo] = rs.default * table_scale
        if not dw:
            bad = (r < C_RANGE[0]) | (r > C_RANGE[1])
            f.add_many("roughness_implausible", "warning", layer, df["pipe_id"].to_numpy()[bad],
                       [f"Hazen-Williams C {x:g} outside {C_RANGE[0]:g}-{C_RANGE[1]:g}; kept"
                        for x in r[bad]], df["geom"].to_numpy()[bad])
        df = df.copy()
        df["roughness"] = r
        return df

    # ------------------------------------------------------------------ run
    def run(self) -> CleanNetwork:
        from gridflow.topology.attach import Attacher

        df = self.prepare_pipes()
        f, tol, layer = self.f, self.tol, self.pipe_layer
        geoms = df["geom"].to_numpy()
        ids = df["pipe_id"].to_numpy(dtype=object)
        n = len(df)
        # --- snapping ends to each other and to junction points
        start, end = end_points(geoms)
        nodes = self.rr.layers.get("nodes")
        if nodes is not None:
            ng = np.asarray(nodes.geometry.values)
            ok = ~(shapely.is_missing(ng) | shapely.is_empty(ng))
            nodes = nodes[ok]
            nxy = shapely.get_coordinates(np.asarray(nodes.geometry.values))
        else:
            nxy = np.zeros((0, 2))
        pts = np.vstack([start, end, nxy])
        lab = snap_labels(pts, tol)
        nc = int(lab.max()) + 1 if len(lab) else 0
        is_node_pt = np.arange(len(pts)) >= 2 * n
        cnt_end = np.bincount(lab[~is_node_pt], minlength=nc)
        cxy = np.column_stack([np.bincount(lab[:2 * n], pts[:2 * n, 0], nc),
                               np.bincount(lab[:2 * n], pts[:2 * n, 1], nc)]).astype(float)
        cxy /= np.maximum(cnt_end, 1)[:, None]
        # a junction point in the cluster fixes its position and lends its id
        node_of_cluster = np.full(nc, -1)
        if len(nxy):
            nl = lab[2 * n:]
            order = np.arange(len(nl))[::-1]  # the first node point wins
            node_of_cluster[nl[order]] = order
            has = node_of_cluster >= 0
            cxy[has] = nxy[node_of_cluster[has]]
        # compact numbering over clusters that hold pipe ends
        used = cnt_end > 0
        remap = np.full(nc, -1)
        remap[used] = np.arange(int(used.sum()))
        lab_s, lab_e = remap[lab[:n]], remap[lab[n:2 * n]]
        cxy = cxy[used]
        self.cluster_node = node_of_cluster[used]
        self.nodes_frame = nodes
        lab2 = np.concatenate([lab_s, lab_e])
        moved = np.hypot(*(pts[:2 * n] - cxy[lab2]).T)
        mv = moved > _EPS
        if mv.any():
            # one finding per node where ends moved: the first pipe there, the ends, the most
            # any end moved
            ends = np.flatnonzero(mv)
            cl = np.flatnonzero(np.bincount(lab2[ends], minlength=len(cxy)))
            dmax = np.zeros(len(cxy))
            np.maximum.at(dmax, lab2, moved)
            k = np.bincount(lab2, minlength=len(cxy))
            first = np.full(len(cxy), n)
            np.minimum.at(first, lab2, np.arange(2 * n) % n)
            f.add_many("end_snapped", "info", layer, ids[first[cl]],
                       [f"{c} pipe ends joined; an end moved {d:.2f} m" for c, d in
                        zip(k[cl], dmax[cl])], shapely.points(cxy[cl]))
            geoms = set_end_points(geoms, cxy[lab_s], cxy[lab_e])
        # z at clusters, for elevation source z
        self.cluster_z = np.full(len(cxy), np.nan)
        if "z0" in df:
            z = np.concatenate([df["z0"].to_numpy(), df["z1"].to_numpy()])
            lz = np.concatenate([lab_s, lab_e])
            okz = np.isfinite(z)
            s_ = np.bincount(lz[okz], z[okz], len(cxy))
            c_ = np.bincount(lz[okz], minlength=len(cxy))
            self.cluster_z = np.where(c_ > 0, s_ / np.maximum(c_, 1), np.nan)
        # --- zero-length pipes and rings closing on themselves
        glen = shapely.length(geoms)
        same = lab_s == lab_e
        zero = same & (glen <= tol)
        f.add_many("zero_length_dropped", "warning", layer, ids[zero],
                   [f"pipe {x:.2f} m long with both ends at one node dropped" for x in glen[zero]],
                   geoms[zero])
        # --- duplicates: same end nodes, same diameter, within the tolerance of each other
        a, b = np.minimum(lab_s, lab_e), np.maximum(lab_s, lab_e)
        order = np.lexsort((np.arange(n), b, a))
        order = order[~zero[order]]
        cand = (a[order[1:]] == a[order[:-1]]) & (b[order[1:]] == b[order[:-1]])
        dup = np.zeros(n, bool)
        if cand.any():
            i, j = order[:-1][cand], order[1:][cand]
            close = shapely.hausdorff_distance(geoms[i], geoms[j]) <= tol
            d = df["diameter"].to_numpy()
            same_d = np.isclose(d[i], d[j])
            dd = close & same_d
            dup[j[dd]] = True
            f.add_many("duplicate_dropped", "warning", layer, ids[j[dd]],
                       [f"duplicate of pipe {x} dropped" for x in ids[i[dd]]], geoms[j[dd]])
            ov = close & ~same_d
            f.add_many("overlapping_pipes", "warning", layer, ids[j[ov]],
                       [f"drawn on top of pipe {x} with another diameter; both kept as "
                        "parallel mains" for x in ids[i[ov]]], geoms[j[ov]])
        keep = ~zero & ~dup
        df, geoms, ids = df[keep].reset_index(drop=True), geoms[keep], ids[keep]
        lab_s, lab_e = lab_s[keep], lab_e[keep]
        self.df, self.geoms, self.ids = df, geoms, ids
        self.lab_s, self.lab_e, self.cxy = lab_s, lab_e, cxy
        att = Attacher(self)
        return att.run()


def _z_factor(cfg) -> float:
    return unit_factor("nodes", "elevation", cfg.elevation.unit)

