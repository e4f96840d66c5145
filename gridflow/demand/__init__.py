"""gridflow.demand: customer demand on the network's nodes, and demand scenarios.

:func:`allocate` places average-day demand per node and category (meters to mains, zone
production spread as non-revenue water, point demands); :func:`scenario_demand` and
:func:`scenario_network` apply a named scenario's factors, tank levels, pump status and closed
valves; :func:`run_info_rows` gives the totals for the run record.
"""

from gridflow.demand.allocate import (
    DemandAllocation,
    ZoneCategoryTotal,
    allocate,
    run_info_rows,
)
from gridflow.demand.scenarios import scenario_demand, scenario_factors, scenario_network

__all__ = [
    "DemandAllocation",
    "ZoneCategoryTotal",
    "allocate",
    "run_info_rows",
    "scenario_demand",
    "scenario_factors",
    "scenario_network",
]
