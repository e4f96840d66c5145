"""Node elevations from the mains' Z where devices and hydrants split a main.

A utility export commonly carries ground elevation as the mains' Z and none on valve and
hydrant points. A node made on a main's interior then takes the main's Z, interpolated by
distance between the main's ends (a fact of geometry, nothing guessed), with no finding.
"""

from __future__ import annotations

import numpy as np
import pytest
from shapely.geometry import LineString

from gridflow.findings import Findings
from gridflow.topology import build_network
from tests.gis_helpers import X0, Y0, P, config, layer, pipe, source_layer, source_rows

VALVES = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
          "fields": {"type": "TYPE", "status": "STAT"},
          "codes": {"type": {"GV": "isolation"}, "status": {"O": "open", "C": "closed"}}}
HYD = {"input": "gis", "layer": "hydrants", "id": "HYD_ID"}


def test_nodes_on_a_z_main_take_its_interpolated_z(tmp_path):
    g = tmp_path / "gis.gpkg"
    # a main rising from 100 m to 110 m over 200 m, then a flat one at 110 m
    layer(g, "mains", [pipe("M1", LineString([(X0, Y0, 100.0), (X0 + 200, Y0, 110.0)])),
                       pipe("M2", LineString([(X0 + 200, Y0, 110.0), (X0 + 300, Y0, 110.0)]))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", [{"VALVE_ID": "V1", "TYPE": "GV", "STAT": "O", "geometry": P(50, 0.5)}])
    layer(g, "hydrants", [{"HYD_ID": "H1", "geometry": P(150, 6)}])
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": VALVES,
                                      "hydrants": HYD},
                 extra={"elevation": {"source": "z", "unit": "m"}})
    f = Findings()
    cn = build_network(cfg, f)
    net = cn.network
    assert "elevation_missing" not in f.kind
    xy = np.column_stack([cn.nodes.geometry.x - X0, cn.nodes.geometry.y - Y0])
    junction = net.node_kind == 0
    # linear in distance along the main: z = 100 + 10 * x / 200 (x from its start)
    on_m1 = junction & (xy[:, 0] > 1) & (xy[:, 0] < 199)
    assert on_m1.sum() >= 3  # the valve's two nodes and the hydrant's node
    assert net.elevation_m[on_m1] == pytest.approx(100 + 10 * xy[on_m1, 0] / 200, abs=1e-6)
    assert not cn.elevation_guessed[on_m1].any()
