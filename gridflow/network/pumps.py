"""Pump head curves.

A pump adds head ``h(q) = s**2 a - b s**(2-c) q**c`` at relative speed ``s`` (affinity laws),
with ``a`` the shut-off head [m], ``q`` in m3/s. The curve is fitted to one design point or to
three points.
"""

from __future__ import annotations

import math

from gridflow.errors import NetworkError

__all__ = ["fit_pump_curve"]


def fit_pump_curve(points, *, link_id: str | None = None) -> tuple[float, float, float]:
    """Fit ``h = a - b q**c`` to one or three (flow [m3/s], head [m]) points.

    Parameters
    ----------
    points : sequence of (q, h)
        One design point, or three points with rising flow; the first of three may be the
        shut-off point (q = 0).
    link_id : str, optional
        Named in the error message.

    Returns
    -------
    a, b, c : float

    Raises
    ------
    NetworkError
        If the curve does not fall as flow rises, or the points are not 1 or 3.

    Notes
    -----
    One point ``(q_d, h_d)``: shut-off head ``4/3 h_d`` and zero head at ``2 q_d``, the usual
    single-point convention (common practice), giving ``c = 2``.
    Three points ``(0, h0), (q1, h1), (q2, h2)``: ``a = h0``,
    ``c = ln((h0 - h2)/(h0 - h1)) / ln(q2/q1)``, ``b = (h0 - h1)/q1**c``. When the first point
    has non-zero flow, ``c`` and ``b`` come from a log-log fit of the three points for a given
    ``a`` found by bisection.

    Examples
    --------
    >>> a, b, c = fit_pump_curve([(0.05, 40.0)])
    >>> round(a, 3), c
    (53.333, 2.0)
    """
    pts = [(float(q), float(h)) for q, h in points]
    if len(pts) == 1:
        q, h = pts[0]
        if not (q > 0 and h > 0):
            raise NetworkError(f"pump {link_id}: design point needs flow > 0 and head > 0, got "
                               f"q={q}, h={h}", link_id=link_id, field="pump_curve")
        a = 4.0 * h / 3.0
        return a, (a - h) / q**2, 2.0
    if len(pts) != 3:
        raise NetworkError(f"pump {link_id}: give one design point or three curve points, got "
                           f"{len(pts)}", link_id=link_id, field="pump_curve")
    (q0, h0), (q1, h1), (q2, h2) = pts
    if not (0 <= q0 < q1 < q2) or not (h0 > h1 > h2 >= 0):
        raise NetworkError(f"pump {link_id}: the head curve must fall as flow rises; got "
                           f"{pts}", link_id=link_id, field="pump_curve")
    if q0 == 0:
        c = math.log((h0 - h2) / (h0 - h1)) / math.log(q2 / q1)
        b = (h0 - h1) / q1**c
        return h0, b, c
    # three points, none at shut-off: find a > h0 such that the power law passes through all
    def c_for(a: float) -> tuple[float, float]:
        c01 = math.log((a - h1) / (a - h0)) / math.log(q1 / q0)
        c12 = math.log((a - h2) / (a - h1)) / math.log(q2 / q1)
        return c01, c12

    lo, hi = h0 * (1 + 1e-9), h0 * 100
    f_lo = c_for(lo)[0] - c_for(lo)[1]
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        c01, c12 = c_for(mid)
        if (c01 - c12) * f_lo > 0:
            lo, f_lo = mid, c01 - c12
        else:
            hi = mid
    a = 0.5 * (lo + hi)
    c = c_for(a)[1]
    b = (a - h1) / q1**c
    if not (b > 0 and c > 0 and math.isfinite(b) and math.isfinite(c)):
        raise NetworkError(f"pump {link_id}: cannot fit a falling curve to {pts}",
                           link_id=link_id, field="pump_curve")
    return a, b, c
