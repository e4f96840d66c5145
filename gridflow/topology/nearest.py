"""The nearest line to each point, from a few bounded index queries instead of one unbounded one.

``STRtree.query_nearest`` costs about 16 us per point on a street network (its search computes
exact distances to many candidate lines); points usually lie within a few metres of their line
(hydrants, valves, meters). :func:`nearest_lines` asks the tree for the lines within a small
radius of every point (``query(predicate="dwithin")``, cheap), measures those pairs
(``shapely.distance``), keeps the nearest, and doubles the radius for the points that found
none, up to the search distance. Where two lines are exactly equally near, ``query_nearest``
answers that point, so the choice among ties is the one it makes.
"""

from __future__ import annotations

import numpy as np
import shapely

from gridflow.topology.lines import Vertices, distance

__all__ = ["nearest_lines", "widened_boxes", "box_query"]

#: points measured with ``query_nearest`` to choose the first search radius
SAMPLE = 512
#: share of the sampled points the first radius reaches
SAMPLE_QUANTILE = 0.9
#: largest radius [m] searched by bounded queries; ``query_nearest`` answers the points left
#: (a bounded query's pairs grow with the square of the radius)
MAX_RADIUS_M = 100.0
#: query boxes made (and dropped) per block by :func:`box_query`
BLOCK = 1 << 15


def nearest_lines(tree: shapely.STRtree, lines: np.ndarray, pts: np.ndarray,
                  max_distance: float | None = None, *,
                  first_radius: float | None = None,
                  verts: Vertices | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each point's nearest line, as ``tree.query_nearest(pts, max_distance=max_distance,
    return_distance=True, all_matches=False)`` gives it.

    Parameters
    ----------
    tree : shapely.STRtree
        Built over ``lines``.
    lines : ndarray of LineString
    pts : ndarray of Point
    max_distance : float, optional
        Farthest distance [m] searched (inclusive); None: no limit.
    first_radius : float, optional
        First search radius [m]; default: reaching 90 % of an evenly spaced sample of the
        points (their nearest distances measured with ``query_nearest``).
    verts : Vertices, optional
        The :func:`~gridflow.topology.lines.vertices` of ``lines`` (simple lines), when
        taken: each pair is then measured from the coordinates
        (:func:`~gridflow.topology.lines.distance`, ``shapely.distance``'s numbers to the
        last bit, without a GEOS call per pair).

    Returns
    -------
    point_idx, line_idx : ndarray of int64
        Points that have a line within ``max_distance``, ascending, and their nearest line.
    distance : ndarray of float
        Distance [m] from each such point to its line.

    Notes
    -----
    Exact: a point with a line within radius ``r`` has its nearest line within ``r``, so the
    pairs of the bounded query hold it. Each round costs about one bounded query and one
    distance per pair over the points still unanswered.
    """
    n = len(pts)
    if max_distance is not None and not max_distance > 0:  # a zero search distance
        (q, t), d = tree.query_nearest(pts, return_distance=True, all_matches=False)
        ok = d <= max_distance
        return q[ok].astype(np.int64), t[ok].astype(np.int64), d[ok]
    got_p, got_l, got_d = [], [], []
    todo = np.arange(n)
    if first_radius is None:
        first_radius = _first_radius(tree, pts, max_distance)
    limit = np.inf if max_distance is None else max_distance
    r = min(first_radius, MAX_RADIUS_M, limit)
    xy = None
    if verts is not None and n and (shapely.get_type_id(pts) == 0).all():
        xy = shapely.get_coordinates(pts)
        xy = xy if len(xy) == n else None  # an empty point: measured by GEOS
    while todo.size:
        q, t, d = _pairs_within(tree, lines, pts[todo], r,
                                None if xy is None or verts is None else (verts, xy[todo]))
        if q.size:
            head, tie = _least(q, d)
            sure = head[~tie]
            got_p.append(todo[q[sure]])
            got_l.append(t[sure])
            got_d.append(d[sure])
            if tie.any():
                tp = todo[q[head[tie]]]
                (qq, tt), dd = tree.query_nearest(pts[tp], max_distance=max_distance,
                                                  return_distance=True, all_matches=False)
                got_p.append(tp[qq])
                got_l.append(tt)
                got_d.append(dd)
            found = np.zeros(todo.size, bool)
            found[q] = True
            todo = todo[~found]
        if r >= limit or not todo.size:
            break
        if r >= MAX_RADIUS_M:  # the few far points: one nearest search each
            (q, t), d = tree.query_nearest(pts[todo], max_distance=max_distance,
                                           return_distance=True, all_matches=False)
            got_p.append(todo[q])
            got_l.append(t)
            got_d.append(d)
            break
        r = min(max(2.0 * r, 1.0), MAX_RADIUS_M, limit)
    if not got_p:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    p = np.concatenate(got_p).astype(np.int64)
    order = np.argsort(p, kind="stable")
    return (p[order], np.concatenate(got_l).astype(np.int64)[order],
            np.concatenate(got_d).astype(float)[order])


def _least(q: np.ndarray, d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For pairs ``(q, d)`` grouped by ``q`` ascending: the position of each group's least
    ``d`` (its first where several share it), and whether several share it (a tie).

    Notes
    -----
    The tree's pairs come grouped by query geometry in ascending order; one pass of
    ``minimum.reduceat`` finds each least distance (a sort of the pairs by ``(q, d)`` would
    cost several times more at a million pairs). Pairs not so ordered are put in order first.
    Distances are numbers (the pairs within a radius: no NaN).
    """
    if q.size > 1 and (q[1:] < q[:-1]).any():  # not grouped: order them (stable)
        o = np.argsort(q, kind="stable")
        head, tie = _least(q[o], d[o])
        return o[head], tie
    new = np.empty(q.size, bool)
    new[0] = True
    np.not_equal(q[1:], q[:-1], out=new[1:])
    start = np.flatnonzero(new)
    least = np.minimum.reduceat(d, start)
    grp = np.cumsum(new) - 1
    at_least = d == least[grp]
    count = np.add.reduceat(at_least.astype(np.int64), start)
    pos = np.flatnonzero(at_least)
    first = np.empty(pos.size, bool)
    first[0] = True
    np.not_equal(grp[pos[1:]], grp[pos[:-1]], out=first[1:])
    return pos[first], count > 1


def widened_boxes(geoms: np.ndarray, r: float) -> np.ndarray:
    """A geometry whose envelope is each geometry's bounding box widened by ``r`` [m] on
    every side (None for a missing or empty geometry): an STRtree query with these finds
    every line within ``r``.

    Notes
    -----
    The tree compares envelopes only, so the box's diagonal (a two-point line) stands for
    the box: the same pairs, and GEOS makes a line about twice as fast as a polygon.
    """
    b = shapely.bounds(geoms)
    n = len(b)
    corners = np.empty((n, 2, 2))
    corners[:, 0] = b[:, :2] - r
    corners[:, 1] = b[:, 2:] + r
    ok = np.isfinite(b).all(axis=1)
    out = np.full(n, None, dtype=object)
    if ok.all():
        return shapely.linestrings(corners)
    out[ok] = shapely.linestrings(corners[ok])
    return out


def box_query(tree: shapely.STRtree, geoms: np.ndarray,
              r: float) -> tuple[np.ndarray, np.ndarray]:
    """``tree.query(widened_boxes(geoms, r))``: (input, tree) index pairs of every tree
    geometry whose box comes within ``r`` [m] of each geometry's box, in the same order.

    Notes
    -----
    The boxes are made ``BLOCK`` geometries at a time and dropped before the next block, so
    their memory is used again block after block: one box geometry per point at once would
    grow the process by about 200 bytes a point, in fresh pages (a million valves: about
    200 MB), which cost more to touch than the boxes cost to make.
    """
    parts = [(q + a, t) for a, _, q, t in _box_blocks(tree, geoms, r)]
    if len(parts) == 1:
        return parts[0]
    return tuple(np.concatenate(x) for x in zip(*parts))  # type: ignore[return-value]


def _box_blocks(tree: shapely.STRtree, geoms: np.ndarray, r: float):
    """For each block of ``BLOCK`` geometries: (offset, the block, and its pairs as
    ``tree.query(widened_boxes(block, r))`` gives them); one block at least."""
    n = len(geoms)
    for a in range(0, max(n, 1), BLOCK):
        block = geoms[a:a + BLOCK]
        q, t = tree.query(widened_boxes(block, r))
        yield a, block, q, t


def _pairs_within(tree: shapely.STRtree, lines: np.ndarray, pts: np.ndarray, r: float,
                  coords: tuple[Vertices, np.ndarray] | None = None,
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(point, line, distance) of every pair within ``r`` [m] of each other.

    Notes
    -----
    The tree is asked for the lines whose boxes meet each point's box widened by ``r`` (no
    predicate), and each such pair is measured once with ``shapely.distance``; the same pairs
    as ``query(predicate="dwithin")``, which measures them too, but with one distance per
    pair instead of two (about 25 % less time). Block by block (see :func:`box_query`): only
    the pairs within ``r`` are kept past their block. ``coords``: the lines' vertices and
    the points' coordinates, to measure the pairs from them instead.
    """
    qs, ts, ds = [], [], []
    for a, block, q, t in _box_blocks(tree, pts, r):
        if coords is None:
            d = shapely.distance(block[q], lines[t])
        else:
            d = distance(lines, coords[0], t, coords[1][q + a])
        ok = d <= r
        qs.append(q[ok] + a)
        ts.append(t[ok])
        ds.append(d[ok])
    if len(qs) == 1:
        return qs[0], ts[0], ds[0]
    return np.concatenate(qs), np.concatenate(ts), np.concatenate(ds)


def _first_radius(tree: shapely.STRtree, pts: np.ndarray, max_distance: float | None) -> float:
    """A radius [m] that reaches the nearest line of most points (from a sample)."""
    sample = pts[:: max(1, len(pts) // SAMPLE)]
    (_, _), d = tree.query_nearest(sample, max_distance=max_distance, return_distance=True,
                                   all_matches=False)
    if len(d) == 0:
        return max_distance if max_distance is not None else 1.0
    return max(float(np.quantile(d, SAMPLE_QUANTILE)) * 1.01, 1e-3)
