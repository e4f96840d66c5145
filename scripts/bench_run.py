"""Benchmark the default nightly run end to end on the synthetic utility.

The utility of ``synthetic_utility.py`` is written to a GeoPackage once per size; a fresh
process runs ``run_job`` on it with the default config (report on, segments with their
defaults, the three default scenarios; fire flow off: ``bench_fireflow.py`` measures it).
Printed per size: each stage's time (read + clean, demand, scenarios and segments from the
``run_info`` layer; the GeoPackage write and the report from the run's log records), the
whole run, and its ratio to a floor measured in the same process:

    floor = bare read (pyogrio + Arrow, every mapped layer)
          + bare write (the run's own output layers written again with pyogrio + Arrow)
          + solver floor (iterations x one numeric factorization of the network matrix)

and peak memory (ru_maxrss of the run's process, taken before the floor is measured).

    python scripts/bench_run.py 100000 500000 1000000

Targets: run <= 1.5x the floor; 1M mains under 5 min and 8 GB.
"""

from __future__ import annotations

import json
import logging
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

LAYERS = ("mains", "valves", "hydrants", "meters", "sources")


class _Stamps(logging.Handler):
    """Times of the run's 'wrote <file>' log records."""

    def __init__(self) -> None:
        super().__init__(logging.INFO)
        self.t: dict[str, float] = {}

    def emit(self, record: logging.LogRecord) -> None:
        msg = record.getMessage()
        if msg.startswith("wrote ") and msg.endswith(".gpkg"):
            self.t["gpkg"] = time.perf_counter()
        elif msg.startswith("wrote ") and msg.endswith(".html"):
            self.t["html"] = time.perf_counter()


def one(gis: Path) -> dict:
    import pyogrio
    from synthetic import numeric_factorization_seconds
    from synthetic_utility import config_text

    from gridflow.config import load_config
    from gridflow.findings import Findings
    from gridflow.hydraulics import HydraulicSystem
    from gridflow.jobs.run import run_job
    from gridflow.topology import build_network

    d = gis.parent
    cfg_path = d / "utility.toml"
    out = d / "out.gpkg"
    cfg_path.write_text(config_text(gis, fireflow=False, report=True, output=out.as_posix()))
    stamps = _Stamps()
    logging.getLogger("gridflow").addHandler(stamps)
    logging.getLogger("gridflow").setLevel(logging.INFO)
    t0 = time.perf_counter()
    run_job(cfg_path, out=out)
    total = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    info = dict(pyogrio.read_dataframe(out, layer="run_info")[["key", "value"]].values)
    run_s = float(info["seconds_total"])  # everything before the write
    stage = {"read_clean": float(info["seconds_read_clean"]),
             "demand": float(info["seconds_demand"]),
             "scenarios": sum(float(v) for k, v in info.items()
                              if k.endswith(":seconds") and k.split(":")[0] not in
                              ("fireflow", "segments", "flow_tests")),
             "segments": float(info.get("seconds_segments", "nan")),
             "write": stamps.t["gpkg"] - t0 - run_s,
             "report": stamps.t.get("html", float("nan")) - stamps.t["gpkg"]}
    stage["other"] = run_s - stage["read_clean"] - stage["demand"] - stage["scenarios"] - \
        (stage["segments"] if stage["segments"] == stage["segments"] else 0.0)
    # floors, same process
    t1 = time.perf_counter()
    for layer in LAYERS:
        pyogrio.read_dataframe(gis, layer=layer, use_arrow=True)
    bare_read = time.perf_counter() - t1
    layers = {name: pyogrio.read_dataframe(out, layer=name, use_arrow=True)
              for name, _ in pyogrio.list_layers(out) if name != "layer_styles"}
    again = d / "again.gpkg"
    t1 = time.perf_counter()
    for name, df in layers.items():
        pyogrio.write_dataframe(df, again, layer=name, driver="GPKG", use_arrow=True)
    bare_write = time.perf_counter() - t1
    del layers
    clean = build_network(load_config(cfg_path), Findings())
    fact = numeric_factorization_seconds(HydraulicSystem(clean.network))
    iters = sum(int(v) for k, v in info.items() if k.startswith("iterations_"))
    floor = bare_read + bare_write + iters * fact
    return {"links": clean.network.n_links, "nodes": clean.network.n_nodes, "total_s": total,
            "stages": stage, "iterations": iters, "factor_s": fact, "bare_read_s": bare_read,
            "bare_write_s": bare_write, "floor_s": floor, "ratio": total / floor,
            "peak_mb": rss}


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    if "--one" in sys.argv:
        print(json.dumps(one(Path(args[0]))))
        return
    from synthetic_utility import write_utility

    sizes = [int(a) for a in args] or [100_000, 500_000]
    print(f"{'mains':>7} {'nodes':>8} {'links':>8} | {'read+cl':>7} {'demand':>6} "
          f"{'solve x3':>8} {'segm':>5} {'other':>5} {'write':>5} {'report':>6} {'total s':>7} |"
          f" {'iter':>4} {'read':>5} {'write':>5} {'solver':>6} {'floor':>6} {'ratio':>5} "
          f"{'peak MB':>7}")
    for n in sizes:
        with tempfile.TemporaryDirectory() as d:
            gis = Path(d) / "utility.gpkg"
            write_utility(gis, n)
            out = subprocess.run([sys.executable, __file__, str(gis), "--one"],
                                 capture_output=True, text=True)
            if out.returncode:
                print(out.stderr[-3000:])
                continue
            r = json.loads(out.stdout.strip().splitlines()[-1])
            s = r["stages"]
            print(f"{n:>7} {r['nodes']:>8} {r['links']:>8} | {s['read_clean']:>7.1f} "
                  f"{s['demand']:>6.1f} {s['scenarios']:>8.1f} {s['segments']:>5.1f} "
                  f"{s['other']:>5.1f} {s['write']:>5.1f} {s['report']:>6.1f} "
                  f"{r['total_s']:>7.1f} | {r['iterations']:>4} {r['bare_read_s']:>5.1f} "
                  f"{r['bare_write_s']:>5.1f} {r['iterations'] * r['factor_s']:>6.2f} "
                  f"{r['floor_s']:>6.1f} {r['ratio']:>5.2f} {r['peak_mb']:>7.0f}", flush=True)


if __name__ == "__main__":
    main()
