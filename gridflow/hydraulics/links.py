"""The head-loss law of every link of a network, prepared once: pipes, minor losses, valves,
pumps.

:class:`LinkLaws` gives ``h(q)`` (head loss ``H_from - H_to`` in the direction of positive
flow) and ``dh/dq`` for all links at once; every solver and every check of a solution uses it.
"""

from __future__ import annotations

import numpy as np

from gridflow.hydraulics.headloss import (
    HW_EXPONENT,
    darcy_weisbach,
    hw_resistance,
    minor_coefficient,
    power_law,
)
from gridflow.network.model import (
    LINK_PIPE,
    LINK_PUMP,
    LINK_VALVE,
    STATUS_CHECK,
    STATUS_CLOSED,
    VALVE_PRESSURE_REDUCING,
    VALVE_THROTTLE,
    Network,
)

__all__ = ["LinkLaws", "G_FLOOR", "DW_EXPONENT"]

#: smallest dh/dq [s/m2] allowed, for links with (nearly) no resistance
G_FLOOR = 1e-6
#: the flow exponent of Darcy-Weisbach in fully rough turbulent flow (h ~ Q^2)
DW_EXPONENT = 2.0


class LinkLaws:
    """Link kinds and laws of ``net`` as arrays.

    Pumps add ``H(q) = s^2 h0 + s h1 q + h2 q|q|`` at relative speed ``s`` (affinity laws on the
    quadratic curve of :mod:`gridflow.network.pumps`); as a head loss that is ``-H(q)``.
    """

    def __init__(self, net: Network) -> None:
        self.net = net
        kind = net.link_kind
        self.nl = net.n_links
        self.is_pipe = kind == LINK_PIPE
        self.is_pump = kind == LINK_PUMP
        self.is_valve = kind == LINK_VALVE
        self.is_prv = self.is_valve & (net.valve_type == VALVE_PRESSURE_REDUCING)
        self.is_throttle = self.is_valve & (net.valve_type == VALVE_THROTTLE)
        self.is_check = net.status == STATUS_CHECK
        d = np.where(np.isfinite(net.diameter_m), net.diameter_m, 1.0)
        self.area = np.pi * d**2 / 4.0
        k = net.minor_k.copy()
        k[self.is_throttle] += net.valve_setting[self.is_throttle]
        self.m_minor = np.where((k > 0) & ~self.is_pump, minor_coefficient(k, d), 0.0)
        self.r_hw = np.zeros(self.nl)
        self.dw = net.headloss_model == "darcy-weisbach"
        #: flow exponent of the friction law in use (head loss ~ Q^n)
        self.flow_exponent = DW_EXPONENT if self.dw else HW_EXPONENT
        if not self.dw:
            self.r_hw[self.is_pipe] = hw_resistance(net.length_m[self.is_pipe],
                                                    net.diameter_m[self.is_pipe],
                                                    net.roughness[self.is_pipe])
        s = np.where(self.is_pump, net.pump_speed, 0.0)
        self.pump_on = self.is_pump & (s > 0)
        #: head added at zero flow [m] (at the pump's speed)
        self.pump_shutoff = np.where(self.pump_on, s**2 * np.nan_to_num(net.pump_h0), 0.0)
        self.pump_lin = np.where(self.pump_on, s * np.nan_to_num(net.pump_h1), 0.0)
        self.pump_quad = np.where(self.pump_on, np.nan_to_num(net.pump_h2), 0.0)
        #: links closed in the input (a check valve given as closed may still open)
        self.given_closed = ((net.status == STATUS_CLOSED) | (self.is_pump & ~self.pump_on))
        #: the head a pressure-reducing valve holds at its downstream node
        self.prv_head = np.full(self.nl, np.nan)
        self.prv_head[self.is_prv] = (net.elevation_m[net.to_idx[self.is_prv]]
                                      + net.valve_setting[self.is_prv])
        #: devices whose status the solution decides
        self.is_device = self.is_check | self.pump_on | self.is_prv

    def headloss(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Head loss ``H_from - H_to`` of every link at flows ``q`` and its derivative
        (floored at :data:`G_FLOOR`)."""
        net = self.net
        h = np.zeros(self.nl)
        g = np.zeros(self.nl)
        p = self.is_pipe
        if self.dw:
            h[p], g[p] = darcy_weisbach(q[p], net.length_m[p], net.diameter_m[p],
                                        net.roughness[p])
        else:
            h[p], g[p] = power_law(q[p], self.r_hw[p], HW_EXPONENT)
        mm = self.m_minor > 0
        if mm.any():
            hm, gm = power_law(q[mm], self.m_minor[mm], 2.0)
            h[mm] += hm
            g[mm] += gm
        pu = self.pump_on
        if pu.any():
            qp = q[pu]
            aq = np.abs(qp)
            h[pu] = -(self.pump_shutoff[pu] + self.pump_lin[pu] * qp
                      + self.pump_quad[pu] * qp * aq)
            g[pu] = -(self.pump_lin[pu] + 2.0 * self.pump_quad[pu] * aq)
        return h, np.maximum(g, G_FLOOR)

    def pump_flow_at_half_shutoff(self) -> np.ndarray:
        """Flow of each running pump where it adds half its shut-off head (a start value)."""
        q = np.zeros(self.nl)
        pu = self.pump_on
        a, b, c = 0.5 * self.pump_shutoff[pu], self.pump_lin[pu], self.pump_quad[pu]
        # -c q^2 - b q - a = 0 with c, b <= 0 and a > 0: the positive root
        with np.errstate(divide="ignore", invalid="ignore"):
            quad = (b + np.sqrt(b * b + 4.0 * (-c) * a)) / (-2.0 * c)
            lin = a / np.where(b < 0, -b, np.inf)
        q[pu] = np.where(c < 0, np.abs(quad), lin)
        q[pu] = np.where(np.isfinite(q[pu]), q[pu], 0.01)
        return q
