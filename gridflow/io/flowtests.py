"""Reading the field flow-test layers mapped in ``[layers.flow_tests]`` and
``[layers.flow_test_outlets]``.

Both may be tables without geometry. Fields are renamed to their roles, measured values
converted to SI (pressures as metres of head, flows in m3/s, diameters in m); a flow-test
layer with point geometry keeps it, reprojected to the working CRS.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from gridflow.config.flowtests import FLOW_TEST_ROLES, unit_of
from gridflow.errors import InputError
from gridflow.findings import Findings

__all__ = ["FlowTestTables", "read_flow_tests"]


@dataclass(frozen=True)
class FlowTestTables:
    """The flow-test rows (``test_id`` and role columns, SI) and the outlet rows (or None)."""

    tests: pd.DataFrame
    outlets: pd.DataFrame | None
    layer: str
    geometry: np.ndarray | None  # shapely points in the working CRS, or None (a table)


def read_flow_tests(cfg, crs, findings: Findings) -> FlowTestTables | None:
    """Read the mapped flow-test layers; None when ``layers.flow_tests`` is not mapped.

    Raises
    ------
    InputError
        A missing file, layer or field, or text where a number belongs (naming file, layer,
        feature id and field).
    """
    from gridflow.io.read import shared_locks

    sec = cfg.layers.flow_tests
    if sec is None:
        return None
    paths = [cfg.resolve(cfg.inputs[sec.input])]
    osec = cfg.layers.flow_test_outlets
    if osec is not None:
        paths.append(cfg.resolve(cfg.inputs[osec.input]))
    with shared_locks(sorted(set(paths))):
        tests, geom = _read("flow_tests", cfg, sec, crs, findings, "test_id")
        outlets = None
        if osec is not None:
            outlets, _ = _read("flow_test_outlets", cfg, osec, None, findings, "outlet_id")
    return FlowTestTables(tests, outlets, sec.layer, geom)


def _read(role: str, cfg, sec, crs, findings: Findings, id_col: str):
    import pyogrio

    from gridflow.config.database import is_database
    from gridflow.errors import ConfigError
    from gridflow.io.codes import coded_texts
    from gridflow.io.read import LayerInfo, _ids, _numbers

    if is_database(cfg.inputs[sec.input]):
        raise ConfigError(f"layers.{role}.input names the database input {sec.input!r}: flow-test "
                          "layers are read from files (GeoPackage or another OGR format) only; "
                          "export them to a file and name it in [inputs]",
                          key=f"layers.{role}.input")
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
    meta = pyogrio.read_info(path, layer=sec.layer)
    have = [str(f) for f in meta["fields"]]
    for rname, fname in [("id", sec.id), *sec.fields.items()]:
        if fname not in have:
            key = "id" if rname == "id" else f"fields.{rname}"
            raise InputError(f"{path}: layer {sec.layer!r} has no field {fname!r} "
                             f"(layers.{role}.{key}); its fields are: {', '.join(have)}",
                             file=str(path), layer=sec.layer, field=fname)
    geom_type = meta.get("geometry_type")
    has_geom = crs is not None and geom_type not in (None, "", "None")
    columns = list(dict.fromkeys([sec.id, *sec.fields.values()]))
    try:
        df = pyogrio.read_dataframe(path, layer=sec.layer, columns=columns,
                                    where=sec.where or None, read_geometry=has_geom,
                                    use_arrow=True)
    except Exception as exc:
        raise InputError(f"{path}: cannot read layer {sec.layer!r} (layers.{role}): {exc}",
                         file=str(path), layer=sec.layer) from None
    info = LayerInfo(role, path, sec.layer, None, tuple(have), geom_type, len(df))
    ids = _ids(df[sec.id], role, info, findings)
    out = {id_col: ids}
    spec = {k.rstrip("*"): v for k, v in FLOW_TEST_ROLES[role].items()}
    for rname, fname in sec.fields.items():
        col = df[fname]
        if rname == "date":
            out[rname] = pd.to_datetime(col, errors="coerce").to_numpy()
        elif spec[rname] == "text":
            out[rname] = coded_texts(col, role, rname, sec.codes.get(rname), ids, info,
                                     findings, fname)
        else:
            factor = unit_of(role, rname, sec.units.get(rname), f"layers.{role}.units.{rname}")
            out[rname] = _numbers(col, ids, info, fname) * factor
    geom = None
    if has_geom and "geometry" in df:
        g = df.geometry
        if g.crs is not None and not g.crs.equals(crs):
            g = g.to_crs(crs)
        geom = np.asarray(g.values, dtype=object)
    return pd.DataFrame(out), geom
