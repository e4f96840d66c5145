"""Array-at-a-time operations on pipe lines: end points, snapping, splitting.

All functions take and return numpy arrays of shapely 2 geometries and coordinates; none
loops over features in Python.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import shapely

__all__ = ["Vertices", "Measures", "flat", "vertices", "measures", "distance", "locate",
           "interpolate", "end_points", "set_end_points", "snap_labels",
           "split_lines"]


class Vertices(NamedTuple):
    """Every vertex of an array of lines, line after line: ``coords`` ``(m, 2)``, and each
    line's number of vertices ``n`` and the rows of its ``first`` and ``last`` vertex."""

    coords: np.ndarray
    n: np.ndarray
    first: np.ndarray
    last: np.ndarray


def flat(lines: np.ndarray) -> np.ndarray:
    """``lines`` drawn in 2-D: ``shapely.force_2d`` when any has Z, else ``lines`` itself."""
    return shapely.force_2d(lines) if shapely.has_z(lines).any() else lines


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



class Measures(NamedTuple):
    """Each vertex's segment (to the next vertex of its line) as the linear referencing of
    ``shapely.line_locate_point`` and ``shapely.line_interpolate_point`` measures it: its
    ``length`` and the distance along the line to its ``start`` [m] (0 at a line's last
    vertex, which starts no segment)."""

    length: np.ndarray
    start: np.ndarray


def measures(v: Vertices) -> Measures:
    """The :class:`Measures` of the lines whose :func:`vertices` are ``v``.

    Notes
    -----
    A segment's length is ``sqrt(dx * dx + dy * dy)`` and a start the sum of the lengths
    before it, added one by one from the line's first vertex: the arithmetic, in the same
    order, of GEOS's linear referencing, so the distances are the same numbers to the last
    bit (``np.cumsum`` over all lines, less each line's start, would round differently).
    The sums run position by position over all lines at once (one step per vertex of the
    longest line).
    """
    c = v.coords
    length = np.zeros(len(c))
    if len(c) > 1:
        dx = c[1:, 0] - c[:-1, 0]
        dy = c[1:, 1] - c[:-1, 1]
        length[:-1] = np.sqrt(dx * dx + dy * dy)
    length[v.last] = 0.0
    start = np.zeros(len(c))
    order = np.argsort(-v.n, kind="stable")  # lines with more vertices first
    first, count = v.first[order], v.n[order]
    for j in range(1, int(count[0]) if len(count) else 0):
        at = first[: int(np.searchsorted(-count, -j, side="left"))] + j  # lines with > j
        start[at] = start[at - 1] + length[at - 1]
    return Measures(length, start)


#: pairs measured at once by :func:`distance`, :func:`locate` and :func:`interpolate`: their
#: temporaries (a dozen arrays per segment) stay small and are reused block after block,
#: instead of fresh pages for all pairs at once (slower than GEOS at a million pairs)
PAIR_BLOCK = 1 << 15


def _blocks(fn, lines, *args):
    """``fn(lines, *args)`` over blocks of :data:`PAIR_BLOCK` pairs (the last two arguments
    run along the pairs), joined."""
    *fixed, line, per = args
    n = len(line)
    return np.concatenate([fn(lines, *fixed, line[i:i + PAIR_BLOCK], per[i:i + PAIR_BLOCK])
                           for i in range(0, n, PAIR_BLOCK)])


def _pair_segments(v: Vertices, line: np.ndarray):
    """Every segment of each pair's line: (pair of each segment, its first vertex, the
    position where each pair's segments begin)."""
    nseg = v.n[line] - 1
    begin = np.zeros(len(line), np.int64)
    np.cumsum(nseg[:-1], out=begin[1:])
    pair = np.repeat(np.arange(len(line)), nseg)
    a = v.first[line][pair] + (np.arange(len(pair)) - begin[pair])
    return pair, a, begin


def _segment_distances(v: Vertices, line: np.ndarray, xy: np.ndarray):
    """Every segment of each pair's line (see :func:`_pair_segments`), the point's distance
    to it (GEOS's ``Distance::pointToSegment``, with its arithmetic) and its projection
    factor on it: (pair, first vertex, begin, distance, factor)."""
    pair, a, begin = _pair_segments(v, line)
    c = v.coords
    ax, ay, bx, by = c[a, 0], c[a, 1], c[a + 1, 0], c[a + 1, 1]
    px, py = xy[pair, 0], xy[pair, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        dx, dy = bx - ax, by - ay
        len2 = dx * dx + dy * dy
        pax, pay = px - ax, py - ay
        r = (pax * dx + pay * dy) / len2
        pbx, pby = px - bx, py - by
        to_a = np.sqrt(pax * pax + pay * pay)
        to_b = np.sqrt(pbx * pbx + pby * pby)
        perp = np.abs(((ay - py) * dx - (ax - px) * dy) / len2) * np.sqrt(len2)
        same = (ax == bx) & (ay == by)
        dist = np.where(same | (r <= 0.0), to_a, np.where(r >= 1.0, to_b, perp))
    return pair, a, begin, dist, r


def distance(lines: np.ndarray, v: Vertices, line: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """``shapely.distance(lines[line], shapely.points(xy))`` [m] (``lines``, ``v``: as for
    :func:`locate`), without a geometry per point.

    Notes
    -----
    GEOS measures a point against a line as the least of its distances to the line's
    segments, each by ``Distance::pointToSegment``: the same arithmetic here, so the same
    numbers to the last bit. A pair whose distance is not a number is left to shapely.
    """
    if len(line) == 0:
        return np.zeros(0)
    if len(line) > PAIR_BLOCK:
        return _blocks(distance, lines, v, line, xy)
    _, _, begin, dist, _ = _segment_distances(v, line, xy)
    out = np.minimum.reduceat(dist, begin)
    odd = np.flatnonzero(~np.isfinite(out))
    if len(odd):
        out[odd] = shapely.distance(lines[line[odd]], shapely.points(xy[odd]))
    return out


def locate(lines: np.ndarray, v: Vertices, m: Measures, line: np.ndarray,
           xy: np.ndarray) -> np.ndarray:
    """``shapely.line_locate_point(lines[line], shapely.points(xy))`` [m]: the distance along
    each line to the point on it nearest to each point, without a geometry per point.

    Parameters
    ----------
    lines : ndarray of LineString
        Simple lines (at least two vertices each).
    v, m
        The lines' :func:`vertices` and :func:`measures`.
    line : ndarray of int
        The line of each point.
    xy : ndarray, shape (k, 2)
        The points [m].

    Notes
    -----
    GEOS's rule, with its arithmetic: the first segment (in line order) at the least
    distance from the point takes it; the distance along the line is the segment's start
    plus its length times the point's projection factor on it, clamped to the segment.
    A point whose distances are not all numbers (coordinates out of range) is left to
    shapely.
    """
    if len(line) == 0:
        return np.zeros(0)
    if len(line) > PAIR_BLOCK:
        return _blocks(locate, lines, v, m, line, xy)
    pair, a, begin, dist, r = _segment_distances(v, line, xy)
    c = v.coords
    ax, ay, bx, by = c[a, 0], c[a, 1], c[a + 1, 0], c[a + 1, 1]
    px, py = xy[pair, 0], xy[pair, 1]
    with np.errstate(invalid="ignore"):
        # distance along the line to the nearest point of the segment
        f = np.where((px == ax) & (py == ay), 0.0, np.where((px == bx) & (py == by), 1.0, r))
        seg = m.length[a]
        at = np.where(f <= 0.0, m.start[a], np.where(f <= 1.0, m.start[a] + f * seg,
                                                      m.start[a] + seg))
    least = np.minimum.reduceat(dist, begin)
    hit = np.flatnonzero(dist == least[pair])
    first = np.ones(len(hit), bool)
    first[1:] = pair[hit[1:]] != pair[hit[:-1]]
    out = np.empty(len(line))
    out[pair[hit[first]]] = at[hit[first]]
    odd = np.flatnonzero(~np.isfinite(least) | ~np.isfinite(out))
    if len(odd):
        out[odd] = shapely.line_locate_point(lines[line[odd]], shapely.points(xy[odd]))
    return out


def interpolate(lines: np.ndarray, v: Vertices, m: Measures, line: np.ndarray,
                s: np.ndarray) -> np.ndarray:
    """``shapely.get_coordinates(shapely.line_interpolate_point(lines[line], s))``: the point
    at distance ``s`` [m] along each line, as an ``(k, 2)`` array, without a geometry per
    point (``lines``, ``v``, ``m``: as for :func:`locate`).

    Notes
    -----
    GEOS's rule, with its arithmetic: the first segment whose end lies beyond ``s`` holds
    the point, at the fraction ``(s - start) / length`` of it (``p0 + (p1 - p0) * frac``);
    ``s`` at 0 gives the first vertex, at the line's end or beyond the last. A distance
    that is negative (measured from the end) or not a number is left to shapely (NaN
    coordinates where it answers with an empty point).
    """
    out = np.empty((len(line), 2))
    if len(line) == 0:
        return out
    if len(line) > PAIR_BLOCK:
        return _blocks(interpolate, lines, v, m, line, s)
    odd = np.flatnonzero(~(s >= 0.0) | ~np.isfinite(s))
    if len(odd):
        out = interpolate(lines, v, m, line, np.where(np.isfinite(s) & (s >= 0.0), s, 0.0))
        pts = shapely.line_interpolate_point(lines[line[odd]], s[odd])
        out[odd, 0], out[odd, 1] = shapely.get_x(pts), shapely.get_y(pts)  # NaN: empty
        return out
    pair, a, begin = _pair_segments(v, line)
    end = m.start[a] + m.length[a]  # one addition, as GEOS's running total makes it
    # the running totals never decrease: the segments ending at or before s come first
    k = np.add.reduceat((end <= s[pair]).astype(np.int64), begin)
    nseg = v.n[line] - 1
    inside = (k < nseg) & (s > 0.0)
    i = v.first[line] + np.minimum(k, nseg - 1)  # the segment's first vertex
    c = v.coords
    p0, p1 = c[i], c[i + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (s - m.start[i]) / m.length[i]
        x = (p1[:, 0] - p0[:, 0]) * frac + p0[:, 0]
        y = (p1[:, 1] - p0[:, 1]) * frac + p0[:, 1]
    out[:, 0] = np.where(frac <= 0.0, p0[:, 0], np.where(frac >= 1.0, p1[:, 0], x))
    out[:, 1] = np.where(frac <= 0.0, p0[:, 1], np.where(frac >= 1.0, p1[:, 1], y))
    out[~inside] = c[np.where(s[~inside] > 0.0, v.last[line[~inside]],
                              v.first[line[~inside]])]
    return out
