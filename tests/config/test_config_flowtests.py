"""Config validation of [layers.flow_tests], [layers.flow_test_outlets] and [flow_tests]."""

import pytest

from gridflow.config import parse_config
from gridflow.errors import ConfigError
from gridflow.units import INCH, M_HEAD_PER_PSI

FIELDS = {"date": "D", "residual_hydrant": "R", "flowing_hydrants": "F",
          "static_pressure": "S", "residual_pressure": "P", "total_flow": "Q"}
UNITS = {"static_pressure": "psi", "residual_pressure": "psi", "total_flow": "gpm"}


def _table(tests=None, outlets=None, options=None):
    t = {"inputs": {"gis": "gis.gpkg"},
         "layers": {"pipes": {"input": "gis", "layer": "mains", "id": "ID",
                              "fields": {"diameter": "D"}, "units": {"diameter": "in"}},
                    "flow_tests": {"input": "gis", "layer": "tests", "id": "T",
                                   "fields": dict(FIELDS), "units": dict(UNITS), **(tests or {})}}}
    if outlets is not None:
        t["layers"]["flow_test_outlets"] = outlets
    if options is not None:
        t["flow_tests"] = options
    return t


def test_flow_tests_mapping_and_defaults():
    cfg = parse_config(_table())
    assert cfg.layers.flow_tests.fields["static_pressure"] == "S"
    # defaults: 5 psi tolerance (common practice), outlet coefficient 0.90 (NFPA 291)
    assert cfg.flow_tests.tolerance == pytest.approx(5 * M_HEAD_PER_PSI)
    assert cfg.flow_tests.coefficient == 0.9 and cfg.flow_tests.max_age_years == 10


def test_unknown_flow_test_field_is_named():
    with pytest.raises(ConfigError, match=r"unknown config key layers\.flow_tests\.fields\.crew"):
        parse_config(_table(tests={"fields": {**FIELDS, "crew": "C"}}))


def test_required_flow_test_field_is_named():
    f = dict(FIELDS)
    del f["residual_hydrant"]
    with pytest.raises(ConfigError, match=r"layers\.flow_tests\.fields\.residual_hydrant is "
                                          "required"):
        parse_config(_table(tests={"fields": f}))


def test_pressure_needs_its_unit():
    with pytest.raises(ConfigError, match=r"layers\.flow_tests\.units\.static_pressure is "
                                          "required"):
        parse_config(_table(tests={"units": {"residual_pressure": "psi", "total_flow": "gpm"}}))
    with pytest.raises(ConfigError, match=r"unknown unit 'furlong'"):
        parse_config(_table(tests={"units": {**UNITS, "static_pressure": "furlong"}}))


def test_outlets_mapping():
    cfg = parse_config(_table(outlets={
        "input": "gis", "layer": "outlets", "id": "O",
        "fields": {"test": "T", "hydrant": "H", "pitot_pressure": "P", "outlet_diameter": "D"},
        "units": {"pitot_pressure": "psi", "outlet_diameter": "in"}}))
    assert cfg.layers.flow_test_outlets.layer == "outlets"
    from gridflow.config.flowtests import unit_of

    assert unit_of("flow_test_outlets", "outlet_diameter", "in", "k") == INCH


def test_bounds_must_be_ordered():
    with pytest.raises(ConfigError, match=r"flow_tests\.min_factor"):
        parse_config(_table(options={"min_factor": 1.2, "max_factor": 0.8}))
