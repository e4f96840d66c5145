"""Point features read for a role, made usable: abandoned ones and ones without geometry left
out, lines or polygons where a point belongs replaced by their first vertex (each a finding)."""

from __future__ import annotations

import numpy as np
import shapely

from gridflow.topology.records import Context, PointLayer

__all__ = ["point_layer", "column", "text_in", "arrow_text"]

_GEOM_NAMES = ("point", "line", "ring", "polygon", "multi-point", "multi-line", "multi-polygon",
               "geometry collection")


def column(frame, name: str, dtype=float) -> np.ndarray:
    """A mapped column of a role frame; NaN (numbers) or None (text) where not mapped."""
    if frame is not None and name in frame:
        return frame[name].to_numpy(dtype=dtype)
    n = 0 if frame is None else len(frame)
    return np.full(n, np.nan) if dtype is float else np.full(n, None, dtype=object)


def text_in(frame, name: str, words) -> np.ndarray:
    """``np.isin(column(frame, name, object).astype(str), words)``: True where the column's
    text is one of ``words``; a column Arrow holds is compared there (no str per row)."""
    if (frame is None or name not in frame) and "None" not in words:
        return np.zeros(0 if frame is None else len(frame), bool)  # unmapped: every "None"
    arr = _arrow_strings(frame[name]) if frame is not None and name in frame else None
    if arr is None or "None" in words:  # None's text is "None": the general way
        return np.isin(column(frame, name, object).astype(str), list(words))
    import pyarrow as pa
    import pyarrow.compute as pc

    hit = pc.is_in(arr, value_set=pa.array(list(words), type=arr.type))
    return pc.fill_null(hit, False).to_numpy(zero_copy_only=False).astype(bool, copy=False)


def arrow_text(series):
    """A text column as one Arrow ``large_string`` array (the same strings as
    ``series.to_numpy(dtype=object)``): Arrow's own where it holds them without gaps, else
    made from the Python strings; None when a value is not a str."""
    import pyarrow as pa

    arr = _arrow_strings(series)
    if arr is not None and arr.null_count == 0:
        return arr
    vals = series.to_numpy(dtype=object)
    if not set(map(type, vals.tolist())) <= {str}:
        return None
    return pa.array(vals, type=pa.large_string())


def _arrow_strings(series):
    """The Arrow text array behind a pandas column (``large_string``), or None."""
    import pyarrow as pa

    arr = getattr(series.array, "_pa_array", None)
    if arr is None or not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        return None
    arr = arr.combine_chunks() if isinstance(arr, pa.ChunkedArray) else arr
    return arr.cast(pa.large_string())


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
    if bad.any():
        f.add_many("no_geometry", "error", layer, fr[idc].to_numpy()[bad],
                   f"{role[:-1]} without geometry left out")
    keep = ~bad
    if "status" in fr:
        ab = (fr["status"] == "abandoned").to_numpy() & keep
        if ab.any():
            f.add_many("abandoned_left_out", "info", layer, fr[idc].to_numpy()[ab],
                       f"abandoned {role[:-1]} left out", g[ab])
        keep &= ~ab
    # every feature kept (the usual case): the frame as read, not a copy of it
    fr = (fr if keep.all() else fr[keep]).reset_index(drop=True)
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
