"""Scenarios: average-day demand times factors, plus tank levels, pump status, closed valves.

A scenario never rebuilds the network: :func:`scenario_network` replaces just the arrays it
changes (demand, fixed heads, pump speeds, link status) and shares the rest.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridflow.config.demand import ScenarioSection, scenario_factor
from gridflow.demand.allocate import DemandAllocation
from gridflow.errors import ConfigError, InputError
from gridflow.network.model import (
    LINK_KINDS,
    LINK_PUMP,
    NODE_KINDS,
    NODE_TANK,
    STATUS_CLOSED,
    Network,
)

__all__ = ["scenario_demand", "scenario_network", "scenario_factors"]


def _section(cfg, name: str) -> ScenarioSection:
    if name not in cfg.scenarios:
        raise ConfigError(f"no scenario named {name!r} in [scenarios] "
                          f"({', '.join(cfg.scenarios) or 'none'})", key=f"scenarios.{name}")
    return cfg.scenarios[name]


def scenario_factors(cfg, alloc: DemandAllocation, name: str) -> dict[str, float]:
    """The multiplier on average-day demand for every category the allocation carries.

    ``category_factors`` of the scenario override its ``factor``; a scenario without ``factor``
    uses the common-practice default for its name (``DEFAULT_FACTORS``: max_day 1.8,
    peak_hour 3.0, others 1.0).

    Raises
    ------
    ConfigError
        The scenario is unknown, or ``category_factors`` names a category that neither the
        config nor the allocation knows (``scenarios.<name>.category_factors.<category>``).
    """
    sec = _section(cfg, name)
    known = set(alloc.categories) | set(alloc.node_category_m3s)
    for cat in sec.category_factors:
        if cat not in known:
            key = f"scenarios.{name}.category_factors.{cat}"
            raise ConfigError(f"config key {key}: unknown demand category {cat!r}; known: "
                              f"{', '.join(sorted(known))}", key=key)
    base = scenario_factor(name, sec)
    return {cat: sec.category_factors.get(cat, base) for cat in alloc.node_category_m3s}


def scenario_demand(cfg, alloc: DemandAllocation, name: str) -> np.ndarray:
    """Demand per node for scenario ``name`` [m3/s]: sum over categories of factor x average
    day.

    Examples
    --------
    With no ``[scenarios]`` in the config, ``scenario_demand(cfg, alloc, "peak_hour")`` is
    3.0 times ``alloc.node_demand_m3s``.
    """
    factors = scenario_factors(cfg, alloc, name)
    out = np.zeros(len(alloc.node_id))
    for cat, arr in alloc.node_category_m3s.items():
        out += factors[cat] * arr
    return out


def _positions(ids_all: np.ndarray, wanted: list[str]) -> np.ndarray:
    return pd.Index(np.asarray(ids_all).astype(str)).get_indexer(list(wanted))


def scenario_network(cfg, clean, alloc: DemandAllocation, name: str) -> Network:
    """The network for scenario ``name``: its demand, tank levels, pump status, closed valves.

    Parameters
    ----------
    cfg : gridflow.config.Config
    clean : CleanNetwork
        ``network`` and, when the scenario sets tank levels, ``tank_bottom_m`` (bottom
        elevation per node [m], NaN where not a tank).
    alloc : DemandAllocation
    name : str
        A key of ``cfg.scenarios``.

    Returns
    -------
    Network
        A validated copy; arrays the scenario does not change are shared with
        ``clean.network``.

    Raises
    ------
    ConfigError
        Naming the key: an unknown scenario, a tank level for a node that is not a tank
        (``scenarios.<name>.tank_levels.<id>``), a pump status for a link that is not a pump
        or a value other than 'on', 'off' or a speed >= 0 (``scenarios.<name>.pump_status.<id>``),
        unknown or non-closable ids in ``scenarios.<name>.closed_valves``.

    Notes
    -----
    A tank's fixed head is its bottom elevation plus its level: ``H = z_bottom + level`` [m].
    Pump 'on' runs the pump at relative speed 1, 'off' at 0.
    """
    net: Network = clean.network
    sec = _section(cfg, name)
    where = f"scenarios.{name}"
    changes: dict[str, np.ndarray] = {"demand_m3s": scenario_demand(cfg, alloc, name)}

    if sec.tank_levels:
        ids = list(sec.tank_levels)
        pos = _positions(net.node_id, ids)
        for tid, j in zip(ids, pos):
            key = f"{where}.tank_levels.{tid}"
            if j < 0:
                raise ConfigError(f"config key {key}: no node with id {tid!r}", key=key)
            if net.node_kind[j] != NODE_TANK:
                raise ConfigError(f"config key {key}: node {tid} is a "
                                  f"{NODE_KINDS[net.node_kind[j]]}, not a tank", key=key)
            if sec.tank_levels[tid] < 0:
                raise ConfigError(f"config key {key}: a tank level must be >= 0", key=key)
        bottom = getattr(clean, "tank_bottom_m", None)
        if bottom is None:
            raise AttributeError("scenario tank levels need CleanNetwork.tank_bottom_m (bottom "
                                 "elevation per node [m], NaN where not a tank); the topology "
                                 "stage did not provide it")
        bottom = np.asarray(bottom, dtype=float)
        bad = ~np.isfinite(bottom[pos])
        if bad.any():
            tid = ids[int(np.argmax(bad))]
            raise InputError(f"tank {tid} has no bottom elevation; cannot set its level in "
                             f"scenario {name}", layer="tanks", feature_id=tid,
                             field="bottom_elevation")
        fixed = np.array(net.fixed_head_m, dtype=float)
        fixed[pos] = bottom[pos] + np.array([sec.tank_levels[t] for t in ids])
        changes["fixed_head_m"] = fixed

    if sec.pump_status:
        ids = list(sec.pump_status)
        pos = _positions(net.link_id, ids)
        speed = np.array(net.pump_speed, dtype=float)
        for pid, j in zip(ids, pos):
            key = f"{where}.pump_status.{pid}"
            if j < 0:
                raise ConfigError(f"config key {key}: no link with id {pid!r}", key=key)
            if net.link_kind[j] != LINK_PUMP:
                raise ConfigError(f"config key {key}: link {pid} is a "
                                  f"{LINK_KINDS[net.link_kind[j]]}, not a pump", key=key)
            speed[j] = _pump_speed(sec.pump_status[pid], key)
        changes["pump_speed"] = speed

    if sec.closed_valves:
        key = f"{where}.closed_valves"
        ids, pos = _closable_links(net.link_id, list(sec.closed_valves))
        unknown = [i for i, j in zip(ids, pos) if j < 0]
        if unknown:
            raise ConfigError(f"config key {key}: no valve or pipe with id "
                              f"{', '.join(map(repr, unknown))}", key=key)
        pumps = [i for i, j in zip(ids, pos) if net.link_kind[j] == LINK_PUMP]
        if pumps:
            raise ConfigError(f"config key {key}: {', '.join(pumps)} is a pump; switch pumps "
                              f"off with {where}.pump_status", key=key)
        status = np.array(net.status, copy=True)
        status[pos] = STATUS_CLOSED
        changes["status"] = status

    return net.replace(**changes)


def _closable_links(link_id: np.ndarray, ids: list[str]) -> tuple[list[str], np.ndarray]:
    """Positions of the links a scenario closes, by the utility's ids.

    An id matches a link exactly; failing that, the pieces a main was split into
    (``P12.1``, ``P12.2`` ...) or a valve renamed to keep ids unique (``valve:12``) all match.
    Returns the ids repeated per matched link and the positions (-1 where nothing matched).
    """
    exact = _positions(link_id, ids)
    out_ids: list[str] = []
    out_pos: list[int] = []
    names = link_id.astype(str)
    for i, j in zip(ids, exact):
        if j >= 0:
            out_ids.append(i)
            out_pos.append(int(j))
            continue
        pieces = np.flatnonzero(np.char.startswith(names, f"{i}.") | (names == f"valve:{i}"))
        out_ids.extend([i] * max(1, len(pieces)))
        out_pos.extend(pieces.tolist() or [-1])
    return out_ids, np.asarray(out_pos, dtype=np.int64)


def _pump_speed(value: str, key: str) -> float:
    text = value.strip().lower()
    if text == "on":
        return 1.0
    if text == "off":
        return 0.0
    try:
        speed = float(text)
    except ValueError:
        speed = float("nan")
    if not np.isfinite(speed) or speed < 0:
        raise ConfigError(f"config key {key} expects 'on', 'off' or a relative speed >= 0 such "
                          f"as '0.9', got {value!r}", key=key)
    return speed
