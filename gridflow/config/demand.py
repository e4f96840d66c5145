"""Config sections ``[demand]`` and ``[scenarios.<name>]``.

Default scenario factors (common practice, as used in utility master plans; see the README):
maximum day 1.8 x average day (typical range 1.5-2.0), peak hour 3.0 x average day (typical
2.5-4). They apply to every category unless a scenario sets ``category_factors``, and to the
scenarios named ``max_day`` and ``peak_hour`` whenever their ``factor`` is not given.
"""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import (
    P_BOOL,
    P_FLOAT,
    P_STR,
    list_of,
    number_map,
    one_of,
    opt,
    quantity,
    section,
    str_map,
    table_of,
)
from gridflow.errors import ConfigError
from gridflow.units import FLOW

__all__ = ["DemandSection", "CategorySection", "ZoneDemandSection", "PointDemand",
           "ScenarioSection", "DEFAULT_SCENARIOS", "DEFAULT_FACTORS", "scenario_factor"]


def flow_unit(value, key: str) -> str:
    """A flow unit name from :data:`gridflow.units.FLOW` (case-insensitive)."""
    if not isinstance(value, str) or value.strip().lower() not in {k.lower() for k in FLOW}:
        raise ConfigError(f"config key {key} expects a flow unit, one of {', '.join(FLOW)}; got "
                          f"{value!r}", key=key)
    return value.strip()


flow_unit.__doc__ = "flow unit: " + " | ".join(FLOW)


def code(value, key: str) -> str:
    """A utility code: text or a whole number, kept as text."""
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise ConfigError(f"config key {key} expects a code (text or a whole number), got "
                          f"{value!r}", key=key)
    return str(value).strip()


@dataclass(frozen=True, kw_only=True)
class CategorySection:
    codes: list = opt(parse=list_of(code), default_factory=list,
                      doc="the utility's category codes that map to this category (text or "
                          "whole numbers)")


@dataclass(frozen=True, kw_only=True)
class ZoneDemandSection:
    production: float = opt(parse=quantity("flow", minimum=0.0),
                            doc="average-day production into the zone, e.g. '0.8 mgd'")
    nrw_category: str = opt("non_revenue", parse=P_STR,
                            doc="category given to production not metered in the zone")


@dataclass(frozen=True, kw_only=True)
class PointDemand:
    node: str = opt(parse=P_STR,
                    doc="node id, or a hydrant id (its node) or a meter id (where that meter is "
                        "allocated; this flow replaces the meter's billed consumption)")
    flow: float = opt(parse=quantity("flow", minimum=0.0), doc="average-day demand")
    category: str = opt("industrial", parse=P_STR, doc="demand category")


@dataclass(frozen=True, kw_only=True)
class DemandSection:
    method: str = opt("meters", parse=one_of("meters", "zone_total", "none"),
                      doc="meters: meter consumption to mains; zone_total: zone production spread"
                          " over the zone; none: no demand")
    consumption_unit: str = opt("gal/day", parse=flow_unit,
                                doc="unit of the meters' consumption field, e.g. 'gal/day', "
                                    "'m3/month', 'l/s'")
    split: str = opt("linear", parse=one_of("linear", "nearest"),
                     doc="split a meter between its main's end nodes by position, or give it to "
                         "the nearer end")
    search_distance: float = opt(150.0, parse=quantity("length", minimum=0.0),
                                 doc="a meter farther than this from every eligible main is a "
                                     "finding ('0 m': no limit)")
    max_main_diameter: float = opt(0.0, parse=quantity("length", minimum=0.0),
                                   doc="mains wider than this take no meters ('0 in': no limit)")
    same_zone: bool = opt(True, parse=P_BOOL,
                          doc="a meter with a zone only goes to mains of that zone")
    default_category: str = opt("residential", parse=P_STR,
                                doc="category of meters whose code is empty or not mapped")
    spread: str = opt("length", parse=one_of("length", "meters"),
                      doc="spread unmetered zone demand by pipe length or by metered share")
    categories: dict = opt(parse=table_of(section(CategorySection)), default_factory=dict,
                           doc="demand categories and the codes that map to them")
    zones: dict = opt(parse=table_of(section(ZoneDemandSection)), default_factory=dict,
                      doc="zone production totals (for zone_total and non-revenue water)")
    points: list = opt(parse=list_of(section(PointDemand)), default_factory=list,
                       doc="large users given explicitly")


def _non_negative(value: float, key: str) -> float:
    if value < 0:
        raise ConfigError(f"config key {key} must be a number >= 0, got {value!r}", key=key)
    return value


@dataclass(frozen=True, kw_only=True)
class ScenarioSection:
    factor: float | None = opt(None, parse=lambda v, k: _non_negative(P_FLOAT(v, k), k),
                               doc="demand multiplier for every category (not given: 1.8 for "
                                   "max_day, 3.0 for peak_hour, 1.0 otherwise)")
    category_factors: dict = opt(parse=lambda v, k: {c: _non_negative(f, f"{k}.{c}")
                                                     for c, f in number_map(v, k).items()},
                                 default_factory=dict,
                                 doc="multiplier per category, overriding factor")
    tank_levels: dict = opt(parse=table_of(quantity("length")), default_factory=dict,
                            doc="tank id = level, e.g. { T1 = '12 ft' }")
    pump_status: dict = opt(parse=str_map, default_factory=dict,
                            doc="pump id = 'on' | 'off' | relative speed as text ('0.9')")
    closed_valves: list = opt(parse=list_of(P_STR), default_factory=list,
                              doc="valve or pipe ids closed in this scenario")


#: demand multiplier on average day for scenarios of these names when ``factor`` is not given
#: (common practice, utility master plans: max day 1.5-2.0, peak hour 2.5-4 x average day)
DEFAULT_FACTORS = {"average_day": 1.0, "max_day": 1.8, "peak_hour": 3.0}


def scenario_factor(name: str, sec: ScenarioSection) -> float:
    """The scenario's factor for every category: its own, or the default for its name."""
    if sec.factor is not None:
        return sec.factor
    return DEFAULT_FACTORS.get(name, 1.0)


#: used when the config has no [scenarios]
DEFAULT_SCENARIOS = {
    "average_day": ScenarioSection(factor=1.0),
    "max_day": ScenarioSection(factor=1.8),
    "peak_hour": ScenarioSection(factor=3.0),
}
