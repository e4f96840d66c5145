"""The network as a frozen struct of arrays.

One numpy array per attribute, indexed by integer position (``*_idx``); the utility's ids live
in :attr:`Network.node_id` and :attr:`Network.link_id` and are what every message and output
uses. The arrays are SI: metres, cubic metres per second, metres of head.

A :class:`Network` is validated once when it is made; scenarios make modified copies with
:meth:`Network.replace`, which shares every array it does not change.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from gridflow.errors import NetworkError

__all__ = [
    "Network",
    "NODE_JUNCTION",
    "NODE_SOURCE",
    "NODE_TANK",
    "NODE_KINDS",
    "LINK_PIPE",
    "LINK_PUMP",
    "LINK_VALVE",
    "LINK_KINDS",
    "STATUS_OPEN",
    "STATUS_CLOSED",
    "STATUS_CHECK",
    "STATUS_NAMES",
    "VALVE_NONE",
    "VALVE_ISOLATION",
    "VALVE_PRESSURE_REDUCING",
    "VALVE_THROTTLE",
    "VALVE_NAMES",
    "HeadlossModel",
]

NODE_JUNCTION, NODE_SOURCE, NODE_TANK = 0, 1, 2
NODE_KINDS = ("junction", "source", "tank")
LINK_PIPE, LINK_PUMP, LINK_VALVE = 0, 1, 2
LINK_KINDS = ("pipe", "pump", "valve")
STATUS_OPEN, STATUS_CLOSED, STATUS_CHECK = 0, 1, 2
STATUS_NAMES = ("open", "closed", "check_valve")
VALVE_NONE, VALVE_ISOLATION, VALVE_PRESSURE_REDUCING, VALVE_THROTTLE = 0, 1, 2, 3
VALVE_NAMES = ("", "isolation", "pressure_reducing", "throttle")

HeadlossModel = Literal["hazen-williams", "darcy-weisbach"]

# Plausibility limits used by validation (hard errors only for impossible values;
# implausible-but-possible values are findings of the topology stage).
_MAX_DIAMETER_M = 10.0


def _f(a, n, fill=np.nan) -> np.ndarray:
    if a is None:
        return np.full(n, fill, dtype=float)
    out = np.asarray(a, dtype=float)
    if out.shape == ():
        out = np.full(n, float(out))
    return out


def _shared_strings(a: np.ndarray) -> np.ndarray:
    """An object array of ``a``'s strings, one str object per distinct value (a zone name
    repeated at a million nodes is stored once, not a million times)."""
    import pandas as pd

    codes, uniques = pd.factorize(a.astype(object), use_na_sentinel=False)
    return np.asarray(uniques, dtype=object)[codes] if len(a) else a.astype(object)


def _i(a, n, fill=0, dtype=np.int8) -> np.ndarray:
    if a is None:
        return np.full(n, fill, dtype=dtype)
    out = np.asarray(a)
    if out.shape == ():
        out = np.full(n, out)
    return out.astype(dtype)


@dataclass(frozen=True, eq=False)
class Network:
    """A water distribution network as arrays.

    Node arrays have length ``n_nodes``, link arrays length ``n_links``.

    Attributes
    ----------
    node_id : ndarray of str
        The utility's node ids, unique.
    node_kind : ndarray of int8
        :data:`NODE_JUNCTION`, :data:`NODE_SOURCE` or :data:`NODE_TANK`.
    elevation_m : ndarray
        Ground elevation [m]; pressure is head minus elevation.
    demand_m3s : ndarray
        Required demand (outflow, positive) [m3/s].
    fixed_head_m : ndarray
        Hydraulic grade of sources and tanks (tank: bottom elevation plus level) [m];
        NaN at junctions.
    zone : ndarray of str
        Pressure zone name per node ('' where unknown).
    link_id : ndarray of str
        The utility's link ids, unique.
    from_idx, to_idx : ndarray of int64
        End node positions; positive flow runs from ``from_idx`` to ``to_idx``.
    link_kind : ndarray of int8
        :data:`LINK_PIPE`, :data:`LINK_PUMP` or :data:`LINK_VALVE`.
    length_m, diameter_m : ndarray
        [m]. Valves and pumps may have zero length.
    roughness : ndarray
        Hazen-Williams C, or Darcy-Weisbach absolute roughness [m], per :attr:`headloss_model`.
    minor_k : ndarray
        Sum of minor-loss coefficients K (dimensionless, on the link's velocity).
    status : ndarray of int8
        :data:`STATUS_OPEN`, :data:`STATUS_CLOSED` or :data:`STATUS_CHECK` (check valve: flow
        only from ``from_idx`` to ``to_idx``).
    valve_type : ndarray of int8
        For valves: :data:`VALVE_ISOLATION`, :data:`VALVE_PRESSURE_REDUCING` (``valve_setting``
        is the
        downstream pressure setting [m of head]) or :data:`VALVE_THROTTLE` (``valve_setting`` is
        the valve's loss coefficient K).
    valve_setting : ndarray
        See ``valve_type``. NaN where not used.
    pump_h0, pump_h1, pump_h2 : ndarray
        Pump head curve ``H = h0 + h1 q + h2 q**2`` [m, q in m3/s] at relative speed 1
        (:mod:`gridflow.network.pumps`): ``h0`` the shut-off head, ``h1, h2 <= 0``.
    pump_speed : ndarray
        Relative speed; 0 means the pump is off.
    headloss_model : {'hazen-williams', 'darcy-weisbach'}
        Friction formula for the whole run.
    """

    node_id: np.ndarray
    node_kind: np.ndarray
    elevation_m: np.ndarray
    demand_m3s: np.ndarray
    fixed_head_m: np.ndarray
    zone: np.ndarray
    link_id: np.ndarray
    from_idx: np.ndarray
    to_idx: np.ndarray
    link_kind: np.ndarray
    length_m: np.ndarray
    diameter_m: np.ndarray
    roughness: np.ndarray
    minor_k: np.ndarray
    status: np.ndarray
    valve_type: np.ndarray
    valve_setting: np.ndarray
    pump_h0: np.ndarray
    pump_h1: np.ndarray
    pump_h2: np.ndarray
    pump_speed: np.ndarray
    headloss_model: HeadlossModel = "hazen-williams"
    _validated: bool = field(default=False, repr=False, compare=False)

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_arrays(
        cls,
        *,
        node_id,
        link_id,
        from_idx,
        to_idx,
        elevation_m=None,
        demand_m3s=None,
        fixed_head_m=None,
        node_kind=None,
        zone=None,
        link_kind=None,
        length_m=None,
        diameter_m=None,
        roughness=None,
        minor_k=None,
        status=None,
        valve_type=None,
        valve_setting=None,
        pump_h0=None,
        pump_h1=None,
        pump_h2=None,
        pump_speed=None,
        headloss_model: HeadlossModel = "hazen-williams",
        ids_unique: bool = False,
    ) -> Network:
        """Make a validated network, filling defaults for arrays not given.

        ``node_kind`` defaults to source where ``fixed_head_m`` is finite, junction elsewhere.
        ``ids_unique=True``: the caller has already made the node ids and the link ids unique
        as text (the topology does, with one hash pass each), so :meth:`validate` skips its
        own pass over them; every other check runs.
        """
        node_id = _text(node_id)
        link_id = _text(link_id)
        nn, nl = len(node_id), len(link_id)
        fixed = _f(fixed_head_m, nn)
        if node_kind is None:
            node_kind = np.where(np.isfinite(fixed), NODE_SOURCE, NODE_JUNCTION)
        net = cls(
            node_id=node_id,
            node_kind=_i(node_kind, nn),
            elevation_m=_f(elevation_m, nn, 0.0),
            demand_m3s=_f(demand_m3s, nn, 0.0),
            fixed_head_m=fixed,
            zone=(np.full(nn, "", dtype=object) if zone is None
                  else _shared_strings(_text(zone))),
            link_id=link_id,
            from_idx=_i(from_idx, nl, dtype=np.int64),
            to_idx=_i(to_idx, nl, dtype=np.int64),
            link_kind=_i(link_kind, nl),
            length_m=_f(length_m, nl, 0.0),
            diameter_m=_f(diameter_m, nl),
            roughness=_f(roughness, nl),
            minor_k=_f(minor_k, nl, 0.0),
            status=_i(status, nl),
            valve_type=_i(valve_type, nl),
            valve_setting=_f(valve_setting, nl),
            pump_h0=_f(pump_h0, nl),
            pump_h1=_f(pump_h1, nl),
            pump_h2=_f(pump_h2, nl),
            pump_speed=_f(pump_speed, nl, 1.0),
            headloss_model=headloss_model,
        )
        net.validate(ids=not ids_unique)
        return net

    def replace(self, **changes) -> Network:
        """A validated copy with some arrays replaced; the others are shared, not copied."""
        new = dataclasses.replace(self, **changes)
        # ids shared with this validated network are not checked again
        new.validate(ids="node_id" in changes or "link_id" in changes)
        return new

    # ------------------------------------------------------------------ properties
    @property
    def n_nodes(self) -> int:
        return len(self.node_id)

    @property
    def n_links(self) -> int:
        return len(self.link_id)

    @property
    def is_fixed(self) -> np.ndarray:
        """True at nodes whose head is fixed (sources and tanks)."""
        return np.isfinite(self.fixed_head_m)

    def node_index(self, ids) -> np.ndarray:
        """Positions of the given node ids; raises ``KeyError`` naming an unknown id."""
        return _positions(self.node_id, ids, "node")

    def link_index(self, ids) -> np.ndarray:
        """Positions of the given link ids; raises ``KeyError`` naming an unknown id."""
        return _positions(self.link_id, ids, "link")

    # ------------------------------------------------------------------ validation
    def validate(self, *, ids: bool = True) -> None:
        """Check shapes and physically impossible values (``ids``: and that ids are unique).

        Raises
        ------
        NetworkError
            Naming the first offending node or link id and the field.
        """
        nn, nl = self.n_nodes, self.n_links
        for name in ("node_kind", "elevation_m", "demand_m3s", "fixed_head_m", "zone"):
            if len(getattr(self, name)) != nn:
                raise NetworkError(f"node array {name} has length {len(getattr(self, name))}, "
                                   f"expected {nn}", field=name)
        for name in ("from_idx", "to_idx", "link_kind", "length_m", "diameter_m", "roughness",
                     "minor_k", "status", "valve_type", "valve_setting", "pump_h0", "pump_h1",
                     "pump_h2", "pump_speed"):
            if len(getattr(self, name)) != nl:
                raise NetworkError(f"link array {name} has length {len(getattr(self, name))}, "
                                   f"expected {nl}", field=name)
        if self.headloss_model not in ("hazen-williams", "darcy-weisbach"):
            raise NetworkError(f"unknown head-loss model {self.headloss_model!r}; expected "
                               "'hazen-williams' or 'darcy-weisbach'", field="headloss_model")
        if ids:
            _unique(self.node_id, "node")
            _unique(self.link_id, "link")
        for name in ("from_idx", "to_idx"):
            idx = getattr(self, name)
            bad = (idx < 0) | (idx >= nn)
            if bad.any():
                k = int(np.argmax(bad))
                raise NetworkError(f"link {self.link_id[k]} refers to a node position "
                                   f"{int(idx[k])} outside 0..{nn - 1}",
                                   link_id=self.link_id[k], field=name)
        loop = self.from_idx == self.to_idx
        if loop.any():
            k = int(np.argmax(loop))
            raise NetworkError(f"link {self.link_id[k]} starts and ends at node "
                               f"{self.node_id[self.from_idx[k]]}", link_id=self.link_id[k],
                               field="to_node")
        self._check_nodes()
        self._check_links()
        object.__setattr__(self, "_validated", True)

    def _check_nodes(self) -> None:
        _finite(self.elevation_m, self.node_id, "elevation_m", "node")
        _finite(self.demand_m3s, self.node_id, "demand_m3s", "node")
        fixed_kind = self.node_kind != NODE_JUNCTION
        bad = fixed_kind & ~np.isfinite(self.fixed_head_m)
        if bad.any():
            k = int(np.argmax(bad))
            raise NetworkError(f"{NODE_KINDS[self.node_kind[k]]} {self.node_id[k]} has no "
                               "fixed head (hydraulic grade or tank level)",
                               node_id=self.node_id[k], field="fixed_head_m")

    def _check_links(self) -> None:
        ids = self.link_id
        pipe = self.link_kind == LINK_PIPE
        valve = self.link_kind == LINK_VALVE
        pump = self.link_kind == LINK_PUMP
        _positive(self.length_m[pipe], ids[pipe], "length_m", "pipe")
        needs_d = pipe | valve
        _positive(self.diameter_m[needs_d], ids[needs_d], "diameter_m", "link")
        big = needs_d & (self.diameter_m > _MAX_DIAMETER_M)
        if big.any():
            k = int(np.argmax(big))
            raise NetworkError(f"link {ids[k]} has diameter {self.diameter_m[k]:g} m, above "
                               f"{_MAX_DIAMETER_M:g} m: check the diameter unit",
                               link_id=ids[k], field="diameter_m")
        _positive(self.roughness[pipe], ids[pipe], "roughness", "pipe",
                  allow_zero=self.headloss_model == "darcy-weisbach")
        bad_k = ~np.isfinite(self.minor_k) | (self.minor_k < 0)
        if bad_k.any():
            k = int(np.argmax(bad_k))
            raise NetworkError(f"link {ids[k]} has minor-loss K {self.minor_k[k]!r}; expected a "
                               "number >= 0", link_id=ids[k], field="minor_k")
        if pump.any():
            a, b, c = self.pump_h0[pump], self.pump_h1[pump], self.pump_h2[pump]
            bad = (~(np.isfinite(a) & np.isfinite(b) & np.isfinite(c))
                   | (a <= 0) | (b > 0) | (c > 0) | ((b == 0) & (c == 0)))
            if bad.any():
                k = int(np.flatnonzero(pump)[np.argmax(bad)])
                raise NetworkError(
                    f"pump {ids[k]} has no usable head curve (h0={self.pump_h0[k]!r}, "
                    f"h1={self.pump_h1[k]!r}, h2={self.pump_h2[k]!r}): the head must fall as "
                    "flow rises", link_id=ids[k], field="pump_curve")
            sp = self.pump_speed[pump]
            bad = ~np.isfinite(sp) | (sp < 0)
            if bad.any():
                k = int(np.flatnonzero(pump)[np.argmax(bad)])
                raise NetworkError(f"pump {ids[k]} has relative speed {self.pump_speed[k]!r}; "
                                   "expected >= 0", link_id=ids[k], field="pump_speed")
        prv = valve & (self.valve_type == VALVE_PRESSURE_REDUCING)
        bad = prv & ~np.isfinite(self.valve_setting)
        tcv = valve & (self.valve_type == VALVE_THROTTLE)
        bad |= tcv & ~(np.isfinite(self.valve_setting) & (self.valve_setting >= 0))
        if bad.any():
            k = int(np.argmax(bad))
            raise NetworkError(f"valve {ids[k]} ({VALVE_NAMES[self.valve_type[k]]}) has no "
                               "usable setting", link_id=ids[k], field="valve_setting")


def _positions(all_ids: np.ndarray, ids, what: str) -> np.ndarray:
    lookup = {v: i for i, v in enumerate(all_ids)}
    ids = np.atleast_1d(np.asarray(ids).astype(str))
    try:
        return np.array([lookup[v] for v in ids], dtype=np.int64)
    except KeyError as exc:
        raise KeyError(f"unknown {what} id {exc.args[0]!r}") from None


def _text(values) -> np.ndarray:
    """``values`` as an object array of ``str`` (``str(v)`` of each value)."""
    a = np.asarray(values)
    if a.dtype == object and _all_str(a.tolist()):
        return a.copy()  # already text: skips a round trip through fixed-width unicode
    return a.astype(str).astype(object)


def _all_str(values: list) -> bool:
    """True when every value is a ``str`` (not a subclass); one pass in C."""
    return set(map(type, values)) <= {str}


def _unique(ids: np.ndarray, what: str) -> None:
    vals = ids.tolist()
    text = vals if _all_str(vals) else map(str, vals)
    if len(set(text)) == len(ids):  # the usual case: one hash pass
        return
    uniq, counts = np.unique(ids.astype(str), return_counts=True)
    if (counts > 1).any():
        dup = str(uniq[counts > 1][0])
        raise NetworkError(f"{what} id {dup!r} is used {counts[counts > 1][0]} times; ids must "
                           "be unique", **{f"{what}_id": dup, "field": f"{what}_id"})


def _finite(values: np.ndarray, ids: np.ndarray, name: str, what: str) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        k = int(np.argmax(bad))
        raise NetworkError(f"{what} {ids[k]} has {name} = {values[k]!r}; expected a number",
                           **{f"{what}_id": ids[k], "field": name})


def _positive(values, ids, name, what, *, allow_zero: bool = False) -> None:
    bad = ~np.isfinite(values) | ((values < 0) if allow_zero else (values <= 0))
    if bad.any():
        k = int(np.argmax(bad))
        cmp = ">= 0" if allow_zero else "> 0"
        raise NetworkError(f"{what} {ids[k]} has {name} = {values[k]!r}; expected a number {cmp}",
                           link_id=ids[k], field=name)


# Names used before the descriptive ones above; kept importable for code written against them.
STATUS_CV = STATUS_CHECK
VALVE_PRV = VALVE_PRESSURE_REDUCING
VALVE_TCV = VALVE_THROTTLE
