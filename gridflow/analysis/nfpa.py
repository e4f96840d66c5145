"""Hydrant flow-test arithmetic from NFPA 291: the 0.54-power extrapolation and hydrant classes.

These are the formulas a field flow test is read with. Inside a network model, gridflow solves
the network instead of extrapolating (the extrapolation assumes a single supply path with no
other draw); the helpers serve reports and cross-checks.

Results are model estimates: field flow tests, local codes and licensed engineers decide.
"""

from __future__ import annotations

import numpy as np

from gridflow.units import US_GALLON

__all__ = ["GPM", "NFPA_EXPONENT", "NOZZLE_CONSTANT", "extrapolate_nfpa291", "nfpa_class",
           "nozzle_flow_gpm"]

#: exponent of the NFPA 291 extrapolation (1/1.85, the Hazen-Williams flow exponent)
NFPA_EXPONENT = 0.54
#: one US gallon per minute in m3/s
GPM = US_GALLON / 60.0

#: constant of the NFPA 291 outlet formula, gpm from inches and psi
NOZZLE_CONSTANT = 29.83

# (lower bound in gpm, class), highest first; NFPA 291 hydrant classes at 20 psi residual
_CLASSES = ((1500.0, "AA"), (1000.0, "A"), (500.0, "B"), (0.0, "C"))


def extrapolate_nfpa291(static, residual, flow, target):
    """Flow available at ``target`` residual pressure from one flow test.

    Parameters
    ----------
    static : float or ndarray
        Static pressure S (no flow).
    residual : float or ndarray
        Residual pressure R measured while flowing ``flow``; any pressure unit, the same for
        all three pressures.
    flow : float or ndarray
        Test flow Q_F, any flow unit (the result has the same unit).
    target : float or ndarray
        Residual pressure at which the flow is wanted (20 psi for hydrant ratings).

    Returns
    -------
    float or ndarray
        ``Q_F ((S - target) / (S - R)) ** 0.54``; NaN where ``S <= R`` (no usable test) or
        ``S < target``.

    Notes
    -----
    NFPA 291 (Recommended Practice for Water Flow Testing and Marking of Hydrants), the
    0.54-power form, exact for a single supply path whose loss follows Hazen-Williams.

    Examples
    --------
    >>> round(float(extrapolate_nfpa291(80.0, 60.0, 1000.0, 20.0)), 1)
    1809.9
    """
    s = np.asarray(static, dtype=float)
    r = np.asarray(residual, dtype=float)
    q = np.asarray(flow, dtype=float)
    t = np.asarray(target, dtype=float)
    ok = (s > r) & (s >= t)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(ok, q * (np.where(ok, s - t, 0.0) / np.where(ok, s - r, 1.0))
                       ** NFPA_EXPONENT, np.nan)
    return out if out.shape else float(out)


def nfpa_class(flow_gpm):
    """NFPA 291 hydrant class from the flow available at 20 psi residual [gpm].

    AA: 1500 gpm or more; A: 1000-1499; B: 500-999; C: below 500. NaN gives ``''``.

    Parameters
    ----------
    flow_gpm : float or array_like

    Returns
    -------
    str or ndarray of str

    Examples
    --------
    >>> nfpa_class(1500.0), nfpa_class(1499.9), nfpa_class(999.9), nfpa_class(499.9)
    ('AA', 'A', 'B', 'C')
    """
    q = np.asarray(flow_gpm, dtype=float)
    out = np.full(q.shape, "", dtype=object)
    done = ~np.isfinite(q)
    for bound, name in _CLASSES:
        hit = ~done & (q >= bound)
        out[hit] = name
        done |= hit
    out[~done] = "C"  # negative flows (none available) are class C
    return out if out.shape else str(out[()])


def nozzle_flow_gpm(pitot_psi, diameter_in, coefficient=0.9):
    """Flow from a hydrant outlet by its pitot reading: ``Q = 29.83 c d^2 sqrt(p)``.

    Parameters
    ----------
    pitot_psi : float or ndarray
        Pitot (velocity) pressure in the stream [psi].
    diameter_in : float or ndarray
        Outlet inside diameter [in].
    coefficient : float or ndarray
        Outlet discharge coefficient c (0.90 smooth and well rounded; 0.80 square and sharp;
        0.70 square and projecting into the barrel, per NFPA 291).

    Returns
    -------
    float or ndarray
        Flow [gpm]; NaN for a negative reading.

    Notes
    -----
    NFPA 291, the outlet discharge formula with c, d in inches and p in psi.

    Examples
    --------
    >>> round(float(nozzle_flow_gpm(16.0, 2.5, 0.9)), 1)   # 29.83 x 0.9 x 6.25 x 4
    671.2
    """
    p = np.asarray(pitot_psi, dtype=float)
    d = np.asarray(diameter_in, dtype=float)
    c = np.asarray(coefficient, dtype=float)
    with np.errstate(invalid="ignore"):
        out = NOZZLE_CONSTANT * c * d * d * np.sqrt(np.where(p >= 0, p, np.nan))
    return out if out.shape else float(out)
