"""The network reduced to its looped core, once per base state (see
:mod:`gridflow.hydraulics.reduced` for the solves on it).

A street network is mostly series: of the nodes a GIS export gives (main ends, valves, tees,
hydrant tees, outlets), most have two links. :class:`Reduction` finds, with array operations
and :mod:`scipy.sparse.csgraph`:

- the *trees* (dead-end branches, hydrant laterals), pruned leaf by leaf: each tree link's flow
  is the demand beyond it;
- the *chains*: runs of two-link nodes between core nodes, one unknown flow each; the flow in
  a chain's ``i``-th link is the chain flow minus the loads of the nodes before it;
- the *groups*: consecutive chain links with no load between them (one flow through all);
- the *core*: nodes with three or more links, nodes of known head, and anchors (nodes a caller
  keeps, such as a pump's ends).

It knows nothing of head-loss laws: it is the network's shape and the loads on it.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

__all__ = ["Reduction"]


class Reduction:
    """Trees, chains, groups and core of the links ``links`` (a boolean mask) of a network.

    Parameters
    ----------
    fr, to : ndarray of int
        Link ends.
    links : ndarray of bool
        The links taking part (open and conducting).
    dirichlet : ndarray of bool
        Nodes of known head (never eliminated).
    load : ndarray of float
        Demand per node (counted at free nodes only).
    keep : ndarray of bool
        Nodes that must stay visible (a group boundary where they lie inside a chain): the
        nodes draws may be made at.
    anchor : ndarray of bool, optional
        Nodes of unknown head that must be core nodes (the ends of pumps, the inlets of
        regulating valves): never pruned, never inside a chain.
    """

    def __init__(self, fr: np.ndarray, to: np.ndarray, links: np.ndarray, dirichlet: np.ndarray,
                 load: np.ndarray, keep: np.ndarray, anchor: np.ndarray | None = None) -> None:
        nn = len(dirichlet)
        self.nn = nn
        fr = np.asarray(fr, dtype=np.int64)
        to = np.asarray(to, dtype=np.int64)
        E = np.flatnonzero(links)
        deg = (np.bincount(fr[E], minlength=nn) + np.bincount(to[E], minlength=nn)).astype(
            np.int64)
        xr = np.zeros(nn, dtype=np.int64)
        np.bitwise_xor.at(xr, fr[E], E)
        np.bitwise_xor.at(xr, to[E], E)
        gone = np.zeros(nn, dtype=bool)
        acc = np.where(dirichlet, 0.0, np.asarray(load, dtype=float))
        rounds: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        fixed = dirichlet if anchor is None else (dirichlet | anchor)
        leaves = np.flatnonzero((deg == 1) & ~fixed)
        while leaves.size:
            lk = xr[leaves]
            other = np.where(fr[lk] == leaves, to[lk], fr[lk])
            if gone[other].any() or np.isin(other, leaves).any():
                raise ValueError("a tree without a node of known head")
            rounds.append((lk, leaves, other))
            gone[leaves] = True
            deg[leaves] = 0
            np.subtract.at(deg, other, 1)
            np.bitwise_xor.at(xr, other, lk)
            np.add.at(acc, other, acc[leaves])
            cand = np.unique(other)
            leaves = cand[(deg[cand] == 1) & ~fixed[cand]]
        self.gone = gone
        self.acc = acc
        #: tree links per pruning round: (links, child nodes, parent nodes)
        self.rounds = rounds
        tl = np.concatenate([r[0] for r in rounds]) if rounds else np.zeros(0, np.int64)
        tc = np.concatenate([r[1] for r in rounds]) if rounds else np.zeros(0, np.int64)
        tp = np.concatenate([r[2] for r in rounds]) if rounds else np.zeros(0, np.int64)
        self.tree_links = tl
        #: position in the tree arrays of each link (-1 for links not in a tree)
        self.tree_index = np.full(len(fr), -1, dtype=np.int64)
        self.tree_index[tl] = np.arange(len(tl))
        #: per pruning round, +1 where the link points from parent to child
        self.round_sign = [np.where(fr[r[0]] == r[2], 1.0, -1.0) for r in rounds]
        #: +1 where a tree link points from parent to child
        self.tree_sign = np.where(fr[tl] == tp, 1.0, -1.0)
        #: flow from parent to child in each tree link: the demand beyond it
        self.tree_flow = acc[tc]
        self.parent = np.full(nn, -1, dtype=np.int64)
        self.parent[tc] = tp
        self.parent_link = np.full(nn, -1, dtype=np.int64)
        self.parent_link[tc] = tl
        has_tree = np.zeros(nn, dtype=bool)
        has_tree[tp] = True
        #: each tree link's child node
        self.tree_child = tc
        # each tree node's root (the non-tree node its tree hangs on), its subtree's size and
        # a preorder of the trees: the subtree of a tree node ``v`` is
        # ``preorder[pre_pos[v]:pre_pos[v] + sub_size[v]]``
        size = np.ones(nn, dtype=np.int64)
        for _, child, parent in rounds:
            np.add.at(size, parent, size[child])
        root = np.arange(nn, dtype=np.int64)
        for _, child, parent in reversed(rounds):
            root[child] = root[parent]
        self.sub_size = size
        self.tree_root = root
        roots = np.unique(root[tc])
        g_t = sp.coo_matrix((np.ones(len(roots) + len(tc)),
                             (np.concatenate([np.full(len(roots), nn), tp]),
                              np.concatenate([roots, tc]))), shape=(nn + 1, nn + 1)).tocsr()
        order = csgraph.depth_first_order(g_t, nn, directed=True, return_predecessors=False)
        self.preorder = np.asarray(order, dtype=np.int64)
        self.pre_pos = np.full(nn + 1, -1, dtype=np.int64)
        self.pre_pos[self.preorder] = np.arange(len(self.preorder))

        alive = np.zeros(len(fr), dtype=bool)
        alive[E] = True
        alive[tl] = False
        internal = ~gone & ~fixed & (deg == 2)
        # a ring of two-link nodes with no core node: its smallest node is made core
        while True:
            core = ~gone & ~internal
            AL = np.flatnonzero(alive)
            a_int, b_int = internal[fr[AL]], internal[to[AL]]
            inner = AL[a_int & b_int]
            g = sp.coo_matrix((np.ones(len(inner)), (fr[inner], to[inner])), shape=(nn, nn))
            _, comp = csgraph.connected_components(g, directed=False)
            ends = AL[a_int ^ b_int]
            end_int = np.where(internal[fr[ends]], fr[ends], to[ends])
            has_end = np.zeros(nn, dtype=bool)
            has_end[comp[end_int]] = True
            ring = internal & ~has_end[comp]
            if not ring.any():
                break
            first = np.unique(comp[ring], return_index=True)[1]
            internal[np.flatnonzero(ring)[first]] = False
        end_core = np.where(internal[fr[ends]], to[ends], fr[ends])
        # each chain's start: its end incidence with the smaller link position
        o = np.lexsort((ends, comp[end_int]))
        ends, end_int, end_core = ends[o], end_int[o], end_core[o]
        ec = comp[end_int]
        is_start = np.ones(len(ends), dtype=bool)
        is_start[1:] = ec[1:] != ec[:-1]
        # distance of each internal node from its chain's start core node
        vroot = nn
        s_int = end_int[is_start]
        g2 = sp.coo_matrix(
            (np.ones(len(inner) + len(s_int)),
             (np.concatenate([fr[inner], np.full(len(s_int), vroot)]),
              np.concatenate([to[inner], s_int]))), shape=(nn + 1, nn + 1)).tocsr()
        dist = csgraph.dijkstra(g2, directed=False, indices=vroot, unweighted=True)[:nn]
        # chain numbering: internal components first (by component label), then core-core
        comps = np.unique(ec)
        cpos = np.full(nn, -1, dtype=np.int64)
        cpos[comps] = np.arange(len(comps))
        cc = AL[~a_int & ~b_int]
        n_int_chains = len(comps)
        n_chains = n_int_chains + len(cc)
        a = np.empty(n_chains, dtype=np.int64)
        b = np.empty(n_chains, dtype=np.int64)
        a[:n_int_chains] = end_core[is_start]
        b[:n_int_chains] = end_core[~is_start]
        a[n_int_chains:] = fr[cc]
        b[n_int_chains:] = to[cc]
        # every alive link: (chain, index along the chain, sign, exit node)
        lk = np.concatenate([inner, ends, cc])
        chain = np.concatenate([cpos[comp[fr[inner]]], cpos[ec],
                                n_int_chains + np.arange(len(cc))])
        di_fr, di_to = dist[fr[inner]], dist[to[inner]]
        idx = np.concatenate([np.minimum(di_fr, di_to),
                              np.where(is_start, 0.0, dist[end_int]),
                              np.zeros(len(cc))]).astype(np.int64)
        sign = np.concatenate([np.where(di_fr < di_to, 1.0, -1.0),
                               np.where(is_start, np.where(fr[ends] == end_core, 1.0, -1.0),
                                        np.where(fr[ends] == end_int, 1.0, -1.0)),
                               np.ones(len(cc))])
        o = np.lexsort((idx, chain))
        lk, chain, idx, sign = lk[o], chain[o], idx[o], sign[o]
        exit_ = np.where(sign > 0, to[lk], fr[lk])
        last = np.ones(len(lk), dtype=bool)
        last[:-1] = chain[1:] != chain[:-1]
        first = np.ones(len(lk), dtype=bool)
        first[1:] = chain[1:] != chain[:-1]
        exit_load = np.where(last, 0.0, acc[exit_])
        cs = np.cumsum(exit_load)
        lstart = np.flatnonzero(first)
        before = np.repeat(cs[lstart] - exit_load[lstart], np.diff(np.append(lstart, len(lk))))
        off = cs - exit_load - before  # loads of the nodes before each link
        self.tot = np.add.reduceat(exit_load, lstart) if len(lk) else np.zeros(0)
        mark = ~last & ((acc[exit_] != 0) | has_tree[exit_] | keep[exit_])
        gbreak = first.copy()
        gbreak[1:] |= mark[:-1]
        gstart = np.flatnonzero(gbreak)
        self.chain_links, self.chain_of_link, self.link_sign = lk, chain, sign
        self.link_index, self.link_off, self.link_exit, self.link_last = idx, off, exit_, last
        self.chain_first_link = lk[lstart]
        self.chain_first_sign = sign[lstart]
        self.chain_link_start = lstart
        self.group_link_start = gstart
        self.group_chain = chain[gstart]
        self.group_off = off[gstart]
        self.group_index = idx[gstart]
        self.chain_group_start = np.flatnonzero(
            np.r_[True, self.group_chain[1:] != self.group_chain[:-1]]) if len(gstart) \
            else np.zeros(0, np.int64)
        self.a, self.b = a, b
        self.n_chains = n_chains
        #: chain and position of every node inside a chain (-1 elsewhere)
        self.node_chain = np.full(nn, -1, dtype=np.int64)
        self.node_chain[exit_[~last]] = chain[~last]
        self.node_pos = np.full(nn, -1, dtype=np.int64)
        self.node_pos[exit_[~last]] = idx[~last] + 1
        core_nodes = np.flatnonzero(core)
        self.core_nodes = core_nodes
        self.core_pos = np.full(nn, -1, dtype=np.int64)
        self.core_pos[core_nodes] = np.arange(len(core_nodes))
        self.ca, self.cb = self.core_pos[a], self.core_pos[b]
        # for rebuilding heads along the chains: each link's chain start in chain order,
        # and the links that end at a node inside their chain
        self.link_chain_start = lstart[chain]
        self.inner_links = np.flatnonzero(~last)
        self.inner_exit = exit_[~last]
        self.inner_core = self.ca[chain[~last]]

    def sums(self, per_link: np.ndarray) -> np.ndarray:
        """Per group: the sum of a per-link quantity over the group's links (chain order)."""
        return np.add.reduceat(per_link[self.chain_links], self.group_link_start)

    def entry(self, k: int) -> tuple[int, list[int]]:
        """``(node, path)``: the non-tree node a draw at ``k`` enters by, and the tree links
        from it down to ``k``."""
        path: list[int] = []
        while self.gone[k]:
            path.append(int(self.parent_link[k]))
            k = int(self.parent[k])
        return k, path
