"""Many nearby solves with one extra draw at a node (fire flow), from a converged base state.

Built on :class:`gridflow.hydraulics.HydraulicSystem`'s public interface: its link laws, the
shared head-matrix assembly and residuals (:mod:`gridflow.hydraulics.assembly`), its supplied
nodes, status check and result making.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from gridflow.hydraulics.assembly import checked_sets
from gridflow.hydraulics.headloss import EPS_FLOW, HW_EXPONENT
from gridflow.hydraulics.links import G_FLOOR
from gridflow.hydraulics.results import (
    DRAW_MODES,
    REGULATING,
    DrawOutcome,
    HydraulicResult,
)
from gridflow.hydraulics.system import HydraulicSystem

__all__ = ["DrawSolver"]


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

    Link statuses stay as in the base solution. :meth:`solve` returns a :class:`DrawOutcome`;
    when this route cannot answer (a status would change, the node is a fixed-head node,
    pressure-driven demand, or no convergence) its ``success`` is False, its ``status`` and
    ``message`` say why, and the caller uses :meth:`HydraulicSystem.solve`.

    Parameters
    ----------
    system : HydraulicSystem
    base : HydraulicResult
        A converged solution of ``system.net`` with its own demand.
    factor : bool
        Factorize at the base state now (default); else on :meth:`ensure_factor`.
    refactor_ratio : float
        Refactor when the residual falls by less than this factor's inverse in one step
        (default 0: refactor every step after the first, plain Newton, which measured
        fastest on street-grid networks; 0.25 refactors unless the residual shrank 4 times).
    """

    def __init__(self, system: HydraulicSystem, base: HydraulicResult, *,
                 refactor_ratio: float = 0.0, factor: bool = True) -> None:
        self.sys = system
        self.refactor_ratio = float(refactor_ratio)
        net, opt = system.net, system.opt
        laws = system.laws
        self.usable = not opt.pressure_driven and bool(base.converged)
        self.why_not = ("pressure-driven demand" if opt.pressure_driven else
                        "the base solution did not converge")
        fr, to = system.fr, system.to
        state = np.asarray(base.link_state, dtype=np.int8).copy()
        self.state = state
        self.given_fixed = net.is_fixed.copy()
        self.given_fixed_head = np.where(self.given_fixed, net.fixed_head_m, np.nan)
        fixed, fixed_head = system.held_nodes(state, self.given_fixed, self.given_fixed_head)
        regulating = (state == REGULATING) & laws.is_prv
        self.regulating = regulating
        self.any_regulating = bool(regulating.any())
        self.prv_to = to[regulating]
        self.held_fixed = fixed
        supplied = system.supplied(state, fixed)
        self.supplied = supplied
        dirichlet = fixed | ~supplied
        self.dirichlet = dirichlet
        self.free = ~dirichlet
        self.free_f = self.free.astype(float)
        _, conducting = checked_sets(state, supplied, fixed, fr, to, laws.is_prv)
        self.conducting = conducting
        self.cond_f = conducting.astype(float)
        # the head matrix's masks per link, for the base Dirichlet rows (see _factor)
        free_fr, free_to = self.free[fr], self.free[to]
        self._free_fr = free_fr.astype(float)
        self._free_to = free_to.astype(float)
        self._both_free = (free_fr & free_to).astype(float)
        self._known_diag = np.flatnonzero(dirichlet)
        self._links_at: dict = {}
        #: check valves, running pumps or pressure-reducing valves: statuses are checked
        self.may_change_status = bool(laws.is_device.any())
        self.demand = np.asarray(net.demand_m3s, float)
        h0 = np.where(supplied, np.nan_to_num(base.head_m), 0.0)
        h0[fixed] = fixed_head[fixed]
        self.h0 = h0
        self.q0 = np.where(conducting | regulating, base.flow_m3s, 0.0)
        # Hazen-Williams networks without pumps: one fused law over all links (the friction
        # resistance is zero on valves, the minor-loss coefficient zero where there is none)
        self._fused = not laws.dw and not bool(laws.pump_on.any())
        self._r = laws.r_hw
        self._m = laws.m_minor if bool((laws.m_minor > 0).any()) else None
        self._token = 0
        self._u: dict = {}
        self._w: dict = {}
        self._pinned: dict = {}
        self._base_factored = False
        if self.usable and factor:
            self.ensure_factor()

    def ensure_factor(self) -> None:
        """Factorize the head matrix at the base flows (once; the constructor does it unless
        told ``factor=False``)."""
        if self.usable and not self._base_factored:
            self._factor(self.q0, "base")
            self._base_factored = True

    # ------------------------------------------------------------------ pieces
    def _headloss(self, q):
        if self._fused:
            return self._fused_law(q, self._r, self._m)
        return self.sys.link_headloss(q)

    @staticmethod
    def _fused_law(q, r, m):
        """Hazen-Williams friction plus minor losses (no pumps), with fewer temporaries than
        :meth:`LinkLaws.headloss` (the same regularised laws, :func:`power_law`):
        ``h = r q s^a + m q s^(1/2)``, ``dh/dq = (r s^a (eps^2 + n q^2) + m s^(1/2) (eps^2 +
        2 q^2)) / s`` with ``s = q^2 + eps^2``, ``a = (n - 1) / 2``; derivative floored."""
        e2 = EPS_FLOW * EPS_FLOW
        q2 = q * q
        ss = q2 + e2
        # s^a as exp(a log s): the same value to 1e-15, about 1.4 times faster than np.power
        sa = np.log(ss)
        sa *= 0.5 * (HW_EXPONENT - 1.0)
        np.exp(sa, out=sa)
        sa *= r
        if m is None:
            h = sa * q
            q2 *= HW_EXPONENT
            q2 += e2
            sa /= ss
            sa *= q2
            np.maximum(sa, G_FLOOR, out=sa)
            return h, sa
        sq = np.sqrt(ss)
        sq *= m
        h = sa + sq
        h *= q
        g = q2 * HW_EXPONENT
        g += e2
        g *= sa
        q2 *= 2.0
        q2 += e2
        q2 *= sq
        g += q2
        g /= ss
        np.maximum(g, G_FLOOR, out=g)
        return h, g

    def _factor(self, q, slot, g=None, pin=-1):
        """Factorize at flows ``q`` into ``slot`` (``g``: the head-loss derivative at ``q``
        if known; ``pin``: a node made a Dirichlet row too); returns the token.

        The values are those of :func:`assembly.head_matrix` with the base Dirichlet rows
        (masks per link precomputed); a pinned node's row is then made an identity row."""
        s = self.sys
        pat = s.pattern
        if g is None:
            _, g = self._headloss(q)
        w = self.cond_f / g
        nn = s.nn
        diag = np.bincount(s.fr, weights=w * self._free_fr, minlength=nn)
        diag += np.bincount(s.to, weights=w * self._free_to, minlength=nn)
        off = w * self._both_free
        off *= -1.0
        if pin >= 0:
            off[self._links_of(pin)] = 0.0
        if pat.unique_off:
            data = np.zeros(pat.nnz)
            data[pat.off_pos] = off
        else:
            data = np.bincount(pat.off_pos, weights=off, minlength=pat.nnz)
        diag[self._known_diag] = 1.0
        if pin >= 0:
            diag[pin] = 1.0
        data[pat.diag_pos] = diag
        pat.factor(data, slot)
        self._w[slot] = w
        self._pinned[slot] = pin
        if slot == "base":
            return "base"
        self._token += 1
        return f"work{self._token}"

    def _links_of(self, k):
        """Positions of the links at node ``k`` (kept for a few nodes)."""
        at = self._links_at.get(k)
        if at is None:
            if len(self._links_at) > 8:
                self._links_at.clear()
            s = self.sys
            at = self._links_at[k] = np.flatnonzero((s.fr == k) | (s.to == k))
        return at

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
        sel = np.abs(dflow) > 1e-7 * max(float(np.max(np.abs(dflow))), 1e-300)
        dfs = dflow[sel]
        qs = q[sel]
        hn = h + dh  # the linear step: its head differences give the known work exactly
        # plain sums, not BLAS dot products: those can stall on a busy machine (thread sync)
        work = float(np.sum(dfs * (hn[fr[sel]] - hn[to[sel]])))
        a = 1.0
        # far from the base flows the head losses along the step grow as a power n of a
        # (the friction law's exponent), so Newton's method runs on T(a)^(1/n) = work^(1/n)
        # with T(a) = phi(a) + work: exact in one step for a pure power (on phi itself it
        # only halves a per step when the linear step overshoots by orders of magnitude)
        inv_n = 1.0 / float(self.sys.laws.flow_exponent)
        for _ in range(8):
            hl, g = self._headloss_sel(qs + a * dfs, sel)
            total = float(np.sum(dfs * hl))
            phi = total - work
            dphi = float(np.sum(dfs * dfs * g))
            if not dphi > 0:
                return 1.0
            if total > 0 and work > 0:
                step = (total ** inv_n - work ** inv_n) / (inv_n * total ** (inv_n - 1.0) * dphi)
            else:
                step = phi / dphi
            a_new = min(1.0, max(0.05 * a, a - step))
            if abs(a_new - a) <= 1e-3 * a:
                a = a_new
                break
            a = a_new
        return a

    def _headloss_sel(self, q, sel):
        s = self.sys
        if self._fused:
            return self._fused_law(q, self._r[sel], None if self._m is None else self._m[sel])
        qq = np.zeros(s.nl)
        qq[sel] = q
        h, g = s.link_headloss(qq)
        return h[sel], g[sel]

    def blend(self, result: HydraulicResult, t: float) -> HydraulicResult:
        """A start state ``t`` of the way from the base state to ``result`` (a result of this
        solver): flows and draw scaled linearly (mass balance holds for draw ``t`` times
        the result's), head drops by ``t^n`` with ``n`` the flow exponent of the friction law
        in use (1.852 Hazen-Williams, 2 Darcy-Weisbach). For :meth:`solve`'s ``start``; its
        factorization is made at the blended flows."""
        t = float(t)
        q = self.q0 + t * (result.flow_m3s - self.q0)
        n = self.sys.laws.flow_exponent
        h = self.h0 + t ** n * (np.nan_to_num(result.head_m) - self.h0)
        return dataclasses.replace(result, flow_m3s=q, head_m=h, extra={
            "draw_m3s": t * float(result.extra["draw_m3s"]), "factor_token": None})

    # ------------------------------------------------------------------ the solve
    def solve(self, node: int, mode: str, value: float, *, limit_node: int | None = None,
              start: HydraulicResult | None = None) -> DrawOutcome:
        """Solve with an extra draw at ``node``, in one of three modes (:data:`DRAW_MODES`).

        - ``"head"``: ``value`` is the node's head [m]; the draw is what it takes.
        - ``"draw"``: ``value`` is the draw [m3/s] (added to the node's demand).
        - ``"limit"``: ``value`` is the head [m] of ``limit_node``; the draw is what puts it
          there (e.g. the lowest node of a zone at the system minimum).

        ``start``: a result of this solver to start from (default the base state).
        Returns a :class:`DrawOutcome`; on success its ``result`` has ``extra["draw_m3s"]``
        the draw, also ``node_inflow_m3s[node] - demand_m3s[node]``.
        """
        if mode not in DRAW_MODES:
            raise ValueError(f"draw-solve mode {mode!r}: expected one of {DRAW_MODES}")
        if (mode == "limit") != (limit_node is not None):
            raise ValueError("limit_node is given with mode 'limit' and only then")
        if not self.usable:
            return DrawOutcome(success=False, status=1,
                               message=f"the draw solver cannot be used: {self.why_not}")
        t0 = time.perf_counter()
        s, opt = self.sys, self.sys.opt
        pat = s.pattern
        f0 = pat.factorizations
        k = int(node)
        mode = "pin" if mode == "head" else mode
        c = k if mode == "pin" else (int(limit_node) if limit_node is not None else -1)
        target = float(value) if mode != "draw" else np.nan
        if self.dirichlet[k] or (c >= 0 and self.dirichlet[c]):
            return DrawOutcome(success=False, status=2,
                               message="the node has a fixed or held head, or is unsupplied")
        fr, to, nn = s.fr, s.to, s.nn
        free_f, cond_f, demand = self.free_f, self.cond_f, self.demand
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
            draw = float(value)
        slot = "base" if tok == "base" else "work"
        into_k, outof_k = np.flatnonzero(to == k), np.flatnonzero(fr == k)
        ftol, htol = opt.flow_tolerance, opt.head_tolerance
        converged = False
        prev = np.inf
        fresh = start is None  # the base factorization is the Jacobian at the base state
        it = 0
        for it in range(opt.max_iter + 1):
            hl, g = self._headloss(q)
            # the residuals of assembly.residuals, without the worst-node bookkeeping:
            # net outflow plus demand and draw at checked nodes, head loss minus head
            # difference on conducting links (a non-finite value fails the tests below)
            m = np.bincount(fr, weights=q, minlength=nn)
            m -= np.bincount(to, weights=q, minlength=nn)
            m += demand
            m[k] += draw
            m *= free_f
            e = h[fr]
            e -= h[to]
            np.subtract(hl, e, out=e)
            e *= cond_f
            mass = float(np.max(np.abs(m))) if nn else 0.0
            head = float(np.max(np.abs(e))) if len(e) else 0.0
            if not (np.isfinite(mass) and np.isfinite(head)):
                break
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
            if it == 0 and start is None and mode != "draw" and not self.any_regulating:
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
            if self.any_regulating:
                q[self.regulating] = 0.0
                need = (np.bincount(fr, weights=q, minlength=nn)
                        - np.bincount(to, weights=q, minlength=nn) + demand)
                need[k] += draw
                q[self.regulating] = need[self.prv_to]
        if not converged:
            return DrawOutcome(success=False, status=3, nit=it,
                               message=f"no convergence in {it} iterations")
        if self.may_change_status and not s.statuses_hold(self.state, q, h, self.supplied,
                                                          self.held_fixed):
            return DrawOutcome(success=False, status=4, nit=it,
                               message="a device would change status at this draw")
        fixed = self.given_fixed.copy()
        fixed[k] = True
        # the head losses at the final flows were computed for the convergence test
        r = s.make_result(q, h, self.state, fixed, demand, self.supplied, iterations=it,
                          status_rounds=1, status="converged",
                          hl=hl if self._fused else None)
        r.seconds = time.perf_counter() - t0
        r.factorizations = pat.factorizations - f0
        r.extra = {"draw_m3s": draw, "factor_token": tok}
        return DrawOutcome(success=True, status=0, message=r.message, result=r,
                           draw_m3s=float(draw), nit=it)
