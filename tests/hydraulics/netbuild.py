"""Tiny helpers that build test networks in code."""

from __future__ import annotations

import numpy as np

from gridflow.hydraulics.headloss import hw_resistance, minor_coefficient
from gridflow.network import LINK_PIPE, LINK_PUMP, Network

NAN = float("nan")


def net(nodes, links, **kw) -> Network:
    """nodes: list of (id, elevation, demand, fixed_head or None);
    links: list of dicts with id, fr, to and any Network link field (by node id)."""
    ids = [n[0] for n in nodes]
    pos = {v: i for i, v in enumerate(ids)}
    cols = {}
    fields = ("link_kind", "length_m", "diameter_m", "roughness", "minor_k", "status",
              "valve_type", "valve_setting", "pump_a", "pump_b", "pump_c", "pump_speed")
    defaults = {"link_kind": LINK_PIPE, "length_m": 0.0, "diameter_m": NAN, "roughness": NAN,
                "minor_k": 0.0, "status": 0, "valve_type": 0, "valve_setting": NAN,
                "pump_a": NAN, "pump_b": NAN, "pump_c": NAN, "pump_speed": 1.0}
    for f in fields:
        cols[f] = [lk.get(f, defaults[f]) for lk in links]
    return Network.from_arrays(
        node_id=ids, elevation_m=[n[1] for n in nodes], demand_m3s=[n[2] for n in nodes],
        fixed_head_m=[NAN if n[3] is None else n[3] for n in nodes],
        link_id=[lk["id"] for lk in links], from_idx=[pos[lk["fr"]] for lk in links],
        to_idx=[pos[lk["to"]] for lk in links], **cols, **kw)


def pipe(id, fr, to, L, D, C=120.0, **kw):
    return {"id": id, "fr": fr, "to": to, "length_m": L, "diameter_m": D, "roughness": C, **kw}


def independent_headloss(network: Network, q: np.ndarray) -> np.ndarray:
    """Head loss from the plain published formulas (no regularisation), for checks."""
    hl = np.zeros(network.n_links)
    p = network.link_kind == LINK_PIPE
    if network.headloss_model == "hazen-williams":
        r = hw_resistance(network.length_m[p], network.diameter_m[p], network.roughness[p])
        hl[p] = r * np.sign(q[p]) * np.abs(q[p]) ** 1.852
    else:
        import fluids

        for i in np.flatnonzero(p):
            d = network.diameter_m[i]
            v = q[i] / (np.pi * d * d / 4)
            re = abs(v) * d / 1.004e-6
            f = fluids.friction.friction_factor(Re=max(re, 1e-9), eD=network.roughness[i] / d)
            hl[i] = f * network.length_m[i] / d * v * abs(v) / (2 * 9.80665)
    k = network.minor_k > 0
    hl[k] += minor_coefficient(network.minor_k[k], network.diameter_m[k]) * q[k] * np.abs(q[k])
    pu = (network.link_kind == LINK_PUMP) & (network.pump_speed > 0)
    s = network.pump_speed[pu]
    hl[pu] = -(s**2 * network.pump_a[pu] - network.pump_b[pu] * s ** (2 - network.pump_c[pu])
               * np.abs(q[pu]) ** network.pump_c[pu])
    return hl


def assert_physics(network: Network, r, *, mass_tol=1e-6, head_tol=1e-3, skip_links=()):
    """Mass balance at every unknown-head supplied node, head loss on every open link."""
    q = r.flow_m3s
    nn = network.n_nodes
    inflow = (np.bincount(network.to_idx, weights=q, minlength=nn)
              - np.bincount(network.from_idx, weights=q, minlength=nn))
    free = r.supplied & ~network.is_fixed
    # nodes pinned by an active PRV are excluded: their balance sets the PRV flow
    active = r.link_state == 2
    free[network.to_idx[active]] = True  # the PRV flow balances them exactly
    bal = inflow[free] - r.demand_m3s[free]
    assert np.max(np.abs(bal), initial=0) < mass_tol, f"mass imbalance {np.max(np.abs(bal))}"
    open_ = (r.link_state == 0) & r.supplied[network.from_idx] & r.supplied[network.to_idx]
    for i in skip_links:
        open_[i] = False
    hl = independent_headloss(network, q)
    dh = r.head_m[network.from_idx] - r.head_m[network.to_idx]
    err = np.abs(hl - dh)[open_]
    assert np.max(err, initial=0) < head_tol, f"head-loss residual {np.max(err)}"
    closed = r.link_state == 1
    assert np.all(q[closed] == 0)
