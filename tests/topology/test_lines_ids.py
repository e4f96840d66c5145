"""Splitting mains at events and id text, array at a time, against plain per-feature
references written here (shapely 2, a general-purpose library, measures the pieces)."""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from gridflow.topology.idtext import all_distinct, as_text, suffixed
from gridflow.topology.lines import split_lines


def _reference_split(lines, ev_line, ev_s, ev_xy):
    """Per line: vertices and event points merged by distance along the line; an event
    ends one piece and starts the next; a vertex exactly at an event follows it."""
    out = []
    for i, line in enumerate(lines):
        xy = shapely.get_coordinates(line)
        t = np.r_[0.0, np.cumsum(np.hypot(*np.diff(xy, axis=0).T))]
        items = [(t[k], 1, k, xy[k]) for k in range(1, len(xy))]
        items += [(ev_s[j], 0, j, ev_xy[j]) for j in np.flatnonzero(ev_line == i)]
        cur = [xy[0]]
        for _, is_vertex, _, p in sorted(items, key=lambda x: x[:3]):
            cur.append(p)
            if not is_vertex:
                out.append(np.array(cur))
                cur = [p]
        out.append(np.array(cur))
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_split_lines_matches_reference(seed):
    rng = np.random.default_rng(seed)
    n = 300
    nv = rng.integers(2, 7, n)
    # axis-parallel steps of whole metres: every distance along a line is exact
    step = rng.integers(1, 20, nv.sum()).astype(float)
    axis = np.arange(nv.sum()) % 2
    coords = np.cumsum(np.column_stack([step * (axis == 0), step * (axis == 1)]), axis=0)
    lines = shapely.linestrings(coords, indices=np.repeat(np.arange(n), nv))
    length = shapely.length(lines)
    ev_line = rng.integers(0, n, 700)
    ev_s = np.clip(np.round(rng.uniform(0.05, 0.95, 700) * length[ev_line] * 4) / 4, 0.25,
                   length[ev_line] - 0.25)
    # events exactly at an inner vertex, and two events at one place
    inner = np.flatnonzero(nv > 2)[:40]
    at_vertex = shapely.line_locate_point(lines[inner], shapely.get_point(lines[inner], 1))
    ev_line = np.r_[ev_line, inner, ev_line[:30]]
    ev_s = np.r_[ev_s, at_vertex, ev_s[:30]]
    order = np.lexsort((ev_s, ev_line))
    ev_line, ev_s = ev_line[order], ev_s[order]
    ev_xy = shapely.get_coordinates(shapely.line_interpolate_point(lines[ev_line], ev_s))
    pieces, p_line, p_k = split_lines(lines, ev_line, ev_s, ev_xy)
    ref = _reference_split(lines, ev_line, ev_s, ev_xy)
    assert len(pieces) == len(ref) == n + len(ev_line)
    for got, want in zip(pieces, ref):
        np.testing.assert_array_equal(shapely.get_coordinates(got), want)
    assert np.array_equal(p_line, np.repeat(np.arange(n), np.bincount(ev_line, minlength=n) + 1))
    assert (p_k[p_line == 0] == np.arange((p_line == 0).sum())).all()
    # the pieces of a main add up to the main (conservation of length)
    np.testing.assert_allclose(np.bincount(p_line, shapely.length(pieces)), length, rtol=1e-12)


def test_split_lines_rounding_near_an_event():
    """Far along the laid-out lines a vertex 1e-7 m before an event compares equal to it in
    the global positions; the piece still lists its points in order of distance."""
    big = shapely.linestrings([[0.0, 0.0], [2.0**33, 0.0]])
    line = shapely.linestrings([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0]])
    lines = np.array([big, line])
    s = 1.0 + 1e-7
    pieces, p_line, _ = split_lines(lines, np.array([1]), np.array([s]), np.array([[s, 0.0]]))
    assert list(p_line) == [0, 1, 1]
    np.testing.assert_array_equal(shapely.get_coordinates(pieces[1]), [[0, 0], [s, 0]])
    np.testing.assert_array_equal(shapely.get_coordinates(pieces[2]),
                                  [[1.0, 0.0], [s, 0.0], [2.0, 0.0]])


def test_id_text():
    ids = np.array(["P1", "é 2", None, 7], dtype=object)
    k = np.array([1, 2, 3, 10])
    assert list(suffixed(ids, k)) == [f"{a}.{b}" for a, b in zip(ids, k)]
    assert list(suffixed(ids, k, sep="#")) == ["P1#1", "é 2#2", "None#3", "7#10"]
    assert suffixed(np.zeros(0, dtype=object), np.zeros(0, int)).shape == (0,)
    assert list(as_text(ids)) == ["P1", "é 2", "None", "7"]
    assert all(type(v) is str for v in as_text(np.array([1.5, 2])))
    assert all_distinct(as_text(np.array(["1", "2", "10"], dtype=object)))
    assert not all_distinct(as_text(np.array(["1", 1], dtype=object)))


def _reference_link_ids(ids, kind):
    """Prefix device ids that repeat a pipe id, then suffix what still repeats, one id at a
    time."""
    from gridflow.network import LINK_PIPE, LINK_PUMP

    pipes = {str(x) for x, k in zip(ids, kind) if k == LINK_PIPE}
    out = []
    for x, k in zip(ids, kind):
        if k != LINK_PIPE and str(x) in pipes:
            x = f"{'pump' if k == LINK_PUMP else 'valve'}:{x}"
        out.append(str(x))
    seen: dict[str, int] = {}
    final = []
    for x in out:
        seen[x] = seen.get(x, 0) + 1
        final.append(x if seen[x] == 1 else f"{x}#{seen[x]}")
    return final


@pytest.mark.parametrize("ids, kinds", [
    (["P1", "P2", "V1", "U1"], "ppvu"),  # the usual case
    (["P1", "P2", "P1", "P2"], "ppvu"),  # device ids repeat pipe ids: prefixed
    (["P1", "valve:V1", "V1", "V1"], "ppvv"),  # the prefix meets a pipe id, a device repeat
    (["P1", "P1", "V1"], "ppv"),  # a pipe id repeated
    (["P1", "P2"], "pp"),  # pipes only
])
def test_link_ids_match_reference(ids, kinds):
    from gridflow.network import LINK_PIPE, LINK_PUMP, LINK_VALVE
    from gridflow.topology.links import _link_ids

    code = {"p": LINK_PIPE, "v": LINK_VALVE, "u": LINK_PUMP}
    kind = np.array([code[c] for c in kinds])
    got = _link_ids(np.array(ids, dtype=object), kind)
    assert list(got) == _reference_link_ids(ids, kind)
    assert len(set(got)) == len(got)
