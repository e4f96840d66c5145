"""Layers built when written (DeferredLayer): the file is the same as writing the frame held
in memory, each layer is built once per write, and freed memory goes back to the system."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from gridflow.io.deferred import DeferredLayer, materialize
from gridflow.io.write import write_layers
from gridflow.memory import _libc, release_memory, resident_mb

from ..gis_helpers import CRS


def _frame(n=500):
    import geopandas as gpd

    x = np.arange(n, dtype=float) * 10.0
    return gpd.GeoDataFrame(
        {"pipe_id": [f"P{i}" for i in range(n)], "flow_gpm": np.linspace(-3.0, 40.0, n),
         "high_velocity": (np.arange(n) % 7 == 0).astype(np.int32)},
        geometry=shapely.linestrings(np.stack([np.c_[x, x * 0], np.c_[x + 5, x * 0 + 5]], 1)),
        crs=CRS)


def test_deferred_layer_writes_the_same_layer_as_the_frame(tmp_path):
    gdf = _frame()
    calls = []

    def build():
        calls.append(1)
        return gdf.copy()

    info = pd.DataFrame({"key": ["a"], "value": ["1"]})
    write_layers(tmp_path / "eager.gpkg", {"pipes_x": gdf, "run_info": info})
    write_layers(tmp_path / "lazy.gpkg", {"pipes_x": DeferredLayer(build, len(gdf)),
                                          "run_info": info})
    assert len(calls) == 1  # built once, for its write
    assert [n for n, _ in pyogrio.list_layers(tmp_path / "lazy.gpkg")] == \
        [n for n, _ in pyogrio.list_layers(tmp_path / "eager.gpkg")]
    a = pyogrio.read_dataframe(tmp_path / "eager.gpkg", layer="pipes_x")
    b = pyogrio.read_dataframe(tmp_path / "lazy.gpkg", layer="pipes_x")
    pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
    assert shapely.equals_exact(a.geometry.values, b.geometry.values, tolerance=0).all()


def test_materialize_and_length():
    gdf = _frame(3)
    lazy = DeferredLayer(lambda: gdf, 3)
    assert len(lazy) == 3
    assert materialize(lazy) is gdf and materialize(gdf) is gdf


@pytest.mark.skipif(_libc() is None, reason="glibc's malloc_trim is not available here")
def test_release_memory_returns_freed_heap_pages():
    # 300 MB in 100 kB blocks (below glibc's threshold for separate mappings: they sit in
    # the heap), the first of each pair freed: the freed pages stay resident until trimmed
    blocks = [np.ones(12_500) for _ in range(3000)]
    for i in range(0, len(blocks), 2):
        blocks[i] = None
    before = resident_mb()
    release_memory()
    after = resident_mb()
    assert before - after > 100, (before, after)  # about 150 MB freed
    assert all(b is None or b[0] == 1.0 for b in blocks)  # live data untouched

