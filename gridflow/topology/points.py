"""Point features read for a role, made usable: abandoned ones and ones without geometry left
out, lines or polygons where a point belongs replaced by their first vertex (each a finding)."""

from __future__ import annotations

import numpy as np
import shapely

from gridflow.topology.records import Context, PointLayer

__all__ = ["point_layer", "column"]

_GEOM_NAMES = ("point", "line", "ring", "polygon", "multi-point", "multi-line", "multi-polygon",
               "geometry collection")


def column(frame, name: str, dtype=float) -> np.ndarray:
    """A mapped column of a role frame; NaN (numbers) or None (text) where not mapped."""
    if frame is not None and name in frame:
        return frame[name].to_numpy(dtype=dtype)
    n = 0 if frame is None else len(frame)
    return np.full(n, np.nan) if dtype is float else np.full(n, None, dtype=object)


def point_layer(ctx: Context, role: str) -> PointLayer | None:
    """The role's usable point features, or None when the role is not mapped or empty."""
    fr = ctx.read.layers.get(role)
    if fr is None or len(fr) == 0:
        return None
    f = ctx.findings
    layer = ctx.layer_name(role)
    idc = fr.columns[0]
    g = np.asarray(fr.geometry.values, dtype=object)
    bad = shapely.is_missing(g) | shapely.is_empty(g)
    f.add_many("no_geometry", "error", layer, fr[idc].to_numpy()[bad],
               f"{role[:-1]} without geometry left out")
    keep = ~bad
    if "status" in fr:
        ab = (fr["status"] == "abandoned").to_numpy() & keep
        f.add_many("abandoned_left_out", "info", layer, fr[idc].to_numpy()[ab],
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
            f.add_many("not_a_point", "warning", layer, fr[idc].to_numpy()[notpt],
                       [f"{role[:-1]} drawn as a {t}; its first vertex used" for t in names],
                       first[notpt])
            g = np.where(notpt, first, g)
    return PointLayer(role=role, frame=fr, pts=g, layer=layer)
