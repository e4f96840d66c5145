"""Scenarios: demand factors per category, tank levels, pump status, closed valves."""

from __future__ import annotations

import numpy as np
import pytest

from gridflow.config.demand import DEFAULT_FACTORS
from gridflow.demand import allocate, scenario_demand, scenario_network
from gridflow.errors import ConfigError
from gridflow.findings import Findings
from gridflow.network.model import STATUS_CLOSED, STATUS_OPEN

from .demand_helpers import make_cfg, make_clean, make_meters, node_pos

CATS = {"residential": {"codes": ["RES"]}, "commercial": {"codes": ["COM"]}}


def _setup(scenarios=None, **demand):
    meters = make_meters([("M1", 125.0, 10.0, 1000.0, "RES"), ("M2", 250.0, 5.0, 400.0, "COM"),
                          ("M3", 250.0, -195.0, 200.0, "RES")])
    clean = make_clean(meters)
    cfg = make_cfg({"categories": CATS, "zones": {"north": {"production": "2 gpm"}}, **demand},
                   scenarios=scenarios)
    alloc = allocate(cfg, clean, Findings())
    return cfg, clean, alloc


def test_default_factors_are_within_common_practice_ranges():
    # common practice (utility master plans): max day 1.5-2.0 x average, peak hour 2.5-4
    assert DEFAULT_FACTORS["average_day"] == 1.0
    assert 1.5 <= DEFAULT_FACTORS["max_day"] <= 2.0
    assert 2.5 <= DEFAULT_FACTORS["peak_hour"] <= 4.0
    assert DEFAULT_FACTORS["max_day"] < DEFAULT_FACTORS["peak_hour"]


def test_default_scenarios_scale_every_category():
    cfg, clean, alloc = _setup()
    assert set(cfg.scenarios) == {"average_day", "max_day", "peak_hour"}
    base = alloc.node_demand_m3s
    assert base.sum() > 0
    for name, f in DEFAULT_FACTORS.items():
        np.testing.assert_allclose(scenario_demand(cfg, alloc, name), f * base, rtol=1e-12)


def test_category_factors_override_the_scenario_factor():
    scen = {"max_day": {"category_factors": {"commercial": 1.2, "non_revenue": 1.0}},
            "fire": {"factor": 1.5}}
    cfg, clean, alloc = _setup(scen)
    cat = alloc.node_category_m3s
    expected = (DEFAULT_FACTORS["max_day"] * cat["residential"] + 1.2 * cat["commercial"]
                + 1.0 * cat["non_revenue"])
    np.testing.assert_allclose(scenario_demand(cfg, alloc, "max_day"), expected, rtol=1e-12)
    # a user scenario without a default name: its own factor
    np.testing.assert_allclose(scenario_demand(cfg, alloc, "fire"), 1.5 * alloc.node_demand_m3s,
                               rtol=1e-12)
    # total of max_day = sum over categories of factor x category total (independent sum)
    total = sum(f * cat[c].sum() for c, f in
                (("residential", 1.8), ("commercial", 1.2), ("non_revenue", 1.0)))
    assert scenario_demand(cfg, alloc, "max_day").sum() == pytest.approx(total, rel=1e-12)


def test_unknown_category_factor_is_a_config_error():
    cfg, clean, alloc = _setup({"max_day": {"category_factors": {"comercial": 1.2}}})
    with pytest.raises(ConfigError, match=r"scenarios\.max_day\.category_factors\.comercial"):
        scenario_demand(cfg, alloc, "max_day")


def test_negative_factor_is_a_config_error():
    with pytest.raises(ConfigError, match=r"scenarios\.odd\.factor must be a number >= 0"):
        make_cfg(scenarios={"odd": {"factor": -1.0}})


def test_unknown_scenario_is_a_config_error():
    cfg, clean, alloc = _setup()
    with pytest.raises(ConfigError, match=r"no scenario named 'fire_day'"):
        scenario_network(cfg, clean, alloc, "fire_day")


def test_scenario_network_sets_demand_and_shares_unchanged_arrays():
    cfg, clean, alloc = _setup()
    net = scenario_network(cfg, clean, alloc, "peak_hour")
    np.testing.assert_allclose(net.demand_m3s, 3.0 * alloc.node_demand_m3s, rtol=1e-12)
    assert net.length_m is clean.network.length_m
    assert net.status is clean.network.status
    assert net.fixed_head_m is clean.network.fixed_head_m
    assert clean.network.demand_m3s.sum() == 0.0  # the clean network is not modified


def test_tank_level_sets_fixed_head_from_bottom_elevation():
    cfg, clean, alloc = _setup({"max_day": {"tank_levels": {"T": "12 ft"}}})
    net = scenario_network(cfg, clean, alloc, "max_day")
    t = node_pos(clean, "T")
    # 12 ft = 3.6576 m (international foot, exact); bottom 50 m
    assert net.fixed_head_m[t] == pytest.approx(50.0 + 12 * 0.3048, rel=1e-12)
    assert clean.network.fixed_head_m[t] == 55.0
    s = node_pos(clean, "S")
    assert net.fixed_head_m[s] == clean.network.fixed_head_m[s]


def test_tank_level_on_a_junction_is_a_config_error():
    cfg, clean, alloc = _setup({"max_day": {"tank_levels": {"A": "3 m"}}})
    with pytest.raises(ConfigError, match=r"scenarios\.max_day\.tank_levels\.A.*not a tank"):
        scenario_network(cfg, clean, alloc, "max_day")


def test_tank_level_without_tank_bottoms_says_what_is_missing():
    cfg, _, alloc = _setup({"max_day": {"tank_levels": {"T": "3 m"}}})
    clean = make_clean(None, with_tank_bottom=False)
    with pytest.raises(AttributeError, match=r"tank_bottom_m"):
        scenario_network(cfg, clean, alloc, "max_day")


@pytest.mark.parametrize("value, speed", [("off", 0.0), ("on", 1.0), ("0.85", 0.85),
                                          ("ON", 1.0)])
def test_pump_status(value, speed):
    cfg, clean, alloc = _setup({"peak_hour": {"pump_status": {"PU1": value}}})
    net = scenario_network(cfg, clean, alloc, "peak_hour")
    j = int(clean.network.link_index(["PU1"])[0])
    assert net.pump_speed[j] == speed


@pytest.mark.parametrize("pumps, match", [({"PU1": "fast"}, r"pump_status\.PU1 expects 'on'"),
                                          ({"PU1": "-1"}, r"pump_status\.PU1 expects 'on'"),
                                          ({"P2": "off"}, r"pump_status\.P2.*not a pump"),
                                          ({"PX": "on"}, r"pump_status\.PX.*no link")])
def test_bad_pump_status_is_a_config_error(pumps, match):
    cfg, clean, alloc = _setup({"peak_hour": {"pump_status": pumps}})
    with pytest.raises(ConfigError, match=match):
        scenario_network(cfg, clean, alloc, "peak_hour")


def test_closed_valves_close_valves_and_pipes():
    cfg, clean, alloc = _setup({"max_day": {"closed_valves": ["P4"]}})
    net = scenario_network(cfg, clean, alloc, "max_day")
    j = int(clean.network.link_index(["P4"])[0])
    assert net.status[j] == STATUS_CLOSED
    assert clean.network.status[j] == STATUS_OPEN
    assert (net.status != clean.network.status).sum() == 1


def test_unknown_closed_valve_is_a_config_error_naming_the_key():
    cfg, clean, alloc = _setup({"max_day": {"closed_valves": ["V1", "V99"]}})
    with pytest.raises(ConfigError, match=r"scenarios\.max_day\.closed_valves.*'V99'") as exc:
        scenario_network(cfg, clean, alloc, "max_day")
    assert exc.value.key == "scenarios.max_day.closed_valves"


def test_closing_a_pump_points_to_pump_status():
    cfg, clean, alloc = _setup({"max_day": {"closed_valves": ["PU1"]}})
    with pytest.raises(ConfigError, match=r"PU1 is a pump.*pump_status"):
        scenario_network(cfg, clean, alloc, "max_day")


def test_closed_valves_match_the_pieces_of_a_split_main():
    # a main split by topology keeps its id with a suffix; closing it by the utility's id
    # closes every piece
    import numpy as np

    from gridflow.demand.scenarios import _closable_links

    ids = np.array(["P1", "P12.1", "P12.2", "P120", "valve:7", "V3"], dtype=object)
    got_ids, pos = _closable_links(ids, ["P12", "7", "V3", "nope"])
    assert got_ids == ["P12", "P12", "7", "V3", "nope"]
    assert pos.tolist() == [1, 2, 4, 5, -1]
