"""Demand allocation: meters to mains, split along mains, zone spread, point demands.

Networks and meters are built in code (tests/demand_helpers.py, fictional town of Millbrook).
Unit factors are checked against pint; the split and spread rules are checked against values
worked by hand from the geometry (common practice: a service tapped part-way along a main
loads its two end nodes in proportion to distance; unmetered use is spread by main length).
"""

from __future__ import annotations

import math

import numpy as np
import pint
import pytest
import shapely

from gridflow.demand import allocate, run_info_rows
from gridflow.errors import ConfigError, InputError
from gridflow.findings import Findings
from gridflow.network.model import STATUS_CLOSED
from gridflow.units import FLOW

from .demand_helpers import CRS, make_cfg, make_clean, make_meters, node_pos

UREG = pint.UnitRegistry()
GPD = UREG.Quantity(1.0, "gallon/day").to("m**3/s").magnitude  # pint's US liquid gallon

#: how each unit name of the FLOW table is written for pint
PINT_FLOW = {
    "m3/s": "m**3/s", "l/s": "liter/second", "lps": "liter/second", "gpm": "gallon/minute",
    "mgd": "megagallon/day", "gpd": "gallon/day", "gal/day": "gallon/day", "m3/h": "m**3/hour",
    "m3/day": "m**3/day", "m3/d": "m**3/day", "l/day": "liter/day", "ml/day": "megaliter/day",
    "m3/month": "m**3/month", "gal/month": "gallon/month", "m3/year": "m**3/year",
    "gal/year": "gallon/year", "kgal/month": "kilogallon/month",
}


def demand_of(alloc, clean, node_id: str) -> float:
    return float(alloc.node_demand_m3s[node_pos(clean, node_id)])


# ------------------------------------------------------------------------------- units


@pytest.mark.parametrize("unit", sorted(FLOW))
def test_flow_units_agree_with_pint(unit):
    expected = UREG.Quantity(1.0, PINT_FLOW[unit]).to("m**3/s").magnitude  # pint
    assert FLOW[unit] == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("unit", ["m3/month", "kgal/month", "l/s", "gpm"])
def test_consumption_unit_is_converted_on_read(unit):
    meters = make_meters([("M1", 125.0, 10.0, 7.5, "RES")])
    alloc = allocate(make_cfg({"consumption_unit": unit}), make_clean(meters), Findings())
    expected = UREG.Quantity(7.5, PINT_FLOW[unit]).to("m**3/s").magnitude  # pint
    assert alloc.node_demand_m3s.sum() == pytest.approx(expected, rel=1e-12)


def test_unknown_consumption_unit_is_a_config_error():
    with pytest.raises(ConfigError, match=r"demand\.consumption_unit expects a flow unit"):
        make_cfg({"consumption_unit": "furlongs"})


# ------------------------------------------------------------------------------- split


@pytest.mark.parametrize("t", [0.0, 0.1, 0.25, 0.5, 0.9, 1.0])
def test_split_is_linear_in_position(t):
    # P2 runs from A (100, 0) to B (200, 0); a meter 7 m off the main at x = 100 + 100 t
    q = 1000.0
    meters = make_meters([("M1", 100.0 + 100.0 * t, -7.0 if 0 < t < 1 else 0.0, q, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg(), clean, Findings())
    assert demand_of(alloc, clean, "A") == pytest.approx((1 - t) * q * GPD, rel=1e-12, abs=0)
    assert demand_of(alloc, clean, "B") == pytest.approx(t * q * GPD, rel=1e-12, abs=0)
    if 0 < t < 1:  # at t = 0 or 1 the meter is at a node shared with P1 or P3
        assert alloc.meter_link_idx[0] == 1  # P2


def test_split_follows_the_network_direction_not_the_digitising_direction():
    # P3 is from B (200, 0) to C (300, 0) but digitised from C to B; 60 m from B
    q = 500.0
    meters = make_meters([("M1", 260.0, -5.0, q, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg(), clean, Findings())
    assert demand_of(alloc, clean, "B") == pytest.approx(0.4 * q * GPD, rel=1e-12)
    assert demand_of(alloc, clean, "C") == pytest.approx(0.6 * q * GPD, rel=1e-12)
    assert alloc.meter_distance_m[0] == pytest.approx(5.0)


@pytest.mark.parametrize("node, xy", [("B", (200.0, 0.0)), ("C", (300.0, 0.0)),
                                      ("A", (100.0, 0.0))])
def test_meter_exactly_at_a_node_goes_wholly_to_it(node, xy):
    meters = make_meters([("M1", *xy, 321.0, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg(), clean, Findings())
    d = alloc.node_demand_m3s
    j = node_pos(clean, node)
    assert np.count_nonzero(d) == 1  # exactly nothing elsewhere, not approximately
    assert d[j] == pytest.approx(321.0 * GPD, rel=1e-12)


def test_nearest_split_gives_the_whole_meter_to_the_nearer_end():
    meters = make_meters([("M1", 130.0, 4.0, 100.0, "RES"), ("M2", 180.0, 4.0, 50.0, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg({"split": "nearest"}), clean, Findings())
    assert demand_of(alloc, clean, "A") == pytest.approx(100.0 * GPD, rel=1e-12)
    assert demand_of(alloc, clean, "B") == pytest.approx(50.0 * GPD, rel=1e-12)


def test_fixed_head_end_takes_no_demand():
    # P1 runs from source S to A; a meter near S goes wholly to A
    meters = make_meters([("M1", 10.0, 3.0, 100.0, "RES"), ("M2", 390.0, -197.0, 80.0, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg(), clean, Findings())
    assert demand_of(alloc, clean, "A") == pytest.approx(100.0 * GPD, rel=1e-12)
    assert demand_of(alloc, clean, "E") == pytest.approx(80.0 * GPD, rel=1e-12)
    assert demand_of(alloc, clean, "S") == 0.0 and demand_of(alloc, clean, "T") == 0.0


# ------------------------------------------------------------------------------- eligibility


def test_same_zone_keeps_a_meter_in_its_zone():
    # 80 m from P3 (north) and 120 m from P4 (south); the meter says south
    meters = make_meters([("M1", 250.0, -80.0, 100.0, "RES", "south")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg(), clean, Findings())
    assert demand_of(alloc, clean, "D") == pytest.approx(50.0 * GPD, rel=1e-12)
    assert demand_of(alloc, clean, "E") == pytest.approx(50.0 * GPD, rel=1e-12)
    alloc2 = allocate(make_cfg({"same_zone": False}), clean, Findings())
    assert demand_of(alloc2, clean, "B") == pytest.approx(50.0 * GPD, rel=1e-12)
    assert demand_of(alloc2, clean, "C") == pytest.approx(50.0 * GPD, rel=1e-12)


def test_closed_main_takes_no_meters():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES")])
    clean = make_clean(meters, link_changes={"P2": {"status": STATUS_CLOSED}})
    alloc = allocate(make_cfg(), clean, Findings())
    assert alloc.meter_link_idx[0] == 0  # P1, 26.9 m away, instead of P2 at 10 m
    assert alloc.meter_distance_m[0] == pytest.approx(math.hypot(25.0, 10.0))
    assert demand_of(alloc, clean, "A") == pytest.approx(100.0 * GPD, rel=1e-12)


def test_wide_main_is_skipped_and_the_finding_says_why():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES")])
    clean = make_clean(meters)
    findings = Findings()
    cfg = make_cfg({"max_main_diameter": "5 in", "search_distance": "20 m"})
    alloc = allocate(cfg, clean, findings)
    assert alloc.node_demand_m3s.sum() == 0.0
    assert findings.count("meter_unallocated") == 1
    msg = findings.message[findings.kind.index("meter_unallocated")]
    assert "M1" in msg and "P2" in msg and "10.0 m" in msg and "max_main_diameter" in msg


# ------------------------------------------------------------------------------- bad meters


def test_unallocatable_meter_is_a_finding_with_its_distance():
    far = (1000.0, 1000.0)
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("FAR9", *far, 100.0, "RES")])
    clean = make_clean(meters)
    for units, factor, unit in (("SI", 1.0, "m"), ("US", 1 / 0.3048, "ft")):
        findings = Findings()
        alloc = allocate(make_cfg(units=units), clean, findings)
        assert findings.count("meter_unallocated") == 1
        i = findings.kind.index("meter_unallocated")
        assert findings.feature_id[i] == "FAR9"
        assert findings.layer[i] == "billing_meters"
        d = math.hypot(1000.0 - 300.0, 1000.0 - 0.0)  # to C, the end of P3
        assert f"{d * factor:.1f} {unit}" in findings.message[i]
        assert "P3" in findings.message[i]
        assert alloc.meter_distance_m[1] == pytest.approx(d)
        assert alloc.meter_link_idx[1] == -1
        assert alloc.counts["unallocated"] == 1 and alloc.counts["allocated"] == 1
        assert alloc.node_demand_m3s.sum() == pytest.approx(100.0 * GPD, rel=1e-12)


@pytest.mark.parametrize("bad, words", [(-5.0, "-5.0"), ("lots", "'lots'"),
                                        (float("nan"), "missing"), (None, "missing"),
                                        (float("inf"), "inf")])
def test_bad_consumption_is_a_finding_naming_the_meter(bad, words):
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("BAD-7", 150.0, 5.0, bad, "RES")])
    findings = Findings()
    alloc = allocate(make_cfg(), make_clean(meters), findings)
    assert findings.count("meter_bad_consumption") == 1
    i = findings.kind.index("meter_bad_consumption")
    assert findings.feature_id[i] == "BAD-7"
    assert "BAD-7" in findings.message[i] and words in findings.message[i]
    assert "USE_GPD" in findings.message[i]  # the utility's field name
    assert alloc.node_demand_m3s.sum() == pytest.approx(100.0 * GPD, rel=1e-12)
    assert alloc.counts["bad_consumption"] == 1


def test_numeric_text_consumption_is_accepted():
    meters = make_meters([("M1", 125.0, 10.0, "100", "RES")])
    alloc = allocate(make_cfg(), make_clean(meters), Findings())
    assert alloc.node_demand_m3s.sum() == pytest.approx(100.0 * GPD, rel=1e-12)


def test_meter_without_location_is_a_finding():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("M2", 0, 0, 50.0, "RES")])
    meters.loc[1, "geometry"] = None
    findings = Findings()
    allocate(make_cfg(), make_clean(meters), findings)
    i = findings.kind.index("meter_unallocated")
    assert findings.feature_id[i] == "M2" and "no location" in findings.message[i]


def test_meter_layer_in_another_crs_is_an_input_error():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES")]).set_crs("EPSG:3857",
                                                                      allow_override=True)
    with pytest.raises(InputError, match=r"EPSG:3857.*EPSG:32616.*reproject"):
        allocate(make_cfg(), make_clean(meters), Findings())


# ------------------------------------------------------------------------------- categories

CATS = {"residential": {"codes": ["RES", "R2"]}, "commercial": {"codes": ["COM", 41]},
        "industrial": {"codes": ["IND"]}}


def test_categories_are_mapped_from_codes():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("M2", 150.0, 3.0, 10.0, "COM"),
                          ("M3", 175.0, 3.0, 20.0, 41.0), ("M4", 250.0, 3.0, 30.0, "XYZ"),
                          ("M5", 250.0, 3.0, 40.0, None), ("M6", 250.0, 3.0, 50.0, "industrial")])
    findings = Findings()
    alloc = allocate(make_cfg({"categories": CATS}), make_clean(meters), findings)
    by_cat = {c: a.sum() / GPD for c, a in alloc.node_category_m3s.items()}
    assert by_cat == pytest.approx({"residential": 100.0 + 30.0 + 40.0, "commercial": 30.0,
                                    "industrial": 50.0}, rel=1e-12)
    assert findings.count("meter_unknown_category") == 1
    i = findings.kind.index("meter_unknown_category")
    assert findings.feature_id[i] == "M4" and "'XYZ'" in findings.message[i]
    assert list(alloc.meter_category) == ["residential", "commercial", "commercial",
                                          "residential", "residential", "industrial"]


def test_code_mapped_twice_is_a_config_error():
    cats = {"residential": {"codes": ["R"]}, "commercial": {"codes": ["R"]}}
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "R")])
    with pytest.raises(ConfigError, match=r"demand\.categories\.commercial\.codes\[0\].*'R'"):
        allocate(make_cfg({"categories": cats}), make_clean(meters), Findings())


# ------------------------------------------------------------------------------- zones

ZONES = {"north": {"production": "30 gpm"}, "south": {"production": "0.5 l/s",
                                                      "nrw_category": "unbilled"}}
# half the length of each pipe at each junction; a fixed-head end's half goes to the other end
LENGTH_SHARE = {"A": 150 / 300, "B": 100 / 300, "C": 50 / 300, "D": 50 / 200, "E": 150 / 200}


def _random_meters(seed: int, n: int):
    """Meters scattered near the mains of each zone, with their zone and random codes."""
    rng = np.random.default_rng(seed)
    rows = []
    codes = ["RES", "R2", "COM", 41, "IND", "ODD", None]
    for i in range(n):
        if rng.random() < 0.6:
            x, y, zone = rng.uniform(0, 300), rng.uniform(-30, 30), "north"
        else:
            x, y, zone = rng.uniform(200, 400), rng.uniform(-230, -170), "south"
        rows.append((f"M{i}", x, y, float(rng.uniform(0, 40)), codes[rng.integers(7)], zone))
    return make_meters(rows)


@pytest.mark.parametrize("spread", ["length", "meters"])
def test_allocated_total_is_metered_plus_spread_per_zone_and_category(spread):
    meters = _random_meters(7, 300)
    clean = make_clean(meters)
    cfg = make_cfg({"categories": CATS, "zones": ZONES, "spread": spread,
                    "consumption_unit": "gal/day", "search_distance": "1 km"})
    findings = Findings()
    alloc = allocate(cfg, clean, findings)
    assert alloc.counts["allocated"] == 300

    code_cat = {"RES": "residential", "R2": "residential", "COM": "commercial",
                41: "commercial", "IND": "industrial"}
    metered: dict = {}
    for code, q, zone in zip(meters["category"], meters["consumption"], meters["zone"]):
        cat = code_cat.get(code, "residential")
        metered[(zone, cat)] = metered.get((zone, cat), 0.0) + q * GPD  # q in gal/day (pint)
    production = {"north": UREG.Quantity(30, "gallon/minute").to("m**3/s").magnitude,
                  "south": 0.5e-3}  # pint; 0.5 L/s
    nrw = {"north": "non_revenue", "south": "unbilled"}

    zone = np.asarray(clean.network.zone)
    for (z, cat), q in metered.items():
        got = alloc.node_category_m3s[cat][zone == z].sum()
        assert got == pytest.approx(q, rel=1e-9)
    for z, p in production.items():
        m_z = sum(q for (zz, _), q in metered.items() if zz == z)
        assert p > m_z  # the test data leaves something to spread
        got = alloc.node_category_m3s[nrw[z]][zone == z].sum()
        assert got == pytest.approx(p - m_z, rel=1e-9)
        # allocated total of the zone equals its production
        assert alloc.node_demand_m3s[zone == z].sum() == pytest.approx(p, rel=1e-9)
    # the run_info totals say the same
    for row in alloc.totals:
        if row.category == nrw.get(row.zone):
            assert row.spread_m3s == pytest.approx(
                production[row.zone] - sum(q for (zz, _), q in metered.items()
                                           if zz == row.zone), rel=1e-9)
        else:
            assert row.metered_m3s == pytest.approx(metered[(row.zone, row.category)], rel=1e-9)
            assert row.spread_m3s == 0.0


def test_spread_by_length_follows_half_pipe_lengths():
    clean = make_clean(None)
    alloc = allocate(make_cfg({"zones": ZONES, "method": "zone_total"}), clean, Findings())
    p_north = 30 * 3.785411784e-3 / 60  # 30 US gal/min (exact definition of the US gallon)
    for node in "ABC":
        assert demand_of(alloc, clean, node) == pytest.approx(LENGTH_SHARE[node] * p_north,
                                                              rel=1e-12)
    for node in "DE":
        assert demand_of(alloc, clean, node) == pytest.approx(LENGTH_SHARE[node] * 0.5e-3,
                                                              rel=1e-12)


def test_spread_by_meter_share():
    meters = make_meters([("M1", 100.0, 5.0, 300.0, "RES", "north"),
                          ("M2", 300.0, 5.0, 100.0, "RES", "north")])
    clean = make_clean(meters)
    cfg = make_cfg({"zones": {"north": {"production": "1000 gal/day"}}, "spread": "meters"})
    alloc = allocate(cfg, clean, Findings())
    nrw = alloc.node_category_m3s["non_revenue"]
    assert nrw[node_pos(clean, "A")] == pytest.approx(0.75 * 600 * GPD, rel=1e-12)
    assert nrw[node_pos(clean, "C")] == pytest.approx(0.25 * 600 * GPD, rel=1e-12)
    assert nrw[node_pos(clean, "B")] == 0.0


def test_zone_metered_above_production_is_a_finding():
    meters = make_meters([("M1", 125.0, 10.0, 5000.0, "RES")])
    findings = Findings()
    cfg = make_cfg({"zones": {"north": {"production": "1 gpm"}}})
    alloc = allocate(cfg, make_clean(meters), findings)
    assert findings.count("zone_overmetered") == 1
    assert "north" in findings.message[findings.kind.index("zone_overmetered")]
    assert alloc.node_demand_m3s.sum() == pytest.approx(5000 * GPD, rel=1e-12)


def test_unknown_zone_is_a_config_error():
    with pytest.raises(ConfigError, match=r"demand\.zones\.west.*'north', 'south'"):
        allocate(make_cfg({"zones": {"west": {"production": "1 gpm"}}}), make_clean(None),
                 Findings())


# ------------------------------------------------------------------------------- points


def test_point_demands_at_node_hydrant_and_meter():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("BIG1", 160.0, 5.0, 999.0, "COM")])
    clean = make_clean(meters, hydrants={"H7": "E"})
    points = [{"node": "C", "flow": "2 l/s"},
              {"node": "H7", "flow": "1 l/s", "category": "institutional"},
              {"node": "BIG1", "flow": "3 l/s", "category": "commercial"}]
    alloc = allocate(make_cfg({"points": points}), clean, Findings())
    assert alloc.node_category_m3s["industrial"][node_pos(clean, "C")] == pytest.approx(2e-3)
    assert alloc.node_category_m3s["institutional"][node_pos(clean, "E")] == pytest.approx(1e-3)
    com = alloc.node_category_m3s["commercial"]
    # BIG1's billed 999 gal/day is replaced by 3 L/s, split like the meter (60 % along P2)
    assert com[node_pos(clean, "A")] == pytest.approx(0.4 * 3e-3, rel=1e-12)
    assert com[node_pos(clean, "B")] == pytest.approx(0.6 * 3e-3, rel=1e-12)
    assert alloc.counts["replaced_by_point"] == 1
    row = {(r.zone, r.category): r for r in alloc.totals}
    assert row[("south", "institutional")].point_m3s == pytest.approx(1e-3)
    assert row[("north", "residential")].metered_m3s == pytest.approx(100 * GPD, rel=1e-12)


def test_point_demand_at_unknown_id_is_a_config_error():
    cfg = make_cfg({"points": [{"node": "NOPE", "flow": "1 l/s"}]})
    with pytest.raises(ConfigError, match=r"demand\.points\[0\]\.node.*'NOPE'"):
        allocate(cfg, make_clean(None), Findings())


def test_point_demand_at_a_tank_is_a_config_error():
    cfg = make_cfg({"points": [{"node": "T", "flow": "1 l/s"}]})
    with pytest.raises(ConfigError, match=r"demand\.points\[0\]\.node.*tank or source"):
        allocate(cfg, make_clean(None), Findings())


# ------------------------------------------------------------------------------- run_info


def test_run_info_rows_report_counts_and_totals():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES"), ("M2", 900.0, 900.0, 1.0, "RES")])
    alloc = allocate(make_cfg(), make_clean(meters), Findings())
    rows = dict(run_info_rows(alloc, units="US"))
    assert rows["demand.meters.meters"] == "2"
    assert rows["demand.meters.unallocated"] == "1"
    gpm = 100.0 / (24 * 60)  # 100 gal/day in gal/min
    assert float(rows["demand.total_gpm"]) == pytest.approx(gpm, rel=1e-5)
    assert float(rows["demand.zone.north.residential.metered_gpm"]) == pytest.approx(gpm,
                                                                                   rel=1e-5)
    rows_si = dict(run_info_rows(alloc))
    assert float(rows_si["demand.total_lps"]) == pytest.approx(100 * GPD * 1000, rel=1e-5)


def test_method_none_allocates_nothing():
    meters = make_meters([("M1", 125.0, 10.0, 100.0, "RES")])
    alloc = allocate(make_cfg({"method": "none"}), make_clean(meters), Findings())
    assert alloc.node_demand_m3s.sum() == 0.0 and alloc.totals == []


def test_inputs_are_not_modified():
    meters = _random_meters(3, 20)
    before = meters.copy()
    clean = make_clean(meters)
    net_demand = clean.network.demand_m3s.copy()
    allocate(make_cfg({"zones": ZONES}), clean, Findings())
    assert meters.equals(before)
    assert np.array_equal(clean.network.demand_m3s, net_demand)
    assert shapely.equals(clean.meters.geometry.array, before.geometry.array).all()
    assert clean.meters.crs == CRS


def test_zone_total_spreads_production_by_meter_share_without_adding_billing():
    meters = make_meters([("M1", 100.0, 5.0, 300.0, "RES", "north"),
                          ("M2", 300.0, 5.0, 100.0, "RES", "north")])
    clean = make_clean(meters)
    cfg = make_cfg({"method": "zone_total", "spread": "meters",
                    "zones": {"north": {"production": "1000 gal/day"}}})
    alloc = allocate(cfg, clean, Findings())
    d = alloc.node_demand_m3s
    assert d.sum() == pytest.approx(1000 * GPD, rel=1e-12)  # production only
    assert d[node_pos(clean, "A")] == pytest.approx(0.75 * 1000 * GPD, rel=1e-12)
    assert d[node_pos(clean, "C")] == pytest.approx(0.25 * 1000 * GPD, rel=1e-12)
    assert [r.metered_m3s for r in alloc.totals] == [0.0]


def test_zero_search_distance_means_no_limit():
    meters = make_meters([("FAR", 1000.0, 1000.0, 10.0, "RES")])
    clean = make_clean(meters)
    alloc = allocate(make_cfg({"search_distance": "0 m"}), clean, Findings())
    assert alloc.meter_link_idx[0] == 2  # P3, ending at C (300, 0), the nearest main
    assert demand_of(alloc, clean, "C") == pytest.approx(10.0 * GPD, rel=1e-12)
