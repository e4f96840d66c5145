"""Contract field names and display units of the result layers, per unit system.

The unit system is always given (the run's typed config), never guessed from field names.
"""

from __future__ import annotations

from dataclasses import dataclass

from gridflow.errors import GridflowError
from gridflow.units import FT, KPA_PER_M_HEAD, M_HEAD_PER_PSI, UnitSystem, out_field

__all__ = ["Fields", "fields_for"]


@dataclass(frozen=True)
class Fields:
    """Field names and display units of one unit system."""

    system: UnitSystem
    elevation: str
    head: str
    pressure: str
    demand: str
    required_demand: str
    length: str
    diameter: str
    flow: str
    velocity: str
    headloss: str
    unit_headloss: str
    rating: str
    static_pressure: str
    required_flow: str
    available_flow: str
    residual_pressure: str
    u_len: str
    u_pressure: str
    u_flow: str
    u_velocity: str
    u_diameter: str
    u_unit_headloss: str
    head_per_pressure: float  # head units per pressure unit (ft per psi or m per kPa)
    long_length: tuple[str, float]  # (unit, factor from the length unit) for totals


def fields_for(system: UnitSystem) -> Fields:
    """The contract's field names for ``"US"`` or ``"SI"`` (from :data:`gridflow.units.OUTPUT`,
    the table the result layers are written with)."""
    if system in ("US", "SI"):
        def f(quantity: str, stem: str | None = None) -> str:
            return f"{stem or quantity}_{out_field(quantity, system)[0]}"

        names = (f("elevation"), f("head"), f("pressure"), f("demand"),
                 f("demand", "required_demand"), f("length"), f("diameter"), f("flow"),
                 f("velocity"), f("headloss"), f("unit_headloss"),
                 f("pressure", "pressure_rating"), f("pressure", "static_pressure"),
                 f("flow", "required_flow"), f("flow", "available_flow"),
                 f("pressure", "residual_pressure_at_required"))
        if system == "US":
            return Fields("US", *names, "ft", "psi", "gpm", "ft/s", "in", "ft/1000 ft",
                          M_HEAD_PER_PSI / FT, ("mi", 1.0 / 5280.0))
        return Fields("SI", *names, "m", "kPa", "L/s", "m/s", "mm", "m/km",
                      1.0 / KPA_PER_M_HEAD, ("km", 1.0 / 1000.0))
    raise GridflowError(f"unknown unit system {system!r}; expected 'US' or 'SI'", key="units")
