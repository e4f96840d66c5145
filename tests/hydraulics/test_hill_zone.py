"""A hill zone fed only by a booster pump from the main zone, with a pressure-reducing valve
that can feed back into the main zone, and closed boundary valves between the zones.

Every check value comes from outside the solver: heads and flows from
``scipy.optimize.root`` on the same equations, head losses from the plain published formulas
(``netbuild.independent_headloss``), the pump from the three points it was given.
"""

from __future__ import annotations

import numpy as np
import pytest

from gridflow.findings import Findings
from gridflow.hydraulics import CLOSED, OPEN, REGULATING, HydraulicSystem, SolveOptions
from gridflow.network import (
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CLOSED,
    VALVE_ISOLATION,
    VALVE_PRESSURE_REDUCING,
    fit_pump_curve,
)

from .netbuild import assert_physics, independent_headloss, net, pipe, root_reference

OPTS = SolveOptions(head_tolerance=1e-8, flow_tolerance=1e-10)
#: demand factors of the three usual scenarios: average day, max day 1.8, peak hour 3.0
#: (common practice, as the README's default criteria)
FACTORS = {"average_day": 1.0, "max_day": 1.8, "peak_hour": 3.0}
HILL = ["H1", "H2", "H3", "H4"]
#: the PRV holds M4 at 28 m + 55 m = 83 m of head
PRV_HEAD = 83.0


def hill_zone(*, pump_points=((0.0, 60.0), (0.02, 52.0), (0.04, 35.0)), draw_m4=0.0,
              factor=1.0):
    """Main zone M1-M4 on a source at 100 m; hill zone H1-H4 at 90-105 m elevation, above the
    main zone's grade, fed by pump PU (M2 -> H1); PRV (H4 -> M4) back into the main zone;
    boundary valves BV1 (H3 - M3) and BV2 (H2 - M1) closed."""
    d = factor
    nodes = [("S", 0.0, 0.0, 100.0),
             ("M1", 20.0, 0.010 * d, None), ("M2", 25.0, 0.008 * d, None),
             ("M3", 30.0, 0.012 * d, None), ("M4", 28.0, 0.006 * d + draw_m4, None),
             ("H1", 90.0, 0.004 * d, None), ("H2", 100.0, 0.005 * d, None),
             ("H3", 105.0, 0.003 * d, None), ("H4", 95.0, 0.004 * d, None)]
    h0, h1, h2 = fit_pump_curve(pump_points)
    links = [pipe("P1", "S", "M1", 800, 0.4), pipe("P2", "M1", "M2", 600, 0.3),
             pipe("P3", "M2", "M3", 700, 0.3), pipe("P4", "M3", "M4", 500, 0.25),
             pipe("P5", "M4", "M1", 900, 0.25),
             pipe("H12", "H1", "H2", 400, 0.2), pipe("H23", "H2", "H3", 300, 0.15),
             pipe("H34", "H3", "H4", 400, 0.15), pipe("H41", "H4", "H1", 500, 0.2),
             {"id": "PU", "fr": "M2", "to": "H1", "link_kind": LINK_PUMP, "pump_h0": h0,
              "pump_h1": h1, "pump_h2": h2},
             {"id": "PRV", "fr": "H4", "to": "M4", "link_kind": LINK_VALVE, "diameter_m": 0.15,
              "valve_type": VALVE_PRESSURE_REDUCING, "valve_setting": PRV_HEAD - 28.0},
             {"id": "BV1", "fr": "H3", "to": "M3", "link_kind": LINK_VALVE, "diameter_m": 0.2,
              "valve_type": VALVE_ISOLATION, "status": STATUS_CLOSED},
             {"id": "BV2", "fr": "H2", "to": "M1", "link_kind": LINK_VALVE, "diameter_m": 0.2,
              "valve_type": VALVE_ISOLATION, "status": STATUS_CLOSED}]
    return net(nodes, links)


def _idx(n, ids):
    return [list(n.node_id).index(i) for i in ids] if isinstance(ids, list) else \
        list(n.link_id).index(ids)


def _check_against_root(n, r):
    assert_physics(n, r, mass_tol=1e-9, head_tol=1e-6)
    q_ref, h_ref, fi = root_reference(n, r)
    assert r.flow_m3s == pytest.approx(q_ref, abs=1e-7)
    assert r.head_m[fi] == pytest.approx(h_ref, abs=1e-6)


@pytest.mark.parametrize("scenario", list(FACTORS))
def test_hill_zone_is_supplied_through_the_pump(scenario):
    n = hill_zone(factor=FACTORS[scenario])
    system = HydraulicSystem(n, OPTS)
    r = system.solve()
    pu, prv = _idx(n, "PU"), _idx(n, "PRV")
    hill = _idx(n, HILL)
    assert r.converged, r.message
    assert r.supplied.all() and system.shut_zones(r) == []
    assert r.link_state[pu] == OPEN and r.flow_m3s[pu] > 0
    # the pump carries the hill zone's demand (the PRV is shut: the main zone holds M4 above
    # the PRV's setting)
    assert r.link_state[prv] == CLOSED
    assert r.head_m[_idx(n, ["M4"])[0]] > PRV_HEAD
    assert r.flow_m3s[pu] == pytest.approx(r.required_demand_m3s[hill].sum(), rel=1e-9)
    # the pump works on its given curve: the head it adds is the quadratic through its points
    q = r.flow_m3s[pu]
    h0, h1, h2 = fit_pump_curve(((0.0, 60.0), (0.02, 52.0), (0.04, 35.0)))
    assert -r.headloss_m[pu] == pytest.approx(h0 + h1 * q + h2 * q * q, abs=1e-6)
    assert (r.pressure_m[hill] > 0).all()
    assert "0 node(s) unsupplied" in r.message
    _check_against_root(n, r)


def test_main_zone_pressure_drop_opens_the_prv():
    # a large draw at M4 (a fire, a main break) pulls M4 below the PRV's setting (83 m);
    # without the PRV M4 would fall to about 79 m
    n = hill_zone(draw_m4=0.15)
    system = HydraulicSystem(n, OPTS)
    r = system.solve()
    pu, prv = _idx(n, "PU"), _idx(n, "PRV")
    m4 = _idx(n, ["M4"])[0]
    assert r.converged, r.message
    assert r.supplied.all()
    assert r.link_state[prv] == REGULATING and r.flow_m3s[prv] > 0
    assert r.head_m[m4] == pytest.approx(PRV_HEAD, abs=1e-9)
    assert r.link_state[pu] == OPEN
    # the pump now carries the hill zone's demand and what the PRV passes on
    hill = _idx(n, HILL)
    assert r.flow_m3s[pu] == pytest.approx(r.required_demand_m3s[hill].sum()
                                           + r.flow_m3s[prv], rel=1e-9)
    _check_against_root(n, r)


def test_pump_that_cannot_lift_leaves_the_zone_dry_and_says_so():
    # shut-off head 4 m: M2's grade (99.1 m) + 4 m stays below H3 at 105 m
    n = hill_zone(pump_points=((0.0, 4.0), (0.01, 3.3), (0.02, 1.5)))
    system = HydraulicSystem(n, OPTS)
    r = system.solve()
    pu = _idx(n, "PU")
    hill = _idx(n, HILL)
    assert r.converged, r.message
    assert r.link_state[pu] == CLOSED and r.flow_m3s[pu] == 0
    assert not r.supplied[hill].any()
    assert "4 node(s) unsupplied" in r.message
    zones = system.shut_zones(r)
    assert len(zones) == 1
    z = zones[0]
    assert sorted(n.node_id[z.nodes]) == HILL
    assert "PU" in set(n.link_id[z.devices])
    assert z.required_m3s == pytest.approx(0.016, rel=1e-12)  # 4 + 5 + 3 + 4 L/s
    assert r.undelivered_m3s == pytest.approx(0.016, rel=1e-12)
    _check_against_root(n, r)
    # the run turns it into a warning finding at the pump
    from gridflow.jobs.run import shut_zone_findings

    f = Findings()
    nodes, short = shut_zone_findings("peak_hour", system, r, f,
                                      np.full(n.n_links, None, dtype=object),
                                      meter_link_idx=np.array([_idx(n, "H12"), 0, -1]))
    assert (nodes, short) == (4, pytest.approx(0.016))
    at = dict(zip(f.feature_id, f.message, strict=True))
    assert f.count(kind="supply_cut_by_device", severity="warning") == len(at) >= 1
    assert "PU" in at and set(f.layer) == {"pipes_peak_hour"}
    # 4 nodes, the one meter on H12 (the other sits on main P1, one is not allocated), 16 L/s
    assert "4 node(s) and 1 meter(s)" in at["PU"] and "16 L/s" in at["PU"]


def test_statuses_are_physical_at_the_solution():
    # every device's status agrees with the heads and flows it ends with
    for kw in ({}, {"draw_m4": 0.15}, {"factor": 3.0}):
        n = hill_zone(**kw)
        system = HydraulicSystem(n, OPTS)
        r = system.solve()
        pu = _idx(n, "PU")
        dh = r.head_m[_idx(n, ["H1"])[0]] - r.head_m[_idx(n, ["M2"])[0]]
        # a running pump lifts less than its shut-off head, with forward flow
        assert 0 < dh < 60.0 and r.flow_m3s[pu] > 0
        hl = independent_headloss(n, r.flow_m3s)
        assert -hl[pu] == pytest.approx(dh, abs=1e-6)
