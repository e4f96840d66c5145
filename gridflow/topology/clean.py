"""The topology's result: :class:`CleanNetwork`."""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from gridflow.network import NODE_TANK, Network

if TYPE_CHECKING:
    import geopandas as gpd

__all__ = ["CleanNetwork"]


@dataclass(eq=False)
class CleanNetwork:
    """The cleaned network and its GIS layers, in the same order as the network's arrays.

    Attributes
    ----------
    network : Network
        SI, zero demand, zones filled.
    nodes : GeoDataFrame
        ``node_id``, ``kind`` (junction / source / tank), ``zone``, geometry (Point).
    links : GeoDataFrame
        ``pipe_id``, ``kind`` (pipe / pump / valve), geometry (LineString; valves and pumps
        zero-length at their point), ``material``, ``install_year``, ``pressure_rating_m``.
    hydrants : GeoDataFrame
        Attached hydrants: ``hydrant_id``, ``node_idx``, ``node_id``, ``zone``,
        ``required_fire_flow_m3s`` (NaN where none), ``land_use``, ``lateral_length_m``,
        ``lateral_diameter_m`` (NaN where not mapped), ``in_service`` (bool: False where the
        mapped status says closed, inactive, off or out of service; such a hydrant stays
        attached), geometry (the hydrant's point).
    meters : GeoDataFrame
        The meters layer in the working CRS, ``meter_id`` and mapped fields under their role
        names, units converted except ``consumption`` (raw; the demand stage converts it).
        Empty when no meters layer is mapped.
    crs : pyproj.CRS
        The working CRS (projected).
    elevation_guessed : ndarray of bool
        True at nodes whose elevation was interpolated from neighbours or set to 0 m.
    graph : networkx.MultiGraph
        Built on first use: nodes are node positions, edge keys link positions.
    """

    network: Network
    nodes: gpd.GeoDataFrame
    links: gpd.GeoDataFrame
    hydrants: gpd.GeoDataFrame
    meters: gpd.GeoDataFrame
    crs: Any
    inputs: list = field(default_factory=list)
    elevation_guessed: np.ndarray | None = None  # bool per node: interpolated or 0 m used

    @property
    def tank_bottom_m(self):
        """Bottom elevation per node [m] (a tank node's elevation), NaN where not a tank."""
        net = self.network
        return np.where(net.node_kind == NODE_TANK, net.elevation_m, np.nan)

    @functools.cached_property
    def graph(self):
        import networkx as nx

        g = nx.MultiGraph()
        g.add_nodes_from(range(self.network.n_nodes))
        g.add_edges_from(zip(self.network.from_idx.tolist(), self.network.to_idx.tolist(),
                             range(self.network.n_links)))
        return g
