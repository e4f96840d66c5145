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

A role held in several layers (PRV stations beside system valves, distribution and
transmission mains, meters from two files) is a list of such tables, each with its own
fields, units and codes (TOML's array of tables)::

    [[layers.valves]]
    input = "gis"
    layer = "SystemValves"
    id = "VALVE_ID"
    fields = { status = "NORM_POS" }

    [[layers.valves]]
    input = "gis"
    layer = "PRVStations"
    id = "STATION_ID"
    fields = { type = "KIND", setting = "SET_PSI", direction = "FLOW_DIR" }
    codes.direction = { W = "with", A = "against" }

Ids must be unique within a role across its layers.

Roles and the fields each understands (``*`` required) are in :data:`ROLE_FIELDS`.
Pumps, PRVs and check valves act in a direction: ``fields.direction`` maps it, either a coded
value meaning with or against the digitised direction of the main they sit on (``codes.direction
= { ... = "with" | "against" }``) or, with ``units.direction = "deg"``, a bearing in degrees
clockwise from grid north towards which the device sends water. Unmapped or missing: the main's
digitised direction holds (from its first vertex to its last).

Coded fields (status, type, direction, and material, category, land_use, level where a
``codes`` table is given) never pass an unlisted value silently: each distinct value is a warning
finding with its count; the default treatment is in :data:`CODE_DEFAULTS`.
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
    quantity,
    section,
    str_map,
    table_of,
)
from gridflow.errors import ConfigError
from gridflow.units import DIAMETER, FLOW, HEAD, INCH, LENGTH, PRESSURE

__all__ = ["LayerSection", "LayersSection", "ElevationSection", "RoughnessSection",
           "RoughnessRule", "ROLE_FIELDS", "ROLES", "NUMERIC_FIELDS", "TEXT_FIELDS",
           "SEARCH_DISTANCE_DEFAULT", "unit_factor", "CODE_TARGETS", "CODE_DEFAULTS",
           "BEARING_UNITS", "layer_sections"]

#: gridflow's field roles per layer role; required roles first, marked with a trailing '*'
ROLE_FIELDS: dict[str, tuple[str, ...]] = {
    "pipes": ("diameter*", "material", "install_year", "roughness", "length", "status", "zone",
              "pressure_rating", "minor_loss_k", "name", "level"),
    "nodes": ("elevation", "zone"),
    "hydrants": ("required_fire_flow", "land_use", "elevation", "lateral_length",
                 "lateral_diameter", "status", "zone"),
    "valves": ("type", "status", "setting", "diameter", "elevation", "minor_loss_k",
               "direction"),
    "tanks": ("bottom_elevation*", "level*", "max_level", "diameter", "name"),
    "pumps": ("design_flow", "design_head", "shut_off_head", "flow_1", "head_1", "flow_2",
              "head_2", "flow_3", "head_3", "speed", "status", "name", "direction"),
    "sources": ("head*", "elevation", "name"),
    "meters": ("consumption*", "category", "zone"),
}
ROLES = tuple(ROLE_FIELDS)

#: numeric field roles per layer role and the unit table their ``units`` entry is read from
#: (None: a plain number, no unit). ``consumption`` stays raw: ``[demand] consumption_unit``.
NUMERIC_FIELDS: dict[str, dict[str, dict[str, float] | None]] = {
    "pipes": {"diameter": DIAMETER, "install_year": None, "roughness": None, "length": LENGTH,
              "pressure_rating": PRESSURE, "minor_loss_k": None},
    "nodes": {"elevation": HEAD},
    "hydrants": {"required_fire_flow": FLOW, "elevation": HEAD, "lateral_length": LENGTH,
                 "lateral_diameter": DIAMETER},
    "valves": {"setting": PRESSURE, "diameter": DIAMETER, "elevation": HEAD,
               "minor_loss_k": None},
    "tanks": {"bottom_elevation": HEAD, "level": LENGTH, "max_level": LENGTH,
              "diameter": DIAMETER},
    "pumps": {"design_flow": FLOW, "design_head": HEAD, "shut_off_head": HEAD, "flow_1": FLOW,
              "head_1": HEAD, "flow_2": FLOW, "head_2": HEAD, "flow_3": FLOW, "head_3": HEAD,
              "speed": None},
    "sources": {"head": HEAD, "elevation": HEAD},
    "meters": {"consumption": None},
}
#: text field roles (everything mapped that is not numeric)
TEXT_FIELDS: dict[str, tuple[str, ...]] = {
    role: tuple(r.rstrip("*") for r in ROLE_FIELDS[role]
                if r.rstrip("*") not in NUMERIC_FIELDS[role])
    for role in ROLE_FIELDS
}
#: unit spellings accepted besides the unit tables' own names
_UNIT_ALIASES = {"m of head": "m", "m head": "m", "ft of head": "ft", "ft head": "ft",
                 "feet": "ft", "foot": "ft", "inch": "in", "inches": "in", "meter": "m",
                 "metre": "m", "meters": "m", "metres": "m", "l/s": "l/s", "lps": "l/s",
                 "kpa": "kpa", "gal/min": "gpm"}

#: how far a point feature may be from a main and still attach to it, when the layer
#: section gives no ``search_distance`` [m] (common practice: hydrants sit on a short lateral;
#: valves and pumps are drawn on the main; tanks and sources at the end of a main)
SEARCH_DISTANCE_DEFAULT = {"hydrants": 30.0, "valves": 5.0, "pumps": 5.0, "tanks": 50.0,
                           "sources": 50.0}


def unit_factor(role: str, field_role: str, unit: str | None, key: str = "") -> float:
    """Factor from ``unit`` to SI for a numeric field role (pressures as metres of head).

    Raises
    ------
    ConfigError
        Naming ``key`` when the unit is missing or not one the field's table knows.
    """
    table = NUMERIC_FIELDS[role][field_role]
    if table is None:
        return 1.0
    if unit is None:
        raise ConfigError(f"config key {key} is required: {field_role} is a measured value; "
                          f"give its unit, one of {', '.join(sorted(table))}", key=key)
    u = unit.strip().lower()
    u = _UNIT_ALIASES.get(u, u)
    lowered = {k.lower(): v for k, v in table.items()}
    if u not in lowered:
        raise ConfigError(f"config key {key}: unknown unit {unit!r} for {field_role}; expected "
                          f"one of {', '.join(sorted(table))}", key=key)
    return lowered[u]


#: coded values each role understands, and what they map to
CODE_TARGETS = {
    "status": ("open", "closed", "abandoned", "active", "inactive", "off", "out_of_service"),
    "type": ("isolation", "prv", "check", "throttle"),
    "direction": ("with", "against"),
}

#: what an unlisted coded value is taken as (each distinct value is a warning finding);
#: fields not named here keep the value as written
CODE_DEFAULTS = {"status": "open", "type": "isolation", "direction": "with"}

#: units a bearing may be given in (``units.direction``)
BEARING_UNITS = ("deg", "degree", "degrees")


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
    search_distance: float | None = opt(
        None, parse=quantity("length", minimum=0.0),
        doc="hydrants, valves, pumps, tanks, sources: farthest distance from a main to attach "
            "(default hydrants 30 m, valves and pumps 5 m, tanks and sources 50 m)")
    default_diameter: float | None = opt(
        None, parse=quantity("length", minimum=0.0),
        doc="pipes: diameter used where it is missing, zero or above 120 in (each one a "
            "warning finding); unset: such pipes are left out (error finding)")
    levels: str = opt("depth", parse=one_of("depth", "elevation"),
                      doc="tanks: level and max_level are depths above the bottom, or absolute "
                          "elevations (as bottom_elevation)")


def _one_or_many(value, key: str):
    """One layer table, or a list of them (TOML's ``[[layers.<role>]]``)."""
    if isinstance(value, list):
        if not value:
            raise ConfigError(f"config key {key} is an empty list; give one layer table or "
                              "several", key=key)
        return tuple(section(LayerSection)(v, f"{key}[{i}]") for i, v in enumerate(value))
    return section(LayerSection)(value, key)


_one_or_many.__doc__ = "table (LayerSection), or a list of them"
_one_or_many.section_cls = LayerSection  # type: ignore[attr-defined]

_LAYER_DOC = "; one table, or a list of tables for several layers"


@dataclass(frozen=True, kw_only=True)
class LayersSection:
    """The roles' layers. Each role holds its first (or only) layer section; a role given as a
    list keeps all of them, in order, for :func:`layer_sections`."""

    pipes: LayerSection = opt(parse=_one_or_many, doc="water mains (lines)" + _LAYER_DOC)
    nodes: LayerSection | None = opt(None, parse=_one_or_many,
                                     doc="junction points with elevation (optional)" + _LAYER_DOC)
    hydrants: LayerSection | None = opt(None, parse=_one_or_many,
                                        doc="hydrants (points)" + _LAYER_DOC)
    valves: LayerSection | None = opt(None, parse=_one_or_many,
                                      doc="system valves, PRVs, check and throttle valves "
                                          "(points)" + _LAYER_DOC)
    tanks: LayerSection | None = opt(None, parse=_one_or_many, doc="tanks (points)" + _LAYER_DOC)
    pumps: LayerSection | None = opt(None, parse=_one_or_many, doc="pumps (points)" + _LAYER_DOC)
    sources: LayerSection | None = opt(None, parse=_one_or_many,
                                       doc="fixed-grade sources: plants, wells, connections"
                                           + _LAYER_DOC)
    meters: LayerSection | None = opt(None, parse=_one_or_many,
                                      doc="customer meters with consumption (points)" + _LAYER_DOC)
    flow_tests: LayerSection | None = opt(None, parse=section(LayerSection),
                                          doc="field hydrant flow tests (points or a table)")
    flow_test_outlets: LayerSection | None = opt(None, parse=section(LayerSection),
                                                 doc="pitot readings per flowing outlet (table)")
    lists: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        for role in ROLES:
            v = getattr(self, role)
            if isinstance(v, tuple):
                object.__setattr__(self, role, v[0])
                self.lists[role] = v


def layer_sections(layers: LayersSection, role: str) -> tuple[LayerSection, ...]:
    """Every layer section of a role, in config order (empty when the role is not mapped)."""
    if role in layers.lists:
        return tuple(layers.lists[role])
    sec = getattr(layers, role)
    return () if sec is None else (sec,)


def section_key(layers: LayersSection, role: str, i: int) -> str:
    """The config key of a role's i-th layer section (``layers.valves`` or ``layers.valves[1]``)."""
    return f"layers.{role}[{i}]" if role in layers.lists else f"layers.{role}"


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
    installed_before: int = opt(9999, parse=P_INT,
                                doc="applies to pipes installed before this year")


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
    from gridflow.config.database import is_database, parse_database

    for name, spec in files.items():
        if is_database(spec):  # a PostgreSQL/PostGIS database: checked, never a password
            parse_database(spec, f"{key}.{name}")
    return files


def check_layer_roles(layers: LayersSection, inputs: dict[str, str]) -> None:
    """Cross-checks: inputs exist by name, mapped roles are known, required roles mapped."""
    for role in ROLES:
        for i, sec in enumerate(layer_sections(layers, role)):
            _check_section(role, sec, section_key(layers, role, i), inputs)


def _check_section(role: str, sec: LayerSection, where: str, inputs: dict[str, str]) -> None:
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
    for r in sec.fields:
        if r in NUMERIC_FIELDS[role]:
            unit_factor(role, r, sec.units.get(r), f"{where}.units.{r}")
    if "direction" in sec.units and sec.units["direction"].strip().lower() not in \
            BEARING_UNITS:
        raise ConfigError(f"config key {where}.units.direction: a bearing is given in "
                          f"degrees ('deg'), not {sec.units['direction']!r}; leave it out "
                          "for a coded direction", key=f"{where}.units.direction")
    if sec.levels != "depth" and role != "tanks":
        raise ConfigError(f"config key {where}.levels applies only to tanks",
                          key=f"{where}.levels")
    if sec.search_distance is not None and role not in SEARCH_DISTANCE_DEFAULT:
        raise ConfigError(f"config key {where}.search_distance applies only to "
                          f"{', '.join(SEARCH_DISTANCE_DEFAULT)}",
                          key=f"{where}.search_distance")
    if sec.default_diameter is not None and role != "pipes":
        raise ConfigError(f"config key {where}.default_diameter applies only to pipes",
                          key=f"{where}.default_diameter")
    if sec.default_diameter is not None and not 0 < sec.default_diameter <= 120 * INCH:
        raise ConfigError(f"config key {where}.default_diameter must be above 0 and at most "
                          "120 in", key=f"{where}.default_diameter")
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
