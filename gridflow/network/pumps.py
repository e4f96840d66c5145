"""Pump head curves: a quadratic characteristic.

A pump adds head ``H(q) = h0 + h1 q + h2 q**2`` [m, q in m3/s] at its rated speed: ``h0`` is
the shut-off head, ``h1 <= 0`` the slope at shut-off and ``h2 <= 0`` the curvature. The
quadratic characteristic is the usual form of pump curves in pipe-network analysis (Jeppson,
*Analysis of Flow in Pipe Networks*, 1976, ch. 7; Larock, Jeppson and Watters, *Hydraulics of
Pipeline Systems*, 2000 -- from memory). At relative speed ``s`` the affinity laws give
``H = s**2 h0 + s h1 q + h2 q**2``.

- Three points: the quadratic through them, exactly (three equations, three unknowns).
- One design point ``(q_d, h_d)``: needs the shut-off head ``h0``; the curve is then
  ``h0 - (h0 - h_d) (q/q_d)**2`` (flat at shut-off, ``h1 = 0``). When the GIS has no shut-off
  head the caller assumes ``h0 = ratio * h_d`` (:data:`SHUTOFF_RATIO_DEFAULT`) and says so.
"""

from __future__ import annotations

import math

from gridflow.errors import NetworkError

__all__ = ["fit_pump_curve", "PumpCurve", "SHUTOFF_RATIO_DEFAULT"]

#: shut-off head / design head assumed for a pump given by one point without a shut-off head:
#: radial-flow centrifugal pumps commonly rise 10-40 % above the rated head at shut-off
#: (common practice)
SHUTOFF_RATIO_DEFAULT = 1.25


class PumpCurve(tuple):
    """``(h0, h1, h2)``: the coefficients of ``H(q) = h0 + h1 q + h2 q**2``."""

    __slots__ = ()

    def __new__(cls, h0: float, h1: float, h2: float) -> PumpCurve:
        return super().__new__(cls, (float(h0), float(h1), float(h2)))

    @property
    def h0(self) -> float:
        return float(self[0])

    def head(self, q: float) -> float:
        """Head added [m] at flow ``q`` [m3/s] (rated speed)."""
        return float(self[0] + self[1] * q + self[2] * q * q)


def fit_pump_curve(points, *, shutoff_head_m: float | None = None,
                   link_id: str | None = None) -> PumpCurve:
    """The quadratic head curve through one or three (flow [m3/s], head [m]) points.

    Parameters
    ----------
    points : sequence of (q, h)
        One design point, or three points with rising flow (the first may be shut-off,
        ``q = 0``).
    shutoff_head_m : float, optional
        Shut-off head [m]; required with one design point (above its head), ignored with three.
    link_id : str, optional
        Named in the error message.

    Returns
    -------
    PumpCurve
        ``(h0, h1, h2)``.

    Raises
    ------
    NetworkError
        If the curve does not fall as flow rises over ``[0, q_max]``, a single point has no
        shut-off head above it, or the points are not 1 or 3.

    Examples
    --------
    >>> c = fit_pump_curve([(0.05, 40.0)], shutoff_head_m=50.0)
    >>> round(c.h0, 3), round(c.head(0.05), 3), c[1]
    (50.0, 40.0, 0.0)
    """
    pts = [(float(q), float(h)) for q, h in points]
    if len(pts) == 1:
        q, h = pts[0]
        if not (q > 0 and h > 0):
            raise NetworkError(f"pump {link_id}: design point needs flow > 0 and head > 0, got "
                               f"q={q}, h={h}", link_id=link_id, field="pump_curve")
        h0 = float("nan") if shutoff_head_m is None else float(shutoff_head_m)
        if not (math.isfinite(h0) and h0 > h):
            raise NetworkError(f"pump {link_id}: a single design point ({q:g} m3/s at {h:g} m) "
                               f"needs a shut-off head above its head, got {h0:g} m",
                               link_id=link_id, field="shutoff_head")
        return PumpCurve(h0, 0.0, -(h0 - h) / (q * q))
    if len(pts) != 3:
        raise NetworkError(f"pump {link_id}: give one design point or three curve points, got "
                           f"{len(pts)}", link_id=link_id, field="pump_curve")
    (q0, y0), (q1, y1), (q2, y2) = pts
    if not (0 <= q0 < q1 < q2) or not (y0 > y1 > y2 >= 0):
        raise NetworkError(f"pump {link_id}: the head curve must fall as flow rises; got "
                           f"{pts}", link_id=link_id, field="pump_curve")
    # Newton's divided differences: exact through the three points
    d01 = (y1 - y0) / (q1 - q0)
    d12 = (y2 - y1) / (q2 - q1)
    h2 = (d12 - d01) / (q2 - q0)
    h1 = d01 - h2 * (q0 + q1)
    h0 = y0 - h1 * q0 - h2 * q0 * q0
    # falling over [0, q2]: slope h1 + 2 h2 q <= 0 at both ends; concave or straight beyond
    if not (h1 <= 1e-12 * abs(h0) and h1 + 2 * h2 * q2 < 0 and h2 <= 0 and h0 > 0):
        raise NetworkError(f"pump {link_id}: the quadratic through {pts} does not fall over "
                           "the whole flow range from shut-off (a rising or convex curve); "
                           "check the points", link_id=link_id, field="pump_curve")
    return PumpCurve(h0, min(h1, 0.0), h2)
