"""Head-loss laws for links, vectorised over arrays of links (SI units).

Every function returns the head loss ``h`` [m] in the direction of positive flow and its
derivative ``dh/dq`` [s/m2], the two things a Newton step needs.

Notes
-----
Hazen-Williams (SI): ``h = 10.67 L Q^1.852 / (C^1.852 D^4.87)``.
Darcy-Weisbach: ``h = f (L/D) v^2 / (2 g)`` with ``f`` from Colebrook-White (solved by Newton
on ``1/sqrt(f)``, started from Swamee-Jain), ``f = 64/Re`` below Re 2000 and a linear blend in
Re between 2000 and 4000.
Minor losses: ``h = K v^2 / (2 g)``.

Zero flow: ``|Q|^n`` has a zero derivative at ``Q = 0``, so the Newton matrix would need
``1/0``. Following the idea of regularising near zero flow (Elhay and Simpson, 2011,
J. Hydraul. Eng. 137(10)), ``Q |Q|^(n-1)`` is replaced by ``Q (Q^2 + eps^2)^((n-1)/2)``: smooth,
with a finite positive slope at zero, and within ``(n-1)/2 (eps/Q)^2`` relative of the exact law
(below 1e-6 relative for flows above 1000 eps).
"""

from __future__ import annotations

import numpy as np

from gridflow.units import NU_WATER_20C, G

__all__ = [
    "HW_EXPONENT",
    "hw_resistance",
    "power_law",
    "minor_coefficient",
    "swamee_jain",
    "colebrook",
    "darcy_friction",
    "dw_coefficient",
    "darcy_weisbach",
    "EPS_FLOW",
]

HW_EXPONENT = 1.852
HW_CONSTANT_SI = 10.67
#: regularisation flow [m3/s] (about 0.0016 gpm)
EPS_FLOW = 1e-7


def hw_resistance(length_m, diameter_m, c) -> np.ndarray:
    """Hazen-Williams resistance ``r`` in ``h = r Q^1.852`` (SI) [s^1.852 / m^4.556]."""
    return HW_CONSTANT_SI * np.asarray(length_m) / (
        np.asarray(c, dtype=float) ** HW_EXPONENT * np.asarray(diameter_m, dtype=float) ** 4.87)


def power_law(q, r, n, eps: float = EPS_FLOW):
    """``h = r Q (Q^2 + eps^2)^((n-1)/2)`` and its derivative; ``n`` may be an array."""
    s = q * q + eps * eps
    a = 0.5 * (n - 1.0)
    sa = s ** a
    h = r * q * sa
    dh = r * sa / s * (eps * eps + n * q * q)
    return h, dh


def minor_coefficient(k, diameter_m) -> np.ndarray:
    """``m`` in ``h = m Q^2`` for a loss coefficient K: ``8 K / (g pi^2 D^4)``."""
    d = np.asarray(diameter_m, dtype=float)
    return 8.0 * np.asarray(k, dtype=float) / (G * np.pi**2 * d**4)


def swamee_jain(re, rel_roughness) -> np.ndarray:
    """Swamee-Jain (1976) explicit friction factor for turbulent flow."""
    re = np.asarray(re, dtype=float)
    return 0.25 / np.log10(rel_roughness / 3.7 + 5.74 / re**0.9) ** 2


def colebrook(re, rel_roughness, *, iterations: int = 8):
    """Colebrook-White friction factor and ``d ln f / d ln Re`` (turbulent range).

    Solves ``x = -2 log10(e/(3.7 D) + 2.51 x / Re)`` with ``x = 1/sqrt(f)`` by Newton's method
    from the Swamee-Jain value; 3-4 iterations reach machine precision.
    """
    re = np.asarray(re, dtype=float)
    a = np.asarray(rel_roughness, dtype=float) / 3.7 + np.zeros_like(re)
    b = 2.51 / re
    x = 1.0 / np.sqrt(swamee_jain(re, rel_roughness))
    ln10 = np.log(10.0)
    for _ in range(iterations):
        u = a + b * x
        fx = x + 2.0 * np.log10(u)
        dfx = 1.0 + 2.0 * b / (u * ln10)
        step = fx / dfx
        x = x - step
        if np.all(np.abs(step) < 1e-13 * np.abs(x)):
            break
    u = a + b * x
    k = 2.0 / (u * ln10)
    dx_dlnre = k * b * x / (1.0 + k * b)
    return 1.0 / (x * x), -2.0 / x * dx_dlnre


def darcy_friction(re, rel_roughness):
    """Darcy friction factor over all regimes and ``d ln f / d ln Re``.

    Laminar ``64/Re`` below Re 2000; Colebrook-White above 4000; linear in Re between.
    """
    re = np.maximum(np.asarray(re, dtype=float), 1e-12)
    rel = np.asarray(rel_roughness, dtype=float) + np.zeros_like(re)
    f = 64.0 / re
    dlnf = -np.ones_like(re)
    turb = re >= 4000.0
    if turb.any():
        f[turb], dlnf[turb] = colebrook(re[turb], rel[turb])
    trans = (re > 2000.0) & ~turb
    if trans.any():
        f4000, _ = colebrook(np.full(int(trans.sum()), 4000.0), rel[trans])
        f2000 = 64.0 / 2000.0
        slope = (f4000 - f2000) / 2000.0
        f[trans] = f2000 + slope * (re[trans] - 2000.0)
        dlnf[trans] = slope * re[trans] / f[trans]
    return f, dlnf


def dw_coefficient(length_m, diameter_m) -> np.ndarray:
    """``k`` in ``h = k f Q|Q|``: ``8 L / (g pi^2 D^5)``."""
    d = np.asarray(diameter_m, dtype=float)
    return 8.0 * np.asarray(length_m, dtype=float) / (G * np.pi**2 * d**5)


def darcy_weisbach(q, length_m, diameter_m, roughness_m, nu: float = NU_WATER_20C):
    """Darcy-Weisbach head loss and derivative for flows ``q`` [m3/s]."""
    d = np.asarray(diameter_m, dtype=float)
    k = dw_coefficient(length_m, d)
    aq = np.abs(q)
    re = 4.0 * aq / (np.pi * d * nu)
    f, dlnf = darcy_friction(re, np.asarray(roughness_m) / d)
    h = k * f * q * aq
    dh = k * f * aq * (2.0 + dlnf)
    # laminar limit at zero flow: h = 16 pi k D nu Q, finite slope
    dh = np.maximum(dh, 16.0 * np.pi * k * d * nu)
    return h, dh
