"""Topology cleaning: exactly which repairs and findings a messy GIS gives.

Expected topology facts are common practice for GIS-to-network cleaning: ends within the
tolerance join, ends farther apart stay apart, a main's end on another main's interior makes a
T, crossings without a shared vertex stay unconnected.
"""

from collections import Counter

import geopandas as gpd
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gridflow.findings import Findings
from gridflow.network import (
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CHECK,
    STATUS_CLOSED,
    VALVE_PRESSURE_REDUCING,
    Network,
)
from gridflow.topology import build_network
from gridflow.topology.zones import supplied_nodes

from ..gis_helpers import CRS, ML, L, P, config, layer, pipe, source_layer, source_rows

HYD = {"input": "gis", "layer": "hydrants", "id": "HYD_ID"}
VALVES = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
          "fields": {"type": "TYPE", "status": "STAT", "setting": "SET"},
          "units": {"setting": "psi"},
          "codes": {"type": {"GV": "isolation", "PRV": "prv", "CV": "check"},
                    "status": {"C": "closed", "O": "open"}}}


def _kinds(f):
    return Counter(f.kind)


def _by_kind(f, kind):
    return [(i, m) for k, i, m in zip(f.kind, f.feature_id, f.message) if k == kind]


@pytest.fixture
def messy(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [
        pipe("P1", L((0, 0), (100, 0))),
        pipe("P2", L((100.1, 0), (200, 0))),      # 0.1 m gap against 0.5 m: joins
        pipe("P3", L((202, 0), (300, 0))),        # 2 m gap: stays apart
        pipe("P4", L((50, 0.3), (50, 100))),      # ends 0.3 m off P1's interior: a T
        pipe("P5", L((150, -50), (150, 50))),     # crosses P2 without a vertex
        pipe("P6", L((0, 0), (100, 0))),          # duplicate of P1
        pipe("P7", ML([(0, 0), (0, 100)], [(0, 100), (50, 100)])),  # multi-part
        pipe("P8", L((300, 0), (400, 0)), status="ABD"),            # abandoned
    ])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "hydrants", [{"HYD_ID": "H1", "geometry": P(75, 15)}])  # 15 m off P1
    return g


def test_messy_repairs_and_findings(tmp_path, messy):
    cfg = config(tmp_path, messy, layers={"sources": source_layer(), "hydrants": HYD})
    f = Findings()
    cn = build_network(cfg, f)
    k = _kinds(f)
    assert k["abandoned_left_out"] == 1 and _by_kind(f, "abandoned_left_out")[0][0] == "P8"
    assert _by_kind(f, "multipart_exploded") == [("P7", "multi-part main split into 2 pipes")]
    # the 0.1 m gap: three ends (P1, its duplicate P6, P2) meet at their mean, x = 100.033
    # one finding per repaired node, named by its first pipe
    assert _by_kind(f, "end_snapped") == [("P1", "3 pipe ends joined; an end moved 0.07 m")]
    assert _by_kind(f, "duplicate_dropped") == [("P6", "duplicate of pipe P1 dropped")]
    assert _by_kind(f, "main_split") == [
        ("P1", "T-junction: split where the dangling end of pipe P4 lies 0.30 m from it")]
    assert _by_kind(f, "hydrant_attached") == [("H1", "attached to main P1 15.00 m away")]
    # P3 (2 m gap) and P5 (crossing) are two parts with no source
    dis = _by_kind(f, "disconnected_part")
    assert sorted(i for i, _ in dis) == ["P3", "P5"]
    net = cn.network
    ids = list(net.link_id)
    assert ids == ["P1.1", "P1.2", "P1.3", "P2", "P3", "P4", "P5", "P7.1", "P7.2"]
    # P1 split at the T (50 m) and at the hydrant's projection (75 m)
    assert np.allclose(net.length_m[:3], [50.0, 25.0, 25.033], atol=0.01)
    # crossing: P2 and P5 share no node
    i2, i5 = ids.index("P2"), ids.index("P5")
    assert not ({net.from_idx[i2], net.to_idx[i2]} & {net.from_idx[i5], net.to_idx[i5]})
    # hydrant node is the end of P1.2 and start of P1.3
    h = cn.hydrants.iloc[0]
    assert h.node_idx == net.to_idx[1] == net.from_idx[2]
    assert h.node_id == net.node_id[h.node_idx]
    assert np.isnan(h.required_fire_flow_m3s)
    # T: P4 starts at the node where P1.1 ends
    assert net.from_idx[ids.index("P4")] == net.to_idx[0]
    # order of layers equals the arrays
    assert list(cn.nodes.node_id) == list(net.node_id)
    assert list(cn.links.pipe_id) == ids
    assert cn.nodes.crs.to_epsg() == 32616
    assert net.node_id[net.is_fixed].tolist() == ["S1"]
    assert cn.graph.number_of_edges() == net.n_links


def test_deterministic_ids(tmp_path, messy):
    cfg = config(tmp_path, messy, layers={"sources": source_layer(), "hydrants": HYD})
    a, b = build_network(cfg, Findings()), build_network(cfg, Findings())
    assert list(a.network.node_id) == list(b.network.node_id)
    assert np.array_equal(a.network.from_idx, b.network.from_idx)
    assert a.nodes.geometry.equals(b.nodes.geometry)


def test_hydrant_beyond_search_distance(tmp_path, messy):
    cfg = config(tmp_path, messy, layers={"sources": source_layer(),
                                          "hydrants": {**HYD, "search_distance": "10 m"}})
    f = Findings()
    cn = build_network(cfg, f)
    assert _by_kind(f, "hydrant_unattached") == [
        ("H1", "no main within 10 m (nearest 15.00 m); hydrant left out of the fire-flow "
               "analysis")]
    assert len(cn.hydrants) == 0
    assert "P1.3" not in list(cn.network.link_id)  # only the T split remains


def _line_with_valves(tmp_path, valves, **pipe_kw):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0)), ZONE="North", **pipe_kw),
                       pipe("B", L((100, 0), (200, 0)), ZONE="South", **pipe_kw),
                       pipe("C", L((200, 0), (300, 0)), ZONE="South", **pipe_kw)])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", valves)
    return g


def test_closed_valve_splits_two_zones(tmp_path):
    g = _line_with_valves(tmp_path, [
        {"VALVE_ID": "V1", "TYPE": "GV", "STAT": "C", "SET": None, "geometry": P(150, 1)}])
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": VALVES})
    f = Findings()
    cn = build_network(cfg, f)
    net = cn.network
    assert list(net.link_id) == ["A", "B.1", "B.2", "C", "V1"]
    v = list(net.link_id).index("V1")
    assert net.link_kind[v] == LINK_VALVE and net.status[v] == STATUS_CLOSED
    assert net.length_m[v] == 0.0
    # acts in the main's digitised direction: from B.1's end to B.2's start
    assert net.from_idx[v] == net.to_idx[1] and net.to_idx[v] == net.from_idx[2]
    assert sorted(set(net.zone)) == ["zone_1", "zone_2"]
    fed = supplied_nodes(net)
    assert fed[net.from_idx[0]] and not fed[net.to_idx[3]]
    un = _by_kind(f, "unsupplied_part")
    assert [i for i, _ in un] == ["B.2"]
    assert "cut off from every source and tank by closed valves" in un[0][1]


def test_valves_unattached_and_stacked_named_by_their_ids(tmp_path):
    # V2 lies 40 m off every main (the search distance is 5 m here); V3 and V4 both sit
    # within the 0.5 m tolerance of B's first end: one device per main end, the first kept
    g = _line_with_valves(tmp_path, [
        {"VALVE_ID": "V1", "TYPE": "GV", "STAT": "O", "SET": None, "geometry": P(50, 1)},
        {"VALVE_ID": "V2", "TYPE": "GV", "STAT": "O", "SET": None, "geometry": P(150, 40)},
        {"VALVE_ID": "V3", "TYPE": "GV", "STAT": "O", "SET": None, "geometry": P(100.2, 0)},
        {"VALVE_ID": "V4", "TYPE": "GV", "STAT": "O", "SET": None, "geometry": P(100.3, 0)}])
    cfg = config(tmp_path, g, layers={"sources": source_layer(),
                                      "valves": {**VALVES, "search_distance": "5 m"}})
    f = Findings()
    cn = build_network(cfg, f)
    assert _by_kind(f, "valve_unattached") == [
        ("V2", "no main within 5 m (nearest 40.00 m); valve left out")]
    assert _by_kind(f, "valve_stacked") == [
        ("V4", "another valve already sits at this end of the main; left out")]
    ids = list(cn.network.link_id)
    assert "V1" in ids and "V3" in ids and "V2" not in ids and "V4" not in ids


def test_zone_names_from_zone_field_majority(tmp_path):
    g = _line_with_valves(tmp_path, [
        {"VALVE_ID": "V1", "TYPE": "PRV", "STAT": "O", "SET": 50.0, "geometry": P(100, 0.2)}])
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": VALVES},
                 pipes={"fields": {"diameter": "DIAM_IN", "zone": "ZONE", "status": "STATUS"}})
    cn = build_network(cfg, Findings())
    net = cn.network
    v = list(net.link_id).index("V1")
    assert net.valve_type[v] == VALVE_PRESSURE_REDUCING
    assert net.valve_setting[v] == pytest.approx(50 * 0.70307, rel=1e-4)  # 1 psi = 0.70307 m
    # the PRV sits at B's first end (within the tolerance), between the node and B
    assert net.node_id[net.from_idx[v]] == net.node_id[net.to_idx[0]]
    assert net.to_idx[v] == net.from_idx[1]
    by_link = dict(zip(net.link_id, net.zone[net.from_idx]))
    assert by_link["A"] == "North" and by_link["B"] == "South" and by_link["C"] == "South"


def test_check_valve_and_pump(tmp_path):
    g = _line_with_valves(tmp_path, [
        {"VALVE_ID": "CV1", "TYPE": "CV", "STAT": "O", "SET": None, "geometry": P(50, 0)}])
    layer(g, "pumps", [{"PUMP_ID": "PU1", "Q": 500.0, "H": 150.0, "geometry": P(250, 0)}])
    pumps = {"input": "gis", "layer": "pumps", "id": "PUMP_ID",
             "fields": {"design_flow": "Q", "design_head": "H"},
             "units": {"design_flow": "gpm", "design_head": "ft"}}
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": VALVES,
                                      "pumps": pumps})
    cn = build_network(cfg, Findings())
    net = cn.network
    ids = list(net.link_id)
    assert net.status[ids.index("CV1")] == STATUS_CHECK
    p = ids.index("PU1")
    assert net.link_kind[p] == LINK_PUMP
    # one design point without a shut-off head: the configured ratio (default 1.25, common
    # practice) times the design head, and a warning that it was assumed
    assert net.pump_h0[p] == pytest.approx(1.25 * 150 * 0.3048)
    assert net.pump_h1[p] == 0.0
    assert net.from_idx[p] == net.to_idx[ids.index("C.1")]


def test_missing_and_implausible_attributes(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0)), C=130.0),
                       pipe("B", L((100, 0), (200, 0)), diam=None, C=130.0),
                       pipe("Z", L((200, 0), (300, 0)), diam=0.0, C=130.0),
                       pipe("W", L((300, 0), (400, 0)), diam=240.0, C=130.0),
                       pipe("R", L((0, 0), (0, 100)), C=200.0)])
    layer(g, "sources", source_rows(P(0, 0)))
    extra = {"roughness": {"source": "attribute"}}
    pf = {"fields": {"diameter": "DIAM_IN", "roughness": "C"}}
    f = Findings()
    cn = build_network(config(tmp_path, g, layers={"sources": source_layer()}, extra=extra,
                              pipes=pf), f)
    dm = _by_kind(f, "diameter_missing")
    assert [i for i, _ in dm] == ["B", "Z", "W"]
    assert dm[0][1].startswith("diameter is missing: pipe left out")
    assert dm[1][1].startswith("diameter is zero")
    assert dm[2][1].startswith("diameter 240 in is above 120 in")
    assert set(f.severity[i] for i, k in enumerate(f.kind) if k == "diameter_missing") == {
        "error"}
    assert list(cn.network.link_id) == ["A", "R"]
    assert _by_kind(f, "roughness_implausible") == [("R", "Hazen-Williams C 200 outside 40-160; "
                                                           "kept")]
    # with a default diameter the pipes stay, each with a warning
    f2 = Findings()
    pf2 = {**pf, "default_diameter": "6 in"}
    cn2 = build_network(config(tmp_path, g, layers={"sources": source_layer()}, extra=extra,
                               pipes=pf2), f2)
    assert list(cn2.network.link_id) == ["A", "B", "Z", "W", "R"]
    assert cn2.network.diameter_m[1] == pytest.approx(0.1524)
    assert _kinds(f2)["diameter_missing"] == 3


def test_elevations_from_nodes_and_tank(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((100, 0), (200, 0)))])
    layer(g, "junctions", [{"JID": "J7", "ELEV": 100.0, "geometry": P(100.2, 0)},
                           {"JID": "J9", "ELEV": 110.0, "geometry": P(200, 0)}])
    layer(g, "tanks", [{"TID": "T1", "BOT": 300.0, "LVL": 20.0, "geometry": P(0, 3)}])
    nodes = {"input": "gis", "layer": "junctions", "id": "JID", "fields": {"elevation": "ELEV"},
             "units": {"elevation": "ft"}}
    tanks = {"input": "gis", "layer": "tanks", "id": "TID",
             "fields": {"bottom_elevation": "BOT", "level": "LVL"},
             "units": {"bottom_elevation": "ft", "level": "ft"}}
    f = Findings()
    cn = build_network(config(tmp_path, g, layers={"nodes": nodes, "tanks": tanks}), f)
    net = cn.network
    assert list(net.node_id) == ["T1", "J7", "J9"]  # the junction ids where points coincide
    assert net.elevation_m[1] == pytest.approx(30.48)  # 100 ft (definition of the foot)
    assert net.fixed_head_m[0] == pytest.approx(320 * 0.3048)
    assert _by_kind(f, "tank_attached") == [("T1", "attached to the pipe end 3.00 m away")]
    assert _by_kind(f, "elevation_missing") == []


def test_cleaned_network_validates_and_is_supplied(tmp_path):
    """A clean grid: the Network validates and every node reaches a fixed head in the graph."""
    import networkx as nx

    g = tmp_path / "gis.gpkg"
    rows = []
    for i in range(3):
        for j in range(3):
            if i < 2:
                rows.append(pipe(f"H{i}{j}", L((100 * i, 100 * j), (100 * i + 100.2, 100 * j))))
            if j < 2:
                rows.append(pipe(f"V{i}{j}", L((100 * i, 100 * j), (100 * i, 100 * j + 100))))
    layer(g, "mains", rows)
    layer(g, "sources", source_rows(P(0, 0)))
    f = Findings()
    cn = build_network(config(tmp_path, g, layers={"sources": source_layer()}), f)
    net = cn.network
    net.validate()
    assert isinstance(net, Network) and net.n_nodes == 9 and net.n_links == 12
    fixed = set(np.flatnonzero(net.is_fixed))
    reach = set().union(*(nx.node_connected_component(cn.graph, s) for s in fixed))
    assert reach == set(range(net.n_nodes))
    assert _kinds(f)["disconnected_part"] == 0 and _kinds(f)["unsupplied_part"] == 0


# ---------------------------------------------------------------- idempotence
@st.composite
def grids(draw):
    keep = draw(st.lists(st.booleans(), min_size=12, max_size=12))
    jit = draw(st.lists(st.floats(-0.1, 0.1), min_size=48, max_size=48))
    long_row = draw(st.booleans())
    return keep, jit, long_row


@settings(max_examples=8, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(grids())
def test_cleaning_a_cleaned_network_changes_nothing(tmp_path_factory, case):
    keep, jit, long_row = case
    tmp = tmp_path_factory.mktemp("idem")
    rows, e = [], 0
    for i in range(3):
        for j in range(3):
            for di, dj in ((1, 0), (0, 1)):
                if i + di > 2 or j + dj > 2:
                    continue
                if keep[e] or (i, j) == (0, 0):
                    a = (100 * i + jit[2 * e], 100 * j + jit[2 * e + 1])
                    b = (100 * (i + di) + jit[2 * e + 2], 100 * (j + dj) + jit[2 * e + 3])
                    rows.append(pipe(f"E{e}", L(a, b)))
                e += 1
    if long_row:  # one main across two blocks: others' ends make T-junctions on it
        rows.append(pipe("LONG", L((0, 250), (200, 250))))
    g = tmp / "gis.gpkg"
    layer(g, "mains", rows)
    layer(g, "sources", source_rows(P(0, 0)))
    cn = build_network(config(tmp, g, layers={"sources": source_layer()}), Findings())
    # write the cleaned pipes and nodes as a new GIS and clean it again
    g2 = tmp / "clean.gpkg"
    pipes = cn.links[cn.links.kind == "pipe"]
    layer(g2, "mains", [pipe(r.pipe_id, r.geometry, diam=d / 0.0254) for r, d in
                        zip(pipes.itertuples(), cn.network.diameter_m)])
    layer(g2, "junctions", [{"JID": r.node_id, "geometry": r.geometry}
                            for r in cn.nodes.itertuples()])
    layer(g2, "sources", source_rows(P(0, 0)))
    nodes = {"input": "gis", "layer": "junctions", "id": "JID"}
    f2 = Findings()
    cn2 = build_network(config(tmp, g2, layers={"sources": source_layer(), "nodes": nodes}), f2)
    a, b = cn.network, cn2.network
    assert list(a.link_id) == list(b.link_id)
    assert list(a.node_id) == list(b.node_id)
    assert np.array_equal(a.from_idx, b.from_idx) and np.array_equal(a.to_idx, b.to_idx)
    assert np.allclose(a.length_m, b.length_m)
    assert not {"end_snapped", "main_split", "duplicate_dropped", "zero_length_dropped"} & set(
        f2.kind)
    _ = (gpd, CRS)
