"""Fire flow at hydrants against closed forms, NFPA 291 arithmetic and physics checks."""

from __future__ import annotations

import dataclasses
import pickle

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from gridflow.analysis.fireflow import FireflowProblem, sweep
from gridflow.analysis.nfpa import extrapolate_nfpa291, nfpa_class
from gridflow.config.fireflow import FireflowSection
from gridflow.config.sections import CriteriaSection
from gridflow.errors import GridflowError, InputError
from gridflow.hydraulics import SolveOptions, solve
from gridflow.network import STATUS_CLOSED
from gridflow.units import INCH, M_HEAD_PER_PSI, US_GALLON

from ..hydraulics.netbuild import assert_physics, net, pipe

GPM = US_GALLON / 60.0
PSI = M_HEAD_PER_PSI
TIGHT = SolveOptions(flow_tolerance=1e-10, head_tolerance=1e-8)
CRIT = CriteriaSection()


def bare(**kw) -> FireflowSection:
    """The config without the hydrant's own path (no lateral, no hydrant loss): the draw is
    taken at the main node, as the closed forms of a main alone assume."""
    return FireflowSection(**{"lateral_length": 0.0, "hydrant_k": 0.0, **kw})


def r_hw(L, D, C):
    # Hazen-Williams SI, written out from the published formula:
    # h = 10.67 L Q^1.852 / (C^1.852 D^4.87)
    return 10.67 * L / (C**1.852 * D**4.87)


def hydrants(rows):
    """rows: (hydrant_id, node_idx) or dicts with any of the hydrant columns."""
    cols = {"hydrant_id": [], "node_idx": [], "zone": [], "required_fire_flow_m3s": [],
            "land_use": [], "lateral_length_m": [], "lateral_diameter_m": []}
    for row in rows:
        d = row if isinstance(row, dict) else {"hydrant_id": row[0], "node_idx": row[1]}
        for c, values in cols.items():
            values.append(d.get(c, {"zone": "", "land_use": None}.get(c, np.nan)))
    return pd.DataFrame(cols)


def run(n, hyd, fire=None, options=TIGHT, **kw):
    base = solve(n, options=options)
    return sweep(n, base, hyd, fire or bare(), CRIT, options=options,
                 workers=kw.pop("workers", 1), **kw)


# ---------------------------------------------------------------- closed forms
def test_single_pipe_closed_form():
    # Q = ((H_res - z - p_r/(rho g)) / (r L))^(1/1.852), Hazen-Williams r (physics spec)
    n = net([("R", 0, 0, 100.0), ("H", 10.0, 0.0, None)], [pipe("P", "R", "H", 1000, 0.2, 120)])
    out = run(n, hydrants([("F1", 1)]))
    q = ((100.0 - 10.0 - 20 * PSI) / r_hw(1000, 0.2, 120)) ** (1 / 1.852)
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=1e-5)
    assert out["rated_flow_20psi_m3s"][0] == pytest.approx(q, rel=1e-5)
    assert out["limited_by"][0] == "residual"
    assert out["limiting_node_id"][0] == "H"
    assert out["static_pressure_m"][0] == pytest.approx(90.0, abs=1e-6)
    # residual at the required 1500 gpm (config default): p = H - z - r Q^1.852
    req = 1500 * GPM
    assert out["required_flow_m3s"][0] == pytest.approx(req)
    p_req = 100.0 - 10.0 - r_hw(1000, 0.2, 120) * req**1.852
    assert out["residual_pressure_at_required_m"][0] == pytest.approx(p_req, abs=1e-4)
    assert out["meets_required"][0] == int(q >= req)


def test_lateral_and_hydrant_loss_in_series_closed_form():
    # main plus a 6 in lateral of 10 m with K = 2.5 at the outlet: losses add in series;
    # H - z - p_r = (r_main + r_lat) Q^1.852 + 8 K Q^2 / (g pi^2 D^4), solved by a root finder
    n = net([("R", 0, 0, 100.0), ("H", 10.0, 0.0, None)], [pipe("P", "R", "H", 1000, 0.25, 120)])
    fire = FireflowSection(lateral_length=10.0, lateral_diameter=6 * INCH, lateral_c=110.0,
                           hydrant_k=2.5)
    out = run(n, hydrants([("F1", 1)]), fire)
    r = r_hw(1000, 0.25, 120) + r_hw(10.0, 6 * INCH, 110.0)
    m = 8 * 2.5 / (9.80665 * np.pi**2 * (6 * INCH) ** 4)
    q = brentq(lambda x: r * x**1.852 + m * x * x - (90.0 - 20 * PSI), 1e-6, 10.0, xtol=1e-12)
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=1e-5)
    # a shorter lateral from the hydrant table overrides the config default
    out2 = run(n, hydrants([{"hydrant_id": "F1", "node_idx": 1, "lateral_length_m": 1.0}]), fire)
    assert out2["available_flow_m3s"][0] > out["available_flow_m3s"][0]


def test_farther_hydrant_on_dead_end_main_has_less_flow():
    # common practice: along one dead-end main, available flow falls with distance
    n = net([("R", 0, 0, 90.0), ("A", 0, 0.002, None), ("B", 0, 0.002, None)],
            [pipe("1", "R", "A", 400, 0.2), pipe("2", "A", "B", 400, 0.15)])
    fire = bare(system_wide=False)
    out = run(n, hydrants([("near", 1), ("far", 2)]), fire)
    q = out.set_index("hydrant_id")["available_flow_m3s"]
    assert q["far"] < q["near"]
    # closed form for the far hydrant: A carries B's flow plus its own base demand
    f = brentq(lambda x: r_hw(400, 0.2, 120) * (x + 0.004) ** 1.852
               + r_hw(400, 0.15, 120) * (x + 0.002) ** 1.852 - (90.0 - 20 * PSI), 0, 5)
    assert q["far"] == pytest.approx(f, rel=1e-5)


def test_system_wide_constraint_binds_at_known_node():
    # hydrant at A (elevation 0); node B on a branch at elevation 20 m with no demand: B's
    # head equals A's, so B reaches 20 psi when A's head is 20 m + 20 psi, before A's own
    # residual target; the draw is then ((H - 20 - p_min) / r)^(1/1.852)
    n = net([("R", 0, 0, 100.0), ("A", 0.0, 0.0, None), ("B", 20.0, 0.0, None)],
            [pipe("1", "R", "A", 1500, 0.2), pipe("2", "A", "B", 300, 0.1)])
    out = run(n, hydrants([("F", 1)]))
    q = ((100.0 - 20.0 - 20 * PSI) / r_hw(1500, 0.2, 120)) ** (1 / 1.852)
    assert out["limited_by"][0] == "node_pressure"
    assert out["limiting_node_id"][0] == "B"
    assert out["limiting_pipe_id"][0] == ""
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=1e-4)
    # the hydrant alone (20 psi at A) would give more
    q_alone = ((100.0 - 20 * PSI) / r_hw(1500, 0.2, 120)) ** (1 / 1.852)
    assert out["rated_flow_20psi_m3s"][0] == pytest.approx(q_alone, rel=1e-5)
    off = run(n, hydrants([("F", 1)]), bare(system_wide=False))
    assert off["available_flow_m3s"][0] == pytest.approx(q_alone, rel=1e-5)


def test_velocity_limit():
    # with a 3 m/s limit on the main, the draw is v A (the limit binds before 20 psi)
    n = net([("R", 0, 0, 100.0), ("H", 0.0, 0.0, None)], [pipe("P", "R", "H", 200, 0.15)])
    crit = dataclasses.replace(CRIT, max_velocity_fire=3.0)
    base = solve(n, options=TIGHT)
    out = sweep(n, base, hydrants([("F", 1)]), bare(velocity_limit=True), crit, options=TIGHT,
                workers=1)
    assert out["limited_by"][0] == "velocity"
    assert out["limiting_pipe_id"][0] == "P" and out["limiting_node_id"][0] == ""
    q = 3.0 * np.pi * 0.15**2 / 4  # continuity: Q = v A
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=1e-4)
    assert out["max_velocity_ms"][0] == pytest.approx(3.0, rel=1e-4)
    # the same limit as a flag only (the default): the draw goes to the residual target, the
    # fastest pipe is named and flagged; its velocity is the draw over the pipe's area
    out = sweep(n, base, hydrants([("F", 1)]), bare(), crit, options=TIGHT, workers=1)
    assert out["limited_by"][0] == "residual"
    assert out["max_velocity_pipe_id"][0] == "P" and out["high_velocity"][0] == 1
    assert out["max_velocity_ms"][0] == pytest.approx(
        out["available_flow_m3s"][0] / (np.pi * 0.15**2 / 4), rel=1e-9)
    assert out["max_velocity_ms"][0] > 3.0


def test_base_below_minimum_reported_once_not_limiting():
    # node C sits high: 10 psi before any fire draw; it is a finding, not every hydrant's limit
    n = net([("R", 0, 0, 100.0), ("A", 0, 0.001, None), ("B", 0, 0.001, None),
             ("C", 93.0, 0.0005, None)],
            [pipe("1", "R", "A", 500, 0.2), pipe("2", "A", "B", 500, 0.2),
             pipe("3", "A", "C", 100, 0.1)])
    # a hydrant at the end of the main: A stays above it; C is already below and ignored
    out = run(n, hydrants([("F2", 2)]))
    assert out.attrs["base_below_minimum"] == ["C"]
    assert out["limited_by"][0] == "residual"
    # a hydrant on C itself: static already below the residual target
    out = run(n, hydrants([("F3", 3)]))
    assert out["limited_by"][0] == "static_pressure"
    assert out["limiting_node_id"][0] == "C"
    assert out["available_flow_m3s"][0] == 0.0


def test_unsupplied_hydrant():
    n = net([("R", 0, 0, 100.0), ("A", 0, 0.0, None), ("B", 0, 0.0, None)],
            [pipe("1", "R", "A", 500, 0.2), pipe("2", "A", "B", 500, 0.2, status=STATUS_CLOSED)])
    out = run(n, hydrants([("F1", 1), ("F2", 2)]))
    assert out["limited_by"].tolist() == ["residual", "unsupplied"]
    assert out["available_flow_m3s"][1] == 0.0
    assert out["meets_required"][1] == 0
    # no supply: nothing available, no rating and no class; the required flow is not
    # achievable and nothing flows at 0 psi
    assert np.isnan(out["rated_flow_20psi_m3s"][1]) and out["nfpa_class"][1] == ""
    assert out["required_achievable"][1] == 0 and out["flow_at_0psi_m3s"][1] == 0.0
    assert out["limiting_node_id"][1] == "B"


def test_required_flow_sources_in_order():
    n = net([("R", 0, 0, 100.0), ("A", 0, 0.0, None)], [pipe("1", "R", "A", 500, 0.3)])
    fire = FireflowSection(required_by_land_use={"industrial": 0.2},
                           required_by_zone={"north": 0.12}, default_required=0.06)
    hyd = hydrants([
        {"hydrant_id": "attr", "node_idx": 1, "required_fire_flow_m3s": 0.03,
         "land_use": "industrial"},
        {"hydrant_id": "land", "node_idx": 1, "land_use": "industrial", "zone": "north"},
        {"hydrant_id": "zone", "node_idx": 1, "land_use": "homes", "zone": "north"},
        {"hydrant_id": "default", "node_idx": 1},
    ])
    out = run(n, hyd, fire)
    assert out["required_flow_m3s"].tolist() == pytest.approx([0.03, 0.2, 0.12, 0.06])


# ---------------------------------------------------------------- NFPA 291 arithmetic
def test_nfpa291_extrapolation_check_values():
    # S 80, R 60 psi at 1000 gpm -> 1809.9 gpm at 20 psi (computed from the NFPA 291 formula)
    assert extrapolate_nfpa291(80, 60, 1000, 20) == pytest.approx(1809.9, abs=0.05)
    # S 86, R 42 psi at 789 gpm -> 982 gpm (worked example in NFPA 291 training material)
    assert extrapolate_nfpa291(86, 42, 789, 20) == pytest.approx(982, abs=0.5)
    # S 70, R 50 psi at 1000 gpm -> about 1640 gpm (physics spec, computed from the formula)
    assert extrapolate_nfpa291(70, 50, 1000, 20) == pytest.approx(1640, abs=1)
    assert np.isnan(extrapolate_nfpa291(50, 50, 1000, 20))


def test_nfpa291_extrapolation_agrees_with_model_on_a_single_path():
    # one supply path, no other draw: the 0.54 power is 1/1.852 to 1e-4, so the model's flow
    # at 20 psi and the extrapolation from its static and 50 psi points agree within 0.1 %
    n = net([("R", 0, 0, 120.0), ("H", 15.0, 0.0, None)], [pipe("P", "R", "H", 800, 0.2)])
    at50 = run(n, hydrants([("F", 1)]), bare(residual_pressure=50 * PSI))
    at20 = run(n, hydrants([("F", 1)]))
    s = at50["static_pressure_m"][0] / PSI
    q = extrapolate_nfpa291(s, 50.0, at50["available_flow_m3s"][0], 20.0)
    assert q == pytest.approx(at20["available_flow_m3s"][0], rel=1e-3)
    assert at50["rated_flow_20psi_m3s"][0] == pytest.approx(
        at20["available_flow_m3s"][0], rel=1e-6)


@pytest.mark.parametrize("gpm, cls", [(1499.9, "A"), (1500.0, "AA"), (999.9, "B"),
                                      (499.9, "C"), (1000.0, "A"), (500.0, "B"), (0.0, "C")])
def test_nfpa_class_boundaries(gpm, cls):
    # NFPA 291 chapter 5 (via secondary sources): AA >= 1500, A 1000-1499, B 500-999, C < 500
    assert nfpa_class(gpm) == cls


# ---------------------------------------------------------------- physics of the solutions
def looped():
    nodes = [("R", 0, 0, 95.0), ("T", 0, 0, 92.0)] + [
        (f"J{i}", 2.0 * (i % 3), 0.003, None) for i in range(8)]
    links = [pipe("a", "R", "J0", 300, 0.3), pipe("b", "T", "J5", 600, 0.25),
             pipe("1", "J0", "J1", 200, 0.2), pipe("2", "J1", "J2", 250, 0.15),
             pipe("3", "J2", "J3", 200, 0.15), pipe("4", "J3", "J0", 300, 0.2),
             pipe("5", "J1", "J4", 180, 0.15), pipe("6", "J4", "J5", 220, 0.2),
             pipe("7", "J5", "J2", 260, 0.15), pipe("8", "J4", "J6", 150, 0.1),
             pipe("9", "J6", "J7", 150, 0.1)]
    return net(nodes, links)


def test_fire_flow_solutions_conserve_mass_and_energy():
    n = looped()
    base = solve(n, options=TIGHT)
    fire = FireflowSection(lateral_length=5.0)
    hyd = hydrants([(f"F{i}", i) for i in range(2, 10)])
    prob = FireflowProblem.build(n, base, hyd, fire, CRIT, options=TIGHT)
    for j in range(len(hyd)):
        k = prob.outlet_idx[j]
        r = prob.solve_pinned(j, prob.net.elevation_m[k] + 20 * PSI)
        assert r.converged
        # the pinned outlet's balance defines the draw; every other node must balance
        d = r.demand_m3s.copy()
        d[k] += prob.draw(j, r)
        assert_physics(prob.net, dataclasses.replace(r, demand_m3s=d), mass_tol=1e-8,
                       head_tol=1e-6)
        # whole-network balance: supply from the fixed heads = base demand + the fire draw
        supply = -r.node_inflow_m3s[prob.net.is_fixed].sum()
        assert supply == pytest.approx(n.demand_m3s.sum() + prob.draw(j, r), rel=1e-8)
        assert r.pressure_m[k] == pytest.approx(20 * PSI, abs=1e-9)
    out = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1)
    assert (out["available_flow_m3s"] > 0).all()
    assert (out["available_flow_m3s"] <= out["rated_flow_20psi_m3s"] + 1e-12).all()


def test_pressure_driven_demand_keeps_other_nodes_non_negative():
    # a node behind a small, long service main: under demand-driven fire flow it shows an
    # impossible negative pressure; with pressure-driven demand it delivers less, stays >= 0
    n = net([("R", 0, 0, 90.0), ("A", 0, 0.0, None), ("B", 5.0, 0.001, None)],
            [pipe("1", "R", "A", 2000, 0.2), pipe("2", "A", "B", 1000, 0.04)])
    base = solve(n, options=TIGHT)
    hyd = hydrants([{"hydrant_id": "F", "node_idx": 1, "required_fire_flow_m3s": 0.03}])
    for pdd in (False, True):
        fire = bare(system_wide=False, pressure_driven=pdd)
        prob = FireflowProblem.build(n, base, hyd, fire, CRIT, options=TIGHT)
        r = prob.solve_pinned(0, 20 * PSI)
        if pdd:
            assert r.pressure_m[2] >= -1e-6
            assert 0 < r.demand_m3s[2] < 0.001
        else:
            assert r.pressure_m[2] < 0
        out = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1)
        assert out["available_flow_m3s"][0] == pytest.approx(prob.draw(0, r), rel=1e-9)
        # residual at the required flow: drawing that flow gives back that pressure
        req = out["required_flow_m3s"][0]
        rr = prob.solve_pinned(0, out["residual_pressure_at_required_m"][0])
        assert prob.draw(0, rr) == pytest.approx(req, rel=1e-4)


# ---------------------------------------------------------------- parallel runs
def test_local_processes_and_dask_cluster_match_serial():
    distributed = pytest.importorskip("distributed")
    n = looped()
    base = solve(n, options=TIGHT)
    hyd = hydrants([(f"F{i}", i) for i in range(2, 10)])
    fire = bare(batch_size=3)
    seen = []
    serial = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1,
                   progress=lambda done, total: seen.append((done, total)))
    assert seen[-1] == (8, 8) and len(seen) == 3
    procs = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=2)
    assert procs.attrs["summary"]["mode"] == "processes"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        dask = sweep(n, base, hyd, fire, CRIT, options=TIGHT, scheduler=cluster.scheduler_address)
    assert dask.attrs["summary"]["mode"] == "dask"
    pd.testing.assert_frame_equal(serial, procs)
    pd.testing.assert_frame_equal(serial, dask)


# ---------------------------------------------------------------- bad input
def test_bad_hydrant_input_names_feature_and_field():
    n = net([("R", 0, 0, 100.0), ("A", 0, 0.0, None)], [pipe("1", "R", "A", 500, 0.3)])
    with pytest.raises(InputError, match="hydrant H9 refers to node position 7") as exc:
        run(n, hydrants([("H9", 7)]))
    assert exc.value.layer == "hydrants" and exc.value.field == "node_idx"
    err = pickle.loads(pickle.dumps(exc.value))
    assert isinstance(err, GridflowError) and err.feature_id == "H9"
    with pytest.raises(InputError, match="hydrant id 'H1' is used 2 times"):
        run(n, hydrants([("H1", 1), ("H1", 1)]))
    with pytest.raises(InputError, match="hydrant H1 has required fire flow -1"):
        run(n, hydrants([{"hydrant_id": "H1", "node_idx": 1, "required_fire_flow_m3s": -1.0}]))
    with pytest.raises(InputError, match="no column 'land_use'"):
        run(n, hydrants([("H1", 1)]).drop(columns="land_use"))


def test_inputs_not_modified():
    n = looped()
    base = solve(n, options=TIGHT)
    hyd = hydrants([("F", 4)])
    before = (hyd.copy(), base.flow_m3s.copy(), n.demand_m3s.copy(), n.n_nodes)
    sweep(n, base, hyd, FireflowSection(lateral_length=3.0), CRIT, options=TIGHT, workers=1)
    pd.testing.assert_frame_equal(hyd, before[0])
    assert np.array_equal(base.flow_m3s, before[1]) and np.array_equal(n.demand_m3s, before[2])
    assert n.n_nodes == before[3]


# ---------------------------------------------------------------- the two solve routes
def test_draw_route_matches_full_solve_route(monkeypatch):
    from gridflow.analysis.fireflow.search import CannotAnswer, DrawRoute

    # every hydrant is answered by the draw solver (bordered pin, direct system-wide limit);
    # the full-Newton route (pinned solves and the bracketing search) must agree
    n = looped()
    base = solve(n, options=TIGHT)
    hyd = hydrants([(f"F{i}", i) for i in range(2, 10)])
    fire = FireflowSection(lateral_length=5.0, system_minimum=35 * PSI)
    fast = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1)
    assert fast.attrs["summary"]["fallback"] == 0
    assert (fast["limited_by"] == "node_pressure").any()

    def cannot(*args, **kwargs):
        raise CannotAnswer

    monkeypatch.setattr(DrawRoute, "pin", cannot)
    full = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1)
    assert full.attrs["summary"]["fallback"] == len(hyd)
    assert fast["limited_by"].tolist() == full["limited_by"].tolist()
    for col in ("available_flow_m3s", "rated_flow_20psi_m3s", "max_velocity_ms"):
        np.testing.assert_allclose(fast[col], full[col], rtol=1e-5)
    np.testing.assert_allclose(fast["residual_pressure_at_required_m"],
                               full["residual_pressure_at_required_m"], atol=1e-5)


def test_system_wide_limit_solved_directly_at_known_node():
    # the case of test_system_wide_constraint_binds_at_known_node, by the draw route: B held at
    # the minimum gives the draw ((H - 20 - p_min) / r)^(1/1.852) to solver accuracy
    n = net([("R", 0, 0, 100.0), ("A", 0.0, 0.0, None), ("B", 20.0, 0.0, None)],
            [pipe("1", "R", "A", 1500, 0.2), pipe("2", "A", "B", 300, 0.1)])
    out = run(n, hydrants([("F", 1)]))
    assert out.attrs["summary"]["fallback"] == 0
    q = ((100.0 - 20.0 - 20 * PSI) / r_hw(1500, 0.2, 120)) ** (1 / 1.852)
    assert out["limited_by"][0] == "node_pressure"
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=1e-7)


def test_local_process_batches_balance_and_match_serial():
    n = looped()
    base = solve(n, options=TIGHT)
    hyd = hydrants([(f"F{i}", 2 + i % 8) for i in range(60)])
    fire = FireflowSection(batch_size=100)
    serial = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=1)
    assert serial.attrs["summary"]["batches"] == 1
    procs = sweep(n, base, hyd, fire, CRIT, options=TIGHT, workers=2)
    # 60 hydrants, 2 workers: every worker gets 4 tasks, so tasks of 8 (not one of 100)
    assert procs.attrs["summary"]["mode"] == "processes"
    assert procs.attrs["summary"]["batches"] == 8
    pd.testing.assert_frame_equal(serial, procs)


def test_unreachable_scheduler_is_a_clear_config_error():
    from gridflow.analysis.fireflow import connect_scheduler
    from gridflow.errors import ConfigError

    with pytest.raises(ConfigError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9"):
        connect_scheduler("tcp://127.0.0.1:9", timeout="2s")


def test_workers_without_gridflow_are_named(monkeypatch):
    # a worker that cannot import gridflow (simulated by a worker-side version probe answer)
    import distributed

    from gridflow.analysis.fireflow import connect_scheduler
    from gridflow.errors import ConfigError

    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        monkeypatch.setattr(distributed.Client, "run",
                            lambda self, fn: {"tcp://127.0.0.1:1": "missing"})
        with pytest.raises(ConfigError, match="cannot import gridflow.*install the same"):
            connect_scheduler(cluster.scheduler_address)


def test_batches_sized_to_the_workers():
    from gridflow.analysis.fireflow.backends import MIN_BATCH, TASKS_PER_WORKER, batches_for

    for n, size, workers in [(200, 100, 2), (10_000, 100, 2), (7, 100, 2), (1000, 30, 8),
                             (50, 100, 1)]:
        b = batches_for(n, size, workers)
        assert np.array_equal(np.concatenate(b), np.arange(n))  # every hydrant once, in order
        assert max(map(len, b)) <= size  # the config's batch size is the largest batch
        if workers > 1:
            assert len(b) >= TASKS_PER_WORKER * workers or min(map(len, b[:-1] or b)) >= MIN_BATCH
        else:
            assert len(b) == -(-n // size)


# ---------------------------------------------------------------- the hydrant's own path
G = 9.80665


def k_term(k, d):
    # minor loss h = K v^2 / 2g with v = Q / (pi d^2 / 4): h = 8 K Q^2 / (g pi^2 d^4)
    return 8.0 * k / (G * np.pi**2 * d**4)


def test_default_hydrant_path_closed_form():
    # reservoir, one 200 mm main, the default lateral (6 m of 6 in, C 120) and hydrant body K:
    # H - z - p_r = (r_main + r_lat) Q^1.852 + 8 K Q^2 / (g pi^2 D^4), solved by brentq
    # (Hazen-Williams SI and the minor-loss law, physics spec); within 0.5 %
    fire = FireflowSection()
    assert fire.lateral_length > 0 and fire.hydrant_k > 0  # on by default
    n = net([("R", 0, 0, 100.0), ("H", 10.0, 0.0, None)], [pipe("P", "R", "H", 1000, 0.2, 120)])
    out = run(n, hydrants([("F1", 1)]), fire)
    d = fire.lateral_diameter
    r = r_hw(1000, 0.2, 120) + r_hw(fire.lateral_length, d, fire.lateral_c)
    m = k_term(fire.hydrant_k, d)
    q = brentq(lambda x: r * x**1.852 + m * x * x - (90.0 - 20 * PSI), 1e-9, 10.0, xtol=1e-12)
    assert out["available_flow_m3s"][0] == pytest.approx(q, rel=5e-3)
    assert out["rated_flow_20psi_m3s"][0] == pytest.approx(q, rel=5e-3)
    # the hydrant's path costs flow: the bare main passes more
    bare_q = run(n, hydrants([("F1", 1)]))["available_flow_m3s"][0]
    assert bare_q > 1.1 * out["available_flow_m3s"][0]
    # a lateral from the hydrant table overrides the default
    out2 = run(n, hydrants([{"hydrant_id": "F1", "node_idx": 1, "lateral_length_m": 60.0,
                             "lateral_diameter_m": 0.2}]), fire)
    r2 = r_hw(1000, 0.2, 120) + r_hw(60.0, 0.2, fire.lateral_c)
    q2 = brentq(lambda x: r2 * x**1.852 + k_term(fire.hydrant_k, 0.2) * x * x
                - (90.0 - 20 * PSI), 1e-9, 10.0, xtol=1e-12)
    assert out2["available_flow_m3s"][0] == pytest.approx(q2, rel=5e-3)


def test_large_main_cannot_report_more_than_the_hydrant_passes():
    # a 400 mm main 50 m from a 100 m head: the main alone would pass well over 1000 L/s;
    # through the default hydrant path the flow stays in the range field tests of single
    # hydrants show (below 10,000 gpm; common practice, no single source)
    n = net([("R", 0, 0, 100.0), ("H", 0.0, 0.0, None)], [pipe("P", "R", "H", 50, 0.4, 130)])
    bare_q = run(n, hydrants([("F", 1)]))["available_flow_m3s"][0]
    q = run(n, hydrants([("F", 1)]), FireflowSection())["available_flow_m3s"][0]
    assert bare_q > 1.0
    assert q < 10_000 * GPM


def test_required_flow_beyond_reach_is_not_achievable():
    # required 3000 gpm through a long 150 mm main: no residual >= 0 psi can deliver it;
    # the residual is empty, required_achievable 0, and the flow at 0 psi residual is the
    # closed form H - z = (r_main + r_lat) Q^1.852 + 8 K Q^2 / (g pi^2 D^4) (brentq)
    fire = FireflowSection(default_required=3000 * GPM)
    n = net([("R", 0, 0, 80.0), ("H", 5.0, 0.0, None)], [pipe("P", "R", "H", 1500, 0.15, 110)])
    for pdd in (False, True):
        f = dataclasses.replace(fire, pressure_driven=pdd)
        out = run(n, hydrants([("F", 1)]), f)
        d = f.lateral_diameter
        r = r_hw(1500, 0.15, 110) + r_hw(f.lateral_length, d, f.lateral_c)
        q0 = brentq(lambda x, r=r, d=d, f=f: r * x**1.852 + k_term(f.hydrant_k, d) * x * x
                    - 75.0, 1e-9, 10.0, xtol=1e-12)
        assert np.isnan(out["residual_pressure_at_required_m"][0])
        assert out["required_achievable"][0] == 0
        assert out["meets_required"][0] == 0
        assert out["flow_at_0psi_m3s"][0] == pytest.approx(q0, rel=5e-3)
        assert out["flow_at_0psi_m3s"][0] < 3000 * GPM
    # within reach: the residual is written, never below 0 psi, and nothing at 0 psi
    out = run(n, hydrants([("F", 1)]), FireflowSection(default_required=200 * GPM))
    assert out["required_achievable"][0] == 1
    assert out["residual_pressure_at_required_m"][0] > 0
    assert np.isnan(out["flow_at_0psi_m3s"][0])


def test_outlet_as_nozzle_matches_nfpa291_discharge():
    # the hydrant path modelled as an outlet nozzle: d = 2.5 in, discharge coefficient
    # c = 0.9, a loss-only link with K = 1 / c^2 on the nozzle's bore. At 0 psi residual
    # beyond the nozzle the jet's velocity head is the pressure upstream of it, so the flow
    # at 0 psi must follow the NFPA 291 relation Q = 29.83 c d^2 sqrt(p) (gpm, in, psi) with
    # p the pressure at the main node; 29.83 is rounded, so within 0.5 %
    c, d_in = 0.9, 2.5
    fire = FireflowSection(lateral_length=0.0, lateral_diameter=d_in * INCH,
                           hydrant_k=1.0 / c**2, default_required=5000 * GPM)
    n = net([("R", 0, 0, 60.0), ("H", 0.0, 0.0, None)], [pipe("P", "R", "H", 300, 0.3, 130)])
    out = run(n, hydrants([("F", 1)]), fire)
    assert out["required_achievable"][0] == 0
    q0 = out["flow_at_0psi_m3s"][0]
    p_main = 60.0 - r_hw(300, 0.3, 130) * q0**1.852  # head at the main node = its pressure
    nfpa = 29.83 * c * d_in**2 * np.sqrt(p_main / PSI) * GPM
    assert q0 == pytest.approx(nfpa, rel=5e-3)


def test_out_of_service_hydrants_have_no_figures_and_are_not_counted():
    n = looped()
    hyd = hydrants([(f"F{i}", i) for i in range(2, 6)])
    hyd["in_service"] = [True, False, None, True]
    out = run(n, hyd, FireflowSection())
    assert out["in_service"].tolist() == [1, 0, 1, 1]  # empty: in service
    off = out.iloc[1]
    assert off["limited_by"] == "out_of_service" and off["nfpa_class"] == ""
    for col in ("available_flow_m3s", "rated_flow_20psi_m3s", "max_velocity_ms"):
        assert np.isnan(off[col])
    assert pd.isna(off["meets_required"]) and pd.isna(off["required_achievable"])
    s = out.attrs["summary"]
    assert s["hydrants"] == 3 and s["out_of_service"] == 1
    assert s["meets_required"] == int(out["meets_required"].fillna(0).sum())
    # without the column every hydrant is in service
    out = run(n, hyd.drop(columns="in_service"), FireflowSection())
    assert out["in_service"].tolist() == [1, 1, 1, 1]


def test_limiting_nodes_table_counts_hydrants_per_node():
    from gridflow.analysis.fireflow import limiting_nodes

    n = looped()
    hyd = hydrants([(f"F{i}", i) for i in range(2, 10)])
    out = run(n, hyd, FireflowSection(system_minimum=35 * PSI))
    table = limiting_nodes(out)
    hit = out[out["limited_by"] == "node_pressure"]
    assert len(hit) > 0
    assert table["hydrants"].sum() == len(hit)
    assert table["hydrants"].is_monotonic_decreasing
    counts = hit.groupby("limiting_node_id").size()
    for _, row in table.iterrows():
        assert counts[row["limiting_node_id"]] == row["hydrants"]


def test_class_rests_on_the_written_rated_flow():
    n = looped()
    out = run(n, hydrants([(f"F{i}", i) for i in range(2, 10)]), FireflowSection())
    # NFPA 291 chapter 5 (via secondary sources): the class from the flow at 20 psi
    assert (out["nfpa_class"] == nfpa_class(out["rated_flow_20psi_m3s"] / GPM)).all()


def test_allocator_tuned_only_where_a_worker_trims_memory():
    import os
    import subprocess
    import sys

    code = ("from gridflow.analysis.fireflow.backends import tune_allocator as t; "
            "print(t(), t())")
    env = {k: v for k, v in os.environ.items() if k != "MALLOC_TRIM_THRESHOLD_"}
    plain = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                           text=True, check=True)
    assert plain.stdout.split() == ["False", "False"]
    nanny = subprocess.run([sys.executable, "-c", code],
                           env={**env, "MALLOC_TRIM_THRESHOLD_": "65536"}, capture_output=True,
                           text=True, check=True)
    assert nanny.stdout.split() == ["True", "False"]  # once per process
