"""Draw solves on the reduced network (trees pruned, chains and groups merged) against full
Newton solves of the whole network.

Every solution is rebuilt onto the network and checked for mass balance at every node and head
loss on every link with the independent formulas of ``netbuild.assert_physics``; heads, flows
and draws are compared with :meth:`HydraulicSystem.solve` on the same problem.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume

from gridflow.hydraulics import HydraulicSystem, SolveOptions
from gridflow.hydraulics.reduced import ReducedDrawSolver, Reduction

from .netbuild import assert_physics, stringy_network, with_draw

TIGHT = SolveOptions(head_tolerance=1e-9, flow_tolerance=1e-9)


def solved(seeds, n):
    """``(seed, network, system, base)`` of the stringy networks of ``seeds`` whose base
    state converges (at the tight tolerances)."""
    for seed in seeds:
        network = stringy_network(seed, n)
        system = HydraulicSystem(network, TIGHT)
        base = system.solve(raise_on_failure=False)
        if base.converged:
            yield seed, network, system, base


def setup(seed, n):
    network = stringy_network(seed, n)
    system = HydraulicSystem(network, TIGHT)
    base = system.solve(raise_on_failure=False)
    assume(base.converged)
    rs = ReducedDrawSolver(system, base)
    assert rs.usable, rs.why_not
    return network, system, base, rs


def test_reduction_of_a_hand_counted_network():
    # source S feeds a loop S-a-b-c-S cut into pieces; a dead end d1-d2 hangs on b; node c is
    # a tee to a second loop c-e-f-c (from c back to c through two-link nodes)
    #   nodes: S0 a1 p2 b3 c4 q5 d6 d7 e8 f9
    links = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5), (5, 0),  # big loop, pieces
             (3, 6), (6, 7),                                  # dead end on b
             (4, 8), (8, 9), (9, 4)]                          # loop from c back to c
    F, T = np.array(links).T
    dirichlet = np.zeros(10, bool)
    dirichlet[0] = True
    load = np.zeros(10)
    load[[2, 6, 7, 8]] = [1.0, 2.0, 3.0, 4.0]
    keep = np.zeros(10, bool)
    red = Reduction(F, T, np.ones(len(F), bool), dirichlet, load, keep)
    # the dead end is a tree: its two links, demand 5 beyond b
    assert sorted(red.tree_links.tolist()) == [6, 7]
    assert red.acc[3] == pytest.approx(5.0)
    # core: S (fixed) and c (four links); b has the tree, so two links left: inside a chain
    assert sorted(red.core_nodes.tolist()) == [0, 4]
    # chains: S..c through a, p, b (loads 0, 1, 5); c..S through q; c..c through e, f
    assert red.n_chains == 3
    tot = sorted(np.round(red.tot, 9).tolist())
    assert tot == [0.0, 4.0, 6.0]
    # groups: S-a-p one group (a has no load), p-b, b-c; c-q-S one group; c-e, e-f-c
    assert len(red.group_chain) == 6


def test_hands_over_what_it_does_not_hold():
    # a node held in the draw's own chain or tree (its head moves with the draw in a way the
    # reduced solve does not carry) goes to the whole-network draw solver, counted, with its
    # answer; a Darcy-Weisbach network is not reduced at all
    from gridflow.hydraulics import DrawSolver

    handed = 0
    for _seed, network, system, base in solved(range(30), 12):
        rs = ReducedDrawSolver(system, base)
        free = np.flatnonzero(~network.is_fixed)
        k = int(free[-1])
        ent = rs._entry(k)
        pinned = rs.solve(k, "head", base.head_m[k] - 3.0)
        if ent is None or not pinned.success:
            continue
        for c in free:
            if c == k or rs._probe(int(c), ent) is not None:
                continue
            target = float(pinned.result.head_m[c])
            if base.head_m[c] - target < 1e-3:
                continue
            n0 = rs.fallbacks
            got = rs.solve(k, "limit", target, limit_node=int(c))
            want = DrawSolver(system, base).solve(k, "limit", target, limit_node=int(c))
            assert rs.fallbacks == n0 + 1
            assert got.success == want.success
            if want.success:
                assert got.draw_m3s == pytest.approx(want.draw_m3s, rel=1e-9, abs=1e-12)
                handed += 1
    assert handed >= 5
    dw = stringy_network(3, 10).replace(headloss_model="darcy-weisbach")
    system = HydraulicSystem(dw, TIGHT)
    rs = ReducedDrawSolver(system, system.solve())
    assert not rs.usable and "Darcy-Weisbach" in rs.why_not


def test_limit_on_nodes_of_every_kind_without_falling_back():
    # held nodes at a core node, inside another chain, on a tree elsewhere: all answered on
    # the reduced network, and each equals the whole-network draw solver
    from gridflow.hydraulics import DrawSolver

    seen = set()
    for _seed, network, system, base in solved(range(40), 14):
        rs = ReducedDrawSolver(system, base)
        ds = DrawSolver(system, base)
        red = rs.red
        free = np.flatnonzero(~network.is_fixed)
        k = int(free[-1])
        head = base.head_m[k] - 0.4 * (base.head_m[k] - network.elevation_m[k] + 5.0)
        pinned = rs.solve(k, "head", head)
        if not pinned.success:
            continue
        ent = rs._entry(k)
        for c in free:
            if c == k or rs._probe(int(c), ent) is None:
                continue
            target = float(pinned.result.head_m[c])
            if base.head_m[c] - target < 1e-3:
                continue
            n0 = rs.fallbacks
            got = rs.solve(k, "limit", target, limit_node=int(c),
                           start=rs.blend(pinned.result, 0.8))
            want = ds.solve(k, "limit", target, limit_node=int(c))
            assert got.success and rs.fallbacks == n0, got.message
            assert want.success
            assert got.draw_m3s == pytest.approx(want.draw_m3s, rel=1e-6, abs=1e-10)
            seen.add("tree" if red.gone[c] else "core" if red.core_pos[c] >= 0 else "chain")
    assert seen == {"tree", "core", "chain"}


@pytest.mark.parametrize("draw_m4", [0.0, 0.15])
def test_pump_and_regulating_valve_on_the_reduced_network(draw_m4):
    # the hill zone of test_hill_zone: a booster pump lifts the hill zone; with 0.15 m3/s
    # drawn at M4 the pressure-reducing valve regulates (M4 held at its setting) and passes
    # water from the hill zone back down. Draws anywhere else that leave every status as it
    # is are answered on the reduced network and equal full Newton solves.
    from .test_hill_zone import OPTS, hill_zone

    n = hill_zone(draw_m4=draw_m4)
    system = HydraulicSystem(n, OPTS)
    base = system.solve()
    rs = ReducedDrawSolver(system, base)
    assert rs.usable, rs.why_not
    assert len(rs.pump_groups) == 1
    assert len(rs.prv_links) == (1 if draw_m4 else 0)
    compared = 0
    for k in np.flatnonzero(~n.is_fixed):
        if draw_m4 and n.node_id[k] == "M4":
            continue  # held by the valve: a node of known head
        for drop in (0.5, 2.0):
            head = base.head_m[k] - drop
            full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                                raise_on_failure=False)
            if not full.converged or not (full.link_state == base.link_state).all():
                continue
            n0 = rs.fallbacks
            out = rs.solve(int(k), "head", head)
            assert out.success and rs.fallbacks == n0, out.message
            r = out.result
            np.testing.assert_allclose(r.head_m, full.head_m, atol=1e-6)
            np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-8)
            draw = r.extra["draw_m3s"]
            assert_physics(n, with_draw(r, k, draw), mass_tol=1e-8, head_tol=1e-6)
            compared += 1
    assert compared >= 8


@pytest.mark.parametrize("draw_m4", [0.0, 0.15])
def test_status_changes_at_the_draw_are_solved_by_a_variant(draw_m4):
    # draws in the hill zone that change a device's status (the pressure-reducing valve opens
    # fully or shuts, the booster stops): the reduced solver makes the solve again on a
    # variant with the statuses found at that draw, and the answer equals the full Newton
    # solve with its status rounds (the whole-network reference) with mass and head loss
    # balanced. Where the statuses keep changing (the booster and the valve in turn) the
    # solve is given up and counted, and the fire-flow search takes its full-Newton route.
    from .test_hill_zone import OPTS, hill_zone

    n = hill_zone(draw_m4=draw_m4)
    system = HydraulicSystem(n, OPTS)
    base = system.solve()
    rs = ReducedDrawSolver(system, base)
    cases = answered = compared = 0
    for k in np.flatnonzero(~n.is_fixed):
        if draw_m4 and n.node_id[k] == "M4":
            continue
        for drop in (2.0, 8.0, 14.0, 20.0, 30.0):
            head = base.head_m[k] - drop
            full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                                raise_on_failure=False)
            if not full.converged or (full.link_state == base.link_state).all():
                continue
            cases += 1
            v0 = rs.variant_solves
            out = rs.solve(int(k), "head", head)
            if not out.success:
                assert out.status == 4, out.message  # statuses still changing: given up
                continue
            answered += 1
            assert rs.variant_solves == v0 + 1
            r = out.result
            assert (r.link_state == full.link_state).all()
            np.testing.assert_allclose(r.head_m, full.head_m, atol=1e-6)
            np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-8)
            assert_physics(n, with_draw(r, k, r.extra["draw_m3s"]), mass_tol=1e-8,
                           head_tol=1e-6)
            # a solve started from the variant's answer is made by the variant (or by the
            # one its statuses lead to) and equals the full solve at that draw
            q = 0.9 * r.extra["draw_m3s"]
            again = rs.solve(int(k), "draw", q, start=rs.blend(r, 0.9))
            if again.success:
                ref = system.solve(demand_m3s=n.demand_m3s + q * (np.arange(n.n_nodes) == k),
                                   warm=base)
                np.testing.assert_allclose(again.result.head_m, ref.head_m, atol=1e-6)
                compared += 1
    assert cases >= 6 and answered >= cases - 1 and compared >= answered - 1, \
        (cases, answered, compared)
    assert 1 <= len(rs._variants) <= 8


def test_status_variants_kept_within_their_memory(monkeypatch):
    # with room for one variant only, a second set of statuses is not made into a variant:
    # that solve is handed on (counted), the kept variant still answers its own draws
    import gridflow.hydraulics.reduced as reduced

    from .test_hill_zone import OPTS, hill_zone

    monkeypatch.setattr(reduced, "VARIANT_BYTES", 1)
    n = hill_zone(draw_m4=0.15)
    system = HydraulicSystem(n, OPTS)
    base = system.solve()
    rs = ReducedDrawSolver(system, base)
    for k in np.flatnonzero(~n.is_fixed):
        if n.node_id[k] == "M4":
            continue
        for drop in (8.0, 30.0):
            rs.solve(int(k), "head", base.head_m[k] - drop)
    assert len(rs._variants) == 1
    assert rs.fallbacks >= 1 and rs.variant_solves >= 1


def test_lowest_pressure_and_fastest_pipe_without_the_rebuild():
    # the system-wide check's answers from bounds and a partial rebuild: the same node and
    # link as the whole rebuilt solution (ties to the lowest position), for draws at core,
    # chain and tree nodes, checked nodes and zones drawn at random (zones that cut through
    # chains and trees too); the whole rebuild is itself checked for mass balance and head
    # loss against the published formulas, and against full Newton solves, above
    from gridflow.hydraulics.extremes import DrawExtremes

    kinds, compared = set(), 0
    for seed, network, system, base in solved(range(40), 14):
        rs = ReducedDrawSolver(system, base)
        red = rs.red
        rng = np.random.default_rng(seed)
        check = rng.random(network.n_nodes) < 0.8
        zone = rng.integers(0, 2, network.n_nodes) if seed % 2 else np.zeros(network.n_nodes,
                                                                             dtype=np.int64)
        main = rng.random(network.n_links) < 0.9
        ex = DrawExtremes(rs, check, zone, main)
        assert ex.usable
        free = np.flatnonzero(~network.is_fixed)
        for k, share in zip(free[:: max(1, len(free) // 6)], [0.5, 0.01] * len(free)):
            # a large draw (its chain or tree holds the extremes) and a small one (they stay
            # where the base flows put them)
            k = int(k)
            head = base.head_m[k] - share * (base.head_m[k] - network.elevation_m[k])
            out = rs.solve(k, "head", head)
            if not out.success:
                continue
            r = out.result
            Q, H, d = r.extra["reduced"]
            ent, hg = r.extra["solved"]
            got_v = ex.fastest(Q, d, ent)
            for z in np.unique(zone):
                for exclude in (k, int(free[0])):
                    got = ex.lowest(Q, H, d, ent, hg, int(z), exclude)
                    mask = check & base.supplied & (zone == z)
                    mask[exclude] = False
                    idx = np.flatnonzero(mask)
                    p = r.pressure_m[idx]
                    assert got[1] == int(idx[np.argmin(p)]), (seed, k)
                    assert got[0] == pytest.approx(float(p.min()), abs=1e-9)
            idx = np.flatnonzero(main & np.isfinite(r.velocity_ms))
            v = np.abs(r.velocity_ms[idx])
            assert got_v == (float(v.max()), int(idx[np.argmax(v)]))
            # the bounds themselves: no unit's checked node below its pressure bound, no
            # chain's main pipe above its speed bound (the draw's own unit aside)
            unit = np.full(network.n_nodes, -1)
            unit[red.inner_exit] = red.chain_of_link[red.inner_links]
            tn = red.tree_child
            root = red.tree_root[tn]
            unit[tn] = np.where(red.core_pos[root] >= 0, ex.C + red.core_pos[root],
                                red.node_chain[root])
            own = ex._entry_unit(ent)
            for z in np.unique(zone):
                lb = ex.pressure_bounds(H, int(z))
                at = np.flatnonzero(check & base.supplied & (zone == z) & (unit >= 0)
                                    & (unit != own))
                assert np.all(lb[unit[at]] <= r.pressure_m[at]), (seed, k)
            ub = ex.speed_bounds(Q)
            at = red.chain_links[main[red.chain_links]]
            ch = red.chain_of_link[main[red.chain_links]]
            assert np.all(np.abs(r.velocity_ms[at]) <= np.where(ch == ent.chain, np.inf, ub[ch]))
            compared += 1
            kinds.add("tree" if red.gone[k] else "core" if red.core_pos[k] >= 0 else "chain")
    assert compared >= 100 and kinds == {"tree", "core", "chain"}, (compared, kinds)


def test_the_pinned_draw_folded_into_the_factorization_is_the_bordered_step():
    # a pinned draw's Newton step solved with its border in the matrix (A + b b' / gamma, one
    # solve) equals the bordered solve on A (two solves); the slot's plain solves (Sherman-
    # Morrison) equal solves with A factorized alone
    rng = np.random.default_rng(5)
    kinds = set()
    for _seed, network, system, base in solved(range(12), 14):
        rs = ReducedDrawSolver(system, base)
        red = rs.red
        phi = rs.Q0[red.group_chain] - red.group_off
        phi += rng.uniform(-0.02, 0.02, len(phi))
        _, gg = rs._law(phi)
        G = np.bincount(red.group_chain, weights=gg, minlength=red.n_chains)
        bvec = np.zeros(rs.K)
        for k in np.flatnonzero(~network.is_fixed):
            ent = rs._entry(int(k))
            if ent is None:
                continue
            dP = 0.3 if len(ent.path) else 0.0
            border = rs._pin_border(ent, G, gg, dP, bvec)
            if border is None:
                continue
            kinds.add("chain" if ent.chain >= 0 else "core")
            nz, bv, gamma, _ = border
            rs._factor(G, gg, "plain")
            rs._factor(G, gg, "fold", border)
            b = np.zeros(rs.K)
            b[nz] = bv
            r = rng.normal(size=rs.K) * rs.free_core_f
            s = float(rng.normal())
            x0 = rs.pattern.solve(r, "plain")
            u = rs.pattern.solve(b, "plain")
            dd = (b @ x0 - s) / (b @ u + gamma)
            dH = x0 - dd * u
            dH2 = rs.pattern.solve(r + b * (s / gamma), "fold")
            dd2 = (b @ dH2 - s) / gamma
            scale = np.max(np.abs(dH)) + 1e-12
            assert np.max(np.abs(dH2 - dH)) <= 1e-8 * scale
            assert dd2 == pytest.approx(dd, rel=1e-8, abs=1e-12)
            assert np.allclose(rs._plain_solve(r, "fold"), x0, rtol=1e-8,
                               atol=1e-10 * np.max(np.abs(x0)))
            # and the folded matrix is not the plain one (the border is really in it)
            assert np.max(np.abs(rs.pattern.solve(r, "fold") - x0)) > 1e-10 * np.max(np.abs(x0))
    assert kinds == {"chain", "core"}
