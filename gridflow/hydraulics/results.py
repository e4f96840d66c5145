"""What the hydraulic solvers take and give: options, link states, results, outcomes."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from gridflow.hydraulics.sparse import Backend

__all__ = ["OPEN", "CLOSED", "REGULATING", "LINK_STATE_NAMES", "SolveOptions",
           "HydraulicResult", "DrawOutcome", "DRAW_MODES", "STATUS_ROUNDS_DEFAULT"]

#: link states in results: open (conducting by its law), closed (no flow), regulating (a
#: pressure-reducing valve holding its downstream head at the setting)
OPEN, CLOSED, REGULATING = 0, 1, 2
LINK_STATE_NAMES = ("open", "closed", "regulating")

STATUS_ROUNDS_DEFAULT = 30

#: the three ways :class:`gridflow.hydraulics.DrawSolver` can be asked for a draw
DRAW_MODES = ("head", "draw", "limit")


@dataclass(frozen=True, kw_only=True)
class SolveOptions:
    """Solver options (SI).

    Attributes
    ----------
    max_iter : int
        Newton iterations allowed in all.
    max_status_rounds : int
        Rounds of status changes allowed (devices are checked at convergence and every
        ``STATUS_CHECK_EVERY`` iterations before it).
    flow_tolerance : float
        Largest mass imbalance at a node [m3/s]: the floor of the mass tolerance.
    mass_relative_tolerance : float
        The mass tolerance is ``max(flow_tolerance, mass_relative_tolerance * F)`` with ``F``
        the larger of the largest link flow and the total demand, so that wide mains carrying
        large flows are not held below what floating point can resolve.
    head_tolerance : float
        Largest head-loss residual on a link [m].
    status_tolerance : float
        Head margin [m] before a valve or pump changes status (hysteresis).
    pressure_driven : bool
        Deliver demand by pressure (Wagner, Shamir and Marks, 1988).
    pdd_min_pressure, pdd_required_pressure : float
        [m of head]: nothing delivered below the first, all at or above the second.
    backend : {'qdldl', 'splu'}
    """

    max_iter: int = 200
    max_status_rounds: int = STATUS_ROUNDS_DEFAULT
    flow_tolerance: float = 1e-6
    mass_relative_tolerance: float = 1e-9
    head_tolerance: float = 1e-4
    status_tolerance: float = 1e-3
    pressure_driven: bool = False
    pdd_min_pressure: float = 0.0
    pdd_required_pressure: float = 14.06
    backend: Backend = "qdldl"


@dataclass(kw_only=True)
class HydraulicResult:
    """Heads, pressures, flows and how the solve went (SI).

    Sign conventions: ``flow_m3s`` is positive from a link's from node to its to node;
    ``headloss_m`` is ``H_from - H_to`` (negative across a pump that lifts);
    ``demand_m3s`` is delivered outflow at a node (positive); ``node_inflow_m3s`` is the net
    inflow from links at every node (equal to the delivered demand at unknown-head nodes;
    minus the supply at sources and tanks; the drawn flow at a pinned fire-flow node).

    ``status`` is one of ``converged``, ``at_precision_floor`` (the residuals stopped falling
    within the precision-floor bound: accepted, ``converged`` is True), ``stalled``,
    ``iteration_limit``, ``status_cycle``, ``status_round_limit`` or ``not_finite``;
    ``message`` says the same in words.
    """

    head_m: np.ndarray
    pressure_m: np.ndarray
    demand_m3s: np.ndarray
    required_demand_m3s: np.ndarray
    node_inflow_m3s: np.ndarray
    supplied: np.ndarray
    flow_m3s: np.ndarray
    velocity_ms: np.ndarray
    headloss_m: np.ndarray
    unit_headloss: np.ndarray
    link_state: np.ndarray
    iterations: int
    status_rounds: int
    mass_residual_m3s: float
    head_residual_m: float
    worst_node_idx: int
    worst_link_idx: int
    converged: bool
    status: str = "converged"
    mass_tolerance_m3s: float = float("nan")
    seconds: float = 0.0
    factorizations: int = 0
    message: str = ""
    extra: dict = field(default_factory=dict)

    @property
    def undelivered_m3s(self) -> float:
        """Required demand not delivered (unsupplied nodes, pressure-driven shortfall)."""
        return float(np.sum(self.required_demand_m3s) - np.sum(self.demand_m3s))


@dataclass(kw_only=True)
class DrawOutcome:
    """The outcome of one :meth:`DrawSolver.solve` (scipy's ``OptimizeResult`` as the model).

    Attributes
    ----------
    success : bool
        True when ``result`` holds a converged solution with statuses unchanged.
    status : int
        0 solved; 1 the solver cannot be used (base not converged, pressure-driven demand);
        2 the node (or the limit node) has a fixed head; 3 no convergence within the
        iteration limit; 4 a device would change status at the solution (solve the whole
        system instead).
    message : str
    result : HydraulicResult or None
        The solution (``extra["draw_m3s"]`` the draw) when ``success``.
    draw_m3s : float
        The draw [m3/s] (NaN unless ``success``).
    nit : int
        Iterations made.
    """

    success: bool
    status: int
    message: str
    result: HydraulicResult | None = None
    draw_m3s: float = float("nan")
    nit: int = 0
