"""Writing GeoPackages atomically.

:func:`write_geopackage` writes every layer to a temporary file beside the target and renames
it into place only when all layers are complete (:mod:`gridflow.io.atomic`); on any error the
temporary file is removed and an earlier output at the target stays as it was. An input file is
never a target. :func:`write_layers` writes into a file that does not exist yet, for callers
that stage several outputs at once (:class:`gridflow.io.atomic.OutputSet`).
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from pathlib import Path

from gridflow.io.atomic import atomic_write, remove_stale_temporaries

__all__ = ["write_geopackage", "write_layers", "remove_stale_temporaries"]

log = logging.getLogger("gridflow")


def write_geopackage(path: str | Path, layers: Mapping[str, object], *,
                     inputs: Sequence[str | Path] = (),
                     styles: bool = False) -> Path:
    """Write layers to a GeoPackage, atomically.

    Parameters
    ----------
    path : path
        The output GeoPackage; replaced only when every layer is written.
    layers : mapping of str to GeoDataFrame, DataFrame or DeferredLayer
        Layer name to data, written in order. A DataFrame without geometry becomes an
        attribute-only table (e.g. ``run_info``); a :class:`gridflow.io.deferred.DeferredLayer`
        is built just before it is written and let go after.
    inputs : sequence of paths
        The run's input files: writing over one of them is refused.
    styles : bool, optional
        Store a default style for each result layer (``nodes_*``, ``pipes_*``,
        ``hydrants_fireflow``) in the ``layer_styles`` table (:mod:`gridflow.io.styles`).

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    OutputError
        If ``path`` is one of the inputs, or its folder is missing or not writable.
    """
    from gridflow.io.paths import check_outputs

    path = Path(path)
    check_outputs({"output GeoPackage": path},
                  {f"input {Path(p).name}": Path(p) for p in inputs})
    return atomic_write(path, lambda tmp: write_layers(tmp, layers, styles=styles))


def write_layers(path: str | Path, layers: Mapping[str, object], *,
                 styles: bool = False) -> Path:
    """Write layers into a new GeoPackage at ``path`` (not atomic: see :func:`write_geopackage`)."""
    import pyogrio

    from gridflow.io.deferred import DeferredLayer, materialize
    from gridflow.memory import release_memory

    tmp = str(path)
    for name, layer in layers.items():
        _write_layer(pyogrio, tmp, name, materialize(layer))
        if isinstance(layer, DeferredLayer):  # its frame and Arrow buffers are free now
            release_memory()
    if styles:
        from gridflow.io.styles import store_styles

        store_styles(tmp, list(layers))
    return Path(path)


def _write_layer(pyogrio, tmp: str, name: str, df) -> None:
    import geopandas as gpd
    import numpy as np
    import pandas as pd
    import shapely

    if isinstance(df, gpd.GeoDataFrame) and df.geometry.name in df:
        ids = shapely.get_type_id(df.geometry.values)  # -1: missing (no geometry)
        types = np.unique(ids[ids >= 0])
        kw = {}
        if len(types) != 1:
            kw["geometry_type"] = "Unknown"  # mixed or all empty (findings)
        # one call per layer: appending parts to a GeoPackage layer updates its spatial index
        # row by row (measured: twice the time of one call at 420k pipes)
        pyogrio.write_dataframe(df, tmp, layer=name, driver="GPKG", use_arrow=True,
                                promote_to_multi=False, **kw)
    else:
        frame = pd.DataFrame(df)
        pyogrio.write_dataframe(frame, tmp, layer=name, driver="GPKG")
