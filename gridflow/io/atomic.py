"""Writing outputs atomically, one file or a whole set.

Every file gridflow writes goes through here:

- :func:`atomic_write` writes one file: ``write(tmp)`` fills a temporary file beside the
  target, which is renamed into place only when ``write`` returned; on any error (or a signal)
  the temporary is removed and an earlier file at the target stays byte-identical.
- :class:`OutputSet` does the same for all outputs of a run (GeoPackage, report, log ...):
  each is written to its own temporary and none is renamed into place until every one is
  complete; :meth:`OutputSet.commit` then replaces them together (the earlier files are kept
  as hard-linked backups during the renames and put back should a rename fail).

Temporaries are named ``.<stem>.tmp-<pid>-<token><suffix>`` (the suffix kept, so GDAL knows the
driver). The pid in the name is how a later run tells a temporary left by a killed process
(that process is gone) from one a live run is still writing: :func:`remove_stale_temporaries`
removes only those whose process no longer exists, on this machine.
"""

from __future__ import annotations

import errno
import logging
import os
import re
import secrets
from collections.abc import Callable, Iterable
from pathlib import Path

from gridflow.errors import OutputError

__all__ = ["TMP_MARK", "temp_path", "atomic_write", "write_text", "OutputSet",
           "remove_stale_temporaries", "is_temporary"]

log = logging.getLogger("gridflow")

#: what marks a temporary's name (``.<stem>.tmp-<pid>-<token><suffix>``)
TMP_MARK = ".tmp-"
_TMP_RE = re.compile(r"^\.(?P<stem>.*)\.tmp-(?P<pid>\d+)-(?P<token>[0-9a-f]{8})(?P<rest>.*)$")
#: side files SQLite may leave beside a database
_SIDE = ("-journal", "-wal", "-shm")
#: errors that mean "this place cannot take the output" (exit 2, naming the output)
_PLACE_ERRNOS = {errno.EROFS, errno.EACCES, errno.EPERM, errno.EISDIR, errno.ENOTDIR,
                 errno.ENAMETOOLONG, errno.ENOENT}


def temp_path(target: str | Path, kind: str = "") -> Path:
    """A fresh temporary path beside ``target`` carrying this process's pid."""
    target = Path(target)
    token = secrets.token_hex(4)
    return target.parent / f".{target.stem}{TMP_MARK}{os.getpid()}-{token}{kind}{target.suffix}"


def is_temporary(path: str | Path) -> bool:
    """True for a name made by :func:`temp_path` (with or without a SQLite side suffix)."""
    return _TMP_RE.match(Path(path).name) is not None


def _remove(path: Path) -> None:
    for p in (str(path), *(str(path) + s for s in _SIDE)):
        try:
            os.unlink(p)
        except FileNotFoundError:
            pass
        except OSError as exc:  # keep going: the caller's error matters more
            log.debug("could not remove %s: %s", p, exc)


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's live process
        return True
    return True


def remove_stale_temporaries(target: str | Path) -> list[Path]:
    """Remove temporaries of ``target`` whose writing process no longer exists.

    Only names made by :func:`temp_path` for this target's stem are considered; another
    target's temporaries, a live process's and unrelated files are kept. Returns what was
    removed.
    """
    target = Path(target)
    removed: list[Path] = []
    try:
        entries = list(target.parent.iterdir())
    except OSError:
        return removed
    for p in entries:
        m = _TMP_RE.match(p.name)
        if m is None or m["stem"] != target.stem or _alive(int(m["pid"])):
            continue
        try:
            p.unlink()
            removed.append(p)
        except OSError:
            continue
    if removed:
        log.info("removed %d stale temporary file(s) of %s", len(removed), target.name)
    return removed


def _oserror(path: Path, exc: OSError, verb: str = "write", what: str = "") -> OutputError:
    return OutputError(f"cannot {verb} {what + ' ' if what else ''}{path}: "
                       f"{exc.strerror or exc}", file=str(path))


def atomic_write(path: str | Path, write: Callable[[Path], object], *,
                 mode: int = 0o644, what: str = "") -> Path:
    """Write one file atomically: ``write(tmp)`` fills a temporary, renamed onto ``path``.

    Parameters
    ----------
    path : path
        The target; an earlier file there is replaced only when ``write`` returned.
    write : callable
        Called with the temporary's path (which does not exist yet); must create it.
    mode : int
        Permission bits of the written file.
    what : str
        What the file is, for messages (e.g. "the report").

    Raises
    ------
    OutputError
        When the folder cannot take the file (named). Errors raised by ``write`` pass through
        after the temporary is removed.
    """
    with OutputSet([path]) as outs:
        outs.write(path, write, mode=mode, what=what)
        outs.commit()
    return Path(path)


def write_text(path: str | Path, text: str, *, encoding: str = "utf-8",
               what: str = "") -> Path:
    """Write a text file atomically (see :func:`atomic_write`)."""
    def _w(tmp: Path) -> None:
        with open(tmp, "x", encoding=encoding) as fh:
            fh.write(text)
    return atomic_write(path, _w, what=what)


class OutputSet:
    """All outputs of a run, written to temporaries and renamed into place together.

    Use as a context manager: leaving the block without :meth:`commit` (an error, a signal)
    removes every temporary and leaves the earlier files untouched::

        with OutputSet([gpkg, html]) as outs:
            outs.write(gpkg, lambda tmp: write_layers(tmp, layers))
            outs.write(html, lambda tmp: write_text(tmp, page))
            outs.commit()
    """

    def __init__(self, targets: Iterable[str | Path]) -> None:
        self.targets = [Path(t) for t in targets]
        self._temps = {t: temp_path(t) for t in self.targets}
        self._written: dict[Path, int] = {}
        self.committed = False
        for t in self.targets:
            remove_stale_temporaries(t)

    def temp(self, target: str | Path) -> Path:
        """The temporary path a target is written to before the commit."""
        return self._temps[Path(target)]

    def temporaries(self) -> list[Path]:
        return list(self._temps.values())

    def write(self, target: str | Path, write: Callable[[Path], object], *,
              mode: int = 0o644, what: str = "") -> Path:
        """Fill the target's temporary with ``write(tmp)``; the target is not touched yet."""
        target = Path(target)
        tmp = self._temps[target]
        _remove(tmp)
        try:
            write(tmp)
            if not tmp.exists():
                raise OutputError(f"nothing was written for {target}", file=str(target))
            os.chmod(tmp, mode)
        except OSError as exc:
            _remove(tmp)
            if isinstance(exc, OutputError) or exc.errno not in _PLACE_ERRNOS:
                raise  # e.g. a full disk: not the output's place, passed on as it is
            raise _oserror(target, exc, what=what) from None
        except BaseException:
            _remove(tmp)
            raise
        self._written[target] = mode
        return tmp

    def adopt(self, target: str | Path, *, mode: int = 0o644) -> Path:
        """Count a temporary filled by someone else (e.g. a log handler) as written."""
        target = Path(target)
        tmp = self._temps[target]
        if not tmp.exists():
            raise OutputError(f"nothing was written for {target}", file=str(target))
        os.chmod(tmp, mode)
        self._written[target] = mode
        return tmp

    def commit(self, targets: Iterable[str | Path] | None = None) -> list[Path]:
        """Rename the written temporaries into place (all of them, or only ``targets``).

        Earlier files are hard-linked to backups first; should a rename fail, the ones already
        renamed are put back, so the earlier set stays as it was.
        """
        chosen = [Path(t) for t in targets] if targets is not None else list(self._written)
        missing = [t for t in chosen if t not in self._written]
        if missing:
            raise OutputError(f"{missing[0]} was not written", file=str(missing[0]))
        backups: list[tuple[Path, Path]] = []
        done: list[Path] = []
        try:
            for t in chosen:
                if t.is_file():
                    bak = temp_path(t, ".bak")
                    try:
                        os.link(t, bak)
                        backups.append((t, bak))
                    except OSError:  # a file system without hard links: no way back
                        pass
            for t in chosen:
                try:
                    os.replace(self._temps[t], t)
                except OSError as exc:
                    raise _oserror(t, exc, "rename into place") from None
                done.append(t)
        except BaseException:
            restored = {t for t, _ in backups}
            for t, bak in backups:
                if t in done:
                    os.replace(bak, t)
            for t in done:
                if t not in restored:
                    _remove(t)
            raise
        finally:
            for _, bak in backups:
                _remove(bak)
        for t in chosen:
            self._written.pop(t, None)
        self.committed = True
        return chosen

    def discard(self) -> None:
        """Remove every temporary not yet renamed into place."""
        for tmp in self._temps.values():
            _remove(tmp)
        self._written.clear()

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, *exc) -> None:
        self.discard()
