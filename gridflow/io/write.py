"""Writing GeoPackages atomically.

:func:`write_geopackage` writes every layer to a temporary file beside the target and renames
it into place only when all layers are complete; on any error the temporary file is removed and
an earlier output at the target stays as it was. An input file is never a target. A process
killed while writing cannot remove its temporary file: the next run writing the same target
removes such stale temporaries (:func:`remove_stale_temporaries`).
"""

from __future__ import annotations

import glob
import logging
import os
import tempfile
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

from gridflow.errors import OutputError

__all__ = ["write_geopackage", "remove_stale_temporaries"]

log = logging.getLogger("gridflow")


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
    remove_stale_temporaries(target)
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


def _process_start() -> float:
    """This process's start time [s since the epoch], to about 10 ms on Linux."""
    try:  # /proc: start in clock ticks since boot, against the time since boot
        with open("/proc/self/stat", encoding="ascii") as fh:
            ticks = int(fh.read().rsplit(")", 1)[1].split()[19])  # field 22, starttime
        since_boot = time.clock_gettime(time.CLOCK_BOOTTIME)
        return time.time() - since_boot + ticks / os.sysconf("SC_CLK_TCK")
    except Exception:
        pass
    try:
        import psutil

        return float(psutil.Process().create_time())  # boot time to the whole second
    except Exception:  # neither: the time this module was first imported
        return _IMPORTED


_IMPORTED = time.time()


def remove_stale_temporaries(target: str | Path) -> list[Path]:
    """Remove temporaries of ``target`` left by killed runs; returns what was removed.

    A temporary ``.<stem>.tmp-*.gpkg`` (and its ``-journal``, ``-wal``, ``-shm``) beside the
    target whose last change is older than this process's start cannot belong to a live run
    writing the same target from this process, and a concurrent run started before this one
    keeps changing its own temporary while it writes. Other targets' temporaries are left
    alone.
    """
    target = Path(target)
    start = _process_start()
    removed = []
    for p in target.parent.glob(f".{glob.escape(target.stem)}.tmp-*.gpkg*"):
        if not p.name.endswith((".gpkg", ".gpkg-journal", ".gpkg-wal", ".gpkg-shm")):
            continue
        try:
            if p.stat().st_mtime < start:
                p.unlink()
                removed.append(p)
        except OSError:  # gone already, or not ours to remove
            continue
    if removed:
        log.info("removed %d stale temporary file(s) of %s", len(removed), target.name)
    return removed


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
