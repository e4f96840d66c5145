"""The run's findings log counts routine facts instead of keeping them as rows: the layer, the
counts and the totals are what a log keeping every row gives."""

from __future__ import annotations

import pandas as pd
import shapely

from gridflow.findings import Findings


def _fill(f: Findings) -> Findings:
    p = shapely.points([[0.0, 0.0], [1.0, 1.0], [2.0, 2.0]])
    f.add_many("end_snapped", "info", "mains", ["M1", "M2", "M3"], "snapped within 0.05 m",
               list(p))
    f.add("part_not_connected", "warning", "pipes", "M9", "not connected", p[0])
    f.add_many("hydrant_attached", "info", "hydrants", ["H1", "H2"], "attached", list(p[:2]))
    f.add("bad_diameter", "error", "mains", "M7", "diameter 0 in", None)
    return f


def test_counting_log_gives_the_same_layer_and_counts():
    full, lean = _fill(Findings()), _fill(Findings(keep_routine=False))
    a = full.to_geodataframe(routine=False)
    b = lean.to_geodataframe(routine=False)
    pd.testing.assert_frame_equal(pd.DataFrame(a.drop(columns="geometry")),
                                  pd.DataFrame(b.drop(columns="geometry")))
    assert list(a.geometry.to_wkt()) == list(b.geometry.to_wkt())
    assert lean.routine_counts() == full.routine_counts() == {"end_snapped": 3,
                                                             "hydrant_attached": 2}
    for sev in (None, "info", "warning", "error"):
        assert lean.count(severity=sev) == full.count(severity=sev)
    assert lean.count(kind="end_snapped") == 3 and lean.count(kind="bad_diameter") == 1
    assert len(lean) == len(full) == 7
    assert len(lean.kind) == 2  # only the rows someone should look at are kept


def test_extend_keeps_the_counts():
    lean = Findings(keep_routine=False)
    lean.extend(_fill(Findings()))
    lean.extend(_fill(Findings(keep_routine=False)))
    assert lean.routine_counts() == {"end_snapped": 6, "hydrant_attached": 4}
    assert lean.count(severity="warning") == 2 and len(lean.kind) == 4


def test_cleaning_with_a_counting_log_counts_what_a_full_log_keeps():
    """The stages skip writing routine messages a counting log would drop: the counts, the
    kept rows and the network are what a full log's build gives."""
    from pathlib import Path

    from gridflow.config import load_config
    from gridflow.topology import build_network

    cfg = load_config(Path(__file__).resolve().parents[1] / "sample_gis" / "millbrook.toml")
    full, lean = Findings(), Findings(keep_routine=False)
    a, b = build_network(cfg, full), build_network(cfg, lean)
    counts = full.routine_counts()
    assert counts["end_snapped"] > 0 and counts["hydrant_attached"] > 0
    assert lean.routine_counts() == counts
    pd.testing.assert_frame_equal(pd.DataFrame(full.to_geodataframe(routine=False)),
                                  pd.DataFrame(lean.to_geodataframe(routine=False)))
    assert list(a.network.link_id) == list(b.network.link_id)
