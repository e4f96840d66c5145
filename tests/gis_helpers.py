"""Tiny builders for deliberately messy GIS in tests: GeoPackages in tmp_path and configs.

Coordinates are metres in a projected CRS (EPSG:32616, UTM zone 16N) unless a test says
otherwise; all data are invented for the fictional town of Millbrook.
"""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
from shapely.geometry import LineString, MultiLineString, Point

from gridflow.config import parse_config

CRS = "EPSG:32616"
X0, Y0 = 500000.0, 4600000.0


def L(*xy):
    """A LineString from local coordinates (added to X0, Y0)."""
    return LineString([(X0 + x, Y0 + y) for x, y in xy])


def ML(*parts):
    return MultiLineString([[(X0 + x, Y0 + y) for x, y in p] for p in parts])


def P(x, y, z=None):
    return Point(X0 + x, Y0 + y) if z is None else Point(X0 + x, Y0 + y, z)


def layer(path: Path, name: str, rows: list[dict], crs=CRS) -> None:
    gdf = gpd.GeoDataFrame(rows, geometry="geometry", crs=crs)
    gdf.to_file(path, layer=name, driver="GPKG", engine="pyogrio")


def pipe(pid, geom, diam=8.0, **kw):
    return {"MAIN_ID": pid, "DIAM_IN": diam, "MATL": kw.pop("matl", "DI"),
            "STATUS": kw.pop("status", "ACT"), "YEAR": kw.pop("year", 1990), **kw,
            "geometry": geom}


def config(tmp_path: Path, gpkg: Path, *, layers: dict | None = None, run: dict | None = None,
           extra: dict | None = None, pipes: dict | None = None):
    """A validated Config reading ``gpkg``: pipes always, other roles as given."""
    table = {
        "run": {"snap_tolerance": "0.5 m", **(run or {})},
        "inputs": {"gis": str(gpkg)},
        "layers": {
            "pipes": {"input": "gis", "layer": "mains", "id": "MAIN_ID",
                      "fields": {"diameter": "DIAM_IN", "material": "MATL",
                                 "status": "STATUS", "install_year": "YEAR"},
                      "units": {"diameter": "in"},
                      "codes": {"status": {"ACT": "open", "ABD": "abandoned",
                                           "CLS": "closed"}},
                      **(pipes or {})},
            **(layers or {}),
        },
        **(extra or {}),
    }
    return parse_config(table, base_dir=tmp_path)


def source_layer(**kw):
    return {"input": "gis", "layer": "sources", "id": "SRC_ID",
            "fields": {"head": "HGL_FT"}, "units": {"head": "ft"}, **kw}


def source_rows(*pts):
    return [{"SRC_ID": f"S{i + 1}", "HGL_FT": 900.0, "geometry": p} for i, p in enumerate(pts)]
