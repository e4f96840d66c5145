"""Result layers in the contract's fields and the run's unit system.

SI arrays in, GeoDataFrames out; units are converted here, once, with the suffix in each
field name (``pressure_psi`` / ``pressure_kpa`` ...).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd

from gridflow.analysis.flags import node_flags, pipe_flags
from gridflow.config.sections import CriteriaSection
from gridflow.hydraulics import LINK_STATE_NAMES, HydraulicResult
from gridflow.network import LINK_KINDS, NODE_KINDS, Network
from gridflow.units import FT, UnitSystem, out_field

__all__ = ["nodes_layer", "pipes_layer", "nodes_columns", "pipes_columns", "columns_table",
           "layer_parts", "hydrants_layer", "field_name", "roughness_out",
           "forget_text_columns"]


def field_name(quantity: str, system: UnitSystem | str, stem: str | None = None) -> str:
    suffix, _ = out_field(quantity, system)
    return f"{stem or quantity}_{suffix}"


#: text columns already made, by the identity of their source arrays (the scenarios of a run
#: share the network's id arrays: each column is made once); a few entries, oldest dropped
_TEXT: dict[tuple[int, int], tuple[np.ndarray, np.ndarray | None, pd.api.extensions.ExtensionArray]]
_TEXT = {}


def _text(values: np.ndarray, take: np.ndarray | None = None):
    """``values`` (``values[take]``) as a pandas text array, equal to ``astype(str)``: made
    straight from Python strings, and once per source array (shared by the scenarios)."""
    key = (id(values), id(take))
    hit = _TEXT.get(key)
    if hit is not None and hit[0] is values and hit[1] is take:
        return hit[2]
    if take is not None:  # a take of the values' own column (one Arrow take, no strings made)
        col = _text(values).take(np.asarray(take, dtype=np.intp))
    else:
        col = pd.array(values, dtype="str") if values.dtype == object else None
        if col is None or bool(col.isna().any()):
            col = pd.array(values.astype(str), dtype="str")  # not all text: as astype(str)
    while len(_TEXT) >= 8:
        _TEXT.pop(next(iter(_TEXT)))
    _TEXT[key] = (values, take, col)
    return col


def forget_text_columns() -> None:
    """Let go of the text columns kept for the scenarios' layers (once they are written)."""
    _TEXT.clear()
    _GEOMETRY_TYPE.clear()


def _coded_text(names, codes: np.ndarray):
    """``names[codes]`` as a pandas text array (equal to the object array of those strings
    that a DataFrame turns into text): the few names made once, then one array take."""
    return pd.array(np.asarray(names, dtype=object), dtype="str").take(
        np.asarray(codes, dtype=np.intp))


#: a layer geometry's type as the writer names it, by the identity of its geometry array
#: (the scenarios' layers share the nodes' and the links' geometry: each is looked at once)
_GEOMETRY_TYPE: dict[int, tuple[object, str]] = {}


def _geometry_type_of(geometry) -> str:
    from gridflow.io.write import layer_geometry_type

    hit = _GEOMETRY_TYPE.get(id(geometry))
    if hit is not None and hit[0] is geometry:
        return hit[1]
    name = layer_geometry_type(np.asarray(geometry))
    while len(_GEOMETRY_TYPE) >= 4:
        _GEOMETRY_TYPE.pop(next(iter(_GEOMETRY_TYPE)))
    _GEOMETRY_TYPE[id(geometry)] = (geometry, name)
    return name


def columns_table(cols: dict):
    """The layer's fields as one Arrow table, the columns typed as
    ``pyarrow.Table.from_pandas(pandas.DataFrame(cols))`` types them (text: large_string;
    numbers as they are), without building the frame."""
    import pyarrow as pa

    n = max((len(v) for v in cols.values() if not isinstance(v, str)), default=0)
    arrays = {}
    for name, v in cols.items():
        if isinstance(v, str):  # one value for every row (a DataFrame broadcasts it)
            v = _coded_text([v], np.zeros(n, dtype=np.intp))
        arrays[name] = v
    return pa.table(arrays)


def layer_parts(cols: dict, geometry) -> tuple[object, object, str]:
    """What the GeoPackage writer takes for a layer of ``cols`` and ``geometry`` (a geometry
    column after the fields): the fields as an Arrow table, the geometry, its type."""
    return columns_table(cols), geometry, _geometry_type_of(geometry)


def _conv(values, quantity: str, system: UnitSystem | str) -> np.ndarray:
    _, factor = out_field(quantity, system)
    return np.asarray(values, dtype=float) * factor


def roughness_out(net: Network, system: UnitSystem | str) -> np.ndarray:
    """Roughness as written: Hazen-Williams C as is; Darcy-Weisbach absolute roughness in mm
    for SI runs and in ft for US runs (the contract)."""
    if net.headloss_model == "darcy-weisbach":
        return net.roughness * (1000.0 if system == "SI" else 1.0 / FT)
    return net.roughness


def nodes_columns(net: Network, r: HydraulicResult, criteria: CriteriaSection,
                  system: UnitSystem | str) -> dict:
    """The fields of ``nodes_<scenario>`` (before its geometry), in network order."""
    flags = node_flags(net, r, criteria)
    return {
        "node_id": _text(net.node_id),
        "kind": _coded_text(NODE_KINDS, net.node_kind),
        "fixed_head": net.is_fixed.astype(np.int32),
        "zone": _text(net.zone),
        field_name("elevation", system): _conv(net.elevation_m, "elevation", system),
        field_name("demand", system, "required_demand"): _conv(r.required_demand_m3s, "demand",
                                                               system),
        field_name("demand", system): _conv(r.demand_m3s, "demand", system),
        field_name("head", system): _conv(r.head_m, "head", system),
        field_name("pressure", system): _conv(r.pressure_m, "pressure", system),
        **flags,
    }


def nodes_layer(net: Network, r: HydraulicResult, geometry, crs, criteria: CriteriaSection,
                system: UnitSystem | str) -> gpd.GeoDataFrame:
    """``nodes_<scenario>``: one row per node, in network order."""
    cols = nodes_columns(net, r, criteria, system)
    return gpd.GeoDataFrame(cols, geometry=gpd.GeoSeries(geometry, crs=crs), crs=crs)


def pipes_columns(net: Network, r: HydraulicResult, criteria: CriteriaSection,
                  system: UnitSystem | str, pressure_rating_m=None) -> dict:
    """The fields of ``pipes_<scenario>`` (before its geometry), in network order."""
    flags = pipe_flags(net, r, criteria)
    rough = roughness_out(net, system)
    cols = {
        "pipe_id": _text(net.link_id),
        "kind": _coded_text(LINK_KINDS, net.link_kind),
        "from_node": _text(net.node_id, net.from_idx),
        "to_node": _text(net.node_id, net.to_idx),
        field_name("length", system): _conv(net.length_m, "length", system),
        field_name("diameter", system): _conv(net.diameter_m, "diameter", system),
        "roughness": rough,
        "roughness_model": net.headloss_model,
        "minor_loss_k": net.minor_k,
        "status": _coded_text(LINK_STATE_NAMES, r.link_state),
        field_name("flow", system): _conv(r.flow_m3s, "flow", system),
        field_name("velocity", system): _conv(r.velocity_ms, "velocity", system),
        field_name("headloss", system): _conv(r.headloss_m, "headloss", system),
        field_name("unit_headloss", system): _conv(r.unit_headloss, "unit_headloss", system),
        **flags,
    }
    if pressure_rating_m is not None:
        cols[field_name("pressure", system, "pressure_rating")] = _conv(pressure_rating_m,
                                                                        "pressure", system)
    return cols


def pipes_layer(net: Network, r: HydraulicResult, geometry, crs, criteria: CriteriaSection,
                system: UnitSystem | str, pressure_rating_m=None) -> gpd.GeoDataFrame:
    """``pipes_<scenario>``: one row per link, in network order."""
    cols = pipes_columns(net, r, criteria, system, pressure_rating_m)
    return gpd.GeoDataFrame(cols, geometry=gpd.GeoSeries(geometry, crs=crs), crs=crs)


def hydrants_layer(ff: pd.DataFrame, geometry, crs, system: UnitSystem | str) -> gpd.GeoDataFrame:
    """``hydrants_fireflow`` from the sweep's SI table (empty figures stay null)."""
    def flow(stem: str, col: str):
        return field_name("flow", system, stem), _conv(ff[col], "flow", system)

    def pressure(stem: str, col: str):
        return field_name("pressure", system, stem), _conv(ff[col], "pressure", system)

    def flag(col: str):
        return pd.array(ff[col], dtype="Int32")

    cols = dict([
        ("hydrant_id", ff["hydrant_id"].astype(str).to_numpy()),
        ("node_id", ff["node_id"].astype(str).to_numpy()),
        ("zone", ff["zone"].astype(str).to_numpy()),
        ("in_service", ff["in_service"].astype(np.int32).to_numpy()),
        pressure("static_pressure", "static_pressure_m"),
        flow("required_flow", "required_flow_m3s"),
        flow("available_flow", "available_flow_m3s"),
        flow("rated_flow_20psi", "rated_flow_20psi_m3s"),
        pressure("residual_pressure_at_required", "residual_pressure_at_required_m"),
        ("required_achievable", flag("required_achievable")),
        flow("flow_at_0psi", "flow_at_0psi_m3s"),
        ("meets_required", flag("meets_required")),
        ("limited_by", ff["limited_by"].astype(str).to_numpy()),
        ("limiting_node_id", ff["limiting_node_id"].astype(str).to_numpy()),
        ("limiting_pipe_id", ff["limiting_pipe_id"].astype(str).to_numpy()),
        (field_name("velocity", system, "max_velocity"),
         _conv(ff["max_velocity_ms"], "velocity", system)),
        ("max_velocity_pipe_id", ff["max_velocity_pipe_id"].astype(str).to_numpy()),
        ("high_velocity", flag("high_velocity")),
        ("nfpa_class", ff["nfpa_class"].astype(str).to_numpy()),
    ])
    return gpd.GeoDataFrame(cols, geometry=gpd.GeoSeries(geometry, crs=crs), crs=crs)


