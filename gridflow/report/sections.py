"""The report's tables, each a function of :class:`ReportData` returning a DataFrame.

Values are in the run's display units (converted here, once). Every table's cost grows with the
rows it shows or with one pass over the arrays (``np.bincount``, ``np.argpartition``), never
with per-feature Python work, so a 500k-main network costs about what a small one does plus a
few vector passes.

Zones: the topology names each pressure zone after the zone values the GIS maps on it; a part
of the network the GIS names nowhere (often a single node cut off by a closed valve) gets an
automatic name ``zone_1``, ``zone_2`` ... Such parts are grouped here under one row,
:data:`UNNAMED_ZONE`, so that the utility's own zones stand out.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from gridflow.network import LINK_KINDS, LINK_PIPE, NODE_KINDS
from gridflow.report.data import NODE_FLAGS, PIPE_FLAGS, ReportData

__all__ = ["UNNAMED_ZONE", "display_zones", "zone_codes", "overview", "scenario_summary",
           "flags_by_zone", "fire_by_zone", "worst_nodes", "fastest_mains", "failing_hydrants",
           "unsupplied", "findings_counts", "routine_counts", "changes_counts", "criteria_table"]

UNNAMED_ZONE = "(parts without a zone name)"
_AUTO_ZONE = re.compile(r"zone_\d+")


def display_zones(zone: np.ndarray) -> np.ndarray:
    """Zone names for tables: automatic names (``zone_<n>``) grouped as :data:`UNNAMED_ZONE`,
    empty names likewise."""
    z = pd.Series(np.asarray(zone, dtype=object)).fillna("").astype(str)
    auto = z.str.fullmatch(_AUTO_ZONE.pattern) | (z == "")
    return np.where(auto.to_numpy(), UNNAMED_ZONE, z.to_numpy()).astype(object)


def zone_codes(zone: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(display_zones(zone).astype(str), return_inverse=True)``, with the names
    worked out once per distinct zone (a handful) rather than once per node."""
    code, uniq = pd.factorize(np.asarray(zone, dtype=object), use_na_sentinel=False)
    names, inverse = np.unique(display_zones(np.asarray(uniq, dtype=object)).astype(str),
                               return_inverse=True)
    return names, inverse[code]


def overview(d: ReportData) -> pd.DataFrame:
    """The summary cards: ``title``, ``value``, ``detail``."""
    net, f = d.network, d.fields
    nk = pd.Series(np.asarray(NODE_KINDS, dtype=object)[net.node_kind]).value_counts()
    lk = pd.Series(np.asarray(LINK_KINDS, dtype=object)[net.link_kind]).value_counts()
    unit, k = f.long_length
    total = float(d.conv(net.length_m[net.link_kind == LINK_PIPE], "length").sum()) * k
    worst = d.worst_scenario().name
    rows = [("nodes", f"{net.n_nodes:,}", ", ".join(f"{v:,} {i}" for i, v in nk.items())),
            ("links", f"{net.n_links:,}", ", ".join(f"{v:,} {i}" for i, v in lk.items())),
            ("main length", f"{total:,.1f} {unit}", "pipes only"),
            ("scenarios", str(len(d.scenarios)), f"lowest pressure in {worst}")]
    if d.hydrants is not None:
        fail = int((d.hydrants["meets_required"].fillna(0).astype(int) == 0).sum())
        rows.append(("hydrants", f"{len(d.hydrants):,}", f"{fail:,} below required fire flow"))
    if d.findings is not None:
        sev = d.findings["severity"].astype(str).value_counts()
        rows.append(("findings", f"{len(d.findings):,}",
                     ", ".join(f"{sev.get(s, 0):,} {s}" for s in ("error", "warning"))))
    if d.routine:
        rows.append(("routine facts", f"{sum(d.routine.values()):,}",
                     "counted, nothing to act on"))
    return pd.DataFrame(rows, columns=["title", "value", "detail"])


def criteria_table(d: ReportData) -> pd.DataFrame:
    """The thresholds the flags used, in display units."""
    c, f = d.criteria, d.fields
    rows = [("minimum pressure (low pressure flag)", d.conv(c.min_pressure, "pressure"),
             f.u_pressure),
            ("maximum pressure (high pressure flag)", d.conv(c.max_pressure, "pressure"),
             f.u_pressure),
            ("maximum velocity (high velocity flag)", d.conv(c.max_velocity, "velocity"),
             f.u_velocity),
            ("maximum unit head loss (high head loss flag)",
             d.conv(c.max_unit_headloss, "unit_headloss"), f.u_unit_headloss)]
    return pd.DataFrame([(a, float(v), u) for a, v, u in rows],
                        columns=["criterion", "value", "unit"])


def scenario_summary(d: ReportData) -> pd.DataFrame:
    """One row per scenario: iterations, demand, pressure range, flag counts."""
    rows = []
    for s in d.scenarios:
        r, j = s.result, s.junction
        p = np.where(j, r.pressure_m, np.nan)
        has = np.isfinite(p).any()
        lo = int(np.nanargmin(p)) if has else -1
        pipe = s.network.link_kind == LINK_PIPE
        v = np.abs(r.velocity_ms[pipe])
        v = v[np.isfinite(v)]
        rows.append({
            "scenario": s.name, "iterations": r.iterations,
            "demand": float(d.conv(np.nansum(r.demand_m3s), "demand")),
            "min_p": float(d.conv(p[lo], "pressure")) if has else np.nan,
            "min_node": str(s.network.node_id[lo]) if has else "",
            "max_p": float(d.conv(np.nanmax(p), "pressure")) if has else np.nan,
            "max_v": float(d.conv(v.max(), "velocity")) if v.size else np.nan,
            **{fl: int(s.node_flags[fl].sum()) for fl in NODE_FLAGS},
            "unsupplied": int(s.unsupplied.sum()),
            **{fl: int(s.pipe_flags[fl].sum()) for fl in PIPE_FLAGS},
        })
    return pd.DataFrame(rows)


def flags_by_zone(d: ReportData) -> pd.DataFrame:
    """Flag counts per scenario and zone (a pipe belongs to its from node's zone)."""
    net = d.network
    zones, code = zone_codes(net.zone)
    pcode = code[net.from_idx]
    nz = len(zones)
    parts = []
    for s in d.scenarios:
        t = pd.DataFrame({"scenario": s.name, "zone": zones,
                          "nodes": np.bincount(code, minlength=nz)})
        for fl in NODE_FLAGS:
            t[fl] = np.bincount(code, s.node_flags[fl], nz).astype(int)
        t["unsupplied"] = np.bincount(code, s.unsupplied, nz).astype(int)
        t["pipes"] = np.bincount(pcode, minlength=nz)
        for fl in PIPE_FLAGS:
            t[fl] = np.bincount(pcode, s.pipe_flags[fl], nz).astype(int)
        parts.append(t)
    return _unnamed_last(pd.concat(parts, ignore_index=True), ["scenario"])


def _unnamed_last(t: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    t = t.assign(_u=(t["zone"] == UNNAMED_ZONE).astype(int))
    order = {k: i for i, k in enumerate(dict.fromkeys(t[keys[0]]))} if keys else {}
    if keys:
        t = t.assign(_k=t[keys[0]].map(order))
        t = t.sort_values(["_k", "_u", "zone"], kind="stable").drop(columns="_k")
    else:
        t = t.sort_values(["_u", "zone"], kind="stable")
    return t.drop(columns="_u").reset_index(drop=True)


def fire_by_zone(d: ReportData) -> pd.DataFrame:
    """Hydrants per zone: how many meet their required flow, by class, lowest available."""
    h, f = d.hydrants, d.fields
    if h is None:
        return pd.DataFrame()
    t = pd.DataFrame({"zone": display_zones(h["zone"].to_numpy()),
                      "meets": h["meets_required"].fillna(0).astype(int).to_numpy(),
                      "cls": h["nfpa_class"].fillna("").astype(str).to_numpy(),
                      "avail": h[f.available_flow].astype(float).to_numpy()})
    t["fails"] = 1 - t["meets"]
    for c in ("AA", "A", "B", "C"):
        t[c] = (t["cls"] == c).astype(int)
    g = t.groupby("zone").agg(hydrants=("zone", "size"), meets=("meets", "sum"),
                              fails=("fails", "sum"), AA=("AA", "sum"), A=("A", "sum"),
                              B=("B", "sum"), C=("C", "sum"), min_avail=("avail", "min"))
    return _unnamed_last(g.reset_index(), [])


def _flag_text(flags: dict[str, np.ndarray], idx) -> list[str]:
    out = []
    for i in idx:
        out.append(", ".join(k.replace("_", " ") for k, v in flags.items() if v[i]))
    return out


def worst_nodes(d: ReportData) -> pd.DataFrame:
    """The ``worst_rows`` supplied junctions with the lowest pressure in any scenario."""
    net, k = d.network, d.worst_rows
    p = np.vstack([np.where(s.junction & np.isfinite(s.result.pressure_m), s.result.pressure_m,
                            np.inf) for s in d.scenarios])
    which = np.argmin(p, axis=0)
    low = p[which, np.arange(net.n_nodes)]
    cand = np.flatnonzero(np.isfinite(low))
    if cand.size > k:  # ties at the cut keep the smaller ids, as a full sort would
        kth = np.partition(low[cand], k - 1)[k - 1]
        cand = cand[low[cand] <= kth]
    idx = cand[np.lexsort((net.node_id[cand].astype(str), low[cand]))][:k]
    sc = which[idx]
    flags = [_flag_text(d.scenarios[s].node_flags, [i])[0] for s, i in zip(sc, idx)]
    head = np.array([d.scenarios[s].result.head_m[i] for s, i in zip(sc, idx)])
    dem = np.array([d.scenarios[s].result.demand_m3s[i] for s, i in zip(sc, idx)])
    f = d.fields
    return pd.DataFrame({
        "node_id": net.node_id[idx].astype(str), "zone": net.zone[idx].astype(str),
        "scenario": [d.scenarios[s].name for s in sc],
        f.pressure: d.conv(low[idx], "pressure"),
        f.elevation: d.conv(net.elevation_m[idx], "elevation"),
        f.head: d.conv(head, "head"), f.demand: d.conv(dem, "demand"), "flags": flags})


def fastest_mains(d: ReportData) -> pd.DataFrame:
    """The ``worst_rows`` pipes with the highest speed in any scenario."""
    net, k = d.network, d.worst_rows
    pipe = net.link_kind == LINK_PIPE
    v = np.vstack([np.where(pipe & np.isfinite(s.result.velocity_ms),
                            np.abs(s.result.velocity_ms), -np.inf) for s in d.scenarios])
    which = np.argmax(v, axis=0)
    top = v[which, np.arange(net.n_links)]
    cand = np.flatnonzero(np.isfinite(top))
    if cand.size > k:
        kth = -np.partition(-top[cand], k - 1)[k - 1]
        cand = cand[top[cand] >= kth]
    idx = cand[np.lexsort((net.link_id[cand].astype(str), -top[cand]))][:k]
    sc = which[idx]
    f = d.fields
    r = [d.scenarios[s].result for s in sc]
    return pd.DataFrame({
        "pipe_id": net.link_id[idx].astype(str),
        "from_node": net.node_id[net.from_idx[idx]].astype(str),
        "to_node": net.node_id[net.to_idx[idx]].astype(str),
        "scenario": [d.scenarios[s].name for s in sc],
        f.diameter: d.conv(net.diameter_m[idx], "diameter"),
        f.flow: d.conv([x.flow_m3s[i] for x, i in zip(r, idx)], "flow"),
        "_speed": d.conv(top[idx], "velocity"),
        f.unit_headloss: d.conv([x.unit_headloss[i] for x, i in zip(r, idx)],
                                "unit_headloss"),
        "flags": [_flag_text(d.scenarios[s].pipe_flags, [i])[0] for s, i in zip(sc, idx)]})


def failing_hydrants(d: ReportData) -> pd.DataFrame:
    """Hydrants below their required fire flow, the furthest below first (all of them)."""
    h, f = d.hydrants, d.fields
    if h is None:
        return pd.DataFrame()
    h = pd.DataFrame(h.drop(columns="geometry", errors="ignore"))
    h = h[h["meets_required"].fillna(0).astype(int) == 0].copy()
    h["_ratio"] = h[f.available_flow].astype(float) / h[f.required_flow].astype(float)
    return h.sort_values(["_ratio", "hydrant_id"], kind="stable").reset_index(drop=True)


def unsupplied(d: ReportData, limit: int = 50) -> list[tuple[str, int, list[str]]]:
    """Per scenario with any: (scenario, how many, the first ``limit`` node ids)."""
    out = []
    for s in d.scenarios:
        idx = np.flatnonzero(s.unsupplied)
        if idx.size:
            out.append((s.name, int(idx.size), list(s.network.node_id[idx[:limit]].astype(str))))
    return out


def findings_counts(d: ReportData) -> pd.DataFrame:
    """Findings (things to look at) counted by kind and severity, errors first."""
    if d.findings is None:
        return pd.DataFrame(columns=["kind", "severity", "count"])
    t = pd.DataFrame({"kind": d.findings["kind"].astype(str),
                      "severity": d.findings["severity"].astype(str)})
    c = t.groupby(["kind", "severity"]).size().rename("count").reset_index()
    c["_o"] = c["severity"].map({"error": 0, "warning": 1}).fillna(2)
    return c.sort_values(["_o", "kind"], kind="stable").drop(columns="_o").reset_index(
        drop=True)


def routine_counts(d: ReportData) -> pd.DataFrame:
    """Routine facts of reading and cleaning, counted by kind."""
    return pd.DataFrame({"kind": list(d.routine), "count": list(d.routine.values())})


def changes_counts(d: ReportData) -> pd.DataFrame:
    """New and resolved flags since the previous run, per layer and flag."""
    c = d.changes
    if c is None or not len(c):
        return pd.DataFrame(columns=["layer", "flag", "new", "resolved"])
    c = c.astype({"change": str, "layer": str, "flag": str})
    t = (c.groupby(["layer", "flag", "change"]).size().unstack("change", fill_value=0)
         .reset_index())
    for col in ("new", "resolved"):
        if col not in t:
            t[col] = 0
    return t
