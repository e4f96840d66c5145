"""The Python interface: a model opened from a config, solved in notebooks and scripts.

The documented surface is what :mod:`gridflow` exports (``gridflow.__all__``): :func:`open_model`,
:class:`Model`, :class:`ScenarioResult`, :func:`draft_config` and the error classes. The
command line runs the same stages (:mod:`gridflow.jobs.stages`), so a scenario solved here gives
the numbers ``gridflow run`` writes.

Results are model estimates of the GIS as mapped; field flow tests, local codes and licensed
engineers decide.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from gridflow.config import Config, load_config
from gridflow.config.schema import quantity
from gridflow.errors import ConfigError, ConvergenceError, InputError
from gridflow.findings import Findings
from gridflow.hydraulics import HydraulicResult, HydraulicSystem
from gridflow.network import LINK_KINDS, NODE_KINDS, STATUS_NAMES, Network

if TYPE_CHECKING:
    import geopandas as gpd
    import networkx as nx

__all__ = ["open_model", "Model", "ScenarioResult"]


def open_model(config: str | Path) -> Model:
    """Open a model: read the config, clean the GIS into a network, allocate demand.

    Parameters
    ----------
    config : str or path
        A gridflow config file (TOML); relative paths in it are relative to its folder.

    Returns
    -------
    Model

    Raises
    ------
    ConfigError
        The config is unusable (the command line's exit code 2).
    InputError
        An input file, layer, feature or field is unusable (exit code 2).

    Examples
    --------
    >>> import gridflow
    >>> model = gridflow.open_model("sample_gis/millbrook.toml")
    >>> model.network.n_links > 3000
    True
    >>> gridflow.open_model("no/such.toml")
    Traceback (most recent call last):
    ...
    gridflow.errors.ConfigError: config no/such.toml does not exist
    """
    from gridflow.demand import allocate
    from gridflow.topology import build_network

    cfg = load_config(config)
    findings = Findings()
    clean = build_network(cfg, findings)
    alloc = allocate(cfg, clean, findings)
    return Model(cfg, clean, alloc, findings)


@dataclass(frozen=True, eq=False)
class ScenarioResult:
    """One solved scenario.

    Attributes
    ----------
    name : str
        The scenario's name.
    nodes : GeoDataFrame
        One row per node, the fields of the ``nodes_<scenario>`` output layer (run units).
    pipes : GeoDataFrame
        One row per link, the fields of the ``pipes_<scenario>`` output layer (run units).
    network : Network
        The solved network (SI arrays, the scenario's demand and changes applied).
    result : HydraulicResult
        Heads, flows and statuses as SI arrays in network order.
    mass_residual_m3s, head_residual_m : float
        The largest mass imbalance at a node [m3/s] and head-loss residual on a link [m],
        rechecked on the returned values.
    """

    name: str
    nodes: gpd.GeoDataFrame
    pipes: gpd.GeoDataFrame
    network: Network
    result: HydraulicResult
    mass_residual_m3s: float
    head_residual_m: float

    @property
    def iterations(self) -> int:
        """Newton iterations the solve took."""
        return int(self.result.iterations)


class Model:
    """A cleaned network with its demand, ready to solve scenarios and fire flow.

    Made by :func:`open_model`; nothing here writes a file.

    Attributes
    ----------
    config : Config
        The validated config.
    network : Network
        The cleaned network as a frozen struct of SI arrays (zero demand; scenarios add it).
        ``network.node_id`` and ``network.link_id`` are the utility's ids.
    scenarios : list of str
        The config's scenario names.

    Examples
    --------
    >>> import gridflow
    >>> model = gridflow.open_model("sample_gis/millbrook.toml")
    >>> model.scenarios
    ['average_day', 'max_day', 'peak_hour']
    >>> model
    <gridflow.Model 'Millbrook nightly run (sample data)': 2885 nodes, 4019 links, ...>
    >>> main = model.pipes.set_index("pipe_id").loc["WM-10001"]
    >>> main.kind, float(round(main.diameter_in, 1)), main.material
    ('pipe', 24.0, 'steel')
    """

    def __init__(self, cfg: Config, clean: Any, alloc: Any, findings: Findings) -> None:
        self.config = cfg
        self._clean = clean
        self._alloc = alloc
        self._findings = findings
        self._system: HydraulicSystem | None = None
        self._layers: tuple[Any, Any] | None = None

    def __repr__(self) -> str:
        net = self.network
        return (f"<gridflow.Model {self.config.run.name!r}: {net.n_nodes} nodes, {net.n_links} "
                f"links, {len(self._clean.hydrants)} hydrants, {len(self._findings)} findings>")

    @property
    def network(self) -> Network:
        """The cleaned network's arrays (SI, zero demand)."""
        return self._clean.network

    @property
    def scenarios(self) -> list[str]:
        return list(self.config.scenarios)

    @property
    def nodes(self) -> gpd.GeoDataFrame:
        """The cleaned network's nodes: the fields of ``gridflow check``'s ``nodes_network``."""
        return self._network_layers()[0].copy()

    @property
    def pipes(self) -> gpd.GeoDataFrame:
        """The cleaned network's links: the fields of ``gridflow check``'s ``pipes_network``.

        Pipes split by cleaning carry their original id with a suffix; valves and pumps are
        zero-length links at their point.
        """
        return self._network_layers()[1].copy()

    @property
    def hydrants(self) -> gpd.GeoDataFrame:
        """Hydrants attached to the network: ``hydrant_id``, ``node_id``, ``zone``, ... (SI)."""
        return self._clean.hydrants.copy()

    @property
    def findings(self) -> gpd.GeoDataFrame:
        """Repairs and problems found while reading, cleaning and allocating demand.

        The fields of the ``findings`` output layer: ``kind``, ``severity`` (info / warning /
        error), ``layer``, ``feature_id``, ``message``, geometry.

        Examples
        --------
        >>> import gridflow
        >>> model = gridflow.open_model("sample_gis/millbrook.toml")
        >>> f = model.findings
        >>> f.loc[f.feature_id == "WM-12187", ["severity", "layer"]].iloc[0].tolist()
        ['error', 'WaterMains']
        """
        return self._findings.to_geodataframe(crs=self._clean.crs)

    def _network_layers(self):
        if self._layers is None:
            from gridflow.jobs.check import network_layers

            self._layers = network_layers(self._clean, self.config.run.units)
        return self._layers

    def graph(self, *, directed: bool = False) -> nx.MultiGraph:
        """The cleaned network as a networkx multigraph keyed by the utility's ids.

        Parameters
        ----------
        directed : bool, default False
            A :class:`networkx.MultiDiGraph` with every edge from its ``from_node`` to its
            ``to_node`` (the sign convention of flows) instead of a
            :class:`networkx.MultiGraph`.

        Returns
        -------
        networkx.MultiGraph or networkx.MultiDiGraph
            Nodes are node ids with ``kind``, ``zone``, ``elevation_m``, ``fixed_head_m``
            and ``geometry``. One edge per cleaned link, its key the link id, with
            ``link_id``, ``kind``, ``from_node``, ``to_node``, ``length_m``,
            ``diameter_m``, ``roughness``, ``minor_loss_k``, ``status``, ``material``,
            ``install_year`` and ``geometry``. Parallel links stay separate edges.

        Notes
        -----
        Built in O(nodes + links) Python work on every call; for array work at scale use
        :attr:`network` (``from_idx``, ``to_idx``) with :mod:`scipy.sparse.csgraph`.

        Examples
        --------
        >>> import gridflow, networkx as nx
        >>> model = gridflow.open_model("sample_gis/millbrook.toml")
        >>> g = model.graph()
        >>> g.number_of_edges() == model.network.n_links
        True
        >>> [(u, v, key) for u, v, key in g.edges(keys=True) if key == "WM-10001"]
        [('N112', 'WTP-1', 'WM-10001')]
        >>> data = g.edges["N112", "WTP-1", "WM-10001"]
        >>> data["kind"], round(data["diameter_m"], 4), data["material"]
        ('pipe', 0.6096, 'steel')
        """
        import networkx as nx

        net = self.network
        nodes = self._clean.nodes
        links = self._clean.links
        g: nx.MultiGraph = nx.MultiDiGraph() if directed else nx.MultiGraph()
        node_id = np.asarray(net.node_id.astype(str).tolist(), dtype=object)  # Python str
        kinds = np.asarray(NODE_KINDS, dtype=object)[net.node_kind]
        g.add_nodes_from(
            (nid, {"kind": k, "zone": str(z), "elevation_m": float(e), "fixed_head_m": float(h),
                   "geometry": geom})
            for nid, k, z, e, h, geom in zip(node_id, kinds, net.zone.tolist(),
                                             net.elevation_m, net.fixed_head_m,
                                             nodes.geometry.values))
        lk = np.asarray(LINK_KINDS, dtype=object)[net.link_kind]
        st = np.asarray(STATUS_NAMES, dtype=object)[net.status]
        mat = links["material"].to_numpy() if "material" in links else [None] * net.n_links
        yr = links["install_year"].to_numpy() if "install_year" in links else [None] * net.n_links
        frm = node_id[net.from_idx]
        to = node_id[net.to_idx]
        g.add_edges_from(
            (a, b, lid, {"link_id": lid, "kind": k, "from_node": a, "to_node": b,
                         "length_m": float(ln), "diameter_m": float(d), "roughness": float(r),
                         "minor_loss_k": float(mk), "status": s, "material": m,
                         "install_year": y, "geometry": geom})
            for a, b, lid, k, ln, d, r, mk, s, m, y, geom in zip(
                frm, to, net.link_id.astype(str).tolist(), lk, net.length_m, net.diameter_m,
                net.roughness, net.minor_k, st, mat, yr, links.geometry.values))
        return g

    # ---- scenarios ---------------------------------------------------------------------------

    def scenario_network(self, scenario: str, *, closed_valves: Sequence[str] = (),
                         tank_levels: Mapping[str, str] | None = None,
                         demands: Mapping[str, str] | None = None,
                         diameters: Mapping[str, str] | None = None) -> Network:
        """The network of a scenario with changes applied, unsolved (SI arrays).

        Parameters are those of :meth:`solve`.
        """
        from gridflow.demand import scenario_network

        cfg = self.config
        if scenario not in cfg.scenarios:
            raise ConfigError(f"no scenario named {scenario!r} ({', '.join(cfg.scenarios)})",
                              key=f"scenarios.{scenario}")
        if isinstance(closed_valves, str):
            closed_valves = [closed_valves]
        if closed_valves or tank_levels:
            # the same path as the config's own [scenarios.<name>] keys
            sec = cfg.scenarios[scenario]
            levels = {str(k): quantity("length")(v, f"tank_levels.{k}")
                      for k, v in (tank_levels or {}).items()}
            sec = dataclasses.replace(
                sec, closed_valves=[*sec.closed_valves, *map(str, closed_valves)],
                tank_levels={**sec.tank_levels, **levels})
            cfg = dataclasses.replace(cfg, scenarios={**cfg.scenarios, scenario: sec})
        net = scenario_network(cfg, self._clean, self._alloc, scenario)
        changes: dict[str, np.ndarray] = {}
        if demands:
            demand = np.array(net.demand_m3s, dtype=float)
            ids = [str(k) for k in demands]
            pos = _node_positions(net, self._clean.hydrants, ids)
            for nid, j in zip(ids, pos):
                key = f"demands.{nid}"
                if j < 0:
                    raise ConfigError(f"{key}: no node or attached hydrant with id {nid!r}",
                                      key=key)
                demand[j] += quantity("flow", minimum=0.0)(demands[nid], key)
            changes["demand_m3s"] = demand
        if diameters:
            dia = np.array(net.diameter_m, dtype=float)
            for lid, value in diameters.items():
                key = f"diameters.{lid}"
                pos = _link_positions(net.link_id, str(lid))
                if not len(pos):
                    raise ConfigError(f"{key}: no pipe with id {lid!r}", key=key)
                d = quantity("length")(value, key)
                if not d > 0:
                    raise ConfigError(f"{key}: a diameter must be above 0, got {value!r}",
                                      key=key)
                dia[pos] = d
            changes["diameter_m"] = dia
        return net.replace(**changes) if changes else net

    def solve(self, scenario: str = "average_day", *, closed_valves: Sequence[str] = (),
              tank_levels: Mapping[str, str] | None = None,
              demands: Mapping[str, str] | None = None,
              diameters: Mapping[str, str] | None = None) -> ScenarioResult:
        """Solve a scenario, optionally with changes; nothing is written.

        Parameters
        ----------
        scenario : str, default "average_day"
            A scenario of the config (its demand factors, tank levels, pump status and closed
            valves apply first).
        closed_valves : sequence of str
            Valve or pipe ids to close as well, exactly as the scenario's ``closed_valves``
            config key would (a split main's id closes all its pieces).
        tank_levels : mapping of str to str
            Tank id to water level above the tank's bottom, with a unit (``"20 ft"``).
        demands : mapping of str to str
            Node id (or an attached hydrant's id: its node) to a demand added on top of the
            scenario's, with a unit (``"500 gpm"``, ``"30 l/s"``); not scaled by the
            scenario's factor.
        diameters : mapping of str to str
            Pipe id (a split main's id: all its pieces) to a new inside diameter with a unit
            (``"12 in"``).

        Returns
        -------
        ScenarioResult
            ``nodes`` and ``pipes`` carry the fields of the output layers.

        Raises
        ------
        ConfigError
            An unknown scenario, id or unit (the argument in ``key``), as the command line
            reports for the same config keys (exit code 2).
        TopologyError, InputError
            The network has no source or tank, or no junction has an elevation (exit code 2).
        ConvergenceError
            The solve did not converge or failed its residual check (exit code 3); ``node_id``
            and ``link_id`` name the worst places.

        Notes
        -----
        The solution satisfies mass balance at every supplied node and the head-loss law on
        every open link to the config's tolerances; the largest residuals are returned.

        Examples
        --------
        >>> import gridflow
        >>> model = gridflow.open_model("sample_gis/millbrook.toml")
        >>> base = model.solve("max_day")
        >>> base.nodes.columns[:6].tolist()
        ['node_id', 'kind', 'fixed_head', 'zone', 'elevation_ft', 'required_demand_gpm']
        >>> shut = model.solve("max_day", closed_valves=["V-20100"])
        >>> shut.pipes.set_index("pipe_id").loc["V-20100", "status"]
        'closed'
        >>> hot = model.solve("max_day", demands={"HYD-1001": "1000 gpm"})
        >>> node = model.hydrants.set_index("hydrant_id").node_id["HYD-1001"]
        >>> def psi(res):
        ...     return res.nodes.set_index("node_id").pressure_psi[node]
        >>> bool(psi(hot) < psi(base) - 1.0)   # 1000 gpm drawn at the hydrant's node
        True
        """
        from gridflow.jobs.run import require_solvable, solve_options
        from gridflow.jobs.stages import scenario_layers

        net = self.scenario_network(scenario, closed_valves=closed_valves,
                                    tank_levels=tank_levels, demands=demands,
                                    diameters=diameters)
        require_solvable(self.config, self._clean)
        opts = solve_options(self.config)
        system = HydraulicSystem(net, opts, share=self._system)
        self._system = system
        try:
            r = system.solve()
        except ConvergenceError as exc:
            raise ConvergenceError(f"scenario {scenario} did not converge: {exc.message}",
                                   node_id=exc.fields.get("node_id"),
                                   link_id=exc.fields.get("link_id")) from None
        mass, head = _check_solution(system, r, scenario)
        nodes, pipes = scenario_layers(self.config, self._clean, net, r)
        return ScenarioResult(scenario, nodes, pipes, net, r, mass, head)

    def fire_flow(self, hydrants: str | Sequence[str] | None = None, *,
                  scenario: str | None = None, workers: int = 1,
                  **changes: Any) -> gpd.GeoDataFrame:
        """Available fire flow at chosen hydrants.

        Parameters
        ----------
        hydrants : str or sequence of str, optional
            Hydrant ids (default: every attached hydrant).
        scenario : str, optional
            The base scenario (default: the config's ``fireflow.scenario``).
        workers : int, default 1
            Local worker processes (1: in this process).
        **changes
            ``closed_valves``, ``tank_levels``, ``demands``, ``diameters`` as in :meth:`solve`,
            applied to the base scenario.

        Returns
        -------
        GeoDataFrame
            One row per hydrant in the order asked, the fields of the ``hydrants_fireflow``
            output layer (run units).

        Raises
        ------
        InputError
            A hydrant id that is not in the hydrants layer or was not attached to a main
            (``gridflow check`` lists why).
        ConfigError, ConvergenceError
            As :meth:`solve`.

        Notes
        -----
        Available flow is at the config's residual target (20 psi by default, NFPA 291) and,
        with ``fireflow.system_wide``, keeps every other node of the zone above the system
        minimum. These are model estimates; field flow tests, local codes, the fire authority
        and licensed engineers decide.

        Examples
        --------
        >>> import gridflow
        >>> model = gridflow.open_model("sample_gis/millbrook.toml")
        >>> ff = model.fire_flow(["HYD-1001", "HYD-1002"])
        >>> ff.hydrant_id.tolist()
        ['HYD-1001', 'HYD-1002']
        >>> bool((ff.available_flow_gpm > 0).all())
        True
        """
        from gridflow.jobs.stages import fireflow_layer

        name = scenario or self.config.fireflow.scenario
        ids = None
        if hydrants is not None:
            ids = [hydrants] if isinstance(hydrants, str) else [str(h) for h in hydrants]
            self._check_hydrants(ids)
        base = self.solve(name, **changes)
        from gridflow.jobs.run import solve_options

        _, layer = fireflow_layer(self.config, self._clean, base.network, base.result,
                                  solve_options(self.config), hydrant_ids=ids, workers=workers)
        return layer

    def _check_hydrants(self, ids: list[str]) -> None:
        known = pd.Index(self._clean.hydrants["hydrant_id"].astype(str))
        missing = [h for h in ids if h not in known]
        if not missing:
            return
        sec = self.config.layers.hydrants
        layer = sec.layer if sec is not None else None
        f = self.findings
        why = f.loc[(f.feature_id.astype(str) == missing[0]) & (f.layer == layer), "message"]
        if not len(why):
            raise InputError(f"no hydrant with id {missing[0]!r} in layer {layer!r}",
                             layer=layer, feature_id=missing[0])
        raise InputError(f"hydrant {missing[0]} is not attached to the network "
                         f"({why.iloc[0]})", layer=layer, feature_id=missing[0])


def _check_solution(system: HydraulicSystem, r: HydraulicResult,
                    name: str) -> tuple[float, float]:
    """The run's recheck of a solution on the values returned (see ``verify_solution``)."""
    from gridflow.jobs.run import verify_solution

    opts = system.opt
    mass, head, wn, wl = verify_solution(system, r)
    if not (mass <= 10 * opts.flow_tolerance and head <= 10 * opts.head_tolerance):
        net = system.net
        raise ConvergenceError(
            f"scenario {name}: the solution failed its check (mass imbalance {mass:.3g} m3/s "
            f"at node {net.node_id[wn]}, head-loss residual {head:.3g} m on link "
            f"{net.link_id[wl]})", node_id=str(net.node_id[wn]), link_id=str(net.link_id[wl]))
    return mass, head


def _node_positions(net: Network, hydrants: Any, ids: list[str]) -> np.ndarray:
    """Node positions of node ids, or of attached hydrants' nodes; -1 where neither."""
    pos = pd.Index(net.node_id.astype(str)).get_indexer(ids)
    if (pos < 0).any() and len(hydrants):
        hyd = pd.Series(hydrants["node_idx"].to_numpy(),
                        index=hydrants["hydrant_id"].astype(str))
        hyd = hyd[~hyd.index.duplicated()]
        alt = hyd.reindex(ids).fillna(-1).to_numpy(dtype=np.int64)
        pos = np.where(pos < 0, alt, pos)
    return pos


def _link_positions(link_id: np.ndarray, lid: str) -> np.ndarray:
    """Positions of a link id, or of the pieces a main was split into (``P12.1`` ...)."""
    names = link_id.astype(str)
    exact = np.flatnonzero(names == lid)
    if len(exact):
        return exact
    return np.flatnonzero(np.char.startswith(names, f"{lid}."))
