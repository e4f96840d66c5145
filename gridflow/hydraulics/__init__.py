"""Steady-state hydraulics: head-loss laws and the global gradient solver.

This package works on :class:`gridflow.network.Network` arrays only; it imports no GIS library.
"""

from gridflow.hydraulics.solver import (
    LINK_STATE_NAMES,
    DrawSolver,
    HydraulicResult,
    HydraulicSystem,
    SolveOptions,
    solve,
)

__all__ = ["solve", "SolveOptions", "HydraulicResult", "HydraulicSystem", "DrawSolver",
           "LINK_STATE_NAMES"]
