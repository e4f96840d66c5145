"""The writer's WKB from coordinate arrays against shapely's own encoder (GEOS's WKB writer)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
import shapely

from gridflow.io.wkb import _encode, wkb_array

RNG_SEED = 21


def _lines(rng, n: int, dims: int):
    k = rng.integers(2, 7, n)
    return shapely.linestrings(rng.uniform(-1e3, 1e6, (int(k.sum()), dims)),
                               indices=np.repeat(np.arange(n), k))


def _reference(g) -> pa.Array:
    return pa.array(shapely.to_wkb(np.asarray(g, dtype=object)), type=pa.binary())


@pytest.mark.parametrize("kind", ["point2", "point3", "line2", "line3"])
def test_points_and_lines_equal_shapely_wkb(kind):
    """Points and line strings, 2D or with Z, some missing: byte for byte what shapely
    writes (nulls where it gives None), by the array path."""
    rng = np.random.default_rng(RNG_SEED)
    dims = int(kind[-1])
    g = (shapely.points(rng.uniform(-1e3, 1e6, (3_000, dims))) if kind.startswith("point")
         else _lines(rng, 2_000, dims)).astype(object)
    g[::13] = None
    assert _encode(g) is not None  # the array path, not the fallback
    got, want = wkb_array(g), _reference(g)
    assert got.equals(want)
    assert got.null_count == want.null_count > 0
    assert got.to_pylist()[1] == shapely.to_wkb(g[1])


@pytest.mark.parametrize("case", ["empty", "mixed_z", "multi", "polygon", "mixed_types",
                                  "all_missing"])
def test_other_layers_fall_back_to_shapely(case):
    """Empty geometries, 2D mixed with Z, other types: shapely's encoder, the same values."""
    rng = np.random.default_rng(RNG_SEED)
    pts = shapely.points(rng.uniform(0, 100, (50, 2))).astype(object)
    g = {"empty": np.r_[pts, [shapely.Point()]],
         "mixed_z": np.r_[pts, shapely.points(rng.uniform(0, 100, (5, 3)))],
         "multi": np.array([shapely.multilinestrings(_lines(rng, 3, 2))] * 4, dtype=object),
         "polygon": np.array([shapely.box(0, 0, 1, 1)] * 3, dtype=object),
         "mixed_types": np.r_[pts, _lines(rng, 5, 2)],
         "all_missing": np.array([None, None], dtype=object)}[case]
    g = np.asarray(g, dtype=object)
    assert _encode(g) is None
    assert wkb_array(g).equals(_reference(g))
