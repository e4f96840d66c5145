"""Benchmark: allocate the synthetic utility's meters to its mains, against a bare STRtree
nearest query.

The utility of ``synthetic_utility.py`` (two meters per main, 15 m off it), read and cleaned
once. Times :func:`gridflow.demand.allocate` (best of ``--repeat``) and, in the same run, the
floor: an STRtree built over the network's links and one ``query_nearest`` of the meters with
the configured search distance. Prints both and their ratio (target <= 2).

    python scripts/bench_demand.py 100000 500000        # sizes in mains
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import shapely

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))


def main() -> None:
    from utility_network import utility_network

    from gridflow.demand import allocate
    from gridflow.findings import Findings

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("sizes", nargs="*", type=int, default=[500_000])
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    print(f"{'mains':>8} {'meters':>8} {'links':>8} {'allocate s':>10} {'floor s':>8} "
          f"{'query s':>8} {'ratio':>6} {'allocated':>9}")
    for n in args.sizes:
        _, clean, cfg = utility_network(n)
        lines = np.asarray(clean.links.geometry.array)
        pts = np.asarray(clean.meters.geometry.array)
        sd = cfg.demand.search_distance if cfg.demand.search_distance > 0 else None
        floor, query_only, alloc_t = [], [], []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            tree = shapely.STRtree(lines)
            t1 = time.perf_counter()
            tree.query_nearest(pts, max_distance=sd, return_distance=True, all_matches=False)
            t2 = time.perf_counter()
            floor.append(t2 - t0)
            query_only.append(t2 - t1)
            t0 = time.perf_counter()
            alloc = allocate(cfg, clean, Findings())
            alloc_t.append(time.perf_counter() - t0)
        a, fl, q = min(alloc_t), min(floor), min(query_only)
        print(f"{n:>8} {len(pts):>8} {len(lines):>8} {a:>10.2f} {fl:>8.2f} {q:>8.2f} "
              f"{a / fl:>6.2f} {alloc.counts['allocated']:>9}", flush=True)


if __name__ == "__main__":
    main()
