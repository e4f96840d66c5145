"""The valid range of every numeric config value, checked after parsing.

Each number and quantity in the config has an entry in :data:`CONFIG_RANGES` (key patterns:
``*`` stands for a free name or a list position). :func:`check_ranges` walks a parsed
:class:`~gridflow.config.Config` and stops at the first value that is not finite or lies outside
its range, naming the key; :func:`check_relations` checks values against each other (PDD
pressures in order, a scenario to run ...). ``scripts/config_reference.py`` prints the ranges
in the README's config reference, and ``tests/config/test_ranges.py`` fails when a numeric key
has no range.

Bounds are limits of the possible, not of good practice: a value outside them cannot describe a
real water system (a snap tolerance of kilometres, a pressure criterion of thousands of psi,
zero solver iterations), so the run stops before reading anything.
"""

from __future__ import annotations

import dataclasses
import fnmatch
import math
from dataclasses import dataclass
from typing import Any

from gridflow.errors import ConfigError
from gridflow.units import GPM, INCH, M_HEAD_PER_PSI

__all__ = ["Range", "CONFIG_RANGES", "check_ranges", "check_relations", "range_for",
           "numeric_values"]

_PSI = M_HEAD_PER_PSI
_GPM = GPM


@dataclass(frozen=True)
class Range:
    """``lo <= v <= hi`` (``lo < v`` when ``lo_open``); ``unit`` and ``scale`` for messages."""

    lo: float
    hi: float
    lo_open: bool = False
    unit: str = ""
    scale: float = 1.0  # SI value x scale = shown value
    why: str = ""

    def holds(self, v: float) -> bool:
        return math.isfinite(v) and (v > self.lo if self.lo_open else v >= self.lo) and \
            v <= self.hi

    def text(self) -> str:
        lo = f"{self.lo * self.scale:g}"
        hi = f"{self.hi * self.scale:g}"
        u = f" {self.unit}" if self.unit else ""
        return f"{'above' if self.lo_open else 'from'} {lo}{u if self.lo_open else ''} " \
               f"{'and at most' if self.lo_open else 'to'} {hi}{u}"


def _len(lo, hi, **kw) -> Range:
    return Range(lo, hi, unit="m", **kw)


def _p(lo_psi, hi_psi, **kw) -> Range:
    return Range(lo_psi * _PSI, hi_psi * _PSI, unit="psi", scale=1 / _PSI, **kw)


def _v(lo, hi, **kw) -> Range:
    return Range(lo, hi, unit="m/s", **kw)


def _q(lo_gpm, hi_gpm, **kw) -> Range:
    return Range(lo_gpm * _GPM, hi_gpm * _GPM, unit="gpm", scale=1 / _GPM, **kw)


_PRESSURE = _p(0, 1000)  # no distribution system works near 1000 psi (common practice)

#: key pattern -> valid range (SI, pressures as metres of head)
CONFIG_RANGES: dict[str, Range] = {
    "run.snap_tolerance": _len(0, 50),
    "layers.*.search_distance": _len(0, 5000),
    "layers.*.default_diameter": Range(0, 120 * INCH, lo_open=True, unit="in",
                                       scale=1 / INCH),
    "roughness.default": Range(0, 200, lo_open=True),
    "roughness.table.*.value": Range(0, 200, lo_open=True),
    "roughness.table.*.installed_before": Range(1000, 10000),
    "criteria.min_pressure": _PRESSURE,
    "criteria.min_pressure_any": _PRESSURE,
    "criteria.max_pressure": _p(0, 1000, lo_open=True),
    "criteria.max_static_pressure": _p(0, 1000, lo_open=True),
    "criteria.max_velocity": _v(0, 30, lo_open=True),
    "criteria.max_velocity_fire": _v(0, 30, lo_open=True),
    "criteria.max_unit_headloss": Range(0, 1, lo_open=True, unit="m/m"),
    "solver.max_iter": Range(1, 100000),
    "solver.flow_tolerance": Range(0, 1e-2, lo_open=True, unit="m3/s"),
    "solver.head_tolerance": Range(0, 1.0, lo_open=True, unit="m"),
    "solver.pdd_min_pressure": _PRESSURE,
    "solver.pdd_required_pressure": _p(0, 1000, lo_open=True),
    "solver.max_status_rounds": Range(1, 10_000),
    "solver.flow_relative_tolerance": Range(0, 1e-2, lo_open=True),
    "solver.pump_shutoff_ratio": Range(1, 5, lo_open=True),  # above 1: shut-off above design
    "demand.search_distance": _len(0, 10000),
    "demand.max_main_diameter": _len(0, 10),
    "demand.zones.*.production": Range(0, 100, unit="m3/s"),
    "demand.points.*.flow": Range(0, 100, unit="m3/s"),
    "scenarios.*.factor": Range(0, 100),
    "scenarios.*.category_factors.*": Range(0, 100),
    "scenarios.*.tank_levels.*": _len(0, 200),
    "fireflow.residual_pressure": _PRESSURE,
    "fireflow.system_minimum": _PRESSURE,
    "fireflow.default_required": _q(0, 50000, lo_open=True),
    "fireflow.required_by_land_use.*": _q(0, 50000),
    "fireflow.required_by_zone.*": _q(0, 50000),
    "fireflow.lateral_length": _len(0, 1000),
    "fireflow.lateral_diameter": Range(0, 1.0, lo_open=True, unit="m"),
    "fireflow.lateral_c": Range(0, 200, lo_open=True),
    "fireflow.lateral_roughness": _len(0, 0.1),
    "fireflow.hydrant_k": Range(0, 1000),
    "fireflow.batch_size": Range(1, 1_000_000),
    "fireflow.progress_every": Range(1, 1_000_000),
    "report.worst_rows": Range(1, 100_000),
    "flow_tests.tolerance": _PRESSURE,
    "flow_tests.max_age_years": Range(0, 200),
    "flow_tests.coefficient": Range(0, 1, lo_open=True),
    "flow_tests.min_factor": Range(0, 10, lo_open=True),
    "flow_tests.max_factor": Range(0, 10, lo_open=True),
    "flow_tests.sensitivity": _PRESSURE,
    "flow_tests.batch_size": Range(1, 1_000_000),
    "segments.max_length": _len(0, 1_000_000),
    "segments.max_meters": Range(0, 10_000_000),
    "segments.batch_size": Range(1, 1_000_000),
}


def range_for(key: str) -> Range | None:
    """The range of a config key (list positions written ``name[3]`` or ``name.3``)."""
    k = key.replace("[", ".").replace("]", "")
    for pat, r in CONFIG_RANGES.items():
        if fnmatch.fnmatchcase(k, pat):
            return r
    return None


def numeric_values(obj: Any, where: str = ""):
    """(key, value) for every number in a parsed config section, depth first."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        for f in dataclasses.fields(obj):
            if "parse" not in f.metadata:
                continue
            yield from numeric_values(getattr(obj, f.name), f"{where}.{f.name}".lstrip("."))
    elif isinstance(obj, dict):
        for k, v in obj.items():
            yield from numeric_values(v, f"{where}.{k}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from numeric_values(v, f"{where}[{i}]")
    elif isinstance(obj, (int, float)) and not isinstance(obj, bool):
        yield where, obj


def check_ranges(cfg: Any) -> None:
    """Stop at the first number that is not finite or is out of its range (naming the key).

    Raises
    ------
    ConfigError
        Naming the key, the value and the valid range.
    """
    for key, v in numeric_values(cfg):
        r = range_for(key)
        if r is None:
            raise ConfigError(f"config key {key} has no documented range", key=key)
        if not r.holds(float(v)):
            shown = float(v) * r.scale
            what = "is not a finite number" if not math.isfinite(v) else "is out of range"
            u = f" {r.unit}" if r.unit else ""
            raise ConfigError(f"config key {key} = {shown:g}{u} {what}; valid: {r.text()}",
                              key=key)


def check_relations(cfg: Any) -> None:
    """Values that must agree with each other.

    Raises
    ------
    ConfigError
        Naming the key at fault.
    """
    s = cfg.solver
    if s.pressure_driven and not s.pdd_required_pressure > s.pdd_min_pressure:
        raise ConfigError("config key solver.pdd_required_pressure must be above "
                          "solver.pdd_min_pressure (the pressure at which a node delivers its "
                          "full demand above the one at which it delivers nothing)",
                          key="solver.pdd_required_pressure")
    c = cfg.criteria
    if not c.max_pressure > c.min_pressure:
        raise ConfigError("config key criteria.max_pressure must be above "
                          "criteria.min_pressure", key="criteria.max_pressure")
    if not cfg.scenarios:
        raise ConfigError("config key scenarios is empty: name at least one scenario (or leave "
                          "the table out for average_day, max_day and peak_hour)",
                          key="scenarios")
