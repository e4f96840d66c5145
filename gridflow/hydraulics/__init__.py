"""Steady-state hydraulics: head-loss laws, the global gradient solver and draw solves.

This package works on :class:`gridflow.network.Network` arrays only; it imports no GIS library.

Modules: ``headloss`` (friction laws), ``links`` (every link's law), ``sparse`` (the fixed
pattern factorization), ``assembly`` (head matrix and residuals, shared by every solve and
check), ``status`` (device statuses, supplied nodes, zones a shut device leaves dry),
``system`` (the steady solve), ``regulating`` (regulating-valve flows), ``draw`` (draw solves
near a base state), ``reduction`` (the network reduced to its looped core), ``reduced`` (draw
solves on it: fire flow), ``pdd`` (pressure-driven demand), ``results`` (options and results).
"""

from gridflow.hydraulics.assembly import Residuals
from gridflow.hydraulics.draw import DrawSolver
from gridflow.hydraulics.results import (
    CLOSED,
    DRAW_MODES,
    LINK_STATE_NAMES,
    OPEN,
    REGULATING,
    DrawOutcome,
    HydraulicResult,
    SolveOptions,
)
from gridflow.hydraulics.status import ShutZone
from gridflow.hydraulics.system import HydraulicSystem, solve

__all__ = ["solve", "SolveOptions", "HydraulicResult", "HydraulicSystem", "DrawSolver",
           "LINK_STATE_NAMES", "DrawOutcome", "DRAW_MODES", "Residuals", "ShutZone", "OPEN",
           "CLOSED", "REGULATING"]
