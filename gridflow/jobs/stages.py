"""Stages shared by the nightly job and the Python interface (:mod:`gridflow._model`).

Each stage is a function of the config, the cleaned network and SI arrays; the run job and the
interface call the same ones, so a scenario solved either way gives the same numbers.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd

from gridflow.config import Config
from gridflow.hydraulics import HydraulicResult, SolveOptions
from gridflow.network import Network

__all__ = ["scenario_layers", "scenario_layer_parts", "fireflow_layer"]


def scenario_layers(cfg: Config, clean, net: Network, r: HydraulicResult, *,
                    which: str | None = None):
    """``nodes_<scenario>`` and ``pipes_<scenario>`` in the run's units (output fields).

    ``which="nodes"`` or ``"pipes"`` builds (and returns) only that one layer.
    """
    from gridflow.jobs.layers import nodes_layer, pipes_layer

    units = cfg.run.units
    nodes = pipes = None
    if which in (None, "nodes"):
        nodes = nodes_layer(net, r, clean.nodes.geometry.values, clean.crs, cfg.criteria,
                            units)
    if which in (None, "pipes"):
        rating = getattr(clean.links, "pressure_rating_m", None)
        rating = None if rating is None else np.asarray(rating, dtype=float)
        pipes = pipes_layer(net, r, clean.links.geometry.values, clean.crs, cfg.criteria,
                            units, rating)
    if which is None:
        return nodes, pipes
    return nodes if which == "nodes" else pipes


def scenario_layer_parts(cfg: Config, clean, net: Network, r: HydraulicResult, *, which: str):
    """``nodes_<scenario>`` (``which="nodes"``) or ``pipes_<scenario>`` as the GeoPackage
    writer takes it: the fields of :func:`scenario_layers` as an Arrow table, the geometry
    and its type (:func:`gridflow.jobs.layers.layer_parts`), without building the frame."""
    from gridflow.jobs.layers import layer_parts, nodes_columns, pipes_columns

    units = cfg.run.units
    if which == "nodes":
        return layer_parts(nodes_columns(net, r, cfg.criteria, units),
                           clean.nodes.geometry.values)
    rating = getattr(clean.links, "pressure_rating_m", None)
    rating = None if rating is None else np.asarray(rating, dtype=float)
    return layer_parts(pipes_columns(net, r, cfg.criteria, units, rating),
                       clean.links.geometry.values)


def fireflow_layer(cfg: Config, clean, net: Network, base: HydraulicResult,
                   options: SolveOptions, *, hydrant_ids: Sequence[str] | None = None,
                   workers: int | None = None, scheduler: str | None = None,
                   progress: Callable[[int, int], None] | None = None):
    """The fire-flow sweep over the attached hydrants (all, or ``hydrant_ids`` in that order).

    Returns the sweep's SI table and the ``hydrants_fireflow`` layer in the run's units.
    """
    from gridflow.analysis.fireflow import sweep
    from gridflow.jobs.layers import hydrants_layer

    hyd = clean.hydrants
    if hydrant_ids is not None:
        pos = pd.Index(hyd["hydrant_id"].astype(str)).get_indexer(list(hydrant_ids))
        hyd = hyd.iloc[pos]
    ff = sweep(net, base, pd.DataFrame(hyd.drop(columns="geometry")), cfg.fireflow,
               cfg.criteria, options=options, workers=workers, scheduler=scheduler,
               progress=progress)
    order = pd.Index(ff["hydrant_id"].astype(str))
    geo = hyd.set_index(hyd["hydrant_id"].astype(str)).geometry.reindex(order).values
    return ff, hydrants_layer(ff, geo, clean.crs, cfg.run.units)
