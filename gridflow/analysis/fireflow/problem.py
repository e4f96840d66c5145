"""The fire-flow problem: the hydrant table checked and turned into arrays, the laterals added.

:class:`FireflowProblem` is everything a worker needs (the network with one outlet node and
lateral link per hydrant, the base solution extended to them, the limits), picklable and sent
once per worker. The prepared :class:`~gridflow.hydraulics.HydraulicSystem` and the draw
solver are cached per process and thread, never pickled.

A hydrant's own path is modelled on by default: its lateral (length and diameter from the
hydrant's attributes, else ``fireflow.lateral_length`` / ``fireflow.lateral_diameter``) is a
real pipe from the main node to the outlet node, carrying the hydrant body's minor loss
``fireflow.hydrant_k`` (referred to the lateral's diameter). A zero-length lateral with a K is a
loss-only link (``h = K v^2 / 2g``). All laterals are added once, before any solve, so the
sparse pattern and its ordering are computed once and shared by every hydrant.
"""

from __future__ import annotations

import dataclasses
import threading
import uuid

import numpy as np
import pandas as pd

from gridflow.analysis.fireflow.search import run_rows
from gridflow.config.fireflow import FireflowSection
from gridflow.config.sections import CriteriaSection
from gridflow.errors import InputError
from gridflow.hydraulics import HydraulicResult, HydraulicSystem, SolveOptions
from gridflow.hydraulics.reduced import ReducedDrawSolver
from gridflow.network.model import (
    LINK_PIPE,
    LINK_VALVE,
    NODE_JUNCTION,
    STATUS_CLOSED,
    VALVE_THROTTLE,
    Network,
)

__all__ = ["HYDRANT_COLUMNS", "FireflowProblem", "hydrant_zone", "in_service_mask"]

HYDRANT_COLUMNS = ("hydrant_id", "node_idx", "zone", "required_fire_flow_m3s", "land_use",
                   "lateral_length_m", "lateral_diameter_m")

_SYSTEMS: dict = {}


def in_service_mask(hydrants: pd.DataFrame) -> np.ndarray:
    """``in_service`` as booleans; a hydrant is in service where the column is absent or
    empty."""
    if "in_service" not in hydrants.columns:
        return np.ones(len(hydrants), dtype=bool)
    v = hydrants["in_service"]
    return v.where(v.notna(), True).astype(bool).to_numpy()


def hydrant_zone(net: Network, hydrants: pd.DataFrame) -> np.ndarray:
    """The hydrant table's zone, else the zone of the node it hangs on."""
    main = hydrants["node_idx"].to_numpy(dtype=np.int64)
    zone = hydrants["zone"].fillna("").astype(str).to_numpy(dtype=object)
    return np.where(zone == "", net.zone[main], zone)


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
    max_velocity_ms : float
        ``criteria.max_velocity_fire``: the highest pipe velocity during the draw is flagged
        above it, and limits the draw where ``velocity_limits`` (``fireflow.velocity_limit``).
    main_pipe : ndarray of bool
        Per link of ``net``: a pipe of the network (laterals excluded), the pipes whose
        velocity is reported and checked.
    in_service : ndarray of bool
        Per hydrant; out-of-service hydrants are not evaluated.
    exponent : float
        Flow exponent of the head-loss law (1.852 Hazen-Williams, 2 Darcy-Weisbach), for start
        values only.
    """

    token: str
    net: Network
    warm: HydraulicResult
    options: SolveOptions
    residual_m: float
    minimum_m: float
    max_velocity_ms: float
    velocity_limits: bool
    system_wide: bool
    outlet_idx: np.ndarray
    main_idx: np.ndarray
    zone_code: np.ndarray
    node_zone_code: np.ndarray
    required_m3s: np.ndarray
    check_node: np.ndarray
    check_link: np.ndarray
    main_pipe: np.ndarray
    in_service: np.ndarray
    exponent: float

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
        zone = hydrant_zone(net, hydrants)
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
        vmax = float((criteria or CriteriaSection()).max_velocity_fire)
        limits = bool(fire.velocity_limit) and vmax > 0
        main_pipe = np.zeros(aug.n_links, dtype=bool)
        main_pipe[:nl0] = net.link_kind == LINK_PIPE
        check_link = np.zeros(aug.n_links, dtype=bool)
        if limits:
            with np.errstate(invalid="ignore"):
                check_link[:nl0] = (main_pipe[:nl0] & (base.link_state == 0)
                                    & (np.abs(base.velocity_ms) < vmax))
        return cls(token=uuid.uuid4().hex, net=aug, warm=warm, options=fire_opts,
                   residual_m=float(fire.residual_pressure), minimum_m=float(fire.system_minimum),
                   max_velocity_ms=vmax, velocity_limits=limits,
                   system_wide=bool(fire.system_wide), outlet_idx=outlet,
                   main_idx=main, zone_code=zone_code, node_zone_code=node_zone_code,
                   required_m3s=required, check_node=check_node, check_link=check_link,
                   main_pipe=main_pipe, in_service=in_service_mask(hydrants),
                   exponent=2.0 if net.headloss_model == "darcy-weisbach" else 1.852)

    def draw_solver(self) -> ReducedDrawSolver:
        """The base-state draw solver for this problem in this process and thread (built once
        per batch): solves on the network reduced to its looped core, the whole-network
        :class:`DrawSolver` where that does not apply. The reduction itself (trees, chains,
        core) is made once per process and shared."""
        key = (self.token, threading.get_ident(), "draw")
        ds = _SYSTEMS.get(key)
        if ds is None:
            rkey = (self.token, threading.get_ident(), "reduction")
            ds = ReducedDrawSolver(self.system(), self.warm, reduction=_SYSTEMS.get(rkey),
                                   keep=np.concatenate([self.outlet_idx, self.main_idx]))
            if ds.usable:
                _SYSTEMS[rkey] = ds.red
            _SYSTEMS[key] = ds
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
        """Flow drawn at hydrant ``j``'s pinned outlet [m3/s], its own base demand excluded
        (a draw solve's own figure where it has one)."""
        k = self.outlet_idx[j]
        if r.extra.get("node") == k:
            return float(r.extra["draw_m3s"])
        return float(r.node_inflow_m3s[k] - r.demand_m3s[k])

    def outlet_pressure(self, j: int, r: HydraulicResult) -> float:
        """Pressure at hydrant ``j``'s outlet [m] (a draw solve's own figure where it has
        one)."""
        k = self.outlet_idx[j]
        if r.extra.get("node") == k:
            return float(r.extra["node_head_m"] - self.net.elevation_m[k])
        return float(r.pressure_m[k])

    def run(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """Evaluate hydrants at row positions ``rows``; small record arrays out."""
        return run_batch(self, rows)

    def margins(self, j: int, r: HydraulicResult) -> tuple[float, int, float, int]:
        """(pressure margin [m], its node, velocity margin [m/s], its link) of a solution:
        the lowest other checked node of the hydrant's zone against the system minimum, the
        fastest checked pipe against the velocity limit (``inf``, -1 where not checked)."""
        pm, pn, vm, vl = np.inf, -1, np.inf, -1
        fast = self._extremes(r)
        if self.system_wide and fast is not None:
            finder, (Q, H, d), (ent, hg) = fast
            low, node = finder.lowest(Q, H, d, ent, hg, int(self.zone_code[j]),
                                      int(self.main_idx[j]))
            if node >= 0:
                pm, pn = low - self.minimum_m, node
        elif self.system_wide:
            mask = self.check_node & (self.node_zone_code == self.zone_code[j])
            mask[self.main_idx[j]] = False
            idx = np.flatnonzero(mask & r.supplied)
            if idx.size:
                p = r.pressure_m[idx]
                a = int(np.argmin(p))
                pm, pn = float(p[a] - self.minimum_m), int(idx[a])
        if self.velocity_limits:
            idx = np.flatnonzero(self.check_link)
            if idx.size:
                v = np.abs(r.velocity_ms[idx])
                a = int(np.nanargmax(v))
                vm, vl = float(self.max_velocity_ms - v[a]), int(idx[a])
        return pm, pn, vm, vl

    def _extremes(self, r: HydraulicResult):
        """``(finder, (Q, H, d), (entry, group losses))`` of a reduced draw solution whose
        whole-network arrays are not made yet (the lowest pressure and fastest pipe then come
        without them, :class:`gridflow.hydraulics.extremes.DrawExtremes`); None otherwise."""
        if not getattr(r, "arrays_pending", False):
            return None
        extra = r.extra
        state, solved, by = extra.get("reduced"), extra.get("solved"), extra.get("reduced_by")
        if state is None or solved is None or by is None:
            return None
        finder = by.extremes(self.check_node, self.node_zone_code, self.main_pipe)
        return None if finder is None else (finder, state, solved)

    def fastest_pipe(self, r: HydraulicResult) -> tuple[float, int]:
        """(highest pipe velocity [m/s], its link position) of a solution; laterals excluded."""
        fast = self._extremes(r)
        if fast is not None:
            finder, (Q, _, d), (ent, _) = fast
            got = finder.fastest(Q, d, ent)
            if got is not None:
                return got
        idx = np.flatnonzero(self.main_pipe & np.isfinite(r.velocity_ms))
        if not idx.size:
            return np.nan, -1
        v = np.abs(r.velocity_ms[idx])
        a = int(np.argmax(v))
        return float(v[a]), int(idx[a])


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


def run_batch(problem: FireflowProblem, rows: np.ndarray) -> dict[str, np.ndarray]:
    """Evaluate hydrants at row positions ``rows`` (see :func:`.search.run_rows`).

    Every batch starts the draw solver afresh (:meth:`ReducedDrawSolver.reset`: the kept
    base factorization and reduction stay, nothing else carries over), so its numbers do not
    depend on which batches the same worker ran before: serial, local processes and Dask give
    identical results for the same batches."""
    problem.draw_solver().reset()
    return run_rows(problem, rows)
