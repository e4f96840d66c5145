"""Config sections ``[demand]`` and ``[scenarios.<name>]``.

Default scenario factors (common practice, utility master plans; see the README): maximum day
1.8 x average day (typical range 1.5-2.0), peak hour 3.0 x average day (typical 2.5-4).
"""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import (
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

__all__ = ["DemandSection", "CategorySection", "ZoneDemandSection", "PointDemand",
           "ScenarioSection", "DEFAULT_SCENARIOS"]


@dataclass(frozen=True, kw_only=True)
class CategorySection:
    codes: list = opt(parse=list_of(P_STR), default_factory=list,
                      doc="the utility's category codes that map to this category")


@dataclass(frozen=True, kw_only=True)
class ZoneDemandSection:
    production: float = opt(parse=quantity("flow", minimum=0.0),
                            doc="average-day production into the zone, e.g. '0.8 mgd'")
    nrw_category: str = opt("non_revenue", parse=P_STR,
                            doc="category given to production not metered in the zone")


@dataclass(frozen=True, kw_only=True)
class PointDemand:
    node: str = opt(parse=P_STR, doc="node id (or hydrant/meter id resolved to its node)")
    flow: float = opt(parse=quantity("flow", minimum=0.0), doc="average-day demand")
    category: str = opt("industrial", parse=P_STR, doc="demand category")


@dataclass(frozen=True, kw_only=True)
class DemandSection:
    method: str = opt("meters", parse=one_of("meters", "zone_total", "none"),
                      doc="meters: meter consumption to mains; zone_total: zone production spread"
                          " over the zone; none: no demand")
    consumption_unit: str = opt("gal/day", parse=P_STR,
                                doc="unit of the meters' consumption field, e.g. 'gal/day', "
                                    "'m3/month', 'l/s'")
    split: str = opt("linear", parse=one_of("linear", "nearest"),
                     doc="split a meter between its main's end nodes by position, or give it to "
                         "the nearer end")
    search_distance: float = opt(150.0, parse=quantity("length", minimum=0.0),
                                 doc="a meter farther than this from every eligible main is a "
                                     "finding")
    max_main_diameter: float = opt(0.0, parse=quantity("length", minimum=0.0),
                                   doc="mains wider than this take no meters ('0 in': no limit)")
    same_zone: bool = opt(True, parse=lambda v, k: _bool(v, k),
                          doc="a meter with a zone only goes to mains of that zone")
    spread: str = opt("length", parse=one_of("length", "meters"),
                      doc="spread unmetered zone demand by pipe length or by metered share")
    categories: dict = opt(parse=table_of(section(CategorySection)), default_factory=dict,
                           doc="demand categories and the codes that map to them")
    zones: dict = opt(parse=table_of(section(ZoneDemandSection)), default_factory=dict,
                      doc="zone production totals (for zone_total and non-revenue water)")
    points: list = opt(parse=list_of(section(PointDemand)), default_factory=list,
                       doc="large users given explicitly")


def _bool(v, k):
    from gridflow.config.schema import P_BOOL

    return P_BOOL(v, k)


@dataclass(frozen=True, kw_only=True)
class ScenarioSection:
    factor: float = opt(1.0, parse=P_FLOAT, doc="demand multiplier for every category")
    category_factors: dict = opt(parse=number_map, default_factory=dict,
                                 doc="multiplier per category, overriding factor")
    tank_levels: dict = opt(parse=table_of(quantity("length")), default_factory=dict,
                            doc="tank id = level, e.g. { T1 = '12 ft' }")
    pump_status: dict = opt(parse=str_map, default_factory=dict,
                            doc="pump id = 'on' | 'off' | relative speed as text ('0.9')")
    closed_valves: list = opt(parse=list_of(P_STR), default_factory=list,
                              doc="valve or pipe ids closed in this scenario")


#: used when the config has no [scenarios]
DEFAULT_SCENARIOS = {
    "average_day": ScenarioSection(factor=1.0),
    "max_day": ScenarioSection(factor=1.8),
    "peak_hour": ScenarioSection(factor=3.0),
}
