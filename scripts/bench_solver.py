"""Benchmark the hydraulic solver on the synthetic utility's network.

The utility of ``synthetic_utility.py`` (street grid with loops, cul-de-sacs, valves, hydrant
and meter nodes, sources), read and cleaned once, its meters allocated (average-day demand).
For each size (mains): iterations, solve time, the time of one numeric factorization of the same
matrix by the same backend (measured in the same run), the ratio
solve / (iterations x factorization), and peak memory (each size runs in its own process).
The first solve includes the one-time ordering and symbolic analysis; the second (a max-day
scenario of the same network, as the nightly run solves it) reuses them: iter2, solve2, ratio2.

Usage: python scripts/bench_solver.py [10000 100000 500000] [--backend qdldl|splu]
(sizes are mains; the network has about 4 links per main after cleaning)
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))


def one(n_mains: int, backend: str) -> dict:
    from synthetic import numeric_factorization_seconds
    from utility_network import utility_network

    from gridflow.hydraulics import HydraulicSystem, SolveOptions

    net, _, _ = utility_network(n_mains)
    opts = SolveOptions(backend=backend)
    t0 = time.perf_counter()
    system = HydraulicSystem(net, opts)
    t_setup = time.perf_counter() - t0
    t0 = time.perf_counter()
    r = system.solve()
    t_solve = time.perf_counter() - t0
    # floor: one numeric factorization of the converged matrix by the same backend
    t_fact = numeric_factorization_seconds(system)
    # a second scenario of the same network (max day) reuses the symbolic analysis
    net2 = net.replace(demand_m3s=net.demand_m3s * 1.8)
    s2 = HydraulicSystem(net2, opts, share=system)
    t0 = time.perf_counter()
    r2 = s2.solve()
    t_solve2 = time.perf_counter() - t0
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"mains": n_mains, "links": net.n_links, "nodes": net.n_nodes, "backend": backend,
            "iterations": r.iterations, "setup_s": round(t_setup, 3),
            "solve_s": round(t_solve, 3), "factor_s": round(t_fact, 4),
            "ratio": round(t_solve / (r.iterations * t_fact), 2),
            "iterations2": r2.iterations, "solve2_s": round(t_solve2, 3),
            "ratio2": round(t_solve2 / (r2.iterations * t_fact), 2),
            "peak_mb": round(peak_mb), "mass_residual": r.mass_residual_m3s,
            "head_residual": r.head_residual_m}


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    backend = "splu" if "--backend=splu" in sys.argv or "splu" in sys.argv else "qdldl"
    if "--one" in sys.argv:
        print(json.dumps(one(int(args[0]), backend)))
        return
    sizes = [int(a) for a in args if a.isdigit()] or [10_000, 100_000, 500_000]
    print(f"{'mains':>8} {'links':>8} {'nodes':>8} {'backend':>7} "
          f"{'iter':>4} {'setup s':>8} {'solve s':>8} "
          f"{'factor s':>9} {'ratio':>6} | {'iter2':>5} {'solve2 s':>8} {'ratio2':>6} "
          f"{'peak MB':>8}")
    for n in sizes:
        out = subprocess.run([sys.executable, __file__, str(n), f"--backend={backend}", "--one"],
                             capture_output=True, text=True, check=True)
        d = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{d['mains']:>8} {d['links']:>8} {d['nodes']:>8} {d['backend']:>7} "
              f"{d['iterations']:>4} {d['setup_s']:>8} "
              f"{d['solve_s']:>8} {d['factor_s']:>9} {d['ratio']:>6} | {d['iterations2']:>5} "
              f"{d['solve2_s']:>8} {d['ratio2']:>6} {d['peak_mb']:>8}",
              flush=True)


if __name__ == "__main__":
    main()
