"""Valve segments and shutdown criticality on networks whose segments are counted by hand.

The test town (all invented): a source R feeding corner A of a square loop A-B-C-D; every side
of the loop has an isolation valve in its middle, so the loop's four corners are four segments
(A's with the source). From corner C a dead-end branch runs through valve VE to a cul-de-sac
F-G, a fifth segment whose only feed is through C's segment. Counted by hand (common practice:
a segment is what lies between the valves a crew closes):

- 5 segments: {R, A}, {B}, {C, E}, {D}, {F, G} with their half-sides of the loop;
- closing C's segment (valves VBC, VCD, VE) also cuts off {F, G} (unintended isolation);
- closing the source's segment {R, A} cuts off all the others;
- no other closure cuts off anything: every other corner has a way round the loop;
- with VAB inoperable, {R, A} and {B} merge: 4 segments.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from gridflow.analysis.criticality import ClosureProblem, closure_sweep
from gridflow.analysis.segments import find_segments, segment_members
from gridflow.findings import Findings
from gridflow.hydraulics import HydraulicSystem, SolveOptions, solve
from gridflow.network import LINK_VALVE, STATUS_CLOSED, VALVE_ISOLATION
from gridflow.topology import build_network

from ..gis_helpers import L, P, config, layer, source_layer, source_rows
from ..gis_helpers import pipe as gis_main
from ..hydraulics.netbuild import assert_physics, independent_headloss, net, pipe

TIGHT = SolveOptions(flow_tolerance=1e-8, head_tolerance=1e-7)
LPS = 1e-3


def valve(id, fr, to, **kw):
    return {"id": id, "fr": fr, "to": to, "link_kind": LINK_VALVE, "length_m": 0.0,
            "diameter_m": 0.2, "roughness": 120.0, "valve_type": VALVE_ISOLATION, **kw}


def side(a, b, L=200.0, D=0.2):
    """A loop side a-b with an isolation valve in its middle: a-a'  V  b'-b."""
    m1, m2 = f"{a}{b}1", f"{a}{b}2"
    return ([(m1, 10.0, 0.0, None), (m2, 10.0, 0.0, None)],
            [pipe(f"P{a}{b}a", a, m1, L / 2, D), valve(f"V{a}{b}", m1, m2),
             pipe(f"P{a}{b}b", m2, b, L / 2, D)])


def town():
    nodes = [("R", 0.0, 0.0, 60.0), ("A", 10.0, 1 * LPS, None), ("B", 12.0, 2 * LPS, None),
             ("C", 14.0, 2 * LPS, None), ("D", 11.0, 1 * LPS, None), ("E", 14.0, 0.5 * LPS, None),
             ("F", 15.0, 0.0, None), ("G", 16.0, 1.5 * LPS, None)]
    links = [pipe("P0", "R", "A", 300.0, 0.3)]
    for a, b in (("A", "B"), ("B", "C"), ("C", "D"), ("D", "A")):
        n, lk = side(a, b)
        nodes += n
        links += lk
    nodes += [("E1", 14.0, 0.0, None), ("E2", 14.0, 0.0, None)]
    links += [pipe("PCE", "C", "E", 80.0, 0.15), pipe("PEE", "E", "E1", 10.0, 0.15),
              valve("VE", "E1", "E2", diameter_m=0.15), pipe("PEF", "E2", "F", 10.0, 0.15),
              pipe("PFG", "F", "G", 120.0, 0.15)]
    return net(nodes, links)


def seg_of(n, seg, node):
    return int(seg.node_segment[list(n.node_id).index(node)])


def test_hand_counted_segments_and_their_valves():
    n = town()
    seg = find_segments(n)
    assert seg.n == 5  # hand count (module docstring)
    by = {k: seg_of(n, seg, k) for k in "RABCDEFG"}
    assert by["R"] == by["A"] and by["C"] == by["E"] and by["F"] == by["G"]
    assert len({by[k] for k in "ABCDF"}) == 5
    names = {k: sorted(n.link_id[seg.valves_of(by[k])]) for k in "ABCDF"}
    assert names == {"A": ["VAB", "VDA"], "B": ["VAB", "VBC"], "C": ["VBC", "VCD", "VE"],
                     "D": ["VCD", "VDA"], "F": ["VE"]}
    # every valve lies between two segments and belongs to no segment itself
    v = n.link_kind == LINK_VALVE
    assert np.all(seg.link_segment[v] == -1) and np.all(seg.isolating[v])
    # main length per segment: half-sides of 100 m, P0 300 m, the branch
    length = segment_members(seg, n.length_m)
    assert length[by["A"]] == pytest.approx(300 + 100 + 100)
    assert length[by["C"]] == pytest.approx(100 + 100 + 80 + 10)
    assert length[by["F"]] == pytest.approx(10 + 120)
    assert length.sum() == pytest.approx(n.length_m.sum())


def test_unintended_isolation_of_a_branch_fed_only_through_the_segment():
    n = town()
    seg = find_segments(n)
    c, f = seg_of(n, seg, "C"), seg_of(n, seg, "F")
    assert seg.cut_off_by(c).tolist() == [f]
    for k in "BDF":
        assert seg.cut_off_by(seg_of(n, seg, k)).size == 0, k
    # the source's own segment: closing it cuts everything else off from the source
    a = seg_of(n, seg, "A")
    assert sorted(seg.cut_off_by(a).tolist()) == sorted(set(range(seg.n)) - {a})
    # totals over what a closure cuts off: the cul-de-sac's demand (G: 1.5 L/s)
    demand = np.bincount(seg.node_segment, n.demand_m3s, minlength=seg.n)
    assert seg.subtree_sum(demand)[c] == pytest.approx(1.5 * LPS)
    assert np.all(seg.supplied)


def test_an_inoperable_valve_merges_the_segments_on_both_sides():
    n = town()
    inop = np.asarray(n.link_id == "VAB")
    seg = find_segments(n, inoperable=inop)
    assert seg.n == 4
    assert seg_of(n, seg, "A") == seg_of(n, seg, "B")
    assert sorted(n.link_id[seg.valves_of(seg_of(n, seg, "A"))]) == ["VBC", "VDA"]
    assert seg.link_segment[np.flatnonzero(inop)[0]] == seg_of(n, seg, "A")


def test_a_valve_mapped_closed_bounds_segments_but_carries_no_supply():
    """With VE mapped closed, the cul-de-sac is already without supply (not cut off by C)."""
    n = town()
    status = n.status.copy()
    status[list(n.link_id).index("VE")] = STATUS_CLOSED
    seg = find_segments(n.replace(status=status))
    f = seg_of(n, seg, "F")
    assert not seg.supplied[f]
    assert seg.cut_off_by(seg_of(n, seg, "C")).size == 0


def test_segments_of_a_main_with_a_valve_on_its_interior(tmp_path):
    """A valve mapped on a main's interior (no vertex there) splits the main into two
    segments; the two mains beyond a second valve are a third."""
    g = tmp_path / "gis.gpkg"
    layer(g, "mains", [gis_main("M1", L((0, 0), (200, 0))),
                       gis_main("M2", L((200, 0), (300, 0))),
                       gis_main("M3", L((300, 0), (300, 150)))])
    layer(g, "sources", source_rows(P(0, 0)))
    layer(g, "valves", [{"VALVE_ID": "V-MID", "TYPE": "GV", "STAT": "O", "geometry": P(90, 1)},
                        {"VALVE_ID": "V-END", "TYPE": "GV", "STAT": "O",
                         "geometry": P(250, 0.5)}])
    valves = {"input": "gis", "layer": "valves", "id": "VALVE_ID",
              "fields": {"type": "TYPE", "status": "STAT"},
              "codes": {"type": {"GV": "isolation"}, "status": {"C": "closed", "O": "open"}}}
    cfg = config(tmp_path, g, layers={"sources": source_layer(), "valves": valves})
    cn = build_network(cfg, Findings())
    seg = find_segments(cn.network)
    assert seg.n == 3
    length = segment_members(seg, cn.network.length_m)
    # 90 m before V-MID; 110 + 50 m between the valves; 50 + 150 m beyond V-END (geometry)
    assert sorted(np.round(length, 1)) == pytest.approx([90.0, 160.0, 200.0], abs=0.6)
    ids = cn.network.link_id
    assert set(ids[seg.valve_idx]) == {"V-MID", "V-END"}


# ------------------------------------------------------------------ criticality
def _problem(n, **kw):
    base = solve(n, options=TIGHT)
    return ClosureProblem(net=n, base=base, options=TIGHT, min_pressure_m=14.06,
                          meters_per_node=np.where(n.demand_m3s > 0, 3.0, 0.0),
                          hydrants_per_node=np.isin(n.node_id, ["B", "G"]).astype(float),
                          segments=find_segments(n), **kw)


def _reference_heads(n, removed):
    """Heads of the network with the closed links taken out, by a general root finder
    (scipy.optimize.root on the plain Hazen-Williams equations), on the supplied nodes."""
    keep = ~np.isin(n.link_id, removed)
    # nodes still connected to R through kept links
    import scipy.sparse as sp
    from scipy.sparse.csgraph import breadth_first_order

    adj = sp.coo_matrix((np.ones(keep.sum()), (n.from_idx[keep], n.to_idx[keep])),
                        shape=(n.n_nodes, n.n_nodes))
    reach = breadth_first_order(adj + adj.T, 0, return_predecessors=False)
    live = np.zeros(n.n_nodes, bool)
    live[reach] = True
    links = np.flatnonzero(keep & live[n.from_idx])
    free = np.flatnonzero(live & ~n.is_fixed)
    m = links.size

    def residual(x):
        q, h = x[:m], np.array(n.fixed_head_m, float)
        h[free] = x[m:]
        qq = np.zeros(n.n_links)
        qq[links] = q
        hl = independent_headloss(n, qq)
        energy = h[n.from_idx[links]] - h[n.to_idx[links]] - hl[links]
        inflow = (np.bincount(n.to_idx[links], q, n.n_nodes)
                  - np.bincount(n.from_idx[links], q, n.n_nodes))
        return np.concatenate([energy, inflow[free] - n.demand_m3s[free]])

    x0 = np.concatenate([np.full(links.size, 1e-3), np.full(free.size, 55.0)])
    sol = scipy.optimize.root(residual, x0, method="hybr", tol=1e-12)
    assert sol.success, sol.message
    h = np.full(n.n_nodes, np.nan)
    h[free] = sol.x[links.size:]
    h[n.is_fixed] = n.fixed_head_m[n.is_fixed]
    return h, live


def test_closing_a_loop_segment_matches_a_hand_solve_without_its_links():
    n = town()
    p = _problem(n)
    b = seg_of(n, p.segments, "B")
    o = p.close(p.segments.valves_of(b), p.segments.node_segment == b)
    r = o.result
    # the closed network obeys mass balance and head loss on every open link
    closed_net = n.replace(status=np.where(np.isin(n.link_id, ["VAB", "VBC"]), STATUS_CLOSED,
                                           n.status))
    assert_physics(closed_net, r, mass_tol=1e-7, head_tol=1e-6)
    # same heads as a general root finder on the network with B's valves taken out
    h_ref, live = _reference_heads(n, ["VAB", "VBC"])
    assert np.array_equal(r.supplied, live)
    np.testing.assert_allclose(r.head_m[live], h_ref[live], atol=1e-5)
    # what is lost: B's segment (its meters at B, 3 by construction), its hydrant, nothing else
    assert set(n.node_id[o.out]) == {"B", "AB2", "BC1"}
    rec = p.run(np.array([b]))
    assert rec["meters_out"][0] == 3.0 and rec["hydrants_out"][0] == 1.0
    assert rec["demand_out_m3s"][0] == pytest.approx(2 * LPS)
    assert rec["worst_drop_m"][0] > 0  # the loop now feeds C the long way round


def test_closing_the_segment_that_feeds_a_branch_takes_the_branch_out_too():
    n = town()
    p = _problem(n)
    c = seg_of(n, p.segments, "C")
    rec = p.run(np.array([c]))
    assert rec["converged"][0]
    # C (2 L/s), E (0.5 L/s) and the cul-de-sac G (1.5 L/s): hydraulics agrees with topology
    assert rec["demand_out_m3s"][0] == pytest.approx(4 * LPS)
    assert rec["hydrants_out"][0] == 1.0  # the hydrant at G
    assert rec["meters_out"][0] == 9.0  # 3 each at C, E, G


def test_a_closure_that_starves_nodes_counts_them_low_not_out():
    """A weaker source and 15 times the demand: closing D's segment sends all of the loop's
    supply round by B, and nodes that held the minimum (20 psi, 14.06 m) drop below it while
    still supplied. They are counted low, not out; nodes already below it before are neither.
    The expected set follows from a general root finder's heads (scipy.optimize.root)."""
    t = town()
    n = t.replace(fixed_head_m=np.where(np.isfinite(t.fixed_head_m), 38.0, np.nan),
                  demand_m3s=t.demand_m3s * 15)
    p = ClosureProblem(net=n, base=solve(n, options=TIGHT), options=TIGHT, min_pressure_m=14.06,
                       meters_per_node=np.ones(n.n_nodes), hydrants_per_node=np.zeros(n.n_nodes),
                       segments=find_segments(n))
    d = seg_of(n, p.segments, "D")
    o = p.close(p.segments.valves_of(d), p.segments.node_segment == d)
    h_ref, live = _reference_heads(n, ["VCD", "VDA"])
    drained = p.segments.node_segment == d
    p_ref = h_ref - n.elevation_m
    expected = live & ~drained & (p_ref < 14.06) & ~(p.base.pressure_m < 14.06)
    assert expected.sum() >= 3  # the case is not empty
    np.testing.assert_array_equal(o.low, expected)
    assert set(n.node_id[o.out]) == {"D", "CD2", "DA1"}
    assert not np.any(o.out & o.low)
    rec = p.run(np.array([d]))
    assert rec["meters_low"][0] == expected.sum()
    assert rec["demand_low_m3s"][0] == pytest.approx(n.demand_m3s[expected].sum())


def test_local_processes_and_a_dask_cluster_give_identical_figures():
    distributed = pytest.importorskip("distributed")
    n = town()
    p = _problem(n)
    serial, s1 = closure_sweep(p, workers=1)
    procs, s2 = closure_sweep(p, workers=2, batch_size=1)
    assert s1["mode"] == "serial" and s2["mode"] == "processes"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        dask, s3 = closure_sweep(p, batch_size=2, scheduler=cluster.scheduler_address)
    assert s3["mode"] == "dask"
    for name in serial:
        np.testing.assert_array_equal(serial[name], procs[name], err_msg=name)
        np.testing.assert_array_equal(serial[name], dask[name], err_msg=name)
    assert serial["converged"].all()


def test_the_shared_system_keeps_one_symbolic_analysis():
    n = town()
    p = _problem(n)
    sys0 = p.system
    assert isinstance(sys0, HydraulicSystem)
    p.run(np.arange(p.segments.n))
    assert p.system is sys0  # reused across closures, not rebuilt


@pytest.mark.parametrize("seed", range(12))
def test_dominators_agree_with_networkx_on_random_segment_graphs(seed):
    """The cut-vertex dominators against networkx's general dominance algorithm (Cooper,
    Harvey and Kennedy) on random sparse multigraphs: chains, loops, parallel edges, parts
    out of reach."""
    import networkx as nx

    from gridflow.analysis.segments import immediate_dominators

    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 60))
    m = int(rng.integers(n // 2, 2 * n))
    a, b = rng.integers(0, n, m), rng.integers(0, n, m)
    keep = a != b
    a, b = a[keep], b[keep]
    if m > 3:  # a parallel edge
        a, b = np.append(a, a[0]), np.append(b, b[0])
    root = 0
    got = immediate_dominators(n, a, b, root)
    g = nx.MultiGraph()
    g.add_nodes_from(range(n))
    g.add_edges_from(zip(a.tolist(), b.tolist()))
    want = nx.immediate_dominators(nx.DiGraph(g.to_directed()), root)
    assert got[root] == root
    for v in range(1, n):
        assert got[v] == want.get(v, -1), (v, got[v], want.get(v))


@pytest.mark.parametrize("seed", range(3))
def test_dominators_around_a_vertex_of_high_degree_agree_with_networkx(seed):
    """A segment with 1,200 valves (the search that is linear whatever the degrees) and the
    same graph thinned below that degree (the array route): both against networkx."""
    import networkx as nx

    from gridflow.analysis.segments import immediate_dominators

    rng = np.random.default_rng(100 + seed)
    n, hub = 1500, 7
    spokes = rng.choice(np.setdiff1d(np.arange(n), [hub]), 1200, replace=False)
    a = np.concatenate([np.full(1200, hub), rng.integers(0, n, 700)])
    b = np.concatenate([spokes, rng.integers(0, n, 700)])
    for keep in (np.ones(len(a), bool), np.arange(len(a)) % 4 == 0):
        got = immediate_dominators(n, a[keep], b[keep], 0)
        g = nx.MultiGraph()
        g.add_nodes_from(range(n))
        g.add_edges_from(zip(a[keep].tolist(), b[keep].tolist()))
        want = nx.immediate_dominators(nx.DiGraph(g.to_directed()), 0)
        assert got[0] == 0
        assert [int(got[v]) for v in range(1, n)] == [want.get(v, -1) for v in range(1, n)]


@pytest.mark.parametrize("seed", range(6))
def test_cut_off_lists_are_the_dominator_tree_descendants(seed):
    """Per segment, the segments it cuts off are those whose chain of immediate dominators
    passes through it (walked one parent at a time), listed in ascending order; segments out
    of supply cut off nothing."""
    from gridflow.analysis.segments import _descendants

    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 400))
    idom = np.full(n, -1, dtype=np.int64)
    order = rng.permutation(n)
    for k, v in enumerate(order):  # a random tree over a random order; some left out
        if rng.random() < 0.1:
            continue
        placed = [u for u in order[:k] if idom[u] >= 0]
        idom[v] = n if not placed or rng.random() < 0.2 else placed[rng.integers(len(placed))]
    ptr, idx = _descendants(idom, n)
    want: list[list[int]] = [[] for _ in range(n)]
    for t in range(n):
        u = idom[t]
        while 0 <= u < n:
            want[u].append(t)
            u = idom[u]
    for s in range(n):
        assert idx[ptr[s]:ptr[s + 1]].tolist() == sorted(want[s])
