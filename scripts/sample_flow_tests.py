"""Invented field hydrant flow tests for the Millbrook sample (used by make_sample_gis.py).

The tests are made by solving Millbrook's own model with one roughness group deliberately
different from the config's table: old cast iron (installed before 1930) at Hazen-Williams
C 55 where the table says 75. Tests near the old town therefore disagree with the model (its
roughness there is too high), tests elsewhere agree, and ``gridflow calibrate`` has something to
find. Gauge readings are rounded to 0.5 psi after a small seeded noise; a few tests give
pitot readings per outlet instead of a total flow; one test flows two hydrants; one record is
bad (residual above static, as if the two readings were swapped).

Everything is drawn from one seeded generator, and the solves are deterministic, so the layers
are reproducible.
"""

from __future__ import annotations

import datetime as dt
import tomllib
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

#: the true roughness of the group the sample's table gets wrong
TRUE_GROUP = ("cast_iron", 1930)
TRUE_C = 55.0
TABLE_C = 75.0
N_OLD, N_OTHER = 8, 8
MAX_GPM = 3000.0  # what a crew flows from a few outlets
TEST_LAYER, OUTLET_LAYER = "HydrantFlowTests", "FlowTestOutlets"


def _config(gpkg: Path, toml_path: Path):
    from gridflow.config import parse_config

    table = tomllib.loads(toml_path.read_text(encoding="utf-8"))
    table["inputs"] = {"gis": str(gpkg)}
    for role in ("flow_tests", "flow_test_outlets"):
        table["layers"].pop(role, None)
    table["fireflow"]["enabled"] = False
    return parse_config(table, base_dir=toml_path.parent, path=toml_path)


def make_flow_tests(gpkg: Path, toml_path: Path, seed: int):
    """The two flow-test layers (tests as points at the residual hydrant; outlets a table)."""
    from gridflow.analysis.calibrate import groups_from_table
    from gridflow.analysis.flowtests import FlowTestProblem, prepare, simulate
    from gridflow.analysis.nfpa import GPM, nozzle_flow_gpm
    from gridflow.demand import allocate
    from gridflow.findings import Findings
    from gridflow.jobs.flowtests import level_networks
    from gridflow.jobs.run import solve_options
    from gridflow.topology import build_network
    from gridflow.units import M_HEAD_PER_PSI

    cfg = _config(gpkg, toml_path)
    f = Findings()
    clean = build_network(cfg, f)
    alloc = allocate(cfg, clean, f)
    levels, nets = level_networks(cfg, clean, alloc)
    links = clean.links
    groups = groups_from_table(links["kind"].to_numpy(dtype=object),
                               links["material"].to_numpy(dtype=object),
                               links["install_year"].to_numpy(dtype=float), cfg.roughness)
    k = [i for i, r in enumerate(cfg.roughness.table)
         if (r.material, r.installed_before) == TRUE_GROUP][0]
    factors = np.ones(len(groups.names))
    factors[k] = TRUE_C / TABLE_C
    net0 = nets[0]
    old_node = np.zeros(net0.n_nodes, bool)
    g = groups.link_group == k
    old_node[net0.from_idx[g]] = True
    old_node[net0.to_idx[g]] = True

    rng = np.random.default_rng(seed + 291)
    hyd = clean.hydrants.reset_index(drop=True)
    hyd = hyd[hyd["zone"].astype(str) != ""].reset_index(drop=True)
    xy = np.column_stack([hyd.geometry.x.to_numpy(), hyd.geometry.y.to_numpy()])
    node = hyd["node_idx"].to_numpy(np.int64)
    zone = hyd["zone"].astype(str).to_numpy()
    old = np.flatnonzero(old_node[node] & (zone == "CENTRAL"))
    other = np.flatnonzero(~old_node[node])
    pick = np.r_[rng.choice(old, min(len(old), 8 * N_OLD), replace=False),
                 rng.choice(other, min(len(other), 8 * N_OTHER), replace=False)]
    is_old = old_node[node[pick]]
    rows = []
    for i, o in zip(pick, is_old):
        d = np.hypot(*(xy - xy[i]).T)
        d[(zone != zone[i]) | (node == node[i])] = np.inf
        r = int(np.argmin(d))
        if np.isfinite(d[r]) and d[r] <= 400:
            rows.append({"flow": int(i), "residual": r, "old": bool(o)})
    hyd_all = pd.DataFrame(clean.hydrants.drop(columns="geometry"))
    opts = solve_options(cfg)
    psi = 1.0 / M_HEAD_PER_PSI

    def solve_truth(frame: pd.DataFrame, outlets: pd.DataFrame) -> dict:
        read = frame.rename(columns={"TEST_ID": "test_id", "TEST_DATE": "date",
                                     "RES_HYD": "residual_hydrant",
                                     "FLOW_HYD": "flowing_hydrants", "DEMAND": "scenario"})
        read["total_flow"] = read["FLOW_GPM"].astype(float) * GPM
        read["static_pressure"] = 100.0  # placeholders: the solve needs only the draws
        read["residual_pressure"] = 50.0
        o = outlets.rename(columns={"TEST_ID": "test", "HYD_ID": "hydrant"})
        o["pitot_pressure"] = o["PITOT_PSI"] * M_HEAD_PER_PSI
        o["outlet_diameter"] = o["OUTLET_IN"] * 0.0254
        o["coefficient"] = o["COEF"]
        set_ = prepare(read, o, hyd_all, levels, max_age_years=0)
        problem = FlowTestProblem(tuple(nets), opts, set_, groups.link_group)
        return simulate(problem, np.arange(len(read)), factors)

    def frame_of(rows) -> pd.DataFrame:
        return pd.DataFrame({
            "TEST_ID": [f"T{j}" for j in range(len(rows))], "TEST_DATE": "2020-01-01",
            "RES_HYD": [hyd["hydrant_id"].iloc[r["residual"]] for r in rows],
            "FLOW_HYD": ["; ".join(r.get("flowing", [hyd["hydrant_id"].iloc[r["flow"]]]))
                         for r in rows],
            "FLOW_GPM": 1000.0, "DEMAND": [r.get("demand") for r in rows]})

    no_outlets = pd.DataFrame({"OUTLET_ID": [], "TEST_ID": [], "HYD_ID": [], "PITOT_PSI": [],
                               "OUTLET_IN": [], "COEF": []})
    # keep candidates where at most MAX_GPM gives at least a 10 psi drop (NFPA 291 asks for
    # a drop of at least 10 psi; from memory), the first N_OLD old-town and N_OTHER others
    trial = solve_truth(frame_of(rows), no_outlets)
    drop = (trial["static_m"] - trial["residual_m"]) * psi
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(drop) & (1000.0 * (12.0 / np.maximum(drop, 1e-3)) ** (1 / 1.85)
                                  <= MAX_GPM)
    olds = [r for r, k in zip(rows, ok) if k and r["old"]][:N_OLD]
    others = [r for r, k in zip(rows, ok) if k and not r["old"]][:N_OTHER]
    rows = [r for pair in zip(olds, others) for r in pair]
    rows[3]["flowing"] = [hyd["hydrant_id"].iloc[rows[3]["flow"]]]
    d = np.hypot(*(xy - xy[rows[3]["flow"]]).T)  # test 4: two hydrants flowing together
    d[(zone != zone[rows[3]["flow"]])
      | np.isin(np.arange(len(d)), [rows[3]["flow"], rows[3]["residual"]])] = np.inf
    rows[3]["flowing"].append(hyd["hydrant_id"].iloc[int(np.argmin(d))])
    for j, r in enumerate(rows):
        r["demand"] = "max_day" if j % 5 == 4 else None
    frame = frame_of(rows)
    days = [dt.date(2019, 4, 1) + dt.timedelta(days=int(v))
            for v in rng.integers(0, 6 * 365, len(rows))]
    frame["TEST_ID"] = [f"FT-{day.year}-{101 + j:03d}" for j, day in enumerate(days)]
    frame["TEST_DATE"] = [day.isoformat() for day in days]
    frame["geometry"] = [hyd.geometry.iloc[r["residual"]] for r in rows]
    # size each test's flow for a residual drop of 12-25 psi (drop ~ Q^1.85), as crews do
    trial = solve_truth(frame, no_outlets)
    drop = (trial["static_m"] - trial["residual_m"]) * psi
    want = rng.uniform(12.0, 22.0, len(frame))
    q = np.clip(1000.0 * (want / np.maximum(drop, 0.05)) ** (1 / 1.85), 400.0, MAX_GPM)
    outlets = []
    for j in range(len(frame)):
        flowing = frame.loc[j, "FLOW_HYD"].split("; ")
        if j % 3 == 1:  # pitot readings per outlet: one 2.5 in outlet per 1000 gpm or less
            total = 0.0
            for h in flowing:
                n_out = int(np.ceil(q[j] / len(flowing) / 1000.0))
                per = q[j] / len(flowing) / n_out
                p = float(np.round((per / (29.83 * 0.9 * 2.5 ** 2)) ** 2 * 2) / 2)
                for _ in range(n_out):
                    outlets.append({"OUTLET_ID": f"{frame.loc[j, 'TEST_ID']}-{len(outlets) + 1}",
                                    "TEST_ID": frame.loc[j, "TEST_ID"], "HYD_ID": h,
                                    "PITOT_PSI": p, "OUTLET_IN": 2.5, "COEF": 0.9})
                    total += float(nozzle_flow_gpm(p, 2.5, 0.9))
            frame.loc[j, "FLOW_GPM"] = np.nan
        else:
            frame.loc[j, "FLOW_GPM"] = float(np.round(q[j] / 10.0) * 10.0)
    out_df = pd.DataFrame(outlets)
    sim = solve_truth(frame, out_df)
    noise = rng.normal(0.0, 0.3, (len(frame), 2))
    static = np.round((sim["static_m"] * psi + noise[:, 0]) * 2) / 2
    resid = np.round((sim["residual_m"] * psi + noise[:, 1]) * 2) / 2
    frame["STATIC_PSI"] = static
    frame["RESID_PSI"] = resid
    keep = np.isfinite(static) & np.isfinite(resid) & (resid >= 20.0)
    frame = frame[keep].reset_index(drop=True)
    out_df = out_df[out_df["TEST_ID"].isin(frame["TEST_ID"])].reset_index(drop=True)
    # the bad record: static and residual swapped when typed in
    b = len(frame) - 1
    frame.loc[b, ["STATIC_PSI", "RESID_PSI"]] = frame.loc[b, ["RESID_PSI", "STATIC_PSI"]].values
    cols = ["TEST_ID", "TEST_DATE", "RES_HYD", "FLOW_HYD", "STATIC_PSI", "RESID_PSI",
            "FLOW_GPM", "DEMAND", "geometry"]
    gdf = gpd.GeoDataFrame(frame[cols], geometry="geometry", crs=clean.crs)
    return gdf, out_df


def add_flow_tests(gpkg: Path, toml_path: Path, seed: int) -> dict[str, object]:
    """Append the flow-test layers to ``gpkg``; returns the ids the README names."""
    import pyogrio

    gdf, outlets = make_flow_tests(gpkg, toml_path, seed)
    gdf.to_file(gpkg, layer=TEST_LAYER, driver="GPKG", engine="pyogrio")
    pyogrio.write_dataframe(outlets, gpkg, layer=OUTLET_LAYER, driver="GPKG")
    return {"flow_tests": list(gdf["TEST_ID"]), "bad_flow_test": gdf["TEST_ID"].iloc[-1],
            "pitot_flow_tests": sorted(set(outlets["TEST_ID"]))}
