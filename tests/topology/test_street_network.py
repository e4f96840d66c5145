"""The topology on a utility-style export laid on real street geometry (see street_town.py).

Check values come from the planted features (what the builder put where) and from facts of
the trade: crossing mains without a shared vertex are not connected (common practice); a
zone is bounded by closed valves, PRVs and pumps (common practice); the solved result obeys
conservation of mass at every node and the Hazen-Williams head loss on every open pipe
(Hazen-Williams SI form, as in physics.md).
"""

from __future__ import annotations

import re

import numpy as np
import pytest
import shapely
from scipy.spatial import cKDTree

from gridflow.config import parse_config
from gridflow.findings import Findings
from gridflow.network import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CLOSED,
    VALVE_PRESSURE_REDUCING,
)
from gridflow.topology import build_network
from tests.topology.street_town import build, config_table


@pytest.fixture(scope="module")
def town(tmp_path_factory):
    return build(tmp_path_factory.mktemp("street_town"))


@pytest.fixture(scope="module")
def cleaned(town):
    cfg = parse_config(config_table(town), base_dir=town.gpkg.parent)
    f = Findings()
    return cfg, f, build_network(cfg, f)


def _by_kind(f, kind):
    return [(i, m) for k, i, m in zip(f.kind, f.feature_id, f.message) if k == kind]


def _main_of(link_ids):
    """Utility id of the main each link came from (split pieces carry '.k')."""
    return np.array([re.sub(r"\.\d+$", "", str(x)) for x in link_ids], dtype=object)


def _mains(town):
    import geopandas as gpd

    a = gpd.read_file(town.gpkg, layer="dist_mains", engine="pyogrio")
    b = gpd.read_file(town.gpkg, layer="transmission", engine="pyogrio")
    ids = np.r_[a["MAIN_ID"].to_numpy(dtype=object), b["TM_ID"].to_numpy(dtype=object)]
    geoms = shapely.force_2d(np.r_[np.asarray(a.geometry.values, dtype=object),
                                   np.asarray(b.geometry.values, dtype=object)])
    return ids, geoms


def _joined(cn, tol, main_a, main_b, near_xy) -> bool:
    """True when a node within ``tol`` of ``near_xy`` ends links of both mains."""
    net = cn.network
    origin = _main_of(net.link_id)
    xy = shapely.get_coordinates(np.asarray(cn.nodes.geometry.values, dtype=object))
    for i in cKDTree(xy).query_ball_point(near_xy, tol):
        at = (net.from_idx == i) | (net.to_idx == i)
        if {main_a, main_b} <= set(origin[at].tolist()):
            return True
    return False


def test_no_crossing_is_joined(town, cleaned):
    cfg, f, cn = cleaned
    ids, geoms = _mains(town)
    tree = shapely.STRtree(geoms)
    a, b = tree.query(geoms, predicate="crosses")
    pairs = a < b
    a, b = a[pairs], b[pairs]
    tol = cfg.run.snap_tolerance
    points = shapely.intersection(geoms[a], geoms[b])
    ends = shapely.boundary(geoms)
    # a crossing point where both mains also end (their ends meet in the input) is no crossing
    crossings = [(ids[i], ids[j], xy) for i, j, p in zip(a, b, points)
                 for xy in shapely.get_coordinates(p)
                 if not (shapely.dwithin(ends[i], shapely.points(xy), tol)
                         and shapely.dwithin(ends[j], shapely.points(xy), tol))]
    assert len(crossings) > 20  # bridges, tunnels and the transmission mains cross streets
    joined = [(x, y) for x, y, xy in crossings if _joined(cn, tol, x, y, xy)]
    assert joined == []
    # the planted near misses (a node where two mains meet, right on a third main; a dangling
    # end 0.25 m from a main on another level) are listed, not joined
    near = _by_kind(f, "near_miss")
    listed = {i for i, _ in near}
    for x, y in town.near_miss_pairs:
        gx, gy = geoms[list(ids).index(x)], geoms[list(ids).index(y)]
        p = shapely.get_coordinates(shapely.shortest_line(gx, gy))[0]
        assert not _joined(cn, cfg.run.snap_tolerance, x, y, p), (x, y)
        assert y in listed or x in listed
    print(f"\nstreet town: {len(crossings)} crossings kept apart, "
          f"{len(_by_kind(f, 'main_split'))} T-junctions joined, {len(near)} near misses listed")


def test_every_intended_t_junction_is_joined(town, cleaned):
    cfg, f, cn = cleaned
    net = cn.network
    origin = _main_of(net.link_id)
    assert len(town.t_stems) >= 20
    for stem, through in town.t_stems:
        s = np.flatnonzero(origin == stem)
        t = np.flatnonzero(origin == through)
        assert len(t) >= 2, f"{through} not split for {stem}"
        stem_nodes = set(net.from_idx[s].tolist()) | set(net.to_idx[s].tolist())
        through_nodes = set(net.from_idx[t].tolist()) & set(net.to_idx[t].tolist())
        assert stem_nodes & through_nodes, f"{stem} not joined to {through}"
    split = _by_kind(f, "main_split")
    assert {t for _, t in town.t_stems} <= {i for i, _ in split}
    dist = [float(re.search(r"lies ([\d.]+) m", m).group(1)) for _, m in split]
    assert max(dist) <= 0.5  # the snapping tolerance


def test_isolating_valve_found_with_its_customers(town, cleaned):
    _, f, cn = cleaned
    iso = dict(_by_kind(f, "valve_isolates_customers"))
    msg = iso[town.isolating_valve]
    assert f"closed valve {town.isolating_valve} cut off" in msg
    assert f"{town.isolated_meters} meters" in msg
    assert f"{town.isolated_hydrants} hydrants" in msg
    # 3 meters x 300 gal/day = 900 gal/day = 0.03943 l/s (1 US gal = 3.785411784 l, by
    # definition; 86400 s a day)
    assert "0.03943 lps" in msg


def test_zones_separated_by_their_boundary_valves(town, cleaned):
    _, f, cn = cleaned
    net = cn.network
    zf, zt = net.zone[net.from_idx], net.zone[net.to_idx]
    across = zf != zt
    assert set(net.zone) >= {"central", "harbour", "hill"}
    kinds = net.link_kind[across]
    assert np.all((kinds == LINK_PUMP) | (kinds == LINK_VALVE))
    v = across & (net.link_kind == LINK_VALVE)
    assert np.all((net.status[v] == STATUS_CLOSED) | (net.valve_type[v] == VALVE_PRESSURE_REDUCING))
    ids = set(net.link_id[across].tolist())
    assert set(town.prv_ids) | {town.pump_id} <= ids
    # the booster is digitised against the flow; the mapped direction makes it lift from the
    # central zone into the hill zone
    p = list(net.link_id).index(town.pump_id)
    assert (net.zone[net.from_idx[p]], net.zone[net.to_idx[p]]) == ("central", "hill")
    for prv in town.prv_ids:
        i = list(net.link_id).index(prv)
        assert (net.zone[net.from_idx[i]], net.zone[net.to_idx[i]]) == ("central", "harbour")
    assert _by_kind(f, "pump_against_grade") == []


def test_unmapped_pump_direction_is_said_once_and_warned(town):
    cfg = parse_config(config_table(town, direction=False), base_dir=town.gpkg.parent)
    f = Findings()
    cn = build_network(cfg, f)
    assert len(_by_kind(f, "direction_unmapped")) == 1
    warn = _by_kind(f, "pump_against_grade")
    assert [i for i, _ in warn] == [town.pump_id]
    assert "from zone hill" in warn[0][1] and "into zone central" in warn[0][1]
    p = list(cn.network.link_id).index(town.pump_id)
    assert cn.network.zone[cn.network.from_idx[p]] == "hill"


def test_codes_never_silent_and_hydrant_status(cleaned):
    _, f, cn = cleaned
    unknown = [m for _, m in _by_kind(f, "unknown_code")]
    assert any("'ZZ' in field 'MAT'" in m and "kept as written" in m for m in unknown)
    assert any("1 feature(s) of layer 'system_valves' hold 'X'" in m and "treated as 'open'"
               in m for m in unknown)
    h = cn.hydrants.set_index("hydrant_id")
    assert h.loc["H1", "in_service"] == False  # noqa: E712 (mapped out of service, attached)
    assert h["in_service"].sum() == len(h) - 1


def test_solved_street_town_obeys_mass_and_head_loss(town, cleaned):
    from gridflow.demand import allocate, scenario_network
    from gridflow.hydraulics import solve
    from tests.hydraulics.netbuild import assert_physics

    cfg, _, cn = cleaned
    alloc = allocate(cfg, cn, Findings())
    net = scenario_network(cfg, cn, alloc, "average_day")
    r = solve(net)
    assert_physics(net, r, mass_tol=1e-6, head_tol=1e-3)
    # the PRVs hold the harbour zone below the central grade; the booster lifts the hill zone
    sup = r.supplied
    harbour = sup & (net.zone == "harbour")
    central = sup & (net.zone == "central")
    assert np.median(r.head_m[harbour]) < np.median(r.head_m[central])
    pipes = net.link_kind == LINK_PIPE
    assert np.all(np.isfinite(r.flow_m3s[pipes]))


def test_fire_draws_on_the_reduced_street_town_equal_full_newton(town, cleaned):
    # the fire-flow solver on real street geometry (bridges, tunnels, near misses, PRVs in
    # their own layer, a booster digitised against the flow): pinned draws at hydrant nodes of
    # every zone, answered on the reduced network (on a status variant where a device changes
    # status at the draw), equal full Newton solves of the whole network with their status
    # rounds, with mass and head loss balanced by the published formulas
    from gridflow.demand import allocate, scenario_network
    from gridflow.hydraulics import HydraulicSystem, SolveOptions
    from gridflow.hydraulics.reduced import ReducedDrawSolver
    from tests.hydraulics.netbuild import assert_physics, with_draw

    cfg, _, cn = cleaned
    alloc = allocate(cfg, cn, Findings())
    net = scenario_network(cfg, cn, alloc, "max_day")
    opts = SolveOptions(head_tolerance=1e-8, flow_tolerance=1e-9)
    system = HydraulicSystem(net, opts)
    base = system.solve()
    hyd_nodes = np.unique(cn.hydrants["node_idx"].to_numpy(dtype=np.int64))
    rs = ReducedDrawSolver(system, base, keep=hyd_nodes)
    assert rs.usable, rs.why_not
    assert len(rs.pump_groups) >= 1  # the booster runs
    # the reduction is a real one: far fewer core nodes than nodes
    assert rs.K < net.n_nodes / 2
    from gridflow.units import M_HEAD_PER_PSI

    picks = hyd_nodes[np.linspace(0, len(hyd_nodes) - 1, 30).astype(int)]
    from gridflow.network import NODE_JUNCTION

    check = (net.node_kind == NODE_JUNCTION) & base.supplied
    zone_code = np.unique(net.zone.astype(str), return_inverse=True)[1].astype(np.int64)
    main = net.link_kind == LINK_PIPE
    compared, zones, changed = 0, set(), 0
    for k in picks:
        if not base.supplied[k] or net.is_fixed[k]:
            continue
        # 20 psi above ground (NFPA 291's rating residual), or 5 m less than static
        head = max(net.elevation_m[k] + 20 * M_HEAD_PER_PSI, base.head_m[k] - 5.0)
        if head >= base.head_m[k]:
            continue
        full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                            raise_on_failure=False)
        if not full.converged:
            continue
        n0, v0 = rs.fallbacks, rs.variant_solves
        out = rs.solve(int(k), "head", float(head))
        assert out.success and rs.fallbacks == n0, out.message
        r = out.result
        assert (r.link_state == full.link_state).all()
        changed += rs.variant_solves - v0
        np.testing.assert_allclose(r.head_m[r.supplied], full.head_m[r.supplied], atol=1e-5)
        np.testing.assert_allclose(r.flow_m3s, full.flow_m3s, atol=1e-7)
        assert_physics(net, with_draw(r, k, r.extra["draw_m3s"]), mass_tol=1e-7, head_tol=1e-5)
        # the fire-flow search's system-wide check from bounds and a partial rebuild: the same
        # lowest node of the zone and fastest main as the rebuilt solution
        finder = r.extra["reduced_by"].extremes(check, zone_code, main)
        Q, H, d = r.extra["reduced"]
        ent, hg = r.extra["solved"]
        z = int(zone_code[k])
        low, node = finder.lowest(Q, H, d, ent, hg, z, int(k))
        mask = check & r.supplied & (zone_code == z)
        mask[k] = False
        idx = np.flatnonzero(mask)
        assert node == int(idx[np.argmin(r.pressure_m[idx])])
        assert low == pytest.approx(float(r.pressure_m[idx].min()), abs=1e-9)
        idx = np.flatnonzero(main & np.isfinite(r.velocity_ms))
        v = np.abs(r.velocity_ms[idx])
        assert finder.fastest(Q, d, ent) == (float(v.max()), int(idx[np.argmax(v)]))
        compared += 1
        zones.add(str(net.zone[k]))
    # half the draws here open or shut a device (the town's PRVs and booster)
    assert compared >= 6 and len(zones) >= 2 and changed >= 3, (compared, zones, changed)
