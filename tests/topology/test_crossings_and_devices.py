"""Small invented networks: which ends join a passing main, device direction, tank levels,
hydrant status, the zero-length message. Coordinates in metres (tests/gis_helpers.py)."""

from __future__ import annotations

import numpy as np
import pytest

from gridflow.findings import Findings
from gridflow.network import NODE_TANK
from gridflow.topology import build_network
from tests.gis_helpers import L, P, config, layer, pipe, source_layer, source_rows


def _by_kind(f, kind):
    return [(i, m) for k, i, m in zip(f.kind, f.feature_id, f.message) if k == kind]


def _shared(net, a, b):
    ids = list(net.link_id)
    i, j = ids.index(a), ids.index(b)
    return {net.from_idx[i], net.to_idx[i]} & {net.from_idx[j], net.to_idx[j]}


def test_a_junction_end_never_joins_a_passing_main(tmp_path):
    g = tmp_path / "gis.gpkg"
    # A runs east; B and C meet 0.3 m north of A's interior (a node of two mains): no join.
    # D ends 0.3 m south of A and nothing else meets it: a T-junction.
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((10, 40), (30, 0.3))),
                       pipe("C", L((30, 0.3), (50, 40))),
                       pipe("D", L((70, -40), (70, -0.3)))])
    layer(g, "sources", source_rows(P(0, 0)))
    f = Findings()
    cn = build_network(config(tmp_path, g, layers={"sources": source_layer()}), f)
    net = cn.network
    assert not _shared(net, "A.1", "B") and not _shared(net, "A.2", "B")
    assert _shared(net, "A.1", "D") and _shared(net, "A.2", "D")
    near = _by_kind(f, "near_miss")
    assert near == [("A", "not joined: a node where 2 mains meet lies 0.30 m from this main (a "
                          "crossing or a near miss; join them in the GIS if they are connected)")]
    assert _by_kind(f, "main_split") == [
        ("A", "T-junction: split where the dangling end of pipe D lies 0.30 m from it")]


def test_mains_on_different_levels_never_join(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0)), LVL="B"),
                       pipe("D", L((70, -40), (70, -0.3)), LVL=None)])
    layer(g, "sources", source_rows(P(0, 0)))
    f = Findings()
    cfg = config(tmp_path, g, layers={"sources": source_layer()},
                 pipes={"fields": {"diameter": "DIAM_IN", "level": "LVL"},
                        "codes": {"level": {"B": "1"}}})
    cn = build_network(cfg, f)
    assert list(cn.network.link_id) == ["A", "D"]
    assert not _shared(cn.network, "A", "D")
    assert "(level 0)" in _by_kind(f, "near_miss")[0][1]
    assert "(level 1)" in _by_kind(f, "near_miss")[0][1]


def test_zero_length_message_gives_the_drawn_length(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("Z", L((100, 0), (100.2, 0.1)))])
    layer(g, "sources", source_rows(P(0, 0)))
    f = Findings()
    build_network(config(tmp_path, g, layers={"sources": source_layer()}), f)
    # length as drawn: hypot(0.2, 0.1) = 0.2236 m
    assert _by_kind(f, "zero_length_dropped") == [
        ("Z", "0.22 m long as drawn in the GIS; dropped because both its ends snapped to one "
              "node (within the snapping tolerance of 0.5 m)")]


def _devices(tmp_path, pump_dir=None, bearing=None):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((200, 0), (100, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "pumps", [{"PID": "PU1", "Q": 10.0, "H": 20.0, "DIR": pump_dir,
                        "geometry": P(150, 0)}])
    layer(g, "valves", [{"VID": "PRV1", "T": "PRV", "S": 40.0, "BRG": bearing,
                         "geometry": P(50, 0)}])
    layer(g, "tanks", [{"TID": "T1", "BOT": 250.0, "LVL": 270.0, "geometry": P(200, 0)}])
    pumps = {"input": "gis", "layer": "pumps", "id": "PID",
             "fields": {"design_flow": "Q", "design_head": "H"},
             "units": {"design_flow": "l/s", "design_head": "m"}}
    if pump_dir is not None:
        pumps["fields"]["direction"] = "DIR"
        pumps["codes"] = {"direction": {"AG": "against"}}
    valves = {"input": "gis", "layer": "valves", "id": "VID",
              "fields": {"type": "T", "setting": "S"}, "units": {"setting": "psi"},
              "codes": {"type": {"PRV": "prv"}}}
    if bearing is not None:
        valves["fields"]["direction"] = "BRG"
        valves["units"]["direction"] = "deg"
    tanks = {"input": "gis", "layer": "tanks", "id": "TID", "levels": "elevation",
             "fields": {"bottom_elevation": "BOT", "level": "LVL"},
             "units": {"bottom_elevation": "ft", "level": "ft"}}
    return config(tmp_path, g, layers={"sources": source_layer(), "pumps": pumps,
                                       "valves": valves, "tanks": tanks})


def test_direction_from_codes_and_bearings(tmp_path):
    f = Findings()
    cn = build_network(_devices(tmp_path, pump_dir="AG", bearing=265.0), f)
    net = cn.network
    ids = list(net.link_id)
    x = np.array([p.x for p in cn.nodes.geometry]) - 500000.0
    p, v = ids.index("PU1"), ids.index("PRV1")
    # B is digitised from x=200 to x=100; "against" makes the pump push from 100 to 200
    assert x[net.from_idx[p]] <= x[net.to_idx[p]]
    assert net.node_id[net.to_idx[p]] != net.node_id[net.from_idx[p]]
    # a bearing of 265 degrees (about west) is against A's eastward digitising
    assert _by_kind(f, "direction_unmapped") == []
    assert net.to_idx[v] == net.to_idx[ids.index("A.1")]
    assert net.from_idx[v] == net.from_idx[ids.index("A.2")]
    # tank levels as elevations: head 270 ft = 82.296 m (1 ft = 0.3048 m, definition)
    t = np.flatnonzero(net.node_kind == NODE_TANK)[0]
    assert net.fixed_head_m[t] == pytest.approx(82.296, abs=1e-6)


def test_unmapped_direction_said_once(tmp_path):
    f = Findings()
    cn = build_network(_devices(tmp_path), f)
    said = _by_kind(f, "direction_unmapped")
    assert len(said) == 2  # once for the pumps, once for the valves
    assert all("act along the digitised direction" in m for _, m in said)
    net = cn.network
    x = np.array([p.x for p in cn.nodes.geometry]) - 500000.0
    p = list(net.link_id).index("PU1")
    assert x[net.from_idx[p]] >= x[net.to_idx[p]]  # B's own direction, 200 -> 100


def test_out_of_service_hydrant_stays_attached(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "hydrants", [{"HID": "H1", "ST": "OOS", "geometry": P(40, 5)},
                          {"HID": "H2", "ST": "IS", "geometry": P(60, 5)}])
    hyd = {"input": "gis", "layer": "hydrants", "id": "HID", "fields": {"status": "ST"},
           "codes": {"status": {"OOS": "out_of_service", "IS": "open"}}}
    cn = build_network(config(tmp_path, g, layers={"sources": source_layer(),
                                                   "hydrants": hyd}), Findings())
    h = cn.hydrants.set_index("hydrant_id")
    assert list(h.index) == ["H1", "H2"]
    assert h["in_service"].tolist() == [False, True]
