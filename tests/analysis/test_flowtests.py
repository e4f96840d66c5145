"""Field flow tests: NFPA 291 arithmetic, bad tests as findings, simulated solves that
conserve mass and energy, and roughness calibration recovering known values."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from gridflow.analysis.calibrate import calibrate, groups_from_table, toml_snippet
from gridflow.analysis.flowtest_workers import TestRunner
from gridflow.analysis.flowtests import (
    AVERAGE_DAY,
    FlowTestProblem,
    compare,
    prepare,
    simulate,
    summarise,
)
from gridflow.analysis.nfpa import extrapolate_nfpa291, nozzle_flow_gpm
from gridflow.config.layers import RoughnessRule, RoughnessSection
from gridflow.hydraulics import SolveOptions
from gridflow.network import STATUS_CLOSED
from gridflow.units import INCH, M_HEAD_PER_PSI, US_GALLON

from ..hydraulics.netbuild import assert_physics, net, pipe

GPM = US_GALLON / 60.0
PSI = M_HEAD_PER_PSI
TIGHT = SolveOptions(flow_tolerance=1e-10, head_tolerance=1e-8)
TODAY = dt.date(2026, 6, 1)


# ---------------------------------------------------------------- NFPA 291 arithmetic
def test_nfpa291_extrapolation_hand_worked():
    # S 80, R 60 psi at 1000 gpm -> 1809.9 gpm at 20 psi (computed from the NFPA 291 formula,
    # 1000 * (60/20)^0.54)
    assert extrapolate_nfpa291(80.0, 60.0, 1000.0, 20.0) == pytest.approx(1809.9, abs=0.05)
    # S 86, R 42 psi at 789 gpm -> 982 gpm at 20 psi (worked example in NFPA 291 training
    # material; computed)
    assert extrapolate_nfpa291(86.0, 42.0, 789.0, 20.0) == pytest.approx(982.0, abs=0.5)
    # S 70, R 50 psi at 1000 gpm -> about 1640 gpm (computed from the formula, 2.5^0.54)
    assert extrapolate_nfpa291(70.0, 50.0, 1000.0, 20.0) == pytest.approx(1640.0, abs=1.0)


def test_nfpa291_nozzle_formula_hand_worked():
    # Q = 29.83 c d^2 sqrt(p) (NFPA 291 outlet formula, gpm, in, psi), worked by hand:
    # c 0.90, d 2.5 in, p 16 psi: 29.83 * 0.9 * 6.25 * 4 = 671.2 gpm
    assert nozzle_flow_gpm(16.0, 2.5, 0.9) == pytest.approx(671.175, abs=1e-3)
    # c 0.90, d 2.5 in, p 10 psi: 29.83 * 0.9 * 6.25 * 3.1623 = 530.6 gpm
    assert nozzle_flow_gpm(10.0, 2.5, 0.9) == pytest.approx(530.6, abs=0.1)
    # 4.5 in pumper outlet, c 0.9, p 9 psi: 29.83 * 0.9 * 20.25 * 3 = 1631.0 gpm
    assert nozzle_flow_gpm(9.0, 4.5, 0.9) == pytest.approx(1631.0, abs=0.1)
    assert np.isnan(nozzle_flow_gpm(-1.0, 2.5, 0.9))


# ---------------------------------------------------------------- a network built in code
TRUE_C = {"ci_old": 70.0, "ci_new": 112.0, "di": 130.0, "pvc": 150.0}
TABLE = RoughnessSection(source="table", default=100.0, table=[
    RoughnessRule(material="ci", installed_before=1950, value=100.0),  # too high: true 70
    RoughnessRule(material="ci", value=125.0),  # too high: true 112
    RoughnessRule(material="di", value=130.0),  # right
    RoughnessRule(material="pvc", value=140.0),  # a dead-end branch no test informs
])


def grid_network(c_of=None):
    """4 x 4 grid, 200 m blocks, fed from a reservoir through a ductile-iron main; a PVC
    dead-end branch without demand. Returns the network and per-link material, year."""
    c_of = c_of or {"ci_old": 100.0, "ci_new": 125.0, "di": 130.0, "pvc": 140.0}
    nodes = [("R", 0.0, 0.0, 65.0)]
    nodes += [(f"J{i}{j}", 5.0 * (i + j) / 6, 0.001, None) for i in range(4) for j in range(4)]
    nodes += [("B1", 2.0, 0.0, None), ("B2", 2.0, 0.0, None)]
    links, mat, year = [], [], []

    def add(lid, a, b, L, D, group):
        links.append(pipe(lid, a, b, L, D, c_of[group]))
        mat.append({"ci_old": "ci", "ci_new": "ci", "di": "di", "pvc": "pvc"}[group])
        year.append(1920.0 if group == "ci_old" else 1985.0)

    add("M0", "R", "J00", 800.0, 0.25, "di")
    for i in range(4):
        for j in range(4):
            if j < 3:
                add(f"H{i}{j}", f"J{i}{j}", f"J{i}{j + 1}", 200.0, 0.20, "ci_old")
            if i < 3:
                add(f"V{i}{j}", f"J{i}{j}", f"J{i + 1}{j}", 200.0, 0.15, "ci_new")
    add("P1", "J33", "B1", 150.0, 0.15, "pvc")
    add("P2", "B1", "B2", 150.0, 0.15, "pvc")
    return net(nodes, links), np.array(["pipe"] * len(mat), dtype=object), \
        np.array(mat, dtype=object), np.array(year)


def hydrants_of(network):
    ids = [str(v) for v in network.node_id if str(v).startswith("J")]
    return pd.DataFrame({"hydrant_id": [f"H-{v}" for v in ids],
                         "node_idx": network.node_index(ids)})


PAIRS = [("J11", "J12"), ("J22", "J21"), ("J33", "J32"), ("J13", "J03"), ("J31", "J30"),
         ("J02", "J12"), ("J20", "J10"), ("J23", "J13"), ("J32", "J22"), ("J01", "J11"),
         ("J30", "J31"), ("J03", "J02")]


def make_tests(flows_gpm=1000.0, static=None, residual=None, **extra):
    n = len(PAIRS)
    df = pd.DataFrame({
        "test_id": [f"FT-{k + 1:02d}" for k in range(n)],
        "date": pd.to_datetime(["2024-05-01"] * n),
        "residual_hydrant": [f"H-{r}" for r, _ in PAIRS],
        "flowing_hydrants": [f"H-{f}" for _, f in PAIRS],
        "static_pressure": static if static is not None else np.full(n, 50.0),
        "residual_pressure": residual if residual is not None else np.full(n, 40.0),
        "total_flow": np.full(n, flows_gpm * GPM),
    })
    for k, v in extra.items():
        df[k] = v
    return df


def problem_for(network, tests_df, group, outlets=None):
    tests = prepare(tests_df, outlets, hydrants_of(network), [AVERAGE_DAY], today=TODAY)
    return FlowTestProblem((network,), TIGHT, tests, group)


def field_tests(seed=20_260_601, noise_psi=0.1):
    """Field pressures from the true roughness plus gauge noise from a fixed seed."""
    truth, kind, mat, year = grid_network(TRUE_C)
    groups = groups_from_table(kind, mat, year, TABLE)
    p = problem_for(truth, make_tests(), groups.link_group)
    sim = simulate(p, np.arange(len(PAIRS)))
    rng = np.random.default_rng(seed)
    n = len(PAIRS)
    static = sim["static_m"] + rng.normal(0, noise_psi * PSI, n)
    resid = sim["residual_m"] + rng.normal(0, noise_psi * PSI, n)
    return make_tests(static=static, residual=resid)


def test_simulated_test_solves_conserve_mass_and_energy():
    network, kind, mat, year = grid_network()
    groups = groups_from_table(kind, mat, year, TABLE)
    p = problem_for(network, make_tests(), groups.link_group)
    out = simulate(p, np.arange(len(PAIRS)), keep=True)
    assert out["converged"].all()
    for i, (netw, r0, r1, _demand) in enumerate(out["solves"]):
        assert_physics(netw, r0, mass_tol=1e-8, head_tol=1e-6)
        assert_physics(netw, r1, mass_tol=1e-8, head_tol=1e-6)
        # the test's flow leaves the network at the flowing hydrant: supply rises by it
        # (mass balance at the reservoir, 1000 gpm drawn)
        supply0, supply1 = -r0.node_inflow_m3s[0], -r1.node_inflow_m3s[0]
        assert supply1 - supply0 == pytest.approx(1000.0 * GPM, rel=1e-8)
        j = p.tests.residual_idx[i]
        assert r1.pressure_m[j] < r0.pressure_m[j]  # drawing flow lowers the residual
        assert r1.pressure_m[j] > 0  # no pressure below zero gauge in these tests


def test_calibration_recovers_known_roughness_per_group():
    field = field_tests()
    network, kind, mat, year = grid_network()  # the table's (wrong) values
    groups = groups_from_table(kind, mat, year, TABLE)
    p = problem_for(network, field, groups.link_group)
    with TestRunner(p, workers=1) as runner:
        sim = runner.run([None])[0]
        table = compare(p.tests, sim, tolerance_m=5 * PSI)
        used = table["used"].to_numpy() == 1
        assert used.all()
        res = calibrate(runner, groups, field_residual_m=p.tests.residual_m, used=used,
                        sensitivity_m=0.1 * PSI)
    g = res.groups.set_index("group")
    # recovery within 2 % of the true C (stated tolerance; noise 0.1 psi, seeded)
    assert g.loc["ci before 1950", "value_after"] == pytest.approx(TRUE_C["ci_old"], rel=0.02)
    assert g.loc["ci", "value_after"] == pytest.approx(TRUE_C["ci_new"], rel=0.02)
    assert g.loc["di", "value_after"] == pytest.approx(TRUE_C["di"], rel=0.02)
    for name in ("ci before 1950", "ci", "di"):
        assert g.loc[name, "fitted"] == 1 and g.loc[name, "tests"] > 0
        assert 0 < g.loc[name, "value_sd"] < 0.05 * g.loc[name, "value_after"]
    # the PVC dead end and the empty default group: reported, not fitted, kept
    for name, before in (("pvc", 140.0), ("default", 100.0)):
        assert g.loc[name, "fitted"] == 0 and g.loc[name, "tests"] == 0
        assert g.loc[name, "value_after"] == before
    assert res.rms_after_m < 0.3 * PSI < res.rms_before_m
    snippet = toml_snippet(res, TABLE, units_note="Hazen-Williams C", tests=int(used.sum()))
    import tomllib

    parsed = tomllib.loads(snippet)["roughness"]
    assert parsed["table"][0]["value"] == pytest.approx(TRUE_C["ci_old"], rel=0.02)
    assert parsed["table"][3]["value"] == 140.0
    assert "not informed by any flow test" in snippet


def test_local_processes_match_serial():
    field = field_tests()
    network, kind, mat, year = grid_network()
    groups = groups_from_table(kind, mat, year, TABLE)
    p = problem_for(network, field, groups.link_group)
    f = np.array([0.8, 0.9, 1.0, 1.0, 1.0])
    with TestRunner(p, workers=1) as serial:
        a = serial.run([None, f])
    with TestRunner(p, workers=2, batch_size=4) as procs:
        assert procs.mode == "processes"
        b = procs.run([None, f])
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x["residual_m"], y["residual_m"])
        np.testing.assert_array_equal(x["static_m"], y["static_m"])


def test_dask_cluster_matches_serial():
    distributed = pytest.importorskip("distributed")
    field = field_tests()
    network, kind, mat, year = grid_network()
    groups = groups_from_table(kind, mat, year, TABLE)
    p = problem_for(network, field, groups.link_group)
    f = np.array([0.8, 0.9, 1.0, 1.0, 1.0])
    with TestRunner(p, workers=1) as serial:
        a = serial.run([None, f])
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        with TestRunner(p, scheduler=cluster.scheduler_address, batch_size=5) as dask:
            assert dask.mode == "dask"
            b = dask.run([None, f])
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x["residual_m"], y["residual_m"])
        np.testing.assert_array_equal(x["static_m"], y["static_m"])


def test_bad_tests_are_problems_naming_the_test_not_crashes():
    network, kind, mat, year = grid_network()
    n = len(PAIRS)
    static = np.full(n, 50.0 * PSI)
    resid = np.full(n, 40.0 * PSI)
    resid[0] = 55.0 * PSI  # residual above static
    df = make_tests(static=static, residual=resid)
    df.loc[1, "flowing_hydrants"] = "H-J22; H-NOPE"  # a flowing hydrant not attached
    df.loc[2, "date"] = pd.Timestamp("2009-04-01")  # older than 10 years
    df.loc[3, "residual_hydrant"] = "H-GONE"
    df.loc[4, "total_flow"] = np.nan  # no flow and no outlets
    closed = network.replace(status=np.where(np.isin(network.link_id, ["P1"]), STATUS_CLOSED,
                                             network.status))
    df.loc[5, "residual_hydrant"] = "H-B2"  # behind a closed main
    hyd = pd.concat([hydrants_of(closed), pd.DataFrame({"hydrant_id": ["H-B2"],
                                                        "node_idx": closed.node_index(["B2"])})])
    tests = prepare(df, None, hyd, [AVERAGE_DAY], today=TODAY)
    p = FlowTestProblem((closed,), TIGHT, tests, np.full(closed.n_links, -1))
    table = compare(tests, simulate(p, np.arange(n)), tolerance_m=5 * PSI)
    why = dict(zip(table["test_id"], table["problem"]))
    assert why["FT-01"] == "residual pressure 55.0 psi is not below static 50.0 psi"
    assert why["FT-02"] == "flowing hydrant H-NOPE is not attached to the network"
    assert why["FT-03"] == "test older than 10 years (flow_tests.max_age_years)"
    assert why["FT-04"] == "residual hydrant H-GONE is not attached to the network"
    assert why["FT-05"].startswith("no flow")
    assert why["FT-06"].startswith("the residual hydrant's main is not supplied")
    used = table["used"].to_numpy()
    assert list(used[:6]) == [0] * 6 and used[6:].all()
    s = summarise(table)
    assert s.tests == n and s.used == n - 6


def test_pitot_outlets_and_several_flowing_hydrants():
    network, *_ = grid_network()
    df = make_tests()
    df.loc[0, "flowing_hydrants"] = "H-J12, H-J13"
    df.loc[0, "total_flow"] = np.nan
    outlets = pd.DataFrame({"test": ["FT-01", "FT-01", "FT-01"],
                            "hydrant": ["H-J12", "H-J12", "H-J13"],
                            "pitot_pressure": np.array([16.0, 10.0, 9.0]) * PSI,
                            "outlet_diameter": np.array([2.5, 2.5, 4.5]) * INCH,
                            "coefficient": [0.9, np.nan, 0.9]})
    tests = prepare(df, outlets, hydrants_of(network), [AVERAGE_DAY], coefficient=0.9,
                    today=TODAY)
    sl = slice(tests.draw_ptr[0], tests.draw_ptr[1])
    # 671.2 + 530.6 gpm at J12 and 1631.0 gpm at J13 (NFPA 291 outlet formula, worked above)
    np.testing.assert_allclose(tests.draw_m3s[sl] / GPM, [671.175 + 530.6, 1631.0], atol=0.1)
    assert list(network.node_id[tests.draw_node[sl]]) == ["J12", "J13"]
    assert tests.flow_m3s[0] / GPM == pytest.approx(2832.8, abs=0.2)


def test_demand_level_by_factor_and_scenario():
    network, *_ = grid_network()
    df = make_tests(scenario=[None, "max_day"] + [None] * (len(PAIRS) - 2),
                    demand_factor=[2.0] + [np.nan] * (len(PAIRS) - 1))
    df.loc[2, "scenario"] = "no_such"
    tests = prepare(df, None, hydrants_of(network), [AVERAGE_DAY, "max_day"], today=TODAY)
    assert tests.factor[0] == 2.0 and tests.level[0] == 0
    assert tests.level[1] == 1 and tests.factor[1] == 1.0
    assert tests.problem[2] == "scenario 'no_such' is not in the config"
