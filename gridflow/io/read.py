"""Reading the utility's GIS through the config.

Every mapped layer is inspected first (layers, fields, CRS: :func:`inspect_inputs`, cheap), so
a missing layer or field stops the run before anything heavy is read. Then each layer is read
in bulk with pyogrio and Arrow (:func:`read_inputs`), its fields renamed to gridflow's roles,
numbers converted to SI with the configured units, coded values mapped, and its geometry
reprojected to one projected working CRS.

Input files are opened read-only (pyogrio never opens a data source for update when reading),
and GeoPackages are held under a SQLite read lock while they are read (:func:`shared_locks`), so
an editor's save cannot land half-way through a read.

Size: about 500 lines on purpose: inspection, the choice of working CRS and the bulk read are
one pass over the same layers and schemas; what stands alone is in ``codes.py`` (coded values),
``validate.py`` (value ranges), ``dem.py`` and ``paths.py``.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from gridflow.config.database import is_database
from gridflow.config.layers import (
    BEARING_UNITS,
    NUMERIC_FIELDS,
    ROLES,
    layer_sections,
    section_key,
    unit_factor,
)
from gridflow.errors import ConfigError, InputError
from gridflow.findings import Findings
from gridflow.io.codes import coded_text_parts
from gridflow.io.layerinfo import LayerInfo
from gridflow.io.paths import require_regular_file
from gridflow.memory import gc_paused

__all__ = ["LayerInfo", "ReadResult", "ID_COLUMN", "LAYER_COLUMN", "inspect_inputs",
           "working_crs", "read_inputs", "shared_locks"]

#: how far [degrees] a feature may stray outside its CRS's area of use before it is taken as
#: misplaced (a slipped decimal, a wrong CRS) and left out
CRS_AREA_MARGIN_DEG = 2.0

#: the id column of each role's frame after reading
ID_COLUMN = {"pipes": "pipe_id", "nodes": "node_id", "hydrants": "hydrant_id",
             "valves": "valve_id", "tanks": "tank_id", "pumps": "pump_id",
             "sources": "source_id", "meters": "meter_id"}
#: the column naming each feature's own layer (a role may be read from several layers)
LAYER_COLUMN = "source_layer"


@dataclass
class ReadResult:
    """The mapped layers in the working CRS, keyed by role (only roles in the config)."""

    layers: dict = field(default_factory=dict)  # role -> GeoDataFrame (all its layers)
    infos: dict = field(default_factory=dict)  # role -> LayerInfo of its first layer
    all_infos: dict = field(default_factory=dict)  # role -> tuple of LayerInfo, one per layer
    crs: object = None  # pyproj.CRS
    files: list = field(default_factory=list)  # input paths, for hashing and output checks


def _pyogrio():
    import pyogrio

    return pyogrio


def inspect_inputs(cfg) -> dict[str, LayerInfo]:
    """Check every mapped layer and field exists and has a CRS, without reading features.

    Returns the first layer of each role; :func:`inspect_layers` returns all of them.

    Raises
    ------
    InputError
        Naming file, layer and field: a missing file, layer or field, or a layer with no CRS.
    """
    return {role: infos[0] for role, infos in inspect_layers(cfg).items()}


def inspect_layers(cfg) -> dict[str, tuple[LayerInfo, ...]]:
    """:func:`inspect_inputs` for every layer of every role (a role may list several)."""
    out: dict[str, tuple[LayerInfo, ...]] = {}
    for role in ROLES:
        secs = layer_sections(cfg.layers, role)
        if secs:
            out[role] = tuple(_inspect_one(cfg, role, sec, i) for i, sec in enumerate(secs))
    return out


def _inspect_one(cfg, role: str, sec, i: int) -> LayerInfo:
    where = section_key(cfg.layers, role, i)
    if is_database(cfg.inputs[sec.input]):
        import dataclasses

        from gridflow.io import postgis

        return dataclasses.replace(postgis.inspect_layer(cfg, role, sec), key=where, index=i)
    pyogrio = _pyogrio()
    path = cfg.resolve(cfg.inputs[sec.input])
    require_regular_file(path, "input file", key=f"inputs.{sec.input}")
    try:
        names = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:
        raise InputError(f"cannot open input file {path}: {exc}", file=str(path)) from None
    if sec.layer not in names:
        raise InputError(f"{path}: layer {sec.layer!r} ({where}.layer) not found; the "
                         f"file has: {', '.join(names)}", file=str(path), layer=sec.layer)
    info = pyogrio.read_info(path, layer=sec.layer, force_total_bounds=(role == "pipes"))
    fields = tuple(str(f) for f in info["fields"])
    wanted = [("id", sec.id)] + list(sec.fields.items())
    for role_name, fname in wanted:
        if fname not in fields:
            key = "id" if role_name == "id" else f"fields.{role_name}"
            raise InputError(
                f"{path}: layer {sec.layer!r} has no field {fname!r} ({where}.{key}); "
                f"its fields are: {', '.join(fields)}", file=str(path), layer=sec.layer,
                field=fname)
    geom = info.get("geometry_type")
    if geom is None or str(geom).lower() in ("none", ""):
        raise InputError(f"{path}: layer {sec.layer!r} has no geometry; {role} need "
                         "geometry", file=str(path), layer=sec.layer)
    crs = info.get("crs")
    if not crs:
        raise InputError(f"{path}: layer {sec.layer!r} has no coordinate reference system; "
                         "assign one in the GIS (e.g. EPSG:26916) and export again",
                         file=str(path), layer=sec.layer)
    _usable_crs(crs, path, sec.layer)
    bounds = info.get("total_bounds")
    return LayerInfo(role, path, sec.layer, crs, fields, str(geom),
                     int(info.get("features", -1)),
                     None if bounds is None else _bounds4(bounds), key=where, index=i)


def _usable_crs(crs: str, path: Path, layer: str) -> None:
    """Stop on a CRS PROJ cannot build (a GeoPackage's srs_id 0 or -1, "undefined")."""
    from pyproj import CRS

    try:
        ok = "undefined" not in CRS.from_user_input(crs).name.lower()
    except Exception:
        ok = False
    if not ok:
        raise InputError(f"{path}: layer {layer!r} has an undefined or unknown coordinate "
                         f"reference system ({crs}; a GeoPackage srs_id of 0 or -1 means "
                         "undefined); assign one in the GIS (e.g. EPSG:26916) and export again",
                         file=str(path), layer=layer)


def working_crs(cfg, infos: dict[str, LayerInfo], findings: Findings):
    """The one projected CRS everything is worked in.

    ``[run] crs`` if given (must be projected); else the pipes' CRS when projected; else the
    UTM zone around the pipes' centre (an info finding says so).
    """
    from pyproj import CRS

    if cfg.run.crs:
        try:
            crs = CRS.from_user_input(cfg.run.crs)
        except Exception as exc:
            raise ConfigError(f"config key run.crs: cannot read {cfg.run.crs!r} as a CRS ({exc})",
                              key="run.crs") from None
        if not crs.is_projected:
            raise ConfigError(f"config key run.crs: {cfg.run.crs!r} is not a projected CRS; "
                              "distances need metres or feet, e.g. a UTM or state plane CRS",
                              key="run.crs")
        return crs
    pipes = infos["pipes"]
    crs = CRS.from_user_input(pipes.crs)
    if crs.is_projected:
        return crs
    b = pipes.total_bounds
    if b is None or not np.all(np.isfinite(b)):
        raise InputError(f"{pipes.file}: layer {pipes.layer!r} is in a geographic CRS and its "
                         "extent is unknown; set [run] crs to a projected CRS",
                         file=str(pipes.file), layer=pipes.layer)
    lonlat = CRS.from_epsg(4326)
    if not crs.equals(lonlat):
        from pyproj import Transformer

        t = Transformer.from_crs(crs, lonlat, always_xy=True)
        x0, y0 = t.transform(b[0], b[1])
        x1, y1 = t.transform(b[2], b[3])
        b = (min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1))
    if not (-180.0 <= b[0] <= b[2] <= 180.0 and -90.0 <= b[1] <= b[3] <= 90.0):
        raise InputError(f"{pipes.file}: layer {pipes.layer!r} is in the geographic CRS "
                         f"{crs.name} but its extent {tuple(round(v, 3) for v in b)} is not "
                         "longitude and latitude; assign the layer's real CRS in the GIS",
                         file=str(pipes.file), layer=pipes.layer)
    centre = ((b[0] + b[2]) / 2, (b[1] + b[3]) / 2)
    zone = int((centre[0] + 180) // 6) + 1
    code = (32600 if centre[1] >= 0 else 32700) + zone
    out = CRS.from_epsg(code)
    findings.add("crs_chosen", "info", pipes.layer, "",
                 f"layer {pipes.layer!r} is in the geographic CRS {crs.name}; working in "
                 f"{out.name} (EPSG:{code}); set [run] crs to choose another")
    return out


def read_inputs(cfg, findings: Findings) -> ReadResult:
    """Inspect, then read every mapped layer into the working CRS with role-named fields.

    Each frame has the role's id column (:data:`ID_COLUMN`, text), one column per mapped field
    under its role name (numbers in SI: metres, m3/s, metres of head; ``consumption`` raw;
    coded values mapped), and ``geometry``.

    Raises
    ------
    InputError
        Missing layer or field, no CRS, or text where a number belongs (naming file, layer,
        feature id and field).
    """
    from gridflow.io.postgis import snapshots

    paths = sorted({cfg.resolve(cfg.inputs[sec.input]) for r in ROLES
                    for sec in layer_sections(cfg.layers, r)
                    if not is_database(cfg.inputs[sec.input])})
    with shared_locks(paths), snapshots(cfg), gc_paused():  # see gridflow.memory
        all_infos = inspect_layers(cfg)
        infos = {role: v[0] for role, v in all_infos.items()}
        crs = working_crs(cfg, infos, findings)
        out = ReadResult(infos=infos, all_infos=all_infos, crs=crs)
        out.files = sorted({i.file.resolve() for v in all_infos.values() for i in v
                            if isinstance(i.file, Path)})
        for role, role_infos in all_infos.items():
            secs = layer_sections(cfg.layers, role)
            frames = [_read_role(cfg, role, sec, info, crs, findings)
                      for sec, info in zip(secs, role_infos)]
            out.layers[role] = _join_layers(role, frames, role_infos)
    return out


def _join_layers(role: str, frames: list, infos):
    """One frame per role; an id held in two of its layers is an error naming both."""
    if len(frames) == 1:
        return frames[0]
    import geopandas as gpd

    idc = ID_COLUMN[role]
    seen: dict[str, int] = {}
    for k, fr in enumerate(frames):
        for fid in fr[idc].tolist():
            j = seen.setdefault(fid, k)
            if j != k:
                a, b = infos[j], infos[k]
                raise InputError(
                    f"{b.file}: {role[:-1]} id {fid!r} is in layer {a.layer!r} ({a.key}) and "
                    f"in layer {b.layer!r} ({b.key}); ids must be unique within {role} across "
                    "their layers", file=str(b.file), layer=b.layer, feature_id=str(fid),
                    field=None)
    return gpd.GeoDataFrame(pd.concat(frames, ignore_index=True), geometry="geometry",
                            crs=frames[0].crs)


#: how long [s] to wait for another program's write to a GeoPackage input to finish
LOCK_WAIT_S = 30.0


@contextlib.contextmanager
def shared_locks(paths, *, wait_s: float | None = None):
    """Hold a read lock on every GeoPackage input while its layers are read.

    GDAL reads a GeoPackage without taking SQLite's locks, so a GIS editor saving during the
    read could hand it half-written pages. A read-only SQLite connection with an open read
    transaction keeps writers from committing until the read is done; a writer already in the
    middle of a commit is waited for up to ``wait_s`` seconds (default :data:`LOCK_WAIT_S`).
    Files that are not SQLite databases are left to the reader to reject.

    Raises
    ------
    InputError
        Naming the file, when another program still holds it locked after the wait.
    """
    import sqlite3

    wait = LOCK_WAIT_S if wait_s is None else wait_s
    held = []
    try:
        for path in paths:
            path = Path(path)
            if not path.is_file():
                continue  # the inspection names it
            try:
                con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                                      timeout=wait, isolation_level=None)
            except sqlite3.Error:
                continue
            try:
                con.execute("BEGIN")
                con.execute("SELECT count(*) FROM sqlite_master").fetchall()
            except sqlite3.OperationalError as exc:
                con.close()
                if "locked" in str(exc) or "busy" in str(exc):
                    raise InputError(f"{path}: the GeoPackage is locked by another program "
                                     f"writing to it (waited {wait:g} s); run again when the "
                                     "edit is saved", file=str(path)) from None
                continue
            except sqlite3.DatabaseError:  # not a database: the reader says so
                con.close()
                continue
            held.append(con)
        yield
    finally:
        for con in held:
            try:
                con.execute("ROLLBACK")
            except Exception:
                pass
            con.close()


def _read_frame(info: LayerInfo, columns: list, where: str | None, findings: Findings,
                id_field: str):
    """Read a layer through Arrow; curved geometries (which the Arrow path hands over as
    curves, unreadable by shapely) are read again through GDAL's own path, which approximates
    them by straight segments, and each curved feature gets a finding."""
    pyogrio = _pyogrio()
    try:
        return pyogrio.read_dataframe(info.file, layer=info.layer, columns=columns, where=where,
                                      use_arrow=True)
    except NotImplementedError:  # "Nonlinear geometry types are not currently supported"
        pass
    gdf = pyogrio.read_dataframe(info.file, layer=info.layer, columns=columns, where=where,
                                 use_arrow=False)
    meta, table = pyogrio.raw.read_arrow(info.file, layer=info.layer, columns=[id_field],
                                         where=where)
    wkb = table.column(meta.get("geometry_name") or "wkb_geometry").to_pylist()
    curved = np.array([_wkb_is_curve(b) for b in wkb], dtype=bool)  # the rare fallback only
    if curved.any():
        ids = gdf[id_field].astype(str).to_numpy()[curved]
        findings.add_many("curve_linearized", "warning", info.layer, ids,
                          "curved geometry approximated by straight segments (GDAL's default "
                          "step); lengths follow the approximation unless a length is mapped")
    return gdf


def _wkb_is_curve(b) -> bool:
    """True for ISO WKB of CircularString, CompoundCurve, CurvePolygon, MultiCurve ..."""
    if not b or len(b) < 5:
        return False
    code = int.from_bytes(bytes(b[1:5]), "little" if b[0] == 1 else "big")
    return (code & 0x0FFFFFFF) % 1000 in (8, 9, 10, 11, 12, 13, 14, 15, 16, 17)


def _outside_crs_area(geoms: np.ndarray, crs) -> np.ndarray:
    """True where a feature lies far outside its CRS's area of use (or has non-finite
    coordinates): a slipped decimal point or a layer tagged with the wrong CRS.

    The area of use (longitude/latitude bounds) is widened by :data:`CRS_AREA_MARGIN_DEG` on
    every side; features are compared by their bounding box corners.
    """
    import shapely

    n = len(geoms)
    bad = np.zeros(n, bool)
    present = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    if not present.any():
        return bad
    b = shapely.bounds(geoms[present])
    finite = np.isfinite(b).all(axis=1)
    area = getattr(crs, "area_of_use", None)
    if area is None:
        out = ~finite
    elif finite.all() and _box_well_inside(b, crs, area):
        out = np.zeros(len(b), bool)
    else:
        # the corners of each box; a point's (or a flat box's) repeated corners once only
        wide, tall = b[:, 2] != b[:, 0], b[:, 3] != b[:, 1]
        both = wide | tall
        xs = np.r_[b[:, 0], b[wide, 2], b[tall, 0], b[both, 2]]
        ys = np.r_[b[:, 1], b[wide, 1], b[tall, 3], b[both, 3]]
        if crs.is_geographic:
            lon, lat = xs, ys  # GeoPackage stores longitude first
        else:
            from pyproj import CRS, Transformer

            t = Transformer.from_crs(crs, CRS.from_epsg(4326), always_xy=True)
            with np.errstate(all="ignore"):
                lon, lat = t.transform(np.where(np.isfinite(xs), xs, 0.0),
                                       np.where(np.isfinite(ys), ys, 0.0), errcheck=False)
        m = CRS_AREA_MARGIN_DEG
        w, s_, e, nth = area.west - m, area.south - m, area.east + m, area.north + m
        lon, lat = np.asarray(lon, float), np.asarray(lat, float)
        if area.west > area.east:  # area across the antimeridian
            lon = np.where(lon < area.west - m, lon + 360.0, lon)
            e = area.east + 360.0 + m
        inside = np.isfinite(lon) & np.isfinite(lat) & (lon >= w) & (lon <= e) & \
            (lat >= max(s_, -90.0)) & (lat <= min(nth, 90.0))
        m_ = len(b)
        ok = inside[:m_].copy()
        at = m_
        for sel in (wide, tall, both):
            k = int(sel.sum())
            ok[sel] &= inside[at:at + k]
            at += k
        out = ~finite | ~ok
    bad[np.flatnonzero(present)[out]] = True
    return bad


#: points per side of the layer's bounding box transformed by :func:`_box_well_inside`
BOX_EDGE_POINTS = 256
#: how far [degrees] inside the widened area of use that box must stay
BOX_SAFETY_DEG = 1.0


def _box_well_inside(b: np.ndarray, crs, area) -> bool:
    """True when every feature box in ``b`` (finite) surely lies inside the CRS's area of use
    widened by :data:`CRS_AREA_MARGIN_DEG`: the boundary of the layer's bounding box, traced
    by :data:`BOX_EDGE_POINTS` points a side, stays :data:`BOX_SAFETY_DEG` inside it.

    Notes
    -----
    A projected CRS maps the plane's box to a region bounded by the image of its boundary,
    and the widened area is a longitude/latitude rectangle (convex): a boundary inside it
    holds every corner of every feature inside too. The check costs a few hundred
    transformed points instead of four per feature; False (the per-feature check then runs)
    for geographic CRSs, areas across the antimeridian, and anything not clearly inside.
    """
    if crs.is_geographic or area.west > area.east:
        return False
    from pyproj import CRS, Transformer

    x0, y0 = b[:, 0].min(), b[:, 1].min()
    x1, y1 = b[:, 2].max(), b[:, 3].max()
    t = np.linspace(0.0, 1.0, BOX_EDGE_POINTS)
    xs = np.r_[x0 + (x1 - x0) * t, np.full_like(t, x1), x1 - (x1 - x0) * t, np.full_like(t, x0)]
    ys = np.r_[np.full_like(t, y0), y0 + (y1 - y0) * t, np.full_like(t, y1), y1 - (y1 - y0) * t]
    tr = Transformer.from_crs(crs, CRS.from_epsg(4326), always_xy=True)
    with np.errstate(all="ignore"):
        lon, lat = tr.transform(xs, ys, errcheck=False)
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    m = CRS_AREA_MARGIN_DEG - BOX_SAFETY_DEG
    south, north = max(area.south - m, -90.0), min(area.north + m, 90.0)
    return bool(np.all(np.isfinite(lon) & np.isfinite(lat))
                and np.all((lon >= area.west - m) & (lon <= area.east + m))
                and np.all((lat >= south) & (lat <= north)))


def _read_role(cfg, role: str, sec, info: LayerInfo, crs, findings: Findings):
    import geopandas as gpd

    columns = list(dict.fromkeys([sec.id, *sec.fields.values()]))
    try:
        if is_database(cfg.inputs[sec.input]):
            from gridflow.io import postgis

            gdf = postgis.read_frame(cfg, role, info, columns, sec.where or None, sec=sec)
        else:
            gdf = _read_frame(info, columns, sec.where or None, findings, sec.id)
    except InputError:
        raise
    except Exception as exc:
        key = f"{info.key}.where" if sec.where else info.key
        raise InputError(f"{info.file}: cannot read layer {info.layer!r} ({key}): {exc}",
                         file=str(info.file), layer=info.layer) from None
    if len(gdf) == 0:
        what = (f"no features match {info.key}.where = {sec.where!r}" if sec.where
                else "no features")
        if role == "pipes":
            raise InputError(f"{info.file}: layer {info.layer!r} ({info.key}.layer) has "
                             f"{what}; there is no network to build", file=str(info.file),
                             layer=info.layer)
        findings.add("empty_layer", "warning", info.layer, "",
                     f"layer {info.layer!r} ({info.key}.layer) has {what}")
    ids, id_column = _id_texts(gdf[sec.id], role, info, findings)
    data = {ID_COLUMN[role]: ids}
    # the frame's text columns made from Arrow where it holds them (see _arrow_text)
    text_cols: dict = {ID_COLUMN[role]: id_column}
    for role_name, fname in sec.fields.items():
        col = gdf[fname]
        if role_name == "direction" and sec.units.get("direction", "").lower() in BEARING_UNITS:
            data["direction_deg"] = _numbers(col, ids, info, fname) % 360.0
        elif role_name in NUMERIC_FIELDS[role]:
            factor = unit_factor(role, role_name, sec.units.get(role_name))
            vals = _numbers(col, ids, info, fname)
            if role_name == "roughness" and role_name in sec.units:
                factor = unit_factor("pipes", "length", sec.units["roughness"])
            if (role, role_name) == ("valves", "setting"):
                factor = 1.0  # PRV settings are pressures, throttle settings K: below
            data[role_name] = vals * factor
        else:
            data[role_name], texts, code = coded_text_parts(
                col, role, role_name, sec.codes.get(role_name), ids, info, findings, fname)
            text_cols[role_name] = _text_column(texts, code)
    if role == "valves" and "setting" in data and "type" in data:
        prv = np.asarray(data["type"], dtype=object) == "prv"
        fac = unit_factor("valves", "setting", sec.units.get("setting"),
                          f"{info.key}.units.setting") if prv.any() else 1.0
        data["setting"] = np.where(prv, data["setting"] * fac, data["setting"])
    from gridflow.io.validate import check_layer

    geoms = np.asarray(gdf.geometry.values, dtype=object)
    keep = ~check_layer(cfg, role, sec, info, data, ids, geoms, findings)
    data[LAYER_COLUMN] = _repeated(info.layer, len(ids))
    text_cols[LAYER_COLUMN] = _text_column(np.array([info.layer], dtype=object),
                                         np.zeros(len(ids), np.int64))
    frame = gpd.GeoDataFrame({k: v if text_cols.get(k) is None else text_cols[k]
                              for k, v in data.items()}, geometry=gdf.geometry.values,
                             crs=gdf.crs)
    if not keep.all():
        frame = frame[keep].reset_index(drop=True)
        ids = ids[keep]
    if frame.crs is None:  # inspected already; a layer can still lose it through a view
        raise InputError(f"{info.file}: layer {info.layer!r} has no coordinate reference system",
                         file=str(info.file), layer=info.layer)
    far = _outside_crs_area(np.asarray(frame.geometry.values, dtype=object), frame.crs)
    if far.any():
        findings.add_many("outside_crs_area", "error", info.layer, ids[far],
                          f"coordinates far outside the area of {frame.crs.name} (a slipped "
                          f"decimal or a layer in another CRS); {role[:-1]} left out")
        frame = frame[~far].reset_index(drop=True)
    if not frame.crs.equals(crs):
        frame = frame.to_crs(crs)
    return frame


def _repeated(value, n: int) -> np.ndarray:
    """An object array of ``n`` references to ``value`` (``np.full(n, "text", dtype=object)``
    makes a new str per element, through a fixed-width text array)."""
    out = np.empty(n, dtype=object)
    out.fill(value)
    return out


def _ids(col: pd.Series, role: str, info: LayerInfo, findings: Findings) -> np.ndarray:
    """Feature ids as text; missing ids get ``<layer>:<row>``, repeated ids a ``#k`` suffix."""
    return _id_texts(col, role, info, findings)[0]


def _id_texts(col: pd.Series, role: str, info: LayerInfo, findings: Findings):
    """:func:`_ids`, and the ids as the frame's text column when Arrow holds them as they
    are (text as read, none missing or repeated; else None)."""
    column = None
    if col.dtype.kind == "f":
        vals = col.to_numpy()
        finite = np.isfinite(vals)
        whole = finite & (np.floor(np.where(finite, vals, 0)) == np.where(finite, vals, 0))
        txt = np.where(whole, np.where(finite, vals, 0).astype(np.int64).astype(str),
                       vals.astype(str)).astype(object)
        missing = ~finite
    else:
        missing = pd.isna(col).to_numpy().copy()
        if isinstance(col.dtype, pd.StringDtype):  # text as read through Arrow: trimmed there
            stripped = col.str.strip()
            txt = stripped.to_numpy(dtype=object, na_value="")
            column = _arrow_text(stripped.array)
        elif col.dtype.kind in "iu":
            txt = col.to_numpy().astype(str).astype(object)
        else:
            txt = np.array([str(t).strip() for t in col.to_numpy(dtype=object)], dtype=object)
        missing |= txt == ""
    if missing.any():
        rows = np.flatnonzero(missing)
        txt[rows] = [f"{info.layer}:{r}" for r in rows]
        findings.add_many("missing_id", "warning", info.layer, txt[rows],
                          f"feature without {role[:-1]} id; named by its row")
        column = None
    if len(set(txt.tolist())) == len(txt):  # the usual case: one hash pass, no repeats
        return txt, column
    s = pd.Series(txt)
    k = s.groupby(s, sort=False).cumcount().to_numpy()
    if (k > 0).any():
        rows = np.flatnonzero(k > 0)
        findings.add_many("duplicate_id", "warning", info.layer, txt[rows],
                          [f"id {t!r} is used more than once; this copy renamed "
                           f"{t}#{kk + 1}" for t, kk in zip(txt[rows], k[rows])])
        txt[rows] = [f"{t}#{kk + 1}" for t, kk in zip(txt[rows], k[rows])]
    return txt, None


def _arrow_text(values):
    """Arrow-held text as the column pandas makes of the same Python strings (its text type
    on ``large_string``), or None when that is not what pandas would make (no value at all,
    an empty column) or Arrow does not hold it."""
    import pyarrow as pa

    arr = getattr(values, "_pa_array", None)
    if arr is None or len(arr) == 0 or arr.null_count == len(arr):
        return None
    if not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        return None
    arr = arr.cast(pa.large_string())
    return pd.array(arr, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def _text_column(texts: np.ndarray, code: np.ndarray):
    """``texts[code]`` (None where ``code < 0``) as the column pandas makes of such Python
    strings, by Arrow's take (a few distinct texts over many rows); None when pandas would
    make something else of them (no text at all, or not every value a str)."""
    import pyarrow as pa

    code = np.asarray(code, dtype=np.int64)
    valid = code >= 0
    vals = np.asarray(texts, dtype=object).tolist()
    if not valid.any() or not set(map(type, vals)) <= {str, type(None)}:
        return None
    arr = pa.array(vals, type=pa.large_string()).take(pa.array(code, mask=~valid))
    if arr.null_count == len(arr):
        return None
    return pd.array(arr, dtype=pd.StringDtype("pyarrow", na_value=np.nan))


def _numbers(col: pd.Series, ids: np.ndarray, info: LayerInfo, fname: str) -> np.ndarray:
    if col.dtype.kind in "fiub":
        return col.to_numpy(dtype=float, na_value=np.nan)
    raw = col.astype(object)
    blank = raw.isna() | raw.map(lambda v: isinstance(v, str) and v.strip() == "")
    nums = pd.to_numeric(raw.where(~blank, None), errors="coerce").to_numpy(dtype=float)
    bad = np.isnan(nums) & ~blank.to_numpy()
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"{info.file}: layer {info.layer!r}, feature {ids[k]}: field {fname!r} "
                         f"holds {raw.iloc[k]!r} where a number belongs", file=str(info.file),
                         layer=info.layer, feature_id=str(ids[k]), field=fname)
    return nums


def _bounds4(b) -> tuple[float, float, float, float]:
    return float(b[0]), float(b[1]), float(b[2]), float(b[3])
