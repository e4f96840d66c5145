"""Valve segments: the parts of the network that closing isolation valves takes out of service.

A *segment* is what lies between isolation valves: the connected parts of the network once
every operable isolation valve is removed. Closing a segment's valves puts it out of water, and
sometimes more: a segment whose only way to a source runs through the closed one is cut off
too (*unintended isolation*). Both follow from the network arrays alone, so this module is a
pure function of a :class:`~gridflow.network.Network` and a list of inoperable valves; the
same code answers one "what if these valves close" question and the nightly sweep.

Notes
-----
Unintended isolation is found for every segment at once with the dominator tree of the
*segment graph*: one vertex per segment, an edge per open isolating valve, and a root joined
to every segment that holds a source or tank. Segment ``t`` loses supply when segment ``s``
closes exactly when every path from the root to ``t`` passes through ``s``, that is, when
``s`` dominates ``t``; so the segments cut off by closing ``s`` are ``s``'s descendants in the
dominator tree. The graph is undirected, so the dominators come from its cut vertices and one
depth-first search (:func:`immediate_dominators`; the tests check it against networkx's
general dominance algorithm). Totals over the cut-off segments are prefix sums over the
tree's depth-first order. Cost: O(links) for the segments (``scipy.sparse.csgraph``),
O(segments + valves) for the tree.

Closed links carry no water: valves mapped closed bound segments but are no way for supply,
and a closed pipe inside a segment is kept in it (it is still where a crew works).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from gridflow.network import LINK_VALVE, STATUS_CLOSED, VALVE_ISOLATION, Network

__all__ = ["Segments", "find_segments", "segment_members"]


@dataclass(frozen=True)
class Segments:
    """Valve segments of a network (positions refer to the network's arrays).

    Attributes
    ----------
    n : int
        Number of segments.
    node_segment : ndarray of int64
        Segment of every node.
    link_segment : ndarray of int64
        Segment of every link; -1 for an isolating valve (it lies between two segments).
    isolating : ndarray of bool
        Per link: an operable isolation valve between two different segments.
    valve_ptr, valve_idx : ndarray of int64
        The isolating valves of segment ``s`` are ``valve_idx[valve_ptr[s]:valve_ptr[s+1]]``
        (link positions, in ascending order).
    supplied : ndarray of bool
        Per segment: reachable from a source or tank through open links with every valve in
        its mapped position.
    idom : ndarray of int64
        Immediate dominator of each supplied segment in the segment graph (the root is ``n``;
        -1 for segments not supplied).
    cut_ptr, cut_idx : ndarray of int64
        Segments cut off (beyond itself) when segment ``s`` closes:
        ``cut_idx[cut_ptr[s]:cut_ptr[s+1]]``, ascending.
    """

    n: int
    node_segment: np.ndarray
    link_segment: np.ndarray
    isolating: np.ndarray
    valve_ptr: np.ndarray
    valve_idx: np.ndarray
    supplied: np.ndarray
    idom: np.ndarray
    cut_ptr: np.ndarray
    cut_idx: np.ndarray

    def valves_of(self, s: int) -> np.ndarray:
        """Link positions of the isolating valves of segment ``s``."""
        return self.valve_idx[self.valve_ptr[s]:self.valve_ptr[s + 1]]

    def cut_off_by(self, s: int) -> np.ndarray:
        """Segments that lose supply when segment ``s`` closes (not counting ``s``)."""
        return self.cut_idx[self.cut_ptr[s]:self.cut_ptr[s + 1]]

    def subtree_sum(self, per_segment: np.ndarray) -> np.ndarray:
        """For every segment, the sum of ``per_segment`` over the segments it cuts off."""
        values = np.asarray(per_segment, dtype=float)
        run = np.concatenate([[0.0], np.cumsum(values[self.cut_idx])])
        return run[self.cut_ptr[1:]] - run[self.cut_ptr[:-1]]


def _csr_groups(keys: np.ndarray, values: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    order = np.lexsort((values, keys))
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(keys, minlength=n), out=ptr[1:])
    return ptr, values[order].astype(np.int64)


def find_segments(net: Network, *, inoperable: np.ndarray | None = None) -> Segments:
    """Valve segments and what closing each one cuts off.

    Parameters
    ----------
    net : Network
        The network (any scenario: only topology, valve types and statuses are used).
    inoperable : ndarray of bool, optional
        Per link: isolation valves known not to close. They join the segments on both sides.

    Returns
    -------
    Segments

    Examples
    --------
    A source, a main, a valve, a main, a second valve and a dead end: three segments;
    closing the middle one (its valves V1 and V2) also cuts off the dead end behind V2.

    >>> from gridflow.network import Network, LINK_PIPE, LINK_VALVE, VALVE_ISOLATION
    >>> nan = float("nan")
    >>> net = Network.from_arrays(
    ...     node_id=["R", "a", "b", "c", "d", "e"], link_id=["P1", "V1", "P2", "V2", "P3"],
    ...     from_idx=[0, 1, 2, 3, 4], to_idx=[1, 2, 3, 4, 5],
    ...     fixed_head_m=[50.0, nan, nan, nan, nan, nan], length_m=[100.0, 0, 120.0, 0, 80.0],
    ...     diameter_m=[0.2] * 5, roughness=[120.0] * 5,
    ...     link_kind=[LINK_PIPE, LINK_VALVE, LINK_PIPE, LINK_VALVE, LINK_PIPE],
    ...     valve_type=[0, VALVE_ISOLATION, 0, VALVE_ISOLATION, 0])
    >>> seg = find_segments(net)
    >>> seg.n, seg.node_segment.tolist()
    (3, [0, 0, 1, 1, 2, 2])
    >>> net.link_id[seg.valves_of(1)].tolist(), seg.cut_off_by(1).tolist()
    (['V1', 'V2'], [2])
    """
    nn = net.n_nodes
    valve = (net.link_kind == LINK_VALVE) & (net.valve_type == VALVE_ISOLATION)
    if inoperable is not None:
        valve &= ~np.asarray(inoperable, dtype=bool)
    keep = ~valve
    adj = sp.coo_matrix((np.ones(int(keep.sum())), (net.from_idx[keep], net.to_idx[keep])),
                        shape=(nn, nn)).tocsr()
    _, label = connected_components(adj, directed=False)
    # number segments by their first link (else first node) so ids follow the network's order
    first = np.full(label.max() + 1 if nn else 0, np.iinfo(np.int64).max, dtype=np.int64)
    link_lab = label[net.from_idx]
    np.minimum.at(first, link_lab[keep], np.flatnonzero(keep))
    node_first = np.full_like(first, np.iinfo(np.int64).max)
    np.minimum.at(node_first, label, np.arange(nn))
    order = np.lexsort((node_first, first))
    relabel = np.empty_like(order)
    relabel[order] = np.arange(order.size)
    node_segment = relabel[label].astype(np.int64)
    n = int(order.size)

    sa, sb = node_segment[net.from_idx], node_segment[net.to_idx]
    isolating = valve & (sa != sb)
    link_segment = np.where(isolating, -1, sa).astype(np.int64)
    v = np.flatnonzero(isolating)
    valve_ptr, valve_idx = _csr_groups(np.concatenate([sa[v], sb[v]]), np.concatenate([v, v]), n)

    # the segment graph: open isolating valves, and a root joined to segments with a fixed head
    open_v = v[net.status[v] != STATUS_CLOSED]
    fed = np.unique(node_segment[net.is_fixed])
    idom = immediate_dominators(n + 1, np.concatenate([sa[open_v], np.full(fed.size, n)]),
                                np.concatenate([sb[open_v], fed]), n)[:n]
    supplied = idom >= 0
    cut_ptr, cut_idx = _descendants(idom, n)
    return Segments(n=n, node_segment=node_segment, link_segment=link_segment,
                    isolating=isolating, valve_ptr=valve_ptr, valve_idx=valve_idx,
                    supplied=supplied, idom=idom, cut_ptr=cut_ptr, cut_idx=cut_idx)


def immediate_dominators(n: int, a: np.ndarray, b: np.ndarray, root: int) -> np.ndarray:
    """Immediate dominators from ``root`` in the undirected graph with edges ``a[i]-b[i]``.

    In an undirected graph ``v`` dominates ``w`` when every path from the root to ``w`` passes
    through ``v``: ``v`` is a cut vertex between them. One depth-first search gives each
    vertex its entry time and low point (Tarjan, 1972); a tree edge ``v -> c`` with
    ``low[c] >= disc[v]`` means ``v`` separates ``c``'s subtree from the root. The immediate
    dominator of ``w`` is then the parent of the nearest such ``c`` at or above ``w``.
    Parallel edges (two valves between the same segments) count as two ways.

    Notes
    -----
    The search is ``scipy.sparse.csgraph.depth_first_order`` (every edge not in its tree
    joins a vertex to one of its ancestors). A vertex's own low value is the smallest entry
    time among its neighbours other than its parent (an edge parallel to the tree edge is
    left out too: it cannot lower ``low[c]`` below ``disc[v]``, so the test above gives the
    same answer); the low points are those minima carried up the tree (one pass over the
    vertices in reverse order of entry), and the nearest separated child above each vertex
    is found by pointer jumping (O(log depth) array passes). That search scans a vertex's
    neighbours again each time it returns to it (O(degree^2) a vertex): where vertices of
    high degree would make that cost more than a few passes over the edges, the same
    algorithm runs as an iterative search in Python (O(vertices + edges)).

    Returns
    -------
    ndarray of int64
        ``idom[w]`` for every vertex (``root`` for the root itself; -1 where unreachable).
    """
    from scipy.sparse.csgraph import depth_first_order

    heads = np.concatenate([a, b]).astype(np.int64)
    tails = np.concatenate([b, a]).astype(np.int64)
    deg = np.bincount(heads, minlength=n).astype(float)
    if float(deg @ deg) > 16.0 * len(heads) + 2.0**20:
        return _dominators_by_search(n, a, b, root)
    g = sp.csr_matrix((np.ones(len(heads)), (heads, tails)), shape=(n, n))
    order, pred = depth_first_order(g, root, directed=True, return_predecessors=True)
    order = order.astype(np.int64)
    parent = pred.astype(np.int64)  # negative at the root and where unreachable
    disc = np.full(n, -1, dtype=np.int64)
    disc[order] = np.arange(len(order))
    low = disc.copy()
    back = (disc[heads] >= 0) & (tails != parent[heads])
    np.minimum.at(low, heads[back], disc[tails[back]])
    low_l, parent_l = low.tolist(), parent.tolist()
    for v in order[:0:-1].tolist():  # children before parents
        p = parent_l[v]
        if low_l[v] < low_l[p]:
            low_l[p] = low_l[v]
    low = np.asarray(low_l, dtype=np.int64)
    idom = np.full(n, -1, dtype=np.int64)
    idom[root] = root
    w = order[1:]
    if len(w):
        p = parent[w]
        top = np.arange(n, dtype=np.int64)  # the nearest separated child at or above
        top[w] = np.where((p == root) | (low[w] >= disc[p]), w, p)
        while True:
            nxt = top[top]
            if np.array_equal(nxt, top):
                break
            top = nxt
        idom[w] = parent[top[w]]
    return idom


def _dominators_by_search(n: int, a: np.ndarray, b: np.ndarray, root: int) -> np.ndarray:
    """:func:`immediate_dominators` by an iterative depth-first search in Python: linear in
    the edges whatever the vertices' degrees."""
    m = len(a)
    heads = np.concatenate([a, b]).astype(np.int64)
    tails = np.concatenate([b, a]).astype(np.int64)
    eids = np.concatenate([np.arange(m), np.arange(m)])
    order = np.argsort(heads, kind="stable")
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(heads, minlength=n), out=ptr[1:])
    nbr, nbr_e = tails[order].tolist(), eids[order].tolist()
    ptr_l = ptr.tolist()
    disc = [-1] * n
    low = [0] * n
    parent = [-1] * n
    parent_e = [-1] * n
    preorder: list[int] = []
    disc[root] = 0
    preorder.append(root)
    stack = [(root, ptr_l[root])]
    t = 1
    while stack:  # iterative depth-first search: the segment graph can be a long chain
        v, i = stack[-1]
        if i < ptr_l[v + 1]:
            stack[-1] = (v, i + 1)
            w, e = nbr[i], nbr_e[i]
            if e == parent_e[v]:
                continue
            if disc[w] < 0:
                disc[w] = low[w] = t
                t += 1
                parent[w], parent_e[w] = v, e
                preorder.append(w)
                stack.append((w, ptr_l[w]))
            elif disc[w] < low[v]:
                low[v] = disc[w]
        else:
            stack.pop()
            p = parent[v]
            if p >= 0 and low[v] < low[p]:
                low[p] = low[v]
    idom = np.full(n, -1, dtype=np.int64)
    idom[root] = root
    top = list(range(n))
    for w in preorder[1:]:  # parents come first in preorder
        p = parent[w]
        top[w] = w if (p == root or low[w] >= disc[p]) else top[p]
        idom[w] = parent[top[w]]
    return idom




def _descendants(idom: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Descendants of every vertex of the dominator tree (root ``n``), as CSR lists.

    A depth-first walk of the tree gives each vertex an entry time, and one pass in reverse
    its subtree's size; a vertex's descendants are then the contiguous run of the walk after
    it, as long as its subtree. Each run is put in ascending order by one sort of all runs at
    once (keyed by owner, then segment).

    The walk is ``scipy.sparse.csgraph.depth_first_order`` on the tree with each vertex's
    children hung from a chain of stand-in vertices (``v -> x1``, ``x1 -> c1``, ``x1 -> x2``,
    ``x2 -> c2`` ...), so no vertex has more than two children (that search scans a vertex's
    children again each time it returns to it); left out of the walk, the stand-ins leave a
    walk of the tree itself.
    """
    from scipy.sparse.csgraph import depth_first_order

    sup = np.flatnonzero(idom >= 0)
    par = idom[sup]
    k = len(sup)
    # children grouped by parent; stand-in j (vertex n + 1 + j) holds the j-th child
    order = np.argsort(par, kind="stable")
    child, cpar = sup[order], par[order]
    x = n + 1 + np.arange(k, dtype=np.int64)
    first = np.ones(k, dtype=bool)
    first[1:] = cpar[1:] != cpar[:-1]
    src = np.concatenate([cpar[first], x, x[:-1][~first[1:]]])
    dst = np.concatenate([x[first], child, x[1:][~first[1:]]])
    tree = sp.csr_matrix((np.ones(len(src)), (src, dst)), shape=(n + 1 + k, n + 1 + k))
    walk = depth_first_order(tree, n, directed=True, return_predecessors=False)
    walk = walk[walk < n].astype(np.int64)  # without the root and the stand-ins
    size = [1] * (n + 1)
    idom_l = idom.tolist()
    for u in walk[::-1].tolist():  # children before parents
        size[idom_l[u]] += size[u]
    pos = np.full(n, -1, dtype=np.int64)
    pos[walk] = np.arange(walk.size)
    cut_ptr = np.zeros(n + 1, dtype=np.int64)
    counts = np.where(pos >= 0, np.asarray(size[:n], dtype=np.int64) - 1, 0)
    np.cumsum(counts, out=cut_ptr[1:])
    total = int(cut_ptr[-1])
    if total == 0:
        return cut_ptr, np.empty(0, dtype=np.int64)
    owners = np.flatnonzero(counts)
    lens = counts[owners]
    # position in the walk of every listed descendant: the run after each owner's entry
    at = np.repeat(pos[owners] + 1 - cut_ptr[owners], lens) + np.arange(total)
    members = walk[at]
    owner = np.repeat(owners, lens)
    cut_idx = members[np.argsort(owner * np.int64(n) + members, kind="stable")]
    return cut_ptr, cut_idx


def segment_members(seg: Segments, per_link: np.ndarray) -> np.ndarray:
    """Sum ``per_link`` (e.g. pipe length) over the links of each segment."""
    inside = seg.link_segment >= 0
    return np.bincount(seg.link_segment[inside], np.asarray(per_link, float)[inside],
                       minlength=seg.n)
