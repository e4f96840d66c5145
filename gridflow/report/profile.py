"""Hydraulic grade line profile along a path, by scipy's csgraph on the network arrays."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import dijkstra

from gridflow.errors import ConfigError, GridflowError
from gridflow.hydraulics import LINK_STATE_NAMES, HydraulicResult
from gridflow.network import NODE_JUNCTION, Network
from gridflow.report.fields import fields_for
from gridflow.units import UnitSystem, out_field

__all__ = ["hgl_profile"]

_CLOSED = LINK_STATE_NAMES.index("closed")
_EPS = 1e-9  # [m] added to every edge weight: csgraph reads an explicit zero as no edge


def _shortest_per_pair(pair: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Positions of one link per node pair, ordered by pair: the shortest, the first given
    among equally short ones (as ``np.lexsort((w, pair))`` keeps the first of each pair).

    One stable sort by pair; only pairs with parallel links compare lengths.
    """
    order = np.argsort(pair, kind="stable")
    p = pair[order]
    start = np.r_[True, p[1:] != p[:-1]] if len(p) else np.zeros(0, bool)
    if start.all():  # no parallel links
        return order
    ws = w[order]
    group = np.cumsum(start) - 1
    low = np.minimum.reduceat(ws, np.flatnonzero(start))
    cand = np.flatnonzero(ws == low[group])
    first = np.r_[True, group[cand[1:]] != group[cand[:-1]]]
    return order[cand[first]]


class _Graph:
    """Open links as an undirected weighted graph; parallel links keep the shortest one."""

    def __init__(self, net: Network, r: HydraulicResult) -> None:
        ok = np.flatnonzero(r.link_state != _CLOSED)
        a, b = net.from_idx[ok], net.to_idx[ok]
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        w = np.where(np.isfinite(net.length_m[ok]), net.length_m[ok], 0.0)
        n = net.n_nodes
        keep = _shortest_per_pair(lo.astype(np.int64) * n + hi, w)
        lo, hi, w, ok = lo[keep], hi[keep], w[keep], ok[keep]
        rows, cols = np.r_[lo, hi], np.r_[hi, lo]
        self.w = csr_matrix(coo_matrix((np.r_[w, w] + _EPS, (rows, cols)), shape=(n, n)))
        self.link = csr_matrix(coo_matrix((np.r_[ok, ok] + 1, (rows, cols)), shape=(n, n)))

    def path(self, sources: list[int], target: int) -> list[int] | None:
        dist, pred, _ = dijkstra(self.w, directed=False, indices=sources,
                                 return_predecessors=True, min_only=True)
        if not np.isfinite(dist[target]):
            return None
        out = [target]
        while pred[out[-1]] >= 0:
            out.append(int(pred[out[-1]]))
        return out[::-1]

    def links(self, path: list[int]) -> np.ndarray:
        a, b = np.asarray(path[:-1]), np.asarray(path[1:])
        return np.asarray(self.link[a, b]).ravel().astype(np.int64) - 1


def hgl_profile(net: Network, r: HydraulicResult, units: UnitSystem = "US",
                path_node_ids: list[str] | None = None, *,
                pressure_rating_m: np.ndarray | None = None) -> pd.DataFrame:
    """The hydraulic grade line, the ground and the pipes' pressure-rating limit along a path.

    Parameters
    ----------
    net : Network
        The scenario's network (arrays, SI).
    r : HydraulicResult
        Its solved result; closed links are left out of the path search.
    units : {'US', 'SI'}
        Display units of the returned columns.
    path_node_ids : list of str, optional
        Node ids the path passes through, in order (at least two). Between consecutive ids the
        path follows the shortest route by pipe length. If None or empty: from the nearest
        source or tank to the supplied junction with the lowest pressure.
    pressure_rating_m : ndarray, optional
        Pressure rating per link as head [m] (NaN where unknown).

    Returns
    -------
    DataFrame
        One row per node along the path: ``distance_<u>`` (cumulative pipe length),
        ``node_id``, ``pipe_id`` (the link arriving at the node; '' at the start),
        ``elevation_<u>``, ``head_<u>``, ``pressure_<p>``, and ``rating_head_<u>``: ground
        plus the lowest pressure rating of the path pipes meeting at the node, as head (NaN
        where none carries a rating). ``<u>`` is ft or m, ``<p>`` psi or kpa.

    Raises
    ------
    ConfigError
        A given node id is not in the network, or two given nodes are not connected by open
        links (``key='report.hgl_path'``).
    GridflowError
        No default path: no source or tank, no supplied junction, or not connected.

    Notes
    -----
    Dijkstra's algorithm (``scipy.sparse.csgraph.dijkstra``, all sources at once with
    ``min_only``) over open links, O((n + m) log n). The rating limit as head is
    ``elevation + rating``, the rating already being a head.
    """
    g = _Graph(net, r)
    if path_node_ids:
        want = [str(v) for v in path_node_ids]
        pos = pd.Index(net.node_id.astype(str))
        for v in want:
            if v not in pos:
                raise ConfigError(f"HGL path node {v!r} is not a node of the network",
                                  key="report.hgl_path", node_id=v)
        if len(want) < 2:
            raise ConfigError("the HGL path needs at least two node ids", key="report.hgl_path")
        path = [int(pos.get_loc(want[0]))]
        for a, b in itertools.pairwise(want):
            leg = g.path([int(pos.get_loc(a))], int(pos.get_loc(b)))
            if leg is None:
                raise ConfigError(f"HGL path nodes {a!r} and {b!r} are not connected by open "
                                  "links", key="report.hgl_path", node_id=b)
            path.extend(leg[1:])
    else:
        sources = np.flatnonzero(net.is_fixed)
        if not sources.size:
            raise GridflowError("no fixed-head source or tank to start the HGL profile from",
                                layer="nodes", field="fixed_head")
        cand = (net.node_kind == NODE_JUNCTION) & r.supplied & np.isfinite(r.pressure_m)
        if not cand.any():
            raise GridflowError("no supplied node with a pressure to end the HGL profile at",
                                layer="nodes", field="supplied")
        target = int(np.flatnonzero(cand)[np.argmin(r.pressure_m[cand])])
        found = g.path(list(sources), target)
        if found is None:
            raise GridflowError(f"lowest-pressure node {net.node_id[target]!r} is not "
                                "connected to a source by open links", layer="nodes",
                                node_id=str(net.node_id[target]))
        path = found
    at = np.asarray(path, dtype=np.int64)
    lk = g.links(path) if len(path) > 1 else np.zeros(0, np.int64)
    seg = np.where(np.isfinite(net.length_m[lk]), net.length_m[lk], 0.0)
    dist = np.concatenate([[0.0], np.cumsum(seg)])
    rating = (np.full(len(lk), np.nan) if pressure_rating_m is None
              else np.asarray(pressure_rating_m, dtype=float)[lk])
    with np.errstate(invalid="ignore"):
        node_rating = np.fmin(np.r_[np.nan, rating], np.r_[rating, np.nan])
    f = fields_for(units)
    k_len = out_field("length", units)[1]
    elev = net.elevation_m[at]
    return pd.DataFrame({
        f"distance_{f.u_len}": dist * k_len,
        "node_id": net.node_id[at].astype(str),
        "pipe_id": [""] + list(net.link_id[lk].astype(str)),
        f.elevation: elev * out_field("elevation", units)[1],
        f.head: r.head_m[at] * out_field("head", units)[1],
        f.pressure: r.pressure_m[at] * out_field("pressure", units)[1],
        f"rating_head_{f.u_len}": (elev + node_rating) * out_field("head", units)[1],
    })
