"""Steady-state hydraulics by the global gradient algorithm.

Unknowns are link flows ``Q`` and node heads ``H``. With the link-node incidence ``A``
(+1 at a link's from node, -1 at its to node) split into unknown-head columns ``A12`` and
fixed-head columns ``A10``, each Newton step solves one sparse symmetric positive definite
system for the new heads and then updates the flows (Todini and Pilati, 1988)::

    (A12' G^-1 A12) H = -A12' (Q - G^-1 h(Q)) - A12' G^-1 A10 H0 - d
    Q_new = Q - G^-1 h(Q) + G^-1 (A12 H + A10 H0)

with ``h(Q)`` the head loss of each link in the direction of positive flow and ``G = dh/dQ``
(:mod:`gridflow.hydraulics.assembly` builds the matrix on a fixed pattern).

Device statuses (:mod:`gridflow.hydraulics.status`) are settled in status rounds: converge
with the statuses fixed, change those whose conditions say so, converge again. A status set
seen before is a status cycle: the links that flip are held shut once and the solve says so;
if the cycle persists the scenario does not converge (status ``status_cycle``).

Convergence: both residuals below tolerance,

    max_i |sum_out Q - sum_in Q + d_i| <= max(flow_tolerance, mass_relative_tolerance * F)
    max_l |h_l(Q_l) - (H_from - H_to)| <= head_tolerance

with ``F`` the larger of the largest link flow and the total demand. When the residuals stop
falling (the scaled residual has not halved in ``STALL_ITERATIONS`` iterations) the solve
stops: accepted as ``at_precision_floor`` when the mass residual is within the precision
floor ``PRECISION_FACTOR * eps * (max w * max|H| + max|Q|)`` (``w = 1/G``: the flow error a
rounding of the heads makes) and the head residual within ``max(head_tolerance,
PRECISION_FACTOR * eps * max|H|)``; ``stalled`` (not converged, naming the worst node and link)
when the plateau lies within ``STALL_SPAN`` times those bounds; farther above them the
residuals are still on their way (slow progress is not a plateau) and iterations go on.

Size: about 500 lines on purpose: the Newton iteration, its line search, the status rounds and
the result they build share the system's kept state (pattern, ordering, factorization); what
stands alone is already in ``assembly``, ``status``, ``regulating``, ``pdd`` and ``results``.
"""

from __future__ import annotations

import time

import numpy as np

from gridflow.errors import ConvergenceError, NetworkError, SolverError
from gridflow.hydraulics.assembly import (
    Residuals,
    checked_sets,
    head_matrix,
    net_outflow,
    residuals,
)
from gridflow.hydraulics.links import LinkLaws
from gridflow.hydraulics.pdd import delivered_share
from gridflow.hydraulics.results import (
    CLOSED,
    OPEN,
    REGULATING,
    HydraulicResult,
    SolveOptions,
)
from gridflow.hydraulics.sparse import FixedPatternSPD
from gridflow.hydraulics.status import Components, ShutZone, shut_zones, update_status
from gridflow.network.model import Network

__all__ = ["HydraulicSystem", "solve", "STATUS_CHECK_EVERY", "STALL_ITERATIONS",
           "PRECISION_FACTOR"]

#: statuses are also checked every this many Newton iterations before convergence
STATUS_CHECK_EVERY = 10
#: the residuals have stalled when the scaled residual has not halved in this many iterations
STALL_ITERATIONS = 8
#: the precision floor in units of machine epsilon times the scale of heads and flows
PRECISION_FACTOR = 64.0
#: a plateau within this factor of the precision floor is a stall; farther away the residuals
#: are still on their way (pressure-driven demand can progress slowly) and iterations go on
STALL_SPAN = 1e3
_EPS = float(np.finfo(float).eps)


class HydraulicSystem:
    """A network prepared for repeated solves: the sparse pattern and ordering are built once.

    Parameters
    ----------
    net : Network
    options : SolveOptions, optional
    share : HydraulicSystem, optional
        A system of a network with the same links between the same nodes (another scenario):
        its sparsity pattern, ordering and symbolic factorization are reused, and its
        connected components (kept per set of conducting links).

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
        self.nn, self.nl = net.n_nodes, net.n_links
        self.fr = net.from_idx
        self.to = net.to_idx
        self.pattern: FixedPatternSPD
        self.components: Components
        if share is not None and share.shares_pattern_with(net, self.opt):
            self.pattern = share.pattern
            # the same links between the same nodes: connected components by link set too
            self.components = share.components
        else:
            self.pattern = FixedPatternSPD(self.nn, self.fr, self.to, backend=self.opt.backend)
            self.components = Components(self.nn, self.fr, self.to)
        self.laws = LinkLaws(net)

    def shares_pattern_with(self, net: Network, options: SolveOptions) -> bool:
        """True if ``net`` has this system's sparsity pattern (scenarios of one network)."""
        return (options.backend == self.opt.backend and net.n_nodes == self.nn
                and (net.from_idx is self.fr or np.array_equal(net.from_idx, self.fr))
                and (net.to_idx is self.to or np.array_equal(net.to_idx, self.to)))

    # ------------------------------------------------------------------ public pieces
    def link_headloss(self, q: np.ndarray):
        """Head loss ``H_from - H_to`` of every link at flows ``q`` and its derivative."""
        return self.laws.headloss(q)

    @property
    def always_closed(self) -> np.ndarray:
        """Links shut whatever the heads (closed in the input; a check valve may still open)."""
        return self.laws.given_closed & ~self.laws.is_check

    def held_nodes(self, state: np.ndarray, fixed: np.ndarray,
                   fixed_head: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Known heads under ``state``: ``fixed`` plus the downstream nodes of regulating
        valves at their settings."""
        fixed = fixed.copy()
        fixed_head = fixed_head.copy()
        reg = (state == REGULATING) & self.laws.is_prv
        fixed[self.to[reg]] = True
        fixed_head[self.to[reg]] = self.laws.prv_head[reg]
        return fixed, fixed_head

    def supplied(self, state: np.ndarray, fixed: np.ndarray) -> np.ndarray:
        """Nodes connected through open links to a node of known head (``fixed`` must include
        the nodes regulating valves hold)."""
        return self.components.reached(state == OPEN, fixed)

    def statuses_hold(self, state: np.ndarray, q: np.ndarray, h: np.ndarray,
                      supplied: np.ndarray, fixed: np.ndarray) -> bool:
        """True if no device would change status at ``(q, h)``."""
        probe = state.copy()
        return not update_status(self.laws, probe, q, h, supplied, fixed, self.always_closed,
                                 self.components, tol=self.opt.status_tolerance,
                                 qtol=self.opt.flow_tolerance)

    def delivered(self, h: np.ndarray, demand: np.ndarray, supplied: np.ndarray) -> np.ndarray:
        """Demand delivered at heads ``h`` (all of it, or by pressure), zero where unsupplied."""
        if self.opt.pressure_driven:
            d = delivered_share(h - self.net.elevation_m, demand, self.opt.pdd_min_pressure,
                                self.opt.pdd_required_pressure)[0]
        else:
            d = np.asarray(demand, float)
        return np.where(supplied, d, 0.0)

    def residuals(self, result: HydraulicResult, *, fixed: np.ndarray | None = None
                  ) -> Residuals:
        """Mass and head-loss residuals of a result, on the values it holds."""
        fixed = self.net.is_fixed if fixed is None else fixed
        free, conducting = checked_sets(result.link_state, result.supplied, fixed, self.fr,
                                        self.to, self.laws.is_prv)
        return residuals(self.laws.headloss, result.flow_m3s, result.head_m, fr=self.fr,
                         to=self.to, free=free, conducting=conducting,
                         delivered=result.demand_m3s)

    def mass_tolerance(self, q: np.ndarray, demand: np.ndarray, *,
                       demand_total: float | None = None) -> float:
        """``max(flow_tolerance, mass_relative_tolerance * F)`` (``demand_total``: the sum of
        ``|demand|`` if already known)."""
        if demand_total is None:
            demand_total = float(np.sum(np.abs(demand)))
        scale = max(float(np.max(np.abs(q), initial=0.0)), demand_total)
        return max(self.opt.flow_tolerance, self.opt.mass_relative_tolerance * scale)

    def shut_zones(self, result: HydraulicResult) -> list[ShutZone]:
        """Zones the input connects to a fixed head but the result leaves dry, with the shut
        devices that cut them off."""
        return shut_zones(self.laws, result.link_state, result.supplied,
                          result.required_demand_m3s, self.components)

    def initial_state(self, fixed: np.ndarray) -> np.ndarray:
        """Statuses to start from: as given; pressure-reducing valves regulating (open where
        they discharge into a fixed head, which they cannot hold)."""
        laws = self.laws
        state = np.zeros(self.nl, dtype=np.int8)
        state[laws.given_closed] = CLOSED
        reg = laws.is_prv & ~laws.given_closed
        state[reg] = REGULATING
        state[reg & fixed[self.to]] = OPEN
        return state

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
        always_closed = self.always_closed.copy()
        state = self.initial_state(fixed)
        if warm is not None:
            q = warm.flow_m3s.copy()
            h_now = np.where(np.isfinite(warm.head_m), warm.head_m, np.nanmax(fixed_head))
            state = np.where(always_closed, CLOSED, warm.link_state).astype(np.int8)
        else:
            q = self._initial_flows()
            h_now = np.full(self.nn, np.nanmax(fixed_head[fixed]))
        h_now[fixed] = fixed_head[fixed]

        seen: set[bytes] = set()
        iterations = rounds = holds = 0
        held = np.zeros(self.nl, dtype=bool)
        cycle = np.zeros(self.nl, dtype=bool)
        status = "iteration_limit"
        track = {"ref": np.inf, "since": 0}
        supplied = np.ones(self.nn, dtype=bool)
        while iterations < opt.max_iter:
            chunk = min(STATUS_CHECK_EVERY, opt.max_iter - iterations)
            q, h_now, it, nstat, supplied, held_fixed = self._newton(
                q, h_now, state, fixed, fixed_head, demand, chunk, track)
            iterations += it
            done = nstat in ("converged", "at_precision_floor")
            old = state.copy()
            changed = update_status(self.laws, state, q, h_now, supplied, held_fixed,
                                    always_closed, self.components,
                                    tol=opt.status_tolerance, qtol=opt.flow_tolerance)
            if not changed:
                if done or nstat == "stalled":
                    status = nstat
                    break
                continue  # not there yet under these statuses: keep iterating
            rounds += 1
            track = {"ref": np.inf, "since": 0}
            if done:
                key = state.tobytes()
                if key in seen:
                    flip = state != old
                    cycle |= flip
                    if holds >= 3:
                        status = "status_cycle"
                        break
                    # a status cycle between converged states: the links that flip sit at a
                    # boundary (zero flow); hold them shut and converge once more
                    state[flip] = CLOSED
                    always_closed |= flip
                    held |= flip
                    holds += 1
                    seen.clear()
                seen.add(key)
            if rounds >= opt.max_status_rounds:
                status = "status_round_limit"
                break
        rounds = max(rounds, 1)
        result = self._result(q, h_now, state, fixed, fixed_head, demand, supplied,
                              iterations, rounds, status)
        if held.any() and result.converged:
            ids = ", ".join(map(str, net.link_id[held][:5]))
            result.message += f"; status cycle: held shut {ids}"
            result.extra["held_closed"] = list(net.link_id[held])
        if cycle.any():
            result.extra["status_cycle"] = list(net.link_id[cycle])
        result.seconds = time.perf_counter() - t0
        result.factorizations = self.pattern.factorizations - f0
        if not result.converged and raise_on_failure:
            raise ConvergenceError(result.message, node_id=net.node_id[result.worst_node_idx],
                                   link_id=net.link_id[result.worst_link_idx], result=result)
        return result

    def _initial_flows(self) -> np.ndarray:
        # 0.3 m/s in pipes and valves; pumps where they add half their shut-off head
        q = 0.3 * self.laws.area
        pu = self.laws.pump_on
        if pu.any():
            q[pu] = self.laws.pump_flow_at_half_shutoff()[pu]
        return q

    def _newton(self, q, h_now, state, fixed_given, fixed_head_given, demand, max_iter, track):
        """Newton iterations with statuses fixed.

        Returns q, h, iterations, status (``converged``, ``at_precision_floor``, ``stalled``
        or ``running``), supplied nodes and the nodes of known head.
        """
        from gridflow.hydraulics.regulating import regulating_flows

        opt = self.opt
        nn = self.nn
        fr, to = self.fr, self.to
        pat = self.pattern
        laws = self.laws
        fixed, fixed_head = self.held_nodes(state, fixed_given, fixed_head_given)
        regulating = (state == REGULATING) & laws.is_prv
        supplied = self.supplied(state, fixed)
        known = fixed | ~supplied
        free = ~known
        h = h_now.copy()
        h[fixed] = fixed_head[fixed]
        h[~supplied] = 0.0
        conducting = (state == OPEN) & supplied[fr] & supplied[to]
        q = np.where(conducting | regulating, q, 0.0)
        pdd = opt.pressure_driven
        elev = self.net.elevation_m
        hl, g = laws.headloss(q)
        cond_f = conducting.astype(float)
        any_reg = bool(regulating.any())
        free_chk = free.copy()
        data = np.zeros(pat.nnz)
        # what stays the same through these iterations: the ends' freedom, the total demand,
        # and (demand-driven) the demand delivered
        free_ends = (free[fr].astype(float), free[to].astype(float))
        demand_total = float(np.sum(np.abs(demand)))
        fixed_delivered = None if pdd else self.delivered(h, demand, supplied)
        status = "running"
        # head-loss gap hl - (H_from - H_to) and the links' net outflow per node at (q, h):
        # made for the residuals of one iteration, used again by the next one's assembly
        # (the outflow only where flows are zero off the conducting links, so that
        # cond_f * q is q: no regulating valve sets its own flow)
        with np.errstate(invalid="ignore"):
            gap = hl - (h[fr] - h[to])
        outflow = None
        it = 0
        for it in range(1, max_iter + 1):
            # Newton in correction form: the head change dH, not the heads, is solved for, so
            # rounding scales with the change (small near the solution), not with the heads
            w = cond_f / g
            we = w * (cond_f * gap)
            if outflow is None:
                outflow = net_outflow(cond_f * q, fr, to, nn)
            extra = None
            if pdd:
                dq, ddq = delivered_share(h - elev, demand, opt.pdd_min_pressure,
                                          opt.pdd_required_pressure)
                extra = np.where(free, ddq, 0.0)
                m = outflow + dq
            else:
                m = outflow + demand
            rhs = (np.bincount(fr, weights=we, minlength=nn)
                   - np.bincount(to, weights=we, minlength=nn) - m)
            data = head_matrix(pat, fr, to, w, known, extra, out=data, free_ends=free_ends)
            rhs = np.where(known, 0.0, rhs)
            pat.factor(data)
            dh = pat.solve(rhs)
            dh[known] = 0.0
            if any_reg:
                y = cond_f * q - w * hl
                q_reg, shift = regulating_flows(self, h + dh, y, w, conducting, regulating,
                                                known, demand, elev, pdd, h)
                dh = dh - shift
            q_new = np.where(conducting, q - we + w * (dh[fr] - dh[to]), 0.0)
            h_new = h + dh
            if any_reg:
                q_new[regulating] = q_reg
            if pdd:
                q_new, h_new = self._backtrack(q, h, q_new, h_new, free, conducting, demand,
                                               w)
            h, q = h_new, q_new
            hl, g = laws.headloss(q)  # reused by the next iteration's assembly
            with np.errstate(invalid="ignore"):
                gap = hl - (h[fr] - h[to])
            flows_out = net_outflow(q, fr, to, nn)
            outflow = None if any_reg else flows_out
            delivered = (fixed_delivered if fixed_delivered is not None
                         else self.delivered(h, demand, supplied))
            res = residuals(laws.headloss, q, h, fr=fr, to=to, free=free_chk,
                            conducting=conducting, delivered=delivered, hl=hl,
                            outflow=flows_out, gap=gap)
            mtol = self.mass_tolerance(q, demand, demand_total=demand_total)
            if res.max_mass <= mtol and res.max_error <= opt.head_tolerance and it > 1:
                status = "converged"
                break
            score = max(res.max_mass / mtol, res.max_error / opt.head_tolerance)
            if score < 0.5 * track["ref"]:
                track["ref"], track["since"] = score, 0
            else:
                track["since"] += 1
            if track["since"] >= STALL_ITERATIONS:
                hmax = float(np.max(np.abs(h[supplied]), initial=1.0))
                wmax = float(np.max(w, initial=0.0))
                qmax = float(np.max(np.abs(q), initial=0.0))
                mass_floor = PRECISION_FACTOR * _EPS * (wmax * hmax + qmax)
                head_floor = max(opt.head_tolerance, PRECISION_FACTOR * _EPS * hmax)
                mlim, hlim = max(mtol, mass_floor), head_floor
                if res.max_mass <= mlim and res.max_error <= hlim:
                    status = "at_precision_floor"
                    break
                if (res.max_mass <= STALL_SPAN * mlim and res.max_error <= STALL_SPAN * hlim):
                    status = "stalled"  # a plateau just above the floor: it will not get there
                    break
                track["since"] = 0  # far from the floor: slow progress, not a plateau

        return q, h, it, status, supplied, fixed

    def _merit(self, q, h, free, conducting, demand, w):
        """Sum of squared residuals in flow units: mass imbalance and G^-1 times head error."""
        out = net_outflow(q, self.fr, self.to, self.nn,
                          self.delivered(h, demand, np.ones(self.nn, dtype=bool)))
        imb = out[free]
        hl, _ = self.laws.headloss(q)
        e = np.where(conducting, (hl - (h[self.fr] - h[self.to])) * w, 0.0)
        return float(imb @ imb + e @ e)

    def _backtrack(self, q, h, q_new, h_new, free, conducting, demand, w):
        """The longest step (1, 1/2, 1/4 ...) that lowers the merit; failing that, the step
        with the lowest merit tried."""
        phi0 = self._merit(q, h, free, conducting, demand, w)
        alpha = 1.0
        best = (np.inf, q_new, h_new)
        for _ in range(10):
            qa = q + alpha * (q_new - q)
            ha = h + alpha * (h_new - h)
            phi = self._merit(qa, ha, free, conducting, demand, w)
            if phi < phi0:
                return qa, ha
            if phi < best[0]:
                best = (phi, qa, ha)
            alpha *= 0.5
        return best[1], best[2]

    def make_result(self, q, h, state, fixed, demand, supplied, *, iterations: int,
                    status_rounds: int, status: str, hl=None) -> HydraulicResult:
        """A :class:`HydraulicResult` of flows ``q`` and heads ``h`` under ``state``
        (``fixed``: the nodes of given head, without those regulating valves hold)."""
        net = self.net
        fr, to = self.fr, self.to
        laws = self.laws
        elev = net.elevation_m
        regulating = (state == REGULATING) & laws.is_prv
        head = np.where(supplied, h, np.nan)
        delivered = self.delivered(h, demand, supplied)
        free, conducting = checked_sets(state, supplied, fixed, fr, to, laws.is_prv)
        if hl is None:
            hl = laws.headloss(q)[0]
        res = residuals(laws.headloss, q, head, fr=fr, to=to, free=free, conducting=conducting,
                        delivered=delivered, hl=hl)
        inflow = -net_outflow(q, fr, to, self.nn)
        dh = np.where(conducting | regulating, head[fr] - head[to], np.nan)
        finite = bool(np.isfinite(head[supplied]).all() and np.isfinite(q).all())
        if not finite:
            status = "not_finite"
        converged = status in ("converged", "at_precision_floor")
        velocity = np.where(laws.is_pump, np.nan, q / laws.area)
        length = net.length_m
        with np.errstate(divide="ignore", invalid="ignore"):
            unit = np.where(laws.is_pipe & (length > 0), np.abs(dh) / length, np.nan)
        mtol = self.mass_tolerance(q, demand)
        wn, wl = res.worst_node, res.worst_link
        mass, headres = res.max_mass, res.max_error
        rounds = f"{status_rounds} status round(s)"
        if converged:
            short = float(np.sum(demand) - np.sum(delivered))
            dry = int((~supplied).sum())
            how = ("converged" if status == "converged" else
                   "stopped at the precision floor (residuals no longer falling)")
            msg = (f"{how} in {iterations} iterations ({rounds}); mass residual {mass:.2e} m3/s "
                   f"(tolerance {mtol:.1e}), head residual {headres:.2e} m; "
                   f"{dry} node(s) unsupplied, {max(short, 0.0) * 1000:.3g} L/s of demand not "
                   "delivered")
        else:
            why = {"stalled": "residuals stopped falling above the precision floor",
                   "iteration_limit": "iteration limit reached",
                   "status_cycle": "device statuses cycle",
                   "status_round_limit": "status round limit reached",
                   "not_finite": "heads or flows not finite"}.get(status, status)
            msg = (f"did not converge ({why}) after {iterations} iterations ({rounds}): "
                   f"largest mass imbalance {mass:.3g} m3/s at node {net.node_id[wn]}, largest "
                   f"head-loss residual {headres:.3g} m on link {net.link_id[wl]}")
        return HydraulicResult(
            head_m=head, pressure_m=head - elev, demand_m3s=delivered,
            required_demand_m3s=np.asarray(demand, float).copy(), node_inflow_m3s=inflow,
            supplied=supplied, flow_m3s=q, velocity_ms=velocity, headloss_m=dh,
            unit_headloss=unit, link_state=state.copy(), iterations=iterations,
            status_rounds=status_rounds, mass_residual_m3s=mass, head_residual_m=headres,
            worst_node_idx=wn, worst_link_idx=wl, converged=converged, status=status,
            mass_tolerance_m3s=mtol, message=msg)

    def _result(self, q, h, state, fixed, fixed_head, demand, supplied, iterations, rounds,
                status):
        fixed_all, _ = self.held_nodes(state, fixed, fixed_head)
        supplied = self.supplied(state, fixed_all)
        return self.make_result(q, h, state, fixed, demand, supplied, iterations=iterations,
                                status_rounds=rounds, status=status)


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
