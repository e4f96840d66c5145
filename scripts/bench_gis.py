"""Benchmark: read + clean synthetic street-grid mains against a bare pyogrio read.

Mains along a jittered 100 m street grid with a quarter of the edges removed and ends
jittered 0.02 m, with ground elevation as Z, written to a GeoPackage. Prints the time of
read + clean, the time of a bare
``pyogrio.read_dataframe(use_arrow=True)`` of the same layer in the same run, their ratio, and
peak memory (ru_maxrss, and tracemalloc of the clean step when --trace is given).

    python scripts/bench_gis.py 100000 500000

Targets: read + clean <= 3x the bare read; 500k mains under 60 s and 4 GB.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np


def make_grid(n_lines: int, seed: int = 1):
    import shapely

    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(n_lines / 1.5))) + 1  # 2 side^2 edges, 3/4 kept
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    px = ii * 100.0 + rng.normal(0, 5, ii.size)  # jittered street grid
    py = jj * 100.0 + rng.normal(0, 5, jj.size)
    node = lambda i, j: i * side + j  # noqa: E731
    h = (ii < side - 1)
    v = (jj < side - 1)
    a = np.r_[node(ii[h], jj[h]), node(ii[v], jj[v])]
    b = np.r_[node(ii[h] + 1, jj[h]), node(ii[v], jj[v] + 1)]
    keep = rng.random(a.size) >= 0.25
    a, b = a[keep][:n_lines], b[keep][:n_lines]
    m = len(a)
    start = np.column_stack([px[a], py[a]]) + rng.uniform(-0.02, 0.02, (m, 2))
    end = np.column_stack([px[b], py[b]]) + rng.uniform(-0.02, 0.02, (m, 2))
    mid = (start + end) / 2 + rng.normal(0, 1, (m, 2))
    coords = np.stack([start, mid, end], axis=1).reshape(-1, 2) + [500000.0, 4600000.0]
    lines = shapely.linestrings(coords, indices=np.repeat(np.arange(m), 3))
    return lines


def write_gis(path: Path, lines) -> None:
    import geopandas as gpd
    import pyogrio
    import shapely

    n = len(lines)
    # ground elevation as the lines' Z, as a utility's export carries it
    xy = shapely.get_coordinates(lines)
    z = 100.0 + 0.002 * (xy[:, 0] - xy[:, 0].min())
    lines = shapely.linestrings(np.column_stack([xy, z]), indices=np.repeat(np.arange(n), 3))
    gdf = gpd.GeoDataFrame({"MAIN_ID": np.char.add("M", np.arange(n).astype(str)),
                            "DIAM_IN": np.full(n, 8.0), "MATL": "DI", "STATUS": "ACT"},
                           geometry=lines, crs="EPSG:32616")
    pyogrio.write_dataframe(gdf, path, layer="mains", driver="GPKG", use_arrow=True)
    src = gpd.GeoDataFrame({"SRC_ID": ["S1"], "HGL_FT": [900.0]},
                           geometry=gpd.points_from_xy([lines[0].coords[0][0]],
                                                       [lines[0].coords[0][1]]),
                           crs="EPSG:32616")
    pyogrio.write_dataframe(src, path, layer="sources", driver="GPKG")


def config(path: Path):
    from gridflow.config import parse_config

    return parse_config({
        "run": {"snap_tolerance": "0.5 m"},
        "elevation": {"source": "z", "unit": "m"},
        "inputs": {"gis": str(path)},
        "layers": {
            "pipes": {"input": "gis", "layer": "mains", "id": "MAIN_ID",
                      "fields": {"diameter": "DIAM_IN", "material": "MATL",
                                 "status": "STATUS"},
                      "units": {"diameter": "in"},
                      "codes": {"status": {"ACT": "open"}}},
            "sources": {"input": "gis", "layer": "sources", "id": "SRC_ID",
                        "fields": {"head": "HGL_FT"}, "units": {"head": "ft"}},
        }}, base_dir=path.parent)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("sizes", nargs="*", type=int, default=[100_000])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--trace", action="store_true", help="tracemalloc peak of read + clean")
    args = ap.parse_args()
    import pyogrio

    from gridflow.findings import Findings
    from gridflow.topology import build_network

    print(f"{'lines':>8} {'bare read s':>12} {'read+clean s':>13} {'ratio':>6} "
          f"{'nodes':>8} {'findings':>9} {'maxrss MB':>10} {'traced MB':>10}")
    with tempfile.TemporaryDirectory() as d:
        for n in args.sizes:
            path = Path(d) / f"grid_{n}.gpkg"
            write_gis(path, make_grid(n))
            cfg = config(path)
            bare, full = [], []
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                pyogrio.read_dataframe(path, layer="mains", use_arrow=True)
                bare.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                f = Findings()
                cn = build_network(cfg, f)
                full.append(time.perf_counter() - t0)
            traced = float("nan")
            if args.trace:
                import tracemalloc

                tracemalloc.start()
                build_network(cfg, Findings())
                traced = tracemalloc.get_traced_memory()[1] / 2**20
                tracemalloc.stop()
            rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
            b, c = float(np.median(bare)), float(np.median(full))
            print(f"{cn.network.n_links:>8} {b:>12.2f} {c:>13.2f} {c / b:>6.2f} "
                  f"{cn.network.n_nodes:>8} {len(f):>9} {rss:>10.0f} {traced:>10.0f}",
                  flush=True)


if __name__ == "__main__":
    main()
