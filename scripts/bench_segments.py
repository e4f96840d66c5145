"""Benchmark: valve segments and the shutdown-criticality sweep on the synthetic utility.

The utility of ``synthetic_utility.py``, read and cleaned once: its isolation valves are placed
the way utilities place them, on every leg of an intersection but one, about 6 m from it
(common practice: "n - 1 valves per intersection"). Prints, per size (mains):

- segments: time of :func:`gridflow.analysis.segments.find_segments` (segments, valves, and
  the dominator tree for unintended isolation) and its ratio to a bare
  ``scipy.sparse.csgraph.connected_components`` of the same graph (the floor);
- closures: time per segment of the criticality sweep (a sample of segments) divided by one
  numeric factorization of the same system, on 1 and 2 local workers.

Figures, not assertions: compare ratios taken in the same run.

    python scripts/bench_segments.py [--sizes 10000 100000] [--sample 200]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from synthetic import numeric_factorization_seconds  # noqa: E402
from utility_network import utility_network  # noqa: E402

from gridflow.analysis.criticality import ClosureProblem, closure_sweep  # noqa: E402
from gridflow.analysis.segments import find_segments  # noqa: E402
from gridflow.hydraulics import HydraulicSystem, SolveOptions  # noqa: E402
from gridflow.network import LINK_VALVE  # noqa: E402


def one(n_mains: int, sample: int) -> dict:
    net, _, _ = utility_network(n_mains)
    t0 = time.perf_counter()
    seg = find_segments(net)
    t_seg = time.perf_counter() - t0
    keep = net.link_kind != LINK_VALVE
    t0 = time.perf_counter()
    adj = sp.coo_matrix((np.ones(int(keep.sum())), (net.from_idx[keep], net.to_idx[keep])),
                        shape=(net.n_nodes, net.n_nodes)).tocsr()
    connected_components(adj, directed=False)
    t_cc = time.perf_counter() - t0

    opts = SolveOptions()
    system = HydraulicSystem(net, opts)
    base = system.solve()
    t_fact = numeric_factorization_seconds(system)
    rng = np.random.default_rng(0)
    rows = np.sort(rng.choice(seg.n, min(sample, seg.n), replace=False))
    sub = ClosureProblem(net=net, base=base, options=opts, min_pressure_m=14.06,
                         meters_per_node=np.ones(net.n_nodes),
                         hydrants_per_node=np.zeros(net.n_nodes), segments=seg)
    out = {"mains": n_mains, "links": net.n_links, "segments": seg.n, "seg_s": t_seg,
           "cc_s": t_cc, "factor_ms": t_fact * 1e3, "cut": int((np.diff(seg.cut_ptr) > 0).sum())}
    for workers in (1, 2):
        t0 = time.perf_counter()
        _sample_sweep(sub, rows, workers)
        dt = time.perf_counter() - t0
        out[f"per_seg_{workers}"] = dt / len(rows)
        out[f"facts_{workers}"] = dt / len(rows) / t_fact
    return out


def _sample_sweep(problem: ClosureProblem, rows: np.ndarray, workers: int) -> None:
    """Sweep only ``rows`` (a view of the problem whose segments are those rows)."""
    from dataclasses import replace

    assert problem.segments is not None
    s = problem.segments
    ptr = np.concatenate([[0], np.cumsum(np.diff(s.valve_ptr)[rows])])
    idx = np.concatenate([s.valves_of(int(r)) for r in rows]) if rows.size else s.valve_idx[:0]
    node_seg = np.full(s.node_segment.shape, -1)
    for k, r in enumerate(rows):
        node_seg[s.node_segment == r] = k
    view = replace(s, n=len(rows), valve_ptr=ptr, valve_idx=idx, node_segment=node_seg,
                   cut_ptr=np.zeros(len(rows) + 1, dtype=np.int64))
    closure_sweep(replace(problem, segments=view, _system=None), workers=workers)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000])
    ap.add_argument("--sample", type=int, default=200)
    a = ap.parse_args()
    print(f"{'mains':>8} {'links':>8} {'segments':>8} {'cut':>5} {'seg s':>7} {'cc s':>7} "
          f"{'ratio':>6} {'fact ms':>8} {'s/seg 1w':>9} {'facts 1w':>9} {'s/seg 2w':>9} "
          f"{'facts 2w':>9} {'x2':>5}")
    for n in a.sizes:
        d = one(n, a.sample)
        print(f"{d['mains']:>8} {d['links']:>8} {d['segments']:>8} {d['cut']:>5} "
              f"{d['seg_s']:>7.3f} {d['cc_s']:>7.3f} {d['seg_s'] / d['cc_s']:>6.1f} "
              f"{d['factor_ms']:>8.2f} {d['per_seg_1']:>9.4f} {d['facts_1']:>9.1f} "
              f"{d['per_seg_2']:>9.4f} {d['facts_2']:>9.1f} "
              f"{d['per_seg_1'] / d['per_seg_2']:>5.2f}", flush=True)


if __name__ == "__main__":
    main()
