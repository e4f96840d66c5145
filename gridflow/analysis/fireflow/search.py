"""The search at one hydrant: one routine, two ways of solving.

:func:`search_hydrant` finds, for one hydrant, the available flow at the residual target after
the system-wide limits, the rated flow at 20 psi, the residual pressure at the required flow
(or that it is not achievable, with the flow achievable at 0 psi), and the fastest pipe during
the draw. It asks a *route* for three kinds of solve:

- ``pin(j, head, start)``: the outlet's head fixed; the draw is what it takes;
- ``at_draw(j, q, start)``: a given draw at the outlet;
- ``hold(j, kind, idx, start)``: the draw that puts the limiting node ``idx`` exactly at the
  system minimum (``kind`` "node") or the limiting pipe ``idx`` exactly at the velocity limit
  (``kind`` "link").

:class:`DrawRoute` answers from the base state's kept factorization
(:class:`gridflow.hydraulics.DrawSolver`); where it cannot (a status would change,
pressure-driven demand, a velocity limit, no convergence) it raises :class:`CannotAnswer`
and the hydrant is searched again with :class:`FullRoute`, full Newton solves with a
bracketing search for the held constraint. Both routes solve the same equations to the same
tolerances, so they agree to solver tolerance (the tests compare them).

The system-wide limit: if any other checked node of the hydrant's zone falls below the system
minimum at the pinned draw, the lowest is held at the minimum; if another node is then lower it
takes over (usually within 1-2 rounds). Drawn flow falls monotonically as the outlet head
rises, so a held constraint has one solution between the residual target and the static head.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

import numpy as np

from gridflow.units import M_HEAD_PER_PSI

if TYPE_CHECKING:
    from gridflow.analysis.fireflow.problem import FireflowProblem
    from gridflow.hydraulics import DrawOutcome, DrawSolver, HydraulicResult
    from gridflow.hydraulics.reduced import ReducedDrawSolver

__all__ = ["LIMIT_CODES", "CannotAnswer", "DrawRoute", "FullRoute", "HydrantRecord",
           "SolveFailed", "run_rows", "search_hydrant"]

#: 20 psi as metres of water head: the residual pressure of hydrant ratings (NFPA 291)
P20_M = 20.0 * M_HEAD_PER_PSI

# limit codes in worker records; the written words are LIMIT_CODES[code]
LIM_RESIDUAL, LIM_NODE, LIM_VELOCITY, LIM_UNSUPPLIED = 0, 1, 2, 3
LIM_STATIC, LIM_FAILED, LIM_FIXED, LIM_OUT = 4, 5, 6, 7
#: what limits the available flow, as written in ``limited_by``
LIMIT_CODES = {
    LIM_RESIDUAL: "residual",          # the hydrant's own residual target
    LIM_NODE: "node_pressure",         # another node of the zone at the system minimum
    LIM_VELOCITY: "velocity",          # a pipe at the fire-flow velocity limit
    LIM_UNSUPPLIED: "unsupplied",      # the hydrant's node has no supply in the base scenario
    LIM_STATIC: "static_pressure",     # static pressure at or below the residual target
    LIM_FAILED: "not_converged",       # a solve did not converge: no figures
    LIM_FIXED: "fixed_head",           # the hydrant hangs on a fixed-head node: no figures
    LIM_OUT: "out_of_service",         # not evaluated
}

#: search tolerances: pressure margin [m] and velocity margin [m/s] at the constraint
MARGIN_TOL = 1e-4
_MAX_SEARCH = 40
_MAX_ROUNDS = 6


class CannotAnswer(Exception):
    """The route cannot answer this hydrant; the caller uses the full route."""


class SolveFailed(Exception):
    """A full solve did not converge (recorded per hydrant, not raised to the caller)."""


@dataclasses.dataclass
class HydrantRecord:
    """One hydrant's figures (SI); NaN where there is no figure."""

    available: float = np.nan
    q20: float = np.nan
    residual_at_required: float = np.nan
    achievable: int = -1          # 1 / 0; -1 where not evaluated
    q0: float = np.nan            # flow at 0 psi residual, where the required is not achievable
    limit: int = LIM_RESIDUAL
    limit_idx: int = -1           # node position (node limits) or link position (velocity)
    vmax: float = np.nan
    vmax_idx: int = -1
    iterations: int = 0


# ---------------------------------------------------------------------- routes
class DrawRoute:
    """Solves by the draw solver from the base state's kept factorization."""

    def __init__(self, problem: FireflowProblem, ds: DrawSolver | ReducedDrawSolver) -> None:
        self.p, self.ds, self.iterations = problem, ds, 0

    def _ok(self, out: DrawOutcome) -> HydraulicResult:
        if not out.success or out.result is None:
            raise CannotAnswer
        self.iterations += out.result.iterations
        return out.result

    def pin(self, j: int, head: float, start: HydraulicResult | None) -> HydraulicResult:
        return self._ok(self.ds.solve(int(self.p.outlet_idx[j]), "head", head, start=start))

    def at_draw(self, j: int, q: float, start: HydraulicResult | None) -> HydraulicResult:
        if start is not None:
            q_start = self.p.draw(j, start)
            start = self.ds.blend(start, q / q_start) if q_start > 0 else start
        return self._ok(self.ds.solve(int(self.p.outlet_idx[j]), "draw", q, start=start))

    def hold(self, j: int, kind: str, idx: int, start: HydraulicResult,
             first: bool) -> HydraulicResult:
        if kind != "node":
            raise CannotAnswer  # a binding velocity limit: the bracketing search handles it
        p, net = self.p, self.p.net
        held = float(net.elevation_m[idx]) + p.minimum_m
        if first:
            # start where the held node's drop, growing as the draw^n, just reaches the minimum
            drop_pin = float(p.warm.head_m[idx] - start.head_m[idx])
            drop_ok = float(p.warm.head_m[idx]) - held
            t = (drop_ok / drop_pin) ** (1 / p.exponent) if drop_pin > 0 and drop_ok > 0 else 1.0
            start = self.ds.blend(start, min(max(t, 0.05), 1.0))
        return self._ok(self.ds.solve(int(p.outlet_idx[j]), "limit", held, limit_node=idx,
                                      start=start))


class FullRoute:
    """Solves by full Newton solves of the prepared system (the fallback)."""

    def __init__(self, problem: FireflowProblem) -> None:
        self.p, self.iterations = problem, 0

    def pin(self, j: int, head: float, start: HydraulicResult | None) -> HydraulicResult:
        r = self.p.solve_pinned(j, head, start)
        self.iterations += r.iterations
        if not r.converged:
            raise SolveFailed(r.message)
        return r

    def at_draw(self, j: int, q: float, start: HydraulicResult | None) -> HydraulicResult:
        p = self.p
        k = int(p.outlet_idx[j])
        if not p.options.pressure_driven:
            demand = p.net.demand_m3s.copy()
            demand[k] += q
            r = p.system().solve(demand_m3s=demand, warm=start or p.warm,
                                 raise_on_failure=False)
            self.iterations += r.iterations
            if not r.converged:
                raise SolveFailed(r.message)
            # as the draw route writes it: the draw is the outlet's inflow minus its demand
            d = r.demand_m3s.copy()
            d[k] -= q
            return dataclasses.replace(r, demand_m3s=d)
        # pressure-driven demand would also scale the fire draw: pin the outlet head instead
        # and search it by secant on the head drop against Q^n (exact on one path), never
        # below 0 psi at the outlet
        z = float(p.net.elevation_m[k])
        static = float(p.warm.head_m[k])
        n = p.exponent
        pts = [(0.0, 0.0)]
        if start is not None:
            pts.append((static - float(start.head_m[k]), max(p.draw(j, start), 0.0) ** n))
        s = 1.0 if pts[-1][1] <= 0 else pts[-1][0] * (q**n / pts[-1][1])
        last = start
        for _ in range(30):
            s = min(s, static - z)
            r = self.pin(j, static - s, last)
            last = r
            got = p.draw(j, r)
            if abs(got - q) <= 1e-9 + 1e-6 * q or (s >= static - z and got < q):
                return r
            pts.append((s, max(got, 0.0) ** n))
            (s0, u0), (s1, u1) = pts[-2], pts[-1]
            s = s1 + (q**n - u1) * (s1 - s0) / (u1 - u0) if u1 != u0 else 2 * s1
            if not np.isfinite(s) or s <= 0:
                s = 2.0 * pts[-1][0]
        raise SolveFailed("the outlet head for the required flow was not found")

    def hold(self, j: int, kind: str, idx: int, start: HydraulicResult,
             first: bool) -> HydraulicResult:
        """Bracket the outlet head between ``start``'s (the constraint violated) and the
        static head (satisfied) by Illinois regula falsi on the held constraint's margin."""
        p = self.p
        k = int(p.outlet_idx[j])

        def margin(r: HydraulicResult) -> float:
            if kind == "node":
                return float(r.pressure_m[idx]) - p.minimum_m
            return p.max_velocity_ms - abs(float(r.velocity_ms[idx]))

        lo, m_lo = float(start.head_m[k]), margin(start)
        hi, m_hi = float(p.warm.head_m[k]), max(margin(p.warm), MARGIN_TOL)
        if m_lo >= 0:
            return start
        side, r = 0, start
        for _ in range(_MAX_SEARCH):
            h = hi - m_hi * (hi - lo) / (m_hi - m_lo) if m_hi != m_lo else 0.5 * (lo + hi)
            if not (lo < h < hi):
                h = 0.5 * (lo + hi)
            r = self.pin(j, h, r)
            m = margin(r)
            if abs(m) <= MARGIN_TOL or hi - lo < 1e-7:
                break
            if m < 0:
                lo, m_lo = h, m
                if side == -1:
                    m_hi *= 0.5  # Illinois: keep the stale end from stalling the search
                side = -1
            else:
                hi, m_hi = h, m
                if side == 1:
                    m_lo *= 0.5
                side = 1
        return r


Route = DrawRoute | FullRoute


# ---------------------------------------------------------------------- the search
def search_hydrant(p: FireflowProblem, j: int, route: Route) -> HydrantRecord:
    """All figures of hydrant ``j`` by ``route`` (see the module notes).

    Raises
    ------
    CannotAnswer
        The draw route cannot answer (the caller retries with :class:`FullRoute`).
    SolveFailed
        A full solve did not converge.
    """
    net, warm = p.net, p.warm
    k, main = int(p.outlet_idx[j]), int(p.main_idx[j])
    if not p.in_service[j]:
        return HydrantRecord(limit=LIM_OUT)
    if net.is_fixed[main]:
        return HydrantRecord(limit=LIM_FIXED, limit_idx=main)
    if not warm.supplied[main]:
        # no supply, no rating: the rated flow (and the class) stay empty
        return HydrantRecord(available=0.0, q20=np.nan, achievable=0, q0=0.0,
                             limit=LIM_UNSUPPLIED, limit_idx=main)
    z = float(net.elevation_m[k])
    static = float(warm.head_m[k])
    target = z + p.residual_m
    rec = HydrantRecord(limit_idx=main)
    r_pin: HydraulicResult | None = None
    if static <= target:
        rec.available, rec.limit, r_at = 0.0, LIM_STATIC, warm
    else:
        r_pin = route.pin(j, target, None)
        r_at = _limit(p, j, route, r_pin, rec)
        rec.available = max(p.draw(j, r_at), 0.0)
    rec.vmax, rec.vmax_idx = p.fastest_pipe(r_at)
    # the rated flow: the hydrant's own flow at 20 psi residual, no system-wide limit
    if r_pin is not None and abs(p.residual_m - P20_M) < 1e-9:
        rec.q20 = max(p.draw(j, r_pin), 0.0)
    elif static <= z + P20_M:
        rec.q20 = 0.0
    else:
        rec.q20 = max(p.draw(j, route.pin(j, z + P20_M, r_pin)), 0.0)
    _required(p, j, route, r_pin, static, z, rec)
    rec.iterations = route.iterations
    return rec


def _limit(p: FireflowProblem, j: int, route: Route, r_pin: HydraulicResult,
           rec: HydrantRecord) -> HydraulicResult:
    """The solution at the available flow: the pinned one, or the most violated constraint
    held at its limit (node pressure first at equal need), repeated while another is then
    violated."""
    k = int(p.outlet_idx[j])
    r = r_pin
    for rnd in range(_MAX_ROUNDS):
        pm, pn, vm, vl = p.margins(j, r)
        if pm >= -MARGIN_TOL and vm >= -MARGIN_TOL:
            return r
        kind, idx = ("node", pn) if pm < -MARGIN_TOL and (pm <= vm or vm >= -MARGIN_TOL) \
            else ("link", vl)
        r = route.hold(j, kind, idx, r, rnd == 0)
        if float(r.head_m[k]) < float(r_pin.head_m[k]) - MARGIN_TOL:
            raise CannotAnswer  # not expected: a held draw is below the pinned one
        rec.limit, rec.limit_idx = (LIM_NODE, idx) if kind == "node" else (LIM_VELOCITY, idx)
    pm, _, vm, _ = p.margins(j, r)
    if pm >= -MARGIN_TOL and vm >= -MARGIN_TOL:
        return r
    raise SolveFailed("the system-wide limit did not settle")


def _required(p: FireflowProblem, j: int, route: Route, r_pin: HydraulicResult | None,
              static: float, z: float, rec: HydrantRecord) -> None:
    """Residual pressure at the required flow, or not achievable and the flow at 0 psi."""
    q_req = float(p.required_m3s[j])
    if not q_req > 0:
        rec.residual_at_required, rec.achievable = static - z, 1
        return
    residual = np.nan
    if static > z:
        try:
            rr = route.at_draw(j, q_req, r_pin)
            if abs(p.draw(j, rr) - q_req) <= 1e-6 * q_req + 1e-9:
                residual = p.outlet_pressure(j, rr)
        except SolveFailed:
            residual = np.nan  # decided below by the flow at 0 psi
    if residual >= 0:
        rec.residual_at_required, rec.achievable = residual, 1
        return
    q0 = 0.0 if static <= z else max(p.draw(j, route.pin(j, z, r_pin)), 0.0)
    if q0 >= q_req and not np.isfinite(residual):
        raise SolveFailed("the solve at the required flow did not converge")
    rec.residual_at_required, rec.achievable, rec.q0 = np.nan, 0, q0


# ---------------------------------------------------------------------- a batch
def run_rows(p: FireflowProblem, rows: np.ndarray) -> dict[str, np.ndarray]:
    """Evaluate hydrants at row positions ``rows``: the draw route first, the full route where
    it cannot answer; small record arrays out (a pure function of the problem and the rows)."""
    rows = np.asarray(rows, dtype=np.int64)
    m = len(rows)
    fields = [f.name for f in dataclasses.fields(HydrantRecord)]
    recs = []
    fallback = np.zeros(m, dtype=bool)
    factorizations = np.zeros(m, dtype=np.int64)
    core_factorizations = np.zeros(m, dtype=np.int64)
    status_variant = np.zeros(m, dtype=bool)
    sysm = p.system()
    ds = p.draw_solver()
    for i, j in enumerate(rows):
        f0 = sysm.pattern.factorizations
        c0 = ds.factorizations
        v0 = getattr(ds, "variant_solves", 0)
        rec = None
        if ds.usable:
            try:
                rec = search_hydrant(p, int(j), DrawRoute(p, ds))
            except (CannotAnswer, SolveFailed):
                rec = None
        if rec is None:
            fallback[i] = True
            route = FullRoute(p)
            try:
                rec = search_hydrant(p, int(j), route)
            except (CannotAnswer, SolveFailed):
                rec = HydrantRecord(limit=LIM_FAILED, limit_idx=int(p.main_idx[j]),
                                    iterations=route.iterations)
        recs.append(rec)
        factorizations[i] = sysm.pattern.factorizations - f0
        core_factorizations[i] = ds.factorizations - c0
        status_variant[i] = not fallback[i] and getattr(ds, "variant_solves", 0) > v0
    out: dict[str, np.ndarray] = {"row": rows, "fallback": fallback,
                                  "status_variant": status_variant,
                                  "factorizations": factorizations,
                                  "core_factorizations": core_factorizations}
    for name in fields:
        out[name] = np.array([getattr(r, name) for r in recs])
    return out
