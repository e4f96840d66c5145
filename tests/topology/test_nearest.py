"""The nearest main per point from bounded queries answers exactly as shapely's
``STRtree.query_nearest`` (the reference: shapely 2, a general-purpose library), ties included."""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from gridflow.topology.nearest import _least, nearest_lines


def _grid(seed: int = 3):
    """A jittered 100 m street grid (40 x 40 nodes), mains with a bent middle vertex."""
    rng = np.random.default_rng(seed)
    side = 40
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    xy = np.column_stack([ii * 100.0, jj * 100.0]) + rng.normal(0, 4, (ii.size, 2))
    h, v = ii < side - 1, jj < side - 1
    a = np.r_[ii[h] * side + jj[h], ii[v] * side + jj[v]]
    b = np.r_[(ii[h] + 1) * side + jj[h], ii[v] * side + jj[v] + 1]
    keep = rng.random(a.size) > 0.25
    a, b = a[keep], b[keep]
    mid = (xy[a] + xy[b]) / 2 + rng.normal(0, 1, (a.size, 2))
    coords = np.stack([xy[a], mid, xy[b]], axis=1).reshape(-1, 2)
    return shapely.linestrings(coords, indices=np.repeat(np.arange(a.size), 3)), xy, rng


@pytest.mark.parametrize("max_distance", [None, 0.0, 5.0, 30.0, 150.0, 1000.0])
def test_same_answer_as_query_nearest(max_distance):
    lines, xy, rng = _grid()
    tree = shapely.STRtree(lines)
    near = shapely.points(xy[rng.integers(0, len(xy), 800)] + rng.normal(0, 15, (800, 2)))
    far = shapely.points(rng.uniform(-3000, 7000, (300, 2)))  # many beyond every main
    at_nodes = shapely.get_point(lines[:300], 0)  # equally near to every main there: ties
    on_lines = shapely.line_interpolate_point(lines[:200], 0.3, normalized=True)
    pts = np.concatenate([near, far, at_nodes, on_lines])
    rng.shuffle(pts)
    (q, t), d = tree.query_nearest(pts, max_distance=max_distance or None,
                                   return_distance=True, all_matches=False)
    if max_distance == 0.0:  # a zero search distance: only points on a main
        q, t, d = q[d <= 0], t[d <= 0], d[d <= 0]
    p2, l2, d2 = nearest_lines(tree, lines, pts, max_distance)
    assert np.array_equal(q, p2)
    assert np.array_equal(t, l2)
    assert np.array_equal(d, d2)
    if max_distance is not None:
        assert (d2 <= max_distance).all()


def test_ties_exist_and_fall_as_query_nearest_lets_them():
    lines, _, _ = _grid()
    tree = shapely.STRtree(lines)
    pts = shapely.get_point(lines[:300], 0)
    (q, t), _ = tree.query_nearest(pts, return_distance=True, all_matches=True)
    assert len(q) > len(np.unique(q))  # the case is really there: several mains at 0 m
    (q1, t1), _ = tree.query_nearest(pts, return_distance=True, all_matches=False)
    p2, l2, _ = nearest_lines(tree, lines, pts)
    assert np.array_equal(q1, p2) and np.array_equal(t1, l2)


def test_empty_inputs():
    lines, _, _ = _grid()
    tree = shapely.STRtree(lines)
    p, l_, d = nearest_lines(tree, lines, np.array([], dtype=object), 10.0)
    assert p.size == l_.size == d.size == 0


def test_missing_and_empty_points_get_no_line():
    lines, xy, _ = _grid()
    tree = shapely.STRtree(lines)
    pts = np.array([shapely.Point(xy[5]), None, shapely.Point(), shapely.Point(xy[9])],
                   dtype=object)
    p, t, d = nearest_lines(tree, lines, pts, 50.0)
    (q, tt), dd = tree.query_nearest(pts, max_distance=50.0, return_distance=True,
                                     all_matches=False)
    assert list(p) == list(q) == [0, 3]
    assert list(t) == list(tt)
    np.testing.assert_array_equal(d, dd)


@pytest.mark.parametrize("grouped", [True, False])
def test_least_per_group_as_a_sort_finds_it(grouped):
    """Each group's least distance and its ties, against numpy's ``lexsort`` by (group,
    distance): the first row of each group after the sort, a tie where the next row of the
    same group has the same distance (the reference: numpy, a general-purpose library)."""
    rng = np.random.default_rng(11)
    q = np.sort(rng.integers(0, 4000, 20000))
    d = np.round(rng.uniform(0, 5, q.size), 1)  # coarse values: many ties inside groups
    if not grouped:
        o = rng.permutation(q.size)
        q, d = q[o], d[o]
    head, tie = _least(q, d)
    o = np.lexsort((d, q))
    sq, sd = q[o], d[o]
    first = np.flatnonzero(np.r_[True, sq[1:] != sq[:-1]])
    nxt = np.minimum(first + 1, sq.size - 1)
    ref_tie = (nxt != first) & (sq[nxt] == sq[first]) & (sd[nxt] == sd[first])
    assert tie.any() and (~tie).any()  # both cases are really there
    np.testing.assert_array_equal(tie, ref_tie)
    np.testing.assert_array_equal(q[head], sq[first])
    np.testing.assert_array_equal(d[head], sd[first])
    # where several share the least distance, the first of them in the input's order
    np.testing.assert_array_equal(head, o[first])


def test_least_single_pair_and_single_group():
    head, tie = _least(np.array([7]), np.array([2.5]))
    assert list(head) == [0] and list(tie) == [False]
    head, tie = _least(np.array([3, 3, 3]), np.array([4.0, 1.0, 1.0]))
    assert list(head) == [1] and list(tie) == [True]


def test_box_query_in_blocks_finds_every_box_within_r(monkeypatch):
    """Pairs whose bounding boxes come within r of each other, against a brute-force
    comparison of ``shapely.bounds`` over every pair with numpy (the reference: shapely 2 and
    numpy, general-purpose libraries); made a few boxes at a time, in the order one query
    over all the boxes gives."""
    import gridflow.topology.nearest as nearest

    lines, xy, rng = _grid()
    pts = shapely.points(xy[rng.integers(0, len(xy), 150)] + rng.normal(0, 20, (150, 2)))
    tree = shapely.STRtree(lines)
    r = 6.0
    monkeypatch.setattr(nearest, "BLOCK", 7)  # 150 points: 22 blocks, the last one short
    q, t = nearest.box_query(tree, pts, r)
    a, b = shapely.bounds(pts), shapely.bounds(lines)
    hit = ((a[:, None, 0] - r <= b[None, :, 2]) & (a[:, None, 2] + r >= b[None, :, 0])
           & (a[:, None, 1] - r <= b[None, :, 3]) & (a[:, None, 3] + r >= b[None, :, 1]))
    rq, rt = np.nonzero(hit)
    # points near several mains and points near none: both cases are really there
    assert np.bincount(rq).max() > 1 and len(np.unique(rq)) < len(pts)
    assert sorted(zip(q.tolist(), t.tolist())) == sorted(zip(rq.tolist(), rt.tolist()))
    assert (np.diff(q) >= 0).all()
    q1, t1 = tree.query(nearest.widened_boxes(pts, r))
    assert np.array_equal(q, q1) and np.array_equal(t, t1)
