"""Stage 3 of the topology: where the snapped mains are split, and where points sit on them.

Split events on a main, all found with one STRtree over the mains (applied by
:func:`gridflow.topology.split.split_mains`):

- T-junctions: an end that no other main meets after snapping (a dangling end) within the
  snapping tolerance of another main's interior joins that main there (the nearest one), when
  both are on the same level (``layers.pipes.fields.level``: bridge, tunnel, level number).
  An end where two or more mains already meet is never joined to a passing main, and lines
  that cross without a shared vertex are never connected: such near misses, and dangling ends
  near a main on another level, are info findings for the GIS editors;
- hydrants: the nearest main within the search distance gets a node at the projected point
  (or uses the main's end, or a T-junction node, within the snapping tolerance of it);
- valves and pumps: the nearest main within the search distance is cut at the projected point
  into two coincident nodes, joined by a zero-length valve or pump link. It acts along the
  main's digitised direction (first vertex to last) unless ``fields.direction`` says against
  (a code, or a bearing in degrees more than 90 degrees off the main's). Within the snapping
  tolerance of a main's end, the device sits between that end and the node there;
- rings (a main whose ends meet) are split in the middle.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import shapely

from gridflow.topology.idtext import joined, two_decimals
from gridflow.topology.lines import distance, interpolate, locate, measures, vertices
from gridflow.topology.nearest import box_query, nearest_lines
from gridflow.topology.points import column, point_layer, text_in
from gridflow.topology.records import Attached, Context, Device, PointLayer, Snapped

__all__ = ["attach_points"]

_EPS = 1e-3  # [m] positions closer than this along a line are the same place


class _Keys:
    """Node candidates added by this stage (after the snapped clusters), and the points
    made there (kept for the nodes' points: none made twice)."""

    def __init__(self, cxy: np.ndarray, cpts: np.ndarray | None):
        self.xy = [cxy]
        self.pts = [cpts if cpts is not None else np.full(len(cxy), None, dtype=object)]
        self.next = len(cxy)

    def new(self, xy: np.ndarray, pts: np.ndarray) -> np.ndarray:
        """Keys at ``xy``; ``pts`` the points there (2-D, at exactly these coordinates)."""
        k = np.arange(self.next, self.next + len(xy))
        self.next += len(xy)
        self.xy.append(np.asarray(xy, dtype=float).reshape(-1, 2))
        self.pts.append(np.asarray(pts, dtype=object))
        return k


def attach_points(ctx: Context, sn: Snapped) -> Attached:
    """Stage 3: T-junctions, hydrants, rings and devices as split events on the mains."""
    f = ctx.findings
    glen = shapely.length(sn.geoms) if sn.length_m is None else sn.length_m
    tree = shapely.STRtree(sn.geoms)
    lr = _Referencing(sn)
    keys = _Keys(sn.cxy, sn.cluster_pts)
    t_line, t_key, t_s = t_events(ctx, sn, tree, glen, lr)
    hyd = point_layer(ctx, "hydrants")
    hyd_key, ev_line, ev_key, ev_s, ev_xy = _hydrant_events(ctx, sn, tree, glen, keys, hyd,
                                                            t_line, t_key, t_s, lr)
    # split events gathered in parts (hydrants and T-junctions, rings, each device role),
    # joined once at the end
    ev: dict[str, list] = {"line": [ev_line], "s": [ev_s], "xy": [ev_xy], "up": [ev_key],
                           "down": [ev_key]}
    ring = np.flatnonzero(sn.lab_s == sn.lab_e)
    if len(ring):
        rs = glen[ring] / 2
        rpts = shapely.line_interpolate_point(sn.geoms[ring], rs)
        rxy = shapely.get_coordinates(rpts)
        rk = keys.new(rxy, rpts)
        f.add_many("ring_split", "info", sn.layer, sn.ids[ring],
                   "main whose ends meet split in the middle", sn.geoms[ring])
        _add(ev, line=ring, s=rs, xy=rxy, up=rk, down=rk)
    start_key, end_key = sn.lab_s.copy(), sn.lab_e.copy()
    devices = []
    for pl, li, s, end in _device_events(ctx, sn, tree, glen, lr):
        m = len(li)
        up, down = np.empty(m, int), np.empty(m, int)
        inner = end < 0
        pxy = lr.interpolate(li, s)  # a point made only where a device cuts its main
        if inner.any():
            k = keys.new(np.repeat(pxy[inner], 2, axis=0),
                         np.repeat(shapely.points(pxy[inner]), 2)).reshape(-1, 2)
            up[inner], down[inner] = k[:, 0], k[:, 1]
            _add(ev, line=li[inner], s=s[inner], xy=pxy[inner], up=up[inner],
                 down=down[inner])
        e0 = end == 0
        if e0.any():
            k = keys.new(sn.cxy[sn.lab_s[li[e0]]], keys.pts[0][sn.lab_s[li[e0]]])
            up[e0], down[e0] = sn.lab_s[li[e0]], k
            start_key[li[e0]] = k
        e1 = end == 1
        if e1.any():
            k = keys.new(sn.cxy[sn.lab_e[li[e1]]], keys.pts[0][sn.lab_e[li[e1]]])
            up[e1], down[e1] = k, sn.lab_e[li[e1]]
            end_key[li[e1]] = k
        devices.append(Device(points=pl, line=li, up=up, down=down,
                              reversed=_against(ctx, pl, sn.geoms[li], s, glen[li]), xy=pxy))
    ev_line, ev_s, ev_up, ev_down = (np.concatenate(ev[k]) for k in ("line", "s", "up",
                                                                     "down"))
    ev_xy = np.concatenate([a.reshape(-1, 2) for a in ev["xy"]])
    order = by_line_and_distance(ev_line, ev_s)
    return Attached(key_xy=np.vstack(keys.xy), key_pts=np.concatenate(keys.pts),
                    n_clusters=len(sn.cxy),
                    ev_line=ev_line[order].astype(np.int64), ev_s=ev_s[order],
                    ev_xy=ev_xy[order].reshape(-1, 2), ev_up=ev_up[order].astype(np.int64),
                    ev_down=ev_down[order].astype(np.int64), start_key=start_key,
                    end_key=end_key, hydrants=hyd, hyd_key=hyd_key, devices=tuple(devices),
                    cluster_pts=sn.cluster_pts)


def by_line_and_distance(line: np.ndarray, s: np.ndarray) -> np.ndarray:
    """The order of events by line, then by distance along it, ties in their given order:
    ``np.lexsort((s, line))``.

    Notes
    -----
    One stable sort of a complex key (line in the real part, exact below 2**53, distance in
    the imaginary part): numpy orders complex numbers by real part, then imaginary part, so
    this is the same order, in about three quarters of the time of lexsort's two passes at a
    million events. numpy puts a complex number with a NaN part after all others, not after
    the others of its line: where a distance is missing (NaN), lexsort itself is used.
    """
    if np.isnan(s).any():
        return np.lexsort((s, line))
    key = np.empty(len(line), dtype=np.complex128)
    key.real = line
    key.imag = s
    return np.argsort(key, kind="stable")


def _add(ev: dict[str, list], **parts) -> None:
    """Append each part of a group of split events to its column's list of parts."""
    for name, part in parts.items():
        ev[name].append(part)


class _Referencing:
    """Distances along the snapped mains and points at distances along them, from their
    coordinates: ``shapely.line_locate_point`` and ``shapely.line_interpolate_point``'s
    answers to the last bit (see :func:`gridflow.topology.lines.locate`), without a point
    geometry per question or answer."""

    def __init__(self, sn: Snapped):
        self.lines = sn.geoms
        self.v = vertices(sn.geoms) if sn.vertices is None else sn.vertices
        self.m = measures(self.v)

    def locate(self, line: np.ndarray, xy: np.ndarray) -> np.ndarray:
        """Distance [m] along each main ``line`` to the point on it nearest ``xy``."""
        return locate(self.lines, self.v, self.m, line, xy)

    def interpolate(self, line: np.ndarray, s: np.ndarray) -> np.ndarray:
        """The point ``(k, 2)`` [m] at distance ``s`` along each main ``line``."""
        return interpolate(self.lines, self.v, self.m, line, s)


def t_events(ctx: Context, sn: Snapped, tree, glen: np.ndarray, lr: _Referencing | None = None):
    """T-junctions: (main, key, distance along the main) of each dangling end joined; every
    T-join and every near miss not joined is a finding."""
    f, tol = ctx.findings, ctx.tol
    cpts = sn.cluster_pts if sn.cluster_pts is not None else shapely.points(sn.cxy)
    none = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0))
    if len(cpts) == 0:
        return none
    # the mains whose boxes come within the tolerance, less each end's own mains, measured
    # once: the pairs ``query(predicate="dwithin")`` gives, in the same order
    pi, li = box_query(tree, cpts, tol)
    own = (sn.lab_s[li] == pi) | (sn.lab_e[li] == pi)
    pi, li = pi[~own], li[~own]
    lr = _Referencing(sn) if lr is None else lr
    d = distance(sn.geoms, lr.v, li, sn.cxy[pi])
    near = d <= tol
    pi, li, d = pi[near], li[near], d[near]
    s = lr.locate(li, sn.cxy[pi])
    inside = (s > _EPS) & (s < glen[li] - _EPS)
    pi, li, s, d = pi[inside], li[inside], s[inside], d[inside]
    if len(pi) == 0:
        return none
    n = len(sn.geoms)
    ends = np.bincount(np.r_[sn.lab_s, sn.lab_e], minlength=len(sn.cxy))
    owner = np.full(len(sn.cxy), -1)
    owner[sn.lab_e] = np.arange(n)
    owner[sn.lab_s] = np.arange(n)
    dangling = ends[pi] == 1
    same_level = sn.level[owner[pi]] == sn.level[li]
    cand = np.flatnonzero(dangling & same_level)
    # the nearest main takes a dangling end
    cand = cand[np.lexsort((li[cand], d[cand], pi[cand]))]
    first = np.r_[True, pi[cand][1:] != pi[cand][:-1]] if len(cand) else np.zeros(0, bool)
    take = np.sort(cand[first])
    end_pipe = sn.ids[owner[pi]]
    f.add_many("main_split", "info", sn.layer, sn.ids[li[take]],
               [f"T-junction: split where the dangling end of pipe {p} lies {x:.2f} m from it"
                for p, x in zip(end_pipe[take], d[take])], cpts[pi[take]])
    jn = np.flatnonzero(~dangling)
    f.add_many("near_miss", "info", sn.layer, sn.ids[li[jn]],
               [f"not joined: a node where {k} mains meet lies {x:.2f} m from this main (a "
                "crossing or a near miss; join them in the GIS if they are connected)"
                for k, x in zip(ends[pi[jn]], d[jn])], cpts[pi[jn]])
    lv = np.flatnonzero(dangling & ~same_level)
    f.add_many("near_miss", "info", sn.layer, sn.ids[li[lv]],
               [f"not joined: the dangling end of pipe {p} (level {a}) lies {x:.2f} m from this "
                f"main (level {b}); mains on different levels never join"
                for p, a, b, x in zip(end_pipe[lv], sn.level[owner[pi[lv]]], sn.level[li[lv]],
                                      d[lv])], cpts[pi[lv]])
    return li[take], pi[take], s[take]


def _nearest(tree, geoms, pts, sd, verts=None):
    """(point idx, line idx, distance) of the nearest main within ``sd``; and all distances
    (``verts``: the mains' vertices, to measure from them)."""
    if len(pts) == 0 or len(geoms) == 0:
        return (np.zeros(0, int),) * 2 + (np.zeros(0),), np.full(len(pts), np.inf)
    pts = shapely.force_2d(pts) if shapely.has_z(pts).any() else pts
    pi, li, dist = nearest_lines(tree, geoms, pts, sd, verts=verts)
    full = np.full(len(pts), np.inf)
    full[pi] = dist
    un = np.flatnonzero(~np.isfinite(full))
    if un.size:  # the nearest beyond the search distance, for the findings
        (q, _), d = tree.query_nearest(pts[un], return_distance=True, all_matches=False)
        full[un[q]] = d
    return (pi, li, dist), full


def _hydrant_events(ctx, sn, tree, glen, keys, hyd, t_line, t_key, t_s, lr):
    """Hydrant nodes; merges hydrant and T events within the tolerance of each other."""
    nh = 0 if hyd is None else len(hyd.frame)
    hyd_key = np.full(nh, -1)
    if hyd is None:
        return hyd_key, t_line, t_key, t_s, sn.cxy[t_key]
    f, tol, layer, pts = ctx.findings, ctx.tol, hyd.layer, hyd.pts
    ids = hyd.ids
    sd = ctx.search_distance("hydrants")
    (pi, li, dist), full = _nearest(tree, sn.geoms, pts, sd, lr.v)
    un = np.ones(nh, bool)
    un[pi] = False
    f.add_many("hydrant_unattached", "warning", layer, ids[un],
               [f"no main within {sd:g} m (nearest {x:.2f} m); hydrant left out of the "
                "fire-flow analysis" for x in full[un]], pts[un])
    far = dist > tol
    msgs: Any = ""  # only counted (a run's log): no message written
    if f.keeps("info"):  # every row's message, by array work where it can be
        text = two_decimals(dist[far])
        msgs = None if text is None else joined("attached to main ", sn.ids[li[far]], " ",
                                                text, " m away")
        if msgs is None:
            msgs = [f"attached to main {m} {x:.2f} m away" for m, x in
                    zip(sn.ids[li[far]].tolist(), dist[far].tolist())]
    f.add_many("hydrant_attached", "info", layer, ids[pi[far]], msgs, pts[pi[far]])
    s = lr.locate(li, shapely.get_coordinates(pts[pi]))
    L = glen[li]
    at0, at1 = s <= tol, s >= L - tol
    hyd_key[pi[at0]] = sn.lab_s[li[at0]]
    hyd_key[pi[at1 & ~at0]] = sn.lab_e[li[at1 & ~at0]]
    mid = ~at0 & ~at1
    h_pi, h_li, h_s = pi[mid], li[mid], s[mid]
    h_xy = lr.interpolate(h_li, h_s)
    # merge with T events on the same main within the tolerance
    line = np.concatenate([t_line, h_li])
    s_all = np.concatenate([t_s, h_s])
    is_t = np.r_[np.ones(len(t_line), bool), np.zeros(len(h_li), bool)]
    order = np.lexsort((~is_t, s_all, line))
    ln, ss, it = line[order], s_all[order], is_t[order]
    new = (np.r_[True, (ln[1:] != ln[:-1]) | (np.diff(ss) > tol)] if len(ln)
           else np.zeros(0, bool))
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
    lead_row = order[lead] - len(t_line)  # lead events are hydrant rows: points made there
    hk[lead] = keys.new(h_xy[lead_row], shapely.points(h_xy[lead_row]))
    joint = ~it & (g_t[gid] >= 0)
    hk[joint] = g_t[gid[joint]]
    follow = ~it & ~lead & ~joint
    hk[follow] = hk[g_h[gid[follow]]]
    hrow = order[~it] - len(t_line)
    hyd_key[h_pi[hrow]] = hk[~it]
    # events: all T events, plus lead hydrant events
    sel = order[lead] - len(t_line)
    ev_line = np.concatenate([t_line, h_li[sel]])
    ev_key = np.concatenate([t_key, hk[lead]])
    ev_s = np.concatenate([t_s, h_s[sel]])
    ev_xy = np.vstack([sn.cxy[t_key], h_xy[sel]])
    return hyd_key, ev_line, ev_key, ev_s, ev_xy


def _device_events(ctx: Context, sn: Snapped, tree, glen, lr: _Referencing):
    """Valves and pumps: (points, main, distance along it, end: 0 / 1 / -1 inside)."""
    out = []
    for role in ("valves", "pumps"):
        pl = point_layer(ctx, role)
        if pl is None:
            continue
        f, layer, fr, pts = ctx.findings, pl.layer, pl.frame, pl.pts
        sd = ctx.search_distance(role)
        (pi, li, dist), full = _nearest(tree, sn.geoms, pts, sd, lr.v)
        un = np.ones(len(fr), bool)
        un[pi] = False
        f.add_many(f"{role[:-1]}_unattached", "warning", layer, _ids_at(fr, un),
                   [f"no main within {sd:g} m (nearest {x:.2f} m); {role[:-1]} left out"
                    for x in full[un]], pts[un])
        s = lr.locate(li, shapely.get_coordinates(pts[pi]))
        L = glen[li]
        end = np.where(s <= ctx.tol, 0, np.where(s >= L - ctx.tol, 1, -1))
        # one device per main end
        key = np.where(end >= 0, li * 2 + end, -1 - np.arange(len(li)))
        _, first = np.unique(key, return_index=True)
        dupe = np.ones(len(li), bool)
        dupe[first] = False
        f.add_many(f"{role[:-1]}_stacked", "warning", layer, _ids_at(fr, pi[dupe]),
                   f"another {role[:-1]} already sits at this end of the main; left out",
                   pts[pi[dupe]])
        keep = pi[~dupe]
        every = len(keep) == len(fr)  # every device placed (keep ascending): the frame as is
        placed = PointLayer(role=role, frame=fr if every else
                            fr.iloc[keep].reset_index(drop=True), pts=pts[keep], layer=layer)
        _direction_finding(ctx, placed)
        out.append((placed, li[~dupe], s[~dupe], end[~dupe]))
    return out


def _ids_at(frame, where: np.ndarray) -> np.ndarray:
    """The ids (first column) of a role frame's rows at ``where`` (positions or a mask),
    made Python objects for those rows only."""
    where = np.flatnonzero(where) if where.dtype == bool else where
    return frame.iloc[where, 0].to_numpy(dtype=object)


def _directional(pl: PointLayer) -> np.ndarray:
    """True for devices that act in a direction: pumps, PRVs, check valves."""
    if pl.role == "pumps":
        return np.ones(len(pl.frame), bool)
    return text_in(pl.frame, "type", ("prv", "check"))


def _direction_finding(ctx: Context, pl: PointLayer) -> None:
    """One info finding per role: devices with no mapped direction keep the digitised one."""
    code = column(pl.frame, "direction", object)
    deg = column(pl.frame, "direction_deg")
    unmapped = _directional(pl) & (code == None) & ~np.isfinite(deg)  # noqa: E711
    n = int(unmapped.sum())
    if n:
        what = "pumps" if pl.role == "pumps" else "PRVs and check valves"
        ctx.findings.add("direction_unmapped", "info", pl.layer, "",
                         f"{n} {what} have no mapped direction and act along the digitised "
                         f"direction of their main (first vertex to last); map "
                         f"layers.{pl.role}.fields.direction to say otherwise")


def _against(ctx: Context, pl: PointLayer, lines, s, length) -> np.ndarray:
    """True where a device acts against its main's digitised direction (code or bearing)."""
    if "direction" not in pl.frame and "direction_deg" not in pl.frame:
        return np.zeros(len(pl.frame), bool)  # nothing mapped: along every main
    code = column(pl.frame, "direction", object)
    out = code == "against"
    deg = column(pl.frame, "direction_deg")
    has = np.isfinite(deg)
    if has.any():
        a = shapely.get_coordinates(shapely.line_interpolate_point(
            lines[has], np.maximum(s[has] - 0.5, 0.0)))
        b = shapely.get_coordinates(shapely.line_interpolate_point(
            lines[has], np.minimum(s[has] + 0.5, length[has])))
        main_deg = np.degrees(np.arctan2(b[:, 0] - a[:, 0], b[:, 1] - a[:, 1])) % 360.0
        off = np.abs((deg[has] - main_deg + 180.0) % 360.0 - 180.0)
        out[has] = off > 90.0
    return out
