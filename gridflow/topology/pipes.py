"""Stage 1 of the topology: the mains as mapped, made usable.

Abandoned mains are left out, multi-part lines exploded (``<id>.1``, ``<id>.2`` ...), and
diameters and roughness checked:

- A pipe whose diameter is missing, zero or above 120 in is left out with an error finding,
  unless ``layers.pipes.default_diameter`` is set (then the default with a warning). A guessed
  diameter would give plausible-looking but unfounded pressures and fire flows; leaving the
  pipe out never overstates capacity, and the resulting disconnection is itself reported.
- A diameter below 2 in is kept with a warning; when the layer's median diameter lies outside
  2-120 in, the diameter unit is wrong (inches read as millimetres ...): InputError.
- No usable pipe left at all: TopologyError.
- Hazen-Williams C outside 40-160 is kept, with a warning.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import shapely

from gridflow.config.layers import unit_factor
from gridflow.errors import InputError, TopologyError
from gridflow.topology.idtext import suffixed
from gridflow.topology.lines import flat
from gridflow.topology.records import Context, Pipes
from gridflow.units import INCH

__all__ = ["prepare_pipes", "z_factor", "MAX_DIAMETER_M", "MIN_DIAMETER_M", "C_RANGE", "INCH_M"]

INCH_M = INCH  # one inch [m]
MAX_DIAMETER_M = 120 * INCH  # above this a diameter is taken as a unit error
MIN_DIAMETER_M = 2 * INCH  # below this a main's diameter is implausible (common practice)
C_RANGE = (40.0, 160.0)  # plausible Hazen-Williams C (common practice)
_EPS = 1e-3  # [m] positions closer than this along a line are the same place


def prepare_pipes(ctx: Context) -> Pipes:
    """Stage 1: usable mains, multi-part lines exploded, diameters and roughness checked."""
    cfg, f = ctx.cfg, ctx.findings
    gdf = ctx.read.layers["pipes"]
    layer = ctx.layer_name("pipes")
    ids = gdf["pipe_id"].to_numpy(dtype=object)
    geoms = np.asarray(gdf.geometry.values, dtype=object)
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
    if (tid[rows] == 1).all():  # single lines only: nothing to explode
        parts, pidx = geoms[rows], np.arange(len(rows))
    else:
        parts, pidx = shapely.get_parts(geoms[rows], return_index=True)
    src = rows[pidx]
    nparts = np.bincount(pidx, minlength=len(rows))
    multi = nparts > 1
    pid = ids[src].astype(object)
    if multi.any():
        k = np.arange(len(src)) - np.concatenate([[0], np.cumsum(nparts)[:-1]])[pidx]
        m = multi[pidx]
        pid[m] = suffixed(pid[m], k[m] + 1)
        f.add_many("multipart_exploded", "info", layer, ids[rows[multi]],
                   [f"multi-part main split into {n} pipes" for n in nparts[multi]],
                   geoms[rows[multi]])
    # text columns stay Python strings (object): the later stages take them as such, and
    # pandas' own text type would convert every value there and back
    df = pd.DataFrame({"pipe_id": _objects(pid), "src": src})
    if cfg.elevation.source == "z" and shapely.has_z(parts).any():
        c3 = shapely.get_coordinates(parts, include_z=True)
        cnt = shapely.get_num_coordinates(parts)
        last = np.cumsum(cnt) - 1
        df["z0"] = c3[last - cnt + 1, 2] * z_factor(cfg)
        df["z1"] = c3[last, 2] * z_factor(cfg)
    # the parts as read (with Z, if drawn so): only the findings below take them flattened
    # one by one, and snapping makes the 2-D lines of the network from their coordinates
    df["geom"] = parts
    for col in ("diameter", "roughness", "length", "pressure_rating", "minor_loss_k",
                "install_year"):
        df[col] = gdf[col].to_numpy(dtype=float)[src] if col in gdf else np.nan
    for col in ("material", "status", "zone"):
        df[col] = _objects(gdf[col].to_numpy(dtype=object)[src]) if col in gdf else None
    lev = gdf["level"].to_numpy(dtype=object)[src] if "level" in gdf else np.full(len(src), None)
    df["level"] = _objects(np.where(pd.isna(lev), "0", lev).astype(str).astype(object))
    df = _check_diameter(ctx, df, layer)
    df = _roughness(ctx, df, layer)
    glen = shapely.length(df["geom"].to_numpy())
    zero = glen <= 0
    f.add_many("zero_length_dropped", "warning", layer, df["pipe_id"].to_numpy()[zero],
               "drawn with a length of 0 m in the GIS (its vertices are one point); dropped",
               flat(df["geom"].to_numpy()[zero]))
    df = df[~zero].reset_index(drop=True)
    glen = glen[~zero]
    if len(df) == 0:
        ab = (gdf["status"] == "abandoned").to_numpy() if "status" in gdf else empty & False
        _no_pipes_left(ctx, ids, {"abandoned": ab, "without geometry": empty & ~ab,
                                  "not lines": notline & ~ab})
    return Pipes(frame=df, layer=layer, drawn_length_m=glen)

def _objects(values: np.ndarray) -> pd.Series:
    """A column of Python objects as they are (no inference of pandas' text type)."""
    return pd.Series(np.asarray(values, dtype=object), dtype=object, copy=False)


def _no_pipes_left(ctx: Context, ids: np.ndarray, masks: dict) -> None:
    """Stop: every main was left out; say why, by reason, with an example id each."""
    info = ctx.read.infos["pipes"]
    reasons = [f"{int(m.sum())} {what} (e.g. {ids[m][0]})" for what, m in masks.items()
               if m.any()]
    rest = len(ids) - int(np.logical_or.reduce(list(masks.values())).sum())
    if rest:
        reasons.append(f"{rest} with an unusable diameter or of zero length")
    raise TopologyError(
        f"{info.file}: layer {info.layer!r}: no pipes left to build a network from; of "
        f"{len(ids)} features: {'; '.join(reasons)} (gridflow check lists each one)",
        file=str(info.file), layer=info.layer)

def _check_diameter(ctx: Context, df: pd.DataFrame, layer: str) -> pd.DataFrame:
    f = ctx.findings
    d = df["diameter"].to_numpy(dtype=float)
    _check_diameter_unit(ctx, d)
    small = np.isfinite(d) & (d > 0) & (d < MIN_DIAMETER_M)
    f.add_many("diameter_implausible", "warning", layer, df["pipe_id"].to_numpy()[small],
               [f"diameter {x / INCH:.3g} in is below {MIN_DIAMETER_M / INCH:g} in, "
                "implausible for a main; kept (check the value and "
                "layers.pipes.units.diameter)" for x in d[small]],
               flat(df["geom"].to_numpy()[small]))
    missing = ~np.isfinite(d) | (d <= 0)
    big = np.isfinite(d) & (d > MAX_DIAMETER_M)
    bad = missing | big
    if not bad.any():
        return df
    default = ctx.cfg.layers.pipes.default_diameter
    ids = df["pipe_id"].to_numpy()
    geoms = df["geom"].to_numpy()
    what = np.where(big, [f"diameter {x / INCH:.6g} in is above 120 in" for x in
                          np.where(big, d, 0)], np.where(np.isfinite(d), "diameter is zero",
                                                         "diameter is missing"))
    if default is None:
        f.add_many("diameter_missing", "error", layer, ids[bad],
                   [f"{w}: pipe left out (set layers.pipes.default_diameter to use a "
                    "default instead)" for w in what[bad]], flat(geoms[bad]))
        return df[~bad].reset_index(drop=True)
    f.add_many("diameter_missing", "warning", layer, ids[bad],
               [f"{w}: default {default / INCH:.4g} in used" for w in what[bad]],
               flat(geoms[bad]))
    df = df.copy(deep=False)  # copy on write: only the column changed is copied
    df.loc[bad, "diameter"] = default
    return df

def _check_diameter_unit(ctx: Context, d: np.ndarray) -> None:
    """Stop when the layer's typical diameter shows a unit mistake (inches read as mm...).

    One implausible value is a finding; a median outside the range of water mains means
    every diameter is off by the same factor, and every result with it.
    """
    ok = d[np.isfinite(d) & (d > 0)]
    if len(ok) == 0:
        return
    med = float(np.median(ok))
    if MIN_DIAMETER_M <= med <= MAX_DIAMETER_M:
        return
    sec = ctx.cfg.layers.pipes
    info = ctx.read.infos["pipes"]
    fname = sec.fields.get("diameter")
    unit = sec.units.get("diameter")
    raise InputError(
        f"{info.file}: layer {info.layer!r}, field {fname!r}: the median diameter is "
        f"{med * 1000:.4g} mm ({med / INCH:.4g} in), outside the {MIN_DIAMETER_M / INCH:g}"
        f"-{MAX_DIAMETER_M / INCH:g} in of water mains; check "
        f"layers.pipes.units.diameter (now {unit!r})", file=str(info.file),
        layer=info.layer, field=fname, key="layers.pipes.units.diameter")

def _roughness(ctx: Context, df: pd.DataFrame, layer: str) -> pd.DataFrame:
    cfg, f = ctx.cfg, ctx.findings
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
                       flat(df["geom"].to_numpy()[miss]))
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
                    for x in r[bad]], flat(df["geom"].to_numpy()[bad]))
    df = df.copy(deep=False)  # copy on write: the other columns are shared, not copied
    df["roughness"] = r
    return df


def z_factor(cfg) -> float:
    """Factor from the Z values' unit to metres."""
    return unit_factor("nodes", "elevation", cfg.elevation.unit)
