"""The benchmarks' synthetic utility (scripts/synthetic_utility.py) is one connected town at
every size: its street grid keeps a spanning tree, also past 46,341 lattice nodes, where the
product of two node numbers no longer fits 32 bits."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

ROOT = Path(__file__).resolve().parents[1]


def _generator():
    spec = importlib.util.spec_from_file_location(
        "synthetic_utility", ROOT / "scripts" / "synthetic_utility.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.mark.parametrize("side", [40, 300])
def test_street_grid_is_one_connected_network(side):
    gen = _generator()
    n_grid = int(1.5 * (side - 1) ** 2)  # a quarter of the 2 side (side - 1) streets missing
    a, b, street = gen.street_grid(side, n_grid, np.random.default_rng(7))
    n = side * side
    ncomp, _ = connected_components(coo_matrix((np.ones(a.size), (a, b)), shape=(n, n)),
                                     directed=False)
    assert ncomp == 1
    # every node of the lattice is reached by some main
    assert np.unique(np.r_[a, b]).size == n
    # the quarter is dropped (the spanning tree and the arterials are never dropped)
    assert a.size == n_grid
    # arterials (every 8th street) are all kept: side - 1 mains along each, both directions
    assert int(np.sum(street % 8 == 0)) == 2 * (side - 1) * len(range(0, side, 8))


def test_zoned_town_keeps_its_hollows_in_zones_of_their_own(tmp_path):
    """The zoned town (``zones=True``): each low district is a pressure zone of its own, fed
    through its reducing valves only, and service pressure stays at or below 100 psi, where
    the same ground in one zone would see more (common practice: pressure zones keep service
    pressure within about 40-80 psi, seldom above 100)."""
    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.hydraulics import HydraulicSystem, SolveOptions
    from gridflow.network import NODE_JUNCTION, VALVE_PRESSURE_REDUCING
    from gridflow.topology import build_network
    from gridflow.units import M_HEAD_PER_PSI

    gen = _generator()
    gis = tmp_path / "zoned.gpkg"
    counts = gen.write_utility(gis, 20_000, zones=True)
    assert counts["prv_stations"] >= 4  # two a low district
    cfg_path = tmp_path / "zoned.toml"
    cfg_path.write_text(gen.config_text(gis, report=False, zones=True))
    net = build_network(load_config(cfg_path), Findings()).network
    r = HydraulicSystem(net, SolveOptions()).solve()
    assert r.converged
    prv = np.flatnonzero(np.asarray(net.valve_type) == VALVE_PRESSURE_REDUCING)
    assert len(prv) == counts["prv_stations"]
    zone = np.asarray(net.zone).astype(str)
    inlet, outlet = zone[net.from_idx[prv]], zone[net.to_idx[prv]]
    # every valve lets water down from the town's main zone into a zone of its own
    main = zone[np.argmax(np.bincount(np.unique(zone, return_inverse=True)[1]))]
    assert np.all(inlet == main) and np.all(outlet != main)
    assert len(np.unique(outlet)) == len(prv) // 2
    psi = (r.head_m - net.elevation_m) / M_HEAD_PER_PSI
    junction = (np.asarray(net.node_kind) == NODE_JUNCTION) & ~np.asarray(net.is_fixed)
    served = r.supplied & junction
    assert psi[served].max() <= 100.0
    # without the valves, the hollows' lowest ground would be above 100 psi
    grade = float(np.max(r.head_m[net.is_fixed]))
    assert (grade - float(net.elevation_m[served].min())) / M_HEAD_PER_PSI > 100.0
    # nearly every node is served: fragments cut off by closed boundary valves are few
    assert served.sum() > 0.99 * junction.sum()
