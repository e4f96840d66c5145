"""Per-scenario flags on nodes and pipes, from a hydraulic result and the criteria.

Flags are integers 0/1 (the contract). Thresholds come from ``[criteria]`` (defaults and their
sources in the README):

- ``low_pressure``: a supplied junction below ``min_pressure`` (normal working pressure);
- ``high_pressure``: above ``max_pressure``;
- ``negative_pressure``: below zero (the model cannot deliver there as mapped);
- ``supplied``: connected to a source or tank through open links;
- ``high_velocity``: ``|v| > max_velocity``;
- ``high_headloss``: unit head loss above ``max_unit_headloss``.
"""

from __future__ import annotations

import numpy as np

from gridflow.config.sections import CriteriaSection
from gridflow.hydraulics import HydraulicResult
from gridflow.network import LINK_PIPE, NODE_JUNCTION, Network

__all__ = ["node_flags", "pipe_flags", "NODE_FLAGS", "PIPE_FLAGS"]

NODE_FLAGS = ("low_pressure", "high_pressure", "negative_pressure")
PIPE_FLAGS = ("high_velocity", "high_headloss")


def node_flags(net: Network, r: HydraulicResult, c: CriteriaSection) -> dict[str, np.ndarray]:
    """0/1 arrays per node flag, plus ``supplied``; only junctions are flagged for pressure."""
    junction = (net.node_kind == NODE_JUNCTION) & r.supplied
    p = np.where(junction, r.pressure_m, np.nan)
    with np.errstate(invalid="ignore"):
        return {
            "supplied": r.supplied.astype(np.int32),
            "low_pressure": (p < c.min_pressure).astype(np.int32),
            "high_pressure": (p > c.max_pressure).astype(np.int32),
            "negative_pressure": (p < 0).astype(np.int32),
        }


def pipe_flags(net: Network, r: HydraulicResult, c: CriteriaSection) -> dict[str, np.ndarray]:
    """0/1 arrays per pipe flag (pipes only; pumps and valves are never flagged)."""
    pipe = net.link_kind == LINK_PIPE
    v = np.where(pipe, np.abs(r.velocity_ms), np.nan)
    u = np.where(pipe, r.unit_headloss, np.nan)
    with np.errstate(invalid="ignore"):
        return {
            "high_velocity": (v > c.max_velocity).astype(np.int32),
            "high_headloss": (u > c.max_unit_headloss).astype(np.int32),
        }
