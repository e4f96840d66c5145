"""Attaching point features to the snapped mains, splitting them, and assembling the network.

Split events on a main, all found with one STRtree over the mains and applied in one pass of
:func:`gridflow.topology.lines.split_lines`:

- T-junctions: a node (snapped pipe ends) within the snapping tolerance of another main's
  interior joins that main there;
- hydrants: the nearest main within the search distance gets a node at the projected point
  (or uses the main's end, or a T-junction node, within the snapping tolerance of it);
- valves and pumps: the nearest main within the search distance is cut at the projected point
  into two coincident nodes, joined by a zero-length valve or pump link that acts from the
  main's first vertex towards its last. Within the snapping tolerance of a main's end, the
  device sits between that end and the node there;
- rings (a main whose ends meet) are split in the middle.

Tanks and sources become fixed-head nodes at the nearest pipe end within the search distance.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely

from gridflow.config.layers import unit_factor
from gridflow.network import (
    LINK_KINDS,
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    NODE_JUNCTION,
    NODE_KINDS,
    NODE_SOURCE,
    NODE_TANK,
    STATUS_CHECK,
    STATUS_CLOSED,
    STATUS_OPEN,
    VALVE_ISOLATION,
    VALVE_PRESSURE_REDUCING,
    VALVE_THROTTLE,
    Network,
    fit_pump_curve,
)
from gridflow.topology.lines import split_lines
from gridflow.topology.zones import connectivity_findings, zones_and_parts

__all__ = ["Attacher"]

_EPS = 1e-3
_GEOM_NAMES = ("point", "line", "ring", "polygon", "multi-point", "multi-line", "multi-polygon",
               "geometry collection")
_CLOSED = ("closed", "inactive", "off")


def _geoms(frame) -> np.ndarray:
    return np.asarray(frame.geometry.values, dtype=object)


def _col(frame, name, dtype=float):
    if frame is not None and name in frame:
        return frame[name].to_numpy(dtype=dtype)
    n = 0 if frame is None else len(frame)
    return np.full(n, np.nan) if dtype is float else np.full(n, None, dtype=object)


class Attacher:
    def __init__(self, b):
        self.b = b
        self.f = b.f
        self.tol = b.tol
        self.geoms = b.geoms
        self.glen = shapely.length(b.geoms)
        self.tree = shapely.STRtree(b.geoms)
        self.key_xy = [b.cxy]
        self.next_key = len(b.cxy)
        self.ev = []  # interior split events: (line, s, x, y, up, down)
        self.key_elev = {}  # key -> elevation from point features
        self.standin_keys = set()  # sources whose elevation is their head (no ground known)
        self.key_z = {}

    def new_keys(self, xy: np.ndarray) -> np.ndarray:
        k = np.arange(self.next_key, self.next_key + len(xy))
        self.next_key += len(xy)
        self.key_xy.append(np.asarray(xy, dtype=float).reshape(-1, 2))
        return k

    # ------------------------------------------------------------------ points
    def _points(self, role: str):
        """The role's usable point features: frame, 2-D points, abandoned ones left out."""
        fr = self.b.rr.layers.get(role)
        if fr is None or len(fr) == 0:
            return None, np.zeros(0, dtype=object)
        layer = self.b.lname(role)
        idc = fr.columns[0]
        g = _geoms(fr)
        bad = shapely.is_missing(g) | shapely.is_empty(g)
        self.f.add_many("no_geometry", "error", layer, fr[idc].to_numpy()[bad],
                        f"{role[:-1]} without geometry left out")
        keep = ~bad
        if "status" in fr:
            ab = (fr["status"] == "abandoned").to_numpy() & keep
            self.f.add_many("abandoned_left_out", "info", layer, fr[idc].to_numpy()[ab],
                            f"abandoned {role[:-1]} left out", g[ab])
            keep &= ~ab
        fr = fr[keep].reset_index(drop=True)
        g = g[keep]
        if len(g):
            tid = shapely.get_type_id(g)
            notpt = tid != 0
            if notpt.any():
                # a line or polygon where a point belongs: its first vertex stands for it
                xy, at = shapely.get_coordinates(g[notpt], return_index=True)
                _, k = np.unique(at, return_index=True)
                first = np.empty(len(g), dtype=object)
                first[notpt] = shapely.points(xy[k])
                names = np.asarray(_GEOM_NAMES, dtype=object)[tid[notpt]]
                self.f.add_many("not_a_point", "warning", layer, fr[idc].to_numpy()[notpt],
                                [f"{role[:-1]} drawn as a {t}; its first vertex used"
                                 for t in names], first[notpt])
                g = np.where(notpt, first, g)
        return fr, g

    def _nearest(self, pts, sd):
        """(point idx, line idx, distance) of the nearest main within ``sd``; and all distances."""
        if len(pts) == 0 or len(self.geoms) == 0:
            return (np.zeros(0, int),) * 2 + (np.zeros(0),), np.full(len(pts), np.inf)
        (pi, li), dist = self.tree.query_nearest(shapely.force_2d(pts), return_distance=True,
                                                 all_matches=False)
        full = np.full(len(pts), np.inf)
        full[pi] = dist
        ok = dist <= sd
        return (pi[ok], li[ok], dist[ok]), full

    # ------------------------------------------------------------------ events
    def t_events(self):
        b, tol = self.b, self.tol
        cpts = shapely.points(b.cxy)
        if len(cpts) == 0:
            return [np.zeros(0, int)] * 2 + [np.zeros(0)]
        pi, li = self.tree.query(cpts, predicate="dwithin", distance=tol)
        own = (b.lab_s[li] == pi) | (b.lab_e[li] == pi)
        pi, li = pi[~own], li[~own]
        s = shapely.line_locate_point(self.geoms[li], cpts[pi])
        inside = (s > _EPS) & (s < self.glen[li] - _EPS)
        pi, li, s = pi[inside], li[inside], s[inside]
        if len(pi):
            labs = np.concatenate([b.lab_s, b.lab_e])
            owner = np.concatenate([b.ids, b.ids])
            u, first = np.unique(labs, return_index=True)
            first_pipe = np.empty(len(b.cxy), dtype=object)
            first_pipe[u] = owner[first]
            d = shapely.distance(self.geoms[li], cpts[pi])
            self.f.add_many("main_split", "info", b.pipe_layer, b.ids[li],
                            [f"split where the end of pipe {p} lands on it ({x:.2f} m off)"
                             for p, x in zip(first_pipe[pi], d)], cpts[pi])
        return li, pi, s

    def hydrant_events(self, t_line, t_key, t_s):
        """Hydrant nodes; merges hydrant and T events within the tolerance of each other."""
        fr, pts = self._points("hydrants")
        self.hyd = fr
        nh = 0 if fr is None else len(fr)
        self.hyd_key = np.full(nh, -1)
        self.hyd_pts = pts
        if nh == 0:
            return t_line, t_key, t_s, self.b.cxy[t_key]
        b, tol, layer = self.b, self.tol, self.b.lname("hydrants")
        ids = fr["hydrant_id"].to_numpy()
        (pi, li, dist), full = self._nearest(pts, self.b.sd("hydrants"))
        un = np.ones(nh, bool)
        un[pi] = False
        self.f.add_many("hydrant_unattached", "warning", layer, ids[un],
                        [f"no main within {self.b.sd('hydrants'):g} m (nearest "
                         f"{x:.2f} m); hydrant left out of the fire-flow analysis"
                         for x in full[un]], pts[un])
        far = dist > tol
        self.f.add_many("hydrant_attached", "info", layer, ids[pi[far]],
                        [f"attached to main {m} {x:.2f} m away" for m, x in
                         zip(b.ids[li[far]], dist[far])], pts[pi[far]])
        s = shapely.line_locate_point(self.geoms[li], pts[pi])
        L = self.glen[li]
        at0, at1 = s <= tol, s >= L - tol
        self.hyd_key[pi[at0]] = b.lab_s[li[at0]]
        self.hyd_key[pi[at1 & ~at0]] = b.lab_e[li[at1 & ~at0]]
        mid = ~at0 & ~at1
        h_pi, h_li, h_s = pi[mid], li[mid], s[mid]
        h_xy = shapely.get_coordinates(shapely.line_interpolate_point(self.geoms[h_li], h_s))
        # merge with T events on the same main within the tolerance
        line = np.concatenate([t_line, h_li])
        s_all = np.concatenate([t_s, h_s])
        is_t = np.r_[np.ones(len(t_line), bool), np.zeros(len(h_li), bool)]
        order = np.lexsort((~is_t, s_all, line))
        ln, ss, it = line[order], s_all[order], is_t[order]
        new = np.r_[True, (ln[1:] != ln[:-1]) | (np.diff(ss) > tol)] if len(ln) else np.zeros(0,
                                                                                             bool)
        gid = np.cumsum(new) - 1
        ng = int(gid.max()) + 1 if len(gid) else 0
        g_t = np.full(ng, -1)
        tpos = np.flatnonzero(it)[::-1]
        g_t[gid[tpos]] = np.concatenate([t_key, np.zeros(len(h_li), int)])[order][tpos]
        g_h = np.full(ng, -1)
        hpos = np.flatnonzero(~it)[::-1]
        g_h[gid[hpos]] = hpos
        hk = np.full(len(order), -1)
        lead = ~it & (g_t[gid] < 0) & (g_h[gid] == np.arange(len(order)))
        hk[lead] = self.new_keys(np.concatenate([np.zeros((len(t_line), 2)), h_xy])[order][lead])
        joint = ~it & (g_t[gid] >= 0)
        hk[joint] = g_t[gid[joint]]
        follow = ~it & ~lead & ~joint
        hk[follow] = hk[g_h[gid[follow]]]
        hrow = order[~it] - len(t_line)
        self.hyd_key[h_pi[hrow]] = hk[~it]
        # events: all T events, plus lead hydrant events
        t_xy = self.b.cxy[t_key]
        ev_line = np.concatenate([t_line, h_li[order[lead] - len(t_line)]])
        ev_key = np.concatenate([t_key, hk[lead]])
        ev_s = np.concatenate([t_s, h_s[order[lead] - len(t_line)]])
        ev_xy = np.vstack([t_xy, h_xy[order[lead] - len(t_line)]])
        return ev_line, ev_key, ev_s, ev_xy

    def device_events(self):
        """Valves and pumps: cuts of their main into two coincident nodes."""
        out = []
        for role in ("valves", "pumps"):
            fr, pts = self._points(role)
            if fr is None or len(fr) == 0:
                continue
            layer = self.b.lname(role)
            ids = fr.iloc[:, 0].to_numpy()
            sd = self.b.sd(role)
            (pi, li, dist), full = self._nearest(pts, sd)
            un = np.ones(len(fr), bool)
            un[pi] = False
            self.f.add_many(f"{role[:-1]}_unattached", "warning", layer, ids[un],
                            [f"no main within {sd:g} m (nearest {x:.2f} m); {role[:-1]} left "
                             "out" for x in full[un]], pts[un])
            s = shapely.line_locate_point(self.geoms[li], pts[pi])
            L = self.glen[li]
            end = np.where(s <= self.tol, 0, np.where(s >= L - self.tol, 1, -1))
            # one device per main end
            key = np.where(end >= 0, li * 2 + end, -1 - np.arange(len(li)))
            _, first = np.unique(key, return_index=True)
            dupe = np.ones(len(li), bool)
            dupe[first] = False
            self.f.add_many(f"{role[:-1]}_stacked", "warning", layer, ids[pi[dupe]],
                            f"another {role[:-1]} already sits at this end of the main; "
                            "left out", pts[pi[dupe]])
            pi, li, s, end = pi[~dupe], li[~dupe], s[~dupe], end[~dupe]
            out.append((role, fr.iloc[pi].reset_index(drop=True), pts[pi], li, s, end))
        return out

    # ------------------------------------------------------------------ run
    def run(self):
        from gridflow.topology.build import CleanNetwork

        b, f = self.b, self.f
        n = len(self.geoms)
        t_line, t_key, t_s = self.t_events()
        ev_line, ev_key, ev_s, ev_xy = self.hydrant_events(t_line, t_key, t_s)
        ev_up, ev_down = ev_key.copy(), ev_key.copy()
        # rings: both ends at one node
        ring = np.flatnonzero(b.lab_s == b.lab_e)
        if len(ring):
            rs = self.glen[ring] / 2
            rxy = shapely.get_coordinates(shapely.line_interpolate_point(self.geoms[ring], rs))
            rk = self.new_keys(rxy)
            f.add_many("ring_split", "info", b.pipe_layer, b.ids[ring],
                       "main whose ends meet split in the middle", self.geoms[ring])
            ev_line, ev_s = np.r_[ev_line, ring], np.r_[ev_s, rs]
            ev_xy = np.vstack([ev_xy, rxy])
            ev_up, ev_down = np.r_[ev_up, rk], np.r_[ev_down, rk]
        # devices
        devs = self.device_events()
        dev_links = []  # (role, frame, pts, li, up_key, down_key)
        start_key = b.lab_s.copy()
        end_key = b.lab_e.copy()
        for role, fr, pts, li, s, end in devs:
            m = len(li)
            up = np.empty(m, int)
            down = np.empty(m, int)
            inner = end < 0
            pxy = shapely.get_coordinates(shapely.line_interpolate_point(self.geoms[li], s))
            if inner.any():
                k = self.new_keys(np.repeat(pxy[inner], 2, axis=0)).reshape(-1, 2)
                up[inner], down[inner] = k[:, 0], k[:, 1]
                ev_line = np.r_[ev_line, li[inner]]
                ev_s = np.r_[ev_s, s[inner]]
                ev_xy = np.vstack([ev_xy, pxy[inner]])
                ev_up, ev_down = np.r_[ev_up, up[inner]], np.r_[ev_down, down[inner]]
            e0 = end == 0
            if e0.any():
                k = self.new_keys(b.cxy[b.lab_s[li[e0]]])
                up[e0], down[e0] = b.lab_s[li[e0]], k
                start_key[li[e0]] = k
            e1 = end == 1
            if e1.any():
                k = self.new_keys(b.cxy[b.lab_e[li[e1]]])
                up[e1], down[e1] = k, b.lab_e[li[e1]]
                end_key[li[e1]] = k
            dev_links.append((role, fr, pts, li, up, down))
        # --- split
        order = np.lexsort((ev_s, ev_line))
        ev_line, ev_s, ev_xy = ev_line[order], ev_s[order], ev_xy[order]
        ev_up, ev_down = ev_up[order], ev_down[order]
        pieces, p_line, p_k = split_lines(self.geoms, ev_line, ev_s, ev_xy)
        n_ev = np.bincount(ev_line, minlength=n)
        ev_before = np.concatenate([[0], np.cumsum(n_ev)[:-1]])
        last = p_k == n_ev[p_line]
        first = p_k == 0
        e_end = ev_before[p_line] + p_k  # event ending this piece (when not last)
        ev_up = np.r_[ev_up, -1].astype(np.int64)  # a sentinel keeps the indexing in range
        ev_down = np.r_[ev_down, -1].astype(np.int64)
        p_from = np.where(first, start_key[p_line], ev_down[np.maximum(e_end - 1, 0)])
        p_to = np.where(last, end_key[p_line], ev_up[np.minimum(e_end, len(ev_up) - 1)])
        split_n = n_ev[p_line] > 0
        pid = b.ids[p_line].astype(object)
        pid[split_n] = [f"{a}.{k + 1}" for a, k in zip(pid[split_n], p_k[split_n])]
        self.pieces, self.p_line, self.p_from, self.p_to, self.pid = (
            pieces, p_line, p_from, p_to, pid)
        self.dev_links = dev_links
        return self.assemble(CleanNetwork)

    # ------------------------------------------------------------------ assembly
    def fixed_heads(self, key_xy, used_end_keys):
        """Tanks and sources onto the nearest pipe-end node: {key: (kind, id, head, elev)}."""
        from scipy.spatial import cKDTree

        out = {}
        cand = np.flatnonzero(used_end_keys)
        tree = cKDTree(key_xy[cand]) if len(cand) else None
        for role, kind in (("tanks", NODE_TANK), ("sources", NODE_SOURCE)):
            fr, pts = self._points(role)
            if fr is None or len(fr) == 0:
                continue
            layer = self.b.lname(role)
            ids = fr.iloc[:, 0].to_numpy()
            if role == "tanks":
                elev = _col(fr, "bottom_elevation")
                head = elev + _col(fr, "level")
            else:
                head = _col(fr, "head")
                elev = _col(fr, "elevation")
                standin = ~np.isfinite(elev)
                elev = np.where(standin, head, elev)  # pressure 0 at the source
            bad = ~np.isfinite(head)
            self.f.add_many(f"{role[:-1]}_head_missing", "error", layer, ids[bad],
                            f"{role[:-1]} without a usable head or level; left out", pts[bad])
            sd = self.b.sd(role)
            if tree is None:
                d = np.full(len(fr), np.inf)
                j = np.zeros(len(fr), int)
            else:
                d, j = tree.query(shapely.get_coordinates(pts))
            far = (d > sd) & ~bad
            self.f.add_many(f"{role[:-1]}_unattached", "warning", layer, ids[far],
                            [f"no pipe end within {sd:g} m (nearest {x:.2f} m); left out"
                             for x in d[far]], pts[far])
            ok = ~bad & ~far
            info = ok & (d > self.tol)
            self.f.add_many(f"{role[:-1]}_attached", "info", layer, ids[info],
                            [f"attached to the pipe end {x:.2f} m away" for x in d[info]],
                            pts[info])
            for r in np.flatnonzero(ok):
                k = int(cand[j[r]])
                if k in out:
                    self.f.add(f"{role[:-1]}_conflict", "error", layer, ids[r],
                               f"the nearest pipe end already holds {out[k][1]}; left out",
                               pts[r])
                    continue
                out[k] = (kind, str(ids[r]), float(head[r]), float(elev[r]))
                if role == "sources" and standin[r]:
                    self.standin_keys.add(k)
        return out

    def assemble(self, CleanNetwork):
        import geopandas as gpd
        from scipy.sparse import coo_matrix

        b, f, cfg = self.b, self.f, self.b.cfg
        key_xy = np.vstack(self.key_xy)
        # device links
        dl_from, dl_to = [], []
        for *_, up, down in self.dev_links:
            dl_from.append(up)
            dl_to.append(down)
        all_from = np.concatenate([self.p_from, *dl_from]).astype(np.int64)
        all_to = np.concatenate([self.p_to, *dl_to]).astype(np.int64)
        hk = self.hyd_key[self.hyd_key >= 0]
        used = np.zeros(len(key_xy), bool)
        used[all_from] = used[all_to] = True
        used[hk] = True
        end_keys = np.zeros(len(key_xy), bool)
        end_keys[: len(b.cxy)] = used[: len(b.cxy)]
        fixed = self.fixed_heads(key_xy, end_keys)
        # node order: sorted by coordinates (to the mm), then key
        keys = np.flatnonzero(used)
        kx = np.round(key_xy[keys], 3)
        order = np.lexsort((keys, kx[:, 1], kx[:, 0]))
        keys = keys[order]
        nn = len(keys)
        idx_of_key = np.full(len(key_xy), -1)
        idx_of_key[keys] = np.arange(nn)
        node_xy = key_xy[keys]
        # ids
        node_id = np.full(nn, None, dtype=object)
        kind = np.full(nn, NODE_JUNCTION, dtype=np.int8)
        fixed_head = np.full(nn, np.nan)
        elev = np.full(nn, np.nan)
        nodes = b.nodes_frame
        is_cl = keys < len(b.cxy)
        if nodes is not None and len(nodes):
            cn = np.full(nn, -1)
            cn[is_cl] = b.cluster_node[keys[is_cl]]
            has = cn >= 0
            node_id[has] = nodes["node_id"].to_numpy(dtype=object)[cn[has]]
            if cfg.elevation.source == "attribute" and "elevation" in nodes:
                elev[has] = nodes["elevation"].to_numpy(dtype=float)[cn[has]]
            if cfg.elevation.source == "z":
                ng = np.asarray(nodes.geometry.values)
                if shapely.has_z(ng).any():
                    z = shapely.get_coordinates(ng, include_z=True)[:, 2]
                    elev[has] = z[cn[has]] * unit_factor("nodes", "elevation",
                                                         cfg.elevation.unit)
        if cfg.elevation.source == "z":
            cz = np.full(nn, np.nan)
            cz[is_cl] = b.cluster_z[keys[is_cl]]
            elev = np.where(np.isfinite(elev), elev, cz)
        # point features' elevations at their nodes
        self._point_elevations(elev, idx_of_key)
        for k, (fk, fid, head, el) in sorted(fixed.items()):
            i = idx_of_key[k]
            kind[i], fixed_head[i], node_id[i] = fk, head, fid
            if np.isfinite(el):
                elev[i] = el
        taken = set(node_id[node_id != None].tolist())  # noqa: E711
        gen = node_id == None  # noqa: E711
        prefix = "N"
        while any(f"{prefix}{i + 1}" in taken for i in range(int(gen.sum()))):
            prefix += "N"
        node_id[gen] = [f"{prefix}{i + 1}" for i in range(int(gen.sum()))]
        node_id = _unique_ids(node_id, "node")
        # links
        p_from = idx_of_key[self.p_from]
        p_to = idx_of_key[self.p_to]
        df = b.df
        pl = self.p_line
        plen = shapely.length(self.pieces)
        attr_len = df["length"].to_numpy(dtype=float)[pl]
        frac = plen / np.maximum(self.glen[pl], 1e-12)
        length = np.where(np.isfinite(attr_len) & (attr_len > 0), attr_len * frac, plen)
        length = np.maximum(length, _EPS)
        diameter = df["diameter"].to_numpy(dtype=float)[pl]
        rough = df["roughness"].to_numpy(dtype=float)[pl]
        mk = np.nan_to_num(df["minor_loss_k"].to_numpy(dtype=float)[pl], nan=0.0)
        pstat = df["status"].to_numpy(dtype=object)[pl]
        status = np.where(np.isin(pstat.astype(str), _CLOSED), STATUS_CLOSED, STATUS_OPEN)
        cols = {
            "link_id": [self.pid], "from": [p_from], "to": [p_to],
            "kind": [np.full(len(pl), LINK_PIPE)], "length": [length], "diameter": [diameter],
            "rough": [rough], "mk": [mk], "status": [status],
            "vt": [np.zeros(len(pl), int)], "vs": [np.full(len(pl), np.nan)],
            "pa": [np.full(len(pl), np.nan)], "pb": [np.full(len(pl), np.nan)],
            "pc": [np.full(len(pl), np.nan)], "speed": [np.ones(len(pl))],
            "geom": [self.pieces],
            "material": [df["material"].to_numpy(dtype=object)[pl]],
            "year": [df["install_year"].to_numpy(dtype=float)[pl]],
            "rating": [df["pressure_rating"].to_numpy(dtype=float)[pl]],
            "zone": [df["zone"].to_numpy(dtype=object)[pl]],
        }
        for role, fr, pts, li, up, down in self.dev_links:
            self._device_columns(cols, role, fr, pts, li, idx_of_key[up], idx_of_key[down])
        c = {k: np.concatenate(v) for k, v in cols.items()}
        c["link_id"] = _unique_ids(_prefix_collisions(c["link_id"], c["kind"]), "link")
        # elevations: fill from neighbours
        adj = coo_matrix((np.ones(2 * len(c["from"])), (np.r_[c["from"], c["to"]],
                                                         np.r_[c["to"], c["from"]])),
                         shape=(nn, nn)).tocsr()
        standin = np.zeros(nn, bool)
        standin[idx_of_key[sorted(self.standin_keys)]] = True
        elev, guessed = self._fill_elevations(elev, adj, node_id, node_xy, standin)
        # zones and connectivity
        node_zone = np.full(nn, None, dtype=object)
        if nodes is not None and "zone" in nodes and len(nodes):
            cn = np.full(nn, -1)
            cn[is_cl] = b.cluster_node[keys[is_cl]]
            node_zone[cn >= 0] = nodes["zone"].to_numpy(dtype=object)[cn[cn >= 0]]
        zone_mapped = "zone" in cfg.layers.pipes.fields or (
            cfg.layers.nodes is not None and "zone" in cfg.layers.nodes.fields)
        zone = zones_and_parts(nn, c["from"], c["to"], c["kind"], c["status"], c["vt"],
                               c["speed"], c["zone"], node_zone, zone_mapped)
        net = Network.from_arrays(
            node_id=node_id, link_id=c["link_id"], from_idx=c["from"], to_idx=c["to"],
            elevation_m=elev, fixed_head_m=fixed_head, node_kind=kind, zone=zone,
            link_kind=c["kind"], length_m=np.where(c["kind"] == LINK_PIPE, c["length"], 0.0),
            diameter_m=c["diameter"], roughness=c["rough"], minor_k=c["mk"],
            status=c["status"], valve_type=c["vt"], valve_setting=c["vs"], pump_h0=c["pa"],
            pump_h1=c["pb"], pump_h2=c["pc"], pump_speed=c["speed"],
            headloss_model=cfg.run.headloss_model)
        node_pts = shapely.points(node_xy)
        connectivity_findings(f, net, c["geom"], node_pts, b.pipe_layer)
        crs = b.crs
        nodes_gdf = gpd.GeoDataFrame(
            {"node_id": net.node_id, "kind": np.asarray(NODE_KINDS, dtype=object)[net.node_kind],
             "zone": net.zone}, geometry=node_pts, crs=crs)
        year = c["year"]
        links_gdf = gpd.GeoDataFrame(
            {"pipe_id": net.link_id,
             "kind": np.asarray(LINK_KINDS, dtype=object)[net.link_kind],
             "material": pd.array(c["material"], dtype="string"),
             "install_year": pd.array(np.where(np.isfinite(year), np.round(year), np.nan),
                                      dtype="Int64"),
             "pressure_rating_m": c["rating"]}, geometry=c["geom"], crs=crs)
        hyd = self._hydrants_frame(idx_of_key, net, crs)
        meters = b.rr.layers.get("meters")
        if meters is None:
            meters = gpd.GeoDataFrame({"meter_id": pd.Series([], dtype=object)},
                                      geometry=gpd.GeoSeries([], crs=crs), crs=crs)
        self._prv_reach(net, c["geom"])
        return CleanNetwork(network=net, nodes=nodes_gdf, links=links_gdf, hydrants=hyd,
                            meters=meters, crs=crs, inputs=list(b.rr.files),
                            elevation_guessed=guessed)

    def _prv_reach(self, net, geoms) -> None:
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
        self.f.add_many("prv_setting_unreachable", "warning", self.b.lname("valves"),
                        net.link_id[hi],
                        [f"setting {x:.1f} m of head puts the downstream grade at {g:.1f} m, "
                         f"above the highest grade the sources, tanks and pumps give "
                         f"({ceiling:.1f} m): the valve stands open and regulates nothing"
                         for x, g in zip(net.valve_setting[hi], grade[hi])],
                        np.asarray(geoms, dtype=object)[hi])

    def _point_elevations(self, elev, idx_of_key):
        src = self.b.cfg.elevation.source
        sources = [(self.hyd, self.hyd_pts, self.hyd_key)]
        for _role, fr, pts, _li, up, down in self.dev_links:
            sources.append((fr, pts, up))
            sources.append((fr, pts, down))
        for fr, pts, key in sources:
            if fr is None or len(fr) == 0:
                continue
            ok = key >= 0
            if src == "z" and shapely.has_z(pts).any():
                e = shapely.get_coordinates(pts, include_z=True)[:, 2] * unit_factor(
                    "nodes", "elevation", self.b.cfg.elevation.unit)
            elif src in ("attribute", "z"):
                # flat point features on Z-mapped mains: their elevation attribute, if mapped
                e = _col(fr, "elevation")
            else:
                continue
            i = idx_of_key[key[ok]]
            cur = elev[i]
            elev[i] = np.where(np.isfinite(cur), cur, e[ok])

    def _fill_elevations(self, elev, adj, node_id, node_xy, standin):
        """Fill missing elevations from neighbours; returns elevations and where guessed.

        A source's stand-in elevation (its head, where no ground elevation is mapped) gives
        it zero pressure but is no ground level: it anchors no neighbour.
        """
        cfg, f = self.b.cfg, self.f
        if cfg.elevation.source == "dem":
            from gridflow.io.read import sample_dem

            dem = sample_dem(cfg.resolve(cfg.elevation.dem), node_xy[:, 0], node_xy[:, 1],
                             self.b.crs, unit_factor("nodes", "elevation", cfg.elevation.unit))
            elev = np.where(np.isfinite(elev), elev, dem)
        known = np.isfinite(elev) & ~standin
        e = _harmonic_fill(np.where(known, elev, 0.0), known, adj)
        e[standin] = elev[standin]
        known |= standin
        filled = ~known & np.isfinite(e)
        left = ~known & ~np.isfinite(e)
        e[left] = 0.0
        sel = np.flatnonzero(filled | left)
        pts = np.full(len(e), None, dtype=object)
        pts[sel] = shapely.points(node_xy[sel])
        f.add_many("elevation_missing", "warning", "nodes", node_id[filled],
                   [f"elevation missing; {x:.2f} m interpolated from neighbouring nodes"
                    for x in e[filled]], pts[filled])
        f.add_many("elevation_missing", "error", "nodes", node_id[left],
                   "elevation missing and no connected node has one; 0 m used", pts[left])
        return e, filled | left

    def _device_columns(self, cols, role, fr, pts, li, fi, ti):
        df, f = self.b.df, self.f
        m = len(li)
        layer = self.b.lname(role)
        ids = fr.iloc[:, 0].to_numpy(dtype=object)
        stat = _col(fr, "status", object)
        closed = np.isin(stat.astype(str), _CLOSED)
        main_d = df["diameter"].to_numpy(dtype=float)[li]
        kind = np.full(m, LINK_VALVE if role == "valves" else LINK_PUMP)
        vt = np.zeros(m, int)
        vs = np.full(m, np.nan)
        status = np.where(closed, STATUS_CLOSED, STATUS_OPEN)
        pa, pb, pc = (np.full(m, np.nan) for _ in range(3))
        speed = np.ones(m)
        d = main_d.copy()
        mk = np.zeros(m)
        if role == "valves":
            d = np.where(np.isfinite(_col(fr, "diameter")) & (_col(fr, "diameter") > 0),
                         _col(fr, "diameter"), main_d)
            mk = np.nan_to_num(_col(fr, "minor_loss_k"), nan=0.0)
            typ = _col(fr, "type", object).astype(str)
            raw = _col(fr, "setting")
            vt[:] = VALVE_ISOLATION
            prv = typ == "pressure_reducing"
            sec = self.b.cfg.layers.valves
            if prv.any() and "setting" in sec.fields:
                fac = unit_factor("valves", "setting", sec.units.get("setting"))
                vs[prv] = raw[prv] * fac
            bad = prv & ~np.isfinite(vs)
            f.add_many("valve_setting_missing", "error", layer, ids[bad],
                       "pressure-reducing valve without a setting: modelled as an open valve",
                       pts[bad])
            vt[prv & ~bad] = VALVE_PRESSURE_REDUCING
            tcv = typ == "throttle"
            vs[tcv] = raw[tcv]
            badt = tcv & ~(np.isfinite(vs) & (vs >= 0))
            f.add_many("valve_setting_missing", "error", layer, ids[badt],
                       "throttle valve without a loss coefficient setting: K = 0 used", pts[badt])
            vs[badt] = 0.0
            vt[tcv] = VALVE_THROTTLE
            cv = (typ == "check") & ~closed
            status[cv] = STATUS_CHECK
        else:
            sp = _col(fr, "speed")
            speed = np.where(np.isfinite(sp), sp, 1.0)
            speed[closed] = 0.0
            for r in range(m):  # a few pumps per utility: not a hot path
                pts3 = [(_col(fr, f"flow_{i}")[r], _col(fr, f"head_{i}")[r]) for i in (1, 2, 3)]
                design = (_col(fr, "design_flow")[r], _col(fr, "design_head")[r])
                shut = _col(fr, "shut_off_head")[r]
                try:
                    if all(np.isfinite(v) for p in pts3 for v in p):
                        a, b_, c_ = fit_pump_curve(pts3, link_id=str(ids[r]))
                    elif all(np.isfinite(design)):
                        if not np.isfinite(shut):
                            ratio = self.b.cfg.solver.pump_shutoff_ratio
                            shut = ratio * design[1]
                            f.add("pump_shutoff_assumed", "warning", layer, ids[r],
                                  f"pump given by one design point without a shut-off head: "
                                  f"{ratio:g} x the design head assumed (solver."
                                  "pump_shutoff_ratio); map layers.pumps.fields.shut_off_head "
                                  "for the maker's value", pts[r])
                        a, b_, c_ = fit_pump_curve([design], shutoff_head_m=shut,
                                                   link_id=str(ids[r]))
                    else:
                        raise ValueError("no design point or three curve points")
                    pa[r], pb[r], pc[r] = a, b_, c_
                except ValueError as exc:
                    f.add("pump_curve_missing", "error", layer, ids[r],
                          f"pump without a usable head curve ({exc}); modelled as a closed "
                          "valve", pts[r])
                    kind[r] = LINK_VALVE
                    vt[r] = VALVE_ISOLATION
                    status[r] = STATUS_CLOSED
                    d[r] = main_d[r]
        xy = shapely.get_coordinates(shapely.line_interpolate_point(
            self.geoms[li], shapely.line_locate_point(self.geoms[li], pts)))
        geom = shapely.linestrings(np.repeat(xy, 2, axis=0), indices=np.repeat(np.arange(m), 2))
        for k, v in (("link_id", ids), ("from", fi), ("to", ti), ("kind", kind),
                     ("length", np.zeros(m)), ("diameter", d),
                     ("rough", df["roughness"].to_numpy(dtype=float)[li]), ("mk", mk),
                     ("status", status), ("vt", vt), ("vs", vs), ("pa", pa), ("pb", pb),
                     ("pc", pc), ("speed", speed), ("geom", geom),
                     ("material", np.full(m, None, dtype=object)), ("year", np.full(m, np.nan)),
                     ("rating", np.full(m, np.nan)),
                     ("zone", df["zone"].to_numpy(dtype=object)[li])):
            cols[k].append(v)

    def _hydrants_frame(self, idx_of_key, net, crs):
        import geopandas as gpd

        fr = self.hyd
        if fr is None or len(fr) == 0:
            return gpd.GeoDataFrame(
                {"hydrant_id": pd.Series([], dtype=object),
                 "node_idx": pd.Series([], dtype="int64"),
                 "node_id": pd.Series([], dtype=object), "zone": pd.Series([], dtype=object),
                 "required_fire_flow_m3s": pd.Series([], dtype=float),
                 "land_use": pd.Series([], dtype=object),
                 "lateral_length_m": pd.Series([], dtype=float),
                 "lateral_diameter_m": pd.Series([], dtype=float)},
                geometry=gpd.GeoSeries([], crs=crs), crs=crs)
        ok = self.hyd_key >= 0
        ni = idx_of_key[self.hyd_key[ok]]
        return gpd.GeoDataFrame(
            {"hydrant_id": fr["hydrant_id"].to_numpy(dtype=object)[ok], "node_idx": ni,
             "node_id": net.node_id[ni], "zone": net.zone[ni],
             "required_fire_flow_m3s": _col(fr, "required_fire_flow")[ok],
             "land_use": _col(fr, "land_use", object)[ok],
             "lateral_length_m": _col(fr, "lateral_length")[ok],
             "lateral_diameter_m": _col(fr, "lateral_diameter")[ok]},
            geometry=np.asarray(fr.geometry.values, dtype=object)[ok], crs=crs)


def _harmonic_fill(e: np.ndarray, known: np.ndarray, adj) -> np.ndarray:
    """Unknown values as the mean of their neighbours' (harmonic interpolation on the graph).

    Notes
    -----
    Solves ``(D - A)_uu x_u = A_uk e_k`` for the unknown nodes ``u`` of every connected part
    holding at least one known node (``D`` the degree, ``A`` the adjacency): each unknown value
    is then exactly the mean of its neighbours'. Parts with no known value stay NaN.
    """
    from scipy.sparse import diags
    from scipy.sparse.csgraph import connected_components
    from scipy.sparse.linalg import spsolve

    out = np.where(known, e, np.nan)
    if known.all() or not known.any():
        return out
    _, comp = connected_components(adj, directed=False)
    has = np.zeros(comp.max() + 1, bool)
    has[comp[known]] = True
    u = np.flatnonzero(~known & has[comp])
    if len(u) == 0:
        return out
    k = np.flatnonzero(known)
    a = (adj > 0).astype(float).tocsr()
    deg = np.asarray(a.sum(axis=1)).ravel()
    auu = (diags(deg[u]) - a[u][:, u]).tocsc()
    rhs = a[u][:, k] @ e[k]
    out[u] = spsolve(auu, rhs)
    return out


def _prefix_collisions(ids: np.ndarray, kind: np.ndarray) -> np.ndarray:
    """Valve and pump ids that repeat a pipe id are prefixed with their kind ('valve:12')."""
    if (kind == LINK_PIPE).all():
        return ids.astype(object)
    ids = ids.astype(object).copy()
    pipe_ids = set(ids[kind == LINK_PIPE].tolist())
    for k, name in ((LINK_VALVE, "valve"), (LINK_PUMP, "pump")):
        m = (kind == k) & np.isin(ids.astype(str), list(pipe_ids))
        ids[m] = [f"{name}:{x}" for x in ids[m]]
    return ids


def _unique_ids(ids: np.ndarray, what: str) -> np.ndarray:
    """Ids made unique with a '#k' suffix on repeats (repeats across layers)."""
    s = pd.Series(ids.astype(str))
    k = s.groupby(s, sort=False).cumcount().to_numpy()
    if (k > 0).any():
        out = s.to_numpy(dtype=object)
        out[k > 0] = [f"{a}#{b + 1}" for a, b in zip(out[k > 0], k[k > 0])]
        return out
    return ids.astype(object)
