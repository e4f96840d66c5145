"""Pressure zones, connectivity and supply, on the network's index arrays (scipy csgraph).

Zones are the connected parts left when closed links, pressure-reducing valves and pumps are
taken out (a booster pump lifts water into another pressure zone just as a PRV lets it down;
common practice). A part takes the name most of its mapped ``zone`` values give (ties: the
alphabetically first); parts without a mapped name are numbered ``zone_1``, ``zone_2`` ... in
the order of their first node.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import shapely

from gridflow.findings import Findings
from gridflow.network import LINK_PUMP, NODE_JUNCTION, STATUS_CLOSED, VALVE_PRESSURE_REDUCING

__all__ = ["components", "merged_components", "zones_and_parts", "zone_names",
           "connectivity_findings", "supplied_nodes", "NetworkParts", "network_parts"]


@dataclass(frozen=True)
class NetworkParts:
    """Connected-component labels per node, computed once for the checks that share them."""

    whole: np.ndarray  # through every link
    open: np.ndarray  # through open links and running pumps only


def _open_links(net) -> np.ndarray:
    """Links water passes: not closed, and not a pump that is off."""
    return (net.status != STATUS_CLOSED) & ~((net.link_kind == LINK_PUMP)
                                             & (net.pump_speed <= 0))


def network_parts(net, zone_parts: np.ndarray | None = None) -> NetworkParts:
    """The network's parts through every link and through open links (see
    :class:`NetworkParts`).

    ``zone_parts``: the parts :func:`zone_names` found (through open links other than PRVs
    and pumps), when known: the parts here are then those joined by the few links left out
    there (:func:`merged_components`), not found again over the whole network.
    """
    ok = _open_links(net)
    if zone_parts is None:
        return NetworkParts(whole=components(net.n_nodes, net.from_idx, net.to_idx),
                            open=components(net.n_nodes, net.from_idx[ok], net.to_idx[ok]))
    # zone links are open links: the open parts join zone parts, the whole joins open parts
    extra = ok & ~_zone_links(net.link_kind, net.status, net.valve_type)
    open_ = merged_components(zone_parts, net.from_idx[extra], net.to_idx[extra])
    return NetworkParts(whole=merged_components(open_, net.from_idx[~ok], net.to_idx[~ok]),
                        open=open_)


def components(n: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Connected-component label per node of the undirected graph with edges (a, b)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    g = coo_matrix((np.ones(len(a), dtype=np.int8), (a, b)), shape=(n, n))
    return connected_components(g, directed=False)[1]


def merged_components(parts: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """:func:`components` of a graph given as the parts (labels per node, as
    :func:`components` numbers them) of some of its edges, and its other edges (a, b).

    Notes
    -----
    The parts are the nodes of a small graph joined by the other edges; its components
    are the graph's. Labels come out as :func:`components` gives them for the whole graph:
    scipy numbers components in order of their first node, a part's label orders the parts
    by their first node, and a component's first node is the first node of its first part.
    """
    if len(parts) == 0:
        return parts
    return components(int(parts.max()) + 1, parts[a], parts[b])[parts]


def _zone_links(kind, status, valve_type) -> np.ndarray:
    """Links inside a zone: not closed, not a PRV, not a pump."""
    return (status != STATUS_CLOSED) & (valve_type != VALVE_PRESSURE_REDUCING) & (kind != LINK_PUMP)


def zones_and_parts(n: int, frm, to, kind, status, valve_type, speed, link_zone, node_zone,
                    zone_mapped: bool) -> np.ndarray:
    """Zone name per node (see the module notes)."""
    names, comp = zone_names(n, frm, to, kind, status, valve_type, speed, link_zone, node_zone,
                             zone_mapped)
    return names[comp] if n else np.zeros(0, dtype=object)


def zone_names(n: int, frm, to, kind, status, valve_type, speed, link_zone, node_zone,
               zone_mapped: bool) -> tuple[np.ndarray, np.ndarray]:
    """:func:`zones_and_parts` as the names of the zones and each node's zone (position)."""
    inner = _zone_links(kind, status, valve_type)
    comp = components(n, frm[inner], to[inner])
    ncomp = int(comp.max()) + 1 if n else 0
    names = np.full(ncomp, None, dtype=object)
    if zone_mapped:
        lz = np.asarray(link_zone, dtype=object)
        votes = pd.DataFrame({
            "comp": np.r_[comp[frm[inner]], comp],
            "zone": np.r_[lz[inner], np.asarray(node_zone, dtype=object)]})
        votes = votes[votes["zone"].notna() & (votes["zone"].astype(str) != "")]
        if len(votes):
            cnt = votes.groupby(["comp", "zone"]).size().reset_index(name="n")
            cnt = cnt.sort_values(["comp", "n", "zone"], ascending=[True, False, True])
            best = cnt.drop_duplicates("comp")
            names[best["comp"].to_numpy()] = best["zone"].astype(str).to_numpy()
    gen = names == None  # noqa: E711
    names[gen] = [f"zone_{i + 1}" for i in range(int(gen.sum()))]
    return names, comp


def supplied_nodes(net, parts: NetworkParts | None = None) -> np.ndarray:
    """True at nodes joined to a source or tank through open links and running pumps."""
    if parts is not None:
        comp = parts.open
    else:
        ok = _open_links(net)
        comp = components(net.n_nodes, net.from_idx[ok], net.to_idx[ok])
    fed = np.zeros(int(comp.max()) + 1 if net.n_nodes else 0, bool)
    fed[comp[net.is_fixed]] = True
    return fed[comp]


def connectivity_findings(f: Findings, net, link_geoms, node_pts, layer: str,
                          parts: NetworkParts | None = None) -> None:
    """Findings for disconnected and unsupplied parts and dangling ends (``parts``: the
    network's parts when already computed)."""
    n = net.n_nodes
    if n == 0:
        f.add("empty_network", "error", layer, "", "no pipes left to build a network from")
        return
    if not net.is_fixed.any():
        f.add("no_fixed_head", "error", layer, "",
              "the network has no source or tank: nothing can be solved (map [layers.sources] "
              "or [layers.tanks])")
    else:
        if parts is None:
            parts = network_parts(net)
        comp = parts.whole
        _parts(f, net, comp, link_geoms, layer, "disconnected_part",
               "not connected to any source or tank", None)
        fed = supplied_nodes(net, parts)
        comp2 = parts.open
        has_fixed_all = np.zeros(int(comp.max()) + 1, bool)
        has_fixed_all[comp[net.is_fixed]] = True
        cut = ~fed & has_fixed_all[comp]
        _parts(f, net, comp2, link_geoms, layer, "unsupplied_part",
               "cut off from every source and tank by closed valves or pumps that are off",
               cut)
    deg = np.bincount(np.r_[net.from_idx, net.to_idx], minlength=n)
    dang = (deg == 1) & (net.node_kind == NODE_JUNCTION)
    f.add_many("dangling_end", "info", "nodes", net.node_id[dang],
               "dead end: only one pipe ends here", node_pts[dang])


def _parts(f, net, comp, link_geoms, layer, kind, what, only) -> None:
    ncomp = int(comp.max()) + 1
    fixed = np.zeros(ncomp, bool)
    fixed[comp[net.is_fixed]] = True
    bad = ~fixed
    if only is not None:
        sel = np.zeros(ncomp, bool)
        sel[comp[only]] = True
        bad &= sel
    if not bad.any():
        return
    lc = comp[net.from_idx]
    lsel = bad[lc] & (comp[net.to_idx] == lc)
    links = np.flatnonzero(lsel)
    nodes_per = np.bincount(comp, minlength=ncomp)
    if len(links) == 0:
        return
    order = np.argsort(lc[links], kind="stable")
    links = links[order]
    parts, first = np.unique(lc[links], return_index=True)
    counts = np.diff(np.r_[first, len(links)])
    geoms = shapely.multilinestrings(np.asarray(link_geoms, dtype=object)[links],
                                     indices=np.searchsorted(parts, lc[links]))
    msgs = [f"part of {c} links and {nodes_per[p]} nodes {what} (first link "
            f"{net.link_id[links[i]]})" for p, c, i in zip(parts, counts, first)]
    f.add_many(kind, "warning", layer, net.link_id[links[first]], msgs, geoms)
