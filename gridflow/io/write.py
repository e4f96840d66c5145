"""Writing GeoPackages atomically.

:func:`write_geopackage` writes every layer to a temporary file beside the target and renames
it into place only when all layers are complete; on any error the temporary file is removed and
an earlier output at the target stays as it was. An input file is never a target.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Mapping, Sequence

from gridflow.errors import OutputError

__all__ = ["write_geopackage"]


def write_geopackage(path: str | Path, layers: Mapping[str, object], *,
                     inputs: Sequence[str | Path] = (),
                     styles: bool = False) -> Path:
    """Write layers to a GeoPackage, atomically.

    Parameters
    ----------
    path : path
        The output GeoPackage; replaced only when every layer is written.
    layers : mapping of str to GeoDataFrame or DataFrame
        Layer name to data, written in order. A DataFrame without geometry becomes an
        attribute-only table (e.g. ``run_info``).
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
    import pyogrio

    path = Path(path)
    target = path.resolve()
    for p in inputs:
        if Path(p).resolve() == target:
            raise OutputError(f"output {path} is one of the inputs; choose another output path "
                              "(--out or [run] output)", file=str(path))
    folder = target.parent
    if not folder.is_dir():
        raise OutputError(f"output folder {folder} does not exist", file=str(path))
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.tmp-", suffix=".gpkg", dir=folder)
    except OSError as exc:
        raise OutputError(f"cannot write in {folder}: {exc.strerror}", file=str(path)) from None
    os.close(fd)
    os.unlink(tmp)  # GDAL creates the file itself
    try:
        for name, df in layers.items():
            _write_layer(pyogrio, tmp, name, df)
        if styles:
            from gridflow.io.styles import store_styles

            store_styles(tmp, list(layers))
        os.replace(tmp, target)
    except BaseException:
        for p in (tmp, tmp + "-journal", tmp + "-wal", tmp + "-shm"):
            try:
                os.unlink(p)
            except FileNotFoundError:
                pass
        raise
    return path


def _write_layer(pyogrio, tmp: str, name: str, df) -> None:
    import geopandas as gpd
    import pandas as pd

    if isinstance(df, gpd.GeoDataFrame) and df.geometry.name in df:
        geom = df.geometry
        types = set(geom.geom_type.dropna().unique())
        kw = {}
        if len(types) != 1:
            kw["geometry_type"] = "Unknown"  # mixed or all empty (findings)
        pyogrio.write_dataframe(df, tmp, layer=name, driver="GPKG", use_arrow=True,
                                promote_to_multi=False, **kw)
    else:
        frame = pd.DataFrame(df)
        pyogrio.write_dataframe(frame, tmp, layer=name, driver="GPKG")
