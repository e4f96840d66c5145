"""Benchmark the fire-flow sweep on the synthetic utility (``synthetic_utility.py``).

Each size is written as a GeoPackage by ``synthetic_utility.write_utility``, read and cleaned
once by gridflow's own topology (``gridflow.topology.build_network``, the hydrants attached
as a run attaches them: about one every 150 m of main), its meters' demand allocated and the
fire-flow scenario's demand applied (``gridflow.demand``, as a run does), solved, and swept.

Per size: the mean cost of a hydrant in numeric factorizations of the same matrix (time per
hydrant / time of one numeric factorization of the full system with the hydrants' outlets,
measured in the same run), factorizations of the full system and of the reduced network's
core (and its size) and Newton steps per hydrant, hydrants on the
full-Newton fallback, hydrants per second per core (serial), the speed-ups with 2 local worker
processes and with a Dask ``LocalCluster`` of 2 single-threaded workers on loopback (cluster
start-up not timed; its workers warmed by a first small sweep, as a standing cluster's are),
each backend's fixed set-up (a sweep of 4 hydrants less their compute) and the speed-ups
without it, and the full sweep's time projected: on one core from the serial rate,
on two workers as the set-up plus every hydrant at the sample's 2-worker rate. Targets: <= 1
factorization-equivalent per hydrant; a full 100k sweep in under 1 h on 2 workers; >= 1.8x with
2 workers. The machine's load average is printed beside
the figures (ratios are within one run).

Usage: python scripts/bench_fireflow.py [--sizes 10000,100000] [--sample N] [--no-parallel]
[--zones]
``--sample N`` times N hydrants of each size chosen at random (seeded); the figures are per
hydrant either way. ``--zones``: the utility with pressure zones (low districts below reducing
valves, ``synthetic_utility.py``), where a draw may open or shut a valve.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np
import pandas as pd
from synthetic import numeric_factorization_seconds
from synthetic_utility import config_text, write_utility

from gridflow.analysis.fireflow import FireflowProblem, sweep
from gridflow.config import load_config
from gridflow.demand import allocate
from gridflow.demand.scenarios import scenario_network
from gridflow.findings import Findings
from gridflow.hydraulics import HydraulicSystem, SolveOptions
from gridflow.topology import build_network


def network(n_mains: int, d: Path, zones: bool = False):
    """The synthetic utility read and cleaned by gridflow; (network, hydrant table, config)."""
    gis = d / f"utility_{n_mains}.gpkg"
    write_utility(gis, n_mains, zones=zones)
    cfg_path = d / f"utility_{n_mains}.toml"
    cfg_path.write_text(config_text(gis, fireflow=True, report=False, zones=zones))
    cfg = load_config(cfg_path)
    findings = Findings()
    clean = build_network(cfg, findings)
    # the base state a run sweeps from: the fire-flow scenario's demand on the meters
    alloc = allocate(cfg, clean, findings)
    net = scenario_network(cfg, clean, alloc, cfg.fireflow.scenario)
    hyd = pd.DataFrame(clean.hydrants.drop(columns="geometry"))
    return net, hyd, cfg


def one(n_mains: int, sample: int | None, parallel: bool, d: Path, zones: bool = False
        ) -> dict:
    t0 = time.perf_counter()
    net, hyd, cfg = network(n_mains, d, zones)
    t_build = time.perf_counter() - t0
    opts = SolveOptions()
    base = HydraulicSystem(net, opts).solve()
    n_all = len(hyd)
    if sample and sample < n_all:
        rows = np.sort(np.random.default_rng(7).choice(n_all, sample, replace=False))
        hyd = hyd.iloc[rows].reset_index(drop=True)
    fire, crit = cfg.fireflow, cfg.criteria
    prob = FireflowProblem.build(net, base, hyd, fire, crit, options=opts)
    t_fact = numeric_factorization_seconds(HydraulicSystem(prob.net, prob.options), repeat=7)
    ds = prob.draw_solver()
    core_nodes = ds.K if ds.usable else 0
    load0 = os.getloadavg()[0]
    t0 = time.perf_counter()
    serial = sweep(net, base, hyd, fire, crit, options=opts, workers=1)
    t1 = time.perf_counter() - t0
    n = len(hyd)
    s = serial.attrs["summary"]
    d_out = {"mains": n_mains, "links": net.n_links, "nodes": net.n_nodes,
             "hydrants_all": n_all, "hydrants": n, "build_s": t_build, "serial_s": t1,
             "per_core": n / t1, "factor_ms": t_fact * 1e3,
             "fact_eq": t1 / n / t_fact, "facts": s["factorizations"] / n,
             "core_facts": s["core_factorizations"] / n, "core_nodes": core_nodes,
             "iters": s["iterations"] / n, "fallback": s["fallback"],
             "variant": s.get("status_variant", 0),
             "failed": s.get("limited_by_not_converged", 0),
             "full_1core_h": n_all * t1 / n / 3600.0, "load": load0,
             "two_s": np.nan, "dask_s": np.nan, "x2": np.nan, "xdask": np.nan, "same": None,
             "limits": serial["limited_by"].value_counts().to_dict()}
    if parallel:
        # fixed set-up of each backend (sending the problem, starting workers, each worker's
        # reduction): a sweep of 4 hydrants, less their serial compute shared by 2 workers.
        # A new Dask cluster's workers import gridflow on their first task, once in their
        # life: that sweep warms them, and a second one measures the set-up a sweep pays
        few = hyd.iloc[:4].reset_index(drop=True)
        per = t1 / n

        def timed(warm: bool = False, **kw) -> tuple[float, pd.DataFrame, float]:
            for _ in range(2 if warm else 1):
                t0 = time.perf_counter()
                sweep(net, base, few, fire, crit, options=opts, **kw)
                setup = max(time.perf_counter() - t0 - len(few) * per / 2.0, 0.0)
            t0 = time.perf_counter()
            out = sweep(net, base, hyd, fire, crit, options=opts, **kw)
            return time.perf_counter() - t0, out, setup

        t2, two, s2 = timed(workers=2)
        from distributed import LocalCluster

        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=None) as cluster:
            td, dask, sd = timed(warm=True, scheduler=cluster.scheduler_address)
        d_out.update(two_s=t2, dask_s=td, x2=t1 / t2, xdask=t1 / td,
                     setup2=s2, setupd=sd, x2_run=t1 / max(t2 - s2, 1e-9),
                     xdask_run=t1 / max(td - sd, 1e-9),
                     same=bool(serial.equals(two) and serial.equals(dask)))
    x2 = d_out["x2"] if np.isfinite(d_out["x2"]) else 1.8
    d_out["full_2w_h"] = d_out["full_1core_h"] / x2
    if "x2_run" in d_out:
        # a whole sweep: the set-up once, then the sample's rate on 2 workers
        d_out["full_2w_h"] = (d_out["setup2"] + n_all * t1 / n / d_out["x2_run"]) / 3600.0
        d_out["full_dask_h"] = (d_out["setupd"] + n_all * t1 / n / d_out["xdask_run"]) / 3600.0
    d_out["load_end"] = os.getloadavg()[0]
    return d_out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="10000,100000")
    ap.add_argument("--sample", type=int, default=None)
    ap.add_argument("--no-parallel", action="store_true")
    ap.add_argument("--zones", action="store_true",
                    help="the synthetic utility with pressure zones (reducing valves)")
    a = ap.parse_args()
    print(f"{'mains':>7} {'links':>7} {'hydr':>6} {'timed':>5} {'serial s':>8} "
          f"{'hyd/s/core':>10} {'factor ms':>9} {'fact-eq/hyd':>11} {'facts/hyd':>9} "
          f"{'core f/hyd':>10} {'core nodes':>10} "
          f"{'iter/hyd':>8} {'fallbk':>6} {'x2':>5} {'x2 dask':>7} {'full 2w h':>9} "
          f"{'load':>9}", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        for item in a.sizes.split(","):
            d = one(int(item), a.sample, not a.no_parallel, Path(tmp), a.zones)
            print(f"{d['mains']:>7} {d['links']:>7} {d['hydrants_all']:>6} {d['hydrants']:>5} "
                  f"{d['serial_s']:>8.2f} {d['per_core']:>10.2f} {d['factor_ms']:>9.2f} "
                  f"{d['fact_eq']:>11.2f} {d['facts']:>9.2f} {d['core_facts']:>10.2f} "
                  f"{d['core_nodes']:>10} {d['iters']:>8.2f} "
                  f"{d['fallback']:>6} {d['x2']:>5.2f} {d['xdask']:>7.2f} "
                  f"{d['full_2w_h']:>9.2f} {d['load']:>4.1f}-{d['load_end']:<4.1f}", flush=True)
            if "x2_run" in d:
                print(f"        fixed set-up: 2 processes {d['setup2']:.1f} s, Dask "
                      f"{d['setupd']:.1f} s; without it: x2 {d['x2_run']:.2f}, Dask "
                      f"{d['xdask_run']:.2f}; full sweep on 2 workers: processes "
                      f"{d['full_2w_h']:.2f} h, Dask {d['full_dask_h']:.2f} h", flush=True)
            print(f"        limits: {d['limits']}; failed: {d['failed']}; on a status variant: "
                  f"{d['variant']}; serial, 2 processes "
                  f"and Dask identical: {d['same']}; full sweep on 1 core "
                  f"{d['full_1core_h']:.2f} h (x2 assumed 1.8 where not measured)",
                  flush=True)


if __name__ == "__main__":
    main()
