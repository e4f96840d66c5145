"""Config sections for reading the GIS: ``[inputs]``, ``[layers.<role>]``, ``[elevation]``,
``[roughness]``.

A layer section maps one of gridflow's roles onto a layer of an input file::

    [layers.pipes]
    input = "gis"                 # a name from [inputs]
    layer = "WaterMains"
    id = "MAIN_ID"                # the utility's feature id field
    fields = { diameter = "DIAM_IN", material = "MATL", status = "LIFECYCLE" }
    units = { diameter = "in" }
    codes.status = { ACT = "open", ABD = "abandoned" }

Roles and the fields each understands (``*`` required) are in :data:`ROLE_FIELDS`.
Point features of pumps, valves (PRV, check, throttle, isolation) act in the digitised
direction of the main they sit on (from its first vertex to its last).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from gridflow.config.schema import (
    P_FLOAT,
    P_INT,
    P_STR,
    list_of,
    one_of,
    opt,
    parse_section,
    section,
    str_map,
    table_of,
)
from gridflow.errors import ConfigError

__all__ = ["LayerSection", "LayersSection", "ElevationSection", "RoughnessSection",
           "RoughnessRule", "ROLE_FIELDS", "ROLES"]

#: gridflow's field roles per layer role; required roles first, marked with a trailing '*'
ROLE_FIELDS: dict[str, tuple[str, ...]] = {
    "pipes": ("diameter*", "material", "install_year", "roughness", "length", "status", "zone",
              "pressure_rating", "minor_loss_k", "name"),
    "nodes": ("elevation", "zone"),
    "hydrants": ("required_fire_flow", "land_use", "elevation", "lateral_length",
                 "lateral_diameter", "status", "zone"),
    "valves": ("type", "status", "setting", "diameter", "elevation", "minor_loss_k"),
    "tanks": ("bottom_elevation*", "level*", "max_level", "diameter", "name"),
    "pumps": ("design_flow", "design_head", "flow_1", "head_1", "flow_2", "head_2", "flow_3",
              "head_3", "speed", "status", "name"),
    "sources": ("head*", "elevation", "name"),
    "meters": ("consumption*", "category", "zone"),
}
ROLES = tuple(ROLE_FIELDS)

#: coded values each role understands, and what they map to
CODE_TARGETS = {
    "status": ("open", "closed", "abandoned", "active", "inactive", "off"),
    "type": ("isolation", "prv", "check", "throttle"),
}


@dataclass(frozen=True, kw_only=True)
class LayerSection:
    input: str = opt(parse=P_STR, doc="name of a file in [inputs]")
    layer: str = opt(parse=P_STR, doc="layer name in that file")
    id: str = opt(parse=P_STR, doc="field holding the utility's feature id")
    fields: dict = opt(parse=str_map, default_factory=dict,
                       doc="gridflow role = utility field name (see the role table)")
    units: dict = opt(parse=str_map, default_factory=dict,
                      doc="unit of each mapped numeric field, e.g. { diameter = 'in' }")
    codes: dict = opt(parse=table_of(str_map), default_factory=dict,
                      doc="coded values per role, e.g. codes.status = { ACT = 'open' }")
    where: str = opt("", parse=P_STR, doc="optional SQL filter passed to the reader")


@dataclass(frozen=True, kw_only=True)
class LayersSection:
    pipes: LayerSection = opt(parse=section(LayerSection), doc="water mains (lines)")
    nodes: LayerSection | None = opt(None, parse=section(LayerSection),
                                     doc="junction points with elevation (optional)")
    hydrants: LayerSection | None = opt(None, parse=section(LayerSection), doc="hydrants (points)")
    valves: LayerSection | None = opt(None, parse=section(LayerSection),
                                      doc="system valves, PRVs, check and throttle valves (points)")
    tanks: LayerSection | None = opt(None, parse=section(LayerSection), doc="tanks (points)")
    pumps: LayerSection | None = opt(None, parse=section(LayerSection), doc="pumps (points)")
    sources: LayerSection | None = opt(None, parse=section(LayerSection),
                                       doc="fixed-grade sources: plants, wells, connections")
    meters: LayerSection | None = opt(None, parse=section(LayerSection),
                                      doc="customer meters with consumption (points)")


@dataclass(frozen=True, kw_only=True)
class ElevationSection:
    source: str = opt("attribute", parse=one_of("attribute", "z", "dem"),
                      doc="node elevations from an attribute, the geometry's Z, or a DEM raster")
    unit: str = opt("m", parse=one_of("m", "ft"), doc="unit of Z values and of the DEM")
    dem: str = opt("", parse=P_STR, doc="DEM raster path (source = 'dem'; needs rasterio)")


@dataclass(frozen=True, kw_only=True)
class RoughnessRule:
    material: str = opt(parse=P_STR, doc="material (after codes.material)")
    value: float = opt(parse=P_FLOAT, doc="Hazen-Williams C, or Darcy-Weisbach roughness [mm]")
    installed_before: int = opt(9999, parse=P_INT, doc="applies to pipes installed before this year")


@dataclass(frozen=True, kw_only=True)
class RoughnessSection:
    source: str = opt("table", parse=one_of("attribute", "table"),
                      doc="roughness from the pipes' roughness field, or from the table")
    default: float = opt(120.0, parse=P_FLOAT,
                         doc="value where neither attribute nor table gives one")
    table: list = opt(parse=list_of(section(RoughnessRule)), default_factory=list,
                      doc="rules by material and installation year; first match wins")


def parse_inputs(value, key: str) -> dict[str, str]:
    files = str_map(value, key)
    if not files:
        raise ConfigError(f"config key {key} needs at least one file", key=key)
    return files


def check_layer_roles(layers: LayersSection, inputs: dict[str, str]) -> None:
    """Cross-checks: inputs exist by name, mapped roles are known, required roles mapped."""
    for role in ROLES:
        sec = getattr(layers, role)
        if sec is None:
            continue
        where = f"layers.{role}"
        if sec.input not in inputs:
            raise ConfigError(f"config key {where}.input names {sec.input!r}, which is not in "
                              f"[inputs] ({', '.join(inputs)})", key=f"{where}.input")
        known = {r.rstrip("*") for r in ROLE_FIELDS[role]}
        for r in sec.fields:
            if r not in known:
                raise ConfigError(f"unknown config key {where}.fields.{r}; {role} understand: "
                                  f"{', '.join(sorted(known))}", key=f"{where}.fields.{r}")
        for r in ROLE_FIELDS[role]:
            if r.endswith("*") and r[:-1] not in sec.fields:
                raise ConfigError(f"config key {where}.fields.{r[:-1]} is required",
                                  key=f"{where}.fields.{r[:-1]}")
        for r in sec.units:
            if r not in sec.fields:
                raise ConfigError(f"config key {where}.units.{r} gives a unit for a field that is "
                                  "not mapped", key=f"{where}.units.{r}")
        for r, table in sec.codes.items():
            targets = CODE_TARGETS.get(r)
            if targets is None:
                continue  # free codes (material, category, land_use)
            for code, target in table.items():
                if target not in targets:
                    raise ConfigError(f"config key {where}.codes.{r}.{code} maps to {target!r}; "
                                      f"expected one of {', '.join(targets)}",
                                      key=f"{where}.codes.{r}.{code}")


_ = (field, parse_section)
