"""From the mapped layers to a hydraulically connected network: :func:`build_network`.

The stages, each a function of small frozen records (:mod:`gridflow.topology.records`),
called in this order; each reports its repairs and problems as findings:

1. :func:`~gridflow.topology.pipes.prepare_pipes`: abandoned mains left out, multi-part lines
   exploded, diameters and roughness checked;
2. :func:`~gridflow.topology.snap.snap_ends`: ends snapped to each other and to junction
   points within ``[run] snap_tolerance``; zero-length and duplicate mains dropped;
3. :func:`~gridflow.topology.attach.attach_points`: T-junctions (dangling ends only, same
   level), hydrants, valves and pumps, rings, as split events;
4. :func:`~gridflow.topology.split.split_mains`: the mains cut into pipe pieces;
5. :func:`~gridflow.topology.nodes.number_nodes`: node order and ids; tanks and sources as
   fixed-head nodes at the nearest pipe end;
6. :func:`~gridflow.topology.links.link_table`: every link's columns;
7. :func:`~gridflow.topology.elevations.fill_elevations`: missing elevations (a DEM sampled
   in :mod:`gridflow.io.dem`, then neighbours);
8. :func:`~gridflow.topology.assemble.assemble`: zones, the network arrays, the frames;
   then connectivity, isolating valves and pump grades as findings.

Decisions (what a utility engineer expects; documented in the README config reference): a
missing or implausible diameter leaves the pipe out unless a default is set; crossing mains
without a shared vertex stay unconnected (common practice); an end already shared by two or
more mains never joins a passing main; a missing elevation is interpolated from neighbouring
nodes; a missing layer or field, a layer without CRS, text where a number belongs: InputError.
"""

from __future__ import annotations

import time

import numpy as np

from gridflow.findings import Findings
from gridflow.io.dem import sample_dem
from gridflow.io.read import ReadResult, read_inputs
from gridflow.memory import gc_paused, release_memory
from gridflow.topology.assemble import assemble
from gridflow.topology.attach import attach_points
from gridflow.topology.clean import CleanNetwork
from gridflow.topology.elevations import fill_elevations
from gridflow.topology.links import link_table
from gridflow.topology.nodes import number_nodes
from gridflow.topology.pipes import C_RANGE, MAX_DIAMETER_M, MIN_DIAMETER_M, prepare_pipes, z_factor
from gridflow.topology.records import Context
from gridflow.topology.snap import snap_ends
from gridflow.topology.split import split_mains
from gridflow.topology.supply import isolation_findings, pump_grade_findings
from gridflow.topology.zones import connectivity_findings, network_parts

__all__ = ["CleanNetwork", "build_network", "MAX_DIAMETER_M", "MIN_DIAMETER_M", "C_RANGE"]


def build_network(cfg, findings: Findings, *, read: ReadResult | None = None,
                  timings: dict[str, float] | None = None) -> CleanNetwork:
    """Read the mapped GIS and clean it into a network.

    Parameters
    ----------
    cfg : Config
    findings : Findings
        Every repair and problem is appended here.
    read : ReadResult, optional
        Already-read layers (default: :func:`gridflow.io.read.read_inputs`).
    timings : dict, optional
        Receives the wall time [s] of each stage by name (``read`` when read here,
        ``pipes``, ``snap``, ``attach``, ``split``, ``nodes``, ``links``, ``elevations``,
        ``assemble``, ``checks``), for benchmarks.

    Returns
    -------
    CleanNetwork

    Raises
    ------
    InputError
        Unusable input (missing layer or field, no CRS, text where a number belongs).
    TopologyError
        No usable main left.
    """
    with gc_paused():  # the stages make millions of geometries (see gridflow.memory)
        return _build(cfg, findings, read, timings)


def _build(cfg, findings: Findings, read: ReadResult | None,
           timings: dict[str, float] | None) -> CleanNetwork:
    clock = _StageClock(timings)
    rr = read if read is not None else clock.lap("read", read_inputs(cfg, findings))
    release_memory()  # the reader's Arrow buffers
    ctx = Context(cfg=cfg, read=rr, findings=findings, tol=float(cfg.run.snap_tolerance),
                  crs=rr.crs)
    clock.start()
    pipes = clock.lap("pipes", prepare_pipes(ctx))
    if read is None:  # the mains as read are not needed again (prepared: ``pipes``)
        rr.layers.pop("pipes", None)
    pipes_layer = pipes.layer
    snapped = clock.lap("snap", snap_ends(ctx, pipes))
    del pipes
    attached = clock.lap("attach", attach_points(ctx, snapped))
    split = clock.lap("split", split_mains(snapped, attached))
    nodes = clock.lap("nodes", number_nodes(ctx, snapped, attached, split))
    links = clock.lap("links", link_table(ctx, snapped, attached, split, nodes))
    del split, snapped  # large intermediates go before the network's arrays are made
    release_memory()
    dem = None
    if cfg.elevation.source == "dem":
        dem = sample_dem(cfg.resolve(cfg.elevation.dem), nodes.xy[:, 0], nodes.xy[:, 1],
                         rr.crs, z_factor(cfg))
    elev, guessed = clock.lap("elevations", fill_elevations(ctx, nodes, links, dem))
    clean, zone_parts = clock.lap("assemble", assemble(ctx, attached, nodes, links, elev,
                                                       guessed))
    del attached, nodes
    net = clean.network
    parts = network_parts(net, zone_parts) if net.n_nodes and net.is_fixed.any() else None
    connectivity_findings(findings, net, links.cols["geom"],
                          np.asarray(clean.nodes.geometry.values, dtype=object), pipes_layer,
                          parts)
    isolation_findings(ctx, clean, parts)
    pump_grade_findings(ctx, clean.network)
    clock.lap("checks", None)
    return clean


class _StageClock:
    """Wall time of each stage into ``timings`` (nothing when it is None)."""

    def __init__(self, timings: dict[str, float] | None):
        self.timings = timings
        self.t = time.perf_counter()

    def start(self) -> None:
        self.t = time.perf_counter()

    def lap(self, name: str, result):
        """``result`` unchanged; the time since the last lap recorded under ``name``."""
        now = time.perf_counter()
        if self.timings is not None:
            self.timings[name] = self.timings.get(name, 0.0) + now - self.t
        self.t = now
        return result


