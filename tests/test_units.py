"""Unit factors: derived from pint once, equal to the published definitions, typed nowhere else."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from gridflow import units as u

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("got, want, source", [
    (u.FT, 0.3048, "international foot, 1959 yard and pound agreement"),
    (u.INCH, 0.0254, "international inch, 1959 yard and pound agreement"),
    (u.US_GALLON, 231 * 0.0254 ** 3, "US gallon = 231 cubic inches (US customary definition)"),
    (u.G, 9.80665, "standard gravity, 3rd CGPM 1901"),
    (u.PSI_PA, 0.45359237 * 9.80665 / 0.0254 ** 2,
     "psi = pound-force per square inch; avoirdupois pound 0.45359237 kg (1959)"),
    (u.GPM, 231 * 0.0254 ** 3 / 60, "gallon per minute"),
    (u.FLOW["mgd"], 1e6 * 231 * 0.0254 ** 3 / 86400, "million gallons per day"),
    (u.FLOW["m3/month"], 12 / (365.25 * 86400), "a month as a twelfth of a Julian year"),
    (u.PRESSURE["kpa"], 1 / 9.80665, "1 kPa of water at 1000 kg/m3 (common practice)"),
])
def test_factors_match_the_definitions(got, want, source):
    assert got == pytest.approx(want, rel=1e-14), source


def test_factors_are_plain_floats():
    for table in (u.LENGTH, u.DIAMETER, u.FLOW, u.PRESSURE, u.HEAD):
        assert all(type(v) is float for v in table.values())


def test_no_module_types_its_own_factors():
    """Conversion constants live in gridflow/units.py only."""
    pattern = re.compile(r"(?<![\d.])(0\.3048|0\.0254|3\.785|6894\.7|15850|0\.70307|"
                         r"9\.80665)")
    offenders = []
    for p in (ROOT / "gridflow").rglob("*.py"):
        if p.name == "units.py" and p.parent.name == "gridflow":
            continue
        for i, line in enumerate(p.read_text(encoding="utf-8").splitlines(), 1):
            code = line.split("#", 1)[0]
            if pattern.search(code):
                offenders.append(f"{p.relative_to(ROOT)}:{i}: {line.strip()}")
    assert offenders == []


def test_one_pint_registry():
    from gridflow.config.schema import _ureg

    assert _ureg() is u.ureg()
