"""Config for field hydrant flow tests: the ``[layers.flow_tests]`` and
``[layers.flow_test_outlets]`` mappings and the ``[flow_tests]`` options.

A flow-test layer (points at the residual hydrant, or a table without geometry) holds one row
per test; an optional outlet table holds one row per flowing outlet with its pitot reading::

    [layers.flow_tests]
    input = "gis"
    layer = "HydrantFlowTests"
    id = "TEST_ID"
    fields = { date = "TEST_DATE", residual_hydrant = "RES_HYD", flowing_hydrants = "FLOW_HYD",
               static_pressure = "STATIC_PSI", residual_pressure = "RESID_PSI",
               total_flow = "FLOW_GPM" }
    units = { static_pressure = "psi", residual_pressure = "psi", total_flow = "gpm" }

``flowing_hydrants`` holds one hydrant id or several separated by ``;`` or ``,``.
"""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.config.schema import P_BOOL, P_FLOAT, P_INT, P_STR, opt, quantity
from gridflow.errors import ConfigError
from gridflow.units import DIAMETER, FLOW, M_HEAD_PER_PSI, PRESSURE

__all__ = ["FlowTestsSection", "FLOW_TEST_ROLES", "check_flow_test_layers"]

#: field roles of the two flow-test roles ('*': required) and the unit table of numeric ones
FLOW_TEST_ROLES: dict[str, dict[str, dict[str, float] | None | str]] = {
    "flow_tests": {"date*": "text", "residual_hydrant*": "text", "flowing_hydrants*": "text",
                   "static_pressure*": PRESSURE, "residual_pressure*": PRESSURE,
                   "total_flow": FLOW, "scenario": "text", "demand_factor": None},
    "flow_test_outlets": {"test*": "text", "hydrant*": "text", "pitot_pressure*": PRESSURE,
                          "outlet_diameter*": DIAMETER, "coefficient": None},
}


@dataclass(frozen=True, kw_only=True)
class FlowTestsSection:
    """Options for checking the model against field flow tests and calibrating roughness."""

    enabled: bool = opt(True, parse=P_BOOL,
                        doc="simulate the mapped flow tests in every run (layers.flow_tests)")
    tolerance: float = opt(5 * M_HEAD_PER_PSI, parse=quantity("pressure", minimum=0.0),
                           doc="flag a test whose modelled residual pressure differs from the "
                               "field's by more than this (common practice: 5 psi)")
    max_age_years: int = opt(10, parse=P_INT,
                             doc="tests older than this many years are findings and left out "
                                 "(0: no limit)")
    scenario: str = opt("", parse=P_STR,
                        doc="demand level of tests that give neither scenario nor factor "
                            "(empty: average-day demand)")
    coefficient: float = opt(0.9, parse=P_FLOAT,
                             doc="outlet discharge coefficient where none is mapped (NFPA 291: "
                                 "0.90 for a smooth, well-rounded outlet)")
    min_factor: float = opt(0.4, parse=P_FLOAT,
                            doc="calibration: lowest factor on a group's roughness")
    max_factor: float = opt(1.6, parse=P_FLOAT,
                            doc="calibration: highest factor on a group's roughness")
    sensitivity: float = opt(0.1 * M_HEAD_PER_PSI, parse=quantity("pressure", minimum=0.0),
                             doc="calibration: a test informs a group when a 10 % change of "
                                 "the group's roughness moves its residual by at least this")
    batch_size: int = opt(25, parse=P_INT, doc="tests per parallel task")


def check_flow_test_layers(layers, inputs: dict, sec: FlowTestsSection) -> None:
    """Cross-checks of the two flow-test mappings (names known, required fields, units).

    Raises
    ------
    ConfigError
        Naming the config key.
    """
    for role, spec in FLOW_TEST_ROLES.items():
        m = getattr(layers, role, None)
        where = f"layers.{role}"
        if m is None:
            continue
        if m.input not in inputs:
            raise ConfigError(f"config key {where}.input names {m.input!r}, which is not in "
                              f"[inputs] ({', '.join(inputs)})", key=f"{where}.input")
        known = {k.rstrip("*"): v for k, v in spec.items()}
        for r in m.fields:
            if r not in known:
                raise ConfigError(f"unknown config key {where}.fields.{r}; {role} understand: "
                                  f"{', '.join(sorted(known))}", key=f"{where}.fields.{r}")
        for k in spec:
            if k.endswith("*") and k[:-1] not in m.fields:
                raise ConfigError(f"config key {where}.fields.{k[:-1]} is required",
                                  key=f"{where}.fields.{k[:-1]}")
        for r in m.fields:
            if isinstance(known[r], dict):
                unit_of(role, r, m.units.get(r), f"{where}.units.{r}")
    if sec.min_factor <= 0 or sec.max_factor <= sec.min_factor:
        raise ConfigError("config keys flow_tests.min_factor and flow_tests.max_factor must "
                          "satisfy 0 < min_factor < max_factor", key="flow_tests.min_factor")
    if layers.flow_test_outlets is not None and layers.flow_tests is None:
        raise ConfigError("config key layers.flow_test_outlets needs layers.flow_tests",
                          key="layers.flow_test_outlets")


def unit_of(role: str, field_role: str, unit: str | None, key: str) -> float:
    """Factor to SI (pressures as metres of head) of a numeric flow-test field."""
    table = {k.rstrip("*"): v for k, v in FLOW_TEST_ROLES[role].items()}[field_role]
    if not isinstance(table, dict):
        return 1.0
    if unit is None:
        raise ConfigError(f"config key {key} is required: {field_role} is a measured value; "
                          f"give its unit, one of {', '.join(sorted(table))}", key=key)
    lowered = {k.lower(): v for k, v in table.items()}
    u = unit.strip().lower()
    u = {"lps": "l/s", "inch": "in", "inches": "in"}.get(u, u)
    if u not in lowered:
        raise ConfigError(f"config key {key}: unknown unit {unit!r} for {field_role}; expected "
                          f"one of {', '.join(sorted(table))}", key=key)
    return lowered[u]
