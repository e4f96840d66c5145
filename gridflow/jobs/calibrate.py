"""``gridflow calibrate``: fit roughness groups to the field flow tests.

Reads and cleans the GIS as the nightly run does, solves every usable test, fits one factor
per roughness group and writes the fitted ``[roughness]`` section as a TOML snippet to paste.
The config and the inputs are never changed.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

import numpy as np

from gridflow.config import load_config
from gridflow.errors import ConfigError
from gridflow.findings import Findings

__all__ = ["calibrate_job"]

log = logging.getLogger("gridflow")


def calibrate_job(config_path: str | Path, *, out: str | Path | None = None,
                  workers: int | None = None, scheduler: str | None = None) -> int:
    """Run the calibration; writes the snippet to ``out`` (default: beside the config's
    output, ``<output>_roughness.toml``) atomically and prints a summary. Returns 0.

    Raises
    ------
    ConfigError
        No flow tests mapped, or roughness not from the table (exit code 2).
    """
    from gridflow.analysis.calibrate import calibrate, groups_from_table, toml_snippet
    from gridflow.analysis.flowtest_workers import TestRunner
    from gridflow.analysis.flowtests import compare
    from gridflow.demand import allocate
    from gridflow.jobs.flowtests import build_problem
    from gridflow.jobs.run import check_output_path, require_solvable, solve_options
    from gridflow.topology import build_network

    t_start = time.perf_counter()
    cfg = load_config(config_path)
    if cfg.layers.flow_tests is None:
        raise ConfigError("calibration needs field flow tests: map layers.flow_tests in the "
                          "config", key="layers.flow_tests")
    if cfg.roughness.source != "table":
        raise ConfigError("calibration fits the groups of the roughness table: set [roughness] "
                          "source = 'table'", key="roughness.source")
    out_path = Path(out) if out else cfg.resolve(cfg.run.output).with_name(
        Path(cfg.run.output).stem + "_roughness.toml")
    if not out:
        out_path.parent.mkdir(parents=True, exist_ok=True)
    check_output_path(out_path, cfg)
    findings = Findings()
    log.info("reading and cleaning the GIS")
    clean = build_network(cfg, findings)
    require_solvable(cfg, clean)
    alloc = allocate(cfg, clean, findings)
    links = clean.links
    groups = groups_from_table(links["kind"].to_numpy(dtype=object),
                               links["material"].to_numpy(dtype=object),
                               links["install_year"].to_numpy(dtype=float), cfg.roughness)
    opts = solve_options(cfg)
    problem, _, _ = build_problem(cfg, clean, alloc, findings, opts, group=groups.link_group)
    sec = cfg.flow_tests
    with TestRunner(problem, workers=workers, scheduler=scheduler,
                    batch_size=sec.batch_size) as runner:
        sim = runner.run([None])[0]
        table = compare(problem.tests, sim, tolerance_m=sec.tolerance)
        used = table["used"].to_numpy() == 1
        for tid, why in zip(table["test_id"][~used], table["problem"][~used]):
            log.warning("flow test %s left out: %s", tid, why)
        log.info("calibrating %d roughness group(s) to %d flow test(s) (%s)", len(groups.names),
                 int(used.sum()), runner.mode)
        res = calibrate(runner, groups, field_residual_m=problem.tests.residual_m, used=used,
                        min_factor=sec.min_factor, max_factor=sec.max_factor,
                        sensitivity_m=sec.sensitivity)
        mode = runner.mode
    dw = cfg.run.headloss_model == "darcy-weisbach"
    note = "values are absolute roughness in mm" if dw else "values are Hazen-Williams C"
    text = toml_snippet(res, cfg.roughness, units_note=note, tests=int(used.sum()))
    _write_text(out_path, text)
    _print(res, out_path, int(used.sum()), int((~used).sum()), mode,
           time.perf_counter() - t_start)
    return 0


def _write_text(path: Path, text: str) -> None:
    """Write beside the target, then rename into place (no half-written snippet)."""
    import os
    import tempfile

    from gridflow.errors import OutputError

    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {exc.strerror}", file=str(path)) from None


def _print(res, out_path: Path, used: int, left_out: int, mode: str, seconds: float) -> None:
    from gridflow.units import M_HEAD_PER_PSI

    psi = 1.0 / M_HEAD_PER_PSI
    print(f"gridflow calibrate: {used} flow test(s) used, {left_out} left out; RMS residual "
          f"pressure error {res.rms_before_m * psi:.2f} psi before, {res.rms_after_m * psi:.2f} "
          f"psi after ({res.evaluations} evaluations, {mode}, {seconds:.1f} s)")
    for _, g in res.groups.iterrows():
        if g["fitted"]:
            sd = f" +- {g['value_sd']:.2g}" if np.isfinite(g["value_sd"]) else ""
            print(f"  {g['group']}: {g['value_before']:.4g} -> {g['value_after']:.4g}{sd} "
                  f"({int(g['tests'])} test(s), {int(g['pipes'])} pipes)")
        else:
            print(f"  {g['group']}: {g['value_before']:.4g} kept: no flow test informs it "
                  f"({int(g['pipes'])} pipes)")
    print(f"optimiser: {res.message}")
    print(f"written: {out_path} (paste into the config after review; nothing else changed)")
    print("Results are model estimates; field flow tests, local codes and licensed engineers "
          "decide.")
