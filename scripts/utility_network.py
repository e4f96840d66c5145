"""The synthetic utility as a solved-ready network, for the network-level benchmarks.

``utility_network(n_mains)`` writes the utility of ``synthetic_utility.py`` to a temporary
GeoPackage, reads and cleans it once (``build_network``) and allocates its meters
(``allocate``): the network the nightly run would solve, average-day demand on its nodes.
"""

from __future__ import annotations

import tempfile
from pathlib import Path


def utility_network(n_mains: int, seed: int = 7):
    """(Network with average-day demand, CleanNetwork, Config) of the synthetic utility."""
    from synthetic_utility import config_text, write_utility

    from gridflow.config import load_config
    from gridflow.demand import allocate
    from gridflow.findings import Findings
    from gridflow.topology import build_network

    with tempfile.TemporaryDirectory() as d:
        gis = Path(d) / "utility.gpkg"
        write_utility(gis, n_mains, seed)
        cfg_path = Path(d) / "utility.toml"
        cfg_path.write_text(config_text(gis, fireflow=False, report=False))
        cfg = load_config(cfg_path)
        findings = Findings()
        clean = build_network(cfg, findings)
        alloc = allocate(cfg, clean, findings)
    return clean.network.replace(demand_m3s=alloc.node_demand_m3s), clean, cfg
