"""The report's flow-test table: field against model, from the ``flow_tests`` layer."""

from __future__ import annotations

import pandas as pd

from gridflow.report.data import ReportData
from gridflow.report.document import Column, Table
from gridflow.units import out_field

__all__ = ["flow_tests_table"]


def flow_tests_table(d: ReportData) -> Table | None:
    """One row per field flow test, the summary in the caption (None: no tests mapped).

    The caption gives the count, the mean and worst absolute residual-pressure error and the
    tests out of tolerance; the 20 psi flows are the NFPA 291 extrapolation of each test.
    """
    if d.flow_tests is None:
        return None
    p, _ = out_field("pressure", d.units)
    q, _ = out_field("flow", d.units)
    df = pd.DataFrame(d.flow_tests.drop(columns="geometry", errors="ignore"))
    used = df["used"] == 1 if "used" in df else pd.Series(True, index=df.index)
    err = df.loc[used, f"residual_diff_{p}"].abs() if f"residual_diff_{p}" in df else \
        pd.Series(dtype=float)
    out = df.loc[df.get("out_of_tolerance", 0) == 1, "test_id"].astype(str).tolist()
    parts = [f"Field flow tests against the model: {len(df)} test(s), {int(used.sum())} "
             f"compared ({len(df) - int(used.sum())} left out: see the findings)"]
    if not err.empty:
        worst = str(df.loc[err.idxmax(), "test_id"])
        parts.append(f"residual pressure, model minus field: mean absolute error "
                     f"{err.mean():.1f} {p}, worst {err.max():.1f} {p} (test {worst})")
    parts.append(f"out of tolerance: {', '.join(out) if out else 'none'}")
    parts.append("20 psi flows by the NFPA 291 extrapolation (empty where the field drop is "
                 "under 10 psi); model estimates: field flow tests, local codes and licensed "
                 "engineers decide")
    cols = [Column("test_id", "test"), Column("test_date", "date"),
            Column("residual_hydrant_id", "residual hydrant"),
            Column("flowing_hydrant_ids", "flowing hydrant(s)"),
            Column(f"field_static_pressure_{p}", f"field static [{p}]", 1),
            Column(f"model_static_pressure_{p}", f"model static [{p}]", 1),
            Column(f"field_residual_pressure_{p}", f"field residual [{p}]", 1),
            Column(f"model_residual_pressure_{p}", f"model residual [{p}]", 1),
            Column(f"residual_diff_{p}", f"difference [{p}]", 1),
            Column(f"field_flow_{q}", f"flow [{q}]", 0),
            Column(f"field_flow_20psi_{q}", f"field at 20 psi [{q}]", 0),
            Column(f"model_flow_20psi_{q}", f"model at 20 psi [{q}]", 0),
            Column(f"abs_error_change_{p}", f"error change [{p}]", 1),
            Column("out_of_tolerance", "out of tolerance"), Column("problem", "problem")]
    return Table(df, cols, "flow_tests", "; ".join(parts) + ".")
