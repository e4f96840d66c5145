"""Benchmark: read + clean the synthetic utility against a bare read of the same layers.

The utility of ``synthetic_utility.py`` (street grid with loops and arterials, cul-de-sacs, Z
ground, valves, hydrants, two meters per main, sources) is written to a GeoPackage once per
size; a fresh process then measures, in the same run:

- the floor: a bare ``pyogrio.read_dataframe(use_arrow=True)`` of every mapped layer (median
  of ``--repeat``);
- ``read_inputs`` (the mapped layers read, checked, renamed, converted) and
  ``build_network`` on what it read (the topology stages), with the findings log a run keeps
  (routine facts counted, not listed); ``--full-log`` keeps every routine row, as
  ``gridflow check`` does;
- their ratio to the floor, and peak memory (ru_maxrss);
- the wall time of each topology stage (``build_network(timings=...)``), and the machine's
  1-minute load average when the run ended (the machine is shared: compare ratios).

    python scripts/bench_gis.py 100000 500000

Target: read + clean <= 3x the bare read.
"""

from __future__ import annotations

import argparse
import json
import os
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

LAYERS = ("mains", "valves", "hydrants", "meters", "sources")


def bare_read(gis: Path) -> float:
    import pyogrio

    t0 = time.perf_counter()
    for layer in LAYERS:
        pyogrio.read_dataframe(gis, layer=layer, use_arrow=True)
    return time.perf_counter() - t0


def one(gis: Path, repeat: int, full_log: bool = False) -> dict:
    from synthetic_utility import config_text

    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.io.read import read_inputs
    from gridflow.topology import build_network

    cfg_path = gis.with_suffix(".toml")
    cfg_path.write_text(config_text(gis, fireflow=False, report=False))
    cfg = load_config(cfg_path)
    bare = float(np.median([bare_read(gis) for _ in range(repeat)]))
    f = Findings(keep_routine=full_log)
    stages: dict[str, float] = {}
    t0 = time.perf_counter()
    rr = read_inputs(cfg, f)
    t1 = time.perf_counter()
    clean = build_network(cfg, f, read=rr, timings=stages)
    t2 = time.perf_counter()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"links": clean.network.n_links, "nodes": clean.network.n_nodes, "bare_s": bare,
            "read_s": t1 - t0, "clean_s": t2 - t1, "findings": len(f), "peak_mb": rss,
            "stages": stages, "load": os.getloadavg()[0],
            "log": "full" if full_log else "run"}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("sizes", nargs="*", type=int, default=[100_000])
    ap.add_argument("--repeat", type=int, default=3, help="bare reads (median)")
    ap.add_argument("--one", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--full-log", action="store_true",
                    help="keep every routine finding row (as gridflow check does)")
    args = ap.parse_args()
    if args.one:
        print(json.dumps(one(args.one, args.repeat, args.full_log)))
        return
    from synthetic_utility import write_utility

    print(f"{'mains':>8} {'nodes':>8} {'links':>8} {'bare read s':>11} {'read s':>7} "
          f"{'clean s':>8} {'read+clean':>10} {'ratio':>6} {'findings':>9} {'peak MB':>8} "
          f"{'load':>5}")
    for n in args.sizes:
        with tempfile.TemporaryDirectory() as d:
            gis = Path(d) / "utility.gpkg"
            write_utility(gis, n)
            out = subprocess.run([sys.executable, __file__, "--one", str(gis), "--repeat",
                                  str(args.repeat)] + (["--full-log"] if args.full_log else []),
                                 capture_output=True, text=True)
            if out.returncode:
                print(out.stderr[-2000:])
                continue
            r = json.loads(out.stdout.strip().splitlines()[-1])
            rc = r["read_s"] + r["clean_s"]
            print(f"{n:>8} {r['nodes']:>8} {r['links']:>8} {r['bare_s']:>11.2f} "
                  f"{r['read_s']:>7.2f} {r['clean_s']:>8.2f} {rc:>10.2f} "
                  f"{rc / r['bare_s']:>6.2f} {r['findings']:>9} {r['peak_mb']:>8.0f} "
                  f"{r['load']:>5.2f}", flush=True)
            print("          stages s: " + "  ".join(f"{k} {v:.2f}"
                                                    for k, v in r["stages"].items()),
                  flush=True)


if __name__ == "__main__":
    main()
