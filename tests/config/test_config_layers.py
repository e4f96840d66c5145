"""Config validation of [inputs], [layers.<role>], [elevation], [roughness]."""

import pytest

from gridflow.config import parse_config
from gridflow.config.layers import unit_factor
from gridflow.errors import ConfigError


def _table(**pipes):
    return {"inputs": {"gis": "gis.gpkg"},
            "layers": {"pipes": {"input": "gis", "layer": "mains", "id": "ID",
                                 "fields": {"diameter": "D"}, "units": {"diameter": "in"},
                                 **pipes}}}


def test_minimal_config_parses():
    cfg = parse_config(_table())
    assert cfg.layers.pipes.fields == {"diameter": "D"}
    assert cfg.layers.pipes.default_diameter is None
    assert cfg.layers.hydrants is None


def test_unknown_key_is_named():
    with pytest.raises(ConfigError, match=r"unknown config key layers\.pipes\.colour"):
        parse_config(_table(colour="blue"))


def test_unknown_field_role_is_named():
    t = _table(fields={"diameter": "D", "colour": "C"})
    with pytest.raises(ConfigError, match=r"unknown config key layers\.pipes\.fields\.colour"):
        parse_config(t)


def test_numeric_field_needs_its_unit():
    t = _table(units={})
    with pytest.raises(ConfigError, match=r"layers\.pipes\.units\.diameter is required"):
        parse_config(t)


def test_unknown_unit_is_refused():
    t = _table(units={"diameter": "furlong"})
    with pytest.raises(ConfigError, match=r"layers\.pipes\.units\.diameter: unknown unit"):
        parse_config(t)


def test_search_distance_only_on_point_roles():
    t = _table(search_distance="5 m")
    with pytest.raises(ConfigError, match=r"layers\.pipes\.search_distance applies only to"):
        parse_config(t)


def test_default_diameter_range():
    with pytest.raises(ConfigError, match=r"default_diameter must be above 0 and at most 120 in"):
        parse_config(_table(default_diameter="130 in"))
    cfg = parse_config(_table(default_diameter="6 in"))
    assert cfg.layers.pipes.default_diameter == pytest.approx(0.1524)  # 6 x 0.0254 m (definition)


def test_valve_type_codes_checked():
    t = _table()
    t["layers"]["valves"] = {"input": "gis", "layer": "v", "id": "ID",
                             "fields": {"type": "T"}, "codes": {"type": {"GV": "gate"}}}
    with pytest.raises(ConfigError, match=r"layers\.valves\.codes\.type\.GV maps to 'gate'"):
        parse_config(t)


def test_hydrant_search_distance_parses_with_units():
    t = _table()
    t["layers"]["hydrants"] = {"input": "gis", "layer": "h", "id": "ID",
                               "search_distance": "50 ft"}
    cfg = parse_config(t)
    assert cfg.layers.hydrants.search_distance == pytest.approx(15.24)  # 50 x 0.3048 m


@pytest.mark.parametrize("role,field,unit,factor", [
    ("pipes", "diameter", "in", 0.0254),          # international inch, definition
    ("pipes", "diameter", "mm", 0.001),
    ("pipes", "pressure_rating", "psi", 0.70307),  # 1 psi = 2.3067 ft of water (physics.md)
    ("hydrants", "required_fire_flow", "gpm", 6.30902e-5),  # 1 gpm = 0.0630902 L/s
    ("sources", "head", "ft", 0.3048),
    ("nodes", "elevation", "m of head", 1.0),
])
def test_unit_factors(role, field, unit, factor):
    assert unit_factor(role, field, unit) == pytest.approx(factor, rel=1e-4)


def test_a_role_may_list_several_layers():
    from gridflow.config.layers import layer_sections

    t = _table()
    t["layers"]["valves"] = [
        {"input": "gis", "layer": "SystemValves", "id": "VID", "fields": {"status": "POS"}},
        {"input": "gis", "layer": "PRVStations", "id": "SID",
         "fields": {"type": "KIND", "setting": "SET", "direction": "BRG"},
         "units": {"setting": "psi", "direction": "deg"}},
    ]
    cfg = parse_config(t)
    secs = layer_sections(cfg.layers, "valves")
    assert [s.layer for s in secs] == ["SystemValves", "PRVStations"]
    assert cfg.layers.valves.layer == "SystemValves"  # the first, for one-layer readers
    assert layer_sections(cfg.layers, "pipes")[0] is cfg.layers.pipes
    assert layer_sections(cfg.layers, "hydrants") == ()


def test_list_entries_are_named_by_position():
    t = _table()
    t["layers"]["valves"] = [
        {"input": "gis", "layer": "A", "id": "V"},
        {"input": "gis", "layer": "B", "id": "V", "fields": {"colour": "C"}},
    ]
    with pytest.raises(ConfigError, match=r"layers\.valves\[1\]\.fields\.colour"):
        parse_config(t)
    t["layers"]["valves"] = []
    with pytest.raises(ConfigError, match=r"layers\.valves is an empty list"):
        parse_config(t)


def test_direction_bearing_unit_and_tank_levels():
    t = _table()
    t["layers"]["pumps"] = {"input": "gis", "layer": "P", "id": "ID",
                            "fields": {"direction": "DIR"}, "units": {"direction": "rad"}}
    with pytest.raises(ConfigError, match=r"layers\.pumps\.units\.direction.*'deg'"):
        parse_config(t)
    t["layers"]["pumps"]["units"] = {"direction": "degrees"}
    t["layers"]["tanks"] = {"input": "gis", "layer": "T", "id": "ID", "levels": "elevation",
                            "fields": {"bottom_elevation": "B", "level": "L"},
                            "units": {"bottom_elevation": "ft", "level": "ft"}}
    assert parse_config(t).layers.tanks.levels == "elevation"
    t["layers"]["pumps"]["levels"] = "elevation"
    with pytest.raises(ConfigError, match=r"layers\.pumps\.levels applies only to tanks"):
        parse_config(t)
