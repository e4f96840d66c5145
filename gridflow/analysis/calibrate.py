"""Roughness calibration to field flow tests by bounded least squares.

Pipes are grouped by the roughness table's rules (material and installation-year class; pipes
no rule matches form the ``default`` group). One factor per group multiplies the group's
roughness; the factors minimise the squared differences between the modelled and the field
residual pressures (:func:`scipy.optimize.least_squares`, trust-region reflective, within
bounds). Groups whose roughness moves no test's residual pressure noticeably are reported and
left as they are.

Notes
-----
The standard deviation of each factor is from the Jacobian at the solution,
``cov = s^2 (J^T J)^-1`` with ``s^2 = |r|^2 / (m - n)`` (m tests, n fitted groups): it needs
more tests than groups and assumes independent, equal errors. The Jacobian is by forward
differences; each column is one extra solve of every test, run in parallel.
"""

from __future__ import annotations

import datetime as _dt
import logging
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd

from gridflow.analysis.flowtest_workers import TestRunner

__all__ = ["RoughnessGroups", "CalibrationResult", "groups_from_table", "calibrate",
           "toml_snippet"]

log = logging.getLogger("gridflow")

#: relative step of the forward-difference Jacobian
JAC_STEP = 0.02
#: factor change used to decide which groups a test informs (a 10 % change)
PROBE = 0.10


@dataclass(frozen=True)
class RoughnessGroups:
    """Roughness groups: a name and table value per group, a group per link (-1: none)."""

    names: tuple[str, ...]
    value: np.ndarray  # table units: Hazen-Williams C, or Darcy-Weisbach roughness [mm]
    rule: np.ndarray  # index in [roughness] table, -1 for the default group
    link_group: np.ndarray
    pipes: np.ndarray  # pipes per group


def groups_from_table(kind, material, install_year, roughness) -> RoughnessGroups:
    """Groups from the ``[roughness]`` table: first matching rule, as the topology applies it.

    Parameters
    ----------
    kind, material, install_year : array_like
        Per link, in network order (``kind`` 'pipe' for pipes; others get no group).
    roughness : RoughnessSection
    """
    kind = pd.Series(kind, dtype="string").fillna("").to_numpy(dtype=object)
    mat = pd.Series(material, dtype="string").fillna("\0").to_numpy(dtype=object)
    year = np.nan_to_num(np.asarray(install_year, dtype=float), nan=-1e9)
    n = len(kind)
    g = np.full(n, -1, dtype=np.int64)
    todo = kind == "pipe"
    names, values, rules = [], [], []
    for k, rule in enumerate(roughness.table):
        hit = todo & (mat == rule.material) & (year < rule.installed_before)
        before = "" if rule.installed_before >= 9999 else f" before {rule.installed_before}"
        names.append(f"{rule.material}{before}")
        values.append(rule.value)
        rules.append(k)
        g[hit] = len(names) - 1
        todo &= ~hit
    names.append("default")
    values.append(roughness.default)
    rules.append(-1)
    g[todo] = len(names) - 1
    return RoughnessGroups(tuple(names), np.asarray(values, float), np.asarray(rules),
                           g, np.bincount(g[g >= 0], minlength=len(names)))


@dataclass(frozen=True)
class CalibrationResult:
    """What a calibration found.

    ``groups``: one row per group: ``group``, ``pipes``, ``tests`` (tests informing it),
    ``fitted`` (0/1; a group informed by tests is still not fitted when there are fewer tests
    than informed groups and others move the tests more), ``value_before``, ``value_after``,
    ``value_sd`` (one standard deviation; NaN where not estimable), ``factor``. ``tests``:
    ``test_id``, ``error_before_m``, ``error_after_m`` (model minus field residual pressure).
    ``status`` and ``message`` are the optimiser's.
    """

    groups: pd.DataFrame
    tests: pd.DataFrame
    rms_before_m: float
    rms_after_m: float
    status: int
    message: str
    evaluations: int
    seconds: float


def calibrate(runner: TestRunner, groups: RoughnessGroups, *, field_residual_m: np.ndarray,
              used: np.ndarray, min_factor: float = 0.4, max_factor: float = 1.6,
              sensitivity_m: float = 0.07) -> CalibrationResult:
    """Fit one roughness factor per informed group to the tests' residual pressures.

    Parameters
    ----------
    runner : TestRunner
        Solves the tests under given group factors (its problem's ``group`` must be
        ``groups.link_group``).
    field_residual_m : ndarray
        Field residual pressure per test [m of head].
    used : ndarray of bool
        Tests to fit to (usable, supplied and solved as mapped).
    min_factor, max_factor : float
        Bounds on every factor.
    sensitivity_m : float
        A test informs a group when a 10 % change of the group's roughness moves its
        residual pressure by at least this [m].
    """
    from scipy.optimize import least_squares

    t0 = time.perf_counter()
    ng = len(groups.names)
    rows = np.flatnonzero(used)
    obs = np.asarray(field_residual_m, float)[rows]
    ones = np.ones(ng)
    base = runner.run([ones], static=False)[0]["residual_m"][rows]
    probes = runner.run([ones + PROBE * np.eye(ng)[g] for g in range(ng)], static=False)
    sens = np.column_stack([p["residual_m"][rows] - base for p in probes]) if ng else \
        np.zeros((len(rows), 0))
    informs = np.abs(np.nan_to_num(sens)) >= sensitivity_m
    n_tests = informs.sum(axis=0)
    fit = np.flatnonzero(n_tests > 0)
    if len(fit) > len(rows):  # more unknowns than tests: fit the most sensitive groups only
        weight = np.abs(np.nan_to_num(sens)).sum(axis=0)
        fit = np.sort(fit[np.argsort(-weight[fit], kind="stable")[:len(rows)]])
    cache: dict[bytes, np.ndarray] = {}

    def full(x):
        f = ones.copy()
        f[fit] = x
        return f

    def resid(res):
        r = res - obs
        return np.where(np.isfinite(r), r, 100.0)  # a test that fails to solve: far off

    def fun(x):
        key = np.asarray(x, float).tobytes()
        if key not in cache:
            cache[key] = resid(runner.run([full(x)], static=False)[0]["residual_m"][rows])
            log.info("calibration: evaluation %d, RMS residual error %.3f m", len(cache),
                     float(np.sqrt(np.mean(cache[key] ** 2))))
        return cache[key]

    def jac(x):
        f0 = fun(x)
        steps = []
        for k in range(len(fit)):
            h = JAC_STEP * max(1.0, abs(x[k]))
            if x[k] + h > max_factor:
                h = -h
            steps.append(h)
        sets = [full(np.asarray(x) + steps[k] * np.eye(len(fit))[k]) for k in range(len(fit))]
        outs = runner.run(sets, static=False)
        return np.column_stack([(resid(o["residual_m"][rows]) - f0) / steps[k]
                                for k, o in enumerate(outs)])

    before = resid(base)
    factor = ones.copy()
    sd = np.full(ng, np.nan)
    status, message = 0, "no group is informed by any test: nothing fitted"
    after = before
    if len(fit) and len(rows):
        sol = least_squares(fun, np.ones(len(fit)), jac=jac, bounds=(min_factor, max_factor),
                            method="trf", x_scale=1.0, xtol=1e-6, ftol=1e-8)
        factor[fit] = sol.x
        after = fun(sol.x)
        status, message = int(sol.status), str(sol.message)
        m, n = len(rows), len(fit)
        if m > n:
            J = np.asarray(sol.jac, float)
            s2 = float(after @ after) / (m - n)
            try:
                cov = s2 * np.linalg.inv(J.T @ J)
                sd[fit] = np.sqrt(np.clip(np.diag(cov), 0.0, None))
            except np.linalg.LinAlgError:
                pass
    fitted = np.zeros(ng, bool)
    fitted[fit] = True
    table = pd.DataFrame({
        "group": list(groups.names), "pipes": groups.pipes, "tests": n_tests,
        "fitted": fitted.astype(np.int8), "value_before": groups.value,
        "value_after": groups.value * factor, "value_sd": groups.value * sd, "factor": factor,
    })
    tests = pd.DataFrame({"test_id": runner.problem.tests.test_id[rows],
                          "error_before_m": before, "error_after_m": after})

    def rms(v):
        return float(np.sqrt(np.mean(v ** 2))) if len(v) else float("nan")

    return CalibrationResult(table, tests, rms(before), rms(after), status, message,
                             runner.evaluations, time.perf_counter() - t0)


def toml_snippet(result: CalibrationResult, roughness, *, units_note: str, tests: int) -> str:
    """The fitted ``[roughness]`` section as TOML text to paste into the config.

    Fitted groups carry their value before, one standard deviation and the number of tests
    informing them as comments; groups the tests cannot inform keep their value, marked.
    """
    g = result.groups
    by_rule = {int(r): row for r, (_, row) in zip(
        [*range(len(roughness.table)), -1], g.iterrows())}

    def value(row) -> str:
        return f"{row['value_after']:.4g}" if row["fitted"] else f"{row['value_before']:.4g}"

    def note(row) -> str:
        if not row["fitted"]:
            return "not informed by any flow test: kept"
        sd = row["value_sd"]
        sd_txt = f" +- {sd:.2g} (1 sd)" if np.isfinite(sd) else " (sd not estimable)"
        return (f"fitted from {row['value_before']:.4g}{sd_txt}, {int(row['tests'])} "
                f"informing test(s)")

    day = _dt.datetime.now(_dt.UTC).date().isoformat()
    lines = [
        f"# Roughness fitted by gridflow calibrate on {day} to {tests} field flow test(s)",
        f"# (residual pressures; RMS error {result.rms_before_m:.3g} m before, "
        f"{result.rms_after_m:.3g} m after; {units_note}).",
        "# Review before use: a fitted value also absorbs errors in elevations, demands,",
        "# closed valves and the tests themselves. Paste over the config's [roughness].",
        "[roughness]",
        f'source = "{roughness.source}"',
        f"default = {value(by_rule[-1])}  # {note(by_rule[-1])}",
        "table = [",
    ]
    for k, rule in enumerate(roughness.table):
        row = by_rule[k]
        yr = "" if rule.installed_before >= 9999 else \
            f", installed_before = {rule.installed_before}"
        lines.append(f'  {{ material = "{rule.material}"{yr}, value = {value(row)} }},'
                     f"  # {note(row)}")
    lines.append("]")
    return "\n".join(lines) + "\n"
