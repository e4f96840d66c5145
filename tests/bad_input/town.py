"""A tiny invented Millbrook district as a GeoPackage and config, built in code for bad-input tests.

:class:`Town` holds the layers as rows (dicts with a ``geometry``) and the config as a TOML table;
a case mutates either, then :meth:`Town.write` puts ``town.gpkg`` and ``town.toml`` in a folder.
Coordinates are metres in EPSG:32616 (UTM 16N), local offsets added to ``X0, Y0``.

The district (ground about 850 ft, source grade 1000 ft, so about 65 psi)::

    S1 -- M1 -- J2 -- M2 (valve V1) -- J3 -- M7 (valve V2) -- J6 -- M8 -- J7   (zone HILL)
                 |                      |
                 M3                     M4
                 |                      |
                 J4 ------- M5 ------- J5 -- M6 -- T1 (tank)
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import tomli_w
from shapely.geometry import LineString, Point

CRS = "EPSG:32616"
X0, Y0 = 500000.0, 4600000.0


def L(*xy) -> LineString:
    return LineString([(X0 + x, Y0 + y) for x, y in xy])


def P(x, y) -> Point:
    return Point(X0 + x, Y0 + y)


def _mains():
    rows = [("M1", [(0, 0), (200, 0)], 12.0), ("M2", [(200, 0), (400, 0)], 8.0),
            ("M3", [(200, 0), (200, 200)], 8.0), ("M4", [(400, 0), (400, 200)], 8.0),
            ("M5", [(200, 200), (400, 200)], 8.0), ("M6", [(400, 200), (600, 200)], 12.0),
            ("M7", [(400, 0), (600, 0)], 8.0), ("M8", [(600, 0), (600, -200)], 6.0)]
    return [{"MAIN_ID": i, "DIAM_IN": d, "MATL": "DI", "STATUS": "ACT", "YEAR": 1990,
             "ZONE": "HILL" if i == "M8" else "LOW", "geometry": L(*xy)} for i, xy, d in rows]


def _nodes():
    pts = {"S1": (0, 0), "J2": (200, 0), "J3": (400, 0), "J4": (200, 200), "J5": (400, 200),
           "T1": (600, 200), "J6": (600, 0), "J7": (600, -200)}
    elev = {"S1": 840.0, "J2": 850.0, "J3": 855.0, "J4": 845.0, "J5": 852.0, "T1": 900.0,
            "J6": 860.0, "J7": 870.0}
    return [{"NODE_ID": k, "ELEV_FT": elev[k], "geometry": P(*xy)} for k, xy in pts.items()]


def _layers() -> dict:
    return {
        "mains": _mains(),
        "junctions": _nodes(),
        "sources": [{"SRC_ID": "S1", "HGL_FT": 1000.0, "geometry": P(0, 0)}],
        "tanks": [{"TANK_ID": "T1", "BASE_FT": 960.0, "LEVEL_FT": 25.0, "geometry": P(600, 200)}],
        "valves": [{"VALVE_ID": "V1", "VTYPE": "GATE", "POS": "NO", "SET_PSI": None,
                    "geometry": P(300, 0)},
                   {"VALVE_ID": "V2", "VTYPE": "GATE", "POS": "NO", "SET_PSI": None,
                    "geometry": P(500, 0)}],
        "hydrants": [{"HYD_ID": "H1", "geometry": P(100, 5)}],
        "meters": [{"METER_NO": f"MT{i}", "GPD": 400.0, "CLASS": "SFR", "geometry": P(x, y)}
                   for i, (x, y) in enumerate([(100, 10), (300, 10), (210, 100), (300, 210),
                                               (500, 10), (610, -100)], start=1)],
    }


def _config() -> dict:
    return {
        "run": {"name": "bad-input corpus", "units": "US", "output": "out/result.gpkg",
                "snap_tolerance": "0.5 m"},
        "inputs": {"gis": "town.gpkg"},
        "layers": {
            "pipes": {"input": "gis", "layer": "mains", "id": "MAIN_ID",
                      "fields": {"diameter": "DIAM_IN", "material": "MATL", "status": "STATUS",
                                 "install_year": "YEAR", "zone": "ZONE"},
                      "units": {"diameter": "in"},
                      "codes": {"status": {"ACT": "open", "ABD": "abandoned"},
                                "material": {"DI": "ductile_iron"}}},
            "nodes": {"input": "gis", "layer": "junctions", "id": "NODE_ID",
                      "fields": {"elevation": "ELEV_FT"}, "units": {"elevation": "ft"}},
            "sources": {"input": "gis", "layer": "sources", "id": "SRC_ID",
                        "fields": {"head": "HGL_FT"}, "units": {"head": "ft"}},
            "tanks": {"input": "gis", "layer": "tanks", "id": "TANK_ID",
                      "fields": {"bottom_elevation": "BASE_FT", "level": "LEVEL_FT"},
                      "units": {"bottom_elevation": "ft", "level": "ft"}},
            "valves": {"input": "gis", "layer": "valves", "id": "VALVE_ID",
                       "fields": {"type": "VTYPE", "status": "POS", "setting": "SET_PSI"},
                       "units": {"setting": "psi"},
                       "codes": {"type": {"GATE": "isolation", "PRV": "prv"},
                                 "status": {"NO": "open", "NC": "closed"}}},
            "hydrants": {"input": "gis", "layer": "hydrants", "id": "HYD_ID"},
            "meters": {"input": "gis", "layer": "meters", "id": "METER_NO",
                       "fields": {"consumption": "GPD", "category": "CLASS"}},
        },
        "elevation": {"source": "attribute", "unit": "ft"},
        "demand": {"method": "meters", "consumption_unit": "gal/day",
                   "search_distance": "50 m"},
        "fireflow": {"enabled": False},
        "report": {"enabled": False},
    }


@dataclass
class Town:
    """Layers (name -> rows) and config table of the tiny district; mutate, then :meth:`write`."""

    layers: dict = field(default_factory=_layers)
    config: dict = field(default_factory=_config)
    crs: dict = field(default_factory=dict)  # layer name -> CRS (default :data:`CRS`)
    config_text: str | None = None  # written verbatim instead of ``config`` when set

    def rows(self, layer: str, fid: str | None = None) -> list | dict:
        """The rows of a layer, or the row whose id (first field) is ``fid``."""
        rows = self.layers[layer]
        if fid is None:
            return rows
        return next(r for r in rows if next(iter(r.values())) == fid)

    def copy(self) -> Town:
        return copy.deepcopy(self)

    def write(self, folder: Path) -> tuple[Path, Path]:
        """Write ``town.gpkg``, ``town.toml`` and an empty ``out/`` in ``folder``.

        Returns the paths of the GeoPackage and the config."""
        (folder / "out").mkdir(parents=True, exist_ok=True)
        gpkg = folder / "town.gpkg"
        for name, rows in self.layers.items():
            write_layer(gpkg, name, rows, self.crs.get(name, CRS))
        cfg = folder / "town.toml"
        if self.config_text is not None:
            cfg.write_text(self.config_text, encoding="utf-8")
        else:
            cfg.write_bytes(tomli_w.dumps(self.config).encode("utf-8"))
        return gpkg, cfg


def write_layer(gpkg: Path, name: str, rows: list, crs=CRS, **kw) -> None:
    """One layer from rows of dicts with a ``geometry`` (``crs=None``: no CRS)."""
    import pyogrio

    gdf = gpd.GeoDataFrame(rows, geometry="geometry", crs=crs)
    pyogrio.write_dataframe(gdf, gpkg, layer=name, driver="GPKG", **kw)
