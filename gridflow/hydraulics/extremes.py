"""The lowest pressure and the fastest pipe of a reduced draw solution, found without
rebuilding the whole network (the system-wide check of every fire-flow search).

A draw solution on the reduced network (:class:`gridflow.hydraulics.reduced.ReducedDrawSolver`)
knows the core heads and the chain flows; the heads of the nodes inside the chains and on the
trees follow from them. Rebuilding them all costs as much as a Newton step, and the check
needs only the lowest pressure and the fastest pipe. Bounds decide which parts can hold them:

- a node inside a chain: the links' head losses rise with their flows, so whichever way the
  chain's flow moves, the node's head moves by at least the smaller of its two ends' head
  changes, less what the chain's own head residual may move (its residual at the base state
  plus the solver's head tolerance): its pressure is at least its base pressure plus that;
- a tree node: its tree's flows do not change (but on the draw's own path), so its head moves
  exactly as its root's;
- a chain's fastest pipe: a link's velocity moves by at most the chain's flow change over the
  link's area.

Every *unit* (a chain with the trees on its inner nodes, or the trees on one core node) whose
bound could beat the best value found exactly is rebuilt exactly by the same formulas as the
whole-network rebuild; the others cannot hold the extreme. Core nodes, the draw's own chain
and the draw's own tree are always exact. The answer is the rebuild's: the same node or
link, ties to the lowest position, values equal to rounding.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from gridflow.hydraulics.draw import DrawSolver

if TYPE_CHECKING:
    from gridflow.hydraulics.reduced import ReducedDrawSolver, _Entry

__all__ = ["DrawExtremes"]


def _ranges(start: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """The positions ``start[i]:stop[i]`` of every ``i``, concatenated."""
    n = stop - start
    if not len(n) or int(n.sum()) == 0:
        return np.zeros(0, dtype=np.int64)
    rep = np.repeat(start - np.concatenate([[0], np.cumsum(n)[:-1]]), n)
    return np.arange(int(n.sum()), dtype=np.int64) + rep


class DrawExtremes:
    """Lowest checked pressure and fastest main pipe of ``solver``'s draw solutions.

    Parameters
    ----------
    solver : ReducedDrawSolver
    check : ndarray of bool
        Nodes whose pressure is checked (per node of the solver's system).
    zone : ndarray of int
        Zone code per node; a search compares nodes of one zone.
    main_pipe : ndarray of bool
        Links whose velocity counts (per link).
    """

    def __init__(self, solver: ReducedDrawSolver, check: np.ndarray, zone: np.ndarray,
                 main_pipe: np.ndarray) -> None:
        s, red = solver, solver.red
        sysm, full = s.sys, s.full()
        nn = sysm.nn
        C, K = red.n_chains, s.K
        self.s, self.C = s, C
        self.elev = np.asarray(sysm.net.elevation_m, dtype=float)
        self.zone = np.asarray(zone, dtype=np.int64)
        self.check, self.main_pipe = check, main_pipe
        ok = np.asarray(check, dtype=bool) & full.supplied
        self.ok = ok
        # the base state by the rebuild's own formulas
        gl0, _ = s._law(s.Q0[red.group_chain] - red.group_off)
        q0, h0 = s._rebuild(s.Q0, s.h_core0, 0.0, s.no_entry(), gl0,
                            np.zeros(len(s.prv_links)))
        # a chain's head residual at the base state and at a solution (within the head
        # tolerance) loosen its bound
        e0 = (np.bincount(red.group_chain, weights=gl0, minlength=C)
              - s.h_core0[red.ca] + s.h_core0[red.cb])
        self.slack = np.abs(e0) + float(sysm.opt.head_tolerance) + 1e-9
        # units: chain c (its inner nodes and the trees on them), C + core position (the trees
        # on a core node); core nodes themselves are exact, other nodes keep their base head
        unit = np.full(nn, -2, dtype=np.int64)
        unit[red.core_nodes] = -1
        unit[red.inner_exit] = red.chain_of_link[red.inner_links]
        tn = red.tree_child
        root = red.tree_root[tn]
        unit[tn] = np.where(red.core_pos[root] >= 0, C + red.core_pos[root],
                            red.node_chain[root])
        #: every tree hangs on a core node or a chain's inner node (else: rebuild instead)
        self.usable = bool((unit[tn] >= 0).all())
        self.n_units = C + K
        p0 = h0 - self.elev
        cand = np.flatnonzero(ok & (unit >= 0))
        u = unit[cand]
        self.base_min = np.full(C + K, np.inf)
        np.minimum.at(self.base_min, u, p0[cand])
        zlo = np.full(C + K, np.iinfo(np.int64).max)
        zhi = np.full(C + K, np.iinfo(np.int64).min)
        np.minimum.at(zlo, u, self.zone[cand])
        np.maximum.at(zhi, u, self.zone[cand])
        self.unit_zone = zlo
        self.mixed = (zlo != zhi) & np.isfinite(self.base_min)
        # nodes of fixed head outside every unit: their base pressures, exact
        fixed = np.flatnonzero(ok & (unit == -2))
        self.fixed_nodes, self.fixed_p = fixed, p0[fixed]
        core = red.core_nodes
        self.core_ok = ok[core]
        self.core_zone = self.zone[core]
        self.core_elev = self.elev[core]
        # tree nodes sorted by unit
        order = np.argsort(unit[tn], kind="stable")
        self.tree_nodes = tn[order]
        self.tree_start = np.searchsorted(unit[tn][order], np.arange(C + K + 1))
        depth = np.zeros(nn)
        depth[tn] = s.tree_depth_drop
        self.depth = depth
        ls = red.chain_link_start
        self.link_lo = ls
        self.link_hi = np.append(ls[1:], len(red.chain_links)).astype(np.int64)
        self._scratch = np.zeros(nn)
        # velocities: chains' base maximum and largest 1/area over main pipes; tree links by
        # base speed, fastest first (ties by link position)
        area = np.asarray(sysm.laws.area, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            inv = np.where(area > 0, 1.0 / area, np.inf)
            v0 = np.abs(q0 / area)  # read only where the area is positive
        self.area = area
        main_ok = np.asarray(main_pipe, dtype=bool) & np.isfinite(inv)
        self.main_ok = main_ok
        cl = red.chain_links
        on = main_ok[cl]
        self.v_base = np.full(C, -np.inf)
        self.inv_area = np.zeros(C)
        np.maximum.at(self.v_base, red.chain_of_link[on], v0[cl[on]])
        np.maximum.at(self.inv_area, red.chain_of_link[on], inv[cl[on]])
        tl = red.tree_links[main_ok[red.tree_links]]
        tv = v0[tl]
        o = np.lexsort((tl, -tv))
        self.tree_links, self.tree_v = tl[o], tv[o]

    # ------------------------------------------------------------------ exact parts
    def _heads(self, units: np.ndarray, Q: np.ndarray, H: np.ndarray, d: float, ent: _Entry,
               hg: np.ndarray, drawn: bool) -> tuple[np.ndarray, np.ndarray]:
        """``(nodes, heads)`` of the inner and tree nodes of ``units``, by the rebuild's
        formulas (``drawn``: the draw's own tree is among them)."""
        s, red, C = self.s, self.s.red, self.C
        chains = units[units < C]
        L = _ranges(self.link_lo[chains], self.link_hi[chains])
        if s._chain_minor:
            lcs = red.chain_links[L]
            phi = Q[red.chain_of_link[L]] - red.link_off[L]
            if ent.chain >= 0:
                phi -= np.where((red.chain_of_link[L] == ent.chain)
                                & (red.link_index[L] >= red.group_index[ent.gs]), d, 0.0)
            drop = red.link_sign[L] * DrawSolver._fused_law(
                red.link_sign[L] * phi, s.r_link[lcs],
                None if s.m_link is None else s.m_link[lcs])[0]
        else:
            drop = s.link_share[L] * hg[s.link_group[L]]
        cs = np.cumsum(drop)
        n = self.link_hi[chains] - self.link_lo[chains]
        first = np.concatenate([[0], np.cumsum(n)[:-1]]).astype(np.int64)
        if len(L):
            cs -= np.repeat(cs[first] - drop[first], n)
        inner = ~red.link_last[L]
        nodes_in = red.link_exit[L][inner]
        heads_in = H[red.ca[red.chain_of_link[L][inner]]] - cs[inner]
        hs = self._scratch
        hs[nodes_in] = heads_in
        tn = self.tree_nodes[_ranges(self.tree_start[units], self.tree_start[units + 1])]
        root = red.tree_root[tn]
        rc = red.core_pos[root]
        hr = np.where(rc >= 0, H[np.maximum(rc, 0)], hs[root])
        ht = hr - self.depth[tn]
        if drawn and len(ent.path) and len(tn):
            hs[tn] = ht
            s.below_path(hs, ent, d)
            ht = hs[tn]
        return np.concatenate([nodes_in, tn]), np.concatenate([heads_in, ht])

    def _entry_unit(self, ent: _Entry) -> int:
        """The unit holding the draw's chain or tree (-1: none)."""
        if ent.chain >= 0:
            return int(ent.chain)
        if len(ent.path) and ent.core >= 0:
            return self.C + int(ent.core)
        return -1

    # ------------------------------------------------------------------ the bounds
    def pressure_bounds(self, H: np.ndarray, zone: int) -> np.ndarray:
        """Per unit, a pressure no checked node of ``zone`` in it is below at core heads ``H``
        (``inf``: none of its checked nodes is in ``zone``; ``-inf``: its nodes span zones)."""
        C, red = self.C, self.s.red
        dH = H - self.s.h_core0
        lb = self.base_min.copy()
        lb[:C] += np.minimum(dH[red.ca], dH[red.cb]) - self.slack
        lb[C:] += dH - 1e-9
        lb[(self.unit_zone != zone) & ~self.mixed] = np.inf
        lb[self.mixed] = -np.inf
        return lb

    def speed_bounds(self, Q: np.ndarray) -> np.ndarray:
        """Per chain, a speed none of its main pipes exceeds at chain flows ``Q`` (the draw's
        own chain aside)."""
        return (self.v_base + np.abs(Q - self.s.Q0) * self.inv_area) * (1.0 + 1e-9) + 1e-12

    # ------------------------------------------------------------------ the answers
    def lowest(self, Q: np.ndarray, H: np.ndarray, d: float, ent: _Entry, hg: np.ndarray,
               zone: int, exclude: int) -> tuple[float, int]:
        """``(pressure [m], node)``: the lowest pressure among checked, supplied nodes of
        ``zone`` other than ``exclude`` (``inf``, -1 where there is none)."""
        s = self.s
        red = s.red
        lb = self.pressure_bounds(H, zone)
        nodes: list[np.ndarray] = []
        press: list[np.ndarray] = []
        cm = self.core_ok & (self.core_zone == zone)
        nodes.append(red.core_nodes[cm])
        press.append(H[cm] - self.core_elev[cm])
        fm = self.zone[self.fixed_nodes] == zone
        nodes.append(self.fixed_nodes[fm])
        press.append(self.fixed_p[fm])
        forced = self._entry_unit(ent)

        # the core's lowest is exact; a unit whose bound is above it holds no lower node, and
        # the units at or below it are rebuilt (with the draw's own, always)
        n, p = np.concatenate(nodes), np.concatenate(press)
        p = p[n != exclude]
        best = float(p.min()) if len(p) else np.inf
        units = np.flatnonzero((lb <= best) & (lb < np.inf))
        if forced >= 0:
            units = np.union1d(units, [forced])
        if len(units):
            n, h = self._heads(units, Q, H, d, ent, hg,
                               forced >= 0 and bool((units == forced).any()))
            keep = self.ok[n] & (self.zone[n] == zone)
            nodes.append(n[keep])
            press.append(h[keep] - self.elev[n[keep]])
        n, p = np.concatenate(nodes), np.concatenate(press)
        keep = n != exclude
        n, p = n[keep], p[keep]
        if not len(n):
            return np.inf, -1
        low = p.min()
        return float(low), int(n[p == low].min())

    def fastest(self, Q: np.ndarray, d: float, ent: _Entry) -> tuple[float, int] | None:
        """``(speed [m/s], link)`` of the fastest main pipe (ties to the lowest link
        position); None where every main pipe is still (the caller rebuilds)."""
        s, red = self.s, self.s.red
        links: list[np.ndarray] = []
        speeds: list[np.ndarray] = []
        path = np.asarray(ent.path, dtype=np.int64)
        if len(path):
            pm = path[self.main_ok[path]]
            qp = s.tree_q0[red.tree_index[pm]] + red.tree_sign[red.tree_index[pm]] * d
            links.append(pm)
            speeds.append(np.abs(qp / self.area[pm]))
        tl, tv = self.tree_links, self.tree_v
        if len(tl):
            # the fastest tree link off the path, and every one as fast
            off = ~np.isin(tl[:len(path) + 1], path)
            if off.any():
                top = tv[int(np.argmax(off))]
                m = int(np.searchsorted(-tv, -top, side="right"))
                sel = ~np.isin(tl[:m], path)
                links.append(tl[:m][sel])
                speeds.append(tv[:m][sel])
            else:
                links.append(tl[~np.isin(tl, path)])
                speeds.append(tv[~np.isin(tl, path)])

        def exact(chains: np.ndarray) -> None:
            L = _ranges(self.link_lo[chains], self.link_hi[chains])
            lk = red.chain_links[L]
            on = self.main_ok[lk]
            L, lk = L[on], lk[on]
            phi = Q[red.chain_of_link[L]] - red.link_off[L]
            if ent.chain >= 0:
                phi -= np.where((red.chain_of_link[L] == ent.chain)
                                & (red.link_index[L] >= red.group_index[ent.gs]), d, 0.0)
            links.append(lk)
            speeds.append(np.abs(red.link_sign[L] * phi / self.area[lk]))

        if ent.chain >= 0:
            exact(np.array([ent.chain], dtype=np.int64))
        best = max((float(v.max()) for v in speeds if len(v)), default=0.0)
        pick = np.flatnonzero(self.speed_bounds(Q) >= best)
        if ent.chain >= 0:
            pick = pick[pick != ent.chain]
        exact(pick)
        lk, v = np.concatenate(links), np.concatenate(speeds)
        if not len(v) or not v.max() > 0:
            return None
        top = v.max()
        return float(top), int(lk[v == top].min())

