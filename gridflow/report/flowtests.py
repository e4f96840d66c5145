"""The report's flow-test section: field against model, from the ``flow_tests`` layer."""

from __future__ import annotations

import html

import numpy as np
import pandas as pd

from gridflow.units import out_field

__all__ = ["flow_tests_section"]


def flow_tests_section(layer: pd.DataFrame | None, units: str) -> str:
    """HTML of the section (empty when no flow tests were mapped): count, mean and worst
    residual-pressure error, tests out of tolerance, and one row per test."""
    if layer is None:
        return ""
    p, _ = out_field("pressure", units)
    q, _ = out_field("flow", units)
    df = pd.DataFrame(layer.drop(columns="geometry", errors="ignore"))
    used = df["used"] == 1
    err = df.loc[used, f"residual_diff_{p}"].abs()
    out = df.loc[df["out_of_tolerance"] == 1, "test_id"].astype(str).tolist()
    worst = "" if err.empty else str(df.loc[err.idxmax(), "test_id"])
    lines = [f"{len(df)} field flow test(s), {int(used.sum())} compared with the model "
             f"({len(df) - int(used.sum())} left out: see the findings).",
             "" if err.empty else f"Residual pressure, model minus field: mean absolute error "
             f"{err.mean():.1f} {p}, worst {err.max():.1f} {p} (test {worst}).",
             f"Out of tolerance: {', '.join(out) if out else 'none'}."]
    cols = ["test_id", "test_date", "residual_hydrant_id", "flowing_hydrant_ids",
            f"field_static_pressure_{p}", f"model_static_pressure_{p}",
            f"field_residual_pressure_{p}", f"model_residual_pressure_{p}", f"residual_diff_{p}",
            f"field_flow_{q}", f"field_flow_20psi_{q}", f"model_flow_20psi_{q}",
            f"abs_error_change_{p}", "out_of_tolerance", "problem"]
    table = df[[c for c in cols if c in df]].round(1).replace({np.nan: None})
    return ('<section id="flow-tests"><h2>Field flow tests against the model</h2>'
            + "".join(f"<p>{html.escape(t)}</p>" for t in lines if t)
            + table.to_html(index=False, escape=True, na_rep="", border=0)
            + "<p class=\"note\">The 20 psi flows are the NFPA 291 extrapolation of each test "
              "(left empty where the field drop is under 10 psi). Results are model estimates; "
              "field flow tests, local codes and licensed engineers decide.</p></section>")
