"""Steady-state hydraulics by the global gradient algorithm.

Unknowns are link flows ``Q`` and node heads ``H``. With the link-node incidence ``A``
(+1 at a link's from node, -1 at its to node) split into unknown-head columns ``A12`` and
fixed-head columns ``A10``, each Newton step solves one sparse symmetric positive definite
system for the new heads and then updates the flows (Todini and Pilati, 1988)::

    (A12' G^-1 A12) H = -A12' (Q - G^-1 h(Q)) - A12' G^-1 A10 H0 - d
    Q_new = Q - G^-1 h(Q) + G^-1 (A12 H + A10 H0)

with ``h(Q)`` the head loss of each link in the direction of positive flow and ``G = dh/dQ``.
Here the matrix spans all nodes; fixed-head nodes (sources, tanks, nodes pinned by an active
pressure-reducing valve or by a fire-flow test) are Dirichlet rows: diagonal 1, off-diagonals
explicit zeros, so the pattern never changes and the ordering is computed once.

Statuses (check valves, pumps that cannot lift, pressure-reducing valves) are resolved in an
outer loop: converge with the statuses fixed, then change those whose conditions say so (with a
head tolerance as hysteresis), and converge again; a status set seen before means the statuses
cycle, which is reported as non-convergence naming the valve.

Converged means both residuals are below tolerance (a flow-change test alone can stop at
inaccurate results):

    max_i |sum_in Q - sum_out Q - d_i| <= flow_tolerance   (every unknown-head node)
    max_l |h_l(Q_l) - (H_from - H_to)| <= head_tolerance   (every open link)
"""

from __future__ import annotations

import dataclasses
import logging
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from gridflow.errors import ConvergenceError, NetworkError, SolverError
from gridflow.hydraulics.headloss import (
    EPS_FLOW,
    HW_EXPONENT,
    darcy_weisbach,
    hw_resistance,
    minor_coefficient,
    power_law,
)
from gridflow.hydraulics.sparse import Backend, FixedPatternSPD
from gridflow.network.model import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CLOSED,
    STATUS_CV,
    VALVE_PRV,
    VALVE_TCV,
    Network,
)

__all__ = ["SolveOptions", "HydraulicResult", "HydraulicSystem", "DrawSolver", "solve",
           "LINK_STATE_NAMES"]

log = logging.getLogger("gridflow.hydraulics")

# link states in results
OPEN, CLOSED, ACTIVE = 0, 1, 2
LINK_STATE_NAMES = ("open", "closed", "active")

#: smallest dh/dq [s/m2] allowed, for links with (nearly) no resistance
G_FLOOR = 1e-6
#: statuses are also checked every this many Newton iterations before convergence
STATUS_CHECK_EVERY = 10


@dataclass(frozen=True, kw_only=True)
class SolveOptions:
    """Solver options (SI).

    Attributes
    ----------
    max_iter : int
        Newton iterations allowed in all.
    max_trials : int
        Status changes allowed (statuses are checked at convergence and every
        ``STATUS_CHECK_EVERY`` iterations before it).
    flow_tolerance : float
        Largest mass imbalance at a node [m3/s].
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
    max_trials: int = 30
    flow_tolerance: float = 1e-6
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
    trials: int
    mass_residual_m3s: float
    head_residual_m: float
    worst_node_idx: int
    worst_link_idx: int
    converged: bool
    seconds: float = 0.0
    factorizations: int = 0
    message: str = ""
    extra: dict = field(default_factory=dict)


class HydraulicSystem:
    """A network prepared for repeated solves: the sparse pattern and ordering are built once.

    Parameters
    ----------
    net : Network
    options : SolveOptions, optional
    share : HydraulicSystem, optional
        A system of a network with the same links between the same nodes (another scenario):
        its sparsity pattern, ordering and symbolic factorization are reused.

    Examples
    --------
    >>> from gridflow.network import Network
    >>> net = Network.from_arrays(node_id=["R", "J"], link_id=["P1"], from_idx=[0], to_idx=[1],
    ...     fixed_head_m=[100.0, float("nan")], demand_m3s=[0.0, 0.1], length_m=[1000.0],
    ...     diameter_m=[0.3], roughness=[130.0])
    >>> r = solve(net)
    >>> round(float(r.headloss_m[0]), 2)   # 10.67 L Q^1.852 / (C^1.852 D^4.87)
    6.42
    """

    def __init__(self, net: Network, options: SolveOptions | None = None, *,
                 share: HydraulicSystem | None = None) -> None:
        self.net = net
        self.opt = options or SolveOptions()
        nl, nn = net.n_links, net.n_nodes
        self.nn, self.nl = nn, nl
        self.fr = net.from_idx
        self.to = net.to_idx
        self.pattern: FixedPatternSPD
        if share is not None and share.shares_pattern_with(net, self.opt):
            # same links between the same nodes: reuse the ordering and symbolic analysis
            self.pattern = share.pattern
        else:
            self.pattern = FixedPatternSPD(nn, self.fr, self.to, backend=self.opt.backend)
        self._components: dict = {}
        self._prepare_links()

    def shares_pattern_with(self, net: Network, options: SolveOptions) -> bool:
        """True if ``net`` has this system's sparsity pattern (scenarios of one network)."""
        return (options.backend == self.opt.backend and net.n_nodes == self.nn
                and (net.from_idx is self.fr or np.array_equal(net.from_idx, self.fr))
                and (net.to_idx is self.to or np.array_equal(net.to_idx, self.to)))

    # ------------------------------------------------------------------ link laws
    def _prepare_links(self) -> None:
        net = self.net
        kind = net.link_kind
        self.is_pipe = kind == LINK_PIPE
        self.is_pump = kind == LINK_PUMP
        self.is_valve = kind == LINK_VALVE
        self.is_prv = self.is_valve & (net.valve_type == VALVE_PRV)
        self.is_tcv = self.is_valve & (net.valve_type == VALVE_TCV)
        self.is_cv = net.status == STATUS_CV
        nl = self.nl
        d = np.where(np.isfinite(net.diameter_m), net.diameter_m, 1.0)
        self.area = np.pi * d**2 / 4.0
        k = net.minor_k.copy()
        k[self.is_tcv] += net.valve_setting[self.is_tcv]
        self.m_minor = np.where((k > 0) & ~self.is_pump, minor_coefficient(k, d), 0.0)
        self.r_hw = np.zeros(nl)
        self.dw = net.headloss_model == "darcy-weisbach"
        if not self.dw:
            self.r_hw[self.is_pipe] = hw_resistance(net.length_m[self.is_pipe],
                                                    net.diameter_m[self.is_pipe],
                                                    net.roughness[self.is_pipe])
        # pumps: gain s^2 a - b s^(2-c) q^c, written as a head loss -s^2 a + r q (q^2+e^2)^...
        s = np.where(self.is_pump, net.pump_speed, 0.0)
        self.pump_on = self.is_pump & (s > 0)
        self.pump_shutoff = np.where(self.pump_on, s**2 * np.nan_to_num(net.pump_a), 0.0)
        self.pump_r = np.where(self.pump_on,
                               np.nan_to_num(net.pump_b) * s ** (2 - np.nan_to_num(net.pump_c,
                                                                                   nan=2.0)),
                               0.0)
        self.pump_n = np.where(self.pump_on, np.nan_to_num(net.pump_c, nan=2.0), 2.0)
        # PRVs discharging into a fixed head (refined per solve when nodes are pinned)
        self._prv_fixed_down = self.is_prv & net.is_fixed[self.to]
        self.prv_head = np.full(nl, np.nan)
        self.prv_head[self.is_prv] = (net.elevation_m[self.to[self.is_prv]]
                                      + net.valve_setting[self.is_prv])

    def link_headloss(self, q: np.ndarray):
        """Head loss ``H_from - H_to`` of every link at flows ``q`` and its derivative."""
        net = self.net
        h = np.zeros(self.nl)
        g = np.zeros(self.nl)
        p = self.is_pipe
        if self.dw:
            hh, gg = darcy_weisbach(q[p], net.length_m[p], net.diameter_m[p],
                                    net.roughness[p])
            h[p], g[p] = hh, gg
        else:
            h[p], g[p] = power_law(q[p], self.r_hw[p], HW_EXPONENT)
        mm = self.m_minor > 0
        if mm.any():
            hm, gm = power_law(q[mm], self.m_minor[mm], 2.0)
            h[mm] += hm
            g[mm] += gm
        pu = self.pump_on
        if pu.any():
            hp, gp = power_law(q[pu], self.pump_r[pu], self.pump_n[pu])
            h[pu] = hp - self.pump_shutoff[pu]
            g[pu] = gp
        return h, np.maximum(g, G_FLOOR)

    # ------------------------------------------------------------------ the solve
    def solve(self, *, demand_m3s: np.ndarray | None = None,
              pin_idx: np.ndarray | None = None, pin_head_m: np.ndarray | None = None,
              warm: HydraulicResult | None = None, raise_on_failure: bool = True
              ) -> HydraulicResult:
        """Solve for heads and flows.

        Parameters
        ----------
        demand_m3s : ndarray, optional
            Required demand per node [m3/s]; default the network's.
        pin_idx, pin_head_m : ndarray, optional
            Extra nodes whose head is fixed for this solve (e.g. a hydrant at its residual
            target); their ``node_inflow_m3s`` is the flow drawn there.
        warm : HydraulicResult, optional
            A previous solution of the same network to start from (flows and statuses).
        raise_on_failure : bool
            Raise :class:`ConvergenceError` (default) or return a result with
            ``converged=False``.

        Raises
        ------
        ConvergenceError
            Naming the node and link with the largest residuals.
        SolverError
            If no node has a fixed head.
        """
        t0 = time.perf_counter()
        f0 = self.pattern.factorizations
        net, opt = self.net, self.opt
        nn, nl = self.nn, self.nl
        demand = net.demand_m3s if demand_m3s is None else np.asarray(demand_m3s, float)
        fixed = net.is_fixed.copy()
        fixed_head = np.where(fixed, net.fixed_head_m, np.nan)
        if pin_idx is not None:
            pin_idx = np.atleast_1d(np.asarray(pin_idx, dtype=np.int64))
            fixed[pin_idx] = True
            fixed_head[pin_idx] = pin_head_m
        if not fixed.any():
            raise SolverError("the network has no source or tank: no node has a fixed head, so "
                              "heads are undetermined")

        # statuses
        state = np.zeros(nl, dtype=np.int8)
        state[net.status == STATUS_CLOSED] = CLOSED
        state[self.is_pump & ~self.pump_on] = CLOSED
        state[self.is_prv & (net.status != STATUS_CLOSED)] = ACTIVE
        # a PRV discharging into a fixed head cannot hold its setting there: it is open (head
        # below the setting) or shut, never active
        self._prv_fixed_down = self.is_prv & fixed[self.to]
        state[self._prv_fixed_down & (state == ACTIVE)] = OPEN
        always_closed = state == CLOSED
        always_closed &= ~self.is_cv  # a check valve given as closed may open
        if warm is not None:
            q = warm.flow_m3s.copy()
            h_now = np.where(np.isfinite(warm.head_m), warm.head_m, np.nanmax(fixed_head))
            state = np.where(always_closed, CLOSED, warm.link_state).astype(np.int8)
        else:
            q = self._initial_flows()
            h_now = np.full(nn, np.nanmax(fixed_head[fixed]))
        h_now[fixed] = fixed_head[fixed]

        seen: set[bytes] = set()
        iterations = 0
        trial = 0
        conv = False
        holds = 0
        held = np.zeros(nl, dtype=bool)
        while iterations < opt.max_iter:
            chunk = min(STATUS_CHECK_EVERY, opt.max_iter - iterations)
            q, h_now, it, conv, supplied = self._newton(q, h_now, state, fixed, fixed_head,
                                                        demand, chunk)
            iterations += it
            old_state = state.copy()
            changed = self._update_status(state, q, h_now, always_closed, supplied)
            if not changed:
                if conv:
                    break
                continue  # not there yet under these statuses: keep iterating
            trial += 1
            if conv:
                key = state.tobytes()
                if key in seen and holds < 3:
                    # statuses cycle between converged states: the links that flip sit at a
                    # boundary (zero flow); hold them closed and converge once more
                    flip = state != old_state
                    state[flip] = CLOSED
                    always_closed |= flip
                    held |= flip
                    holds += 1
                    seen.clear()
                elif key in seen:
                    conv = False
                    break
                seen.add(key)
            conv = False
            if trial >= opt.max_trials:
                break
        trial = max(trial, 1)
        result = self._result(q, h_now, state, fixed, fixed_head, demand, supplied,
                              iterations, trial, conv)
        if held.any():
            ids = ", ".join(map(str, net.link_id[held][:5]))
            result.message += f"; held closed after their status oscillated: {ids}"
            result.extra["held_closed"] = list(net.link_id[held])
        result.seconds = time.perf_counter() - t0
        result.factorizations = self.pattern.factorizations - f0
        if not result.converged and raise_on_failure:
            raise ConvergenceError(result.message, node_id=net.node_id[result.worst_node_idx],
                                   link_id=net.link_id[result.worst_link_idx], result=result)
        return result

    def _initial_flows(self) -> np.ndarray:
        # 0.3 m/s in pipes and valves; pumps at half their shut-off head
        q = 0.3 * self.area
        pu = self.pump_on
        if pu.any():
            q[pu] = (0.5 * self.pump_shutoff[pu] / self.pump_r[pu]) ** (1.0 / self.pump_n[pu])
        return q

    def _supplied(self, state, fixed) -> np.ndarray:
        """Nodes connected through conducting links to a fixed-head (or pinned) node.

        The components depend on the link states only: they are kept per state set, so
        repeated solves with unchanged states (fire flow) skip the graph search.
        """
        key = state.tobytes()
        hit = self._components.get(key)
        if hit is None:
            conducting = state == OPEN
            fr, to = self.fr[conducting], self.to[conducting]
            nn = self.nn
            adj = sp.coo_matrix((np.ones(len(fr)), (fr, to)), shape=(nn, nn))
            hit = connected_components(adj, directed=False)
            if len(self._components) >= 8:
                self._components.clear()
            self._components[key] = hit
        ncomp, label = hit
        has_fixed = np.zeros(ncomp, dtype=bool)
        has_fixed[label[fixed]] = True
        return has_fixed[label]

    def _newton(self, q, h_now, state, fixed_given, fixed_head_given, demand, max_iter):
        """Newton iterations with statuses fixed. Returns q, h, iterations, converged, supplied."""
        opt = self.opt
        nn = self.nn
        fr, to = self.fr, self.to
        pat = self.pattern
        fixed = fixed_given.copy()
        fixed_head = fixed_head_given.copy()
        active = (state == ACTIVE) & self.is_prv
        prv_to = to[active]
        fixed[prv_to] = True
        fixed_head[prv_to] = self.prv_head[active]
        supplied = self._supplied(state, fixed)
        dirichlet = fixed | ~supplied
        free = ~dirichlet
        h = h_now.copy()
        h[fixed] = fixed_head[fixed]
        h[~supplied] = 0.0
        conducting = (state == OPEN) & supplied[fr] & supplied[to]
        q = np.where(conducting | active, q, 0.0)
        pdd = opt.pressure_driven
        elev = self.net.elevation_m
        converged = False
        it = 0
        hl, g = self.link_headloss(q)
        # everything fixed within the Newton loop is computed once per status trial
        cond_f = conducting.astype(float)
        free_f = free[fr].astype(float)
        free_t = free[to].astype(float)
        off_mask = free_f * free_t
        hf = np.where(dirichlet, h, 0.0)
        hfo_f = hf[to] * free_f  # known head at the other end, seen from the from node
        hfo_t = hf[fr] * free_t
        h_dir = np.where(dirichlet, h, 0.0)
        any_active = bool(active.any())
        data = np.zeros(pat.nnz)
        for it in range(1, max_iter + 1):
            w = cond_f / g
            y = cond_f * q - w * hl
            # assemble: diagonal, right-hand side (-A'y, known heads, demand), off-diagonals
            diag = (np.bincount(fr, weights=w * free_f, minlength=nn)
                    + np.bincount(to, weights=w * free_t, minlength=nn))
            rhs = (np.bincount(fr, weights=w * hfo_f - y, minlength=nn)
                   + np.bincount(to, weights=w * hfo_t + y, minlength=nn))
            if pdd:
                dq, ddq = self._pdd(h - elev, demand)
                diag += np.where(free, ddq, 0.0)
                rhs -= dq - ddq * h
            else:
                rhs -= demand
            if pat.unique_off:
                data[pat.off_pos] = -w * off_mask
            else:
                data = np.bincount(pat.off_pos, weights=-w * off_mask, minlength=pat.nnz)
            data[pat.diag_pos] = np.where(dirichlet, 1.0, diag)
            rhs = np.where(dirichlet, h_dir, rhs)
            pat.factor(data)
            h_new = pat.solve(rhs)
            h_new[dirichlet] = h[dirichlet]
            if any_active:
                q_prv, h_new = self._active_prv_flows(h_new, y, w, conducting, active, dirichlet,
                                                      demand, elev, pdd, h)
            q_new = np.where(conducting, y + w * (h_new[fr] - h_new[to]), 0.0)
            if any_active:
                q_new[active] = q_prv
            if pdd:
                # demand that depends on pressure can make full Newton steps overshoot between
                # "delivers nothing" and "delivers all": backtrack on a merit function
                q_new, h_new = self._backtrack(q, h, q_new, h_new, free, conducting, demand,
                                               elev, w, pdd)
            h = h_new
            q = q_new
            hl, g = self.link_headloss(q)  # reused by the next iteration's assembly
            mass, head = self._residuals(q, h, free, conducting, demand, elev, pdd, hl)
            if mass <= opt.flow_tolerance and head <= opt.head_tolerance and it > 1:
                converged = True
                break
        return q, h, it, converged, supplied

    def _active_prv_flows(self, h0, y, w, conducting, active, dirichlet, demand, elev, pdd,
                          h_prev):
        """Flows through active PRVs, solved with the heads in one Newton step.

        An active PRV pins its downstream node ``d`` at the setting; its flow ``Q`` leaves the
        upstream node ``u`` and must balance ``d``. With the factorized matrix ``J``, the heads
        are ``H = H0 - Z Q`` with ``Z[:, k] = J^-1 e_{u_k}``, and the linearized balance at every
        ``d_k`` is a small dense system in ``Q`` (one extra triangular solve per active PRV).
        """
        fr, to, nn = self.fr, self.to, self.nn
        ia = np.flatnonzero(active)
        u, d = fr[ia], to[ia]
        wc = np.where(conducting, w, 0.0)

        def outflow_lin(z):  # net outflow through conducting links for heads z (no y term)
            dq = wc * (z[fr] - z[to])
            return np.bincount(fr, dq, nn) - np.bincount(to, dq, nn)

        # rhs of the matrix at u_k gets -Q_k, so H = H0 - Z Q
        z = np.empty((nn, len(ia)))
        for k, uk in enumerate(u):
            e = np.zeros(nn)
            if not dirichlet[uk]:
                e[uk] = 1.0
            col = self.pattern.solve(e)
            col[dirichlet] = 0.0
            z[:, k] = col
        yc = np.where(conducting, y, 0.0)
        q0 = yc + wc * (h0[fr] - h0[to])
        out0 = np.bincount(fr, q0, nn) - np.bincount(to, q0, nn)
        if pdd:
            out0 = out0 + self._pdd(h_prev - elev, demand)[0]
        else:
            out0 = out0 + demand
        m = np.empty((len(ia), len(ia)))
        for j in range(len(ia)):
            m[:, j] = -outflow_lin(z[:, j])[d]
        # the PRVs themselves: Q_j enters d_j and leaves u_j
        m -= (d[:, None] == d[None, :]).astype(float)
        m += (d[:, None] == u[None, :]).astype(float)
        try:
            q_prv = np.linalg.solve(m, -out0[d])
        except np.linalg.LinAlgError:
            q_prv = np.linalg.lstsq(m, -out0[d], rcond=None)[0]
        return q_prv, h0 - z @ q_prv

    def _merit(self, q, h, free, conducting, demand, elev, w, pdd):
        """Sum of squared residuals in flow units: mass imbalance and G^-1 times head error."""
        imb = self._net_outflow(q, h, demand, elev, pdd)[free]
        hl, _ = self.link_headloss(q)
        e = np.where(conducting, (hl - (h[self.fr] - h[self.to])) * w, 0.0)
        return float(imb @ imb + e @ e)

    def _backtrack(self, q, h, q_new, h_new, free, conducting, demand, elev, w, pdd):
        """The longest step (1, 1/2, 1/4 ...) that lowers the merit; failing that, the step
        with the lowest merit tried."""
        phi0 = self._merit(q, h, free, conducting, demand, elev, w, pdd)
        alpha = 1.0
        best = (np.inf, q_new, h_new)
        for _ in range(10):
            qa = q + alpha * (q_new - q)
            ha = h + alpha * (h_new - h)
            phi = self._merit(qa, ha, free, conducting, demand, elev, w, pdd)
            if phi < phi0:
                return qa, ha
            if phi < best[0]:
                best = (phi, qa, ha)
            alpha *= 0.5
        return best[1], best[2]

    def _net_outflow(self, q, h, demand, elev, pdd):
        """Per node: outflow through links plus delivered demand minus inflow."""
        nn = self.nn
        out = np.bincount(self.fr, weights=q, minlength=nn) - np.bincount(self.to, weights=q,
                                                                          minlength=nn)
        if pdd:
            out += self._pdd(h - elev, demand)[0]
        else:
            out += demand
        return out

    def _residuals(self, q, h, free, conducting, demand, elev, pdd, hl):
        imbalance = self._net_outflow(q, h, demand, elev, pdd)
        mass = float(np.max(np.abs(imbalance[free]), initial=0.0))
        e = np.where(conducting, hl - (h[self.fr] - h[self.to]), 0.0)
        head = float(np.max(np.abs(e), initial=0.0))
        return mass, head

    def _pdd(self, p, demand):
        """Delivered demand and its derivative by pressure (Wagner et al., 1988), smoothed."""
        opt = self.opt
        span = opt.pdd_required_pressure - opt.pdd_min_pressure
        s = (p - opt.pdd_min_pressure) / span
        f, df = smooth_sqrt_ramp(s)
        return demand * f, demand * df / span

    def _update_status(self, state, q, h, always_closed, supplied) -> bool:
        """Change link statuses whose conditions say so; True if anything changed."""
        tol = self.opt.status_tolerance
        qtol = self.opt.flow_tolerance
        fr, to = self.fr, self.to
        dh = h[fr] - h[to]
        old = state.copy()
        ok = supplied[fr] & supplied[to]
        # check valves
        cv = self.is_cv & ~always_closed
        state[cv & (old == OPEN) & (q < -qtol)] = CLOSED
        state[cv & (old == CLOSED) & (dh > tol) & ok] = OPEN
        # pumps: close when they cannot lift (flow would reverse); open when head allows
        pu = self.pump_on
        state[pu & (old == OPEN) & (q < -qtol)] = CLOSED
        state[pu & (old == CLOSED) & (-dh < self.pump_shutoff - tol) & ok] = OPEN
        # pressure-reducing valves
        prv = self.is_prv & ~always_closed
        hs = self.prv_head
        hu, hd = h[fr], h[to]
        a = prv & (old == ACTIVE)
        state[a & (q < -qtol)] = CLOSED
        state[a & (q >= -qtol) & (hu < hs - tol)] = OPEN
        o = prv & (old == OPEN)
        state[o & (q < -qtol)] = CLOSED
        fd = self._prv_fixed_down
        state[o & (q >= -qtol) & (hd > hs + tol)] = np.where(fd, CLOSED, ACTIVE)[
            o & (q >= -qtol) & (hd > hs + tol)]
        c = prv & (old == CLOSED)
        state[c & ~fd & (hu > hs + tol) & (hd < hs - tol)] = ACTIVE
        state[c & ~fd & (hu <= hs + tol) & (hu > hd + tol)] = OPEN
        state[c & fd & (hd < hs - tol) & (hu > hd + tol)] = OPEN
        return bool((state != old).any())

    def _result(self, q, h, state, fixed, fixed_head, demand, supplied, iterations, trials,
                conv, hl=None) -> HydraulicResult:
        net, opt = self.net, self.opt
        fr, to = self.fr, self.to
        elev = net.elevation_m
        pdd = opt.pressure_driven
        active = (state == ACTIVE) & self.is_prv
        pinned = fixed.copy()
        pinned[to[active]] = True
        free = ~pinned & supplied
        conducting = (state == OPEN) & supplied[fr] & supplied[to]
        head = np.where(supplied, h, np.nan)
        pressure = head - elev
        if pdd:
            delivered = np.where(supplied, self._pdd(h - elev, demand)[0], 0.0)
        else:
            delivered = np.where(supplied, demand, 0.0)
        inflow = np.bincount(to, weights=q, minlength=self.nn) - np.bincount(
            fr, weights=q, minlength=self.nn)
        imbalance = inflow - delivered
        imbalance[~free] = 0.0
        hl_model = self.link_headloss(q)[0] if hl is None else hl
        dh = np.where(conducting | active, head[fr] - head[to], np.nan)
        e = np.where(conducting, np.abs(hl_model - dh), 0.0)
        wn = int(np.argmax(np.abs(imbalance))) if self.nn else 0
        wl = int(np.argmax(e)) if self.nl else 0
        mass = float(np.abs(imbalance[wn])) if self.nn else 0.0
        headres = float(e[wl]) if self.nl else 0.0
        finite = np.isfinite(head[supplied]).all() and np.isfinite(q).all()
        converged = bool(conv and finite)
        velocity = np.where(self.is_pump, np.nan, q / self.area)
        length = net.length_m
        with np.errstate(divide="ignore", invalid="ignore"):
            unit = np.where(self.is_pipe & (length > 0), np.abs(dh) / length, np.nan)
        unsupplied_n = int((~supplied).sum())
        if converged:
            msg = (f"converged in {iterations} iterations ({trials} status trial(s)); "
                   f"mass residual {mass:.2e} m3/s, head residual {headres:.2e} m"
                   + (f"; {unsupplied_n} node(s) unsupplied" if unsupplied_n else ""))
        else:
            msg = (f"did not converge after {iterations} iterations ({trials} status trial(s)): "
                   f"largest mass imbalance {mass:.3g} m3/s at node {net.node_id[wn]}, largest "
                   f"head-loss residual {headres:.3g} m on link {net.link_id[wl]}")
        return HydraulicResult(
            head_m=head, pressure_m=pressure, demand_m3s=delivered,
            required_demand_m3s=np.asarray(demand, float).copy(), node_inflow_m3s=inflow,
            supplied=supplied, flow_m3s=q, velocity_ms=velocity, headloss_m=dh,
            unit_headloss=unit, link_state=state.copy(), iterations=iterations, trials=trials,
            mass_residual_m3s=mass, head_residual_m=headres, worst_node_idx=wn,
            worst_link_idx=wl, converged=converged, message=msg)


def smooth_sqrt_ramp(s: np.ndarray, delta: float = 0.02):
    """``sqrt(s)`` clipped to [0, 1] with its corners smoothed for Newton.

    Exact on ``[delta, 1 - delta]``; a cubic Hermite blend on ``[0, delta]`` (value and slope
    0 at 0, matching sqrt at delta) and on ``[1 - delta, 1]`` (matching sqrt at 1 - delta,
    value 1 and slope 0 at 1). Returns the value and the derivative.
    """
    s = np.asarray(s, dtype=float)
    f = np.zeros_like(s)
    df = np.zeros_like(s)
    mid = (s >= delta) & (s <= 1 - delta)
    f[mid] = np.sqrt(s[mid])
    df[mid] = 0.5 / np.sqrt(s[mid])
    f[s > 1] = 1.0
    lo = (s > 0) & (s < delta)
    if lo.any():
        f[lo], df[lo] = _hermite(s[lo], 0.0, delta, 0.0, 0.0, np.sqrt(delta),
                                 0.5 / np.sqrt(delta))
    hi = (s > 1 - delta) & (s <= 1)
    if hi.any():
        a = 1 - delta
        f[hi], df[hi] = _hermite(s[hi], a, 1.0, np.sqrt(a), 0.5 / np.sqrt(a), 1.0, 0.0)
    return f, df


def _hermite(x, x0, x1, y0, m0, y1, m1):
    hlen = x1 - x0
    t = (x - x0) / hlen
    t2, t3 = t * t, t * t * t
    h00, h10, h01, h11 = 2 * t3 - 3 * t2 + 1, t3 - 2 * t2 + t, -2 * t3 + 3 * t2, t3 - t2
    val = h00 * y0 + h10 * hlen * m0 + h01 * y1 + h11 * hlen * m1
    d00, d10, d01, d11 = 6 * t2 - 6 * t, 3 * t2 - 4 * t + 1, -6 * t2 + 6 * t, 3 * t2 - 2 * t
    der = (d00 * y0 + d10 * hlen * m0 + d01 * y1 + d11 * hlen * m1) / hlen
    return val, der


def solve(net: Network, *, options: SolveOptions | None = None,
          demand_m3s: np.ndarray | None = None, raise_on_failure: bool = True
          ) -> HydraulicResult:
    """Solve a network once. See :class:`HydraulicSystem` for repeated solves.

    Raises
    ------
    ConvergenceError, SolverError, NetworkError
    """
    if not isinstance(net, Network):
        raise NetworkError("solve() needs a gridflow Network")
    return HydraulicSystem(net, options).solve(demand_m3s=demand_m3s,
                                               raise_on_failure=raise_on_failure)



class DrawSolver:
    """Solves a network with one extra draw at a node, near a converged base state.

    Made for many nearby problems on one network (fire flow): every solve starts from the base
    solution and from a factorization of the head matrix at the base flows, kept aside; most
    iterations reuse a factorization instead of refactoring.

    Each iteration is a Newton step in correction form on the residuals at the current point,
    ``e`` (head loss minus head difference, per open link) and ``m`` (net outflow plus demand
    plus the draw, per unknown-head node)::

        (A' G~^-1 A) dH = A' G~^-1 e - m - dq 1_k,      dQ = G~^-1 (A dH - e)

    with ``G~`` the head-loss derivative of the factorized matrix (the current one after a
    refactorization), so every step keeps mass balance exactly (``A' dQ = -m - dq 1_k``).
    The first step from the base state is scaled so that head losses along it balance the
    work of the known heads (the linear step overshoots: head loss grows faster than flow).
    The draw ``dq`` at node ``k`` is found by a bordered solve with the same factorization:
    with ``x`` the solution for the first right-hand side and ``u = (A' G~^-1 A)^-1 1_k``,
    ``dH = x - dq u`` and ``dq`` is chosen so that the constrained node lands on its head
    (``k`` itself when pinned; another node ``c`` for a system-wide limit). Once a pinned
    node is on its head, later refactorizations make it a Dirichlet row instead (one
    triangular solve per step rather than two) and its balance gives the draw. With a stale
    factorization this is a quasi-Newton iteration whose fixed point is the solution (zero
    residuals); the matrix is refactored at the current point whenever the scaled residual
    shrinks by less than ``refactor_ratio`` per step, so a converged solve has the same
    residual test as :meth:`HydraulicSystem.solve`.

    Link statuses stay as in the base solution. :meth:`solve` returns ``None`` when it cannot
    answer by this route (a status would change, the node is a fixed-head node, pressure-driven
    demand, or no convergence): the caller then uses :meth:`HydraulicSystem.solve`.

    Parameters
    ----------
    system : HydraulicSystem
    base : HydraulicResult
        A converged solution of ``system.net`` with its own demand.
    refactor_ratio : float
        Refactor when the residual falls by less than this factor's inverse in one step
        (default 0: refactor every step after the first, plain Newton, which measured
        fastest on street-grid networks; 0.25 refactors unless the residual shrank 4 times).
    """

    def __init__(self, system: HydraulicSystem, base: HydraulicResult, *,
                 refactor_ratio: float = 0.0) -> None:
        self.sys = system
        self.refactor_ratio = float(refactor_ratio)
        net, opt = system.net, system.opt
        self.usable = not opt.pressure_driven and bool(base.converged)
        fr, to = system.fr, system.to
        state = np.asarray(base.link_state, dtype=np.int8).copy()
        self.state = state
        fixed = net.is_fixed.copy()
        fixed_head = np.where(fixed, net.fixed_head_m, np.nan)
        self.given_fixed = fixed.copy()
        self.given_fixed_head = fixed_head.copy()
        active = (state == ACTIVE) & system.is_prv
        self.active = active
        self.any_active = bool(active.any())
        self.prv_to = to[active]
        fixed[self.prv_to] = True
        fixed_head[self.prv_to] = system.prv_head[active]
        supplied = system._supplied(state, fixed)
        self.supplied = supplied
        dirichlet = fixed | ~supplied
        self.dirichlet = dirichlet
        self.free_f = (~dirichlet).astype(float)
        conducting = (state == OPEN) & supplied[fr] & supplied[to]
        self.conducting = conducting
        self.cond_f = conducting.astype(float)
        self._all_conducting = bool(conducting.all())
        always_closed = np.zeros(system.nl, dtype=bool)
        always_closed[net.status == STATUS_CLOSED] = True
        always_closed[system.is_pump & ~system.pump_on] = True
        self.always_closed = always_closed & ~system.is_cv
        #: check valves, running pumps or pressure-reducing valves: statuses are checked
        self.may_change_status = bool((system.is_cv | system.pump_on | system.is_prv).any())
        self.demand = np.asarray(net.demand_m3s, float)
        h0 = np.where(supplied, np.nan_to_num(base.head_m), 0.0)
        h0[fixed] = fixed_head[fixed]
        self.h0 = h0
        self.q0 = np.where(conducting | active, base.flow_m3s, 0.0)
        # the off-diagonal of a free-free pair only; Dirichlet rows are identity rows
        self.off_mask = self.free_f[fr] * self.free_f[to]
        # all-pipe Hazen-Williams networks without minor losses: one power law over all links
        self._plain_hw = (not system.dw and bool(system.is_pipe.all())
                          and not bool((system.m_minor > 0).any()))
        self._token = 0
        self._u: dict = {}
        self._w: dict = {}
        self._pinned: dict = {}
        if self.usable:
            self._factor(self.q0, "base")

    # ------------------------------------------------------------------ pieces
    def _headloss(self, q):
        s = self.sys
        if self._plain_hw:
            # power_law's regularised law, written with fewer temporaries:
            # h = r q (q^2 + eps^2)^a, dh/dq = r (q^2 + eps^2)^(a-1) (eps^2 + n q^2)
            q2 = q * q
            ss = q2 + EPS_FLOW * EPS_FLOW
            sa = np.power(ss, 0.5 * (HW_EXPONENT - 1.0))
            rsa = s.r_hw * sa
            h = rsa * q
            q2 *= HW_EXPONENT
            q2 += EPS_FLOW * EPS_FLOW
            rsa /= ss
            rsa *= q2
            np.maximum(rsa, G_FLOOR, out=rsa)
            return h, rsa
        return s.link_headloss(q)

    def _factor(self, q, slot, g=None, pin=-1):
        """Factorize at flows ``q`` into ``slot`` (``g``: the head-loss derivative at ``q``
        if known; ``pin``: a node made a Dirichlet row too); returns the token."""
        s = self.sys
        pat = s.pattern
        if g is None:
            _, g = self._headloss(q)
        w = self.cond_f / g
        dirichlet, off_mask = self.dirichlet, self.off_mask
        if pin >= 0:
            dirichlet = dirichlet.copy()
            dirichlet[pin] = True
            off_mask = off_mask * ((s.fr != pin) & (s.to != pin))
        fr, to, nn = s.fr, s.to, s.nn
        diag = np.bincount(fr, weights=w, minlength=nn) + np.bincount(to, weights=w,
                                                                      minlength=nn)
        if pat.unique_off:
            data = np.zeros(pat.nnz)
            data[pat.off_pos] = -w * off_mask
        else:
            data = np.bincount(pat.off_pos, weights=-w * off_mask, minlength=pat.nnz)
        data[pat.diag_pos] = np.where(dirichlet, 1.0, diag)
        pat.factor(data, slot)
        self._w[slot] = w
        self._pinned[slot] = pin
        if slot == "base":
            return "base"
        self._token += 1
        return f"work{self._token}"

    def _unit(self, tok, k):
        """``u = S^-1 1_k`` for the factorization ``tok`` (kept while it is current)."""
        u = self._u.get((tok, k))
        if u is None:
            if len(self._u) > 4:
                for key in [key for key in self._u if key[0] != "base"]:
                    del self._u[key]
            e = np.zeros(self.sys.nn)
            e[k] = 1.0
            u = self.sys.pattern.solve(e, "base" if tok == "base" else "work")
            self._u[(tok, k)] = u
        return u

    def _energy_scale(self, q, dflow, h, dh, k, c, target, fr, to) -> float:
        """Step length ``a`` in (0, 1] along the flow change ``dflow`` from ``q``.

        Along ``q + a dflow`` the head losses weighted by ``dflow`` must add up to the work of
        the known heads (fixed-head nodes and the constrained node): ``phi(a) = sum dflow_l
        h_l(q + a dflow) - dflow' A H`` with ``dflow' A H`` depending on the known heads only
        (the change satisfies mass balance at every other node). ``phi`` increases with ``a``;
        a few Newton steps from ``a = 1`` find its root.
        """
        sel = np.abs(dflow) > 1e-9 * max(float(np.max(np.abs(dflow))), 1e-300)
        dfs = dflow[sel]
        qs = q[sel]
        hn = h + dh  # the linear step: its head differences give the known work exactly
        # plain sums, not BLAS dot products: those can stall on a busy machine (thread sync)
        work = float(np.sum(dfs * (hn[fr[sel]] - hn[to[sel]])))
        a = 1.0
        for _ in range(8):
            hl, g = self._headloss_sel(qs + a * dfs, sel)
            phi = float(np.sum(dfs * hl)) - work
            dphi = float(np.sum(dfs * dfs * g))
            if not dphi > 0:
                return 1.0
            step = phi / dphi
            a_new = min(1.0, max(0.05 * a, a - step))
            if abs(a_new - a) <= 1e-3 * a:
                a = a_new
                break
            a = a_new
        return a

    def _headloss_sel(self, q, sel):
        s = self.sys
        if self._plain_hw:
            h, g = power_law(q, s.r_hw[sel], HW_EXPONENT)
            return h, np.maximum(g, G_FLOOR)
        qq = np.zeros(s.nl)
        qq[sel] = q
        h, g = s.link_headloss(qq)
        return h[sel], g[sel]

    def blend(self, result: HydraulicResult, t: float) -> HydraulicResult:
        """A start state ``t`` of the way from the base state to ``result`` (a result of this
        solver): flows and draw scaled linearly (mass balance holds for draw ``t`` times
        the result's), head drops by ``t^1.852`` (Hazen-Williams). For :meth:`solve`'s
        ``start``; its factorization is made at the blended flows."""
        t = float(t)
        q = self.q0 + t * (result.flow_m3s - self.q0)
        h = self.h0 + t ** HW_EXPONENT * (np.nan_to_num(result.head_m) - self.h0)
        return dataclasses.replace(result, flow_m3s=q, head_m=h, extra={
            "draw_m3s": t * float(result.extra["draw_m3s"]), "factor_token": None})

    # ------------------------------------------------------------------ the solve
    def solve(self, node: int, *, head_m: float | None = None, draw_m3s: float | None = None,
              limit_node: int | None = None, limit_head_m: float | None = None,
              start: HydraulicResult | None = None) -> HydraulicResult | None:
        """Solve with an extra draw at ``node``: exactly one of three kinds.

        - ``head_m``: the node's head is fixed; the draw is what it takes.
        - ``draw_m3s``: the draw is given [m3/s] (added to the node's demand).
        - ``limit_node`` and ``limit_head_m``: the draw is what puts ``limit_node`` at
          ``limit_head_m`` (e.g. the lowest node of a zone at the system minimum).

        ``start``: a result of this solver to start from (default the base state).
        Returns a :class:`HydraulicResult` whose ``extra["draw_m3s"]`` is the draw and whose
        ``node_inflow_m3s[node] - demand_m3s[node]`` is the draw too, or ``None`` when this
        route cannot answer (see the class notes).
        """
        if not self.usable:
            return None
        t0 = time.perf_counter()
        s, opt = self.sys, self.sys.opt
        pat = s.pattern
        f0 = pat.factorizations
        k = int(node)
        mode = ("pin" if head_m is not None else "draw" if draw_m3s is not None else "limit")
        c = k if mode == "pin" else (int(limit_node) if limit_node is not None else -1)
        if mode == "pin":
            target = float(head_m)  # type: ignore[arg-type]  # set in this mode
        elif mode == "limit" and limit_head_m is not None:
            target = float(limit_head_m)
        else:
            target = np.nan
        if self.dirichlet[k] or (c >= 0 and self.dirichlet[c]):
            return None
        fr, to, nn = s.fr, s.to, s.nn
        cond_f, free_f, demand = self.cond_f, self.free_f, self.demand
        if start is None:
            q, h, draw, tok = self.q0.copy(), self.h0.copy(), 0.0, "base"
        else:
            q, h = start.flow_m3s.copy(), np.nan_to_num(start.head_m)
            draw, tok = float(start.extra["draw_m3s"]), start.extra["factor_token"]
            pinned = self._pinned.get("work", -1)
            fits = pinned == -1 or (mode == "pin" and pinned == k and h[k] == target)
            if tok != "base" and (tok != f"work{self._token}" or not fits):
                tok = self._factor(q, "work")
        if mode == "draw":
            draw = float(draw_m3s)  # type: ignore[arg-type]  # set in this mode
        slot = "base" if tok == "base" else "work"
        into_k, outof_k = np.flatnonzero(to == k), np.flatnonzero(fr == k)
        ftol, htol = opt.flow_tolerance, opt.head_tolerance
        converged = False
        prev = np.inf
        fresh = start is None  # the base factorization is the Jacobian at the base state
        it = 0
        for it in range(opt.max_iter + 1):
            hl, g = self._headloss(q)
            e = hl - (h[fr] - h[to])
            if not self._all_conducting:
                e *= cond_f
            m = (np.bincount(fr, weights=q, minlength=nn)
                 - np.bincount(to, weights=q, minlength=nn) + demand)
            m[k] += draw
            m *= free_f
            mass = float(np.max(np.abs(m)))
            head = float(np.max(np.abs(e)))
            off = 0.0 if mode != "pin" else abs(h[k] - target)
            if mass <= ftol and head <= htol and off <= htol and it > 0:
                converged = True
                break
            if it == opt.max_iter:
                break
            score = max(mass / ftol, head / htol)
            if not fresh and it > 0 and score > self.refactor_ratio * prev:
                # a pinned node already on its head becomes a Dirichlet row of the new
                # matrix (no bordered solve); its balance then gives the draw
                pin = k if mode == "pin" and h[k] == target else -1
                tok = self._factor(q, "work", g=g, pin=pin)
                slot = "work"
            fresh = False
            prev = score
            w = self._w[slot]
            we = w * e
            rhs = (np.bincount(fr, weights=we, minlength=nn)
                   - np.bincount(to, weights=we, minlength=nn) - m) * free_f
            pinned = self._pinned[slot]
            if pinned >= 0:
                rhs[pinned] = 0.0
            x = pat.solve(rhs, slot)
            if mode == "draw" or pinned == k:
                dh = x
                dq = 0.0
            else:
                u = self._unit(tok, k)
                dq = (x[c] - (target - h[c])) / u[c]
                dh = x - dq * u
            dflow = w * (dh[fr] - dh[to])
            dflow -= we
            if it == 0 and start is None and mode != "draw" and not self.any_active:
                # from the base state the linear step overshoots the draw (the head loss
                # grows faster than linearly): scale the step to balance energy along it
                a = self._energy_scale(q, dflow, h, dh, k, c, target, fr, to)
                dflow *= a
                dh = dh * a
                dq *= a
                if c >= 0:
                    dh[c] = target - h[c]
            q = q + dflow
            h = h + dh
            draw += dq
            if pinned == k:
                draw = float(np.sum(q[into_k]) - np.sum(q[outof_k]) - demand[k])
            if self.any_active:
                q[self.active] = 0.0
                need = (np.bincount(fr, weights=q, minlength=nn)
                        - np.bincount(to, weights=q, minlength=nn) + demand)
                need[k] += draw
                q[self.active] = need[self.prv_to]
        if not converged:
            return None
        if self.may_change_status:
            state = self.state.copy()
            if s._update_status(state, q, h, self.always_closed, self.supplied):
                return None
        fixed = self.given_fixed.copy()
        fixed[k] = True
        # the head losses at the final flows were computed for the convergence test
        res = s._result(q, h, self.state, fixed, self.given_fixed_head, demand, self.supplied,
                        it, 1, True, hl=hl if self._plain_hw else None)
        res.seconds = time.perf_counter() - t0
        res.factorizations = pat.factorizations - f0
        res.extra = {"draw_m3s": draw, "factor_token": tok}
        return res
