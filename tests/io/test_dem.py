"""Elevations sampled from a DEM raster (the optional ``dem`` extra, rasterio)."""

from __future__ import annotations

import numpy as np
import rasterio
from rasterio.transform import from_origin

from gridflow.findings import Findings
from gridflow.io.dem import sample_dem
from gridflow.topology import build_network

from ..gis_helpers import CRS, X0, Y0, L, P, config, layer, pipe, source_layer, source_rows

CELL = 10.0  # m


def _plane_dem(path, *, crs=CRS, nodata=None, unit=1.0):
    """A 60 x 60 DEM of 10 m cells whose value at each cell centre is a known plane:
    z = 200 + 0.05 (x - X0) - 0.02 (y - Y0) [m], times 1/unit (e.g. feet)."""
    west, north = X0 - 100.0, Y0 + 500.0
    cols, rows = np.meshgrid(np.arange(60), np.arange(60))
    xc = west + (cols + 0.5) * CELL
    yc = north - (rows + 0.5) * CELL
    z = (200.0 + 0.05 * (xc - X0) - 0.02 * (yc - Y0)) / unit
    if nodata is not None:
        z[:5, :5] = nodata
    with rasterio.open(path, "w", driver="GTiff", width=60, height=60, count=1,
                       dtype="float32", crs=crs, transform=from_origin(west, north, CELL, CELL),
                       nodata=nodata) as dst:
        dst.write(z.astype("float32"), 1)


def _plane(x, y):
    return 200.0 + 0.05 * (x - X0) - 0.02 * (y - Y0)


def test_sample_at_cell_centres_equals_the_plane(tmp_path):
    dem = tmp_path / "dem.tif"
    _plane_dem(dem)
    x = X0 + np.array([-95.0, 5.0, 155.0])  # cell centres (the raster starts at X0 - 100)
    y = Y0 + np.array([495.0, 305.0, 15.0])
    got = sample_dem(dem, x, y, CRS, 1.0)
    np.testing.assert_allclose(got, _plane(x, y), atol=1e-3)  # float32 storage


def test_off_raster_and_nodata_are_nan_and_feet_are_converted(tmp_path):
    dem = tmp_path / "dem_ft.tif"
    _plane_dem(dem, nodata=-9999.0, unit=0.3048)
    x = np.array([X0 - 95.0, X0 + 5000.0, X0 + 105.0])  # nodata corner, off the raster, inside
    y = np.array([Y0 + 495.0, Y0, Y0 + 305.0])
    got = sample_dem(dem, x, y, CRS, 0.3048)
    assert np.isnan(got[0]) and np.isnan(got[1])
    assert abs(got[2] - _plane(x[2], y[2])) < 1e-3  # stored in feet, returned in metres


def test_network_elevations_from_a_dem(tmp_path):
    dem = tmp_path / "dem.tif"
    _plane_dem(dem)
    gpkg = tmp_path / "gis.gpkg"
    # node points at cell centres (5 m offsets from the 10 m grid)
    layer(gpkg, "mains", [pipe("A", L((5, 5), (105, 5))), pipe("B", L((105, 5), (105, 205)))])
    layer(gpkg, "sources", source_rows(P(5, 5)))
    cfg = config(tmp_path, gpkg, layers={"sources": source_layer()},
                 extra={"elevation": {"source": "dem", "dem": str(dem), "unit": "m"}})
    clean = build_network(cfg, Findings())
    xy = np.array([[p.x, p.y] for p in clean.nodes.geometry])
    net = clean.network
    junction = net.node_kind == 0
    np.testing.assert_allclose(net.elevation_m[junction], _plane(*xy[junction].T), atol=1e-3)
