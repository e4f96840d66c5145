"""Flows through regulating pressure-reducing valves, solved with the heads in one Newton step.

A regulating valve holds its downstream node ``d`` at the setting; its flow ``Q`` leaves the
upstream node ``u`` and must balance ``d``. With the factorized head matrix ``J``, the heads
are ``H = H0 - Z Q`` with ``Z[:, k] = J^-1 e_{u_k}``, and the linearized balance at every
``d_k`` is a small dense system in ``Q`` (one extra triangular solve per regulating valve).
"""

from __future__ import annotations

import numpy as np

from gridflow.hydraulics.assembly import net_outflow
from gridflow.hydraulics.pdd import delivered_share

__all__ = ["regulating_flows"]


def regulating_flows(system, h0, y, w, conducting, regulating, known, demand, elev, pdd,
                     h_prev):
    """``(Q, shift)``: flows of the regulating valves and the change ``Z Q`` they make to the
    heads ``h0`` (the heads with them are ``h0 - shift``)."""
    fr, to, nn = system.fr, system.to, system.nn
    ia = np.flatnonzero(regulating)
    u, d = fr[ia], to[ia]
    wc = np.where(conducting, w, 0.0)

    def outflow_lin(z):  # net outflow through conducting links for heads z (no y term)
        return net_outflow(wc * (z[fr] - z[to]), fr, to, nn)

    z = np.empty((nn, len(ia)))
    for k, uk in enumerate(u):  # one column per regulating valve: a handful per network
        e = np.zeros(nn)
        if not known[uk]:
            e[uk] = 1.0
        col = system.pattern.solve(e)
        col[known] = 0.0
        z[:, k] = col
    yc = np.where(conducting, y, 0.0)
    q0 = yc + wc * (h0[fr] - h0[to])
    if pdd:
        opt = system.opt
        dem = delivered_share(h_prev - elev, demand, opt.pdd_min_pressure,
                              opt.pdd_required_pressure)[0]
    else:
        dem = demand
    out0 = net_outflow(q0, fr, to, nn, dem)
    m = np.empty((len(ia), len(ia)))
    for j in range(len(ia)):
        m[:, j] = -outflow_lin(z[:, j])[d]
    # the valves themselves: Q_j enters d_j and leaves u_j
    m -= (d[:, None] == d[None, :]).astype(float)
    m += (d[:, None] == u[None, :]).astype(float)
    try:
        q_reg = np.linalg.solve(m, -out0[d])
    except np.linalg.LinAlgError:
        q_reg = np.linalg.lstsq(m, -out0[d], rcond=None)[0]
    return q_reg, z @ q_reg
