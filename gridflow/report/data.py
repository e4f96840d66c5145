"""What the report is computed from: the run's in-memory results, not its written layers.

The run hands over the network arrays, the solved results per scenario (SI), the typed
criteria (SI), the node coordinates, and the few small tables it already holds (hydrants'
fire flow, findings, changes, the run record, routine counts). Sections convert units once,
for display, with the factors of :data:`gridflow.units.OUTPUT`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from gridflow.analysis.flags import NODE_FLAGS, PIPE_FLAGS, node_flags, pipe_flags
from gridflow.config.sections import CriteriaSection
from gridflow.errors import GridflowError
from gridflow.hydraulics import HydraulicResult
from gridflow.network import NODE_JUNCTION, Network
from gridflow.report.fields import Fields, fields_for
from gridflow.units import UnitSystem, out_field

__all__ = ["ReportData", "ScenarioData", "NODE_FLAGS", "PIPE_FLAGS"]


@dataclass(frozen=True)
class ScenarioData:
    """One solved scenario: its network (demands differ per scenario), result and flags."""

    name: str
    network: Network
    result: HydraulicResult
    node_flags: dict[str, np.ndarray]
    pipe_flags: dict[str, np.ndarray]

    @classmethod
    def solved(cls, name: str, net: Network, r: HydraulicResult,
               criteria: CriteriaSection) -> ScenarioData:
        """Flags from the same functions the result layers use."""
        return cls(name, net, r, node_flags(net, r, criteria), pipe_flags(net, r, criteria))

    @property
    def junction(self) -> np.ndarray:
        """Supplied junctions: where pressures are judged."""
        return (self.network.node_kind == NODE_JUNCTION) & self.result.supplied

    @property
    def unsupplied(self) -> np.ndarray:
        return ~self.result.supplied & ~self.network.is_fixed


@dataclass(frozen=True)
class ReportData:
    """Everything a report is made of.

    Parameters
    ----------
    scenarios : list of ScenarioData
        In the config's order; all share one network layout (ids, links, coordinates).
    criteria : CriteriaSection
        Flag thresholds in SI, as the run used them.
    units : {'US', 'SI'}
        The unit system results are shown in.
    node_xy : ndarray (n_nodes, 2), optional
        Node coordinates in the working (projected) CRS [m]; None: no maps.
    crs : str
        The working CRS, for the map notes.
    pressure_rating_m : ndarray (n_links,), optional
        Pipes' pressure rating as head [m] (NaN where unknown).
    hydrants, findings, changes : DataFrame, optional
        The ``hydrants_fireflow``, ``findings`` (actionable rows only) and ``changes`` tables
        as the run wrote them; geometry, where present, locates them on the maps.
    flow_tests, segments : DataFrame, optional
        The ``flow_tests`` and ``segments`` layers as the run wrote them (run units); the
        segments' geometry may be left empty (None) but for the segments the map draws
        (:func:`gridflow.report.interactive.segments_to_draw`).
    routine : dict of str to int
        Routine facts counted by kind (not findings rows).
    run_info : list of (str, str)
        The run record.
    """

    scenarios: list[ScenarioData]
    criteria: CriteriaSection
    units: UnitSystem = "US"
    name: str = ""
    node_xy: np.ndarray | None = None
    crs: str = ""
    pressure_rating_m: np.ndarray | None = None
    hydrants: pd.DataFrame | None = None
    findings: pd.DataFrame | None = None
    changes: pd.DataFrame | None = None
    flow_tests: pd.DataFrame | None = None
    segments: pd.DataFrame | None = None
    routine: dict[str, int] = field(default_factory=dict)
    run_info: list[tuple[str, str]] = field(default_factory=list)
    hgl_path: list[str] | None = None
    worst_rows: int = 20

    def __post_init__(self) -> None:
        if not self.scenarios:
            raise GridflowError("the report needs at least one solved scenario",
                                layer="nodes_<scenario>")
        n = self.scenarios[0].network
        for s in self.scenarios[1:]:
            if s.network.n_nodes != n.n_nodes or s.network.n_links != n.n_links:
                raise GridflowError(f"scenario {s.name} has another network layout than "
                                    f"{self.scenarios[0].name}", layer=f"nodes_{s.name}")
        if self.node_xy is not None and np.shape(self.node_xy) != (n.n_nodes, 2):
            raise GridflowError(f"node coordinates have shape {np.shape(self.node_xy)}, "
                                f"expected ({n.n_nodes}, 2)", layer="nodes")

    @property
    def network(self) -> Network:
        return self.scenarios[0].network

    @property
    def fields(self) -> Fields:
        return fields_for(self.units)

    def conv(self, values, quantity: str) -> np.ndarray:
        """SI values in the display unit of ``quantity`` (``pressure``, ``flow`` ...)."""
        return np.asarray(values, dtype=float) * out_field(quantity, self.units)[1]

    def info(self, key: str, default: str = "") -> str:
        for k, v in self.run_info:
            if str(k) == key:
                return str(v)
        return default

    def worst_scenario(self) -> ScenarioData:
        """The scenario with the lowest pressure at a supplied junction (first on ties)."""
        mins = []
        for s in self.scenarios:
            p = s.result.pressure_m[s.junction]
            p = p[np.isfinite(p)]
            mins.append(p.min() if p.size else np.inf)
        return self.scenarios[int(np.argmin(mins))]
