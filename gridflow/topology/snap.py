"""Stage 2 of the topology: pipe ends snapped to each other and to junction points.

Ends closer than ``[run] snap_tolerance`` join into one node (single linkage); a junction
point among them fixes the node's position and lends its id. Then pipes whose ends snapped to
one node and that are no longer than the tolerance are dropped, and so are duplicates (same
end nodes, same diameter, within the tolerance of each other).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import shapely

from gridflow.topology.idtext import joined, two_decimals
from gridflow.topology.lines import (
    Vertices,
    end_points,
    flat,
    set_end_points,
    snap_labels,
    vertices,
)
from gridflow.topology.records import Context, Pipes, Snapped

__all__ = ["snap_ends"]

_EPS = 1e-3  # [m] an end moved less than this has not moved


def snap_ends(ctx: Context, pipes: Pipes) -> Snapped:
    """Stage 2: snap the ends, drop zero-length and duplicate mains (each a finding)."""
    f, tol, layer = ctx.findings, ctx.tol, pipes.layer
    df = pipes.frame
    geoms = df["geom"].to_numpy()
    ids = df["pipe_id"].to_numpy(dtype=object)
    n = len(df)
    # --- snapping ends to each other and to junction points
    vert = vertices(geoms)
    start, end = end_points(geoms, vert)
    nodes = ctx.read.layers.get("nodes")
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
    cluster_node = node_of_cluster[used]
    cpts = shapely.points(cxy)  # every later stage takes its cluster points from here
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
        msgs: Any = ""  # only counted (a run's log): no message written
        if f.keeps("info"):  # every row's message, by array work where it can be
            text = two_decimals(dmax[cl])
            msgs = None if text is None else joined(
                pa.array(k[cl]).cast(pa.large_string()), " pipe ends joined; an end moved ",
                text, " m")
            if msgs is None:
                msgs = [f"{c} pipe ends joined; an end moved {d:.2f} m" for c, d in
                        zip(k[cl].tolist(), dmax[cl].tolist())]
        f.add_many("end_snapped", "info", layer, ids[first[cl]], msgs, cpts[cl])
        geoms = set_end_points(geoms, cxy[lab_s], cxy[lab_e], vert)  # 2-D
    else:  # no end moved: the mains as prepared, drawn in 2-D
        geoms = flat(geoms)
    # z at clusters, for elevation source z
    cluster_z = np.full(len(cxy), np.nan)
    if "z0" in df:
        z = np.concatenate([df["z0"].to_numpy(), df["z1"].to_numpy()])
        lz = np.concatenate([lab_s, lab_e])
        okz = np.isfinite(z)
        s_ = np.bincount(lz[okz], z[okz], len(cxy))
        c_ = np.bincount(lz[okz], minlength=len(cxy))
        cluster_z = np.where(c_ > 0, s_ / np.maximum(c_, 1), np.nan)
    # --- zero-length pipes and rings closing on themselves
    glen = shapely.length(geoms)
    same = lab_s == lab_e
    zero = same & (glen <= tol)
    drawn = pipes.drawn_length_m
    f.add_many("zero_length_dropped", "warning", layer, ids[zero],
               [f"{x:.2f} m long as drawn in the GIS; dropped because both its ends snapped to one "
                f"node (within the snapping tolerance of {tol:g} m)" for x in drawn[zero]],
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
    if not keep.all():  # the vertices of the mains kept, for the later stages
        count = vert.n[keep]
        last = np.cumsum(count) - 1
        vert = Vertices(vert.coords[np.repeat(keep, vert.n)], count, last - count + 1,
                        last)
    return Snapped(frame=df, geoms=geoms, ids=ids, layer=layer, lab_s=lab_s[keep],
                   lab_e=lab_e[keep], cxy=cxy, cluster_node=cluster_node, cluster_z=cluster_z,
                   nodes=nodes, level=df["level"].to_numpy(dtype=object), cluster_pts=cpts,
                   length_m=glen[keep], vertices=vert)
