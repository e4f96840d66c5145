"""Draw solves on the network reduced to its looped core: the fast route of fire flow.

A street network is mostly series: of the nodes a GIS export gives (main ends, valves, tees,
hydrant tees, outlets), most have two links. :class:`gridflow.hydraulics.reduction.Reduction`
eliminates them once per base state, exactly:

- *trees* (dead-end branches, hydrant laterals) are pruned from their leaves: the flow in a
  tree link is the demand beyond it, known without solving (plus the draw on the path from a
  drawn outlet);
- *chains* (runs of two-link nodes between core nodes) carry one unknown flow each; the flow
  in a chain's ``i``-th link is the chain flow minus the loads (demand, trees) of the nodes
  before it, and consecutive links with no load between them are one *group* whose
  Hazen-Williams law is exact with the summed resistances (``h = (r1 + r2) q s^a + (m1 + m2) q
  s^(1/2)``, one regularised flow ``q`` through both);
- the *core* (nodes with three or more links, fixed heads) keeps its heads as unknowns.

:class:`ReducedDrawSolver` runs Newton's method on those equations: chain residuals (group head
losses along the chain minus the head difference of its ends), mass balance at free core
nodes, and the draw's condition. Each step factorizes the core matrix ``sum_c w_c v_c v_c'``
(``w_c`` the chain's conductance ``1 / sum dh/dq``), a small fraction of the whole network's,
and touches arrays over groups and chains only. The draw enters at the node its outlet's tree
hangs on: a core node, or a node inside a chain, which then splits the chain's groups into the
part before it and the part after (that part carries the draw too); the head condition at the
outlet is solved with the step by a bordered solve (``dH = x - dd u``).

The equations are those of the whole network (every link's law, every node's balance): a
converged reduced state rebuilt onto the network has zero mass residual at chain and tree
nodes, zero head residual on every link but a chain's last (which carries the chain residual),
and the same tolerances as :meth:`HydraulicSystem.solve` (the tests check the rebuilt state
with :func:`gridflow.hydraulics.assembly.residuals`).

Scope: Hazen-Williams networks; modes ``"head"``, ``"draw"`` and ``"limit"`` (a held node at
a core node, inside another chain, or on a tree away from the draw). Running pumps are chains
of their own on their curves; a regulating valve's outlet is a node of known head and its
inlet a core node that gives what the zone below it takes. Where a device changes status at
the draw (a pressure-reducing valve opens fully or shuts, a check valve shuts, a pump stops),
the solve is made again by a *status variant*: a solver of this class for the statuses found at
that draw, made once per process from the base state with those statuses (so the same for
every hydrant and every backend) and kept. Anything else (Darcy-Weisbach, pressure-driven
demand, a held node in the draw's own chain or tree, statuses still changing after
``MAX_HOPS`` variants, no convergence) goes to :class:`gridflow.hydraulics.DrawSolver`, which
this class holds and builds when first needed, and is counted (``fallbacks``).

Size: about 750 lines on purpose: the Newton iteration, its bordered draw and held-node steps,
the energy-balanced first step and the rebuild onto the network all read the solver's kept
state (the reduction's arrays, group resistances, factorization slots); the reduction itself
stands alone in :mod:`gridflow.hydraulics.reduction`.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from gridflow.hydraulics.draw import DrawSolver
from gridflow.hydraulics.extremes import DrawExtremes
from gridflow.hydraulics.links import G_FLOOR
from gridflow.hydraulics.reduction import Reduction
from gridflow.hydraulics.results import CLOSED, DRAW_MODES, OPEN, DrawOutcome, HydraulicResult
from gridflow.hydraulics.sparse import FixedPatternSPD
from gridflow.hydraulics.status import update_status
from gridflow.hydraulics.system import HydraulicSystem

__all__ = ["Reduction", "ReducedDrawSolver"]

#: status variants kept per solver, and the variants one solve may pass through
MAX_VARIANTS = 8
MAX_HOPS = 3
#: memory the variants of one solver may hold [bytes], at about 400 bytes a link each
#: (measured: 175 MB at 100k mains, 491k links with the hydrants' outlets; built in about 3 s
#: there, the cost of a few hydrants on the full-Newton route)
VARIANT_BYTES = 1_000_000_000
_BYTES_PER_LINK = 400


def _sum_at(idx: np.ndarray, weights: np.ndarray, n: int) -> np.ndarray:
    """Sums of ``weights`` per position ``idx`` (``np.bincount``, float even when empty)."""
    return np.bincount(idx, weights=weights, minlength=n).astype(float, copy=False)


#: the whole-network arrays of a result, made on first use by :class:`_LazyResult`: those a
#: fire-flow search reads, then the rest
_ARRAYS = ("head_m", "pressure_m", "demand_m3s", "required_demand_m3s", "supplied", "flow_m3s",
           "velocity_ms", "link_state")
_MORE = ("node_inflow_m3s", "headloss_m", "unit_headloss")


class _LazyResult(HydraulicResult):
    """A :class:`HydraulicResult` whose whole-network arrays are rebuilt from the reduced
    state the first time one is read (a fire-flow search reads only the draw and the outlet's
    head of most solves; those are in ``extra``)."""

    def __getattr__(self, name: str):
        # called only for attributes not set yet: the arrays before they are made
        d = self.__dict__
        if name in _ARRAYS or name in _MORE:
            make = d.pop("_make", None)
            if make is not None:
                d.update(make())
            if name in _MORE:
                more = d.pop("_more", None)
                if more is not None:
                    d.update(more(d))
            if name in d:
                return d[name]
        raise AttributeError(name)

    @property
    def arrays_pending(self) -> bool:
        """True until the whole-network arrays are made."""
        return "_make" in self.__dict__

    @classmethod
    def of(cls, make, more, **scalars) -> _LazyResult:
        r = object.__new__(cls)
        r.__dict__.update(scalars)
        r.__dict__["_make"] = make
        r.__dict__["_more"] = more
        return r

    def with_extra(self, extra: dict) -> _LazyResult:
        """A copy with ``extra`` replaced (arrays shared or still to be made)."""
        r = object.__new__(type(self))
        r.__dict__.update(self.__dict__)
        r.__dict__["extra"] = extra
        return r


@dataclasses.dataclass
class _Probe:
    """Where a held node's head comes from: ``H[core] - offset`` at a core node, or
    ``H[a] - (sum of the chain's group losses before it + share x its group's loss) -
    offset`` inside chain ``chain``; ``offset``: the base drop down a tree to the node."""

    node: int
    core: int
    chain: int
    g0: int
    gc: int
    share: float
    offset: float


@dataclasses.dataclass
class _Entry:
    k: int
    node: int
    core: int            # core position of the entry node, -1 when inside a chain
    chain: int           # its chain, -1 at a core node
    g0: int              # the chain's groups: [g0, g1); from gs on they carry the draw
    gs: int
    g1: int
    path: np.ndarray     # tree links from the entry node to k
    path_flow: np.ndarray  # their flows from the entry side toward k, without the draw
    path_r: np.ndarray
    path_m: np.ndarray | None


class ReducedDrawSolver:
    """A :class:`DrawSolver` replacement on the reduced network (see the module notes), with
    the same :meth:`solve` and :meth:`blend`; falls back to :class:`DrawSolver` where it does
    not apply.

    Parameters
    ----------
    system : HydraulicSystem
    base : HydraulicResult
    keep : ndarray of int, optional
        Nodes draws will be made at (each a group boundary); default every node may be
        (no groups merged across any node with a tree).
    reduction : Reduction, optional
        Made before for the same system, base state and ``keep`` (it depends on nothing
        else): many solvers may share one.
    refactor_ratio, chord_within : float
        Newton's steps (a factorization each) while the scaled residual (largest residual /
        its tolerance) is above ``chord_within``; below it, steps with the last factorization
        while each shrinks the scaled residual at least ``1 / refactor_ratio`` times. The
        first step from the base state uses the base state's factorization, made once.
        ``chord_within = 0`` (the default) is plain Newton, which measured fastest: with
        100 or 1000 the steps per hydrant went from 7.3 to 13-18 and the factorizations up
        (stale slopes on links near zero flow throw the residual back up).
    """

    def __init__(self, system: HydraulicSystem, base: HydraulicResult, *,
                 keep: np.ndarray | None = None, reduction: Reduction | None = None,
                 refactor_ratio: float = 0.3, chord_within: float = 0.0) -> None:
        self.sys, self.base = system, base
        self._full: DrawSolver | None = None
        self.red: Reduction
        self.fallbacks = 0
        #: factorizations of the core matrix made so far (a variant's counted on its root)
        self.factorizations = 0
        #: solves answered by a variant: a device's status changed at the draw
        self.variant_solves = 0
        self._keep = keep
        self._root: ReducedDrawSolver = self
        self._variants: dict[bytes, ReducedDrawSolver] = {}
        self._extremes: dict[tuple, DrawExtremes] = {}
        self._state_key = np.asarray(base.link_state, dtype=np.int8).tobytes()
        self._changed: np.ndarray | None = None
        self.refactor_ratio = float(refactor_ratio)
        self.chord_within = float(chord_within)
        self._w: dict[str, np.ndarray] = {}
        self._g: dict[str, np.ndarray] = {}
        #: a slot factorized with a pinned draw's border folded in: ``[nz, b[nz], gamma,
        #: F^-1 b]`` (the matrix is ``A + b b' / gamma``, ``b`` nonzero at ``nz`` only;
        #: ``F^-1 b`` made when first needed)
        self._border: dict[str, list] = {}
        self._base_eval: tuple[np.ndarray, ...] | None = None
        self._episode = 0
        self._work_owner: tuple[int, int] = (-1, -1)
        opt, laws = system.opt, system.laws
        self.usable = False
        self.why_not = ""
        if opt.pressure_driven or not base.converged:
            self.why_not = "pressure-driven demand or no base solution"
            return
        if laws.dw:
            self.why_not = "Darcy-Weisbach friction"
            return
        full = self.full()
        fr, to = system.fr, system.to
        # running pumps are chains of their own; a regulating valve holds its outlet's head
        # (a node of known head) and passes what the zone below it takes, drawn from its
        # inlet (a core node)
        pumps = np.flatnonzero(laws.pump_on & full.conducting)
        prvs = np.flatnonzero(full.regulating)
        anchor = np.zeros(system.nn, dtype=bool)
        anchor[fr[pumps]] = True
        anchor[to[pumps]] = True
        anchor[fr[prvs]] = True
        anchor &= full.free
        keep_mask = np.zeros(system.nn, dtype=bool)
        if keep is None:
            keep_mask[:] = True
        else:
            keep_mask[np.asarray(keep, dtype=np.int64)] = True
        if reduction is None:
            try:
                reduction = Reduction(system.fr, system.to, full.conducting, full.dirichlet,
                                      full.demand, keep_mask, anchor)
            except ValueError as exc:
                self.why_not = str(exc)
                return
        self.red = reduction
        red = self.red
        self.r_link = np.asarray(laws.r_hw, dtype=float)
        m = np.asarray(laws.m_minor, dtype=float)
        self.m_link = m if bool((m > 0).any()) else None
        self.rg = red.sums(self.r_link)
        mg = red.sums(self.m_link) if self.m_link is not None else None
        self.mg = mg if mg is not None and bool((mg > 0).any()) else None
        # each chain link's share of its group's head loss (the law is one power of the
        # group's flow: h_l = r_l / r_g h_g), where the group has no minor loss
        gl = np.repeat(np.arange(len(self.rg)), np.diff(np.append(red.group_link_start,
                                                                  len(red.chain_links))))
        self.link_group = gl
        rl = self.r_link[red.chain_links]
        with np.errstate(invalid="ignore", divide="ignore"):
            self.link_share = np.where(self.rg[gl] > 0, rl / self.rg[gl], 0.0)
        self.free_core = full.free[red.core_nodes]
        self.free_core_f = self.free_core.astype(float)
        K = len(red.core_nodes)
        self.K = K
        ca, cb = red.ca, red.cb
        self.links2 = np.flatnonzero(ca != cb)
        self.pattern = FixedPatternSPD(K, ca[self.links2], cb[self.links2],
                                       backend=opt.backend)
        fa, fb = self.free_core[ca], self.free_core[cb]
        # a chain from a node back to itself adds nothing to the matrix (v_c = 0)
        self._fa = (fa & (ca != cb)).astype(float)
        self._fb = (fb & (ca != cb)).astype(float)
        self._both = (fa & fb)[self.links2].astype(float)
        self._known = np.flatnonzero(~self.free_core)
        self.h_core0 = full.h0[red.core_nodes]
        # pumps: their groups (one link each, along the link) and curves
        where = np.empty(system.nl, dtype=np.int64)
        where[red.chain_links] = np.arange(len(red.chain_links))
        self.pump_groups = self.link_group[where[pumps]]
        self.pump_law = (laws.pump_shutoff[pumps], laws.pump_lin[pumps], laws.pump_quad[pumps])
        # regulating valves: links, inlet and outlet core positions; a valve's flow is the
        # outflow of its outlet node, that node's own load included, plus the flows of the
        # valves drawing from it: f = (I - M)^-1 f_own, M[i, j] = 1 where valve j's inlet is
        # valve i's outlet
        self.prv_links = prvs
        self.prv_in = red.core_pos[fr[prvs]]
        self.prv_out = red.core_pos[to[prvs]]
        nv = len(prvs)
        chain_of_valves = (self.prv_out[:, None] == self.prv_in[None, :]).astype(float)
        self.prv_pass = np.linalg.inv(np.eye(nv) - chain_of_valves) if nv else np.zeros((0, 0))
        self.load_all_core = red.acc[red.core_nodes].copy()
        outlets = np.unique(to[prvs])
        self.load_all_core[red.core_pos[outlets]] += full.demand[outlets]
        # trees at the base state: link flows, drops from parent to child, drops from root
        tl = red.tree_links
        self.tree_q0 = red.tree_sign * red.tree_flow
        self.tree_drop0 = DrawSolver._fused_law(
            red.tree_flow, self.r_link[tl], None if self.m_link is None else self.m_link[tl])[0]
        depth = np.zeros(system.nn)
        for lk, child, parent in reversed(red.rounds):
            depth[child] = depth[parent] + self.tree_drop0[red.tree_index[lk]]
        self.tree_depth_drop = depth[red.tree_child]
        self._chain_minor = self.m_link is not None and bool(
            (self.m_link[red.chain_links] > 0).any())
        self._some_dry = not bool(full.supplied.all())
        self._delivered = np.where(full.supplied, full.demand, 0.0)
        self.Q0 = red.chain_first_sign * full.q0[red.chain_first_link]
        self.usable = True

    # ------------------------------------------------------------------ pieces
    def reset(self) -> None:
        """Forget everything one solve may pass to the next (the working factorization, the
        whole-network solver and its factorizations); the reduction and the base state's
        factorization stay. Solves after a reset give the same numbers as on a new solver."""
        self._full = None
        self._work_owner = (-1, -1)
        self._w.pop("work", None)
        self._g.pop("work", None)
        self._border.pop("work", None)
        for v in self._variants.values():
            v.reset()

    def extremes(self, check: np.ndarray, zone: np.ndarray, main_pipe: np.ndarray
                 ) -> DrawExtremes | None:
        """The lowest-pressure and fastest-pipe finder for this solver's solutions (made once
        per set of arrays; None where it does not apply)."""
        key = (id(check), id(zone), id(main_pipe))
        got = self._extremes.get(key)
        if got is None:
            got = self._extremes[key] = DrawExtremes(self, check, zone, main_pipe)
        return got if got.usable else None

    @staticmethod
    def no_entry() -> _Entry:
        """An entry that draws nothing (a rebuild of the base state)."""
        z = np.zeros(0, dtype=np.int64)
        return _Entry(-1, -1, -1, -1, 0, 0, 0, z, np.zeros(0), np.zeros(0), None)

    def full(self) -> DrawSolver:
        """The whole-network draw solver (built when first needed)."""
        if self._full is None:
            self._full = DrawSolver(self.sys, self.base, factor=False)
        return self._full


    def blend(self, result: HydraulicResult, t: float) -> HydraulicResult:
        """As :meth:`DrawSolver.blend`. A result of this solver is blended in reduced form
        (chain flows, core heads, draw); its whole-network arrays are those of ``result``
        and the blend is made on them only if the whole-network solver takes the start."""
        owner = result.extra.get("reduced_by", self)
        if owner is not self:
            return owner.blend(result, t)  # made by a variant of this solver
        got = result.extra.get("reduced")
        if got is None:
            return self.full().blend(result, t)
        t = float(t)
        Q, H, d = got
        n = self.sys.laws.flow_exponent
        extra = {"draw_m3s": t * d, "factor_token": None, "blend": (result, t),
                 "reduced_by": self,
                 "reduced": (self.Q0 + t * (Q - self.Q0),
                             self.h_core0 + t ** n * (H - self.h_core0), t * d)}
        if isinstance(result, _LazyResult):
            return result.with_extra(extra)
        return dataclasses.replace(result, extra=extra)

    def _entry(self, k: int) -> _Entry | None:
        red = self.red
        node, path = red.entry(k)
        if not self.full().free[node] and not len(path):
            return None  # a node of known head
        p = np.asarray(path[::-1], dtype=np.int64)
        # flows toward k in each path link without the draw: the demand beyond it
        flow = red.tree_flow[red.tree_index[p]]
        if red.core_pos[node] >= 0:
            return _Entry(k, node, int(red.core_pos[node]), -1, 0, 0, 0, p, flow,
                          self.r_link[p], None if self.m_link is None else self.m_link[p])
        c = int(red.node_chain[node])
        if c < 0:
            return None
        pos_in = int(red.node_pos[node])
        g0 = int(red.chain_group_start[c])
        g1 = int(red.chain_group_start[c + 1]) if c + 1 < len(red.chain_group_start) \
            else len(red.group_chain)
        gs = g0 + int(np.searchsorted(red.group_index[g0:g1], pos_in))
        if gs >= g1 or red.group_index[gs] != pos_in:
            return None  # not a group boundary: cannot split here
        return _Entry(k, node, -1, c, g0, gs, g1, p, flow, self.r_link[p],
                      None if self.m_link is None else self.m_link[p])

    def _law(self, phi: np.ndarray, r: np.ndarray | None = None, m: np.ndarray | None = None,
             pumps: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Head loss and its derivative of every group at flows ``phi`` (pumps by their
        curve, as :class:`LinkLaws` has them); or of some groups, with their resistances
        ``r``, ``m`` and the pumps' positions among them."""
        if r is None:
            r, m, pumps = self.rg, self.mg, self.pump_groups
        h, g = DrawSolver._fused_law(phi, r, m)
        if pumps is not None and len(pumps):
            q = phi[pumps]
            aq = np.abs(q)
            h0, h1, h2 = self.pump_law
            h[pumps] = -(h0 + h1 * q + h2 * q * aq)
            g[pumps] = np.maximum(-(h1 + 2.0 * h2 * aq), G_FLOOR)
        return h, g

    def _valve_flows(self, out: np.ndarray) -> np.ndarray:
        """Flows of the regulating valves from the core nodes' outflows ``out`` (loads
        included, valves not yet): each passes what its outlet node sends on."""
        return self.prv_pass @ out[self.prv_out]

    def _finish_mass(self, out: np.ndarray) -> np.ndarray:
        """The mass residuals of the free core nodes from their link outflows ``out`` (the
        draw included; changed in place): loads added, the regulating valves' flows drawn
        from their inlets."""
        out += self.load_all_core
        if len(self.prv_links):
            flows = self._valve_flows(out)
            out += _sum_at(self.prv_in, flows, self.K)
        out *= self.free_core_f
        return out

    def _base_residuals(self) -> tuple[np.ndarray, ...]:
        """``(group losses, group derivatives, chain residuals, mass residuals)`` at the base
        state with no draw (made once, read-only: every solve from the base state starts
        there)."""
        got = self._base_eval
        if got is None:
            red = self.red
            hg, gg = self._law(self.Q0[red.group_chain] - red.group_off)
            e = _sum_at(red.group_chain, hg, red.n_chains)
            e -= self.h_core0[red.ca]
            e += self.h_core0[red.cb]
            out = _sum_at(red.ca, self.Q0, self.K)
            out -= _sum_at(red.cb, self.Q0 - red.tot, self.K)
            got = (hg, gg, e, self._finish_mass(out))
            for a in got:
                a.setflags(write=False)
            self._base_eval = got
        return got

    def _ensure_base(self) -> None:
        """The core matrix at the base flows, kept for the first step of every solve from
        the base state (made once)."""
        if "base" not in self._w:
            red = self.red
            gg = self._base_residuals()[1]
            self._factor(_sum_at(red.group_chain, gg, red.n_chains), gg, "base")

    def _factor(self, G: np.ndarray, gg: np.ndarray, slot: str,
                border: tuple[np.ndarray, np.ndarray, float, int] | None = None) -> None:
        """Factorize the core matrix of chain derivatives ``G`` (group derivatives ``gg``)
        into ``slot``; with ``border = (nz, values, gamma, chain)`` the matrix ``A + b b' /
        gamma`` (a pinned draw's bordered step folded in, see :meth:`_solve`; ``b`` holds
        ``values`` at core positions ``nz``, the ends of ``chain``)."""
        red, pat = self.red, self.pattern
        w = 1.0 / G
        diag = _sum_at(red.ca, w * self._fa, self.K)
        diag += _sum_at(red.cb, w * self._fb, self.K)
        off = -w[self.links2] * self._both
        data: np.ndarray
        if pat.unique_off:
            data = np.zeros(pat.nnz)
            data[pat.off_pos] = off
        else:
            data = _sum_at(pat.off_pos, off, pat.nnz)
        diag[self._known] = 1.0
        if border is not None:
            nz, bv, gamma, bchain = border
            diag[nz] += bv * bv / gamma
        data[pat.diag_pos] = diag
        if border is not None and len(nz) == 2:
            # the border's two nodes are the ends of the draw's chain: their entry exists
            j = int(np.searchsorted(self.links2, bchain))
            data[pat.off_pos[j]] += bv[0] * bv[1] / gamma
        pat.factor(data, slot)
        self._w[slot] = w
        self._g[slot] = gg
        if border is None:
            self._border.pop(slot, None)
        else:
            self._border[slot] = [nz, bv, gamma, None]
        self._root.factorizations += 1

    def _plain_solve(self, rhs: np.ndarray, slot: str) -> np.ndarray:
        """``A^-1 rhs`` with the core matrix ``A`` factorized in ``slot``, a border folded in
        there taken out again (Sherman-Morrison: ``A^-1 = F^-1 + F^-1 b b' F^-1 / (gamma -
        b' F^-1 b)`` for ``F = A + b b' / gamma``)."""
        x = self.pattern.solve(rhs, slot)
        got = self._border.get(slot)
        if got is None:
            return x
        # (the products with b over its two entries: no BLAS call on whole vectors, whose
        # threads would take the other core)
        nz, bv, gamma, fb = got
        if fb is None:
            b = np.zeros(self.K)
            b[nz] = bv
            fb = got[3] = self.pattern.solve(b, slot)
        x += fb * (float(np.sum(bv * x[nz])) / (gamma - float(np.sum(bv * fb[nz]))))
        return x

    # ------------------------------------------------------------------ the solve
    def solve(self, node: int, mode: str, value: float, *, limit_node: int | None = None,
              start: HydraulicResult | None = None, _hops: int = 0) -> DrawOutcome:
        """As :meth:`DrawSolver.solve`.

        Where a device changes status at the draw (a pressure-reducing valve opens fully or
        shuts, a check valve shuts, a pump stops), the solve is made again by a *variant*: a
        solver of this kind on the same network with the statuses found at that draw, made
        once per process from this solver's base state with those statuses (the same for every
        hydrant, so results do not depend on the order of the sweep) and kept (at most
        ``MAX_VARIANTS``, and no more than ``VARIANT_BYTES`` of them: one at 500k mains); again
        while statuses change, at most ``MAX_HOPS`` times. A start
        made by a variant is solved from by that variant."""
        if mode not in DRAW_MODES:
            raise ValueError(f"draw-solve mode {mode!r}: expected one of {DRAW_MODES}")
        if (mode == "limit") != (limit_node is not None):
            raise ValueError("limit_node is given with mode 'limit' and only then")
        owner = start.extra.get("reduced_by", self) if start is not None else self
        if _hops == 0 and owner is not self and getattr(owner, "_root", None) is self._root:
            return owner.solve(node, mode, value, limit_node=limit_node, start=start,
                               _hops=_hops)
        ent = probe = None
        if self.usable:
            ent = self._entry(int(node))
            if ent is not None and limit_node is not None:
                probe = self._probe(int(limit_node), ent)
                if probe is None:
                    ent = None
        if ent is None:
            if mode == "head" and self.usable and _hops < MAX_HOPS:
                # pinned where a regulating valve holds the head: the valve cannot hold it
                # there, it is open (pinned below its setting) or shut (above)
                full = self.full()
                valves = self.prv_links[self.sys.to[self.prv_links] == int(node)]
                if len(valves):
                    state = full.state.copy()
                    state[valves] = OPEN if float(value) < full.h0[int(node)] else CLOSED
                    return self._hop(state, node, mode, value, limit_node, start, _hops)
            return self._fallback(node, mode, value, limit_node, start)
        self._changed = None
        out = self._solve(ent, mode, float(value), start, probe)
        if out.success:
            return out
        changed, self._changed = self._changed, None
        if out.status == 4 and changed is not None and _hops < MAX_HOPS:
            return self._hop(changed, node, mode, value, limit_node, start, _hops)
        return self._fallback(node, mode, value, limit_node, start)

    def _hop(self, state, node, mode, value, limit_node, start, hops: int) -> DrawOutcome:
        """The solve made again by the variant whose base statuses are ``state``."""
        other = self._root._variant(state)
        if other is None or other is self:
            return self._fallback(node, mode, value, limit_node, start)
        got = other.solve(node, mode, value, limit_node=limit_node, start=start,
                          _hops=hops + 1)
        if got.success and hops == 0:
            self._root.variant_solves += 1
        return got

    def _variant(self, state: np.ndarray) -> ReducedDrawSolver | None:
        """The solver of this family whose base statuses are ``state`` (made when first
        needed: this solver's base state with those statuses, its own reduction); None where
        none can be made or kept."""
        key = np.asarray(state, dtype=np.int8).tobytes()
        if key == self._state_key:
            return self
        v = self._variants.get(key)
        if v is None:
            most = min(MAX_VARIANTS, VARIANT_BYTES // (_BYTES_PER_LINK * max(self.sys.nl, 1)))
            if len(self._variants) >= max(1, most):
                return None  # kept ones only: the full-Newton route answers the rest
            base = dataclasses.replace(self.base, link_state=np.asarray(state, dtype=np.int8))
            v = ReducedDrawSolver(self.sys, base, keep=self._keep,
                                  refactor_ratio=self.refactor_ratio,
                                  chord_within=self.chord_within)
            v._root = self
            self._variants[key] = v
        return v if v.usable else None

    def _probe(self, c: int, ent: _Entry) -> _Probe | None:
        """How node ``c``'s head follows from the reduced state, or None where this solver
        does not hold it (a node of known head, in the entry's chain, or below the draw's
        path in its tree)."""
        red = self.red
        offset = 0.0
        if red.gone[c]:
            if red.tree_root[c] == ent.node:
                return None  # the draw's own tree: its drops change with the draw
            offset = float(self.tree_depth_drop[red.tree_index[red.parent_link[c]]])
            c = int(red.tree_root[c])
        if red.core_pos[c] >= 0:
            if not self.free_core[red.core_pos[c]]:
                return None
            return _Probe(c, int(red.core_pos[c]), -1, 0, 0, 0.0, offset)
        cc = int(red.node_chain[c])
        if cc < 0 or cc == ent.chain or self._chain_minor:
            return None
        pos = int(red.node_pos[c])  # the links before the node: positions 0 .. pos - 1
        g0, g1 = self._groups_of(cc)
        gc = g0 + int(np.searchsorted(red.group_index[g0:g1], pos, side="right")) - 1
        # the share of its group's loss on the group's links before the node
        lo = int(red.group_link_start[gc])
        first = int(red.chain_link_start[cc]) + pos
        share = float(np.sum(self.link_share[lo:first]))
        return _Probe(c, int(red.core_pos[red.a[cc]]), cc, g0, gc, share, offset)

    def _groups_of(self, c: int) -> tuple[int, int]:
        red = self.red
        g0 = int(red.chain_group_start[c])
        g1 = int(red.chain_group_start[c + 1]) if c + 1 < len(red.chain_group_start) \
            else len(red.group_chain)
        return g0, g1

    def _fallback(self, node, mode, value, limit_node, start) -> DrawOutcome:
        self._root.fallbacks += 1
        full = self.full()
        full.ensure_factor()
        if start is not None and "blend" in start.extra:
            start = full.blend(*start.extra["blend"])
        return full.solve(node, mode, value, limit_node=limit_node, start=start)

    def _solve(self, ent: _Entry, mode: str, value: float,
               start: HydraulicResult | None, probe: _Probe | None = None) -> DrawOutcome:
        t0 = time.perf_counter()
        red, s, opt = self.red, self.sys, self.sys.opt
        f0 = self._root.factorizations
        K = self.K
        ca, cb = red.ca, red.cb
        pin = mode == "head"
        held = mode == "limit"
        if start is not None and start.extra.get("reduced_by", self) is not self:
            start = None  # another variant's state: from this one's base state instead
        if start is None:
            Q, H, d = self.Q0.copy(), self.h_core0.copy(), 0.0
            self._episode += 1
            slot: str | None = "base"
            self._ensure_base()
        else:
            Q, H, d = self._state_of(start)
            # the working factorization, if this node's episode made it
            slot = "work" if self._work_owner == (ent.k, self._episode) else None
        if mode == "draw":
            d = value
        target = value if (pin or held) else np.nan
        gc, goff = red.group_chain, red.group_off
        C = red.n_chains
        tot = red.tot
        free_f = self.free_core_f
        ftol, htol = opt.flow_tolerance, opt.head_tolerance
        c = ent.chain
        inside = c >= 0
        converged = False
        it = 0
        bvec = np.zeros(K)
        e: np.ndarray = np.zeros(0)
        m: np.ndarray = np.zeros(0)
        hg: np.ndarray = np.zeros(0)
        prev = np.inf
        chord = False
        # from the base state with no draw yet, the first residuals are the base state's
        from_base = start is None and d == 0.0
        for it in range(opt.max_iter + 1):
            if it == 0 and from_base:
                hg, gg, e, m = self._base_residuals()
            else:
                phi = Q[gc] - goff
                if inside:
                    phi[ent.gs:ent.g1] -= d
                hg, gg = self._law(phi)
                e = _sum_at(gc, hg, C)
                e -= H[ca]
                e += H[cb]
                out: np.ndarray = _sum_at(ca, Q, K)
                out -= _sum_at(cb, Q - tot, K)
                if inside:
                    out[cb[c]] += d
                else:
                    out[ent.core] += d
                m = self._finish_mass(out)
            hx = H[ca[c]] - float(np.sum(hg[ent.g0:ent.gs])) if inside else H[ent.core]
            if len(ent.path):
                hp, gp = DrawSolver._fused_law(ent.path_flow + d, ent.path_r, ent.path_m)
                P, dP = float(np.sum(hp)), float(np.sum(gp))
            else:
                P = dP = 0.0
            hk = hx - P
            hc = self._held_head(probe, H, hg) if probe is not None else np.nan
            mass = float(np.max(np.abs(m))) if K else 0.0
            head = float(np.max(np.abs(e))) if len(e) else 0.0
            if not (np.isfinite(mass) and np.isfinite(head) and np.isfinite(hk)):
                break
            offp = abs(hk - target) if pin else abs(hc - target) if held else 0.0
            if mass <= ftol and head <= htol and offp <= htol and it > 0:
                converged = True
                break
            if it == opt.max_iter:
                break
            score = max(mass / ftol, head / htol, offp / htol)
            # a fresh Jacobian at the current point (Newton's step), or the kept one (a
            # chord step: its fixed point is the same solution) while the residual is within
            # `chord_within` times the tolerance and the last chord step shrank it enough
            fresh = slot is None or (it > 0 and (
                score > self.chord_within or (chord and score > self.refactor_ratio * prev)))
            border: tuple[np.ndarray, np.ndarray, float, int] | None = None
            if fresh:
                slot = "work"
                G = _sum_at(gc, gg, C)
                if pin:
                    border = self._pin_border(ent, G, gg, dP, bvec)
                self._factor(G, gg, "work", border)
                self._work_owner = (ent.k, self._episode)
            chord = not fresh
            prev = score
            assert slot is not None
            w, gk = self._w[slot], self._g[slot]
            we = w * e
            rhs: np.ndarray = _sum_at(ca, we, K)
            rhs -= _sum_at(cb, we, K)
            rhs -= m
            rhs *= free_f
            dd = 0.0
            D = float(np.sum(gk[ent.gs:ent.g1])) if inside else 0.0
            folded = border is not None
            if border is not None:
                # the pinned outlet's condition b' dH - gamma dd = s is in the matrix: one
                # solve gives the heads, the draw follows (the bordered step's exact
                # equivalent)
                nz, bv, gamma, _ = border
                sgap = (target - hk) - ((1.0 - D * w[c]) * e[c] if inside else 0.0)
                rhs[nz] += bv * (sgap / gamma)
                x = self.pattern.solve(rhs, slot)
                dd = (float(np.sum(bv * x[nz])) - sgap) / gamma
            else:
                x = self._plain_solve(rhs, slot)
            if (pin or held) and not folded:
                alpha = D * w[c] if inside else 0.0
                self._border_into(bvec, ent, alpha)
                if inside:
                    beta = 1.0 - alpha
                    u = self._plain_solve(bvec, slot)
                    num = alpha * x[ca[c]] + beta * x[cb[c]] + beta * e[c] - (target - hk)
                    den = alpha * u[ca[c]] + beta * u[cb[c]] + beta * D + dP
                elif self.free_core[ent.core]:
                    u = self._plain_solve(bvec, slot)
                    num = x[ent.core] - (target - hk)
                    den = u[ent.core] + dP
                else:
                    # a tree on a node of known head: the draw does not reach the core
                    u = bvec
                    num, den = -(target - hk), dP
                if held and probe is not None:
                    # the held node lands on its head instead of the outlet
                    num, den = self._held_step(probe, x, u, e, w, gk, target - hc)
                dd = num / den
                x -= dd * u
            dQ = w * (x[ca] - x[cb] - e)
            if inside and dd:
                dQ[c] += w[c] * D * dd
            if it == 0 and start is None and pin:
                # from the base state the linear step overshoots the draw (head loss grows
                # faster than flow): scale it so head losses along it balance the known work
                a = self._energy_scale(Q, H, d, dQ, x, dd, ent, target)
                dQ *= a
                x *= a
                dd *= a
            Q += dQ
            H += x
            d += dd
        if not converged:
            return DrawOutcome(success=False, status=3, nit=it,
                               message=f"no convergence in {it} iterations")
        full = self.full()
        mass = float(np.max(np.abs(m))) if len(m) else 0.0
        head = float(np.max(np.abs(e))) if len(e) else 0.0
        if len(self.prv_links):
            raw = _sum_at(ca, Q, K) - _sum_at(cb, Q - tot, K) + self.load_all_core
            if inside:
                raw[cb[c]] += d
            else:
                raw[ent.core] += d
            valves = self._valve_flows(raw)
        else:
            valves = np.zeros(0)
        if full.may_change_status:
            q, h = self._rebuild(Q, H, d, ent, hg, valves)
            changed = full.state.copy()
            if update_status(s.laws, changed, q, h, full.supplied, full.held_fixed,
                             s.always_closed, s.components, tol=opt.status_tolerance,
                             qtol=opt.flow_tolerance):
                self._changed = changed
                return DrawOutcome(success=False, status=4, nit=it,
                                   message="a device would change status at this draw")
            made = (q, h)

            def make():
                return self._arrays(*made)
        else:
            def make():
                return self._arrays(*self._rebuild(Q, H, d, ent, hg, valves))
        msg = (f"converged in {it} iterations on the reduced network; mass residual "
               f"{mass:.2e} m3/s, head residual {head:.2e} m")
        r = _LazyResult.of(
            make, self._more_arrays, iterations=it, status_rounds=1, mass_residual_m3s=mass,
            head_residual_m=head, worst_node_idx=0, worst_link_idx=0, converged=True,
            status="converged",
            mass_tolerance_m3s=opt.flow_tolerance, seconds=time.perf_counter() - t0,
            factorizations=self._root.factorizations - f0, message=msg,
            extra={"draw_m3s": d, "factor_token": None, "reduced": (Q, H, d),
                   "reduced_by": self, "solved": (ent, hg),
                   "node": ent.k, "node_head_m": hk})
        return DrawOutcome(success=True, status=0, message=msg, result=r,
                           draw_m3s=float(d), nit=it)

    def _border_into(self, bvec: np.ndarray, ent: _Entry, alpha: float) -> None:
        """Write into ``bvec`` the border of a draw step at ``ent``: ``alpha`` and ``1 -
        alpha`` at the ends of its chain (``alpha``: the share of the chain's slope after the
        draw's split), or 1 at its core node; nothing at nodes of known head."""
        bvec[:] = 0.0
        if ent.chain >= 0:
            bvec[self.red.ca[ent.chain]] += alpha
            bvec[self.red.cb[ent.chain]] += 1.0 - alpha
            bvec *= self.free_core_f
        elif self.free_core[ent.core]:
            bvec[ent.core] = 1.0

    def _pin_border(self, ent: _Entry, G: np.ndarray, gg: np.ndarray, dP: float,
                    bvec: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, int] | None:
        """The border ``(nz, b[nz], gamma, chain)`` of a pinned draw's Newton step at chain
        derivatives ``G`` (group derivatives ``gg``), to fold into its factorization; None
        where it does not fold (the entry a node of known head, or a core node with no path
        below it: the outlet's head is then the node's, ``gamma = 0``)."""
        if ent.chain >= 0:
            D = float(np.sum(gg[ent.gs:ent.g1]))
            alpha = D / float(G[ent.chain])
            gamma = (1.0 - alpha) * D + dP
        else:
            alpha, gamma = 0.0, dP
        self._border_into(bvec, ent, alpha)
        nz = np.flatnonzero(bvec)
        if not gamma > 0 or not len(nz):
            return None
        return nz, bvec[nz], gamma, ent.chain

    def _held_head(self, pr: _Probe, H: np.ndarray, hg: np.ndarray) -> float:
        """The held node's head at core heads ``H`` and group losses ``hg``."""
        if pr.chain < 0:
            return float(H[pr.core]) - pr.offset
        loss = float(np.sum(hg[pr.g0:pr.gc])) + pr.share * float(hg[pr.gc])
        return float(H[pr.core]) - loss - pr.offset

    def _held_step(self, pr: _Probe, x, u, e, w, gk, gap: float) -> tuple[float, float]:
        """``(num, den)`` of the draw change putting the held node on its head (``gap``:
        its head change needed), with ``dH = x - dd u``."""
        if pr.chain < 0:
            return float(x[pr.core]) - gap, float(u[pr.core])
        red = self.red
        cc = pr.chain
        a, b = red.ca[cc], red.cb[cc]
        # dH_node = dH_a - B dQ, dQ = w (dH_a - dH_b - e): B the derivative of the loss
        # before the node
        beta = (float(np.sum(gk[pr.g0:pr.gc])) + pr.share * float(gk[pr.gc])) * w[cc]
        num = (1.0 - beta) * x[a] + beta * x[b] + beta * e[cc] - gap
        den = (1.0 - beta) * u[a] + beta * u[b]
        return float(num), float(den)

    def _state_of(self, start: HydraulicResult) -> tuple[np.ndarray, np.ndarray, float]:
        """``(Q, H, d)``: chain flows, core heads and draw of a start."""
        red = self.red
        got = start.extra.get("reduced")
        if got is not None and start.extra.get("reduced_by", self) is self:
            return got[0].copy(), got[1].copy(), float(got[2])
        Q = red.chain_first_sign * start.flow_m3s[red.chain_first_link]
        H = np.nan_to_num(start.head_m)[red.core_nodes]
        return Q, H, float(start.extra.get("draw_m3s", 0.0))

    def _energy_scale(self, Q, H, d, dQ, x, dd, ent: _Entry, target: float) -> float:
        """Step length ``a`` in (0, 1] along a step from the base state (as
        :meth:`DrawSolver._energy_scale`, on groups): the head losses along the step, weighted
        by its flow changes, must add up to the work of the known heads, ``sum_i H_i
        dout_i - H_k dd`` over fixed-head core nodes ``i`` (link outflow changes ``dout``)
        and the pinned outlet ``k``."""
        red = self.red
        ca, cb, K = red.ca, red.cb, self.K
        dout = _sum_at(ca, dQ, K)
        dout -= _sum_at(cb, dQ, K)
        if ent.chain >= 0:
            dout[cb[ent.chain]] += dd
        known = ~self.free_core
        if ent.chain < 0:
            dout[ent.core] += dd  # the draw path's outflow (counted where the head is known)
        work = float(np.sum((H + x)[known] * dout[known])) - target * dd
        phi = Q[red.group_chain] - red.group_off
        dphi = dQ[red.group_chain]
        if ent.chain >= 0:
            phi[ent.gs:ent.g1] -= d
            dphi[ent.gs:ent.g1] -= dd
        # the groups the step moves (the others add next to nothing to either side)
        big = float(np.max(np.abs(dphi))) if len(dphi) else 0.0
        sel = np.abs(dphi) > 1e-3 * big
        sel[self.pump_groups] = True
        on = np.flatnonzero(sel)
        dfs, qs = dphi[on], phi[on]
        rs = self.rg[on]
        ms = None if self.mg is None else self.mg[on]
        pumps = np.searchsorted(on, self.pump_groups)
        inv_n = 1.0 / float(self.sys.laws.flow_exponent)
        a = 1.0
        for _ in range(8):
            hl, g = self._law(qs + a * dfs, rs, ms, pumps)
            total = float(np.sum(dfs * hl))
            dtot = float(np.sum(dfs * dfs * g))
            if len(ent.path) and dd:
                hp, gp = DrawSolver._fused_law(ent.path_flow + d + a * dd, ent.path_r,
                                               ent.path_m)
                total += dd * float(np.sum(hp))
                dtot += dd * dd * float(np.sum(gp))
            if not dtot > 0:
                return 1.0
            if total > 0 and work > 0:
                step = (total ** inv_n - work ** inv_n) / (inv_n * total ** (inv_n - 1.0) * dtot)
            else:
                step = (total - work) / dtot
            a_new = min(1.0, max(0.05 * a, a - step))
            if abs(a_new - a) <= 1e-3 * a:
                return a_new
            a = a_new
        return a

    # ------------------------------------------------------------------ back to the network
    def _rebuild(self, Q, H, d, ent: _Entry, hg: np.ndarray, valves: np.ndarray):
        """Link flows and node heads of the whole network from a reduced state (``hg``: the
        groups' head losses at that state; ``valves``: the regulating valves' flows)."""
        red, s = self.red, self.sys
        full = self.full()
        q = np.zeros(s.nl)
        phi = Q[red.chain_of_link] - red.link_off
        if ent.chain >= 0:
            ls = red.chain_link_start
            lo = int(ls[ent.chain])
            hi = int(ls[ent.chain + 1]) if ent.chain + 1 < len(ls) else len(phi)
            phi[lo:hi][red.link_index[lo:hi] >= red.group_index[ent.gs]] -= d
        q[red.chain_links] = red.link_sign * phi
        q[red.tree_links] = self.tree_q0
        if len(self.prv_links):
            q[self.prv_links] = valves
        if len(ent.path):
            q[ent.path] += red.tree_sign[red.tree_index[ent.path]] * d
        # head drops along the chains
        if self._chain_minor:
            drop = red.link_sign * DrawSolver._fused_law(
                q[red.chain_links], self.r_link[red.chain_links],
                None if self.m_link is None else self.m_link[red.chain_links])[0]
        else:
            drop = self.link_share * hg[self.link_group]
        h = full.h0.copy()
        h[red.core_nodes] = H
        cs = np.cumsum(drop)
        st = red.link_chain_start
        cs -= cs[st] - drop[st]
        il = red.inner_links
        h[red.inner_exit] = H[red.inner_core] - cs[il]
        # down the trees: the base drops from each tree's root, corrected below the draw path
        tn = red.tree_child
        h[tn] = h[red.tree_root[tn]] - self.tree_depth_drop
        if len(ent.path):
            self.below_path(h, ent, d)
        return q, h

    def below_path(self, h: np.ndarray, ent: _Entry, d: float) -> None:
        """Lower, in place, the heads ``h`` of the nodes below the draw's path by what draw
        ``d`` adds to the head loss of each path link above them."""
        red = self.red
        new = DrawSolver._fused_law(ent.path_flow + d, ent.path_r, ent.path_m)[0]
        extra = new - self.tree_drop0[red.tree_index[ent.path]]
        for lk, dx in zip(ent.path, extra):
            v = red.tree_child[red.tree_index[lk]]
            lo = red.pre_pos[v]
            h[red.preorder[lo:lo + red.sub_size[v]]] -= dx

    def _arrays(self, q, h) -> dict:
        """The whole-network arrays a fire-flow search reads, of flows ``q``, heads ``h``."""
        s, net = self.sys, self.sys.net
        full = self.full()
        head_m = np.where(full.supplied, h, np.nan) if self._some_dry else h
        return {"head_m": head_m, "pressure_m": head_m - net.elevation_m,
                "demand_m3s": self._delivered, "required_demand_m3s": full.demand,
                "supplied": full.supplied, "flow_m3s": q, "velocity_ms": q / s.laws.area,
                "link_state": full.state}

    def _more_arrays(self, d: dict) -> dict:
        """The other arrays: node inflows, link head losses and unit head losses."""
        s, net = self.sys, self.sys.net
        q, head_m = d["flow_m3s"], d["head_m"]
        inflow = _sum_at(s.to, q, s.nn)
        inflow -= _sum_at(s.fr, q, s.nn)
        dh = np.where(self.full().conducting, head_m[s.fr] - head_m[s.to], np.nan)
        length = net.length_m
        with np.errstate(divide="ignore", invalid="ignore"):
            unit = np.where(s.laws.is_pipe & (length > 0), np.abs(dh) / length, np.nan)
        return {"node_inflow_m3s": inflow, "headloss_m": dh, "unit_headloss": unit}
