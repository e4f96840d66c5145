"""Pressure-driven demand: the delivered share of a node's demand by its pressure
(Wagner, Shamir and Marks, 1988), smoothed at its corners for Newton's method."""

from __future__ import annotations

import numpy as np

__all__ = ["smooth_sqrt_ramp", "delivered_share"]


def delivered_share(p, demand, p_min: float, p_req: float):
    """Delivered demand and its derivative by pressure ``p`` [m of head]."""
    span = p_req - p_min
    f, df = smooth_sqrt_ramp((p - p_min) / span)
    return demand * f, demand * df / span


def smooth_sqrt_ramp(s: np.ndarray, delta: float = 0.02):
    """``sqrt(s)`` clipped to [0, 1] with its corners smoothed for Newton.

    Exact on ``[delta, 1 - delta]``; a cubic Hermite blend on ``[0, delta]`` (value and slope
    0 at 0, matching sqrt at delta) and on ``[1 - delta, 1]`` (matching sqrt at 1 - delta,
    value 1 and slope 0 at 1). Returns the value and the derivative.
    """
    s = np.asarray(s, dtype=float)
    f = np.zeros_like(s)
    df = np.zeros_like(s)
    mid = (s >= delta) & (s <= 1 - delta)
    f[mid] = np.sqrt(s[mid])
    df[mid] = 0.5 / np.sqrt(s[mid])
    f[s > 1] = 1.0
    lo = (s > 0) & (s < delta)
    if lo.any():
        f[lo], df[lo] = _hermite(s[lo], 0.0, delta, 0.0, 0.0, np.sqrt(delta),
                                 0.5 / np.sqrt(delta))
    hi = (s > 1 - delta) & (s <= 1)
    if hi.any():
        a = 1 - delta
        f[hi], df[hi] = _hermite(s[hi], a, 1.0, np.sqrt(a), 0.5 / np.sqrt(a), 1.0, 0.0)
    return f, df


def _hermite(x, x0, x1, y0, m0, y1, m1):
    hlen = x1 - x0
    t = (x - x0) / hlen
    t2, t3 = t * t, t * t * t
    h00, h10, h01, h11 = 2 * t3 - 3 * t2 + 1, t3 - 2 * t2 + t, -2 * t3 + 3 * t2, t3 - t2
    val = h00 * y0 + h10 * hlen * m0 + h01 * y1 + h11 * hlen * m1
    d00, d10, d01, d11 = 6 * t2 - 6 * t, 3 * t2 - 4 * t + 1, -6 * t2 + 6 * t, 3 * t2 - 2 * t
    der = (d00 * y0 + d10 * hlen * m0 + d01 * y1 + d11 * hlen * m1) / hlen
    return val, der
