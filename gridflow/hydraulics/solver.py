"""The hydraulic solvers under their earlier module name.

The code lives in :mod:`gridflow.hydraulics.system` (steady solve),
:mod:`gridflow.hydraulics.draw` (draw solves), :mod:`gridflow.hydraulics.assembly` (head
matrix and residuals), :mod:`gridflow.hydraulics.status` (device statuses),
:mod:`gridflow.hydraulics.links` (link laws) and :mod:`gridflow.hydraulics.results`.
"""

from gridflow.hydraulics.draw import DrawSolver
from gridflow.hydraulics.pdd import smooth_sqrt_ramp
from gridflow.hydraulics.results import (
    CLOSED,
    LINK_STATE_NAMES,
    OPEN,
    REGULATING,
    DrawOutcome,
    HydraulicResult,
    SolveOptions,
)
from gridflow.hydraulics.system import HydraulicSystem, solve

__all__ = ["SolveOptions", "HydraulicResult", "HydraulicSystem", "DrawSolver", "DrawOutcome",
           "solve", "LINK_STATE_NAMES", "OPEN", "CLOSED", "REGULATING", "smooth_sqrt_ramp"]
