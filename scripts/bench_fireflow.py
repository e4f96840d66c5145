"""Benchmark the fire-flow sweep on synthetic street-grid networks.

For each size: hydrants per second per core (serial run), the mean cost of a hydrant in numeric
factorizations of the same matrix (time per hydrant / time of one numeric factorization of the
network's head matrix, measured in the same run), factorizations and Newton iterations per
hydrant, and the speed-ups with 2 local worker processes and with a Dask ``LocalCluster`` of 2
single-threaded worker processes on loopback (cluster start-up not timed; connecting, the
scatter of the problem and all tasks are). Targets: <= 1 factorization-equivalent per hydrant;
>= 1.8x with 2 workers, local processes and Dask alike. Hydrant nodes are picked at random
(fixed seed). Hydrants carry the default hydrant path (lateral and hydrant loss).

Usage: python scripts/bench_fireflow.py [--sizes 10000:1000,100000:10000] [--sample N]
``--sample N`` times only the first N hydrants of each size (the full 100k sweep takes long on
a 2-core machine); the figures are per hydrant either way.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np
import pandas as pd
from synthetic import grid_network

from gridflow.analysis.fireflow import FireflowProblem, sweep
from gridflow.config.fireflow import FireflowSection
from gridflow.config.sections import CriteriaSection
from gridflow.hydraulics import HydraulicSystem, SolveOptions


def factor_floor(net, base, opts) -> float:
    """Median time of one numeric factorization of the base head matrix."""
    system = HydraulicSystem(net, opts)
    pat = system.pattern
    _, g = system.link_headloss(base.flow_m3s)
    w = 1.0 / g
    data = np.zeros(pat.nnz)
    free = ~net.is_fixed
    off = np.where(free[net.from_idx] & free[net.to_idx], -w, 0.0)
    data = np.bincount(pat.off_pos, weights=off, minlength=pat.nnz)
    diag = (np.bincount(net.from_idx, w * free[net.from_idx], net.n_nodes)
            + np.bincount(net.to_idx, w * free[net.to_idx], net.n_nodes))
    data[pat.diag_pos] = np.where(free, diag, 1.0)
    times = []
    for _ in range(7):
        t0 = time.perf_counter()
        pat.factor(data)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def one(n_pipes: int, n_hydrants: int, sample: int | None) -> dict:
    # one source per 2,500 pipes and a tenth of the generator's demand, so that the base
    # pressures are those of a working system (about 25-85 m) rather than a failing one
    net, _ = grid_network(n_pipes, n_sources=max(4, n_pipes // 2500))
    net = net.replace(demand_m3s=net.demand_m3s * 0.1)
    opts = SolveOptions()
    base = HydraulicSystem(net, opts).solve()
    rng = np.random.default_rng(7)
    junctions = np.flatnonzero(~net.is_fixed)
    nodes = rng.choice(junctions, min(n_hydrants, len(junctions)), replace=False)
    if sample:
        nodes = nodes[:sample]
    hyd = pd.DataFrame({"hydrant_id": [f"H{i}" for i in range(len(nodes))], "node_idx": nodes,
                        "zone": "", "required_fire_flow_m3s": np.nan, "land_use": None,
                        "lateral_length_m": np.nan, "lateral_diameter_m": np.nan})
    fire = FireflowSection()
    crit = CriteriaSection()
    prob = FireflowProblem.build(net, base, hyd, fire, crit, options=opts)
    t_fact = factor_floor(prob.net, prob.warm, prob.options)
    t0 = time.perf_counter()
    serial = sweep(net, base, hyd, fire, crit, options=opts, workers=1)
    t1 = time.perf_counter() - t0
    t0 = time.perf_counter()
    two = sweep(net, base, hyd, fire, crit, options=opts, workers=2)
    t2 = time.perf_counter() - t0
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        t0 = time.perf_counter()
        dask = sweep(net, base, hyd, fire, crit, options=opts,
                     scheduler=cluster.scheduler_address)
        td = time.perf_counter() - t0
    same = serial.equals(two) and serial.equals(dask)
    n = len(hyd)
    s = serial.attrs["summary"]
    return {"pipes": net.n_links, "hydrants": n, "serial_s": t1, "two_s": t2,
            "per_core": n / t1, "factor_ms": t_fact * 1e3,
            "cost_in_factorizations": t1 / n / t_fact,
            "factorizations_per_hydrant": s["factorizations"] / n,
            "iterations_per_hydrant": s["iterations"] / n, "speedup_2": t1 / t2,
            "dask_s": td, "speedup_dask": t1 / td, "batches_2": two.attrs["summary"]["batches"],
            "batches_dask": dask.attrs["summary"]["batches"],
            "identical": same, "fallback": s["fallback"],
            "limited_by_node": s["limited_by_node_pressure"],
            "limits": serial["limited_by"].value_counts().to_dict()}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="10000:1000,100000:10000")
    ap.add_argument("--sample", type=int, default=None)
    a = ap.parse_args()
    print(f"{'pipes':>7} {'hydr':>5} {'serial s':>8} {'2-wkr s':>8} {'dask s':>7} "
          f"{'hyd/s/core':>10} {'factor ms':>9} {'fact-eq/hyd':>11} {'facts/hyd':>9} "
          f"{'iter/hyd':>8} {'x2':>5} {'x2 dask':>7} {'same':>5} {'node-lim':>8}")
    for item in a.sizes.split(","):
        p, h = (int(v) for v in item.split(":"))
        d = one(p, h, a.sample)
        print(f"{d['pipes']:>7} {d['hydrants']:>5} {d['serial_s']:>8.2f} {d['two_s']:>8.2f} "
              f"{d['dask_s']:>7.2f} {d['per_core']:>10.1f} {d['factor_ms']:>9.3f} "
              f"{d['cost_in_factorizations']:>11.1f} {d['factorizations_per_hydrant']:>9.2f} "
              f"{d['iterations_per_hydrant']:>8.2f} {d['speedup_2']:>5.2f} "
              f"{d['speedup_dask']:>7.2f} {d['identical']!s:>5} {d['limited_by_node']:>8}",
              flush=True)
        print(f"        limits: {d['limits']}; hydrants on the full-solve route: "
              f"{d['fallback']}; batches: {d['batches_2']} (2 processes), {d['batches_dask']} "
              "(Dask)", flush=True)


if __name__ == "__main__":
    main()
