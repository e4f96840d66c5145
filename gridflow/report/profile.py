"""Hydraulic grade line profile along a path through the network."""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np
import pandas as pd

from gridflow.errors import ConfigError, GridflowError
from gridflow.report.fields import detect_units, fields_for, require

__all__ = ["default_path_ends", "hgl_profile"]


def _graph(pipes: pd.DataFrame, length_field: str) -> nx.Graph:
    """Undirected graph of the links that can carry flow (closed links left out).

    Parallel links between the same two nodes keep the shortest one.
    """
    open_ = pipes["status"].astype(str).str.lower() != "closed"
    p = pipes.loc[open_, ["pipe_id", "from_node", "to_node", length_field]]
    p = p.sort_values(length_field, ascending=False, kind="stable")  # shortest added last wins
    g = nx.Graph()
    g.add_edges_from(
        (str(a), str(b), {"length": float(w) if np.isfinite(w) else 0.0, "pipe_id": str(pid)})
        for pid, a, b, w in p.itertuples(index=False, name=None))
    return g


def default_path_ends(nodes: pd.DataFrame) -> tuple[list[str], str]:
    """Fixed-head sources and tanks, and the lowest-pressure supplied node.

    Raises
    ------
    GridflowError
        If the layer has no fixed-head node or no supplied node with a pressure.
    """
    f = fields_for(detect_units(nodes))
    kind = nodes["kind"].astype(str).str.lower()
    fixed = (nodes["fixed_head"].astype(int) == 1) & kind.isin(["source", "tank"])
    sources = nodes.loc[fixed, "node_id"].astype(str).tolist()
    if not sources:
        raise GridflowError("no fixed-head source or tank to start the HGL profile from",
                            layer="nodes", field="fixed_head")
    cand = nodes[(nodes["supplied"].astype(int) == 1) & ~fixed & nodes[f.pressure].notna()]
    if cand.empty:
        raise GridflowError("no supplied node with a pressure to end the HGL profile at",
                            layer="nodes", field="supplied")
    target = str(cand.loc[cand[f.pressure].idxmin(), "node_id"])
    return sources, target


def hgl_profile(nodes: pd.DataFrame, pipes: pd.DataFrame,
                path_node_ids: list[str] | None = None) -> pd.DataFrame:
    """The hydraulic grade line, the ground and the pipes' pressure-rating limit along a path.

    Parameters
    ----------
    nodes : GeoDataFrame or DataFrame
        One scenario's ``nodes_<scenario>`` layer (contract fields, US or SI).
    pipes : GeoDataFrame or DataFrame
        The same scenario's ``pipes_<scenario>`` layer; ``pressure_rating_psi`` (or ``_kpa``)
        is used where present.
    path_node_ids : list of str, optional
        Node ids the path passes through, in order (at least two). Between consecutive ids the
        path follows the shortest route by pipe length. If None or empty: from the nearest
        fixed-head source or tank to the supplied node with the lowest pressure.

    Returns
    -------
    DataFrame
        One row per node along the path: ``distance_<u>`` (cumulative pipe length from the
        start), ``node_id``, ``pipe_id`` (the link arriving at the node; '' at the start),
        ``elevation_<u>`` (ground), ``head_<u>`` (HGL, the solver's head),
        ``pressure_<p>``, and ``rating_head_<u>``: ground plus the lowest pressure rating of
        the path pipes meeting at the node, as head (NaN where none carries a rating).
        ``<u>`` is ft or m and ``<p>`` psi or kpa, as in the input layers.

    Raises
    ------
    ConfigError
        If a given node id is not in the layer or two given nodes are not connected
        (``key='report.hgl_path'``).
    GridflowError
        If a default path cannot be found (no source, no supplied node, not connected).

    Notes
    -----
    Shortest paths by Dijkstra's algorithm over open links, O((n + m) log n). Closed links are
    left out, so a path never crosses a closed valve. The rating limit as head is
    ``elevation + rating * k`` with ``k`` = 2.3067 ft/psi or 0.10197 m/kPa (water at about
    4 degC, standard gravity).

    Examples
    --------
    >>> prof = hgl_profile(nodes_avg, pipes_avg, ["R1", "J17"])   # doctest: +SKIP
    >>> prof[["distance_ft", "head_ft"]]                          # doctest: +SKIP
    """
    system = detect_units(nodes)
    f = fields_for(system)
    require(nodes, "nodes", ["node_id", "kind", "fixed_head", "supplied", f.elevation, f.head,
                             f.pressure])
    require(pipes, "pipes", ["pipe_id", "from_node", "to_node", "status", f.length])
    g = _graph(pipes, f.length)
    ids = nodes["node_id"].astype(str)

    if path_node_ids:
        want = [str(v) for v in path_node_ids]
        known = set(ids)
        for v in want:
            if v not in known:
                raise ConfigError(f"HGL path node {v!r} is not a node of the network",
                                  key="report.hgl_path", node_id=v)
        if len(want) < 2:
            raise ConfigError("the HGL path needs at least two node ids", key="report.hgl_path")
        path = [want[0]]
        for a, b in itertools.pairwise(want):
            try:
                leg = nx.shortest_path(g, a, b, weight="length")
            except (nx.NetworkXNoPath, nx.NodeNotFound):
                raise ConfigError(f"HGL path nodes {a!r} and {b!r} are not connected by open "
                                  "links", key="report.hgl_path", node_id=b) from None
            path.extend(leg[1:])
    else:
        sources, target = default_path_ends(nodes)
        sources = [s for s in sources if s in g]
        try:
            _, path = nx.multi_source_dijkstra(g, sources, target=target, weight="length")
        except (nx.NetworkXNoPath, nx.NodeNotFound, ValueError):
            raise GridflowError(f"lowest-pressure node {target!r} is not connected to a source "
                                "by open links", layer="nodes", node_id=target) from None
        path = [str(v) for v in path]

    seg = [g.edges[a, b] for a, b in itertools.pairwise(path)]
    seg_len = np.array([e["length"] for e in seg], dtype=float)
    seg_pipe = [e["pipe_id"] for e in seg]
    dist = np.concatenate([[0.0], np.cumsum(seg_len)])

    pos = pd.Series(np.arange(len(ids)), index=ids.to_numpy())
    if pos.index.has_duplicates:
        pos = pos[~pos.index.duplicated()]
    at = pos.loc[path].to_numpy()
    elev = nodes[f.elevation].to_numpy(dtype=float)[at]
    head = nodes[f.head].to_numpy(dtype=float)[at]
    pres = nodes[f.pressure].to_numpy(dtype=float)[at]

    rating = np.full(len(seg_pipe), np.nan)
    if f.rating in pipes.columns and seg_pipe:
        r = pd.Series(pipes[f.rating].to_numpy(dtype=float),
                      index=pipes["pipe_id"].astype(str).to_numpy())
        r = r[~r.index.duplicated()]
        rating = r.reindex(seg_pipe).to_numpy(dtype=float)
    # lowest rating of the path pipes on either side of each node (fmin ignores NaN)
    before = np.concatenate([[np.nan], rating])
    after = np.concatenate([rating, [np.nan]])
    with np.errstate(invalid="ignore"):
        node_rating = np.fmin(before, after)
    u = f.u_len
    return pd.DataFrame({
        f"distance_{u}": dist,
        "node_id": path,
        "pipe_id": [""] + seg_pipe,
        f.elevation: elev,
        f.head: head,
        f.pressure: pres,
        f"rating_head_{u}": elev + node_rating * f.head_per_pressure,
    })
