"""Synthetic street-grid networks for benchmarks (shared by the bench_* scripts).

A jittered 100 m grid with about a quarter of the grid edges removed (kept connected by a
spanning tree), dead-end branches, a few sources at the edges, Hazen-Williams pipes.
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import minimum_spanning_tree


def grid_edges(n_pipes: int, seed: int = 1):
    """Node coordinates [m] and (from, to) edges of a street grid with about n_pipes edges."""
    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(n_pipes / 1.5 / 2))) + 1
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    idx = (ii * side + jj).ravel()
    xy = np.column_stack([ii.ravel() * 100.0, jj.ravel() * 100.0])
    xy += rng.normal(0, 3.0, xy.shape)
    right = np.column_stack([idx.reshape(side, side)[:, :-1].ravel(),
                             idx.reshape(side, side)[:, 1:].ravel()])
    down = np.column_stack([idx.reshape(side, side)[:-1, :].ravel(),
                            idx.reshape(side, side)[1:, :].ravel()])
    edges = np.vstack([right, down])
    n = side * side
    # keep a spanning tree, drop a quarter of the rest at random
    w = rng.random(len(edges)) + 1.0
    tree = minimum_spanning_tree(coo_matrix((w, (edges[:, 0], edges[:, 1])), shape=(n, n)))
    t = tree.tocoo()
    in_tree = set(zip(np.minimum(t.row, t.col).tolist(), np.maximum(t.row, t.col).tolist()))
    key = list(zip(np.minimum(edges[:, 0], edges[:, 1]).tolist(),
                   np.maximum(edges[:, 0], edges[:, 1]).tolist()))
    tree_mask = np.array([k in in_tree for k in key])
    drop = (~tree_mask) & (rng.random(len(edges)) < 0.25 * len(edges) / max(1, (~tree_mask).sum()))
    edges = edges[~drop]
    # dead-end branches (cul-de-sacs) off random nodes
    n_dead = max(1, n_pipes - len(edges))
    base = rng.integers(0, n, n_dead)
    new_xy = xy[base] + rng.normal(0, 30.0, (n_dead, 2))
    new_idx = n + np.arange(n_dead)
    edges = np.vstack([edges, np.column_stack([base, new_idx])])[:n_pipes]
    xy = np.vstack([xy, new_xy])
    used = np.unique(edges)
    remap = np.full(len(xy), -1)
    remap[used] = np.arange(len(used))
    return xy[used], remap[edges]


def grid_network(n_pipes: int, seed: int = 1, n_sources: int = 4):
    """A solvable Network (SI) on the synthetic grid."""
    from gridflow.network import Network

    rng = np.random.default_rng(seed)
    xy, e = grid_edges(n_pipes, seed)
    n = len(xy)
    length = np.hypot(*(xy[e[:, 0]] - xy[e[:, 1]]).T)
    length = np.maximum(length, 1.0)
    elev = 20 * np.sin(xy[:, 0] / 1500.0) + 15 * np.cos(xy[:, 1] / 2100.0) + 100
    src = rng.choice(n, n_sources, replace=False)
    fixed = np.full(n, np.nan)
    fixed[src] = 100 + 60 + rng.random(n_sources) * 5
    demand = np.where(np.isnan(fixed), 0.0002 + 0.0002 * rng.random(n), 0.0)
    diam = rng.choice([0.15, 0.2, 0.25, 0.3], len(e), p=[0.4, 0.35, 0.15, 0.1])
    return Network.from_arrays(
        node_id=np.arange(n).astype(str), link_id=np.arange(len(e)).astype(str),
        from_idx=e[:, 0], to_idx=e[:, 1], fixed_head_m=fixed, elevation_m=elev,
        demand_m3s=demand, length_m=length, diameter_m=diam,
        roughness=rng.uniform(90, 140, len(e))), xy


def numeric_factorization_seconds(system, repeat: int = 3) -> float:
    """Median time of one numeric factorization of ``system``'s matrix (same pattern and
    backend), with weights like a network's: the floor the benchmarks compare against."""
    import time

    net, pat = system.net, system.pattern
    rng = np.random.default_rng(0)
    w = 1.0 / (1e-3 + rng.random(net.n_links))
    data = np.zeros(pat.nnz)
    np.add.at(data, pat.off_pos, -w)
    diag = np.bincount(net.from_idx, w, net.n_nodes) + np.bincount(net.to_idx, w, net.n_nodes)
    data[pat.diag_pos] = np.where(net.is_fixed | (diag == 0), 1.0, diag + 1e-9)
    pat.factor(data)  # the first call may include the symbolic analysis
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        pat.factor(data)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))
