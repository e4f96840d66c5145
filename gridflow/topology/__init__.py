"""Topology: the mapped GIS cleaned into a hydraulically connected network.

:func:`build_network` is the public entry point; :class:`CleanNetwork` its result.
"""

from gridflow.topology.build import C_RANGE, MAX_DIAMETER_M, build_network
from gridflow.topology.clean import CleanNetwork

__all__ = ["build_network", "CleanNetwork", "C_RANGE", "MAX_DIAMETER_M"]
