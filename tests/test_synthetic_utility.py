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
