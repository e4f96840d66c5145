"""Reading the utility's GIS through the config.

Every mapped layer is inspected first (layers, fields, CRS: :func:`inspect_inputs`, cheap), so
a missing layer or field stops the run before anything heavy is read. Then each layer is read
in bulk with pyogrio and Arrow (:func:`read_inputs`), its fields renamed to gridflow's roles,
numbers converted to SI with the configured units, coded values mapped, and its geometry
reprojected to one projected working CRS.

Input files are opened read-only (pyogrio never opens a data source for update when reading).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from gridflow.config.layers import CODE_TARGETS, NUMERIC_FIELDS, ROLES, unit_factor
from gridflow.errors import ConfigError, InputError
from gridflow.findings import Findings

__all__ = ["LayerInfo", "ReadResult", "ID_COLUMN", "inspect_inputs", "working_crs",
           "read_inputs", "sample_dem"]

#: the id column of each role's frame after reading
ID_COLUMN = {"pipes": "pipe_id", "nodes": "node_id", "hydrants": "hydrant_id",
             "valves": "valve_id", "tanks": "tank_id", "pumps": "pump_id",
             "sources": "source_id", "meters": "meter_id"}


@dataclass(frozen=True)
class LayerInfo:
    """What inspecting a mapped layer found (no features read)."""

    role: str
    file: Path
    layer: str
    crs: str | None
    fields: tuple[str, ...]
    geometry_type: str | None
    features: int
    total_bounds: tuple[float, float, float, float] | None = None


@dataclass
class ReadResult:
    """The mapped layers in the working CRS, keyed by role (only roles in the config)."""

    layers: dict = field(default_factory=dict)  # role -> GeoDataFrame
    infos: dict = field(default_factory=dict)  # role -> LayerInfo
    crs: object = None  # pyproj.CRS
    files: list = field(default_factory=list)  # input paths, for hashing and output checks


def _pyogrio():
    import pyogrio

    return pyogrio


def inspect_inputs(cfg) -> dict[str, LayerInfo]:
    """Check every mapped layer and field exists and has a CRS, without reading features.

    Raises
    ------
    InputError
        Naming file, layer and field: a missing file, layer or field, or a layer with no CRS.
    """
    pyogrio = _pyogrio()
    infos: dict[str, LayerInfo] = {}
    for role in ROLES:
        sec = getattr(cfg.layers, role)
        if sec is None:
            continue
        path = cfg.resolve(cfg.inputs[sec.input])
        if not path.exists():
            raise InputError(f"input file {path} (inputs.{sec.input}) does not exist",
                             file=str(path))
        try:
            names = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
        except Exception as exc:
            raise InputError(f"cannot open input file {path}: {exc}", file=str(path)) from None
        if sec.layer not in names:
            raise InputError(f"{path}: layer {sec.layer!r} (layers.{role}.layer) not found; the "
                             f"file has: {', '.join(names)}", file=str(path), layer=sec.layer)
        info = pyogrio.read_info(path, layer=sec.layer, force_total_bounds=(role == "pipes"))
        fields = tuple(str(f) for f in info["fields"])
        wanted = [("id", sec.id)] + list(sec.fields.items())
        for role_name, fname in wanted:
            if fname not in fields:
                key = "id" if role_name == "id" else f"fields.{role_name}"
                raise InputError(
                    f"{path}: layer {sec.layer!r} has no field {fname!r} (layers.{role}.{key}); "
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
        bounds = info.get("total_bounds")
        infos[role] = LayerInfo(role, path, sec.layer, crs, fields, str(geom),
                                int(info.get("features", -1)),
                                None if bounds is None else tuple(float(b) for b in bounds))
    return infos


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
    infos = inspect_inputs(cfg)
    crs = working_crs(cfg, infos, findings)
    out = ReadResult(infos=infos, crs=crs)
    out.files = sorted({info.file.resolve() for info in infos.values()})
    for role, info in infos.items():
        out.layers[role] = _read_role(cfg, role, info, crs, findings)
    return out


def _read_role(cfg, role: str, info: LayerInfo, crs, findings: Findings):
    import geopandas as gpd

    sec = getattr(cfg.layers, role)
    columns = list(dict.fromkeys([sec.id, *sec.fields.values()]))
    try:
        gdf = _pyogrio().read_dataframe(info.file, layer=info.layer, columns=columns,
                                        where=sec.where or None, use_arrow=True)
    except Exception as exc:
        key = f"layers.{role}.where" if sec.where else f"layers.{role}"
        raise InputError(f"{info.file}: cannot read layer {info.layer!r} ({key}): {exc}",
                         file=str(info.file), layer=info.layer) from None
    ids = _ids(gdf[sec.id], role, info, findings)
    data = {ID_COLUMN[role]: ids}
    for role_name, fname in sec.fields.items():
        col = gdf[fname]
        if role_name in NUMERIC_FIELDS[role]:
            factor = unit_factor(role, role_name, sec.units.get(role_name))
            vals = _numbers(col, ids, info, fname)
            if role_name == "roughness" and role_name in sec.units:
                factor = unit_factor("pipes", "length", sec.units["roughness"])
            if (role, role_name) == ("valves", "setting"):
                factor = 1.0  # PRV settings are pressures, throttle settings K: topology converts
            data[role_name] = vals * factor
        else:
            data[role_name] = _texts(col, role, role_name, sec.codes.get(role_name), ids, info,
                                     findings)
    frame = gpd.GeoDataFrame(data, geometry=gdf.geometry.values, crs=gdf.crs)
    if frame.crs is None:  # inspected already; a layer can still lose it through a view
        raise InputError(f"{info.file}: layer {info.layer!r} has no coordinate reference system",
                         file=str(info.file), layer=info.layer)
    if not frame.crs.equals(crs):
        frame = frame.to_crs(crs)
    return frame


def _ids(col: pd.Series, role: str, info: LayerInfo, findings: Findings) -> np.ndarray:
    """Feature ids as text; missing ids get ``<layer>:<row>``, repeated ids a ``#k`` suffix."""
    vals = col.to_numpy()
    if col.dtype.kind == "f":
        finite = np.isfinite(vals)
        whole = finite & (np.floor(np.where(finite, vals, 0)) == np.where(finite, vals, 0))
        txt = np.where(whole, np.where(finite, vals, 0).astype(np.int64).astype(str),
                       vals.astype(str)).astype(object)
        missing = ~finite
    else:
        missing = pd.isna(col).to_numpy().copy()
        txt = np.array([str(t).strip() for t in col.to_numpy(dtype=object)], dtype=object)
        missing |= txt == ""
    if missing.any():
        rows = np.flatnonzero(missing)
        txt[rows] = [f"{info.layer}:{r}" for r in rows]
        findings.add_many("missing_id", "warning", info.layer, txt[rows],
                          f"feature without {role[:-1]} id; named by its row")
    s = pd.Series(txt)
    k = s.groupby(s, sort=False).cumcount().to_numpy()
    if (k > 0).any():
        rows = np.flatnonzero(k > 0)
        findings.add_many("duplicate_id", "warning", info.layer, txt[rows],
                          [f"id {t!r} is used more than once; this copy renamed "
                           f"{t}#{kk + 1}" for t, kk in zip(txt[rows], k[rows])])
        txt[rows] = [f"{t}#{kk + 1}" for t, kk in zip(txt[rows], k[rows])]
    return txt


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


def _texts(col: pd.Series, role: str, role_name: str, codes: dict | None, ids, info,
           findings: Findings) -> np.ndarray:
    """Text values; codes mapped; CODE_TARGETS roles checked (unknown -> None, a finding)."""
    missing = pd.isna(col).to_numpy()
    if col.dtype.kind == "f":  # integral numbers as codes: 3.0 -> "3"
        whole = col.where(col.isna() | (col % 1 != 0), col.round().astype("Int64").astype(str))
        txt = whole.astype(str)
    else:
        txt = col.astype(str)
    txt = txt.str.strip()
    if codes:
        mapped = txt.map(codes)
        txt = mapped.where(mapped.notna(), txt)
    out = txt.to_numpy(dtype=object).copy()
    out[missing] = None
    targets = CODE_TARGETS.get(role_name)
    if targets is not None:
        low = pd.Series(out, dtype=object).str.lower().to_numpy(dtype=object).copy()
        low[missing] = None
        ok = pd.Series(low).isin(targets).to_numpy() | missing
        if not ok.all():
            rows = np.flatnonzero(~ok)
            findings.add_many("unknown_code", "warning", info.layer, ids[rows],
                              [f"{role_name} {out[r]!r} is not mapped to one of "
                               f"{', '.join(targets)} (layers.{role}.codes.{role_name}); "
                               "treated as missing" for r in rows])
            low[rows] = None
        out = low
    return out


def sample_dem(path: Path, x: np.ndarray, y: np.ndarray, crs, unit_factor_m: float) -> np.ndarray:
    """Ground elevation [m] at points (x, y in ``crs``) from a DEM raster; NaN off the raster.

    Raises
    ------
    ConfigError
        If rasterio (the optional ``dem`` extra) is not installed.
    InputError
        If the raster cannot be opened.
    """
    try:
        import rasterio
    except ImportError:
        raise ConfigError("config key elevation.source = 'dem' needs rasterio; install it with "
                          "pip install 'gridflow[dem]'", key="elevation.source") from None
    try:
        src = rasterio.open(path)
    except Exception as exc:
        raise InputError(f"cannot open DEM {path}: {exc}", file=str(path)) from None
    with src:
        if src.crs is not None and not src.crs.equals(crs):
            from pyproj import CRS, Transformer

            t = Transformer.from_crs(crs, CRS.from_user_input(src.crs.to_wkt()), always_xy=True)
            x, y = t.transform(x, y)
        vals = np.fromiter((v[0] for v in src.sample(zip(x, y), masked=True)), dtype=object,
                           count=len(x))
        out = np.array([np.nan if np.ma.is_masked(v) else float(v) for v in vals])
    return out * unit_factor_m
