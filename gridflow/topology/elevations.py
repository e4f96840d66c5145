"""Stage 7 of the topology: node elevations filled where no source gave one.

Elevations come from junction points, the mains' Z, point features or a DEM sampled by
:func:`gridflow.io.dem.sample_dem` (the caller passes the sampled values). A missing elevation
is interpolated from neighbouring nodes (warning); where no neighbour has one, 0 m (error).
"""

from __future__ import annotations

import numpy as np
import shapely
from scipy.sparse import coo_matrix

from gridflow.topology.records import Context, LinkTable, NodeTable

__all__ = ["fill_elevations"]


def fill_elevations(ctx: Context, nt: NodeTable, lt: LinkTable,
                    dem_m: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Stage 7: elevation per node [m] and where it was guessed (interpolated or 0 m).

    A source's stand-in elevation (its head, where no ground elevation is mapped) gives it
    zero pressure but is no ground level: it anchors no neighbour.
    """
    f, elev, standin = ctx.findings, nt.elevation_m.copy(), nt.standin
    nn = len(elev)
    frm, to = lt.cols["from"], lt.cols["to"]
    if dem_m is not None:
        elev = np.where(np.isfinite(elev), elev, dem_m)
    known = np.isfinite(elev) & ~standin
    if known.all() or not known.any():  # nothing to interpolate: no graph needed
        adj = None
    else:
        # the fill reads the rows of unknown nodes only: the links touching one make them
        near = ~known[frm] | ~known[to]
        fu, tu = frm[near], to[near]
        adj = coo_matrix((np.ones(2 * len(fu)), (np.r_[fu, tu], np.r_[tu, fu])),
                         shape=(nn, nn)).tocsr()
    e = _harmonic_fill(np.where(known, elev, 0.0), known, adj)
    e[standin] = elev[standin]
    known |= standin
    filled = ~known & np.isfinite(e)
    left = ~known & ~np.isfinite(e)
    e[left] = 0.0
    sel = np.flatnonzero(filled | left)
    pts = np.full(len(e), None, dtype=object)
    pts[sel] = shapely.points(nt.xy[sel])
    f.add_many("elevation_missing", "warning", "nodes", nt.node_id[filled],
               [f"elevation missing; {x:.2f} m interpolated from neighbouring nodes"
                for x in e[filled]], pts[filled])
    f.add_many("elevation_missing", "error", "nodes", nt.node_id[left],
               "elevation missing and no connected node has one; 0 m used", pts[left])
    return e, filled | left


def _harmonic_fill(e: np.ndarray, known: np.ndarray, adj) -> np.ndarray:
    """Unknown values as the mean of their neighbours' (harmonic interpolation on the graph;
    ``adj``, the adjacency, is read at the rows of unknown nodes only; it may be None when
    every value or none is known).

    Notes
    -----
    Solves ``(D - A)_uu x_u = A_uk e_k`` for the unknown nodes ``u`` of every connected part
    holding at least one known node (``D`` the degree, ``A`` the adjacency): each unknown value
    is then exactly the mean of its neighbours'. Parts with no known value stay NaN.
    """
    out = np.where(known, e, np.nan)
    if known.all() or not known.any():
        return out
    from scipy.sparse import diags
    from scipy.sparse.csgraph import connected_components
    from scipy.sparse.linalg import spsolve

    # the unknown nodes of parts holding a known node: those joined through unknown nodes
    # to a neighbour of a known node (the graph of the unknown nodes alone is small)
    unk = np.flatnonzero(~known)
    rows = adj[unk]
    touch = (rows @ known.astype(float)) > 0
    _, comp = connected_components(rows[:, unk], directed=False)
    has = np.zeros(comp.max() + 1, bool)
    has[comp[touch]] = True
    u = unk[has[comp]]
    if len(u) == 0:
        return out
    k = np.flatnonzero(known)
    au = (adj[u] > 0).astype(float)
    deg = np.asarray(au.sum(axis=1)).ravel()
    auu = (diags(deg) - au[:, u]).tocsc()
    rhs = au[:, k] @ e[k]
    out[u] = spsolve(auu, rhs)
    return out
