"""Stage 5 of the topology: the network's nodes, their order, ids, kinds and known elevations.

Tanks and sources become fixed-head nodes at the nearest pipe end within their search
distance. A tank's head is its bottom elevation plus its level; where the tank layer's
``levels = "elevation"``, level and maximum level are absolute elevations instead of depths.
Nodes are ordered by their coordinates (to the mm), so ids and results are deterministic.
"""

from __future__ import annotations

import numpy as np
import shapely

from gridflow.config.layers import layer_sections
from gridflow.network import NODE_JUNCTION, NODE_SOURCE, NODE_TANK
from gridflow.topology.idtext import all_distinct, as_text, numbered
from gridflow.topology.pipes import z_factor
from gridflow.topology.points import column, point_layer
from gridflow.topology.records import Attached, Context, NodeTable, Snapped, Split

__all__ = ["number_nodes", "unique_ids", "unique_ids_checked"]


def number_nodes(ctx: Context, sn: Snapped, at: Attached, sp: Split) -> NodeTable:
    """Stage 5: used keys become nodes; junction points, tanks and sources lend ids."""
    cfg = ctx.cfg
    key_xy = at.key_xy
    used = np.zeros(len(key_xy), bool)
    used[sp.from_key] = used[sp.to_key] = True
    for d in at.devices:
        used[d.up] = used[d.down] = True
    used[at.hyd_key[at.hyd_key >= 0]] = True
    end_keys = np.zeros(len(key_xy), bool)
    end_keys[: at.n_clusters] = used[: at.n_clusters]
    fixed, standin_keys = _fixed_heads(ctx, key_xy, end_keys)
    keys = np.flatnonzero(used)
    keys = keys[_xy_order(key_xy[keys])]
    nn = len(keys)
    idx_of_key = np.full(len(key_xy), -1)
    idx_of_key[keys] = np.arange(nn)
    node_xy = key_xy[keys]
    node_id = np.full(nn, None, dtype=object)
    kind = np.full(nn, NODE_JUNCTION, dtype=np.int8)
    fixed_head = np.full(nn, np.nan)
    elev = np.full(nn, np.nan)
    zone = np.full(nn, None, dtype=object)
    nodes = sn.nodes
    is_cl = keys < at.n_clusters
    if nodes is not None and len(nodes):
        cn = np.full(nn, -1)
        cn[is_cl] = sn.cluster_node[keys[is_cl]]
        has = cn >= 0
        node_id[has] = nodes["node_id"].to_numpy(dtype=object)[cn[has]]
        if "zone" in nodes:
            zone[has] = nodes["zone"].to_numpy(dtype=object)[cn[has]]
        if cfg.elevation.source == "attribute" and "elevation" in nodes:
            elev[has] = nodes["elevation"].to_numpy(dtype=float)[cn[has]]
        if cfg.elevation.source == "z":
            ng = np.asarray(nodes.geometry.values)
            if shapely.has_z(ng).any():
                z = shapely.get_coordinates(ng, include_z=True)[:, 2]
                elev[has] = z[cn[has]] * z_factor(cfg)
    if cfg.elevation.source == "z":
        cz = np.full(nn, np.nan)
        cz[is_cl] = sn.cluster_z[keys[is_cl]]
        elev = np.where(np.isfinite(elev), elev, cz)
    _point_elevations(ctx, at, elev, idx_of_key)
    if cfg.elevation.source == "z":
        _split_point_elevations(sn, at, elev, idx_of_key)
    for k, (fk, fid, head, el) in sorted(fixed.items()):
        i = idx_of_key[k]
        kind[i], fixed_head[i], node_id[i] = fk, head, fid
        if np.isfinite(el):
            elev[i] = el
    gen = node_id == None  # noqa: E711
    # generated ids never equal a taken one nor each other: only the taken ids can repeat
    taken, distinct = unique_ids_checked(node_id[~gen])
    prefix = _generated_prefix(node_id[~gen], int(gen.sum()))
    id_text = _id_text(prefix, gen, taken)
    if id_text is not None:  # the ids made as Arrow text, then as Python strings once
        node_id = id_text.to_numpy(zero_copy_only=False)
    else:
        node_id[gen] = [f"{prefix}{i}" for i in range(1, int(gen.sum()) + 1)]
        node_id[~gen] = taken
    standin = np.zeros(nn, bool)
    standin[idx_of_key[sorted(standin_keys)]] = True
    return NodeTable(keys=keys, idx_of_key=idx_of_key, xy=node_xy,
                     node_id=node_id, kind=kind, fixed_head_m=fixed_head,
                     elevation_m=elev, standin=standin, zone=zone, ids_distinct=distinct,
                     id_text=id_text)


def _id_text(prefix: str, gen: np.ndarray, taken: np.ndarray):
    """Every node's id as Arrow text: generated ids (``prefix`` and a number, in node order)
    where ``gen``, the ``taken`` ids (all str) elsewhere; None when a taken id is not a str."""
    import pyarrow as pa

    if not set(map(type, taken.tolist())) <= {str}:
        return None
    n_gen = int(gen.sum())
    where = np.empty(len(gen), dtype=np.int64)
    where[gen] = np.arange(n_gen)
    where[~gen] = n_gen + np.arange(len(gen) - n_gen)
    both = pa.concat_arrays([numbered(prefix, n_gen), pa.array(taken, type=pa.large_string())])
    return both.take(pa.array(where))


def _xy_order(xy: np.ndarray) -> np.ndarray:
    """The order of points by x, then y, each rounded to the mm, then position (stable).

    Notes
    -----
    ``np.round(v, 3)`` is ``rint(v * 1000) / 1000``: the integers ``rint(v * 1000)`` order
    and tie the points exactly as the rounded values do (while below 2**52), so one stable
    sort of one integer per point (x's, then y's, in one range) gives the order of a
    three-key ``lexsort``, in about a third of its time. Coordinates that do not fit take
    the ``lexsort``.
    """
    if len(xy) and np.isfinite(xy).all():
        r = np.rint(xy * 1000.0)
        lo, hi = r.min(axis=0), r.max(axis=0)
        if np.abs(r).max() < 2.0**52 and (hi[0] - lo[0] + 1) * (hi[1] - lo[1] + 1) < 2.0**62:
            a = (r[:, 0] - lo[0]).astype(np.int64)
            b = (r[:, 1] - lo[1]).astype(np.int64)
            return np.argsort(a * (int(hi[1] - lo[1]) + 1) + b, kind="stable")
    kx = np.round(xy, 3)
    return np.lexsort((np.arange(len(xy)), kx[:, 1], kx[:, 0]))


def _generated_prefix(taken: np.ndarray, n: int) -> str:
    """The prefix of the generated node ids ``N1`` ... ``Nn``: ``N``, lengthened (``NN1``
    ...) until none of them is a taken id."""
    import pandas as pd

    # a taken id collides with N...Nk (k in 1..n) when it is L letters N then k
    m = pd.Series(np.asarray(taken, dtype=object).astype(str), dtype=object).str.extract(
        r"^(N+)([1-9][0-9]*)\Z")
    m = m[m[0].notna()]
    clash = m[0].str.len().to_numpy()[m[1].str.len().to_numpy() <= len(str(n))]
    num = m[1].to_numpy()[m[1].str.len().to_numpy() <= len(str(n))]
    clash = clash[np.array([int(x) <= n for x in num], dtype=bool)] if len(num) else clash
    width = 1
    while width in set(clash.tolist()):
        width += 1
    return "N" * width


def _levels_are_elevations(ctx: Context, role: str, frame) -> np.ndarray:
    """True per row whose layer gives tank levels as absolute elevations."""
    out = np.zeros(len(frame), bool)
    names = column(frame, "source_layer", object)
    for sec in layer_sections(ctx.cfg.layers, role):
        if sec.levels == "elevation":
            out |= names == sec.layer
    return out


def _fixed_heads(ctx: Context, key_xy: np.ndarray, used_end_keys: np.ndarray):
    """Tanks and sources onto the nearest pipe-end node: {key: (kind, id, head, elev)}."""
    from scipy.spatial import cKDTree

    f = ctx.findings
    out: dict[int, tuple[int, str, float, float]] = {}
    standin_keys: set[int] = set()
    cand = np.flatnonzero(used_end_keys)
    tree = cKDTree(key_xy[cand]) if len(cand) else None
    for role, kind in (("tanks", NODE_TANK), ("sources", NODE_SOURCE)):
        pl = point_layer(ctx, role)
        if pl is None:
            continue
        fr, pts, layer, ids = pl.frame, pl.pts, pl.layer, pl.ids
        standin = np.zeros(len(fr), bool)
        if role == "tanks":
            elev = column(fr, "bottom_elevation")
            level, top = column(fr, "level"), column(fr, "max_level")
            absolute = _levels_are_elevations(ctx, role, fr)
            head = np.where(absolute, level, elev + level)
            top_head = np.where(absolute, top, elev + top)
            low = np.isfinite(head) & (head < elev)
            f.add_many("tank_level_implausible", "warning", layer, ids[low],
                       [f"level gives a water surface at {h:.2f} m, below the bottom at "
                        f"{e:.2f} m (check layers.tanks.levels: depth or elevation)"
                        for h, e in zip(head[low], elev[low])], pts[low])
            high = np.isfinite(head) & np.isfinite(top_head) & (head > top_head)
            f.add_many("tank_level_implausible", "warning", layer, ids[high],
                       [f"level gives a water surface at {h:.2f} m, above the maximum level "
                        f"at {t:.2f} m" for h, t in zip(head[high], top_head[high])], pts[high])
        else:
            head = column(fr, "head")
            elev = column(fr, "elevation")
            standin = ~np.isfinite(elev)
            elev = np.where(standin, head, elev)  # pressure 0 at the source
        bad = ~np.isfinite(head)
        f.add_many(f"{role[:-1]}_head_missing", "error", layer, ids[bad],
                   f"{role[:-1]} without a usable head or level; left out", pts[bad])
        sd = ctx.search_distance(role)
        if tree is None:
            d, j = np.full(len(fr), np.inf), np.zeros(len(fr), int)
        else:
            d, j = tree.query(shapely.get_coordinates(pts))
        far = (d > sd) & ~bad
        f.add_many(f"{role[:-1]}_unattached", "warning", layer, ids[far],
                   [f"no pipe end within {sd:g} m (nearest {x:.2f} m); left out"
                    for x in d[far]], pts[far])
        ok = ~bad & ~far
        info = ok & (d > ctx.tol)
        f.add_many(f"{role[:-1]}_attached", "info", layer, ids[info],
                   [f"attached to the pipe end {x:.2f} m away" for x in d[info]], pts[info])
        for r in np.flatnonzero(ok):  # a few tanks and sources: not a hot path
            k = int(cand[j[r]])
            if k in out:
                f.add(f"{role[:-1]}_conflict", "error", layer, ids[r],
                      f"the nearest pipe end already holds {out[k][1]}; left out", pts[r])
                continue
            out[k] = (kind, str(ids[r]), float(head[r]), float(elev[r]))
            if standin[r]:
                standin_keys.add(k)
    return out, standin_keys


def _point_elevations(ctx: Context, at: Attached, elev: np.ndarray, idx_of_key) -> None:
    """Elevations of hydrants, valves and pumps at their nodes where none is known yet."""
    src = ctx.cfg.elevation.source
    sources = []
    if at.hydrants is not None:
        sources.append((at.hydrants.frame, at.hydrants.pts, at.hyd_key))
    for d in at.devices:
        sources.append((d.points.frame, d.points.pts, d.up))
        sources.append((d.points.frame, d.points.pts, d.down))
    for fr, pts, key in sources:
        if len(fr) == 0:
            continue
        ok = key >= 0
        if src == "z" and shapely.has_z(pts).any():
            e = shapely.get_coordinates(pts, include_z=True)[:, 2] * z_factor(ctx.cfg)
        elif src in ("attribute", "z"):
            e = column(fr, "elevation")  # flat points on Z-mapped mains: their attribute
        else:
            continue
        i = idx_of_key[key[ok]]
        cur = elev[i]
        elev[i] = np.where(np.isfinite(cur), cur, e[ok])


def _split_point_elevations(sn: Snapped, at: Attached, elev: np.ndarray, idx_of_key) -> None:
    """Nodes made on a main's interior (devices, hydrants, T-junctions) where nothing else
    gave an elevation: the main's Z interpolated linearly between its two ends, by distance
    along it (an export carries Z on the mains, seldom on every valve and hydrant)."""
    if "z0" not in sn.frame or not len(at.ev_line):
        return
    z0 = sn.frame["z0"].to_numpy(dtype=float)[at.ev_line]
    z1 = sn.frame["z1"].to_numpy(dtype=float)[at.ev_line]
    length = (shapely.length(sn.geoms) if sn.length_m is None else sn.length_m)[at.ev_line]
    t = np.clip(at.ev_s / np.maximum(length, 1e-12), 0.0, 1.0)
    z = z0 + (z1 - z0) * t
    for keys in (at.ev_up, at.ev_down):
        ok = keys >= 0
        i = idx_of_key[keys[ok]]
        good = i >= 0
        i, zi = i[good], z[ok][good]
        elev[i] = np.where(np.isfinite(elev[i]), elev[i], zi)


def unique_ids(ids: np.ndarray) -> np.ndarray:
    """Ids made unique with a '#k' suffix on repeats (repeats across layers)."""
    return unique_ids_checked(ids)[0]


def unique_ids_checked(ids: np.ndarray) -> tuple[np.ndarray, bool]:
    """:func:`unique_ids`, and whether the ids were distinct as text already (the one case
    where the answer is shown distinct: a suffixed id could still equal another id)."""
    import pandas as pd

    ids = np.asarray(ids)
    text = as_text(ids)
    if all_distinct(text):  # the usual case: one hash pass
        return ids.astype(object), True
    s = pd.Series(text, dtype=object)
    k = s.groupby(s, sort=False).cumcount().to_numpy()
    if (k > 0).any():
        out = text  # a copy of the ids (a Series' array is read-only under copy-on-write)
        out[k > 0] = [f"{a}#{b + 1}" for a, b in zip(out[k > 0], k[k > 0])]
        return out, False
    return ids.astype(object), False
