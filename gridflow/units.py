"""Unit conversion at the edges.

Inside gridflow everything is SI: metres, cubic metres per second, metres of head. User units
are converted once on read and once on write. The factors below are exact definitions
(international foot and inch, US gallon) or derive from them with standard gravity and the
density of water at 4 degC; ``tests/test_units.py`` checks every one against ``pint``.

Pressure in metres of water column uses ``rho g`` of water at about 4 degC (9.80665 kPa per m),
the usual convention in distribution-system modelling (common practice).
"""

from __future__ import annotations

from typing import Literal

import numpy as np

UnitSystem = Literal["US", "SI"]

G = 9.80665  # standard gravity [m/s2]
RHO_WATER = 1000.0  # [kg/m3], nominal
NU_WATER_20C = 1.004e-6  # kinematic viscosity at 20 degC [m2/s]

FT = 0.3048
INCH = 0.0254
US_GALLON = 3.785411784e-3  # m3
GPM = US_GALLON / 60.0  # m3/s per US gallon per minute
PSI_PA = 6894.757293168361
KPA_PER_M_HEAD = RHO_WATER * G / 1000.0  # 9.80665
M_HEAD_PER_PSI = PSI_PA / (RHO_WATER * G)  # 0.70307 m of water per psi

# factor to SI for each unit name accepted in configs
LENGTH = {"m": 1.0, "ft": FT, "km": 1000.0, "mi": 1609.344, "in": INCH, "mm": 1e-3, "cm": 1e-2}
DIAMETER = {"mm": 1e-3, "in": INCH, "m": 1.0, "cm": 1e-2, "ft": FT}
FLOW = {  # to m3/s
    "m3/s": 1.0,
    "l/s": 1e-3,
    "lps": 1e-3,
    "gpm": US_GALLON / 60.0,
    "mgd": 1e6 * US_GALLON / 86400.0,
    "gpd": US_GALLON / 86400.0,
    "gal/day": US_GALLON / 86400.0,
    "m3/h": 1.0 / 3600.0,
    "m3/day": 1.0 / 86400.0,
    "m3/d": 1.0 / 86400.0,
    "l/day": 1e-3 / 86400.0,
    "ml/day": 1e3 / 86400.0,  # megalitres per day
    "m3/month": 1.0 / (86400.0 * 365.25 / 12.0),
    "gal/month": US_GALLON / (86400.0 * 365.25 / 12.0),
    "m3/year": 1.0 / (86400.0 * 365.25),
    "gal/year": US_GALLON / (86400.0 * 365.25),
    "kgal/month": 1000.0 * US_GALLON / (86400.0 * 365.25 / 12.0),
}
PRESSURE = {  # to metres of water head
    "m": 1.0,
    "psi": M_HEAD_PER_PSI,
    "kpa": 1.0 / KPA_PER_M_HEAD,
    "bar": 100.0 / KPA_PER_M_HEAD,
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
