"""Unit conversion at the edges: every factor derived once from pint.

Inside gridflow everything is SI: metres, cubic metres per second, metres of head. User units
are converted once on read and once on write. Each factor below is computed once, when this
module is imported, from pint's definitions (international foot and inch, US gallon, standard
gravity) and kept as a plain float for the hot paths; :func:`ureg` is the one registry, shared
with the config parser. No other module types a conversion factor.

Pressure in metres of water column uses ``rho g`` of water at about 4 degC (9.80665 kPa per m),
the usual convention in distribution-system modelling (common practice).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

import numpy as np

UnitSystem = Literal["US", "SI"]


@lru_cache(maxsize=1)
def ureg():
    """gridflow's pint registry (with the trade's flow and speed abbreviations)."""
    import pint

    reg = pint.UnitRegistry()
    reg.define("gpm = gallon / minute")
    reg.define("gpd = gallon / day")
    reg.define("mgd = 1e6 gallon / day")
    reg.define("lps = liter / second")
    reg.define("fps = foot / second")
    reg.define("mps = meter / second")
    reg.define("kft = 1000 foot")
    return reg


def factor(unit: str, to: str) -> float:
    """How many ``to`` one ``unit`` is, from pint (e.g. ``factor('ft', 'm')`` = 0.3048)."""
    return float(ureg().parse_expression(unit).to(to).magnitude)


G = factor("standard_gravity", "m/s**2")  # 9.80665 [m/s2]
RHO_WATER = 1000.0  # [kg/m3], nominal (common practice)
NU_WATER_20C = 1.004e-6  # kinematic viscosity at 20 degC [m2/s] (from memory)

FT = factor("ft", "m")
INCH = factor("inch", "m")
US_GALLON = factor("gallon", "m**3")
GPM = factor("gpm", "m**3/s")  # m3/s per US gallon per minute
PSI_PA = factor("psi", "Pa")
KPA_PER_M_HEAD = RHO_WATER * G / 1000.0  # 9.80665
M_HEAD_PER_PSI = PSI_PA / (RHO_WATER * G)  # 0.70307 m of water per psi


def _table(units: dict[str, str], to: str) -> dict[str, float]:
    return {name: factor(expr, to) for name, expr in units.items()}


# factor to SI for each unit name accepted in configs (name -> pint expression)
LENGTH = _table({"m": "m", "ft": "ft", "km": "km", "mi": "mile", "in": "inch", "mm": "mm",
                 "cm": "cm"}, "m")
DIAMETER = _table({"mm": "mm", "in": "inch", "m": "m", "cm": "cm", "ft": "ft"}, "m")
FLOW = _table({  # to m3/s; a month is a twelfth of a Julian year (365.25 days)
    "m3/s": "m**3/s",
    "l/s": "l/s",
    "lps": "l/s",
    "gpm": "gallon/minute",
    "mgd": "1e6 gallon/day",
    "gpd": "gallon/day",
    "gal/day": "gallon/day",
    "m3/h": "m**3/hour",
    "m3/day": "m**3/day",
    "m3/d": "m**3/day",
    "l/day": "l/day",
    "ml/day": "megaliter/day",
    "m3/month": "m**3/month",
    "gal/month": "gallon/month",
    "m3/year": "m**3/julian_year",
    "gal/year": "gallon/julian_year",
    "kgal/month": "1000 gallon/month",
}, "m**3/s")
PRESSURE = {  # to metres of water head
    "m": 1.0,
    "psi": M_HEAD_PER_PSI,
    "kpa": factor("kPa", "Pa") / (RHO_WATER * G),
    "bar": factor("bar", "Pa") / (RHO_WATER * G),
    "ft": FT,
}
HEAD = {"m": 1.0, "ft": FT}

# output conventions per unit system: (suffix, factor from SI)
OUTPUT = {
    "US": {
        "length": ("ft", 1.0 / FT),
        "elevation": ("ft", 1.0 / FT),
        "head": ("ft", 1.0 / FT),
        "headloss": ("ft", 1.0 / FT),
        "diameter": ("in", 1.0 / INCH),
        "flow": ("gpm", 60.0 / US_GALLON),
        "demand": ("gpm", 60.0 / US_GALLON),
        "pressure": ("psi", 1.0 / M_HEAD_PER_PSI),
        "velocity": ("fps", 1.0 / FT),
        "unit_headloss": ("ft_per_kft", 1000.0),
    },
    "SI": {
        "length": ("m", 1.0),
        "elevation": ("m", 1.0),
        "head": ("m", 1.0),
        "headloss": ("m", 1.0),
        "diameter": ("mm", 1000.0),
        "flow": ("lps", 1000.0),
        "demand": ("lps", 1000.0),
        "pressure": ("kpa", KPA_PER_M_HEAD),
        "velocity": ("mps", 1.0),
        "unit_headloss": ("m_per_km", 1000.0),
    },
}


def to_si(values, unit: str, table: dict[str, float], *, what: str = "value"):
    """Convert ``values`` given in ``unit`` to SI with the factor from ``table``.

    Raises
    ------
    KeyError
        If the unit is not in the table; the message lists the accepted units.
    """
    key = unit.strip().lower()
    lowered = {k.lower(): v for k, v in table.items()}
    if key not in lowered:
        raise KeyError(f"unknown {what} unit {unit!r}; expected one of {sorted(table)}")
    return np.asarray(values, dtype=float) * lowered[key]


def out_field(quantity: str, system: UnitSystem | str) -> tuple[str, float]:
    """Field suffix and factor from SI for an output quantity, e.g. ``("psi", 1.4223)``."""
    return OUTPUT[system][quantity]


def pressure_m_from(value: float, unit: str) -> float:
    """A pressure given in ``unit`` (psi, kPa, bar, m, ft) as metres of water head."""
    return float(to_si(value, unit, PRESSURE, what="pressure"))
