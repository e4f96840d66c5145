"""Tiny helpers that build test networks in code."""

from __future__ import annotations

import numpy as np

from gridflow.hydraulics.headloss import hw_resistance, minor_coefficient
from gridflow.hydraulics.results import OPEN, REGULATING
from gridflow.network import LINK_PIPE, LINK_PUMP, Network

NAN = float("nan")


def net(nodes, links, **kw) -> Network:
    """nodes: list of (id, elevation, demand, fixed_head or None);
    links: list of dicts with id, fr, to and any Network link field (by node id)."""
    ids = [n[0] for n in nodes]
    pos = {v: i for i, v in enumerate(ids)}
    cols = {}
    fields = ("link_kind", "length_m", "diameter_m", "roughness", "minor_k", "status",
              "valve_type", "valve_setting", "pump_h0", "pump_h1", "pump_h2", "pump_speed")
    defaults = {"link_kind": LINK_PIPE, "length_m": 0.0, "diameter_m": NAN, "roughness": NAN,
                "minor_k": 0.0, "status": 0, "valve_type": 0, "valve_setting": NAN,
                "pump_h0": NAN, "pump_h1": NAN, "pump_h2": NAN, "pump_speed": 1.0}
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
    qp = q[pu]
    # the quadratic pump curve with the affinity laws: H = s^2 h0 + s h1 q + h2 q|q|
    hl[pu] = -(s**2 * network.pump_h0[pu] + s * network.pump_h1[pu] * qp
               + network.pump_h2[pu] * qp * np.abs(qp))
    return hl


def assert_physics(network: Network, r, *, mass_tol=1e-6, head_tol=1e-3, skip_links=()):
    """Mass balance at every unknown-head supplied node, head loss on every open link, by the
    solvers' residual function with the head-loss law of the plain published formulas."""
    from gridflow.hydraulics.assembly import checked_sets, residuals
    from gridflow.hydraulics.results import CLOSED

    free, open_ = checked_sets(r.link_state, r.supplied, network.is_fixed, network.from_idx,
                               network.to_idx)
    for i in skip_links:
        open_[i] = False
    res = residuals(lambda q: (independent_headloss(network, q), None), r.flow_m3s, r.head_m,
                    fr=network.from_idx, to=network.to_idx, free=free, conducting=open_,
                    delivered=r.demand_m3s)
    assert res.max_mass < mass_tol, f"mass imbalance {res.max_mass}"
    assert res.max_error < head_tol, f"head-loss residual {res.max_error}"
    closed = r.link_state == CLOSED
    assert np.all(r.flow_m3s[closed] == 0)


def root_reference(n, r0):
    """Solve the same equations with scipy.optimize.root, statuses taken from r0."""
    nn, nl = n.n_nodes, n.n_links
    free = ~n.is_fixed & r0.supplied
    active = r0.link_state == REGULATING
    pinned = np.zeros(nn, bool)
    pinned[n.to_idx[active]] = True
    hfree = free & ~pinned
    open_ = (r0.link_state == OPEN) & r0.supplied[n.from_idx] & r0.supplied[n.to_idx]
    H0 = np.where(n.is_fixed, n.fixed_head_m, 0.0)
    H0[pinned] = n.elevation_m[pinned] + n.valve_setting[active]
    fi = np.flatnonzero(hfree)

    def F(x):
        q = x[:nl]
        H = H0.copy()
        H[fi] = x[nl:]
        hl = independent_headloss(n, q)
        e = np.where(open_, hl - (H[n.from_idx] - H[n.to_idx]), q)
        e = np.where(active, 0.0, e)
        # active PRVs: the flow balances the pinned node
        inflow = (np.bincount(n.to_idx, weights=q, minlength=nn)
                  - np.bincount(n.from_idx, weights=q, minlength=nn))
        mass = inflow - np.where(r0.supplied, n.demand_m3s, 0.0)
        e[active] = mass[n.to_idx[active]]
        return np.concatenate([e, mass[fi]])

    from scipy.optimize import root

    x0 = np.concatenate([r0.flow_m3s * 1.1 + 1e-3, r0.head_m[fi] + 0.5])
    sol = root(F, x0, method="hybr", options={"xtol": 1e-12})
    assert sol.success, sol.message
    return sol.x[:nl], sol.x[nl:], fi


def pin_then_hold(network: Network, system, base, pick: int, frac: float):
    """A held-node check case: pin a free node ``k`` (chosen by ``pick``) a fraction ``frac``
    of the way down to 5 m below its elevation, solve by full Newton, and take the node ``c``
    the draw moves most. Holding ``c`` at that solution's head must give back the same draw.
    Returns ``(k, c, head, full)``, or None where there is no such case (no other node, no
    convergence, a drop under 1 mm)."""
    free = np.flatnonzero(~network.is_fixed)
    k = int(free[pick % len(free)])
    others = free[free != k]
    if not len(others):
        return None
    head = base.head_m[k] - frac * (base.head_m[k] - network.elevation_m[k] + 5.0)
    full = system.solve(pin_idx=np.array([k]), pin_head_m=np.array([head]), warm=base,
                        raise_on_failure=False)
    if not full.converged:
        return None
    drop = base.head_m[others] - full.head_m[others]
    if drop.max() < 1e-3:
        return None
    return k, int(others[np.argmax(drop)]), head, full


def assert_held(network: Network, r, k: int, c: int, head: float, full) -> None:
    """A held solution ``r`` of :func:`pin_then_hold`'s case: ``c`` on its head, ``k`` back
    on the pinned head, the same draw, mass and head loss balanced."""
    import dataclasses

    import pytest

    assert r.head_m[c] == pytest.approx(full.head_m[c], abs=1e-6)
    assert r.head_m[k] == pytest.approx(head, abs=1e-4)
    draw = r.extra["draw_m3s"]
    assert draw == pytest.approx(full.node_inflow_m3s[k] - full.demand_m3s[k], rel=1e-5,
                                 abs=1e-9)
    d = r.demand_m3s.copy()
    d[k] += draw
    assert_physics(network, dataclasses.replace(r, demand_m3s=d), mass_tol=1e-8, head_tol=1e-6)


def stringy_network(seed: int, n: int) -> Network:
    """A random looped network shaped like a street export: a spanning tree plus extra links
    (loops), every link cut into 1-4 pieces (two-link nodes, some with demand, some without),
    dead-end branches of 1-3 links hung on random nodes, one or two sources."""
    rng = np.random.default_rng(seed)
    fr = [int(rng.integers(0, i)) for i in range(1, n)]
    to = list(range(1, n))
    for _ in range(int(rng.integers(1, max(2, n // 2)))):
        a, b = rng.choice(n, 2, replace=False)
        fr.append(int(a))
        to.append(int(b))
    nodes = n
    F: list[int] = []
    T: list[int] = []
    for a, b in zip(fr, to):
        pieces = int(rng.integers(1, 5))
        prev = a
        for _ in range(pieces - 1):
            F.append(prev)
            T.append(nodes)
            prev = nodes
            nodes += 1
        F.append(prev)
        T.append(b)
    for _ in range(int(rng.integers(0, n))):
        at = int(rng.integers(0, nodes))
        for _ in range(int(rng.integers(1, 4))):
            F.append(at)
            T.append(nodes)
            at = nodes
            nodes += 1
    # some links drawn against the chain direction
    F_arr, T_arr = np.array(F), np.array(T)
    flip = rng.random(len(F)) < 0.3
    F_arr[flip], T_arr[flip] = T_arr[flip], F_arr[flip]
    nl = len(F_arr)
    fixed = np.full(nodes, np.nan)
    fixed[0] = 60 + 40 * rng.random()
    if n > 6 and rng.random() < 0.5:
        fixed[n - 1] = 50 + 40 * rng.random()
    elev = 20 * rng.random(nodes)
    demand = np.where(np.isnan(fixed) & (rng.random(nodes) < 0.6),
                      rng.random(nodes) * 0.004, 0.0)
    diam = rng.choice([4, 6, 8, 12, 16], nl) * 0.0254
    return Network.from_arrays(
        node_id=[f"n{i}" for i in range(nodes)], link_id=[f"l{i}" for i in range(nl)],
        from_idx=F_arr, to_idx=T_arr, fixed_head_m=fixed, elevation_m=elev,
        demand_m3s=demand, length_m=20 + 300 * rng.random(nl), diameter_m=diam,
        roughness=rng.uniform(60, 150, nl))


def with_draw(r, k, q):
    """The result with the draw at ``k`` counted as demand there (for the balance check)."""
    import dataclasses

    d = r.demand_m3s.copy()
    d[k] += q
    return dataclasses.replace(r, demand_m3s=d)
