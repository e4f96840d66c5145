"""Benchmark the whole nightly run end to end on synthetic networks.

A synthetic utility (street-grid mains as LineString Z, one source per 2,500 mains, one
customer meter per two mains) is written to a GeoPackage; ``run_job`` runs it with the three
default scenarios (fire flow off: it has its own benchmark). Printed: stage times from the run
record, the whole run, and the ratio of the whole run to a floor measured in the same process:

    floor = bare read (pyogrio + Arrow, mains and meters)
          + bare write (the run's own output layers written again with pyogrio)
          + solver floor (iterations x one numeric factorization of the network matrix)

and peak memory (ru_maxrss; each size runs in its own process).

    python scripts/bench_run.py 100000 500000

Targets: 100k mains under 60 s; 500k under 5 min and 6 GB; ratio <= 3.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))


def write_utility(path: Path, n: int, seed: int = 7) -> None:
    import geopandas as gpd
    import pyogrio
    import shapely
    from bench_gis import make_grid

    rng = np.random.default_rng(seed)
    lines = make_grid(n, seed)
    xy = shapely.get_coordinates(lines)
    z = 100.0 + 0.002 * (xy[:, 0] - xy[:, 0].min())  # a gentle slope [m]
    lines3 = shapely.linestrings(np.column_stack([xy, z]),
                                 indices=np.repeat(np.arange(len(lines)), 3))
    m = len(lines)
    gdf = gpd.GeoDataFrame({"MAIN_ID": np.char.add("M", np.arange(m).astype(str)),
                            "DIAM_IN": rng.choice([6.0, 8.0, 8.0, 12.0], m), "MATL": "DI",
                            "STATUS": "ACT"}, geometry=lines3, crs="EPSG:32616")
    pyogrio.write_dataframe(gdf, path, layer="mains", driver="GPKG", use_arrow=True)
    starts = shapely.get_point(lines, 0)
    k = max(1, m // 2500)
    pick = rng.choice(m, k, replace=False)
    src = gpd.GeoDataFrame({"SRC_ID": [f"S{i}" for i in range(k)],
                            "HGL_M": np.full(k, 100.0 + 0.002 * 1e4 + 55.0)},
                           geometry=starts[pick], crs="EPSG:32616")
    pyogrio.write_dataframe(src, path, layer="sources", driver="GPKG")
    nm = m // 2
    host = rng.integers(0, m, nm)
    pts = shapely.line_interpolate_point(lines[host], rng.random(nm), normalized=True)
    off = rng.normal(0, 8.0, (nm, 2))
    pts = shapely.points(shapely.get_coordinates(pts) + off)
    meters = gpd.GeoDataFrame({"METER": np.arange(nm).astype(str),
                               "GPD": rng.gamma(2.0, 90.0, nm), "CLS": "SFR"},
                              geometry=pts, crs="EPSG:32616")
    pyogrio.write_dataframe(meters, path, layer="meters", driver="GPKG", use_arrow=True)


CONFIG = """
[run]
units = "US"
output = "out.gpkg"
snap_tolerance = "0.5 m"
[inputs]
gis = "{gis}"
[layers.pipes]
input = "gis"
layer = "mains"
id = "MAIN_ID"
fields = {{ diameter = "DIAM_IN", material = "MATL", status = "STATUS" }}
units = {{ diameter = "in" }}
codes.status = {{ ACT = "open" }}
[layers.sources]
input = "gis"
layer = "sources"
id = "SRC_ID"
fields = {{ head = "HGL_M" }}
units = {{ head = "m" }}
[layers.meters]
input = "gis"
layer = "meters"
id = "METER"
fields = {{ consumption = "GPD", category = "CLS" }}
[elevation]
source = "z"
unit = "m"
[roughness]
source = "table"
default = 120.0
[demand]
consumption_unit = "gal/day"
[demand.categories.residential]
codes = ["SFR"]
[fireflow]
enabled = false
[report]
enabled = {report}
"""


def one(n: int, report: bool) -> dict:
    import pyogrio
    from synthetic import numeric_factorization_seconds

    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.hydraulics import HydraulicSystem
    from gridflow.jobs.run import run_job
    from gridflow.topology import build_network

    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        gis = d / "utility.gpkg"
        write_utility(gis, n)
        cfg_path = d / "utility.toml"
        cfg_path.write_text(CONFIG.format(gis=gis.as_posix(), report=str(report).lower()))
        out = d / "out.gpkg"
        t0 = time.perf_counter()
        run_job(cfg_path, out=out)
        total = time.perf_counter() - t0
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        info = dict(pyogrio.read_dataframe(out, layer="run_info")[["key", "value"]].values)
        # floors, same process
        t0 = time.perf_counter()
        pyogrio.read_dataframe(gis, layer="mains", use_arrow=True)
        pyogrio.read_dataframe(gis, layer="meters", use_arrow=True)
        bare_read = time.perf_counter() - t0
        layers = {name: pyogrio.read_dataframe(out, layer=name, use_arrow=True)
                  for name, _ in pyogrio.list_layers(out)
                  if name.startswith(("nodes_", "pipes_"))}
        t0 = time.perf_counter()
        again = d / "again.gpkg"
        for name, df in layers.items():
            pyogrio.write_dataframe(df, again, layer=name, driver="GPKG", use_arrow=True)
        bare_write = time.perf_counter() - t0
        cfg = load_config(cfg_path)
        clean = build_network(cfg, Findings())
        system = HydraulicSystem(clean.network)
        net = clean.network
        fact = numeric_factorization_seconds(system)
        iters = sum(int(v) for k, v in info.items() if k.startswith("iterations_"))
        solver_floor = iters * fact
        floor = bare_read + bare_write + solver_floor
        return {"mains": n, "links": net.n_links, "nodes": net.n_nodes, "total_s": total,
                "read_clean_s": float(info.get("seconds_read_clean", "nan")),
                "demand_s": float(info.get("seconds_demand", "nan")),
                "scenario_s": sum(float(v) for k, v in info.items()
                                  if k.endswith(":seconds") and not k.startswith("fireflow")),
                "iterations": iters, "bare_read_s": bare_read, "bare_write_s": bare_write,
                "solver_floor_s": solver_floor, "ratio": total / floor, "peak_mb": rss}


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    report = "--report" in sys.argv
    if "--one" in sys.argv:
        print(json.dumps(one(int(args[0]), report)))
        return
    sizes = [int(a) for a in args] or [100_000, 500_000]
    print(f"{'mains':>7} {'nodes':>7} {'total s':>8} {'read+clean':>10} {'demand':>7} "
          f"{'solve x3':>8} {'iter':>5} | {'read':>6} {'write':>6} {'solver':>6} {'ratio':>6} "
          f"{'peak MB':>8}")
    for n in sizes:
        cmd = [sys.executable, __file__, str(n), "--one"] + (["--report"] if report else [])
        out = subprocess.run(cmd, capture_output=True, text=True)
        if out.returncode:
            print(out.stderr[-2000:])
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{r['mains']:>7} {r['nodes']:>7} {r['total_s']:>8.2f} {r['read_clean_s']:>10.2f} "
              f"{r['demand_s']:>7.2f} {r['scenario_s']:>8.2f} {r['iterations']:>5} | "
              f"{r['bare_read_s']:>6.2f} {r['bare_write_s']:>6.2f} {r['solver_floor_s']:>6.2f} "
              f"{r['ratio']:>6.2f} {r['peak_mb']:>8.0f}", flush=True)


if __name__ == "__main__":
    main()
