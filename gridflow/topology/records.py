"""The small frozen records the topology stages hand each other (see :mod:`.build`).

Each stage is a function of the records before it; none keeps state of its own. Arrays are
indexed by position: ``line`` a snapped main, ``key`` a node candidate (a cluster of snapped
ends first, then nodes the stages add), ``idx`` a node of the finished network.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from gridflow.config.layers import SEARCH_DISTANCE_DEFAULT, layer_sections
from gridflow.findings import Findings

__all__ = ["Context", "Pipes", "Snapped", "PointLayer", "Device", "Attached", "Split",
           "NodeTable", "LinkTable"]


@dataclass(frozen=True)
class Context:
    """What every stage reads: the config, the layers as read, the findings log."""

    cfg: Any
    read: Any  # gridflow.io.read.ReadResult
    findings: Findings
    tol: float  # snapping tolerance [m]
    crs: Any

    def layer_name(self, role: str) -> str:
        """The role's layer name (its layers joined by '+' when it has several)."""
        infos = self.read.all_infos.get(role)
        if infos:
            return "+".join(i.layer for i in infos)
        info = self.read.infos.get(role)
        return info.layer if info is not None else role

    def search_distance(self, role: str) -> float:
        """Farthest distance [m] a point of the role attaches over (largest of its layers)."""
        vals = [s.search_distance for s in layer_sections(self.cfg.layers, role)
                if s.search_distance is not None]
        return max(vals) if vals else SEARCH_DISTANCE_DEFAULT[role]


@dataclass(frozen=True)
class Pipes:
    """Usable mains, one row per part: ``pipe_id``, ``geom`` (as read: with Z where drawn so),
    attributes in SI, ``level``."""

    frame: pd.DataFrame
    layer: str
    drawn_length_m: np.ndarray  # length as drawn in the GIS, before snapping


@dataclass(frozen=True)
class Snapped:
    """Mains with their ends snapped to clusters, zero-length and duplicate ones dropped."""

    frame: pd.DataFrame
    geoms: np.ndarray
    ids: np.ndarray
    layer: str
    lab_s: np.ndarray  # cluster (key) of each main's first vertex
    lab_e: np.ndarray  # ... and of its last
    cxy: np.ndarray  # cluster positions [m]
    cluster_node: np.ndarray  # row of the junction-point layer lending its id, or -1
    cluster_z: np.ndarray  # mean Z of the ends in the cluster [m] (NaN: none)
    nodes: Any  # the junction-point frame (usable rows) or None
    level: np.ndarray  # grade-separation level of each main (text; "0" where not mapped)
    cluster_pts: np.ndarray | None = None  # Points at ``cxy``, made once for every stage
    length_m: np.ndarray | None = None  # length of each main [m] (None: measure ``geoms``)
    vertices: Any = None  # ``geoms``' vertices (gridflow.topology.lines.Vertices) or None


@dataclass(frozen=True)
class PointLayer:
    """A role's usable point features: frame (role-named columns) and 2-D points."""

    role: str
    frame: pd.DataFrame
    pts: np.ndarray
    layer: str

    @property
    def ids(self) -> np.ndarray:
        return self.frame.iloc[:, 0].to_numpy(dtype=object)


@dataclass(frozen=True)
class Device:
    """Valves or pumps placed on mains: each a link from ``up`` to ``down`` (keys)."""

    points: PointLayer
    line: np.ndarray
    up: np.ndarray
    down: np.ndarray
    reversed: np.ndarray  # bool: acts against the main's digitised direction
    xy: np.ndarray | None = None  # where each device sits on its main [m] (None: recompute)


@dataclass(frozen=True)
class Attached:
    """Split events on the mains and the keys point features sit at."""

    key_xy: np.ndarray  # position of every key [m]
    key_pts: np.ndarray  # a Point at every key (None where none was made)
    n_clusters: int
    ev_line: np.ndarray  # events sorted by (line, distance along it)
    ev_s: np.ndarray
    ev_xy: np.ndarray
    ev_up: np.ndarray  # key ending the piece before the event
    ev_down: np.ndarray  # key starting the piece after it
    start_key: np.ndarray  # key at each main's first vertex (a device may have moved it)
    end_key: np.ndarray
    hydrants: PointLayer | None
    hyd_key: np.ndarray  # key of each hydrant, -1 where not attached
    devices: tuple[Device, ...]
    cluster_pts: np.ndarray | None = None  # Points at the first ``n_clusters`` keys


@dataclass(frozen=True)
class Split:
    """Pipe pieces after splitting the mains at the events."""

    pieces: np.ndarray
    line: np.ndarray  # the main each piece came from
    from_key: np.ndarray
    to_key: np.ndarray
    pipe_id: Any  # pyarrow large_string array: the piece ids


@dataclass(frozen=True)
class NodeTable:
    """Network nodes in their final order, ids and kinds set, elevations where known."""

    keys: np.ndarray  # key of each node
    idx_of_key: np.ndarray  # node position of each key, -1 where unused
    xy: np.ndarray
    node_id: np.ndarray
    kind: np.ndarray
    fixed_head_m: np.ndarray
    elevation_m: np.ndarray  # NaN where not known yet
    standin: np.ndarray  # bool: a source's elevation stands in for its head (no ground known)
    zone: np.ndarray  # zone named by the junction-point layer, or None
    ids_distinct: bool = False  # node_id shown distinct as text (no need to check again)
    id_text: Any = None  # node_id as a pyarrow large_string array, when made so


@dataclass(frozen=True)
class LinkTable:
    """Every link's columns (pipes, then each device layer), ready for the network arrays."""

    cols: dict  # name -> array (see :func:`gridflow.topology.links.link_table`)
    ids_distinct: bool = False  # cols["link_id"] shown distinct as text
    id_text: Any = None  # cols["link_id"] as a pyarrow large_string array, when made so
