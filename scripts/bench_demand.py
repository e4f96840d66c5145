"""Benchmark: allocate meters to mains, against a bare STRtree nearest query.

Builds a synthetic grid of mains (100 m blocks, fictional town of Millbrook scaled up) and
random meters over it, then times :func:`gridflow.demand.allocate` and, in the same run, the
floor: an STRtree built over the same mains and one ``query_nearest`` of the same points with
the same search distance. Prints both times and their ratio (target <= 2).

    PYTHONPATH=. python scripts/bench_demand.py                # 1M meters, 500k mains
    PYTHONPATH=. python scripts/bench_demand.py --meters 100000 --mains 50000
"""

from __future__ import annotations

import argparse
import time
from dataclasses import dataclass
from typing import Any

import geopandas as gpd
import numpy as np
import shapely

from gridflow.config import parse_config
from gridflow.demand import allocate
from gridflow.findings import Findings
from gridflow.network.model import Network

CRS = "EPSG:32616"
BLOCK_M = 100.0


@dataclass
class Clean:
    network: Network
    nodes: gpd.GeoDataFrame
    links: gpd.GeoDataFrame
    meters: gpd.GeoDataFrame
    hydrants: Any = None
    crs: Any = CRS


def build(n_mains: int, n_meters: int, seed: int = 1) -> Clean:
    side = int(np.ceil(np.sqrt(n_mains / 2.0))) + 1  # side x side nodes, ~2 side^2 mains
    ix, iy = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    ix, iy = ix.ravel(), iy.ravel()
    node = ix * side + iy
    right = ix < side - 1
    up = iy < side - 1
    f = np.concatenate([node[right], node[up]])
    t = np.concatenate([node[right] + side, node[up] + 1])
    f, t = f[:n_mains], t[:n_mains]
    xy = np.column_stack([ix, iy]).astype(float) * BLOCK_M
    lines = shapely.linestrings(np.stack([xy[f], xy[t]], axis=1))
    nn, nl = len(xy), len(f)
    net = Network.from_arrays(
        node_id=np.char.add("N", node.astype(str)),
        link_id=np.char.add("P", np.arange(nl).astype(str)),
        from_idx=f, to_idx=t, length_m=np.full(nl, BLOCK_M), diameter_m=np.full(nl, 0.2),
        roughness=np.full(nl, 130.0), zone=np.full(nn, "z1"))
    nodes = gpd.GeoDataFrame({"node_id": net.node_id}, geometry=shapely.points(xy), crs=CRS)
    links = gpd.GeoDataFrame({"pipe_id": net.link_id, "kind": "pipe"}, geometry=lines, crs=CRS)
    rng = np.random.default_rng(seed)
    extent = (side - 1) * BLOCK_M
    pts = shapely.points(rng.uniform(0, extent, (n_meters, 2)))
    codes = np.array(["RES", "COM", "IND", "INST", "R2"], dtype=object)
    meters = gpd.GeoDataFrame(
        {"meter_id": np.char.add("M", np.arange(n_meters).astype(str)).astype(object),
         "consumption": rng.uniform(0, 600, n_meters),
         "category": codes[rng.integers(0, len(codes), n_meters)]},
        geometry=pts, crs=CRS)
    return Clean(network=net, nodes=nodes, links=links, meters=meters)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--meters", type=int, default=1_000_000)
    ap.add_argument("--mains", type=int, default=500_000)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()

    t0 = time.perf_counter()
    clean = build(args.mains, args.meters)
    print(f"built {len(clean.links):,} mains, {len(clean.meters):,} meters in "
          f"{time.perf_counter() - t0:.1f} s")
    cfg = parse_config({
        "inputs": {"gis": "millbrook.gpkg"},
        "layers": {"pipes": {"input": "gis", "layer": "mains", "id": "ID",
                             "fields": {"diameter": "D"}}},
        "demand": {"search_distance": "150 m", "consumption_unit": "gal/day",
                   "categories": {"residential": {"codes": ["RES", "R2"]},
                                  "commercial": {"codes": ["COM"]},
                                  "industrial": {"codes": ["IND"]},
                                  "institutional": {"codes": ["INST"]}}},
    })
    lines = np.asarray(clean.links.geometry.array)
    pts = np.asarray(clean.meters.geometry.array)

    floor, query_only, alloc_t = [], [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        tree = shapely.STRtree(lines)
        t1 = time.perf_counter()
        tree.query_nearest(pts, max_distance=150.0, return_distance=True, all_matches=False)
        t2 = time.perf_counter()
        floor.append(t2 - t0)
        query_only.append(t2 - t1)

        findings = Findings()
        t0 = time.perf_counter()
        alloc = allocate(cfg, clean, findings)
        alloc_t.append(time.perf_counter() - t0)

    a, fl, q = min(alloc_t), min(floor), min(query_only)
    print(f"allocated {alloc.counts['allocated']:,} of {alloc.counts['meters']:,} meters, "
          f"{len(findings)} findings, total {alloc.node_demand_m3s.sum() * 1000:.1f} L/s")
    print(f"allocate:                     {a:7.2f} s (best of {args.repeat})")
    print(f"floor, STRtree build + query: {fl:7.2f} s")
    print(f"  of which query_nearest:     {q:7.2f} s")
    print(f"ratio allocate / floor:       {a / fl:7.2f}  (target <= 2)")
    print(f"ratio allocate / query only:  {a / q:7.2f}")


if __name__ == "__main__":
    main()
