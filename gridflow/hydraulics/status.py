"""Device statuses: which nodes are supplied, how pumps, check valves and pressure-reducing
valves settle, and which zones a shut device leaves without supply.

Rules (``tol`` the status tolerance, a head margin that acts as hysteresis):

- check valve: shuts when its flow reverses; opens when the head upstream exceeds the head
  downstream by ``tol``;
- pump: stops when its flow reverses (it cannot hold the head rise it faces); runs again when
  the head rise it faces is below its shut-off head by ``tol``;
- pressure-reducing valve: regulating while the upstream head exceeds its setting and flow is
  forward; wide open when the upstream head falls below the setting; shut when flow would
  reverse or the downstream head is above the setting with the valve open;
- a shut device whose upstream node is supplied and whose downstream node lies in a zone with
  no supply is tried open (the alternative to a zone left dry) when the upstream head (plus the
  pump's shut-off head) reaches above the highest node of that zone: water can get there.
  Otherwise the zone stays unsupplied and :func:`shut_zones` reports it. Likewise a running
  device that alone feeds a zone (no source or tank in it) stops when the head it brings stays
  below the zone's highest node: it cannot lift water there.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from gridflow.hydraulics.links import LinkLaws
from gridflow.hydraulics.results import CLOSED, OPEN, REGULATING

__all__ = ["Components", "update_status", "ShutZone", "shut_zones"]


class Components:
    """Connected components of a network's nodes through a set of links, cached by link set
    (repeated solves with unchanged statuses skip the graph search)."""

    def __init__(self, nn: int, fr: np.ndarray, to: np.ndarray) -> None:
        self.nn, self.fr, self.to = nn, fr, to
        self._cache: dict[bytes, tuple[int, np.ndarray]] = {}

    def labels(self, conducting: np.ndarray) -> tuple[int, np.ndarray]:
        key = np.packbits(conducting).tobytes()
        hit = self._cache.get(key)
        if hit is None:
            fr, to = self.fr[conducting], self.to[conducting]
            adj = sp.coo_matrix((np.ones(len(fr)), (fr, to)), shape=(self.nn, self.nn))
            ncomp, label = connected_components(adj, directed=False)
            hit = (int(ncomp), label)
            if len(self._cache) >= 8:
                self._cache.clear()
            self._cache[key] = hit
        return hit

    def reached(self, conducting: np.ndarray, sources: np.ndarray) -> np.ndarray:
        """Nodes connected through ``conducting`` links to a node of ``sources``."""
        ncomp, label = self.labels(conducting)
        has = np.zeros(ncomp, dtype=bool)
        has[label[sources]] = True
        return has[label]


def update_status(laws: LinkLaws, state: np.ndarray, q: np.ndarray, h: np.ndarray,
                  supplied: np.ndarray, fixed: np.ndarray, always_closed: np.ndarray,
                  components: Components, *, tol: float, qtol: float) -> bool:
    """Change the statuses whose conditions say so (in place); True if anything changed.

    ``fixed``: nodes whose head is given (a pressure-reducing valve discharging into one can
    only be open or shut).
    """
    net = laws.net
    fr, to = net.from_idx, net.to_idx
    hu, hd = h[fr], h[to]
    dh = hu - hd
    old = state.copy()
    both = supplied[fr] & supplied[to]
    # the alternative to a dry zone: a shut device from a supplied node into an unsupplied one
    into_dry = supplied[fr] & ~supplied[to] & (old == CLOSED)
    can_fill = np.zeros(laws.nl, dtype=bool)
    if into_dry.any():
        _, label = components.labels(state == OPEN)
        top = np.full(int(label.max()) + 1, -np.inf)
        np.maximum.at(top, label, net.elevation_m)
        reach = np.where(laws.pump_on, hu + laws.pump_shutoff, hu)
        can_fill = into_dry & (reach > top[label[to]] + tol)
    # a device that alone feeds a zone (no source or tank in it) cannot fill it when the head
    # it brings (plus a pump's shut-off head) stays below the zone's highest node
    dev_on = laws.is_device & (old != CLOSED) & ~always_closed & supplied[fr]
    if dev_on.any():
        ncomp, lab = components.labels((old == OPEN) & ~laws.is_device)
        has_fixed = np.zeros(ncomp, dtype=bool)
        has_fixed[lab[net.is_fixed]] = True
        ztop = np.full(ncomp, -np.inf)
        np.maximum.at(ztop, lab, net.elevation_m)
        reach_on = np.where(laws.pump_on, hu + laws.pump_shutoff, hu)
        cannot = dev_on & ~has_fixed[lab[to]] & (reach_on < ztop[lab[to]] - tol)
        state[cannot] = CLOSED
        old_closed = cannot
    else:
        old_closed = np.zeros(laws.nl, dtype=bool)
    # check valves
    cv = laws.is_check & ~always_closed
    state[cv & (old == OPEN) & (q < -qtol)] = CLOSED
    state[cv & (old == CLOSED) & ((both & (dh > tol)) | can_fill)] = OPEN
    # pumps
    pu = laws.pump_on & ~always_closed
    state[pu & (old == OPEN) & (q < -qtol)] = CLOSED
    state[pu & (old == CLOSED) & ((both & (-dh < laws.pump_shutoff - tol)) | can_fill)] = OPEN
    # pressure-reducing valves
    prv = laws.is_prv & ~always_closed
    hs = laws.prv_head
    fd = fixed[to]
    a = prv & (old == REGULATING)
    state[a & (q < -qtol)] = CLOSED
    state[a & (q >= -qtol) & (hu < hs - tol)] = OPEN
    o = prv & (old == OPEN)
    state[o & (q < -qtol)] = CLOSED
    over = o & (q >= -qtol) & (hd > hs + tol)
    state[over] = np.where(fd, CLOSED, REGULATING)[over]
    c = prv & (old == CLOSED)
    c_ok = c & (both | can_fill)
    state[c_ok & ~fd & (hu > hs + tol) & ((hd < hs - tol) | can_fill)] = REGULATING
    state[c_ok & ~fd & (hu <= hs + tol) & ((hu > hd + tol) | can_fill)] = OPEN
    state[c & both & fd & (hd < hs - tol) & (hu > hd + tol)] = OPEN
    state[old_closed] = CLOSED
    return bool((state != old).any())


@dataclass(frozen=True)
class ShutZone:
    """Nodes that links open in the input connect to a fixed head but that a solution leaves
    unsupplied because the devices in ``devices`` (link positions) are shut."""

    nodes: np.ndarray
    devices: np.ndarray
    required_m3s: float


def shut_zones(laws: LinkLaws, link_state: np.ndarray, supplied: np.ndarray,
               required_m3s: np.ndarray, components: Components) -> list[ShutZone]:
    """Zones a solution leaves dry although the input connects them to a fixed head."""
    net = laws.net
    fr, to = net.from_idx, net.to_idx
    given_open = ~laws.given_closed
    reachable = components.reached(given_open, net.is_fixed)
    lost = reachable & ~supplied
    if not lost.any():
        return []
    inner = given_open & lost[fr] & lost[to]
    _, label = components.labels(inner)
    shut = given_open & (link_state == CLOSED) & (lost[fr] | lost[to])
    zones = []
    for lab in np.unique(label[lost]):
        nodes = np.flatnonzero(lost & (label == lab))
        inz = np.zeros(net.n_nodes, dtype=bool)
        inz[nodes] = True
        dev = np.flatnonzero(shut & (inz[fr] | inz[to]))
        zones.append(ShutZone(nodes=nodes, devices=dev,
                              required_m3s=float(np.sum(required_m3s[nodes]))))
    return zones
