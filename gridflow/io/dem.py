"""Ground elevations from a DEM raster (the optional ``dem`` extra: rasterio)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from gridflow.errors import ConfigError, InputError

__all__ = ["sample_dem"]


def sample_dem(path: Path, x: np.ndarray, y: np.ndarray, crs, unit_factor_m: float) -> np.ndarray:
    """Ground elevation [m] at points (x, y in ``crs``) from a DEM raster; NaN off the raster.

    Raises
    ------
    ConfigError
        If rasterio (the optional ``dem`` extra) is not installed.
    InputError
        If the raster cannot be opened.
    """
    try:
        import rasterio
    except ImportError:
        raise ConfigError("config key elevation.source = 'dem' needs rasterio; install it with "
                          "pip install 'gridflow[dem]'", key="elevation.source") from None
    try:
        src = rasterio.open(path)
    except Exception as exc:
        raise InputError(f"cannot open DEM {path}: {exc}", file=str(path)) from None
    from rasterio.windows import Window

    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    out = np.full(len(x), np.nan)
    with src:
        from pyproj import CRS, Transformer

        dem_crs = CRS.from_user_input(src.crs.to_wkt()) if src.crs is not None else None
        if dem_crs is not None and not dem_crs.equals(CRS.from_user_input(crs)):
            t = Transformer.from_crs(crs, dem_crs, always_xy=True)
            x, y = t.transform(x, y)
        if len(x) == 0:
            return out
        # the cell under each point, all points at once; one read of the window they span
        inv = ~src.transform  # the affine map from coordinates to (column, row)
        col_f = inv.a * x + inv.b * y + inv.c
        row_f = inv.d * x + inv.e * y + inv.f
        rows = np.floor(row_f).astype(np.int64)
        cols = np.floor(col_f).astype(np.int64)
        inside = (rows >= 0) & (rows < src.height) & (cols >= 0) & (cols < src.width)
        if inside.any():
            r0, r1 = rows[inside].min(), rows[inside].max()
            c0, c1 = cols[inside].min(), cols[inside].max()
            band = src.read(1, window=Window(c0, r0, c1 - c0 + 1, r1 - r0 + 1), masked=True)
            vals = band[rows[inside] - r0, cols[inside] - c0]
            out[inside] = np.ma.filled(vals.astype(float), np.nan)
    return out * unit_factor_m
