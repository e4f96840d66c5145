"""Benchmark reading and writing a layer through PostGIS against the GeoPackage path.

The same synthetic mains (street-grid LineStrings with an id, a diameter, a material and a
status) are written and read both ways, on a throwaway PostgreSQL/PostGIS server started here
(Debian's packages, as in the tests):

- write, GeoPackage: pyogrio + Arrow with a spatial index (what the output writer does)
- write, PostGIS: ``gridflow.io.publish.copy_frame`` (one binary COPY stream built with numpy,
  then a GiST index), in one transaction
- read, GeoPackage: ``gridflow.io.read`` 's Arrow read of the mapped columns
- read, PostGIS: ``gridflow.io.postgis.read_frame`` (one binary-protocol query inside the
  run's read-only snapshot, geometry as WKB parsed by shapely)

Printed: medians of 3 and the ratio PostGIS / GeoPackage for each (the GeoPackage figure is
the floor, measured in the same run). The machine is shared: compare ratios.

    python scripts/bench_postgis.py 100000 500000
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))


def _median(fn, repeat: int = 3) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def main(sizes: list[int]) -> None:
    import geopandas as gpd
    import pyogrio
    import shapely
    from synthetic_utility import make_utility

    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.io import postgis
    from gridflow.io.publish import copy_frame
    from gridflow.io.read import _read_frame, inspect_inputs
    from tests import pg_server

    srv = pg_server.start()
    print(f"server: PostgreSQL from {srv.bin}, port {srv.port}")
    try:
        for n in sizes:
            rng = np.random.default_rng(7)
            lines = shapely.force_2d(np.asarray(make_utility(n)["mains"].geometry.values))
            m = len(lines)
            gdf = gpd.GeoDataFrame({"MAIN_ID": np.char.add("M", np.arange(m).astype(str)),
                                    "DIAM_IN": rng.choice([6.0, 8.0, 12.0], m),
                                    "MATL": rng.choice(["DI", "PVC", "CI"], m),
                                    "STATUS": "ACT"}, geometry=lines, crs="EPSG:32616")
            with tempfile.TemporaryDirectory() as tmp:
                gpkg = Path(tmp) / "mains.gpkg"

                def write_gpkg(gdf=gdf, gpkg=gpkg):
                    gpkg.unlink(missing_ok=True)
                    pyogrio.write_dataframe(gdf, gpkg, layer="mains", driver="GPKG",
                                            use_arrow=True)

                def write_pg(gdf=gdf):
                    with srv.connect() as c:
                        c.execute("DROP SCHEMA IF EXISTS bench CASCADE")
                        c.execute("CREATE SCHEMA bench")
                        copy_frame(c, "bench", "mains", gdf, srid=32616)
                        c.commit()

                w_gpkg = _median(write_gpkg)
                w_pg = _median(write_pg)
                toml = Path(tmp) / "b.toml"
                body = ('[layers.pipes]\ninput = "gis"\nlayer = "{layer}"\nid = "MAIN_ID"\n'
                        'fields = {{ diameter = "DIAM_IN", material = "MATL", status = '
                        '"STATUS" }}\nunits = {{ diameter = "in" }}\n')
                toml.write_text(f'[inputs]\ngis = "{gpkg}"\n' + body.format(layer="mains"))
                cfg_f = load_config(toml)
                info_f = inspect_inputs(cfg_f)["pipes"]
                cols = ["MAIN_ID", "DIAM_IN", "MATL", "STATUS"]
                toml.write_text(f'[inputs]\ngis = "{srv.conninfo}"\n'
                                + body.format(layer="bench.mains"))
                cfg_p = load_config(toml)

                def read_gpkg(info_f=info_f, cols=cols):
                    return _read_frame(info_f, cols, None, Findings(), "MAIN_ID")

                def read_pg(cfg_p=cfg_p, cols=cols):
                    with postgis.snapshots(cfg_p):
                        info = postgis.inspect_layer(cfg_p, "pipes", cfg_p.layers.pipes)
                        return postgis.read_frame(cfg_p, "pipes", info, cols, None)

                assert len(read_pg()) == len(read_gpkg()) == m
                r_gpkg = _median(read_gpkg)
                r_pg = _median(read_pg)
            print(f"{m:>8} mains  write: GeoPackage {w_gpkg:6.2f} s, PostGIS {w_pg:6.2f} s, "
                  f"ratio {w_pg / w_gpkg:4.2f}   read: GeoPackage {r_gpkg:6.2f} s, PostGIS "
                  f"{r_pg:6.2f} s, ratio {r_pg / r_gpkg:4.2f}", flush=True)
    finally:
        pg_server.stop(srv)


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [100_000])
