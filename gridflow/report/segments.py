"""The report's valve-segment table: the segments whose closure costs most."""

from __future__ import annotations

import pandas as pd

from gridflow.report.data import ReportData
from gridflow.report.document import Column, Table
from gridflow.units import out_field

__all__ = ["segments_table"]


def segments_table(d: ReportData, rows: int = 15) -> Table | None:
    """The most critical segments (by rank where closures were solved, else by what their
    closure cuts off), counts in the caption (None: no segments layer)."""
    if d.segments is None or len(d.segments) == 0:
        return None
    L, _ = out_field("length", d.units)
    Q, _ = out_field("demand", d.units)
    P, _ = out_field("pressure", d.units)
    df = pd.DataFrame(d.segments.drop(columns="geometry", errors="ignore"))
    if "criticality_rank" in df and df["criticality_rank"].notna().any():
        df = df.sort_values(["criticality_rank", "segment_id"], na_position="last")
        how = "ranked by customers a closure leaves out of water or below the minimum pressure"
    else:
        df = df.sort_values(["cut_off_meters", "meters", "segment_id"],
                            ascending=[False, False, True])
        how = "ordered by the meters their closure cuts off beyond themselves"
    caption = (f"Valve segments: {len(df)} in all, {int(df['oversized'].sum())} above the size "
               f"bounds, {int((df['cut_off_segments'] > 0).sum())} whose closure cuts off "
               f"others, {int(df['cannot_isolate'].sum())} no valve can isolate; the top "
               f"{min(rows, len(df))} {how}. Figures follow the valves as mapped: field crews "
               "and the utility's records decide.")
    cols = [Column("criticality_rank", "rank", 0), Column("segment_id", "segment"),
            Column("zone", "zone"), Column("valves", "valves", 0),
            Column(f"length_{L}", f"main [{L}]", 0), Column("meters", "meters", 0),
            Column("hydrants", "hydrants", 0), Column("cut_off_segments", "cuts off", 0),
            Column("cut_off_meters", "meters cut off", 0),
            Column("meters_out_of_water", "meters out of water", 0),
            Column("meters_low_pressure", "meters below minimum", 0),
            Column(f"demand_out_of_water_{Q}", f"demand lost [{Q}]", 1),
            Column(f"worst_pressure_drop_{P}", f"worst drop [{P}]", 1),
            Column("valve_ids", "isolating valves")]
    return Table(df, cols, "segments", caption, limit=rows)
