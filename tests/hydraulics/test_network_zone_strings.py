"""A network's zone names: the values given, one str object per distinct name (memory at the
scale of millions of nodes), the same whatever type the names came in."""

from __future__ import annotations

import numpy as np

from gridflow.network import Network


def _net(zone):
    return Network.from_arrays(
        node_id=["S", "A", "B", "C"], elevation_m=[0.0, 1.0, 2.0, 3.0],
        fixed_head_m=[50.0, np.nan, np.nan, np.nan], zone=zone,
        link_id=["P1", "P2", "P3"], from_idx=[0, 1, 2], to_idx=[1, 2, 3],
        length_m=[100.0] * 3, diameter_m=[0.2] * 3, roughness=[120.0] * 3)


def test_zone_names_are_kept_and_shared():
    net = _net(np.array(["north", "south", "north", "north"]))
    assert net.zone.dtype == object
    assert list(net.zone) == ["north", "south", "north", "north"]
    assert all(type(z) is str for z in net.zone)
    assert net.zone[0] is net.zone[2] is net.zone[3]  # stored once
    assert net.zone[1] is not net.zone[0]


def test_zone_names_from_any_sequence_and_none():
    assert list(_net(["", "z1", "", 7]).zone) == ["", "z1", "", "7"]
    assert list(_net(None).zone) == ["", "", "", ""]
