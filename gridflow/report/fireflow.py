"""The fire-flow bottleneck table: the nodes at the system minimum that limit most hydrants."""

from __future__ import annotations

import pandas as pd

from gridflow.report.data import ReportData
from gridflow.report.document import Column, Table

__all__ = ["in_service", "limiting_nodes_table"]


def in_service(hydrants: pd.DataFrame | None) -> pd.DataFrame | None:
    """The in-service hydrants only (all where the table has no ``in_service``): the report
    counts what the map shows as in service."""
    if hydrants is None or "in_service" not in hydrants.columns:
        return hydrants
    return hydrants[hydrants["in_service"].fillna(1).astype(int) == 1]


def limiting_nodes_table(d: ReportData, rows: int = 20) -> Table | None:
    """Per zone, the nodes that limit hydrants at the system minimum, most hydrants first
    (None: no hydrant is limited by another node)."""
    h = d.hydrants
    if h is None or "limiting_node_id" not in h.columns:
        return None
    h = h[h["limited_by"].astype(str) == "node_pressure"]
    if h.empty:
        return None
    g = (h.groupby([h["zone"].fillna("").astype(str), h["limiting_node_id"].astype(str)])
         ["hydrant_id"].agg(hydrants="size",
                            hydrant_ids=lambda v: ", ".join(sorted(map(str, v))[:8])
                            + (" ..." if len(v) > 8 else ""))
         .reset_index()
         .sort_values(["hydrants", "zone", "limiting_node_id"], ascending=[False, True, True],
                      kind="stable"))
    caption = (f"Nodes limiting fire flow: {len(g)} node(s) at the system minimum limit "
               f"{int(g['hydrants'].sum())} in-service hydrant(s); the bottlenecks first. "
               "Model estimates: field flow tests and licensed engineers decide.")
    cols = [Column("zone", "zone"), Column("limiting_node_id", "node at the minimum"),
            Column("hydrants", "hydrants it limits", 0), Column("hydrant_ids", "hydrants")]
    return Table(g, cols, "limiting-nodes", caption, limit=rows)
