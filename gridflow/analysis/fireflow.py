"""Fire-flow availability at every hydrant.

For each hydrant, one at a time, on top of a base scenario (usually maximum day):

1. **Available flow at the residual target.** The hydrant outlet's head is fixed at its
   elevation plus the residual target ``p_r`` and the network is solved, warm-started from the
   base solution; the flow drawn at the outlet (its inflow minus its own delivered demand) is
   the available flow.
2. **System-wide constraint** (option, default on). If any other supplied node of the
   hydrant's zone falls below the system minimum, the draw is reduced until the lowest such node
   is exactly at the minimum: a bracketing search (Illinois regula falsi) on the outlet head
   between the residual target and the static head, each solve warm-started from the previous
   one. Drawn flow falls monotonically as the outlet head rises, so bracketing the head
   brackets the flow, and a pinned head keeps the fire draw out of pressure-driven demand.
   An optional pipe velocity limit is handled the same way.
3. **Flow at 20 psi** (hydrant residual only) for the NFPA 291 class, and the **residual
   pressure at the required fire flow** (the required flow drawn at the outlet).

How the solves are made: each hydrant is first answered by
:class:`gridflow.hydraulics.DrawSolver`, which starts every hydrant from the base solution and a
factorization of the head matrix at the base flows (kept for the whole sweep): the pinned
outlet is a bordered row of that matrix, the first step is scaled to balance energy along it,
then Newton steps refactor as they go. The system-wide limit is solved directly (the draw is
the unknown, the lowest other node is held at the minimum; if another node is then lower it
takes over, usually within 1-2 rounds), and the required-flow solve starts from the pinned
solution scaled to the required draw. Where that route cannot answer (a valve or pump would
change status, pressure-driven demand, a binding velocity limit, no convergence) the hydrant
is solved by full Newton solves and the bracketing search described above; the two routes agree
to solver tolerance (tests compare them).

Nodes whose pressure is already below the system minimum in the base solution cannot be made
acceptable by any fire draw; they are excluded from the check and returned once in
``result.attrs["base_below_minimum"]``.

A hydrant lateral (length, diameter, loss coefficient K) is modelled as a real link from the
main node to an outlet node added for the hydrant; the outlet is the pinned point. All
laterals are added once, before any solve, so the sparse pattern and its ordering are computed
once and shared by every hydrant.

Work is split in batches of hydrants. Each batch is a pure function of the network arrays and
the base solution (sent once per worker) returning small records; each hydrant starts from the
base solution, never from another hydrant's, so serial, local-process and Dask runs give
identical numbers.

Results are model estimates: field flow tests, local codes and licensed engineers decide.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import threading
import time
import uuid
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures import as_completed as futures_completed

import numpy as np
import pandas as pd

from gridflow import __version__
from gridflow.analysis.nfpa import GPM, extrapolate_nfpa291, nfpa_class
from gridflow.config.fireflow import FireflowSection
from gridflow.config.sections import CriteriaSection
from gridflow.errors import ConfigError, InputError
from gridflow.hydraulics import DrawSolver, HydraulicResult, HydraulicSystem, SolveOptions
from gridflow.network.model import (
    LINK_PIPE,
    LINK_VALVE,
    NODE_JUNCTION,
    STATUS_CLOSED,
    VALVE_THROTTLE,
    Network,
)
from gridflow.units import M_HEAD_PER_PSI

__all__ = [
    "CAUTION",
    "RESULT_COLUMNS",
    "FireflowProblem",
    "extrapolate_nfpa291",
    "nfpa_class",
    "sweep",
]

log = logging.getLogger("gridflow")

#: 20 psi as metres of water head: the residual pressure of hydrant ratings (NFPA 291)
P20_M = 20.0 * M_HEAD_PER_PSI

CAUTION = ("Fire-flow results are model estimates: field flow tests, local codes and licensed "
           "engineers decide.")

RESULT_COLUMNS = [
    "hydrant_id", "node_id", "zone", "static_pressure_m", "required_flow_m3s",
    "available_flow_m3s", "available_flow_at_20psi_m3s", "residual_pressure_at_required_m",
    "meets_required", "limited_by", "limiting_node_id", "nfpa_class", "iterations",
]

HYDRANT_COLUMNS = ("hydrant_id", "node_idx", "zone", "required_fire_flow_m3s", "land_use",
                   "lateral_length_m", "lateral_diameter_m")

# limit codes in worker records (text made in the parent)
_LIM_RESIDUAL, _LIM_NODE, _LIM_VELOCITY, _LIM_UNSUPPLIED = 0, 1, 2, 3
_LIM_STATIC, _LIM_BASE_BELOW, _LIM_FAILED, _LIM_FIXED = 4, 5, 6, 7

#: search tolerances: pressure margin [m] and velocity margin [m/s] at the constraint
_MARGIN_TOL = 1e-4
_MAX_SEARCH = 40
#: hydrants per task for local worker processes (at most ``batch_size``)
_LOCAL_BATCH = 25


class _Failed(Exception):
    """A fire-flow solve did not converge (recorded per hydrant, not raised to the caller)."""


@dataclasses.dataclass(eq=False)
class FireflowProblem:
    """Everything a worker needs, as arrays: picklable, sent once per worker.

    Build it with :meth:`build`; :meth:`run` evaluates a batch of hydrants (by row position)
    and returns small record arrays. The prepared :class:`HydraulicSystem` (sparse pattern,
    ordering) is cached per process and thread, never pickled.

    Attributes
    ----------
    net : Network
        The scenario network with one outlet node and lateral link added per hydrant that has
        a lateral.
    warm : HydraulicResult
        The base solution extended to the added outlets and laterals (zero lateral flow).
    outlet_idx, main_idx : ndarray of int
        Per hydrant: the pinned node and the main node it hangs on (equal without a lateral).
    """

    token: str
    net: Network
    warm: HydraulicResult
    options: SolveOptions
    residual_m: float
    minimum_m: float
    max_velocity_ms: float
    system_wide: bool
    outlet_idx: np.ndarray
    main_idx: np.ndarray
    zone_code: np.ndarray
    node_zone_code: np.ndarray
    required_m3s: np.ndarray
    check_node: np.ndarray
    check_link: np.ndarray

    # ------------------------------------------------------------------ construction
    @classmethod
    def build(cls, net: Network, base: HydraulicResult, hydrants: pd.DataFrame,
              fire: FireflowSection, criteria: CriteriaSection | None = None, *,
              options: SolveOptions) -> FireflowProblem:
        """Validate the hydrant table and prepare the arrays.

        Raises
        ------
        InputError
            Naming the hydrant id and the field for a missing column, a node position outside
            the network, a negative required flow or lateral size, or a duplicate id.
        """
        _check_hydrants(net, hydrants)
        hid = hydrants["hydrant_id"].astype(str).to_numpy(dtype=object)
        main = hydrants["node_idx"].to_numpy(dtype=np.int64)
        zone = hydrants["zone"].fillna("").astype(str).to_numpy(dtype=object)
        zone = np.where(zone == "", net.zone[main], zone)
        required = _required_flow(hydrants, zone, fire)
        length = _column_or(hydrants, "lateral_length_m", fire.lateral_length, hid)
        diameter = _column_or(hydrants, "lateral_diameter_m", fire.lateral_diameter, hid)
        has_lat = (length > 0) | (fire.hydrant_k > 0)
        bad = has_lat & ~(diameter > 0)
        if bad.any():
            k = int(np.argmax(bad))
            raise InputError(f"hydrant {hid[k]} has a lateral but lateral diameter "
                             f"{diameter[k]:g} m; expected a number > 0", layer="hydrants",
                             feature_id=hid[k], field="lateral_diameter_m")
        aug, outlet = _add_laterals(net, hid, main, has_lat, length, diameter, fire)
        warm = _extend_base(base, net, aug, main[has_lat])
        fire_opts = dataclasses.replace(
            options, pressure_driven=bool(options.pressure_driven or fire.pressure_driven))
        codes, _ = pd.factorize(np.concatenate([aug.zone.astype(str), zone.astype(str)]))
        node_zone_code = codes[:aug.n_nodes].astype(np.int64)
        zone_code = codes[aug.n_nodes:].astype(np.int64)
        nn0, nl0 = net.n_nodes, net.n_links
        check_node = np.zeros(aug.n_nodes, dtype=bool)
        with np.errstate(invalid="ignore"):
            check_node[:nn0] = ((net.node_kind == NODE_JUNCTION) & base.supplied
                                & (base.pressure_m >= fire.system_minimum))
        vmax = float(fire.max_velocity)
        check_link = np.zeros(aug.n_links, dtype=bool)
        if vmax > 0:
            with np.errstate(invalid="ignore"):
                check_link[:nl0] = ((net.link_kind == LINK_PIPE) & (base.link_state == 0)
                                    & (np.abs(base.velocity_ms) < vmax))
        return cls(token=uuid.uuid4().hex, net=aug, warm=warm, options=fire_opts,
                   residual_m=float(fire.residual_pressure), minimum_m=float(fire.system_minimum),
                   max_velocity_ms=vmax, system_wide=bool(fire.system_wide), outlet_idx=outlet,
                   main_idx=main, zone_code=zone_code, node_zone_code=node_zone_code,
                   required_m3s=required, check_node=check_node, check_link=check_link)

    def draw_solver(self) -> DrawSolver:
        """The base-state draw solver for this problem in this process and thread (built once:
        one factorization at the base flows, kept for every hydrant)."""
        key = (self.token, threading.get_ident(), "draw")
        ds = _SYSTEMS.get(key)
        if ds is None:
            ds = _SYSTEMS[key] = DrawSolver(self.system(), self.warm)
        return ds

    def system(self) -> HydraulicSystem:
        """The prepared system for this problem in this process and thread (built once)."""
        key = (self.token, threading.get_ident())
        sysm = _SYSTEMS.get(key)
        if sysm is None:
            if len(_SYSTEMS) > 16:
                _SYSTEMS.clear()
            sysm = _SYSTEMS[key] = HydraulicSystem(self.net, self.options)
        return sysm

    # ------------------------------------------------------------------ solves
    def solve_pinned(self, j: int, head_m: float, warm: HydraulicResult | None = None
                     ) -> HydraulicResult:
        """Solve with hydrant ``j``'s outlet head fixed at ``head_m`` [m] (no exceptions)."""
        return self.system().solve(pin_idx=np.array([self.outlet_idx[j]]),
                                   pin_head_m=np.array([head_m]), warm=warm or self.warm,
                                   raise_on_failure=False)

    def draw(self, j: int, r: HydraulicResult) -> float:
        """Flow drawn at hydrant ``j``'s pinned outlet [m3/s], its own base demand excluded."""
        k = self.outlet_idx[j]
        return float(r.node_inflow_m3s[k] - r.demand_m3s[k])

    def run(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """Evaluate hydrants at row positions ``rows``; small record arrays out."""
        rows = np.asarray(rows, dtype=np.int64)
        m = len(rows)
        out = {
            "row": rows,
            "available": np.full(m, np.nan),
            "q20": np.full(m, np.nan),
            "residual_at_required": np.full(m, np.nan),
            "limit": np.full(m, _LIM_RESIDUAL, dtype=np.int8),
            "limit_idx": np.full(m, -1, dtype=np.int64),
            "iterations": np.zeros(m, dtype=np.int64),
            "factorizations": np.zeros(m, dtype=np.int64),
            "fallback": np.zeros(m, dtype=bool),
        }
        sysm = self.system()
        fast = self.draw_solver()
        for i, j in enumerate(rows):
            f0 = sysm.pattern.factorizations
            rec = self._one_fast(int(j), fast) if fast.usable else None
            if rec is None:
                out["fallback"][i] = True
                rec = self._one(int(j))
            out["available"][i], out["q20"][i], out["residual_at_required"][i] = rec[:3]
            out["limit"][i], out["limit_idx"][i], out["iterations"][i] = rec[3:]
            out["factorizations"][i] = sysm.pattern.factorizations - f0
        return out

    def _solve(self, j, head, warm, its):
        r = self.solve_pinned(j, head, warm)
        its[0] += r.iterations
        if not r.converged:
            raise _Failed(r.message)
        return r

    def _one(self, j: int):
        """(available, q20, residual at required, limit code, limit index, iterations)."""
        warm, net = self.warm, self.net
        k, main = int(self.outlet_idx[j]), int(self.main_idx[j])
        its = [0]
        if net.is_fixed[main]:
            return np.nan, np.nan, np.nan, _LIM_FIXED, main, 0
        if not warm.supplied[main]:
            return 0.0, 0.0, np.nan, _LIM_UNSUPPLIED, main, 0
        z = float(net.elevation_m[k])
        static_head = float(warm.head_m[k])
        target = z + self.residual_m
        try:
            if static_head <= target:
                code = (_LIM_BASE_BELOW if self.system_wide
                        and static_head - z < self.minimum_m else _LIM_STATIC)
                available, lim, lim_idx, r_pin = 0.0, code, main, None
            else:
                r_pin = self._solve(j, target, None, its)
                available, lim, lim_idx = self._constrain(j, r_pin, target, static_head, its)
            if abs(self.residual_m - P20_M) < 1e-9 and r_pin is not None:
                q20 = self.draw(j, r_pin)
            elif static_head <= z + P20_M:
                q20 = 0.0
            else:
                q20 = self.draw(j, self._solve(j, z + P20_M, r_pin, its))
            residual = self._residual_at(j, self.required_m3s[j], static_head, r_pin, its)
        except _Failed:
            return np.nan, np.nan, np.nan, _LIM_FAILED, main, its[0]
        return max(available, 0.0), max(q20, 0.0), residual, lim, lim_idx, its[0]

    def _one_fast(self, j: int, ds: DrawSolver):
        """As :meth:`_one` by the draw solver; ``None`` where it cannot answer.

        The system-wide limit is solved directly: the draw at the outlet is the unknown and
        the lowest other node ``c`` is held at the minimum; if another node is then lower,
        it becomes ``c`` and the solve repeats (from the last solution).
        """
        warm, net = self.warm, self.net
        k, main = int(self.outlet_idx[j]), int(self.main_idx[j])
        if net.is_fixed[main] or not warm.supplied[main]:
            return None
        z = float(net.elevation_m[k])
        static_head = float(warm.head_m[k])
        target = z + self.residual_m
        if static_head <= target:
            return None
        its = 0
        out = ds.solve(k, "head", target)
        if not out.success:
            return None
        r_pin = out.result
        assert r_pin is not None
        its += r_pin.iterations
        pm, pn, vm, _ = self._margins(j, r_pin)
        if vm < -_MARGIN_TOL:
            return None  # the velocity limit binds: the bracketing search handles it
        available, lim, lim_idx = self.draw(j, r_pin), _LIM_RESIDUAL, main
        if pm < -_MARGIN_TOL:
            c, ok = pn, False
            # start where the limiting node's drop, growing as the draw^n (n the friction
            # law's flow exponent), just reaches the minimum
            zc = float(net.elevation_m[c])
            drop_pin = float(warm.head_m[c] - r_pin.head_m[c])
            drop_ok = float(warm.head_m[c]) - zc - self.minimum_m
            n_exp = ds.sys.laws.flow_exponent
            t = (drop_ok / drop_pin) ** (1 / n_exp) if drop_pin > 0 and drop_ok > 0 else 1.0
            r: HydraulicResult | None = ds.blend(r_pin, min(max(t, 0.05), 1.0))
            for _ in range(6):
                zc = float(net.elevation_m[c])
                out = ds.solve(k, "limit", zc + self.minimum_m, limit_node=c, start=r)
                if not out.success:
                    return None
                r = out.result
                assert r is not None
                its += r.iterations
                if float(r.head_m[k]) < target - _MARGIN_TOL:
                    return None  # not expected (the limit draw is below the pinned one)
                pm, pn, vm, _ = self._margins(j, r)
                if vm < -_MARGIN_TOL:
                    return None
                if pm >= -_MARGIN_TOL:
                    ok = True
                    break
                c = pn
            if not ok or r is None:
                return None
            available, lim, lim_idx = self.draw(j, r), _LIM_NODE, pn
        if abs(self.residual_m - P20_M) < 1e-9:
            q20 = self.draw(j, r_pin)
        elif static_head <= z + P20_M:
            q20 = 0.0
        else:
            out = ds.solve(k, "head", z + P20_M, start=r_pin)
            if not out.success:
                return None
            r20 = out.result
            assert r20 is not None
            its += r20.iterations
            q20 = self.draw(j, r20)
        q_req = self.required_m3s[j]
        if not q_req > 0:
            residual = static_head - z
        else:
            q_pin = self.draw(j, r_pin)
            start = ds.blend(r_pin, q_req / q_pin) if q_pin > 0 else r_pin
            out = ds.solve(k, "draw", q_req, start=start)
            if not out.success:
                return None
            rr = out.result
            assert rr is not None
            its += rr.iterations
            residual = float(rr.pressure_m[k])
        return max(available, 0.0), max(q20, 0.0), residual, lim, lim_idx, its

    def _margins(self, j: int, r: HydraulicResult):
        """(pressure margin [m], its node, velocity margin [m/s], its link) of a solution."""
        pm, pn, vm, vl = np.inf, -1, np.inf, -1
        if self.system_wide:
            mask = self.check_node & (self.node_zone_code == self.zone_code[j])
            mask[self.main_idx[j]] = False
            idx = np.flatnonzero(mask & r.supplied)
            if idx.size:
                p = r.pressure_m[idx]
                a = int(np.argmin(p))
                pm, pn = float(p[a] - self.minimum_m), int(idx[a])
        if self.max_velocity_ms > 0:
            idx = np.flatnonzero(self.check_link)
            if idx.size:
                v = np.abs(r.velocity_ms[idx])
                a = int(np.nanargmax(v))
                vm, vl = float(self.max_velocity_ms - v[a]), int(idx[a])
        return pm, pn, vm, vl

    def _constrain(self, j, r_pin, target, static_head, its):
        """Reduce the draw until no other node is below the minimum (and no pipe too fast)."""
        pm, pn, vm, vl = self._margins(j, r_pin)
        if pm >= -_MARGIN_TOL and vm >= -_MARGIN_TOL:
            return self.draw(j, r_pin), _LIM_RESIDUAL, int(self.main_idx[j])
        # bracket the outlet head: lo violates (margin < 0), hi = static head (the base: ok)
        lo, m_lo = target, min(pm, vm)
        hi, m_hi = static_head, _base_margin(self, j)
        side, last, r = 0, r_pin, r_pin
        for _ in range(_MAX_SEARCH):
            h = hi - m_hi * (hi - lo) / (m_hi - m_lo) if m_hi != m_lo else 0.5 * (lo + hi)
            if not (lo < h < hi):
                h = 0.5 * (lo + hi)
            r = self._solve(j, h, last, its)
            last = r
            pm, pn, vm, vl = self._margins(j, r)
            m = min(pm, vm)
            if abs(m) <= _MARGIN_TOL or hi - lo < 1e-7:
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
        if pm <= vm:
            return self.draw(j, r), _LIM_NODE, pn
        return self.draw(j, r), _LIM_VELOCITY, vl

    def _residual_at(self, j, q_req, static_head, r_pin, its) -> float:
        """Pressure at the outlet [m] while it draws ``q_req`` [m3/s]."""
        k = int(self.outlet_idx[j])
        z = float(self.net.elevation_m[k])
        if not q_req > 0:
            return static_head - z
        if not self.options.pressure_driven:
            demand = self.net.demand_m3s.copy()
            demand[k] += q_req
            r = self.system().solve(demand_m3s=demand, warm=r_pin or self.warm,
                                    raise_on_failure=False)
            its[0] += r.iterations
            if not r.converged:
                raise _Failed(r.message)
            return float(r.pressure_m[k])
        # pressure-driven demand would also scale the fire draw: pin the outlet head instead
        # and search it by secant on (static head - H) against Q^n (exact on one path; n the
        # friction law's flow exponent)
        n = self.system().laws.flow_exponent
        pts = [(0.0, 0.0)]
        if r_pin is not None:
            pts.append((static_head - float(r_pin.head_m[k]), self.draw(j, r_pin) ** n))
        warm = r_pin
        s = 1.0 if len(pts) < 2 else pts[-1][0] * (q_req**n / max(pts[-1][1], 1e-30))
        for _ in range(20):
            r = self._solve(j, static_head - s, warm, its)
            warm = r
            q = self.draw(j, r)
            if abs(q - q_req) <= 1e-9 + 1e-6 * q_req:
                break
            pts.append((s, max(q, 0.0) ** n))
            (s0, u0), (s1, u1) = pts[-2], pts[-1]
            s = s1 + (q_req**n - u1) * (s1 - s0) / (u1 - u0) if u1 != u0 else 2 * s1
            if not np.isfinite(s) or s <= 0:
                s = 2.0 * pts[-1][0]
        return float(static_head - s - z)


_SYSTEMS: dict = {}
_WORKER_PROBLEM: FireflowProblem | None = None


def _base_margin(problem: FireflowProblem, j: int) -> float:
    pm, _, vm, _ = problem._margins(j, problem.warm)
    return max(min(pm, vm), _MARGIN_TOL)


# ---------------------------------------------------------------------- building blocks
def _check_hydrants(net: Network, hydrants: pd.DataFrame) -> None:
    missing = [c for c in HYDRANT_COLUMNS if c not in hydrants.columns]
    if missing:
        raise InputError(f"hydrant table has no column {missing[0]!r}; expected "
                         f"{', '.join(HYDRANT_COLUMNS)}", layer="hydrants", field=missing[0])
    hid = hydrants["hydrant_id"].astype(str).to_numpy()
    uniq, counts = np.unique(hid, return_counts=True)
    if (counts > 1).any():
        dup = uniq[counts > 1][0]
        raise InputError(f"hydrant id {dup!r} is used {counts[counts > 1][0]} times; ids must "
                         "be unique", layer="hydrants", feature_id=dup, field="hydrant_id")
    idx = pd.to_numeric(hydrants["node_idx"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(idx) | (idx < 0) | (idx >= net.n_nodes) | (idx != np.round(idx))
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"hydrant {hid[k]} refers to node position "
                         f"{hydrants['node_idx'].iloc[k]}, outside 0..{net.n_nodes - 1}",
                         layer="hydrants", feature_id=hid[k], field="node_idx")


def _column_or(hydrants, col, default, hid) -> np.ndarray:
    v = pd.to_numeric(hydrants[col], errors="coerce").to_numpy(dtype=float)
    v = np.where(np.isfinite(v), v, default)
    bad = v < 0
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"hydrant {hid[k]} has {col} = {v[k]:g}; expected a number >= 0",
                         layer="hydrants", feature_id=hid[k], field=col)
    return v


def _required_flow(hydrants: pd.DataFrame, zone: np.ndarray, fire: FireflowSection
                   ) -> np.ndarray:
    """Hydrant attribute, else the land-use default, else the zone default, else the default."""
    req = pd.to_numeric(hydrants["required_fire_flow_m3s"], errors="coerce").to_numpy(float)
    hid = hydrants["hydrant_id"].astype(str).to_numpy()
    bad = req < 0
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"hydrant {hid[k]} has required fire flow {req[k]:g} m3/s; expected a "
                         "number >= 0", layer="hydrants", feature_id=hid[k],
                         field="required_fire_flow_m3s")
    land = hydrants["land_use"].astype(object).where(hydrants["land_use"].notna(), None)
    by_land = land.map(lambda v: fire.required_by_land_use.get(str(v), np.nan)
                       if v is not None else np.nan).to_numpy(dtype=float)
    by_zone = pd.Series(zone).map(lambda v: fire.required_by_zone.get(str(v), np.nan)
                                  ).to_numpy(dtype=float)
    out = np.where(np.isfinite(req), req, by_land)
    out = np.where(np.isfinite(out), out, by_zone)
    return np.where(np.isfinite(out), out, fire.default_required)


def _add_laterals(net, hid, main, has_lat, length, diameter, fire):
    """The network with an outlet node and a lateral link per hydrant that has a lateral."""
    outlet = main.copy()
    m = int(has_lat.sum())
    if m == 0:
        return net, outlet
    nn = net.n_nodes
    at = main[has_lat]
    outlet[has_lat] = nn + np.arange(m)
    ids = hid[has_lat]
    taken = set(net.node_id.tolist())
    node_ids = np.array([f"{h} outlet" for h in ids], dtype=object)
    if taken.intersection(node_ids.tolist()):
        node_ids = np.array([f"{h} outlet {uuid.uuid4().hex[:6]}" for h in ids], dtype=object)
    link_ids = np.array([f"{h} lateral" for h in ids], dtype=object)
    if set(net.link_id.tolist()).intersection(link_ids.tolist()):
        link_ids = np.array([f"{h} lateral {uuid.uuid4().hex[:6]}" for h in ids], dtype=object)
    L, D = length[has_lat], diameter[has_lat]
    is_pipe = L > 0
    kind = np.where(is_pipe, LINK_PIPE, LINK_VALVE).astype(np.int8)
    rough = fire.lateral_roughness if net.headloss_model == "darcy-weisbach" else fire.lateral_c
    k = float(fire.hydrant_k)
    nanv = np.full(m, np.nan)

    def cat(a, b):
        return np.concatenate([a, np.asarray(b, dtype=a.dtype)])

    changes = {
        "node_id": cat(net.node_id, node_ids),
        "node_kind": cat(net.node_kind, np.full(m, NODE_JUNCTION)),
        "elevation_m": cat(net.elevation_m, net.elevation_m[at]),
        "demand_m3s": cat(net.demand_m3s, np.zeros(m)),
        "fixed_head_m": cat(net.fixed_head_m, nanv),
        "zone": cat(net.zone, net.zone[at]),
        "link_id": cat(net.link_id, link_ids),
        "from_idx": cat(net.from_idx, at),
        "to_idx": cat(net.to_idx, outlet[has_lat]),
        "link_kind": cat(net.link_kind, kind),
        "length_m": cat(net.length_m, np.where(is_pipe, L, 0.0)),
        "diameter_m": cat(net.diameter_m, D),
        "roughness": cat(net.roughness, np.where(is_pipe, rough, np.nan)),
        "minor_k": cat(net.minor_k, np.where(is_pipe, k, 0.0)),
        "status": cat(net.status, np.zeros(m)),
        "valve_type": cat(net.valve_type, np.where(is_pipe, 0, VALVE_THROTTLE)),
        "valve_setting": cat(net.valve_setting, np.where(is_pipe, np.nan, k)),
        "pump_h0": cat(net.pump_h0, nanv), "pump_h1": cat(net.pump_h1, nanv),
        "pump_h2": cat(net.pump_h2, nanv), "pump_speed": cat(net.pump_speed, np.ones(m)),
    }
    return net.replace(**changes), outlet


def _extend_base(base: HydraulicResult, net: Network, aug: Network, at: np.ndarray
                 ) -> HydraulicResult:
    """The base solution on the network with laterals: zero lateral flow, outlet = main head."""
    if aug is net:
        return base
    m = len(at)
    state = np.concatenate([base.link_state, np.zeros(m, dtype=base.link_state.dtype)])
    state[net.n_links:][aug.status[net.n_links:] == STATUS_CLOSED] = 1
    return dataclasses.replace(
        base,
        head_m=np.concatenate([base.head_m, base.head_m[at]]),
        pressure_m=np.concatenate([base.pressure_m, base.pressure_m[at]]),
        supplied=np.concatenate([base.supplied, base.supplied[at]]),
        demand_m3s=np.concatenate([base.demand_m3s, np.zeros(m)]),
        node_inflow_m3s=np.concatenate([base.node_inflow_m3s, np.zeros(m)]),
        flow_m3s=np.concatenate([base.flow_m3s, np.zeros(m)]),
        velocity_ms=np.concatenate([base.velocity_ms, np.zeros(m)]),
        link_state=state,
    )


# ---------------------------------------------------------------------- execution
def _init_worker(problem: FireflowProblem) -> None:
    global _WORKER_PROBLEM
    _WORKER_PROBLEM = problem


def _run_in_worker(rows: np.ndarray) -> dict:
    assert _WORKER_PROBLEM is not None
    return _WORKER_PROBLEM.run(rows)


def _run_batch(problem: FireflowProblem, rows: np.ndarray) -> dict:
    """A Dask task: a pure function of the (scattered) problem and the hydrant rows."""
    return problem.run(rows)


def _default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def sweep(net: Network, base: HydraulicResult, hydrants: pd.DataFrame, fire: FireflowSection,
          criteria: CriteriaSection | None = None, *, options: SolveOptions,
          workers: int | None = None, scheduler: str | None = None,
          progress: Callable[[int, int], None] | None = None) -> pd.DataFrame:
    """Available fire flow at every hydrant.

    Parameters
    ----------
    net : Network
        The base scenario's network (SI), as solved into ``base``.
    base : HydraulicResult
        The converged base solution of ``net`` (e.g. maximum day).
    hydrants : pandas.DataFrame
        Columns ``hydrant_id``, ``node_idx`` (position in ``net``), ``zone``,
        ``required_fire_flow_m3s`` (NaN: use the config's defaults), ``land_use``,
        ``lateral_length_m``, ``lateral_diameter_m`` (NaN: the config's defaults).
    fire : FireflowSection
        Residual target, system minimum, velocity limit, defaults, laterals, batch size.
    criteria : CriteriaSection, optional
        Accepted for the run's interface; the fire-flow limits come from ``fire``
        (``system_minimum`` defaults to the same 20 psi as ``criteria.min_pressure_any``).
    options : SolveOptions
        Solver options; ``fire.pressure_driven`` switches pressure-driven demand on for the
        fire-flow solves.
    workers : int, optional
        Local worker processes (default: the machine's cores); 1 runs in this process.
    scheduler : str, optional
        Address of a Dask distributed scheduler; the sweep then runs there (the problem is
        scattered once, hydrants go in batches of ``fire.batch_size``).
    progress : callable, optional
        ``progress(done, total)`` after every batch. Progress is also logged to the
        ``gridflow`` logger every ``fire.progress_every`` batches.

    Returns
    -------
    pandas.DataFrame
        One row per hydrant, in input order, SI units; columns :data:`RESULT_COLUMNS`.
        ``available_flow_m3s`` is at the residual target after the system-wide constraint;
        ``available_flow_at_20psi_m3s`` is the hydrant's own flow at 20 psi residual (no
        system-wide constraint), from which ``nfpa_class`` follows; ``meets_required`` is 1
        where ``available_flow_m3s`` reaches the required flow. ``attrs`` hold
        ``base_below_minimum`` (node ids below the system minimum before any fire draw) and
        ``summary`` (counts, timing, factorizations, the caution).

    Raises
    ------
    InputError
        For an unusable hydrant table (naming the hydrant id and field).

    Notes
    -----
    Results are model estimates: field flow tests, local codes and licensed engineers decide.
    """
    t0 = time.perf_counter()
    problem = FireflowProblem.build(net, base, hydrants, fire, criteria, options=options)
    n = len(hydrants)
    bs = max(1, int(fire.batch_size))
    batches = [np.arange(i, min(i + bs, n)) for i in range(0, n, bs)]
    every = max(1, int(fire.progress_every))
    done = [0, 0]

    def report(rec):
        done[0] += len(rec["row"])
        done[1] += 1
        if progress is not None:
            progress(done[0], n)
        if done[1] % every == 0 or done[0] == n:
            log.info("fire flow: %d of %d hydrants (%d of %d batches)", done[0], n, done[1],
                     len(batches))

    nworkers = _default_workers() if workers is None else max(1, int(workers))
    records: list[dict] = []
    if not batches:
        mode = "none"
    elif scheduler:
        mode = "dask"
        records = _run_dask(problem, batches, scheduler, report)
    elif nworkers > 1 and n > min(bs, _LOCAL_BATCH):
        mode = "processes"
        # local processes cost little per task: smaller batches keep the workers balanced
        lbs = max(1, min(bs, _LOCAL_BATCH, -(-n // nworkers)))
        batches = [np.arange(i, min(i + lbs, n)) for i in range(0, n, lbs)]
        with ProcessPoolExecutor(max_workers=min(nworkers, len(batches)),
                                 initializer=_init_worker, initargs=(problem,)) as pool:
            futs = [pool.submit(_run_in_worker, rows) for rows in batches]
            for f in futures_completed(futs):
                rec = f.result()
                report(rec)
                records.append(rec)
    else:
        mode = "serial"
        for rows in batches:
            rec = problem.run(rows)
            report(rec)
            records.append(rec)
    out = _assemble(problem, net, hydrants, records, n)
    below = _base_below(net, base, fire)
    out.attrs["base_below_minimum"] = below
    out.attrs["summary"] = {
        "hydrants": n,
        "meets_required": int(out["meets_required"].sum()),
        "limited_by_node": int(out["limited_by"].str.startswith("node ").sum()),
        "limited_by_velocity": int(out["limited_by"].str.startswith("velocity").sum()),
        "unsupplied": int((out["limited_by"] == "unsupplied").sum()),
        "not_converged": int((out["limited_by"] == "did not converge").sum()),
        "base_below_minimum": len(below),
        "iterations": int(out["iterations"].sum()),
        "factorizations": int(sum(int(r["factorizations"].sum()) for r in records)),
        "fallback": int(sum(int(r["fallback"].sum()) for r in records)),
        "mode": mode,
        "workers": nworkers if mode == "processes" else 1,
        "batches": len(batches),
        "seconds": round(time.perf_counter() - t0, 3),
        "caution": CAUTION,
    }
    return out


def connect_scheduler(scheduler: str, *, timeout: str = "20s"):
    """A Dask client for ``scheduler`` whose workers run this gridflow version.

    Raises
    ------
    ConfigError
        If the scheduler cannot be reached, or a worker cannot import gridflow or runs
        another version (``--scheduler``; exit code 2).
    """
    from distributed import Client

    try:
        client = Client(scheduler, set_as_default=False, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {scheduler}: {exc}",
                          key="--scheduler") from None

    def probe() -> str:  # nested, so it travels by value: workers need no gridflow for it
        try:
            import gridflow
        except ImportError:
            return "missing"
        return gridflow.__version__

    try:
        versions = client.run(probe)
    except Exception as exc:
        client.close()
        raise ConfigError(f"the Dask workers at {scheduler} did not answer: {exc}",
                          key="--scheduler") from None
    bad = {w: v for w, v in versions.items() if v != __version__}
    if bad or not versions:
        client.close()
        if not versions:
            raise ConfigError(f"the Dask scheduler at {scheduler} has no workers",
                              key="--scheduler")
        w, v = next(iter(bad.items()))
        have = "cannot import gridflow" if v == "missing" else f"runs gridflow {v}"
        raise ConfigError(f"Dask worker {w} at {scheduler} {have}; this run is gridflow "
                          f"{__version__}: install the same gridflow on every worker",
                          key="--scheduler")
    return client


def _run_dask(problem, batches, scheduler, report) -> list[dict]:
    from distributed import as_completed as dask_completed

    client = connect_scheduler(scheduler)
    try:
        shared = client.scatter(problem, broadcast=True, hash=False)
        futs = [client.submit(_run_batch, shared, rows, pure=False,
                              key=f"gridflow-fireflow-{problem.token}-{i}")
                for i, rows in enumerate(batches)]
        records = []
        for f in dask_completed(futs, loop=client.loop):
            rec = f.result()
            report(rec)
            records.append(rec)
            f.release()
        return records
    finally:
        client.close()


def _assemble(problem, net, hydrants, records, n) -> pd.DataFrame:
    avail = np.full(n, np.nan)
    q20 = np.full(n, np.nan)
    resid = np.full(n, np.nan)
    limit = np.zeros(n, dtype=np.int8)
    lidx = np.full(n, -1, dtype=np.int64)
    its = np.zeros(n, dtype=np.int64)
    for rec in records:
        r = rec["row"]
        avail[r], q20[r], resid[r] = rec["available"], rec["q20"], rec["residual_at_required"]
        limit[r], lidx[r], its[r] = rec["limit"], rec["limit_idx"], rec["iterations"]
    main = problem.main_idx
    aug = problem.net
    node_names = aug.node_id
    link_names = aug.link_id
    text = np.empty(n, dtype=object)
    lim_node = np.full(n, "", dtype=object)
    names = {_LIM_RESIDUAL: "hydrant residual", _LIM_UNSUPPLIED: "unsupplied",
             _LIM_STATIC: "static below residual target",
             _LIM_BASE_BELOW: "base already below minimum", _LIM_FAILED: "did not converge",
             _LIM_FIXED: "hydrant at a fixed-head node"}
    for code, name in names.items():
        text[limit == code] = name
    hit = limit == _LIM_NODE
    text[hit] = ["node " + str(v) + " at minimum" for v in node_names[lidx[hit]]]
    lim_node[hit] = node_names[lidx[hit]]
    own = np.isin(limit, [_LIM_RESIDUAL, _LIM_STATIC, _LIM_BASE_BELOW])
    lim_node[own] = node_names[main[own]]
    hit = limit == _LIM_VELOCITY
    text[hit] = ["velocity in pipe " + str(v) for v in link_names[lidx[hit]]]
    required = problem.required_m3s
    rated = ~np.isin(limit, [_LIM_UNSUPPLIED, _LIM_FAILED, _LIM_FIXED])
    cls = np.where(rated, nfpa_class(q20 / GPM), "")
    with np.errstate(invalid="ignore"):
        meets = (avail >= required * (1 - 1e-9)) & np.isfinite(avail)
    zone = hydrants["zone"].fillna("").astype(str).to_numpy(dtype=object)
    zone = np.where(zone == "", net.zone[main], zone)
    return pd.DataFrame({
        "hydrant_id": hydrants["hydrant_id"].astype(str).to_numpy(dtype=object),
        "node_id": net.node_id[main],
        "zone": zone,
        "static_pressure_m": problem.warm.pressure_m[main],
        "required_flow_m3s": required,
        "available_flow_m3s": avail,
        "available_flow_at_20psi_m3s": q20,
        "residual_pressure_at_required_m": resid,
        "meets_required": meets.astype(np.int8),
        "limited_by": text,
        "limiting_node_id": lim_node,
        "nfpa_class": cls,
        "iterations": its,
    }, index=hydrants.index)


def _base_below(net: Network, base: HydraulicResult, fire: FireflowSection) -> list[str]:
    with np.errstate(invalid="ignore"):
        below = ((net.node_kind == NODE_JUNCTION) & base.supplied
                 & (base.pressure_m < fire.system_minimum))
    return [str(v) for v in net.node_id[below]]
