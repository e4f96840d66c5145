"""The draw solver (one extra draw near a base state) against the full Newton solve.

Every solution is checked for mass balance at the nodes and head loss on the links with the
independent formulas of ``netbuild.assert_physics``, and compared with
:meth:`HydraulicSystem.solve` on the same problem.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from gridflow.hydraulics import DrawSolver, HydraulicSystem, SolveOptions
from gridflow.hydraulics.headloss import hw_resistance
from gridflow.hydraulics.reduced import ReducedDrawSolver
from gridflow.network import STATUS_CHECK

from .netbuild import (
    assert_held,
    assert_physics,
    net,
    pin_then_hold,
    pipe,
    stringy_network,
    with_draw,
)
from .test_properties import random_network

TIGHT = SolveOptions(head_tolerance=1e-9, flow_tolerance=1e-9)


#: the two draw solvers, each on networks that exercise it: the whole-network one on random
#: looped networks, the reduced one on street-like networks (chains, dead ends, links drawn
#: against the chain); the reduced one must answer without handing a solve over
SOLVERS = {"whole": (random_network, DrawSolver), "reduced": (stringy_network, ReducedDrawSolver)}


def setup(seed, n, options=TIGHT, kind="whole"):
    make, solver = SOLVERS[kind]
    network = make(seed, n)
    system = HydraulicSystem(network, options)
    base = system.solve(raise_on_failure=False)
    # the tight reference tolerances are out of reach on a few networks with (nearly) zero
    # flow in a wide pipe (the plain iteration chatters there): compare where it converged
    assume(base.converged)
    return network, system, base, solver(system, base)


def handed_over(ds) -> int:
    """Solves the reduced solver handed to the whole-network one (0 for that one itself)."""
    return int(getattr(ds, "fallbacks", 0))


def test_single_pipe_pinned_closed_form():
    # Q = ((H_res - H_pin) / r)^(1/1.852), Hazen-Williams r (physics spec)
    n = net([("R", 0, 0, 100.0), ("H", 10.0, 0.001, None)], [pipe("P", "R", "H", 1000, 0.2, 120)])
    system = HydraulicSystem(n, TIGHT)
    ds = DrawSolver(system, system.solve())
    r = ds.solve(1, "head", 60.0).result
    q = (40.0 / float(hw_resistance(1000, 0.2, 120))) ** (1 / 1.852)
    # the draw excludes the node's own demand of 1 L/s
    assert r.extra["draw_m3s"] == pytest.approx(q - 0.001, rel=1e-7)
    assert r.node_inflow_m3s[1] - r.demand_m3s[1] == pytest.approx(q - 0.001, rel=1e-7)
    assert r.head_m[1] == pytest.approx(60.0, abs=1e-9)
    # a given draw gives back the pinned head
    rd = ds.solve(1, "draw", q - 0.001).result
    assert rd.head_m[1] == pytest.approx(60.0, abs=1e-6)


@pytest.mark.parametrize("kind", list(SOLVERS))
@settings(max_examples=25, deadline=None, derandomize=True, database=None)
@given(seed=st.integers(0, 10**6), n=st.integers(3, 35), pick=st.integers(0, 10**6),
       frac=st.floats(0.05, 0.8))
def test_pinned_draw_matches_full_newton_and_conserves(kind, seed, n, pick, frac):
    network, system, base, ds = setup(seed, n, kind=kind)
    free = np.flatnonzero(~network.is_fixed)
    k = int(free[pick % len(free)])
    head = base.head_m[k] - frac * (base.head_m[k] - network.elevation_m[k] + 5.0)
    full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                        raise_on_failure=False)
    assume(full.converged)
    out = ds.solve(k, "head", head)
    assert out.success and out.status == 0, out.message
    assert handed_over(ds) == 0
    r = out.result
    assert r is not None and r.converged
    np.testing.assert_allclose(r.head_m, full.head_m, atol=1e-6)
    np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-7)
    draw = r.extra["draw_m3s"]
    assert draw == pytest.approx(full.node_inflow_m3s[k] - full.demand_m3s[k], rel=1e-6, abs=1e-10)
    assert_physics(network, with_draw(r, k, draw), mass_tol=1e-8, head_tol=1e-6)
    # whole network: supply from the fixed heads = all demand plus the draw
    supply = -r.node_inflow_m3s[network.is_fixed].sum()
    assert supply == pytest.approx(network.demand_m3s.sum() + draw, rel=1e-7, abs=1e-10)


@pytest.mark.parametrize("kind", list(SOLVERS))
@settings(max_examples=20, deadline=None, derandomize=True, database=None)
@given(seed=st.integers(0, 10**6), n=st.integers(3, 35), pick=st.integers(0, 10**6),
       q=st.floats(0.001, 0.05))
def test_given_draw_matches_full_newton_with_demand(kind, seed, n, pick, q):
    network, system, base, ds = setup(seed, n, kind=kind)
    free = np.flatnonzero(~network.is_fixed)
    k = int(free[pick % len(free)])
    demand = network.demand_m3s.copy()
    demand[k] += q
    full = system.solve(demand_m3s=demand, warm=base, raise_on_failure=False)
    assume(full.converged)
    out = ds.solve(k, "draw", q)
    assert out.success, out.message
    assert handed_over(ds) == 0
    r = out.result
    assert r is not None
    np.testing.assert_allclose(r.head_m, full.head_m, atol=1e-6)
    np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-7)
    assert_physics(network, with_draw(r, k, q), mass_tol=1e-8, head_tol=1e-6)
    # from another result of the same node (its kept factorization, blended start)
    r2 = ds.solve(k, "draw", q, start=ds.blend(r, 0.5)).result
    np.testing.assert_allclose(r2.head_m, full.head_m, atol=1e-6)


@pytest.mark.parametrize("kind", list(SOLVERS))
@settings(max_examples=20, deadline=None, derandomize=True, database=None)
@given(seed=st.integers(0, 10**6), n=st.integers(4, 35), pick=st.integers(0, 10**6),
       frac=st.floats(0.1, 0.7))
def test_limit_node_recovers_the_pinned_solution(kind, seed, n, pick, frac):
    # pin k, read another node c's head; holding c at that head must give back the same draw
    network, system, base, ds = setup(seed, n, kind=kind)
    case = pin_then_hold(network, system, base, pick, frac)
    assume(case is not None)
    k, c, head, full = case
    # the reduced solver from a blend of its pinned solution (as a fire-flow search holds)
    start = ds.blend(ds.solve(k, "head", head).result, 0.7) if kind == "reduced" else None
    out = ds.solve(k, "limit", full.head_m[c], limit_node=c, start=start)
    assert out.success and out.result is not None, out.message
    assert_held(network, out.result, k, c, head, full)


def test_declines_what_it_cannot_answer():
    # tank T (95 m) feeds B through a check valve, closed at the base state (B is higher);
    # a large draw at B opens it: a status change, so the draw solver reports status 4 and the
    # full solve (with status changes) answers
    n = net([("R", 0, 0, 100.0), ("T", 0, 0, 95.0), ("A", 0, 0.002, None),
             ("B", 0, 0.002, None)],
            [pipe("1", "R", "A", 500, 0.2), pipe("2", "T", "B", 500, 0.1, status=STATUS_CHECK),
             pipe("3", "A", "B", 300, 0.15)])
    system = HydraulicSystem(n, TIGHT)
    base = system.solve()
    assert base.link_state[1] == 1  # closed
    ds = DrawSolver(system, base)
    assert ds.solve(0, "head", 50.0).status == 2  # a fixed-head node
    out = ds.solve(3, "head", 60.0)
    assert not out.success and out.status == 4 and out.result is None
    full = system.solve(pin_idx=np.array([3]), pin_head_m=np.array([60.0]), warm=base)
    assert full.link_state[1] == 0 and full.flow_m3s[1] > 0
    # a small draw keeps the valve closed: answered, and it conserves mass and energy
    r = ds.solve(3, "head", 97.0).result
    assert r is not None and r.link_state[1] == 1
    assert_physics(n, with_draw(r, 3, r.extra["draw_m3s"]), mass_tol=1e-8, head_tol=1e-6)
    # pressure-driven demand is not this solver's case
    pdd = HydraulicSystem(n, dataclasses.replace(TIGHT, pressure_driven=True))
    assert DrawSolver(pdd, pdd.solve()).solve(3, "head", 97.0).status == 1


def test_mode_is_explicit():
    n = net([("R", 0, 0, 100.0), ("H", 10.0, 0.001, None)], [pipe("P", "R", "H", 1000, 0.2, 120)])
    system = HydraulicSystem(n, TIGHT)
    ds = DrawSolver(system, system.solve())
    with pytest.raises(ValueError, match="mode"):
        ds.solve(1, "pressure", 60.0)
    with pytest.raises(ValueError, match="limit_node"):
        ds.solve(1, "head", 60.0, limit_node=0)
    with pytest.raises(ValueError, match="limit_node"):
        ds.solve(1, "limit", 60.0)


# ---------------------------------------------------------------------- the fused law
def test_fused_law_matches_the_published_formulas():
    """The draw solver's one-pass law for Hazen-Williams pipes with minor losses against the
    plain published formulas: Hazen-Williams in SI, h = 10.67 L Q^1.852 / (C^1.852 D^4.87)
    (any hydraulics handbook; from memory), and the minor loss h = K v^2 / (2 g)."""
    from gridflow.hydraulics.headloss import EPS_FLOW

    rng = np.random.default_rng(3)
    n = 200
    length = 10 + 500 * rng.random(n)
    d = rng.choice([0.1016, 0.1524, 0.2032, 0.3048], n)
    c = rng.uniform(80, 150, n)
    k = np.where(rng.random(n) < 0.5, rng.uniform(0.5, 6.0, n), 0.0)
    q = rng.normal(0, 0.05, n)
    q[np.abs(q) < 1e-3] = 2e-3  # far above the regularisation flow
    r = 10.67 * length / (c**1.852 * d**4.87)
    area = np.pi * d * d / 4
    m = k / (2 * 9.80665 * area**2)
    h, g = DrawSolver._fused_law(q, r, m)
    want = r * np.sign(q) * np.abs(q) ** 1.852 + k * (q / area) * np.abs(q / area) / (2 * 9.80665)
    # the regularisation (eps^2 / q^2 <= 1e-8 here) is the only difference
    np.testing.assert_allclose(h, want, rtol=1e-7)
    # derivative: d/dq (r q|q|^0.852 + m q|q|) = 1.852 r |q|^0.852 + 2 m |q|
    dwant = 1.852 * r * np.abs(q) ** 0.852 + 2 * m * np.abs(q)
    np.testing.assert_allclose(g, dwant, rtol=1e-7)
    # without minor losses, and at zero flow the regularised slope (floored, finite)
    h0, g0 = DrawSolver._fused_law(np.zeros(n), r, None)
    assert np.all(h0 == 0) and np.all(np.isfinite(g0)) and np.all(g0 > 0)
    assert EPS_FLOW < 1e-5


@settings(max_examples=20, deadline=None, derandomize=True, database=None)
@given(seed=st.integers(0, 10**6), n=st.integers(3, 35), pick=st.integers(0, 10**6),
       frac=st.floats(0.05, 0.8))
def test_pinned_draw_with_minor_losses_matches_full_newton(seed, n, pick, frac):
    """Random seeded networks with minor losses on about half the pipes (the fused law's
    second term): the pinned draw equals full Newton, with mass and head-loss checks by the
    plain formulas."""
    network = random_network(seed, n)
    rng = np.random.default_rng(seed + 1)
    kk = np.where(rng.random(network.n_links) < 0.5, rng.uniform(0.2, 10.0, network.n_links),
                  0.0)
    kk[0] = 2.0
    network = network.replace(minor_k=kk)
    system = HydraulicSystem(network, TIGHT)
    base = system.solve(raise_on_failure=False)
    assume(base.converged)
    ds = DrawSolver(system, base)
    assert ds._fused and ds._m is not None
    free = np.flatnonzero(~network.is_fixed)
    k = int(free[pick % len(free)])
    head = base.head_m[k] - frac * (base.head_m[k] - network.elevation_m[k] + 5.0)
    full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                        raise_on_failure=False)
    assume(full.converged)
    out = ds.solve(k, "head", head)
    assert out.success, out.message
    r = out.result
    np.testing.assert_allclose(r.head_m, full.head_m, atol=1e-6)
    np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-7)
    draw = r.extra["draw_m3s"]
    assert_physics(network, with_draw(r, k, draw), mass_tol=1e-8, head_tol=1e-6)
    supply = -r.node_inflow_m3s[network.is_fixed].sum()
    assert supply == pytest.approx(network.demand_m3s.sum() + draw, rel=1e-7, abs=1e-10)
