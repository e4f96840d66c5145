"""Running one bad-input case through the command line and checking what it must never do.

A case (:class:`Case`) names the town it runs on and what it must get: an exit code and the
words of the message, or (for a repair) exit 0 and the findings that record the repair.
:func:`run_case` then checks, for every case, that the input files are byte-identical afterwards,
that no temporary file is left beside the target, and, when the run stops, that the previous
output at the target is intact and nothing else was written.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import pyogrio
from click.testing import CliRunner

from gridflow.cli.main import cli
from tests.bad_input.town import P, Town, write_layer


@dataclass
class Case:
    """What one bad input must get.

    ``code``: the contract's exit code. ``match``: words the one-line message must hold (file,
    layer, feature id, field, key). ``findings``: (kind, feature_id) pairs the findings layer
    must hold (repairs). ``prepare(folder, gpkg, cfg)`` spoils files after the town is written
    and may return a clean-up callable; ``check(out_path)`` adds assertions on a written output.
    """

    town: Town | None = None
    code: int = 2
    match: tuple[str, ...] = ()
    findings: tuple[tuple[str, str], ...] = ()
    command: str = "run"
    args: tuple[str, ...] = ()
    out: str | None = None  # --out relative to the case folder ({folder} expanded)
    prepare: Callable | None = None
    check: Callable | None = None
    summary: str = ""


@dataclass
class Outcome:
    code: int
    stderr: str
    out_path: Path
    folder: Path
    findings: object = None
    written: list = field(default_factory=list)


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def previous_output(path: Path) -> bytes:
    """A small, real GeoPackage standing for last night's output; returns its bytes."""
    write_layer(path, "run_info", [{"key": "previous", "value": "night before",
                                    "geometry": P(0, 0)}])
    return path.read_bytes()


def run_case(case: Case, folder: Path) -> Outcome:
    town = case.town if case.town is not None else Town()
    gpkg, cfg = town.write(folder)
    cleanup = case.prepare(folder, gpkg, cfg) if case.prepare else None
    try:
        out_dir = folder / "out"
        target = (Path(case.out.format(folder=folder)) if case.out else out_dir / "result.gpkg")
        prev = None
        if target.parent.is_dir() and not target.exists() and case.out is None:
            prev = previous_output(target)
        inputs = {p: _digest(p) for p in folder.iterdir() if p.is_file()}
        listing = set(out_dir.iterdir()) if out_dir.is_dir() else set()
        args = [case.command, str(cfg), *case.args]
        if case.out:
            args += ["--out", str(target)]
        res = CliRunner().invoke(cli, args)
        stderr = res.stderr
        # never a traceback or an unexpected exception escaping the guard
        assert res.exception is None or isinstance(res.exception, SystemExit), repr(
            res.exception)
        assert "Traceback" not in res.output, res.output
        # inputs byte-identical (GeoPackage, config, anything else the case put beside them)
        for p, h in inputs.items():
            assert p.exists() and _digest(p) == h, f"input {p.name} changed"
        # no temporary file beside the target
        if target.parent.is_dir():
            stray = [p.name for p in target.parent.iterdir() if ".tmp-" in p.name]
            assert not stray, stray
        written = sorted(set(out_dir.iterdir()) - listing) if out_dir.is_dir() else []
        outcome = Outcome(res.exit_code, stderr, target, folder, written=written)
        if res.exit_code == 0 and target.exists():
            outcome.findings = pyogrio.read_dataframe(target, layer="findings",
                                                      read_geometry=False)
        elif res.exit_code == 2:
            if prev is not None:  # the previous output is intact
                assert target.read_bytes() == prev, "previous output changed"
            # nothing half-written: at most the run's log file appeared
            assert all(p.suffix == ".log" for p in written), written
        return outcome
    finally:
        if cleanup:
            cleanup()
