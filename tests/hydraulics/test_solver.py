"""The global gradient solver against closed forms, reference libraries and physics checks."""

from __future__ import annotations

import numpy as np
import pytest

from gridflow.errors import ConvergenceError, NetworkError, SolverError
from gridflow.hydraulics import SolveOptions, solve
from gridflow.hydraulics.headloss import hw_resistance
from gridflow.hydraulics.solver import smooth_sqrt_ramp
from gridflow.network import (
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CHECK,
    STATUS_CLOSED,
    VALVE_PRESSURE_REDUCING,
    VALVE_THROTTLE,
    fit_pump_curve,
)
from gridflow.units import FT, INCH, US_GALLON

from .netbuild import NAN, assert_physics, net, pipe
from .netbuild import root_reference as _root_reference

GPM = US_GALLON / 60
TIGHT = SolveOptions(head_tolerance=1e-9, flow_tolerance=1e-12)


# ---------------------------------------------------------------- closed forms
def test_single_pipe_hazen_williams_si_check_value():
    # Hazen-Williams SI: Q 0.1 m3/s, D 0.3 m, L 1000 m, C 130 -> h = 6.420 m
    # (10.67 / 4.87 form; computed from the published formula)
    n = net([("R", 0, 0, 100.0), ("J", 0, 0.1, None)], [pipe("P", "R", "J", 1000, 0.3, 130)])
    r = solve(n)
    assert r.headloss_m[0] == pytest.approx(6.420, abs=0.001)
    assert r.flow_m3s[0] == pytest.approx(0.1, rel=1e-9)
    assert_physics(n, r)


def test_single_pipe_hazen_williams_us_handbook_form():
    # 1000 gpm, 8 in, 1000 ft, C 120 -> 21.09 ft with the 10.44 / 4.8655 US form (computed from
    # the published form); SI and US constants differ slightly, so compare within 1 %.
    n = net([("R", 0, 0, 100.0), ("J", 0, 1000 * GPM, None)],
            [pipe("P", "R", "J", 1000 * FT, 8 * INCH, 120)])
    r = solve(n)
    assert r.headloss_m[0] / FT == pytest.approx(21.09, rel=0.01)


def test_handbook_worked_example_600_gpm():
    # 600 gpm, 8 in, 1800 ft, C 120 -> about 14.9 ft (handbook-style worked example)
    n = net([("R", 0, 0, 100.0), ("J", 0, 600 * GPM, None)],
            [pipe("P", "R", "J", 1800 * FT, 8 * INCH, 120)])
    assert solve(n).headloss_m[0] / FT == pytest.approx(14.9, rel=0.01)


def test_loss_proportional_to_length_and_diameter_power():
    # facts of the trade: doubling L doubles h; at equal flow 2/3 the diameter loses
    # (3/2)^4.87 (about 7.2) times the head (common practice, from the Hazen-Williams form)
    def loss(L, D):
        n = net([("R", 0, 0, 100.0), ("J", 0, 0.02, None)], [pipe("P", "R", "J", L, D)])
        return solve(n).headloss_m[0]

    assert loss(800, 0.2) / loss(400, 0.2) == pytest.approx(2.0, rel=1e-6)
    assert loss(400, 0.2 * 2 / 3) / loss(400, 0.2) == pytest.approx(1.5**4.87, rel=1e-6)


def test_pipes_in_series_and_parallel_closed_form():
    # series: losses add; parallel: equal head loss, flows split as r^(-1/1.852)
    r1, r2 = hw_resistance(300, 0.2, 120), hw_resistance(500, 0.15, 100)
    q = 0.03
    n = net([("R", 0, 0, 80.0), ("A", 0, 0, None), ("B", 0, q, None)],
            [pipe("1", "R", "A", 300, 0.2, 120), pipe("2", "A", "B", 500, 0.15, 100)])
    r = solve(n)
    assert 80.0 - r.head_m[2] == pytest.approx((r1 + r2) * q**1.852, rel=1e-6)
    n = net([("R", 0, 0, 80.0), ("B", 0, q, None)],
            [pipe("1", "R", "B", 300, 0.2, 120), pipe("2", "R", "B", 500, 0.15, 100)])
    r = solve(n, options=TIGHT)
    k = r1 ** (-1 / 1.852) + r2 ** (-1 / 1.852)
    h = (q / k) ** 1.852
    assert 80.0 - r.head_m[1] == pytest.approx(h, rel=1e-6)
    assert r.flow_m3s[0] == pytest.approx((h / r1) ** (1 / 1.852), rel=1e-6)
    assert_physics(n, r)


def test_fixed_head_tank_level():
    # a tank's head is its bottom elevation plus level; the solver holds it fixed
    n = net([("T", 30, 0, 30 + 6.0), ("J", 0, 0.01, None)], [pipe("P", "T", "J", 200, 0.15)])
    r = solve(n)
    assert r.head_m[0] == 36.0
    assert r.node_inflow_m3s[0] == pytest.approx(-0.01)


# ---------------------------------------------------------------- Darcy-Weisbach
def test_darcy_weisbach_against_fluids():
    fluids = pytest.importorskip("fluids")
    D, L, eps, q = 0.2, 400.0, 0.26e-3 * 0 + 1.5e-4, 0.04
    n = net([("R", 0, 0, 100.0), ("J", 0, q, None)], [pipe("P", "R", "J", L, D, eps)],
            headloss_model="darcy-weisbach")
    r = solve(n)
    v = q / (np.pi * D**2 / 4)
    re = v * D / 1.004e-6
    f = fluids.friction.Colebrook(re, eps / D)
    assert r.headloss_m[0] == pytest.approx(f * L / D * v**2 / (2 * 9.80665), rel=1e-6)
    assert_physics(n, r)


def test_darcy_laminar_range():
    # laminar: f = 64/Re, so h = 128 nu L Q / (pi g D^4) (Hagen-Poiseuille)
    D, L, q = 0.05, 100.0, 1e-5
    n = net([("R", 0, 0, 10.0), ("J", 0, q, None)], [pipe("P", "R", "J", L, D, 1e-4)],
            headloss_model="darcy-weisbach")
    r = solve(n)
    assert r.headloss_m[0] == pytest.approx(128 * 1.004e-6 * L * q / (np.pi * 9.80665 * D**4),
                                            rel=1e-6)


def test_minor_loss_exit_k_one():
    # exit to a reservoir: K = 1.0 (any text; fluids.fittings.exit_normal)
    fluids = pytest.importorskip("fluids")
    k = fluids.fittings.exit_normal()
    D, q = 0.1, 0.01
    n = net([("A", 0, 0, 50.0), ("B", 0, 0, 49.0)],
            [{"id": "V", "fr": "A", "to": "B", "link_kind": LINK_VALVE, "diameter_m": D,
              "minor_k": k, "valve_type": 1}])
    r = solve(n)
    v = r.flow_m3s[0] / (np.pi * D**2 / 4)
    assert k * v**2 / (2 * 9.80665) == pytest.approx(1.0, rel=1e-6)
    assert q < r.flow_m3s[0]


def test_sudden_expansion_k_borda_carnot():
    # sudden expansion on the upstream velocity: K = (1 - A1/A2)^2 (Borda-Carnot;
    # fluids.fittings.diffuser_sharp)
    fluids = pytest.importorskip("fluids")
    d1, d2 = 0.1, 0.2
    k = fluids.fittings.diffuser_sharp(Di1=d1, Di2=d2)
    assert k == pytest.approx((1 - (d1 / d2) ** 2) ** 2, rel=1e-9)
    n = net([("R", 0, 0, 20.0), ("J", 0, 0.01, None)],
            [pipe("P", "R", "J", 50, d1, 130, minor_k=k)])
    r = solve(n)
    hf = hw_resistance(50, d1, 130) * 0.01**1.852
    v = 0.01 / (np.pi * d1**2 / 4)
    assert r.headloss_m[0] == pytest.approx(hf + k * v**2 / (2 * 9.80665), rel=1e-5)


# ---------------------------------------------------------------- pumps
def _pump(a, b, c, **kw):
    return {"id": "PU", "fr": "W", "to": "A", "link_kind": LINK_PUMP, "pump_h0": a,
            "pump_h1": b, "pump_h2": c, **kw}


def test_pump_curve_one_point_needs_a_shut_off_head():
    # one design point and a shut-off head: H = h0 - (h0 - h_d) (q / q_d)^2, flat at shut-off
    h0, h1, h2 = fit_pump_curve([(0.05, 40.0)], shutoff_head_m=50.0)
    assert (h0, h1) == (50.0, 0.0)
    assert h0 + h2 * 0.05**2 == pytest.approx(40.0, rel=1e-12)
    with pytest.raises(NetworkError, match="shut-off head"):
        fit_pump_curve([(0.05, 40.0)], link_id="PU1")
    with pytest.raises(NetworkError, match="shut-off head"):
        fit_pump_curve([(0.05, 40.0)], shutoff_head_m=39.0)


def test_pump_curve_three_points_exact():
    pts = [(0.0, 60.0), (0.04, 50.0), (0.08, 30.0)]
    c = fit_pump_curve(pts)
    for q, h in pts:  # the quadratic passes through every given point
        assert c.head(q) == pytest.approx(h, abs=1e-9)
    # cross-check by numpy's least squares on the same three points (exact for a quadratic)
    ref = np.polyfit([q for q, _ in pts], [h for _, h in pts], 2)
    assert (c[2], c[1], c[0]) == pytest.approx(tuple(ref), rel=1e-9)
    c2 = fit_pump_curve([(0.01, 58.0), (0.04, 50.0), (0.08, 30.0)])  # none at shut-off
    assert c2.head(0.01) == pytest.approx(58.0) and c2.head(0.08) == pytest.approx(30.0)


def test_pump_operating_point():
    a, b, c = fit_pump_curve([(0.05, 40.0)], shutoff_head_m=52.0)
    n = net([("W", 0, 0, 10.0), ("A", 0, 0, None), ("T", 40, 0, 45.0)],
            [_pump(a, b, c), pipe("P", "A", "T", 1000, 0.2)])
    r = solve(n)
    q = r.flow_m3s[0]
    # operating point: pump gain = static lift + pipe loss
    assert a + b * q + c * q * q == pytest.approx(
        35.0 + hw_resistance(1000, 0.2, 120) * q**1.852, abs=1e-4)
    assert_physics(n, r)


def test_pump_speed_affinity_and_off():
    a, b, c = fit_pump_curve([(0, 60.0), (0.04, 50.0), (0.08, 30.0)])
    base = [("W", 0, 0, 0.0), ("A", 0, 0, None), ("T", 0, 0, 20.0)]

    def links(speed):
        return [_pump(a, b, c, pump_speed=speed), pipe("P", "A", "T", 500, 0.25)]

    r1 = solve(net(base, links(1.0)))
    r9 = solve(net(base, links(0.9)))
    assert r9.flow_m3s[0] < r1.flow_m3s[0]
    q = r9.flow_m3s[0]
    # affinity laws: H_s(q) = s^2 H(q / s)
    assert -r9.headloss_m[0] == pytest.approx(0.81 * (a + b * (q / 0.9) + c * (q / 0.9) ** 2),
                                              abs=1e-4)
    r0 = solve(net(base, links(0.0)))
    assert r0.flow_m3s[0] == 0 and r0.link_state[0] == 1


def test_pump_that_cannot_lift_closes():
    a, b, c = fit_pump_curve([(0.02, 20.0)], shutoff_head_m=26.0)  # tank 40 m above
    n = net([("W", 0, 0, 0.0), ("A", 0, 0.0, None), ("T", 0, 0, 40.0)],
            [_pump(a, b, c), pipe("P", "A", "T", 100, 0.2)])
    r = solve(n)
    assert r.link_state[0] == 1 and r.flow_m3s[0] == 0
    assert r.head_m[1] == pytest.approx(40.0, abs=1e-6)


def test_rising_pump_curve_is_an_error():
    with pytest.raises(NetworkError, match="must fall"):
        fit_pump_curve([(0, 30.0), (0.02, 35.0), (0.04, 20.0)], link_id="PU7")
    with pytest.raises(NetworkError, match="does not fall"):  # a hump: rises from shut-off
        fit_pump_curve([(0, 30.0), (0.02, 29.9), (0.04, 20.0)], link_id="PU8")


# ---------------------------------------------------------------- valves
def test_check_valve_blocks_reverse_flow():
    # two reservoirs, the check valve pipe points from low to high: no flow
    n = net([("L", 0, 0, 10.0), ("J", 0, 0.0, None), ("H", 0, 0, 30.0)],
            [pipe("CV", "L", "J", 100, 0.2, status=STATUS_CHECK), pipe("P", "H", "J", 100, 0.2)])
    r = solve(n)
    assert r.link_state[0] == 1 and r.flow_m3s[0] == 0
    assert r.head_m[1] == pytest.approx(30.0)
    # reversed orientation: flows
    n = net([("L", 0, 0, 10.0), ("J", 0, 0.0, None), ("H", 0, 0, 30.0)],
            [pipe("CV", "J", "L", 100, 0.2, status=STATUS_CHECK), pipe("P", "H", "J", 100, 0.2)])
    r = solve(n)
    assert r.link_state[0] == 0 and r.flow_m3s[0] > 0
    assert_physics(n, r)


def test_closed_valve_and_unsupplied_part():
    n = net([("R", 0, 0, 50.0), ("A", 0, 0.01, None), ("B", 0, 0.01, None),
             ("C", 0, 0.01, None)],
            [pipe("1", "R", "A", 100, 0.2), pipe("2", "A", "B", 100, 0.2, status=STATUS_CLOSED),
             pipe("3", "B", "C", 100, 0.2)])
    r = solve(n)
    assert list(r.supplied) == [True, True, False, False]
    assert np.isnan(r.head_m[2:]).all() and np.all(np.isfinite(r.flow_m3s))
    assert r.demand_m3s[2] == 0 and r.flow_m3s[0] == pytest.approx(0.01)
    assert_physics(n, r)


def _prv_net(h_source, setting, demand=0.02):
    return net([("R", 0, 0, h_source), ("U", 10, 0, None), ("D", 0, 0, None),
                ("J", 0, demand, None)],
               [pipe("1", "R", "U", 500, 0.2),
                {"id": "PRV", "fr": "U", "to": "D", "link_kind": LINK_VALVE, "diameter_m": 0.2,
                 "valve_type": VALVE_PRESSURE_REDUCING, "valve_setting": setting, "minor_k": 0.5},
                pipe("2", "D", "J", 300, 0.15)])


def test_prv_active_holds_its_setting():
    n = _prv_net(100.0, 30.0)
    r = solve(n)
    assert r.link_state[1] == 2
    assert r.pressure_m[2] == pytest.approx(30.0, abs=1e-9)
    assert r.flow_m3s[1] == pytest.approx(0.02, rel=1e-9)
    assert_physics(n, r)


def test_prv_opens_when_upstream_cannot_hold_setting():
    n = _prv_net(40.0, 60.0)
    r = solve(n)
    assert r.link_state[1] == 0
    assert r.pressure_m[2] < 60.0
    assert_physics(n, r)


def test_prv_closes_against_reverse_flow():
    # downstream fed by a higher reservoir: the PRV must not pass flow backwards
    n = net([("R", 0, 0, 60.0), ("U", 0, 0, None), ("D", 0, 0.0, None), ("H", 0, 0, 90.0)],
            [pipe("1", "R", "U", 500, 0.2),
             {"id": "PRV", "fr": "U", "to": "D", "link_kind": LINK_VALVE, "diameter_m": 0.2,
              "valve_type": VALVE_PRESSURE_REDUCING, "valve_setting": 40.0},
             pipe("2", "H", "D", 300, 0.15)])
    r = solve(n)
    assert r.link_state[1] == 1 and r.flow_m3s[1] == 0
    assert r.head_m[2] == pytest.approx(90.0)


def test_throttle_valve_fixed_k():
    k, D = 12.0, 0.15
    n = net([("A", 0, 0, 30.0), ("B", 0, 0, 25.0)],
            [{"id": "TV", "fr": "A", "to": "B", "link_kind": LINK_VALVE, "diameter_m": D,
              "valve_type": VALVE_THROTTLE, "valve_setting": k}])
    r = solve(n, options=TIGHT)
    v = r.flow_m3s[0] / (np.pi * D**2 / 4)
    assert k * v**2 / (2 * 9.80665) == pytest.approx(5.0, rel=1e-6)


# ---------------------------------------------------------------- pressure-driven demand
def test_wagner_check_values():
    # Wagner, Shamir and Marks (1988): p_min 0, p_req 20 m: p 5 m -> 0.5, p 10 m -> 0.7071
    f, _ = smooth_sqrt_ramp(np.array([5 / 20, 10 / 20, 1.2, -0.1]))
    assert f == pytest.approx([0.5, 0.70710678, 1.0, 0.0], abs=1e-8)


def test_pressure_driven_demand_delivers_less_at_low_pressure():
    opts = SolveOptions(pressure_driven=True, pdd_min_pressure=0.0, pdd_required_pressure=20.0)
    n = net([("R", 0, 0, 30.0), ("J", 0, 0.05, None)], [pipe("P", "R", "J", 2000, 0.15)])
    r = solve(n, options=opts)
    p, q = r.pressure_m[1], r.demand_m3s[1]
    assert 0 < p < 20
    assert q == pytest.approx(0.05 * np.sqrt(p / 20), rel=1e-6)
    assert_physics(n, r)
    # demand-driven in the same network gives negative pressure
    assert solve(n).pressure_m[1] < 0


# ---------------------------------------------------------------- robustness
def test_symmetric_network_zero_flow_link_converges_tightly():
    # a rung between two identical branches carries exactly zero flow
    n = net([("R", 0, 0, 50.0), ("A", 0, 0.01, None), ("B", 0, 0.01, None)],
            [pipe("1", "R", "A", 100, 0.2), pipe("2", "R", "B", 100, 0.2),
             pipe("rung", "A", "B", 50, 0.1)])
    r = solve(n, options=SolveOptions(head_tolerance=1e-9, flow_tolerance=1e-12))
    assert abs(r.flow_m3s[2]) < 1e-9
    assert r.iterations < 20
    assert_physics(n, r, mass_tol=1e-12, head_tol=1e-8)


def test_no_fixed_head_is_an_error():
    n = net([("A", 0, 0.01, None), ("B", 0, 0.0, None)], [pipe("1", "A", "B", 100, 0.2)])
    with pytest.raises(SolverError, match="no source or tank"):
        solve(n)


@pytest.mark.parametrize("field,value,match", [
    ("diameter_m", 0.0, "diameter_m"), ("diameter_m", -0.2, "diameter_m"),
    ("length_m", 0.0, "length_m"), ("roughness", NAN, "roughness"),
])
def test_bad_link_values_name_the_link(field, value, match):
    kw = {"length_m": 100.0, "diameter_m": 0.2, "roughness": 120.0, field: value}
    with pytest.raises(NetworkError, match=match) as err:
        net([("R", 0, 0, 50.0), ("A", 0, 0.01, None)],
            [{"id": "MAIN-77", "fr": "R", "to": "A", **kw}])
    assert err.value.link_id == "MAIN-77"


def test_nonconvergence_names_worst_node_and_link():
    n = net([("R", 0, 0, 50.0), ("A", 0, 0.01, None), ("B", 0, 0.02, None)],
            [pipe("1", "R", "A", 100, 0.2), pipe("2", "A", "B", 100, 0.1)])
    with pytest.raises(ConvergenceError, match="did not converge") as err:
        solve(n, options=SolveOptions(max_iter=1))
    assert err.value.node_id in {"A", "B"} and err.value.link_id in {"1", "2"}


# ---------------------------------------------------------------- against a root finder
def test_against_scipy_root_with_pump_check_valve_and_prv():
    a, b, c = fit_pump_curve([(0.03, 45.0)], shutoff_head_m=56.0)
    n = net([("W", 0, 0, 20.0), ("A", 5, 0.004, None), ("B", 12, 0.006, None),
             ("C", 8, 0.005, None), ("T", 50, 0, 58.0), ("U", 3, 0.0, None),
             ("D", -5, 0.0, None), ("E", -8, 0.007, None)],
            [{"id": "PU", "fr": "W", "to": "A", "link_kind": LINK_PUMP, "pump_h0": a, "pump_h1": b,
              "pump_h2": c},
             pipe("1", "A", "B", 400, 0.2), pipe("2", "B", "C", 300, 0.15),
             pipe("3", "A", "C", 500, 0.15), pipe("4", "C", "T", 600, 0.2, status=STATUS_CHECK),
             pipe("5", "T", "B", 800, 0.2), pipe("6", "C", "U", 200, 0.15),
             {"id": "PRV", "fr": "U", "to": "D", "link_kind": LINK_VALVE, "diameter_m": 0.15,
              "valve_type": VALVE_PRESSURE_REDUCING, "valve_setting": 35.0},
             pipe("7", "D", "E", 300, 0.1)])
    r = solve(n, options=SolveOptions(head_tolerance=1e-8, flow_tolerance=1e-10))
    assert_physics(n, r, mass_tol=1e-9, head_tol=1e-6)
    q_ref, h_ref, fi = _root_reference(n, r)
    assert r.flow_m3s == pytest.approx(q_ref, abs=1e-6)
    assert r.head_m[fi] == pytest.approx(h_ref, abs=1e-5)


def test_scenarios_share_one_symbolic_analysis():
    # a second scenario of the same network reuses the pattern and gives the same answer as a
    # fresh system
    from gridflow.hydraulics import HydraulicSystem

    n = net([("R", 0, 0, 50.0), ("A", 0, 0.01, None), ("B", 0, 0.02, None)],
            [pipe("1", "R", "A", 100, 0.2), pipe("2", "A", "B", 100, 0.1),
             pipe("3", "R", "B", 300, 0.15)])
    s1 = HydraulicSystem(n)
    s1.solve()
    n2 = n.replace(demand_m3s=n.demand_m3s * 2.5)
    s2 = HydraulicSystem(n2, share=s1)
    assert s2.pattern is s1.pattern
    r_shared = s2.solve(raise_on_failure=True)
    r_fresh = HydraulicSystem(n2).solve()
    np.testing.assert_allclose(r_shared.head_m, r_fresh.head_m, atol=1e-9)
    assert_physics(n2, r_shared)


def test_replaced_ids_are_checked_again():
    """A copy with new ids is checked for repeats; a copy sharing the ids (a scenario's new
    demand) is not checked again, and its other arrays still are."""
    import numpy as np

    n = net([("R", 0, 0, 50.0), ("A", 0, 0.01, None), ("B", 0, 0.02, None)],
            [pipe("1", "R", "A", 100, 0.2), pipe("2", "A", "B", 100, 0.1)])
    with pytest.raises(NetworkError, match="node id 'A' is used 2 times"):
        n.replace(node_id=np.array(["R", "A", "A"], dtype=object))
    with pytest.raises(NetworkError, match="link id '1' is used 2 times"):
        n.replace(link_id=np.array(["1", "1"], dtype=object))
    assert n.replace(demand_m3s=np.array([0.0, 0.02, 0.04])).node_id is n.node_id
    with pytest.raises(NetworkError, match="diameter_m"):
        n.replace(diameter_m=np.array([0.2, -0.1]))


def test_fixed_pattern_matches_a_plain_unique():
    """The head matrix's pattern (entries, each input entry's position, whether two links
    share an entry) equals one worked out by ``np.unique`` over the same entries."""
    from gridflow.hydraulics.sparse import FixedPatternSPD, _unique_inverse

    rng = np.random.default_rng(4)
    for n, m, parallel in ((50, 120, True), (400, 300, False), (1, 0, False)):
        rows = rng.integers(0, n, size=m)
        cols = (rows + rng.integers(1, n, size=m)) % n if n > 1 else rows
        if not parallel:  # drop repeated node pairs
            keep = np.unique(np.minimum(rows, cols) * n + np.maximum(rows, cols),
                             return_index=True)[1]
            rows, cols = rows[np.sort(keep)], cols[np.sort(keep)]
        pat = FixedPatternSPD(n, rows, cols)
        lo, hi = np.minimum(rows, cols), np.maximum(rows, cols)
        key = np.r_[np.arange(n) * n + np.arange(n), hi * n + lo]
        uniq, inverse = np.unique(key, return_inverse=True)
        np.testing.assert_array_equal(pat.indices, uniq % n)
        np.testing.assert_array_equal(pat.diag_pos, inverse[:n])
        np.testing.assert_array_equal(pat.off_pos, inverse[n:])
        assert pat.unique_off == (len(np.unique(inverse[n:])) == len(inverse[n:]))
        assert pat.unique_off != parallel or m == 0
        u2, i2 = _unique_inverse(key[::-1].copy())
        ref_u, ref_i = np.unique(key[::-1], return_inverse=True)
        np.testing.assert_array_equal(u2, ref_u)
        np.testing.assert_array_equal(i2, ref_i)


def test_head_matrix_with_known_free_ends_is_the_same():
    """The head matrix from the ends' freedom worked out once equals the one worked out from
    the known nodes on each call, bit for bit (the Newton iterations reuse it)."""
    from gridflow.hydraulics.assembly import head_matrix
    from gridflow.hydraulics.sparse import FixedPatternSPD

    rng = np.random.default_rng(8)
    n, m = 300, 700
    fr, to = rng.integers(0, n, m), rng.integers(0, n, m)
    keep = fr != to
    fr, to = fr[keep], to[keep]
    pat = FixedPatternSPD(n, fr, to)
    w = rng.uniform(0.0, 5.0, len(fr)) * (rng.random(len(fr)) < 0.9)
    known = rng.random(n) < 0.2
    free = ~known
    plain = head_matrix(pat, fr, to, w, known)
    reused = head_matrix(pat, fr, to, w, known, free_ends=(free[fr], free[to]))
    assert plain.tobytes() == reused.tobytes()
    assert np.all(plain[pat.diag_pos][known] == 1.0)
