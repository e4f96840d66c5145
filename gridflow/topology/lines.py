"""Array-at-a-time operations on pipe lines: end points, snapping, splitting.

All functions take and return numpy arrays of shapely 2 geometries and coordinates; none
loops over features in Python.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import shapely

__all__ = ["Vertices", "vertices", "end_points", "set_end_points", "snap_labels",
           "split_lines"]


class Vertices(NamedTuple):
    """Every vertex of an array of lines, line after line: ``coords`` ``(m, 2)``, and each
    line's number of vertices ``n`` and the rows of its ``first`` and ``last`` vertex."""

    coords: np.ndarray
    n: np.ndarray
    first: np.ndarray
    last: np.ndarray


def vertices(lines: np.ndarray) -> Vertices:
    """The vertices of ``lines`` (non-empty LineStrings) in one pass over the coordinates."""
    coords = shapely.get_coordinates(lines)
    counts = shapely.get_num_coordinates(lines)
    last = np.cumsum(counts) - 1
    return Vertices(coords, counts, last - counts + 1, last)


def end_points(lines: np.ndarray, v: Vertices | None = None) -> tuple[np.ndarray, np.ndarray]:
    """First and last vertex of each line, as two ``(n, 2)`` arrays (``v``: the lines'
    :func:`vertices`, when already taken).

    Notes
    -----
    ``shapely.get_coordinates`` with per-line offsets from ``get_num_coordinates``: one pass
    over the coordinates, about 9x faster than ``get_point`` per end.
    """
    v = vertices(lines) if v is None else v
    return v.coords[v.first], v.coords[v.last]


def set_end_points(lines: np.ndarray, start: np.ndarray, end: np.ndarray,
                   v: Vertices | None = None) -> np.ndarray:
    """New lines: ``lines`` with their first and last vertices moved to ``start`` and
    ``end`` (``v``: the lines' :func:`vertices`, when already taken; its coordinates are
    then changed in place).

    Notes
    -----
    The lines are made anew from the coordinates (``shapely.linestrings`` with an index per
    vertex), which is cheaper than ``set_coordinates`` on copies of the old ones.
    """
    v = vertices(lines) if v is None else v
    coords = v.coords
    coords[v.first] = start
    coords[v.last] = end
    return shapely.linestrings(coords, indices=np.repeat(np.arange(len(lines)), v.n))


def snap_labels(xy: np.ndarray, tolerance: float) -> np.ndarray:
    """Cluster labels joining points closer than ``tolerance`` [m] (single linkage).

    Notes
    -----
    ``cKDTree.query_pairs`` finds every pair within the tolerance; the pairs are the edges of a
    sparse graph whose connected components are the clusters. Labels are numbered in order of
    each cluster's first point, so they are deterministic. Chains of points each within the
    tolerance of the next join into one cluster.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    n = len(xy)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    if tolerance > 0:  # pairs at distance <= r: exact duplicates among them
        # an unbalanced tree builds in half the time and finds the same pairs (their order
        # differs, which the components below do not see)
        # without compacting its nodes' boxes it builds faster still; the pairs are the same
        tree = cKDTree(xy, balanced_tree=False, compact_nodes=False)
        pairs = tree.query_pairs(r=tolerance, output_type="ndarray")
    else:  # exact duplicates always join, whatever the tolerance
        order = np.lexsort((xy[:, 1], xy[:, 0]))
        same = np.all(xy[order[1:]] == xy[order[:-1]], axis=1)
        pairs = np.column_stack([order[:-1][same], order[1:][same]])
    g = coo_matrix((np.ones(len(pairs), dtype=np.int8), (pairs[:, 0], pairs[:, 1])),
                   shape=(n, n))
    _, labels = connected_components(g, directed=False)
    # renumber by first appearance so labels follow input order
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(len(first), dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(len(first))
    return rank[labels]


def split_lines(lines: np.ndarray, ev_line: np.ndarray, ev_s: np.ndarray,
                ev_xy: np.ndarray, *, verts: Vertices | None = None,
                lengths: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split lines at distances along them, inserting the given points as the new ends.

    Parameters
    ----------
    lines : ndarray of LineString
    ev_line, ev_s, ev_xy
        Split events sorted by (line, distance): the line position, the distance from its
        first vertex [m] (strictly inside the line), and the point [m] that becomes the end of
        the piece before and the start of the piece after (usually the point at that distance,
        or a node within the snapping tolerance of it).
    verts : Vertices, optional
        The lines' :func:`vertices`, when already taken.
    lengths : ndarray, optional
        ``shapely.length(lines)`` [m], when already measured.

    Returns
    -------
    pieces : ndarray of LineString
        Pieces, line by line in order, each line's pieces from its first vertex to its last.
    piece_line : ndarray of int64
        The line each piece came from.
    piece_k : ndarray of int64
        Position of the piece along its line (0, 1, ...).
    """
    n = len(lines)
    n_ev = np.bincount(ev_line, minlength=n)
    n_pieces = n_ev + 1
    piece_start = np.concatenate([[0], np.cumsum(n_pieces)[:-1]])
    ev_before = np.concatenate([[0], np.cumsum(n_ev)[:-1]])
    v = vertices(lines) if verts is None else verts
    coords, first_v = v.coords, v.first
    vline = np.repeat(np.arange(n), v.n)
    # distance of each vertex along its line
    step = np.zeros(len(coords))
    step[1:] = np.hypot(*(coords[1:] - coords[:-1]).T)
    step[first_v] = 0.0
    cum = np.cumsum(step)
    t = cum - cum[first_v][vline]
    # global positions: lines laid end to end with a gap of 1 m
    lengths = shapely.length(lines) if lengths is None else lengths
    offset = np.concatenate([[0.0], np.cumsum(lengths + 1.0)[:-1]])
    g_ev = offset[ev_line] + ev_s
    g_v = offset[vline] + t
    k_v = np.searchsorted(g_ev, g_v, side="right") - ev_before[vline]
    p_v = piece_start[vline] + k_v
    k_ev = np.arange(len(ev_line)) - ev_before[ev_line]
    p_end = piece_start[ev_line] + k_ev  # the piece this event ends
    n_all = int(piece_start[-1] + n_pieces[-1]) if n else 0
    # each piece: the event that starts it (all but a line's first), its vertices in order,
    # the event that ends it (all but a line's last). A vertex exactly at an event starts the
    # next piece, after the event's point.
    n_v = np.bincount(p_v, minlength=n_all)
    has_start = np.zeros(n_all, np.int64)
    has_start[p_end + 1] = 1
    has_end = np.zeros(n_all, np.int64)
    has_end[p_end] = 1
    size = n_v + has_start + has_end
    at = np.concatenate([[0], np.cumsum(size)[:-1]])
    v_first = np.concatenate([[0], np.cumsum(n_v)[:-1]])
    pos_v = at[p_v] + has_start[p_v] + (np.arange(len(p_v)) - v_first[p_v])
    # positions along a line were compared in global units above: where that disagrees with
    # the local distance by a rounding (a vertex a hair before the event starting its piece),
    # the pieces concerned are sorted below as the distances say
    xy = np.empty((int(size.sum()), 2))
    xy[pos_v] = coords
    xy[at[p_end + 1]] = ev_xy
    xy[at[p_end] + size[p_end] - 1] = ev_xy
    slot_piece = np.repeat(np.arange(n_all), size)
    starts = k_v > 0
    e_start = ev_before[vline[starts]] + k_v[starts] - 1
    if not np.all(t[starts] >= ev_s[e_start]):
        # the pieces whose points are not in order of (distance, start event before vertices
        # before end event) are sorted so; the rest are in that order already
        along = np.empty(len(xy))
        tie = np.zeros(len(xy))
        along[pos_v] = t
        along[at[p_end + 1]] = ev_s
        tie[at[p_end + 1]] = -1.0
        along[at[p_end] + size[p_end] - 1] = ev_s
        tie[at[p_end] + size[p_end] - 1] = 1.0
        same = slot_piece[1:] == slot_piece[:-1]
        down = same & ((along[1:] < along[:-1])
                       | ((along[1:] == along[:-1]) & (tie[1:] < tie[:-1])))
        bad = np.zeros(n_all, bool)
        bad[slot_piece[1:][down]] = True
        slots = np.flatnonzero(bad[slot_piece])
        order = np.lexsort((tie[slots], along[slots], slot_piece[slots]))
        xy[slots] = xy[slots[order]]
    pieces = shapely.linestrings(xy, indices=slot_piece)
    piece_line = np.repeat(np.arange(n), n_pieces)
    piece_k = np.arange(len(piece_line)) - piece_start[piece_line]
    return pieces, piece_line, piece_k

