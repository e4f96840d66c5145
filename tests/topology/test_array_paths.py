"""Array-at-a-time paths of the topology checked against the general way they replace.

Each check compares with a reference outside the code under test: numpy's ``lexsort`` and
``isin``, scipy's ``connected_components``, Python's own string formatting, pyproj's
transformation of every corner and shapely's (GEOS's) distance and linear referencing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import shapely
from pyproj import CRS, Transformer
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from gridflow.findings import Findings
from gridflow.io.read import CRS_AREA_MARGIN_DEG, _box_well_inside, _outside_crs_area
from gridflow.network import LINK_PIPE, LINK_VALVE
from gridflow.topology import build_network
from gridflow.topology.idtext import joined, numbered, two_decimals
from gridflow.topology.lines import distance, interpolate, locate, measures, vertices
from gridflow.topology.nodes import _xy_order
from gridflow.topology.points import column, text_in
from gridflow.topology.zones import components, merged_components, network_parts

from ..gis_helpers import L, P, config, layer, pipe, source_layer, source_rows


def _scipy_labels(n, a, b):
    g = coo_matrix((np.ones(len(a)), (a, b)), shape=(n, n))
    return connected_components(g, directed=False)[1]


def test_xy_order_is_the_rounded_lexsort():
    rng = np.random.default_rng(11)
    x = 500_000.0 + rng.integers(0, 2_000, 4_000) * 0.0005  # many ties after rounding
    y = 4_600_000.0 + rng.integers(0, 50, 4_000) * 0.25
    xy = np.column_stack([x, y])
    xy[::7] = xy[1::7][: len(xy[::7])]  # coincident points (a valve's two sides)
    xy[::11, 0] *= -1.0  # negative coordinates too
    ref = np.lexsort((np.arange(len(xy)), np.round(xy[:, 1], 3), np.round(xy[:, 0], 3)))
    assert np.array_equal(_xy_order(xy), ref)
    # coordinates too large for one integer key take the lexsort itself
    big = xy * 1e9
    ref = np.lexsort((np.arange(len(big)), np.round(big[:, 1], 3), np.round(big[:, 0], 3)))
    assert np.array_equal(_xy_order(big), ref)


def test_merged_components_are_scipys_labels():
    rng = np.random.default_rng(5)
    for _ in range(300):
        n = int(rng.integers(1, 40))
        m = int(rng.integers(0, 60))
        a, b = rng.integers(0, n, m), rng.integers(0, n, m)
        some = rng.random(m) < 0.6
        parts = components(n, a[some], b[some])
        got = merged_components(parts, a[~some], b[~some])
        assert np.array_equal(got, _scipy_labels(n, a, b))


def test_network_parts_from_zone_parts(tmp_path):
    """A closed valve, a PRV and a pump: the parts joined from the zone parts are those found
    over every node."""
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe(k, L((100 * i, 0), (100 * i + 100, 0)))
                       for i, k in enumerate("ABCDE")])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", [
        {"VALVE_ID": "V1", "TYPE": "GV", "STAT": "C", "SET": None, "geometry": P(150, 1)},
        {"VALVE_ID": "V2", "TYPE": "PRV", "STAT": "O", "SET": 40.0, "geometry": P(250, 1)}])
    layer(g, "pumps", [{"PUMP_ID": "PU1", "Q": 500.0, "H": 150.0, "geometry": P(350, 0)}])
    valves = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
              "fields": {"type": "TYPE", "status": "STAT", "setting": "SET"},
              "units": {"setting": "psi"},
              "codes": {"type": {"GV": "isolation", "PRV": "prv"},
                        "status": {"O": "open", "C": "closed"}}}
    pumps = {"input": "gis", "layer": "pumps", "id": "PUMP_ID",
             "fields": {"design_flow": "Q", "design_head": "H"},
             "units": {"design_flow": "gpm", "design_head": "ft"}}
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": valves,
                                      "pumps": pumps})
    net = build_network(cfg, Findings()).network
    inner = (net.status != 1) & (net.valve_type != 2) & (net.link_kind != 1)
    zone_parts = components(net.n_nodes, net.from_idx[inner], net.to_idx[inner])
    direct, joined = network_parts(net), network_parts(net, zone_parts)
    assert np.array_equal(direct.whole, joined.whole)
    assert np.array_equal(direct.open, joined.open)
    assert len(np.unique(joined.whole)) == 1 and len(np.unique(joined.open)) == 2


@pytest.mark.parametrize("words", [("closed", "off"), ("prv",), ("None",)])
def test_text_in_is_isin_of_the_text(words):
    values = ["closed", None, "open", "off", "prv", "closed "]
    frame = pd.DataFrame({
        "arrow": pd.array(values, dtype=pd.StringDtype("pyarrow", na_value=np.nan)),
        "arrow_na": pd.array(values, dtype="string"),
        "objects": pd.Series(values + [], dtype=object),
        "floats": [np.nan, 1.0, 2.0, np.nan, 0.0, 3.0]})
    for name in ("arrow", "arrow_na", "objects", "floats", "not_mapped"):
        ref = np.isin(column(frame, name, object).astype(str), list(words))
        assert np.array_equal(text_in(frame, name, words), ref), name


def test_numbered_is_the_formatted_numbers():
    for n in (0, 1, 9, 10, 11, 99, 100, 101, 12_345):
        assert numbered("N", n).to_pylist() == [f"N{i}" for i in range(1, n + 1)]
    assert numbered("NN", 3).to_pylist() == ["NN1", "NN2", "NN3"]
    assert numbered("N", 3).type == pa.large_string()


def _corners_inside(b, crs):
    """Reference: every corner of every box transformed, against the widened area of use."""
    area = crs.area_of_use
    t = Transformer.from_crs(crs, CRS.from_epsg(4326), always_xy=True)
    m = CRS_AREA_MARGIN_DEG
    for x in (b[:, 0], b[:, 2]):
        for y in (b[:, 1], b[:, 3]):
            lon, lat = t.transform(x, y)
            if not (np.all((lon >= area.west - m) & (lon <= area.east + m))
                    and np.all((lat >= area.south - m) & (lat <= area.north + m))):
                return False
    return True


def test_box_check_only_answers_when_every_corner_is_inside():
    import shapely

    crs = CRS.from_epsg(32616)  # UTM zone 16N: 84-90 degrees west
    town = np.array([[500_000.0, 4_600_000.0, 560_000.0, 4_660_000.0]])
    assert _corners_inside(town, crs) and _box_well_inside(town, crs, crs.area_of_use)
    # a slipped decimal: one feature 9,000 km east; the box check leaves it to the
    # per-feature check, which finds it
    far = np.array([[500_000.0, 4_600_000.0, 9_500_000.0, 4_660_000.0]])
    assert not _corners_inside(far, crs)
    assert not _box_well_inside(far, crs, crs.area_of_use)
    pts = shapely.points([[500_000.0, 4_600_000.0], [560_000.0, 4_660_000.0],
                          [9_500_000.0, 4_600_000.0]])
    assert list(_outside_crs_area(pts, crs)) == [False, False, True]
    # geographic CRSs are never answered by the box
    wgs = CRS.from_epsg(4326)
    assert not _box_well_inside(np.array([[-87.0, 41.0, -86.0, 42.0]]), wgs, wgs.area_of_use)


def test_device_ids_not_held_as_arrow_text(tmp_path):
    """Valve ids read as integers (not Arrow text): link ids as the general way makes them
    (test_lines_ids' reference): a valve id equal to a pipe id prefixed with its kind."""
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("1", L((0, 0), (100, 0))), pipe("B", L((100, 0), (200, 0))),
                       pipe("7", L((200, 0), (300, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", [
        {"VALVE_ID": 1, "TYPE": "GV", "STAT": "C", "SET": None, "geometry": P(50, 1)},
        {"VALVE_ID": 7, "TYPE": "PRV", "STAT": "O", "SET": None, "geometry": P(150, 1)}])
    valves = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
              "fields": {"type": "TYPE", "status": "STAT", "setting": "SET"},
              "units": {"setting": "psi"},
              "codes": {"type": {"GV": "isolation", "PRV": "prv"},
                        "status": {"O": "open", "C": "closed"}}}
    f = Findings()
    cn = build_network(config(tmp_path, g, layers={"sources": source_layer(),
                                                   "valves": valves}), f)
    net = cn.network
    assert list(net.link_id) == ["1.1", "1.2", "B.1", "B.2", "7", "1", "valve:7"]
    assert all(type(x) is str for x in net.link_id)
    assert list(cn.links["pipe_id"]) == list(net.link_id)
    assert list(net.link_kind) == [LINK_PIPE] * 5 + [LINK_VALVE] * 2
    # the PRV without a setting is named by its id in the finding
    assert [i for k, i in zip(f.kind, f.feature_id) if k == "valve_setting_missing"] == ["7"]


def test_two_decimals_is_pythons_formatting():
    rng = np.random.default_rng(3)
    # random distances, thousandths (many exact and near ties), binary ties, tiny and large
    vals = np.r_[rng.random(20_000) * 50, rng.integers(0, 100_000, 20_000) / 1000,
                 np.arange(0, 20, 0.005), [0.0, 0.005, 0.015, 0.125, 0.375, 2.675, 0.995,
                                          99.995, 1e-300, 5e-324, 2.0**40 - 1, 1e6 + 0.005]]
    assert two_decimals(vals).to_pylist() == [f"{v:.2f}" for v in vals]
    for odd in (-0.0, -1.0, np.nan, np.inf, 2.0**41):  # left to the caller
        assert two_decimals(np.array([1.0, odd])) is None


def test_joined_rows():
    out = joined("main ", np.array(["A", "B"], dtype=object), " ",
                 two_decimals(np.array([1.005, 8.0])), " m")
    assert list(out) == [f"main {m} {x:.2f} m" for m, x in (("A", 1.005), ("B", 8.0))]
    assert joined("x", np.array([1, 2], dtype=object)) is None  # not text: the caller's way


def _street_lines(rng, n):
    """Lines of 2 to 7 vertices, some with a repeated vertex (a zero-length segment), some
    closing on themselves."""
    k = rng.integers(2, 8, n)
    xy = 500_000.0 + np.cumsum(rng.normal(0.0, 40.0, (int(k.sum()), 2)), axis=0)
    xy = np.round(xy, 3)
    at = np.r_[0, np.cumsum(k)[:-1]]
    xy[at[::9] + 1] = xy[at[::9]]  # a repeated vertex
    ring = at[3::11][k[3::11] > 3]
    xy[ring + k[3::11][k[3::11] > 3] - 1] = xy[ring]  # ends that meet
    return shapely.linestrings(xy, indices=np.repeat(np.arange(n), k))


@pytest.mark.parametrize("seed", [3, 17])
def test_linear_referencing_is_geos(seed):
    """Distance, location along and point along a line from the coordinates: shapely's
    (GEOS's) numbers to the last bit, on and off the lines, at vertices and ends."""
    rng = np.random.default_rng(seed)
    lines = _street_lines(rng, 400)
    v = vertices(lines)
    m = measures(v)
    line = rng.integers(0, len(lines), 3_000)
    xy = np.round(v.coords[rng.integers(0, len(v.coords), len(line))]
                  + rng.normal(0.0, 30.0, (len(line), 2)), 3)
    xy[::5] = v.coords[v.first[line[::5]] + 1]  # on a vertex
    pts = shapely.points(xy)
    np.testing.assert_array_equal(distance(lines, v, line, xy),
                                  shapely.distance(lines[line], pts))
    s = locate(lines, v, m, line, xy)
    np.testing.assert_array_equal(s, shapely.line_locate_point(lines[line], pts))
    length = shapely.length(lines[line])
    s = np.concatenate([s, np.zeros(50), length[:50], length[:50] * 2, m.start[v.first[line] + 1],
                        rng.uniform(0.0, 1.0, 200) * length[:200], [-3.0, np.nan]])
    at = np.concatenate([line, line[:50], line[:50], line[:50], line, line[:200], line[:2]])
    ref = shapely.line_interpolate_point(lines[at], s)
    np.testing.assert_array_equal(interpolate(lines, v, m, at, s),
                                  np.column_stack([shapely.get_x(ref), shapely.get_y(ref)]))
