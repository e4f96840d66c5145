"""Steady-state hydraulics: head-loss laws and the global gradient solver.

This package works on :class:`gridflow.network.Network` arrays only; it imports no GIS library.
"""

from gridflow.hydraulics.solver import (
    DrawSolver,
    LINK_STATE_NAMES,
    HydraulicResult,
    HydraulicSystem,
    SolveOptions,
    solve,
)

__all__ = ["solve", "DrawSolver", "SolveOptions", "HydraulicResult", "HydraulicSystem", "LINK_STATE_NAMES"]
