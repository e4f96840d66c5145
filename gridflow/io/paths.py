"""Which files a run reads and writes, checked before anything is read or written.

- :func:`require_regular_file`: config, inputs, DEM and the previous output must be regular
  files. A FIFO, a device or a folder is refused at once, without opening it (opening a FIFO
  waits for a writer; reading ``/dev/zero`` never ends).
- :func:`check_outputs`: every path a run writes (GeoPackage, report, log, diagnostics and
  their temporaries) against every path it reads, by resolved path and, where both exist, by
  device and inode (a symlink or a hard link to an input is the input). A clash names both.
  Each output must not be a folder, and its folder must exist and be writable.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Mapping
from pathlib import Path

from gridflow.errors import GridflowError, InputError, OutputError

__all__ = ["require_regular_file", "check_outputs", "same_file", "input_paths"]


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def require_regular_file(path: str | Path, what: str, *, key: str | None = None,
                         error: type[GridflowError] = InputError) -> Path:
    """Stop unless ``path`` is an existing regular file (symlinks followed); never opens it.

    Raises
    ------
    InputError (or ``error``)
        Naming the file and ``what`` it is for (``key``: the config key naming it).
    """
    path = Path(path)
    where = f" ({key})" if key else ""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise error(f"{what} {path}{where} does not exist", file=str(path), key=key) from None
    except OSError as exc:
        raise error(f"{what} {path}{where} cannot be read ({exc.strerror})", file=str(path),
                    key=key) from None
    if not stat.S_ISREG(st.st_mode):
        raise error(f"{what} {path}{where} is {_kind(st.st_mode)}, not a regular file",
                    file=str(path), key=key)
    if not os.access(path, os.R_OK):
        raise error(f"{what} {path}{where} cannot be read (permission denied)", file=str(path),
                    key=key)
    return path


def same_file(a: Path, b: Path) -> bool:
    """True when ``a`` and ``b`` name one file: the same resolved path, or (both existing) the
    same device and inode (hard links, symlinks, bind mounts)."""
    try:
        if a.resolve() == b.resolve():
            return True
    except OSError:
        pass
    try:
        sa, sb = os.stat(a), os.stat(b)
    except OSError:
        return False
    return (sa.st_dev, sa.st_ino) == (sb.st_dev, sb.st_ino)


def check_outputs(outputs: Mapping[str, Path], inputs: Mapping[str, Path]) -> None:
    """Refuse outputs that clash with an input or with each other, are folders, or cannot be
    written in their folder.

    Parameters
    ----------
    outputs : mapping
        What each output is ("output GeoPackage", "log file" ...) to its path.
    inputs : mapping
        What each input is ("config", "input gis" ...) to its path.

    Raises
    ------
    OutputError
        Naming both paths of a clash, or the output and what is wrong with its folder.
    """
    outs = [(w, Path(p)) for w, p in outputs.items()]
    for what, out in outs:
        for iwhat, inp in inputs.items():
            if same_file(out, Path(inp)):
                raise OutputError(f"the {what} {out} is one of the inputs (the {iwhat} {inp}): "
                                  "gridflow never writes to an input; choose another --out (or "
                                  "rename the input)", file=str(out))
    for i, (what, out) in enumerate(outs):
        for what2, out2 in outs[i + 1:]:
            if same_file(out, out2):
                raise OutputError(f"the {what} {out} and the {what2} {out2} are one file; choose "
                                  "another --out", file=str(out))
    for what, out in outs:
        if out.is_dir():
            raise OutputError(f"the {what} {out} is a folder; name a file", file=str(out))
        if out.exists() and not out.is_file():
            raise OutputError(f"the {what} {out} exists and is not a regular file",
                              file=str(out))
        folder = out.absolute().parent
        if not folder.is_dir():
            raise OutputError(f"output folder {folder} does not exist (for the {what} {out})",
                              file=str(out))
        if not os.access(folder, os.W_OK | os.X_OK):
            raise OutputError(f"output folder {folder} is not writable (for the {what} {out})",
                              file=str(out))


def input_paths(cfg, previous: str | Path | None = None) -> dict[str, Path]:
    """Every file a run reads (config, inputs, DEM, ``previous``), by what it is; each
    checked to be a regular file (:func:`require_regular_file`). Database inputs (PostGIS)
    are not files and are left out."""
    from gridflow.config.database import is_database

    out: dict[str, Path] = {}
    if cfg.path is not None:
        out["config"] = require_regular_file(cfg.path, "config", key=None)
    for name, p in cfg.inputs.items():
        if is_database(p):
            continue
        out[f"input {name!r}"] = require_regular_file(cfg.resolve(p), "input file",
                                                      key=f"inputs.{name}")
    if cfg.elevation.source == "dem" and cfg.elevation.dem:
        out["DEM"] = require_regular_file(cfg.resolve(cfg.elevation.dem), "DEM raster",
                                          key="elevation.dem")
    if previous and not is_database(previous):
        out["previous output (--previous)"] = require_regular_file(
            Path(previous), "previous output (--previous)")
    return out
