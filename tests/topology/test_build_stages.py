"""Topology stages that share work: the network's parts computed once for the connectivity and
isolation checks, node ids made unique where they can repeat, and the stage clock."""

from __future__ import annotations

import numpy as np

from gridflow.findings import Findings
from gridflow.topology import build_network
from gridflow.topology.zones import connectivity_findings, network_parts, supplied_nodes

from ..gis_helpers import L, P, config, layer, pipe, source_layer, source_rows

VALVES = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
          "fields": {"type": "TYPE", "status": "STAT", "setting": "SET"},
          "units": {"setting": "psi"},
          "codes": {"type": {"GV": "isolation", "PRV": "prv", "CV": "check"},
                    "status": {"O": "open", "C": "closed"}}}


def test_shared_parts_same_answers(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((100, 0), (200, 0))),
                       pipe("C", L((200, 0), (300, 0))), pipe("D", L((500, 0), (600, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", [{"VALVE_ID": "V1", "TYPE": "GV", "STAT": "C", "SET": None,
                         "geometry": P(150, 1)}])
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": VALVES})
    cn = build_network(cfg, Findings())
    net = cn.network
    parts = network_parts(net)
    # through every link: the line A-B-C, and D apart; through open links: the closed
    # valve cuts B's far piece and C off as well
    assert len(np.unique(parts.whole)) == 2
    assert len(np.unique(parts.open)) == 3
    assert np.array_equal(supplied_nodes(net), supplied_nodes(net, parts))
    assert supplied_nodes(net).sum() == 3  # the source end, A's far end, B.1's far end
    pts = np.asarray(cn.nodes.geometry.values, dtype=object)
    geoms = np.asarray(cn.links.geometry.values, dtype=object)
    own, shared = Findings(), Findings()
    connectivity_findings(own, net, geoms, pts, "mains")
    connectivity_findings(shared, net, geoms, pts, "mains", parts)
    assert own.kind == shared.kind and own.feature_id == shared.feature_id
    assert own.message == shared.message
    assert {"disconnected_part", "unsupplied_part"} <= set(own.kind)


def test_node_ids_repeated_across_layers_and_generated(tmp_path):
    """A junction id repeated by a tank gets a '#2' suffix; a junction named like a generated
    id ('N1') lengthens the generated prefix (NN1 ...)."""
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((100, 0), (200, 0))),
                       pipe("C", L((200, 0), (300, 0)))])
    layer(g, "junctions", [{"JID": "J7", "ELEV": 100.0, "geometry": P(100, 0)},
                           {"JID": "N1", "ELEV": 100.0, "geometry": P(200, 0)}])
    layer(g, "tanks", [{"TID": "J7", "BOT": 300.0, "LVL": 20.0, "geometry": P(0, 1)}])
    nodes = {"input": "gis", "layer": "junctions", "id": "JID", "fields": {"elevation": "ELEV"},
             "units": {"elevation": "ft"}}
    tanks = {"input": "gis", "layer": "tanks", "id": "TID",
             "fields": {"bottom_elevation": "BOT", "level": "LVL"},
             "units": {"bottom_elevation": "ft", "level": "ft"}}
    cn = build_network(config(tmp_path, g, layers={"nodes": nodes, "tanks": tanks}), Findings())
    ids = list(cn.network.node_id)
    assert ids == ["J7", "J7#2", "N1", "NN1"]  # ordered by x: tank, junctions, the far end
    assert cn.network.fixed_head_m[0] > 0 and np.isnan(cn.network.fixed_head_m[1:]).all()


def test_stage_timings_reported(tmp_path):
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [pipe("A", L((0, 0), (100, 0))), pipe("B", L((100, 0), (200, 0)))])
    layer(g, "sources", source_rows(P(0, 0)))
    cfg = config(tmp_path, g, layers={"sources": source_layer()})
    timings: dict[str, float] = {}
    cn = build_network(cfg, Findings(), timings=timings)
    assert list(timings) == ["read", "pipes", "snap", "attach", "split", "nodes", "links",
                             "elevations", "assemble", "checks"]
    assert all(v >= 0.0 for v in timings.values())
    assert cn.network.n_links == 2
