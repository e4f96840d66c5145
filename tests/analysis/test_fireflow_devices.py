"""Fire flow where a draw changes a device's status, on the Millbrook sample: the hill zone's
pressure-reducing valve and booster. The draw route answers on a status variant of the reduced
network; its figures must equal those of the full-Newton route (pinned solves with status
rounds and the bracketing search), the whole-network reference."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gridflow.analysis.fireflow import FireflowProblem
from gridflow.analysis.fireflow.search import DrawRoute, FullRoute, run_rows, search_hydrant
from gridflow.config import load_config
from gridflow.demand import allocate
from gridflow.demand.scenarios import scenario_network
from gridflow.findings import Findings
from gridflow.hydraulics import HydraulicSystem, SolveOptions
from gridflow.topology import build_network

from .test_segments_sample import SAMPLE


@pytest.fixture(scope="module")
def problem():
    cfg = load_config(SAMPLE / "millbrook.toml")
    findings = Findings()
    clean = build_network(cfg, findings)
    alloc = allocate(cfg, clean, findings)
    net = scenario_network(cfg, clean, alloc, cfg.fireflow.scenario)
    hyd = pd.DataFrame(clean.hydrants.drop(columns="geometry"))
    opts = SolveOptions()
    base = HydraulicSystem(net, opts).solve()
    return FireflowProblem.build(net, base, hyd, cfg.fireflow, cfg.criteria, options=opts)


def test_status_changes_answered_on_the_reduced_network_equal_full_newton(problem):
    p = problem
    ds = p.draw_solver()
    assert ds.usable, ds.why_not
    hopped = []
    for j in range(len(p.outlet_idx)):
        if not p.in_service[j]:
            continue
        v0 = ds.variant_solves
        fast = search_hydrant(p, j, DrawRoute(p, ds))  # raises where it cannot answer
        if ds.variant_solves > v0:
            hopped.append((j, fast))
    # the sample's hill zone: dozens of hydrants whose draw opens or shuts a device
    assert len(hopped) >= 20
    rows = np.array([j for j, _ in hopped[:10]])
    rec = run_rows(p, rows)  # a batch counts them, none goes to the full route
    assert rec["status_variant"].all() and not rec["fallback"].any()
    for j, fast in hopped[::3]:
        full = search_hydrant(p, j, FullRoute(p))
        assert fast.limit == full.limit and fast.limit_idx == full.limit_idx, j
        for name in ("available", "q20", "q0", "vmax"):
            a, b = getattr(fast, name), getattr(full, name)
            assert (np.isnan(a) and np.isnan(b)) or a == pytest.approx(b, rel=5e-5, abs=1e-7), \
                (j, name, a, b)
        a, b = fast.residual_at_required, full.residual_at_required
        assert (np.isnan(a) and np.isnan(b)) or a == pytest.approx(b, abs=1e-4), (j, a, b)
        assert fast.achievable == full.achievable


@pytest.mark.parametrize("minimum_psi", [20.0, 45.0])
def test_system_wide_check_without_the_rebuild_changes_no_figure(problem, monkeypatch,
                                                                  minimum_psi):
    # the lowest pressure and fastest pipe of each draw come from bounds and a partial
    # rebuild of the reduced solution; every figure of every third hydrant must be what the
    # whole rebuilt solution gives, with the system minimum at 20 psi (common practice) and
    # raised to 45 psi so that other nodes limit many draws
    import dataclasses

    from gridflow.analysis.fireflow.problem import FireflowProblem
    from gridflow.units import M_HEAD_PER_PSI

    p = dataclasses.replace(problem, minimum_m=minimum_psi * M_HEAD_PER_PSI)
    rows = np.flatnonzero(p.in_service)[::3]
    used = []
    real = FireflowProblem._extremes

    def counted(self, r):
        got = real(self, r)
        used.append(got is not None)
        return got

    run_rows(p, rows[:3])  # what the first solves of a process make once
    monkeypatch.setattr(FireflowProblem, "_extremes", counted)
    fast = run_rows(p, rows)
    monkeypatch.setattr(FireflowProblem, "_extremes", lambda self, r: None)
    slow = run_rows(p, rows)
    assert sum(used) >= len(rows) // 2  # the bounds answered most draws
    for name, a in fast.items():
        b = slow[name]
        if a.dtype.kind == "f":
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12, err_msg=name)
        else:
            assert np.array_equal(a, b), name
    if minimum_psi > 20:
        assert (fast["limit"] == 1).sum() >= 10  # held at another node's pressure
